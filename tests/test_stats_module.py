"""The shared statistics module against scipy, hand computations and its own definitions."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from xbench import stats as S


def test_hierarchical_bootstrap_with_one_seed_is_the_tile_bootstrap():
    x = np.random.default_rng(1).normal(0.4, 0.1, 40)
    got = S.hierarchical_bootstrap_ci(x[None, :], n_resamples=800, seed=3)
    tile = S.bootstrap_ci(x, n_resamples=800, seed=3)
    assert got == tile
    # Reference: scipy.stats.bootstrap (BCa, same resamples and generator seed).
    ref = stats.bootstrap((x,), np.mean, n_resamples=800, method="BCa", rng=np.random.default_rng(3))
    assert (got.low, got.high) == pytest.approx((ref.confidence_interval.low, ref.confidence_interval.high))
    # A seed without any defined value does not count as a seed.
    with_empty = S.hierarchical_bootstrap_ci([x, np.full(5, np.nan)], n_resamples=800, seed=3)
    assert with_empty == tile


def test_hierarchical_bootstrap_with_one_tile_per_seed_equals_scipy_percentile():
    # With one tile per seed the second stage draws nothing new: the hierarchical bootstrap is the plain
    # percentile bootstrap over seeds. Reference: scipy.stats.bootstrap, method="percentile"; the two use
    # different random draws, so they agree within Monte-Carlo error (8000 resamples: about 2% of the width).
    v = np.random.default_rng(2).gamma(2.0, 1.0, 25)
    got = S.hierarchical_bootstrap_ci([[a] for a in v], n_resamples=8000, seed=4)
    ref = stats.bootstrap((v,), np.mean, n_resamples=8000, method="percentile", rng=np.random.default_rng(5))
    width = ref.confidence_interval.high - ref.confidence_interval.low
    assert got.method == "hierarchical" and got.mean == pytest.approx(v.mean())
    assert abs(got.low - ref.confidence_interval.low) < 0.05 * width
    assert abs(got.high - ref.confidence_interval.high) < 0.05 * width


def test_hierarchical_bootstrap_identical_seeds_no_wider_and_seed_variance_widens():
    x = np.random.default_rng(3).normal(0.5, 0.2, 32)
    tile = stats.bootstrap((x,), np.mean, n_resamples=4000, method="percentile", rng=np.random.default_rng(0))
    tile_width = tile.confidence_interval.high - tile.confidence_interval.low
    same = S.hierarchical_bootstrap_ci(np.stack([x, x, x]), n_resamples=4000, seed=0)
    # Identical seeds add no between-seed variance, and each resample averages three independent tile
    # resamples: the interval is no wider than the tile interval (about 1/sqrt(3) of it).
    assert same.mean == pytest.approx(x.mean())
    assert same.high - same.low <= tile_width
    # Seeds that differ (training variance) widen it beyond the pooled tile interval.
    shifted = np.stack([x - 0.2, x, x + 0.2])
    pooled = stats.bootstrap(
        (shifted.ravel(),), np.mean, n_resamples=4000, method="percentile", rng=np.random.default_rng(0)
    )
    wide = S.hierarchical_bootstrap_ci(shifted, n_resamples=4000, seed=0)
    assert wide.high - wide.low > pooled.confidence_interval.high - pooled.confidence_interval.low
    assert S.hierarchical_bootstrap_ci(shifted, n_resamples=500, seed=9) == S.hierarchical_bootstrap_ci(
        shifted, n_resamples=500, seed=9
    )  # deterministic


def test_pairwise_wilcoxon_equals_scipy_per_pair_and_holm_over_all_pairs():
    rng = np.random.default_rng(4)
    x = rng.normal(size=(30, 4)) + np.array([0, 0.3, 0.6, 0.1])
    p, n = S.pairwise_wilcoxon(x)
    for i in range(4):
        for j in range(i + 1, 4):
            ref = stats.wilcoxon(x[:, i], x[:, j]).pvalue  # reference: scipy.stats.wilcoxon, one pair at a time
            assert p[i, j] == pytest.approx(ref, rel=1e-9) and p[j, i] == p[i, j] and n[i, j] == 30
    adj = S.holm_matrix(p)
    iu = np.triu_indices(4, 1)
    np.testing.assert_allclose(adj[iu], S.holm(p[iu]))
    x[3, 1] = np.nan  # a missing value: that pair drops the unit, the others keep it
    p2, n2 = S.pairwise_wilcoxon(x)
    assert n2[0, 1] == 29 and n2[0, 2] == 30
    assert p2[0, 1] == pytest.approx(stats.wilcoxon(np.delete(x[:, 0], 3), np.delete(x[:, 1], 3)).pvalue)


def test_minimum_pairs_for_a_test_agrees_with_the_exact_distribution():
    # Reference: scipy.stats.wilcoxon's exact null distribution; with every difference of one sign the
    # two-sided p is 2 / 2^n (n = 5: 0.0625, n = 6: 0.03125).
    for n in (5, 6, 8, 12):
        p = stats.wilcoxon(np.arange(1, n + 1, dtype=float), method="exact").pvalue
        assert S.wilcoxon_min_p(n) == pytest.approx(p)
    assert S.min_pairs_for_test(1, 0.05) == 6
    # 13 methods, all 78 pairs: 78 * 2 / 2^n < 0.05 needs 2^n > 3120, n = 12 (2^11 = 2048 is too few).
    assert S.min_pairs_for_test(78, 0.05) == 12
    assert 78 * S.wilcoxon_min_p(12) < 0.05 <= 78 * S.wilcoxon_min_p(11)
    # The 8-tile re-running columns of 13 methods can never reject: smallest Holm p = 78 * 2 / 256.
    assert 78 * S.wilcoxon_min_p(8) > 0.05


def test_kendall_tau_by_hand_and_against_scipy():
    # One swapped pair among 4 items: 5 concordant, 1 discordant pair, tau = (5 - 1) / 6.
    assert S.kendall_tau([1, 2, 3, 4], [1, 2, 4, 3]) == pytest.approx(4 / 6)
    assert S.kendall_tau([1, 2, 3], [3, 2, 1]) == pytest.approx(-1.0)
    a, b = [0.3, 0.1, 0.5, 0.5, 0.9], [1, 0, 2, 3, 4]
    assert S.kendall_tau(a, b) == pytest.approx(stats.kendalltau(a, b).statistic)  # tau-b with a tie
    assert np.isnan(S.kendall_tau([1.0], [2.0]))


def test_anchor_score_is_zero_for_random_and_one_for_oracle():
    for hib, rnd, orc in ((True, 0.2, 0.9), (False, 0.5, 0.1)):  # the direction of the metric is respected
        a, why = S.anchor_score([rnd, orc, (rnd + orc) / 2], rnd, orc, hib)
        assert why == "" and a.tolist() == pytest.approx([0.0, 1.0, 0.5])
    a, why = S.anchor_score([0.3], 0.5, 0.9, False)  # lower is better but the oracle is higher: undefined
    assert np.isnan(a).all() and "does not beat random" in why
    a, why = S.anchor_score([0.3], np.nan, 0.9, True)
    assert np.isnan(a).all() and "needs both" in why
    assert "no preferred direction" in S.anchor_score([0.3], 0.1, 0.9, None)[1]


def test_one_copy_of_the_report_statistics():
    from xbench.report import stats as report_stats

    for name in ("holm", "wilcoxon_paired", "bootstrap_ci", "friedman", "nemenyi_q", "cd_groups"):
        assert getattr(report_stats, name) is getattr(S, name)

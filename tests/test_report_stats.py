"""The shared statistics module (xbench.stats) against published values, hand computations and scipy.stats."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from xbench import stats as S

# Demsar (2006), JMLR 7, Table 5(a): critical values q_0.05 of the two-tailed Nemenyi test, k = 2..10
# (values from memory of the paper's table).
DEMSAR_Q05 = [1.960, 2.343, 2.569, 2.728, 2.850, 2.949, 3.031, 3.102, 3.164]


def test_nemenyi_critical_values_match_demsar_2006():
    for k, expected in zip(range(2, 11), DEMSAR_Q05, strict=True):
        q = S.nemenyi_q(k, 0.05)
        # Demsar (2006) Table 5(a): agreement within one unit of the third decimal. The table was derived
        # from studentized range quantiles printed to 3 decimals; the exact quantile (scipy) differs by
        # 0.0007 at k = 3 (2.3437 vs 2.343) and k = 7 (2.9483 vs 2.949).
        assert abs(q - expected) <= 0.001 + 1e-9, (k, q, expected)
        # Rounding the studentized range quantile to 3 decimals first, as printed tables do, reproduces
        # every value of Demsar's table exactly to 3 decimals.
        q_table = round(stats.studentized_range.ppf(0.95, k, np.inf), 3) / np.sqrt(2)
        assert round(q_table, 3) == expected, (k, q_table, expected)


def test_nemenyi_cd_worked_example_demsar_2006():
    # Demsar (2006) Section 3.2.4 (from memory): 4 classifiers on 14 data sets, q_0.05 = 2.569,
    # CD = 2.569 * sqrt(4 * 5 / (6 * 14)) = 1.25.
    assert S.nemenyi_cd(4, 14, 0.05) == pytest.approx(1.25, abs=0.005)
    assert S.nemenyi_cd(4, 14, 0.05) == pytest.approx(S.nemenyi_q(4) * np.sqrt(20 / 84), rel=1e-12)


def test_friedman_equals_scipy():
    rng = np.random.default_rng(3)
    scores = rng.normal(size=(12, 5)) + np.arange(5) * 0.4
    got = S.friedman(scores)
    ref = stats.friedmanchisquare(*scores.T)  # reference: scipy.stats.friedmanchisquare
    assert got.statistic == pytest.approx(ref.statistic, rel=1e-12)
    assert got.p_value == pytest.approx(ref.pvalue, rel=1e-12)
    # Iman-Davenport F from Demsar (2006), eq. after the Friedman statistic: (N-1) chi2 / (N(k-1) - chi2).
    n, k = scores.shape
    ff = (n - 1) * ref.statistic / (n * (k - 1) - ref.statistic)
    assert got.iman_davenport == pytest.approx(ff, rel=1e-12)
    assert got.iman_davenport_p == pytest.approx(stats.f.sf(ff, k - 1, (k - 1) * (n - 1)), rel=1e-9)
    assert np.isnan(S.friedman(scores[:, :2]).statistic)  # fewer than 3 treatments: undefined


def test_average_ranks_with_ties_by_hand():
    scores = np.array([[0.9, 0.5, 0.5], [0.2, 0.8, 0.4]])
    # Higher is better. Block 1: 0.9 -> 1, the tie at 0.5 shares (2 + 3) / 2 = 2.5. Block 2: 0.8 -> 1,
    # 0.4 -> 2, 0.2 -> 3. Averages: (1 + 3) / 2 = 2, (2.5 + 1) / 2 = 1.75, (2.5 + 2) / 2 = 2.25.
    np.testing.assert_allclose(S.average_ranks(scores, True), [2.0, 1.75, 2.25])
    np.testing.assert_allclose(S.average_ranks(scores, False), [2.0, 2.25, 1.75])


def test_wilcoxon_equals_scipy():
    rng = np.random.default_rng(4)
    a = rng.normal(0.5, 0.1, 40)
    b = a - 0.03 + rng.normal(0, 0.05, 40)
    a[3], b[7] = np.nan, np.nan  # undefined values: the pair is dropped
    got = S.wilcoxon_paired(a, b)
    ok = np.isfinite(a) & np.isfinite(b)
    ref = stats.wilcoxon(a[ok], b[ok])  # reference: scipy.stats.wilcoxon, two-sided, default zero_method
    assert got.n == 38
    assert got.statistic == pytest.approx(ref.statistic)
    assert got.p_value == pytest.approx(ref.pvalue, rel=1e-12)
    assert S.wilcoxon_paired(a, a).p_value == 1.0  # identical: no evidence of a difference
    assert np.isnan(S.wilcoxon_paired([1.0], [2.0]).p_value)


def test_holm_matches_hand_computation():
    # Holm (1979) step-down, worked by hand: p = (0.01, 0.04, 0.03, 0.005), m = 4.
    # Sorted: 0.005 * 4 = 0.02; 0.01 * 3 = 0.03; 0.03 * 2 = 0.06; 0.04 * 1 = 0.04 -> max(0.06, 0.04) = 0.06.
    got = S.holm([0.01, 0.04, 0.03, 0.005])
    np.testing.assert_allclose(got, [0.03, 0.06, 0.06, 0.02], rtol=1e-12)
    # Capped at 1, and NaN entries are ignored (m counts only defined p-values): m = 2 here.
    np.testing.assert_allclose(S.holm([0.6, np.nan, 0.01]), [0.6, np.nan, 0.02], rtol=1e-12)
    np.testing.assert_allclose(S.holm([0.3, 0.8]), [0.6, 0.8], rtol=1e-12)  # 0.3 * 2, then max(0.6, 0.8)
    assert S.holm([0.7, 0.8]).tolist() == [1.0, 1.0]  # 0.7 * 2 capped at 1, and monotone
    assert S.holm([0.9, 0.95, 0.99]).max() <= 1.0


def test_bootstrap_interval_covers_the_mean_about_95_percent():
    # Coverage of the BCa interval for the mean of a normal sample (n = 30): near 95 % over 300 seeded
    # draws (binomial sd ~ 1.3 %; the mean's BCa interval runs slightly short at n = 30).
    rng = np.random.default_rng(5)
    hits = 0
    reps = 300
    for i in range(reps):
        x = rng.normal(1.0, 2.0, 30)
        ci = S.bootstrap_ci(x, 0.95, n_resamples=999, seed=i)
        assert ci.method == "BCa"
        hits += ci.low <= 1.0 <= ci.high
    assert 0.90 <= hits / reps <= 0.99


def test_bootstrap_equals_scipy_and_handles_degenerate_samples():
    x = np.random.default_rng(6).normal(size=25)
    got = S.bootstrap_ci(x, 0.95, n_resamples=500, seed=2)
    ref = stats.bootstrap((x,), np.mean, n_resamples=500, method="BCa", rng=np.random.default_rng(2))
    assert (got.low, got.high) == pytest.approx((ref.confidence_interval.low, ref.confidence_interval.high))
    assert got.mean == pytest.approx(x.mean())
    same = S.bootstrap_ci(np.full(10, 0.3))
    assert (same.low, same.high, same.method) == (0.3, 0.3, "degenerate")
    few = S.bootstrap_ci([0.1, 0.2, np.nan])
    assert few.n == 2 and np.isnan(few.low) and few.method == "none"
    assert np.isnan(S.bootstrap_ci([np.nan]).mean)


def test_cd_groups_by_hand():
    # Ranks 1.0, 1.5, 2.6, 3.9 with CD = 1.2: {1.0, 1.5} (2.6 - 1.0 = 1.6 >= CD), {1.5, 2.6}, {2.6} alone
    # with 3.9 (1.3 >= CD): groups are the maximal runs closer than CD.
    assert S.cd_groups([2.6, 1.0, 3.9, 1.5], 1.2) == [(0, 1), (1, 2)]
    assert S.cd_groups([1, 2, 3], 5.0) == [(0, 2)]
    assert S.cd_groups([1, 2, 3], 0.5) == []

"""Statistics shared by every stage: bootstrap intervals, paired tests, multiple-testing correction, ranks.

A foundation module (like ``errors.py``): pure functions on arrays, no import of any pipeline stage, so the
truth stage, the report and the gates all use the same code. Sources:
- bootstrap confidence intervals (percentile, BCa): Efron & Tibshirani 1993, via ``scipy.stats.bootstrap``;
  the hierarchical bootstrap (resample model seeds, then tiles within each drawn seed) is the two-stage
  bootstrap of Efron & Tibshirani 1993 for nested data;
- Wilcoxon signed-rank test: Wilcoxon 1945, via ``scipy.stats.wilcoxon``;
- Holm's step-down correction: Holm 1979 (written here: scipy has none, statsmodels is not a dependency);
- all-pairs signed-rank tests with Holm instead of mean-rank post-hoc tests: Benavoli, Corani, Mangili,
  JMLR 17, 2016;
- Friedman test, average ranks, Nemenyi critical difference: Demsar 2006 (JMLR 7), the Friedman statistic via
  ``scipy.stats.friedmanchisquare``, q_alpha via ``scipy.stats.studentized_range``;
- Kendall's tau between two rankings: ``scipy.stats.kendalltau`` (tau-b, ties allowed).
"""

from __future__ import annotations

import inspect
import math
import warnings
from dataclasses import dataclass
from functools import lru_cache

import numpy as np
from scipy import stats

CI_METHOD = "BCa"
MIN_N_FOR_CI = 5  # fewer values than this: a bootstrap interval means little, none is given

# ---------------------------------------------------------------- bootstrap intervals


@dataclass(frozen=True)
class Interval:
    """Mean of the finite values with a bootstrap confidence interval."""

    mean: float
    low: float
    high: float
    n: int
    method: str  # "BCa", "percentile", "hierarchical", "degenerate" (all values equal) or "none" (too few)


def _rng_kwarg() -> str:
    # scipy >= 1.15 takes `rng`; older versions `random_state`.
    return "rng" if "rng" in inspect.signature(stats.bootstrap).parameters else "random_state"


_RNG = _rng_kwarg()


def _generator(seed: int | np.random.Generator) -> np.random.Generator:
    return seed if isinstance(seed, np.random.Generator) else np.random.default_rng(seed)


def bootstrap_ci(
    values,
    confidence: float = 0.95,
    n_resamples: int = 2000,
    method: str = CI_METHOD,
    seed: int | np.random.Generator = 0,
    min_n: int = MIN_N_FOR_CI,
) -> Interval:
    """Mean and bootstrap CI of the finite values (NaN are undefined values and are dropped).

    ``method`` is "BCa" (default) or "percentile" (``scipy.stats.bootstrap``; Efron & Tibshirani 1993).
    When BCa is undefined (e.g. a skewed sample whose resampled means are all on one side) the percentile
    interval is returned and ``method`` says so. With fewer than ``min_n`` values (at least 2) the interval
    is NaN (method "none"); when all values are equal it is that value (method "degenerate").
    """
    x = np.asarray(values, dtype=np.float64).ravel()
    x = x[np.isfinite(x)]
    n = int(x.size)
    if n == 0:
        return Interval(np.nan, np.nan, np.nan, 0, "none")
    mean = float(x.mean())
    if n < max(min_n, 2):
        return Interval(mean, np.nan, np.nan, n, "none")
    if np.all(x == x[0]):
        v = float(x[0])
        return Interval(v, v, v, n, "degenerate")
    for m in dict.fromkeys((method, "percentile")):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            res = stats.bootstrap(
                (x,),
                np.mean,
                confidence_level=confidence,
                n_resamples=n_resamples,
                method=m,
                vectorized=True,
                **{_RNG: _generator(seed)},
            )
        low, high = float(res.confidence_interval.low), float(res.confidence_interval.high)
        if np.isfinite(low) and np.isfinite(high):
            return Interval(mean, low, high, n, m)
    return Interval(mean, np.nan, np.nan, n, "none")


def hierarchical_bootstrap_ci(
    values_by_seed,
    confidence: float = 0.95,
    n_resamples: int = 2000,
    seed: int | np.random.Generator = 0,
    min_n: int = MIN_N_FOR_CI,
    one_seed_method: str = CI_METHOD,
) -> Interval:
    """Mean over model seeds of each seed's tile mean, with a two-stage (hierarchical) bootstrap interval.

    ``values_by_seed`` is an (S seeds, T tiles) array (NaN = undefined, dropped) or a list of 1-D arrays.
    Each resample draws S seeds with replacement, then, for every drawn seed, its tiles with replacement;
    the statistic is the mean of the drawn seeds' tile means, and the interval is the percentile interval of
    the resampled statistics (Efron & Tibshirani 1993, nested data). Training variance (between seeds) and
    tile variance (within a seed) both enter the interval.

    With one seed with values this *is* the tile bootstrap: ``bootstrap_ci`` of that seed's tiles (BCa by
    default, ``one_seed_method``). ``n`` is the number of (seed, tile) values used.
    """
    groups = [np.asarray(v, dtype=np.float64).ravel() for v in values_by_seed]
    groups = [g[np.isfinite(g)] for g in groups]
    groups = [g for g in groups if g.size]
    n = int(sum(g.size for g in groups))
    if not groups:
        return Interval(np.nan, np.nan, np.nan, 0, "none")
    if len(groups) == 1:
        return bootstrap_ci(groups[0], confidence, n_resamples, one_seed_method, seed, min_n)
    seed_means = np.array([g.mean() for g in groups])
    mean = float(seed_means.mean())
    if n < max(min_n, 2):
        return Interval(mean, np.nan, np.nan, n, "none")
    if all(np.all(g == groups[0][0]) for g in groups):
        return Interval(mean, mean, mean, n, "degenerate")
    rng = _generator(seed)
    s = len(groups)
    drawn = rng.integers(0, s, size=(n_resamples, s))  # stage 1: seeds
    # stage 2: for every seed, the tile mean of an independent resample at every (resample, position)
    tile_means = np.empty((s, n_resamples, s))
    for i, g in enumerate(groups):
        idx = rng.integers(0, g.size, size=(n_resamples, s, g.size))
        tile_means[i] = g[idx].mean(axis=2)
    chosen = np.take_along_axis(tile_means.transpose(1, 2, 0), drawn[:, :, None], axis=2)[:, :, 0]
    boot = chosen.mean(axis=1)
    tail = (1.0 - confidence) / 2.0
    low, high = np.quantile(boot, [tail, 1.0 - tail])
    return Interval(mean, float(low), float(high), n, "hierarchical")


# ---------------------------------------------------------------- paired tests and corrections


def holm(pvalues) -> np.ndarray:
    """Holm (1979) step-down adjusted p-values, in the input order; NaN entries stay NaN and don't count.

    With the m finite p-values sorted ascending, p_(1) <= ... <= p_(m):
    adjusted p_(i) = max over j <= i of min(1, (m - j + 1) * p_(j)).
    """
    p = np.asarray(pvalues, dtype=np.float64)
    out = np.full(p.shape, np.nan)
    ok = np.flatnonzero(np.isfinite(p))
    m = ok.size
    if m == 0:
        return out
    order = ok[np.argsort(p[ok], kind="stable")]
    scaled = np.minimum(1.0, (m - np.arange(m)) * p[order])
    out[order] = np.maximum.accumulate(scaled)
    return out


@dataclass(frozen=True)
class PairedTest:
    statistic: float
    p_value: float
    n: int  # pairs with both values defined
    note: str = ""


def wilcoxon_paired(a, b, alternative: str = "two-sided", zero_method: str = "wilcox") -> PairedTest:
    """Wilcoxon signed-rank test of a - b over pairs where both are finite (``scipy.stats.wilcoxon``).

    All differences zero: no evidence of a difference, p = 1. Fewer than 2 pairs: p = NaN.
    ``alternative`` "less" tests whether a tends to be smaller than b.
    """
    a = np.asarray(a, dtype=np.float64)
    b = np.asarray(b, dtype=np.float64)
    ok = np.isfinite(a) & np.isfinite(b)
    a, b = a[ok], b[ok]
    n = int(a.size)
    if n < 2:
        return PairedTest(np.nan, np.nan, n, "fewer than 2 pairs")
    if np.all(a == b):
        return PairedTest(0.0, 1.0, n, "all differences zero")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = stats.wilcoxon(a, b, alternative=alternative, zero_method=zero_method)
    return PairedTest(float(res.statistic), float(res.pvalue), n)


def paired_wilcoxon_many(values, pairs) -> tuple[np.ndarray, np.ndarray]:
    """Two-sided Wilcoxon signed-rank p-values of the given (i, j) column pairs of an (n units, k) matrix.

    Returns (p, n) per pair. Units where either value is NaN are dropped per pair; a pair whose differences
    are all zero gets p = 1. Without NaN the tests run as one vectorised ``scipy.stats.wilcoxon`` call.
    """
    x = np.asarray(values, dtype=np.float64)
    pairs = np.asarray(pairs, dtype=int).reshape(-1, 2)
    p = np.full(len(pairs), np.nan)
    n = np.zeros(len(pairs), dtype=int)
    if len(pairs) == 0:
        return p, n
    if np.isfinite(x).all() and x.shape[0] >= 2:
        d = x[:, pairs[:, 0]] - x[:, pairs[:, 1]]
        zero = np.all(d == 0, axis=0)
        p[:] = 1.0
        if (~zero).any():
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                p[~zero] = stats.wilcoxon(d[:, ~zero], axis=0).pvalue
        n[:] = x.shape[0]
        return p, n
    for q, (i, j) in enumerate(pairs):
        t = wilcoxon_paired(x[:, i], x[:, j])
        p[q], n[q] = t.p_value, t.n
    return p, n


def pairwise_wilcoxon(values) -> tuple[np.ndarray, np.ndarray]:
    """Two-sided Wilcoxon signed-rank p-values of every pair of columns of an (n units, k) matrix.

    Returns (p, n_pairs), both (k, k) and symmetric, diagonal NaN (``paired_wilcoxon_many`` on all pairs).
    """
    x = np.asarray(values, dtype=np.float64)
    k = x.shape[1]
    p = np.full((k, k), np.nan)
    npairs = np.zeros((k, k), dtype=int)
    iu, ju = np.triu_indices(k, 1)
    pv, nv = paired_wilcoxon_many(x, np.stack([iu, ju], axis=1))
    p[iu, ju] = p[ju, iu] = pv
    npairs[iu, ju] = npairs[ju, iu] = nv
    return p, npairs


def holm_matrix(p) -> np.ndarray:
    """Holm-adjusted p-values over the upper triangle of a symmetric (k, k) p matrix (all pairs one family)."""
    p = np.asarray(p, dtype=np.float64)
    k = p.shape[0]
    iu, ju = np.triu_indices(k, 1)
    out = np.full_like(p, np.nan)
    adj = holm(p[iu, ju])
    out[iu, ju] = out[ju, iu] = adj
    return out


def wilcoxon_min_p(n: int) -> float:
    """Smallest two-sided p-value the exact Wilcoxon signed-rank test can give with n pairs: 2 / 2^n
    (all n differences of one sign; the null distribution puts mass 2^-n on each extreme)."""
    return float(min(1.0, 2.0 / 2.0**n)) if n > 0 else 1.0


def min_pairs_for_test(n_comparisons: int, alpha: float = 0.05) -> int:
    """Smallest n at which a two-sided exact Wilcoxon test can reject at ``alpha`` after Holm over
    ``n_comparisons`` tests: the smallest Holm-adjusted p is m * 2 / 2^n, so n = ceil(log2(2 m / alpha))."""
    m = max(int(n_comparisons), 1)
    return int(math.ceil(math.log2(2.0 * m / alpha) - 1e-12))


def significance_mark(p: float) -> str:
    """'*' p < 0.05, '**' p < 0.01, '***' p < 0.001, '' otherwise (or undefined)."""
    if not np.isfinite(p):
        return ""
    return "***" if p < 0.001 else "**" if p < 0.01 else "*" if p < 0.05 else ""


# ---------------------------------------------------------------- ranks across blocks


def rank_matrix(scores, higher_is_better: bool) -> np.ndarray:
    """Ranks within each row (block) of an (N, k) matrix: 1 = best, ties get their average rank."""
    s = np.asarray(scores, dtype=np.float64)
    return stats.rankdata(-s if higher_is_better else s, axis=1)


def average_ranks(scores, higher_is_better: bool) -> np.ndarray:
    return rank_matrix(scores, higher_is_better).mean(axis=0)


@dataclass(frozen=True)
class FriedmanResult:
    statistic: float  # chi-square
    p_value: float
    iman_davenport: float  # F_F = (N-1) chi2 / (N(k-1) - chi2), Demsar 2006 eq. after (1)
    iman_davenport_p: float
    n_blocks: int
    k: int
    note: str = ""


def friedman(scores) -> FriedmanResult:
    """Friedman test over an (N blocks, k treatments) matrix (scipy.stats.friedmanchisquare).

    Needs k >= 3 treatments and N >= 2 blocks; otherwise the statistic is NaN with a note.
    """
    s = np.asarray(scores, dtype=np.float64)
    n, k = s.shape if s.ndim == 2 else (0, 0)
    if k < 3 or n < 2:
        return FriedmanResult(np.nan, np.nan, np.nan, np.nan, n, k, "needs >= 3 explainers and >= 2 blocks")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        chi2, p = stats.friedmanchisquare(*[s[:, j] for j in range(k)])
    chi2, p = float(chi2), float(p)
    denom = n * (k - 1) - chi2
    if np.isfinite(chi2) and denom > 0:
        ff = (n - 1) * chi2 / denom
        ff_p = float(stats.f.sf(ff, k - 1, (k - 1) * (n - 1)))
    else:  # identical ranks in every block: chi2 reaches N(k-1)
        ff, ff_p = np.inf, 0.0
    return FriedmanResult(chi2, p, float(ff), ff_p, n, k)


@lru_cache(maxsize=256)
def nemenyi_q(k: int, alpha: float = 0.05) -> float:
    """Critical value q_alpha of the Nemenyi test for k treatments (Demsar 2006, Table 5a):
    the studentized range quantile with infinite degrees of freedom divided by sqrt(2)."""
    if k < 2:
        return np.nan
    return float(stats.studentized_range.ppf(1.0 - alpha, k, np.inf) / np.sqrt(2.0))


def nemenyi_cd(k: int, n_blocks: int, alpha: float = 0.05) -> float:
    """Critical difference CD = q_alpha * sqrt(k (k + 1) / (6 N)) (Demsar 2006, Section 3.2.2)."""
    if k < 2 or n_blocks < 1:
        return np.nan
    return nemenyi_q(k, alpha) * float(np.sqrt(k * (k + 1) / (6.0 * n_blocks)))


def cd_groups(ranks, cd: float) -> list[tuple[int, int]]:
    """Maximal runs of treatments (indices into ranks sorted ascending) whose ranks differ by less than CD.

    Returns (first, last) positions in the sorted order, only runs of two or more, none inside another.
    """
    r = np.sort(np.asarray(ranks, dtype=np.float64))
    if not np.isfinite(cd):
        return []
    groups: list[tuple[int, int]] = []
    last_end = -1
    for i in range(r.size):
        j = i
        while j + 1 < r.size and r[j + 1] - r[i] < cd:
            j += 1
        if j > i and j > last_end:
            groups.append((i, j))
            last_end = j
    return groups


def kendall_tau(a, b) -> float:
    """Kendall's tau-b between two score (or rank) vectors over the same items (``scipy.stats.kendalltau``);
    NaN with fewer than 2 items or when one vector is constant."""
    x = np.asarray(a, dtype=np.float64)
    y = np.asarray(b, dtype=np.float64)
    ok = np.isfinite(x) & np.isfinite(y)
    if ok.sum() < 2:
        return np.nan
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return float(stats.kendalltau(x[ok], y[ok]).statistic)


# ---------------------------------------------------------------- controls as anchors


def anchor_score(x, random_value: float, oracle_value: float, higher_is_better: bool | None) -> tuple[np.ndarray, str]:
    """Where values sit between the controls: (x - random) / (oracle - random); 0 = random, 1 = oracle.

    The formula does not depend on the metric's direction as long as the oracle is better than random in
    that direction; otherwise (no direction, a control missing, the oracle not better than random, e.g. on
    the randomization metrics where a model-independent mask never moves) every value is NaN and the second
    element says why.
    """
    x = np.asarray(x, dtype=np.float64)
    nan = np.full(x.shape, np.nan)
    if higher_is_better is None:
        return nan, "the metric has no preferred direction"
    if not (np.isfinite(random_value) and np.isfinite(oracle_value)):
        return nan, "needs both the random and the oracle control"
    gap = oracle_value - random_value
    if gap == 0 or (gap > 0) != bool(higher_is_better):
        return nan, "the oracle does not beat random on this column"
    return (x - random_value) / gap, ""

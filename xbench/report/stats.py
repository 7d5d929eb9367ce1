"""Statistics for the comparison tables: bootstrap intervals, paired tests, rank statistics.

Pure functions on arrays. Sources:
- bootstrap confidence intervals (BCa): Efron & Tibshirani 1993, via ``scipy.stats.bootstrap``;
- Wilcoxon signed-rank test: Wilcoxon 1945, via ``scipy.stats.wilcoxon``;
- Holm's step-down correction: Holm 1979 (written here: scipy has none, and statsmodels is not a dependency);
- Friedman test, average ranks, Nemenyi critical difference: Demsar 2006 (JMLR 7), Friedman statistic via
  ``scipy.stats.friedmanchisquare``, q_alpha via ``scipy.stats.studentized_range``.
"""

from __future__ import annotations

import inspect
import warnings
from dataclasses import dataclass
from functools import lru_cache

import numpy as np
from scipy import stats

CI_METHOD = "BCa"
MIN_N_FOR_CI = 5  # fewer values than this: a bootstrap interval means little, none is given


@dataclass(frozen=True)
class Interval:
    """Mean of the finite values with a bootstrap confidence interval."""

    mean: float
    low: float
    high: float
    n: int
    method: str  # "BCa", "percentile" (BCa undefined), "degenerate" (all values equal) or "none" (n < 2)


def _rng_kwarg() -> str:
    # scipy >= 1.15 takes `rng`; older versions `random_state`.
    return "rng" if "rng" in inspect.signature(stats.bootstrap).parameters else "random_state"


_RNG = _rng_kwarg()


def bootstrap_ci(
    values,
    confidence: float = 0.95,
    n_resamples: int = 2000,
    method: str = CI_METHOD,
    seed: int = 0,
    min_n: int = MIN_N_FOR_CI,
) -> Interval:
    """Mean and bootstrap CI of the finite values (NaN are undefined values and are dropped).

    BCa by default; when BCa is undefined (e.g. a skewed sample whose resampled means are all on one side)
    the percentile interval is returned and ``method`` says so. With fewer than ``min_n`` values the
    interval is NaN (method "none").
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
    for m in (method, "percentile"):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            res = stats.bootstrap(
                (x,),
                np.mean,
                confidence_level=confidence,
                n_resamples=n_resamples,
                method=m,
                vectorized=True,
                **{_RNG: np.random.default_rng(seed)},
            )
        low, high = float(res.confidence_interval.low), float(res.confidence_interval.high)
        if np.isfinite(low) and np.isfinite(high):
            return Interval(mean, low, high, n, m)
    return Interval(mean, np.nan, np.nan, n, "none")


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


def wilcoxon_paired(a, b) -> PairedTest:
    """Two-sided Wilcoxon signed-rank test of a - b over pairs where both are finite (scipy defaults).

    All differences zero: no evidence of a difference, p = 1. Fewer than 2 pairs: p = NaN.
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
        res = stats.wilcoxon(a, b)
    return PairedTest(float(res.statistic), float(res.pvalue), n)


def significance_mark(p: float) -> str:
    """'*' p < 0.05, '**' p < 0.01, '***' p < 0.001, '' otherwise (or undefined)."""
    if not np.isfinite(p):
        return ""
    return "***" if p < 0.001 else "**" if p < 0.01 else "*" if p < 0.05 else ""


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

"""Null simulations through the report's own comparison code: the family-wise error holds.

All methods equal in distribution (each tile has its own difficulty, shared by the methods, plus independent
noise per method), so every claim of a difference is a false one. A claim, as the report prints it, is a
method left out of the group that cannot be told apart from the best (marks at p_holm < 0.05). The
family-wise error rate is the share of replicates with at least one such claim; it must stay at or below
alpha = 0.05 within Monte-Carlo error. With R = 400 replicates the Monte-Carlo standard error at 0.05 is
sqrt(0.05 * 0.95 / 400) = 0.011; we allow two of them (0.072).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from xbench.report.compare import compare_column

ALPHA = 0.05
REPLICATES = 400
MC_SE = float(np.sqrt(ALPHA * (1 - ALPHA) / REPLICATES))


def null_fwer(k: int, n: int, replicates: int, seed: int, against: str | None = None) -> float:
    rng = np.random.default_rng(seed)
    names = [f"m{i}" for i in range(k)]
    tile_effect = rng.normal(0.0, 1.0, (replicates, n, 1))
    values = tile_effect + rng.normal(0.0, 0.5, (replicates, n, k))  # methods equal in distribution
    errors = 0
    for r in range(replicates):
        wide = pd.DataFrame(values[r], columns=names)
        cmp = compare_column(wide, names, True, ALPHA, against)
        assert cmp.testable and cmp.n_comparisons == (k - 1 if against else k * (k - 1) // 2)
        errors += any(p < ALPHA for p in cmp.p_holm.values())
    return errors / replicates


@pytest.mark.parametrize("k", [6, 16])
def test_all_pairs_with_holm_keeps_the_family_wise_error(k):
    fwer = null_fwer(k, 32, REPLICATES, seed=100 + k)
    assert fwer <= ALPHA + 2 * MC_SE, (k, fwer, MC_SE)


def test_declared_comparator_keeps_the_family_wise_error():
    fwer = null_fwer(6, 32, REPLICATES, seed=7, against="m3")
    assert fwer <= ALPHA + 2 * MC_SE, fwer


def test_a_real_difference_is_found():
    # The same design with one method clearly better: the procedure must not be so conservative that it never
    # rejects (a test that cannot fail would not be a test). m0 shifted by one noise sd on 32 tiles.
    rng = np.random.default_rng(11)
    hits = 0
    for _ in range(50):
        x = rng.normal(0, 1, (32, 1)) + rng.normal(0, 0.5, (32, 6))
        x[:, 0] += 0.5
        cmp = compare_column(
            pd.DataFrame(x, columns=[f"m{i}" for i in range(6)]), [f"m{i}" for i in range(6)], True, ALPHA
        )
        hits += cmp.top == "m0" and len(cmp.top_group) < 6
    assert hits >= 40

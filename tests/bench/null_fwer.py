"""Print the family-wise error rate of the report's paired comparisons under the null (all methods equal).

Usage: python tests/bench/null_fwer.py [replicates]   (default 2000; about a minute on one core)

Compares the report's procedure (all pairs of real methods, Wilcoxon signed-rank, Holm over all pairs:
``xbench.report.compare.compare_column``) with the procedure it replaced (each method against the best chosen
by mean from the same data, Holm over those k - 1 tests), for k = 6 and 16 methods on n = 32 tiles.
"""

from __future__ import annotations

import sys

import numpy as np
import pandas as pd

from xbench import stats
from xbench.report.compare import compare_column


def main(replicates: int = 2000) -> None:
    alpha = 0.05
    se = np.sqrt(alpha * (1 - alpha) / replicates)
    print(f"null FWER, n = 32 tiles, {replicates} replicates (Monte-Carlo se at 0.05: {se:.4f})")
    for k in (6, 16):
        rng = np.random.default_rng(k)
        names = [f"m{i}" for i in range(k)]
        new = old = 0
        for _ in range(replicates):
            x = rng.normal(0, 1, (32, 1)) + rng.normal(0, 0.5, (32, k))
            cmp = compare_column(pd.DataFrame(x, columns=names), names, True, alpha)
            new += any(p < alpha for p in cmp.p_holm.values())
            best = int(np.argmax(x.mean(axis=0)))
            pv, _ = stats.paired_wilcoxon_many(x, [(best, j) for j in range(k) if j != best])
            old += bool((stats.holm(pv) < alpha).any())
        print(f"k = {k:2d}: all pairs + Holm {new / replicates:.4f}   against the best by mean {old / replicates:.4f}")


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 2000)

"""Null simulation of the recommendation page's top group: how often a method is wrongly left out.

Under the null every method's per-tile values come from the same distribution (a shared tile effect plus
independent noise), so any method left out of the top group is a false exclusion. Prints the share of
repetitions with at least one false exclusion (the family-wise error rate; the target is alpha = 0.05).
Run: python tests/bench/bench_recommend_null.py
"""

from __future__ import annotations

import numpy as np

from xbench.report.recommend import top_group


def null_error_rate(n_methods: int, n_tiles: int, repetitions: int, seed: int = 0, alpha: float = 0.05) -> float:
    rng = np.random.default_rng(seed)
    errors = 0
    for _ in range(repetitions):
        x = rng.normal(0, 1, (n_tiles, 1)) + rng.normal(0, 1, (n_tiles, n_methods))
        group = top_group({f"m{i}": x[:, i] for i in range(n_methods)}, True, alpha)
        errors += len(group) < n_methods
    return errors / repetitions


if __name__ == "__main__":
    for k, n in ((3, 12), (4, 30), (6, 32), (10, 64)):
        reps = 600 if k <= 6 else 200
        print(f"methods {k:2d}, tiles {n:3d}, {reps} repetitions: family-wise error {null_error_rate(k, n, reps):.3f}")

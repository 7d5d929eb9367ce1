"""Null simulation of TCAV's significance test (Kim et al. 2018) through our own code: a random set posing
as a concept should come out significant at about the nominal level. Prints the share of significant
trials at the 5% level (one concept, so Bonferroni changes nothing) for each setting of ``resample``.

Model: the GateNet of tests/test_explainers_concepts.py (its gradients flip sign from tile to tile, so
random directions score near 0.5 with real spread).
Usage: python tests/bench/bench_tcav_null.py [TRIALS] [RANDOM_SETS] [RESAMPLE: true,false] [TEST: runs | set]
"""

from __future__ import annotations

import sys
import time

import numpy as np


def main() -> int:
    trials = int(sys.argv[1]) if len(sys.argv) > 1 else 100
    n_random = int(sys.argv[2]) if len(sys.argv) > 2 else 10
    test = sys.argv[4] if len(sys.argv) > 4 else "runs"
    resamples = [v == "true" for v in (sys.argv[3] if len(sys.argv) > 3 else "true,false").split(",")]
    sys.path.insert(0, "tests")
    import torch
    from test_explainers_concepts import C, GateNet, H, W

    from xbench.explainers import ExplainContext, explain
    from xbench.models.base import ModelHandle

    torch.set_num_threads(1)
    model = ModelHandle("gate", 2, module=GateNet().eval())
    for resample in resamples:
        t0 = time.perf_counter()
        p_values = []
        for trial in range(trials):
            rng = np.random.default_rng(100 + trial)
            sets = {f"random-{i}": rng.random((10, C, H, W), dtype=np.float32) for i in range(n_random)}
            sets["noise"] = rng.random((10, C, H, W), dtype=np.float32)
            x = rng.random((12, C, H, W), dtype=np.float32)
            ctx = ExplainContext(seed=trial, concept_sets=sets)
            rep = explain("tcav", model, x, np.ones(12, int), ctx, layer="feat", resample=resample, test=test).concepts
            p_values.append(rep.rows[0]["p_value"])
        p = np.array(p_values)
        rate = float((p < 0.05).mean())
        se = np.sqrt(rate * (1 - rate) / trials)
        print(
            f"test {test}, random sets {n_random}, resample={resample}: significant at 5% in {rate:.3f} "
            f"(+- {1.96 * se:.3f}) of {trials} null trials; "
            f"share of p < 0.01: {(p < 0.01).mean():.3f}  ({time.perf_counter() - t0:.0f} s)",
            flush=True,
        )
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

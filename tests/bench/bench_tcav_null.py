"""Null simulation of TCAV's significance tests through our own code: a random set posing as a concept should
come out significant at about the nominal level (5%). Prints the share of significant (concept, class) tests
at the 5% level (one concept, so Bonferroni changes nothing) and at 1%.

Two models:
- default: the GateNet of tests/test_explainers_concepts.py (its gradients flip sign from tile to tile, so
  random directions score near 0.5 with real spread); example sets of uniform noise.
- ``--task NAME``: the task's first torch model (or ``--model NAME``; seed 0, trained once into $XBENCH_CACHE),
  its explained tiles and default TCAV layer; each trial draws ``random-sets + 1`` fresh random example sets
  from the task's recipe (``--set-size`` tiles each) and lets the last one pose as the concept.

``--evidence layer+relu-layers`` (the default) runs the set test at the default layer and on the evidence pooled
over every ReLU layer, Bonferroni over the two (also printed: each of the two tests alone, from the same trials);
``--evidence relu-layers`` the pooled test, ``--evidence layer`` the test at the default layer alone.

Usage: python tests/bench/bench_tcav_null.py [--trials 100] [--random-sets 10] [--test set|runs]
       [--statistic alignment|score] [--resample true,false] [--evidence layer+relu-layers|relu-layers|layer]
       [--first-trial 0] [--task demo --set-size 80 [--model resnet]]
"""

from __future__ import annotations

import argparse
import sys
import time

import numpy as np


def main() -> int:
    parser = argparse.ArgumentParser()
    parser.add_argument("--trials", type=int, default=100)
    parser.add_argument("--first-trial", type=int, default=0, help="trials first-trial .. first-trial+trials-1")
    parser.add_argument("--random-sets", type=int, default=10)
    parser.add_argument("--test", default="set", choices=("set", "runs"))
    parser.add_argument("--statistic", default="alignment", choices=("alignment", "score"))
    parser.add_argument("--resample", default="true")
    parser.add_argument("--task", default=None)
    parser.add_argument("--set-size", type=int, default=80)
    parser.add_argument("--model", default=None, help="a torch model of the task (default: its first)")
    parser.add_argument(
        "--evidence", default="layer+relu-layers", choices=("layer+relu-layers", "relu-layers", "layer")
    )
    args = parser.parse_args()
    import torch

    from xbench.explainers import ExplainContext, explain

    torch.set_num_threads(1)
    if args.task:
        from xbench.explainers.concept_sets import make_concept_sets
        from xbench.runs.execute import prepare

        prep = prepare(args.task, args.model or next(m.name for m in _torch_models(args.task)), 0)
        model, images, targets = prep.trained.handle, prep.images, prep.targets
        recipe, size = prep.task.data.recipe, prep.task.data.size

        def draw(trial: int) -> dict[str, np.ndarray]:
            sets = make_concept_sets(recipe, size, [], args.set_size, args.random_sets + 1, 50_000 + trial)
            sets["posing"] = sets.pop(f"random-{args.random_sets}")
            return sets

        label = f"task {args.task}, model {model.name}, sets of {args.set_size}"
    else:
        sys.path.insert(0, "tests")
        from test_explainers_concepts import C, GateNet, H, W

        from xbench.models.base import ModelHandle

        model = ModelHandle("gate", 2, module=GateNet().eval())
        images = np.random.default_rng(0).random((12, C, H, W), dtype=np.float32)
        targets = np.ones(12, int)

        def draw(trial: int) -> dict[str, np.ndarray]:
            rng = np.random.default_rng(100 + trial)
            sets = {f"random-{i}": rng.random((10, C, H, W), dtype=np.float32) for i in range(args.random_sets)}
            sets["posing"] = rng.random((10, C, H, W), dtype=np.float32)
            return sets

        label = "GateNet, sets of 10"
    for resample in [v == "true" for v in args.resample.split(",")]:
        t0 = time.perf_counter()
        p_values = []
        parts: dict[str, list[float]] = {"layer": [], "relu-layers": []}
        for trial in range(args.first_trial, args.first_trial + args.trials):
            ctx = ExplainContext(seed=trial, concept_sets=draw(trial))
            options = dict(resample=resample, test=args.test, statistic=args.statistic, evidence=args.evidence)
            if not args.task:
                options["layer"] = "feat"
            rep = explain("tcav", model, images, targets, ctx, **options).concepts
            p_values += [r["p_value"] for r in rep.rows]
            for e in rep.extras["evidence_rows"]:  # the pooled modes also record each test's own p-value
                parts["layer"].append(e["p_layer"])
                parts["relu-layers"].append(e["p_pooled"])
        p = np.array(p_values)
        rate = float((p < 0.05).mean())
        se = np.sqrt(rate * (1 - rate) / len(p))
        print(
            f"{label}: test {args.test}, statistic {args.statistic}, evidence {args.evidence}, "
            f"random sets {args.random_sets}, "
            f"resample={resample}: significant at 5% in {rate:.3f} (+- {1.96 * se:.3f}) of {len(p)} null tests "
            f"({args.trials} trials); share of p < 0.01: {(p < 0.01).mean():.3f}  ({time.perf_counter() - t0:.0f} s)",
            flush=True,
        )
        for name, values in parts.items():
            if values:
                q = np.array(values)
                print(
                    f"  the {name} test alone: {(q < 0.05).mean():.3f} at 5%, {(q < 0.01).mean():.3f} at 1%", flush=True
                )
    return 0


def _torch_models(task_name: str) -> list:
    from xbench.tasks import load_task

    return [m for m in load_task(task_name).models if m.kind != "forest"]


if __name__ == "__main__":
    raise SystemExit(main())

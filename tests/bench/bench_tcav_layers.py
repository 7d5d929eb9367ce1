"""TCAV's power per layer: the test's p-value for the type a class is labelled by, on that class, at every
ReLU layer of a zoo model (the default layer's row marked), the p-value of the test on every ReLU layer's
evidence pooled, and the verdict of the default test (``evidence = "layer+relu-layers"``: the default layer's
test and the pooled one, Bonferroni over the two), so the layer rules can be checked.

    python tests/bench/bench_tcav_layers.py roads:cnn:0 roads:resnet:0 clearings:separable:0 ... [--set KEY=VALUE]

Each argument is TASK:MODEL[:SEED]; the model is trained once into $XBENCH_CACHE. TCAV runs with the task's
own settings (concept sets of `concept_set_size` tiles, `random_sets` random sets, the set test with the
alignment statistic, Bonferroni over the concept types); the p-values are the corrected ones.
"""

from __future__ import annotations

import json
import sys

import torch
from torch import nn


def probe(task: str, model_name: str, seed: int, settings: dict) -> None:
    from xbench.explainers import explain
    from xbench.explainers.tcav import tcav_default_layer
    from xbench.runs.execute import explain_context, prepare
    from xbench.runs.grid import Cell

    prep = prepare(task, model_name, seed, need_concepts=True)
    handle = prep.trained.handle
    module = handle.module
    assert isinstance(module, nn.Module), "the probe needs a torch model of the zoo"
    relus = [name for name, m in module.named_modules() if isinstance(m, nn.ReLU)]
    default = tcav_default_layer(handle)
    cell = Cell(cell_id="probe", task=prep.task.name, model=model_name, seed=seed, explainer="tcav")
    report = explain(
        "tcav", handle, prep.images, prep.targets, explain_context(prep, cell), layers=relus, **settings
    ).concepts
    assert report is not None
    rows = report.extras["layer_rows"]
    names = list(prep.task.class_names)
    print(f"{task} / {model_name} / seed {seed} (default layer {default}){' ' + str(settings) if settings else ''}:")
    for index, types in prep.task.class_driving_types.items():
        cls = names[int(index)]
        for typ in types:
            for r in rows:
                if r["concept"] == typ and r["class_name"] == cls:
                    mark = "  <- default" if r["layer"] == default else ""
                    what = f"{typ:>10} on class {cls:<10} {r['layer']:<24}"
                    print(f"  {what} score {r['score']:.3f}  p {r['p_value']:.2g}{mark}")
            for e in report.extras["evidence_rows"]:
                if e["concept"] == typ and e["class_name"] == cls:
                    what = f"{typ:>10} on class {cls:<10} {'every ReLU layer pooled':<24}"
                    print(f"  {what}              p {e['p_pooled']:.2g}")
            for r in report.rows:
                if r["concept"] == typ and r["class_name"] == cls:
                    what = f"{typ:>10} on class {cls:<10} {report.extras['evidence']:<24}"
                    print(f"  {what} score {r['score']:.3f}  p {r['p_value']:.2g}  <- the test's verdict")


def main() -> int:
    torch.set_num_threads(1)
    args, settings = [], {}
    items = iter(sys.argv[1:])
    for arg in items:
        if arg == "--set":  # an explainer setting, e.g. --set regularization=0.1
            key, value = next(items).split("=", 1)
            settings[key] = json.loads(value) if value[:1] in "0123456789-[{tf" else value
        else:
            args.append(arg)
    for arg in args or ["roads:cnn:0"]:
        parts = arg.split(":")
        probe(parts[0], parts[1], int(parts[2]) if len(parts) > 2 else 0, settings)
    return 0


if __name__ == "__main__":
    sys.exit(main())

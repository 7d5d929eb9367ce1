"""Defaults fitted to the data: on a task's test tiles (the tiles the runner explains), the share of
SmoothGrad's noisy copies that keep the clean prediction (default 15% of each band's training spread vs the
former 0.05 reflectance), and infidelity's oracle and random means under its default perturbation (squares set
to the twin) and the gaussian variant (calibrated noise; the former fixed 0.02).

Usage: python tests/bench/bench_defaults.py [TASK ...] [--model cnn] [--seed 0] [--tiles 64]
Uses the model cache of $XBENCH_CACHE (trains the model with the task's settings once when missing).
"""

from __future__ import annotations

import argparse


def main() -> int:
    parser = argparse.ArgumentParser()
    parser.add_argument("tasks", nargs="*", default=["roads", "clearings"])
    parser.add_argument("--model", default="cnn")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--tiles", type=int, default=64)
    args = parser.parse_args()

    import numpy as np
    import torch

    from xbench.explainers.gradients import SMOOTHGRAD_NOISE_FRACTION
    from xbench.metrics import MetricInputs, compute_metric
    from xbench.models.train import train_model
    from xbench.runs.execute import choose_explain_tiles
    from xbench.tasks import build_task_data, load_task

    torch.set_num_threads(1)
    for name in args.tasks:
        task = load_task(name)
        data = build_task_data(task)
        spec = next(m for m in task.models if m.name == args.model)
        handle = train_model(task, data, spec, args.seed).handle
        index = choose_explain_tiles(task, data.test.labels, args.tiles)
        images = data.test.images[index]
        targets = data.test.labels[index].astype(np.int64)
        spread = data.train.images.std(axis=(0, 2, 3), dtype=np.float64)
        clean = handle.predict(images)
        rng = np.random.default_rng(0)
        unit = rng.standard_normal((len(images), 8, *images.shape[1:]))
        for label, sigma in (
            (f"{SMOOTHGRAD_NOISE_FRACTION:g} x band spread", SMOOTHGRAD_NOISE_FRACTION * spread),
            ("0.05 reflectance (former)", np.full(len(spread), 0.05)),
        ):
            noisy = (images[:, None] + unit * sigma[None, None, :, None, None]).reshape(-1, *images.shape[1:])
            kept = (handle.predict(noisy.astype(np.float32)) == np.repeat(clean, 8)).mean()
            print(f"{name}: smoothgrad noise {label}: {kept:.1%} of noisy copies keep the prediction")
        print(f"{name}: band spread (train) " + ", ".join(f"{s:.4f}" for s in spread))
        planted = np.zeros((len(index),) + images.shape[2:], dtype=bool)
        for row, cls in enumerate(targets):
            for t in task.class_driving_types.get(int(cls), []):
                planted[row] |= data.test.masks[index[row], data.test.mask_names.index(t)]
        maps = {"oracle": planted.astype(np.float32), "random": rng.random(planted.shape).astype(np.float32)}
        twins = data.test.twins[index]
        for label, options in (
            ("square (default)", {}),
            ("gaussian, noise auto", {"perturbation": "gaussian"}),
            ("gaussian, noise 0.02 (former)", {"perturbation": "gaussian", "noise": 0.02}),
        ):
            means = {}
            text = ""
            for key, attr in maps.items():
                inputs = MetricInputs(attr, images, targets, model=handle, twins=twins, seed=args.seed)
                (res,) = compute_metric("infidelity", inputs, **options)
                means[key] = float(np.nanmean(res.values))
                text = res.settings.get("calibrated", "")
            print(
                f"{name} ({args.model}): infidelity {label}: oracle {means['oracle']:.3g}, random {means['random']:.3g}"
                + (f"; {text}" if text else "")
            )
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

"""Metric engine speed: batched deletion/insertion vs a straightforward per-tile loop (target >= 10x).

    python tests/bench/bench_metrics.py [--tiles 64] [--steps 20] [--size 48] [--repeat 3] [--threads N]

All engines compute the same deletion and insertion curves (MoRF order, twin baseline: the tile differs
from its twin only on a planted blob of about 8% of the pixels) for every tile with the demo model (the
zoo's ``cnn``: 4 conv layers, 6 bands, 48x48 tiles; a local equivalent if the zoo is missing), and the
script checks that they agree. Two maps: a random one (every step changes the image, the worst case for
the engine) and the planted blob itself (after the blob is gone the steps repeat, and the engine does not
score a repeated image again). Printed side by side:

- ``loop``: one tile at a time, one model call per step (the straightforward implementation);
- ``per-tile batch``: one tile at a time, its steps+1 images in one call (a half-way reference);
- ``batched, plain``: the engine's stacking with plain ``handle.probabilities`` batches;
- ``batched``: the engine as the metrics run it (all tiles x all steps stacked; torch models scored by
  ``model_scorer``: inference mode, channels-last chunks of 128 images);
- the harness overhead: the engine with a free model, against the model's own time on the same stack.

Best of ``--repeat`` rounds (engines timed round robin) for each, wall clock with CPU seconds beside.
On a shared machine other processes make torch's two-thread timings swing widely (busy-waiting
threads); ``--threads 1`` gives steadier figures.
"""

from __future__ import annotations

import argparse
import time

import numpy as np
import torch
from torch import nn

from xbench.metrics.base import model_scorer
from xbench.metrics.response import perturbation_curves, perturbation_curves_loop, pixel_order
from xbench.models.base import ModelHandle


def demo_model(bands: int, classes: int) -> nn.Module:
    try:
        from xbench.models.zoo import build_torch_model
    except ImportError:  # the zoo is not there: a local equivalent of its plain CNN
        w = 32
        return nn.Sequential(
            nn.Conv2d(bands, w // 2, 3, padding=1),
            nn.ReLU(),
            nn.MaxPool2d(2),
            nn.Conv2d(w // 2, w, 3, padding=1),
            nn.ReLU(),
            nn.MaxPool2d(2),
            nn.Conv2d(w, 2 * w, 3, padding=1),
            nn.ReLU(),
            nn.Conv2d(2 * w, 2 * w, 3, padding=1),
            nn.ReLU(),
            nn.AdaptiveAvgPool2d(1),
            nn.Flatten(),
            nn.Linear(2 * w, classes),
        )
    return build_torch_model("cnn", bands, classes)


def timed(fn):
    wall, cpu = time.perf_counter(), time.process_time()
    out = fn()
    return out, time.perf_counter() - wall, time.process_time() - cpu


def per_tile_batch(prob, images, targets, baseline, order, steps, mode):
    return np.concatenate(
        [
            perturbation_curves(
                prob, images[i : i + 1], targets[i : i + 1], baseline[i : i + 1], order[i : i + 1], steps, mode
            )
            for i in range(len(images))
        ]
    )


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--tiles", type=int, default=64)
    ap.add_argument("--steps", type=int, default=20)
    ap.add_argument("--size", type=int, default=48)
    ap.add_argument("--bands", type=int, default=6)
    ap.add_argument("--repeat", type=int, default=3, help="best of this many runs")
    ap.add_argument("--threads", type=int, default=0, help="torch threads (default: torch's own choice)")
    args = ap.parse_args()
    if args.threads:
        torch.set_num_threads(args.threads)

    torch.manual_seed(0)
    rng = np.random.default_rng(0)
    n, s, c = args.tiles, args.size, args.bands
    handle = ModelHandle("bench-cnn", 4, module=demo_model(c, 4).eval())
    twins = rng.uniform(0.02, 0.5, (n, c, s, s)).astype(np.float32)
    # like a structure-free twin: the tile differs from it only on a planted blob (about 8% of pixels)
    yy, xx = np.mgrid[:s, :s]
    centres = rng.uniform(0.25 * s, 0.75 * s, (n, 2))
    planted = (yy[None] - centres[:, 0, None, None]) ** 2 + (
        xx[None] - centres[:, 1, None, None]
    ) ** 2 < 0.08 * s * s / np.pi
    images = np.where(planted[:, None], np.float32(0.6), twins).astype(np.float32)
    targets = rng.integers(0, 4, n)
    orders = {
        "random map": pixel_order(rng.random((n, s, s)), seed=0),
        "planted map": pixel_order(planted.astype(np.float32), seed=0),
    }
    prob = handle.probabilities
    fast = model_scorer(handle)
    print(
        f"deletion + insertion curves: {n} tiles {c}x{s}x{s}, {args.steps} steps, "
        f"{2 * n * (args.steps + 1)} images per curve pair, twin baseline, torch threads "
        f"{torch.get_num_threads()}, best of {args.repeat} (wall and CPU seconds)"
    )
    perturbation_curves(fast, images, targets, twins, orders["random map"], args.steps, "deletion")  # warm-up
    for label, order in orders.items():
        engines = {
            "loop": lambda m, o=order: perturbation_curves_loop(prob, images, targets, twins, o, args.steps, m),
            "per-tile batch": lambda m, o=order: per_tile_batch(prob, images, targets, twins, o, args.steps, m),
            "batched, plain": lambda m, o=order: perturbation_curves(prob, images, targets, twins, o, args.steps, m),
            "batched": lambda m, o=order: perturbation_curves(fast, images, targets, twins, o, args.steps, m),
        }
        results: dict = {}
        for _ in range(args.repeat):  # round robin, so that a busy spell hits every engine alike
            for name, engine in engines.items():
                d, w1, c1 = timed(lambda e=engine: e("deletion"))
                i, w2, c2 = timed(lambda e=engine: e("insertion"))
                if name not in results or w1 + w2 < results[name][1]:
                    results[name] = ((d, i), w1 + w2, c1 + c2)
        ref = results["loop"][0]
        for name, ((d, i), _, _) in results.items():
            assert np.allclose(d, ref[0], atol=1e-5) and np.allclose(i, ref[1], atol=1e-5), f"{name} disagrees"
        print(f"{label}:")
        base_wall, base_cpu = results["loop"][1], results["loop"][2]
        for name, (_, wall, cpu) in results.items():
            print(
                f"  {name:16s} {wall:7.2f} s wall  {cpu:7.2f} s CPU   speed-up x{base_wall / wall:5.1f} wall, "
                f"x{base_cpu / cpu:5.1f} CPU"
            )
        print(f"  batched vs per-tile loop: x{results['loop'][1] / results['batched'][1]:.1f} wall  [target >= 10x]")

    order = orders["random map"]
    stack = np.repeat(images, args.steps + 1, axis=0)
    _, model_wall, _ = timed(lambda: fast(stack))

    def free(x):
        return np.zeros((len(x), 4))

    _, free_wall, _ = timed(lambda: perturbation_curves(free, images, targets, twins, order, args.steps, "deletion"))
    print(
        f"harness overhead (random-map deletion curves): {free_wall:.2f} s engine without the model vs "
        f"{model_wall:.2f} s for the model alone on the same {len(stack)} images "
        f"({100 * free_wall / model_wall:.0f}%)"
    )


if __name__ == "__main__":
    main()

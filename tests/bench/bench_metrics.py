"""Metric engine speed: batched deletion/insertion vs a straightforward per-tile loop (target >= 10x).

    python tests/bench/bench_metrics.py [--tiles 64] [--steps 20] [--size 48] [--repeat 3]

Both engines compute the same deletion and insertion curves (MoRF order, twin-like baseline) for every
tile with the demo-sized zoo CNN (``xbench.models.zoo`` ``cnn``: 4 conv layers, 6 bands; a local
equivalent if the zoo is missing), and the script checks that they agree. Printed side by side:

- ``loop``: one tile at a time, one model call per step (the straightforward implementation);
- ``per-tile batch``: one tile at a time, its steps+1 images in one call (a half-way reference);
- ``batched``: the engine (all tiles x all steps stacked, chunked, large model batches);
- the harness overhead: the engine with a free model, against the model's own time on the same stack.

Best of ``--repeat`` runs for each (wall clock; CPU seconds beside, steadier on a busy machine).
"""

from __future__ import annotations

import argparse
import time

import numpy as np
import torch
from torch import nn

from xbench.metrics.faithfulness import perturbation_curves, perturbation_curves_loop, pixel_order
from xbench.models.base import ModelHandle


def demo_model(bands: int, classes: int) -> nn.Module:
    try:
        from xbench.models.zoo import build_torch_model
    except ImportError:  # the zoo is not there: a local equivalent of its plain CNN
        w = 32
        return nn.Sequential(
            nn.Conv2d(bands, w // 2, 3, padding=1), nn.ReLU(), nn.MaxPool2d(2),
            nn.Conv2d(w // 2, w, 3, padding=1), nn.ReLU(), nn.MaxPool2d(2),
            nn.Conv2d(w, 2 * w, 3, padding=1), nn.ReLU(), nn.Conv2d(2 * w, 2 * w, 3, padding=1), nn.ReLU(),
            nn.AdaptiveAvgPool2d(1), nn.Flatten(), nn.Linear(2 * w, classes),
        )
    return build_torch_model("cnn", bands, classes)


def timed(fn):
    wall, cpu = time.perf_counter(), time.process_time()
    out = fn()
    return out, time.perf_counter() - wall, time.process_time() - cpu


def per_tile_batch(prob, images, targets, baseline, order, steps, mode):
    return np.concatenate([perturbation_curves(prob, images[i:i + 1], targets[i:i + 1], baseline[i:i + 1],
                                               order[i:i + 1], steps, mode) for i in range(len(images))])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--tiles", type=int, default=64)
    ap.add_argument("--steps", type=int, default=20)
    ap.add_argument("--size", type=int, default=48)
    ap.add_argument("--bands", type=int, default=6)
    ap.add_argument("--repeat", type=int, default=3, help="best of this many runs")
    args = ap.parse_args()

    torch.manual_seed(0)
    rng = np.random.default_rng(0)
    n, s, c = args.tiles, args.size, args.bands
    handle = ModelHandle("bench-cnn", 4, module=demo_model(c, 4).eval())
    images = rng.uniform(0.02, 0.5, (n, c, s, s)).astype(np.float32)
    twins = np.clip(images + rng.normal(0, 0.02, images.shape), 0, 1).astype(np.float32)
    attributions = rng.random((n, s, s)).astype(np.float32)
    targets = rng.integers(0, 4, n)
    order = pixel_order(attributions, seed=0)
    prob = handle.probabilities

    engines = {
        "loop": lambda mode: perturbation_curves_loop(prob, images, targets, twins, order, args.steps, mode),
        "per-tile batch": lambda mode: per_tile_batch(prob, images, targets, twins, order, args.steps, mode),
        "batched": lambda mode: perturbation_curves(prob, images, targets, twins, order, args.steps, mode),
    }
    engines["batched"]("deletion")  # warm-up
    results = {}
    for name, engine in engines.items():
        best = None
        for _ in range(args.repeat):
            d, w1, c1 = timed(lambda e=engine: e("deletion"))
            i, w2, c2 = timed(lambda e=engine: e("insertion"))
            if best is None or w1 + w2 < best[1]:
                best = ((d, i), w1 + w2, c1 + c2)
        results[name] = best

    ref = results["loop"][0]
    for name, ((d, i), _, _) in results.items():
        assert np.allclose(d, ref[0], atol=1e-5) and np.allclose(i, ref[1], atol=1e-5), f"{name} disagrees"

    images_scored = 2 * n * (args.steps + 1)
    print(f"deletion + insertion curves: {n} tiles {c}x{s}x{s}, {args.steps} steps, {images_scored} images, "
          f"torch threads {torch.get_num_threads()}, best of {args.repeat}")
    base_wall = results["loop"][1]
    for name, (_, wall, cpu) in results.items():
        print(f"  {name:15s} {wall:7.2f} s wall  {cpu:7.2f} s CPU  {images_scored / wall:8.0f} images/s  "
              f"speed-up x{base_wall / wall:5.1f}")
    ratio = results["loop"][1] / results["batched"][1]
    print(f"batched vs per-tile loop: x{ratio:.1f}  [target >= 10x]  (vs per-tile batch: "
          f"x{results['per-tile batch'][1] / results['batched'][1]:.1f})")

    stack = np.repeat(images, args.steps + 1, axis=0)
    _, model_wall, _ = timed(lambda: prob(stack))
    def free(x):
        return np.zeros((len(x), 4))

    _, free_wall, _ = timed(lambda: perturbation_curves(free, images, targets, twins, order, args.steps,
                                                        "deletion"))
    print(f"harness overhead (one curve set): {free_wall:.2f} s engine without the model vs "
          f"{model_wall:.2f} s for the model alone on the same {len(stack)} images "
          f"({100 * free_wall / model_wall:.0f}%)")


if __name__ == "__main__":
    main()

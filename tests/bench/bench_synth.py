"""Scene synthesis speed: tiles per second at 64x64x6 in one process (target >= 300 tiles/s).

    python tests/bench/bench_synth.py [--count 1000] [--batch 50] [--recipe conifer-upland] [--size 64]

Synthesises ``count`` tiles (after a warm-up run) in batches of ``batch`` tiles with `synthesize`,
without and with twins, and prints:
- the overall wall-clock rate,
- the best batch (the minimum time over repeats, as timeit does: the figure least disturbed by other
  processes on a shared machine),
- tiles per CPU-second of this process.
"""

from __future__ import annotations

import argparse
import time

from xbench.scenes import load_recipe, synthesize

TARGET = 300.0


def measure(recipe, count: int, batch: int, size: int, twins: bool) -> tuple[float, float, float]:
    wall0, cpu0 = time.perf_counter(), time.process_time()
    best = float("inf")
    done = 0
    seed = 1
    while done < count:
        n = min(batch, count - done)
        t = time.perf_counter()
        synthesize(recipe, n, seed=seed, size=size, twins=twins)
        best = min(best, (time.perf_counter() - t) / n)
        done += n
        seed += 1
    wall = time.perf_counter() - wall0
    cpu = time.process_time() - cpu0
    return count / wall, 1.0 / best, count / cpu


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--count", type=int, default=1000)
    ap.add_argument("--batch", type=int, default=50)
    ap.add_argument("--recipe", default="conifer-upland")
    ap.add_argument("--size", type=int, default=64)
    args = ap.parse_args()
    recipe = load_recipe(args.recipe)
    synthesize(recipe, args.batch, seed=0, size=args.size, twins=True)  # warm-up: imports, caches, memory
    for twins in (False, True):
        overall, best, per_cpu = measure(recipe, args.count, args.batch, args.size, twins)
        label = "with twins" if twins else "images only"
        verdict = "ok" if best >= TARGET else "below target"
        print(
            f"synth {recipe.name} {args.size}x{args.size}x{len(recipe.bands)} {label:11s}: "
            f"{overall:6.1f} tiles/s overall, {best:6.1f} tiles/s best batch of {args.batch}, "
            f"{per_cpu:6.1f} tiles/CPU-s  [target >= {TARGET:.0f}: {verdict}]"
        )
        share = overall / per_cpu
        if share < 0.8:
            print(
                f"  note: this process got {100 * share:.0f}% of a CPU (other processes are running); "
                "wall-clock figures understate the speed, tiles/CPU-s estimates the rate on an idle machine"
            )


if __name__ == "__main__":
    main()

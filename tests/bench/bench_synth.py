"""Scene synthesis speed: tiles per second at 64x64x6 in one process (target >= 300 tiles/s).

    python tests/bench/bench_synth.py [--count 1000] [--recipe orrin-vale] [--size 64]

Prints wall-clock tiles/s (and tiles per CPU-second, which is steadier on a busy machine) for
`synthesize` without and with twins, after a warm-up run of the same size.
"""

from __future__ import annotations

import argparse
import time

from xbench.scenes import load_recipe, synthesize


def measure(recipe, count: int, size: int, twins: bool) -> tuple[float, float]:
    wall, cpu = time.perf_counter(), time.process_time()
    synthesize(recipe, count, seed=1, size=size, twins=twins)
    return count / (time.perf_counter() - wall), count / (time.process_time() - cpu)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--count", type=int, default=1000)
    ap.add_argument("--recipe", default="orrin-vale")
    ap.add_argument("--size", type=int, default=64)
    ap.add_argument("--repeat", type=int, default=3, help="best of this many runs")
    args = ap.parse_args()
    recipe = load_recipe(args.recipe)
    synthesize(recipe, args.count, seed=0, size=args.size, twins=True)  # warm-up (imports, caches, memory)
    for twins in (False, True):
        runs = [measure(recipe, args.count, args.size, twins) for _ in range(args.repeat)]
        wall = max(r[0] for r in runs)
        cpu = max(r[1] for r in runs)
        label = "with twins" if twins else "images only"
        print(
            f"synth {recipe.name} {args.size}x{args.size}x{len(recipe.bands)} {label:12s}: "
            f"{wall:7.1f} tiles/s (wall)  {cpu:7.1f} tiles/CPU-s   [target >= 300 tiles/s]"
        )


if __name__ == "__main__":
    main()

"""Verified-truth benchmark: the share of explained tiles without verified evidence (Shapley shares over
each tile's instances, xbench.truth) on the test split of `roads` and `clearings` (goal: under 5%), with
the reasons, the render cost and the seconds.

Usage: python tests/bench/bench_verified.py [TASK ...] [--model cnn] [--seed 0] [--tiles N]
Uses the model cache of $XBENCH_CACHE (trains the model with the task's settings once when missing).
Tiles: the test tiles the runner explains (classes made by planted structures), the first N (default: all).
"""

from __future__ import annotations

import argparse
import time


def main() -> int:
    parser = argparse.ArgumentParser()
    parser.add_argument("tasks", nargs="*", default=["roads", "clearings"])
    parser.add_argument("--model", default="cnn")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--tiles", type=int, default=0)
    args = parser.parse_args()

    import numpy as np
    import torch

    from xbench.models.train import train_model
    from xbench.runs.execute import choose_explain_tiles
    from xbench.tasks import build_task_data, load_task
    from xbench.truth import compute_reliance

    torch.set_num_threads(1)
    for name in args.tasks:
        task = load_task(name)
        data = build_task_data(task)
        spec = next(m for m in task.models if m.name == args.model)
        trained = train_model(task, data, spec, args.seed)
        count = args.tiles or len(data.test.labels)
        index = choose_explain_tiles(task, data.test.labels, count)
        scenes = [data.test_scenes[i] for i in index]
        t0 = time.perf_counter()
        rel = compute_reliance(trained.handle, scenes, data.test.labels[index].astype(np.int64), seed=args.seed)
        seconds = time.perf_counter() - t0
        tiles = rel.tile_table
        missing = rel.unverified_table()
        first64 = tiles.iloc[:64]
        print(
            f"{name} {args.model} seed {args.seed}: {len(tiles)} explained tiles, "
            f"{len(missing)} without verified evidence ({missing.attrs['fraction']:.1%}); "
            f"first 64: {(first64['verified'] == 0).sum()} ({(first64['verified'] == 0).mean():.1%}); "
            f"instances per tile median {tiles['instances'].median():.0f}, max {tiles['instances'].max()}, "
            f"exact shares on {tiles['exact'].mean():.0%} of tiles; {seconds:.1f} s"
        )
        for reason, group in missing.groupby("reason"):
            print(f"  {reason}: {len(group)} tiles ({group['why'].iloc[0]})")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

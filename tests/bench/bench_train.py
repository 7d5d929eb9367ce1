"""Training benchmark: every zoo model on `roads` and `clearings` (targets: test balanced accuracy >= 0.90
on roads and >= 0.85 on clearings for the torch models, each trained in <= 60 s on a 2-core CPU), with
the reliance table of each model (drop of the target-class probability when a type is removed).

Usage: python tests/bench/bench_train.py [TASK ...] [--models cnn,resnet,...] [--seed 0]
Trains into a fresh temporary cache (XBENCH_CACHE) so every figure is a real training run. Prints wall
and CPU seconds: training runs on one torch thread, so on a machine shared with other jobs the CPU
seconds are the figure to compare with the target (wall time then grows with the load).
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time

TARGETS = {"roads": 0.90, "clearings": 0.85}


def main() -> int:
    parser = argparse.ArgumentParser()
    parser.add_argument("tasks", nargs="*", default=["roads", "clearings"])
    parser.add_argument("--models", default=None, help="comma-separated model names (default: all)")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--reliance-tiles", type=int, default=200)
    args = parser.parse_args()
    os.environ["XBENCH_CACHE"] = tempfile.mkdtemp(prefix="xbench-bench-train-")

    import torch

    from xbench.models.train import train_model
    from xbench.tasks import build_task_data, load_task
    from xbench.truth import compute_reliance

    threads = os.environ.get("XBENCH_TORCH_THREADS", "1")
    print(
        f"torch {torch.__version__}, threads per training run: {threads}, "
        f"cpu count {os.cpu_count()}, load average {os.getloadavg()[0]:.1f}"
    )
    failed = False
    for name in args.tasks:
        task = load_task(name)
        t0 = time.perf_counter()
        data = build_task_data(task, use_cache=False)
        print(
            f"\n== task {name}: {len(data.train)}/{len(data.val)}/{len(data.test)} tiles of "
            f"{task.data.size}x{task.data.size}, built in {time.perf_counter() - t0:.1f} s"
        )
        wanted = args.models.split(",") if args.models else [m.name for m in task.models]
        n = min(args.reliance_tiles, len(data.test_scenes))
        targets = data.test.clean_labels[:n]
        for spec in task.models:
            if spec.name not in wanted:
                continue
            tm = train_model(task, data, spec, args.seed)
            acc = tm.accuracy
            target = TARGETS.get(name)
            ok = (
                target is None
                or spec.kind == "forest"
                or (acc["test_balanced_accuracy"] >= target and min(tm.seconds, tm.cpu_seconds) <= 60)
            )
            failed |= not ok
            print(
                f"{spec.name:11s} params {tm.n_parameters:7d}  epochs {tm.epochs:2d}  "
                f"train/val/test acc {acc['train_accuracy']:.3f}/{acc['val_accuracy']:.3f}/"
                f"{acc['test_accuracy']:.3f}  test balanced acc {acc['test_balanced_accuracy']:.3f}  "
                f"{tm.seconds:5.1f} s wall, {tm.cpu_seconds:5.1f} s cpu  {'ok' if ok else 'MISSED TARGET'}",
                flush=True,
            )
            t1 = time.perf_counter()
            cue_classes = [c for c, types in task.class_driving_types.items() if types]
            rel = compute_reliance(tm.handle, data.test_scenes[:n], targets, seed=args.seed, cue_classes=cue_classes)
            print(
                f"   reliance on {n} test tiles ({time.perf_counter() - t1:.1f} s): "
                + "; ".join(
                    f"{r.kind} {r.mean_drop:+.3f} [{r.ci_low:+.3f}, {r.ci_high:+.3f}] n={r.n}"
                    for r in rel.type_table.itertuples()
                ),
                flush=True,
            )
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())

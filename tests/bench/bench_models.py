"""Model-limited throughput beside what every explainer and metric achieves (the harness overhead).

    python tests/bench/bench_models.py [--run RUN_DIR] [--size 48] [--repeat 5]

1. The model's own limit: images per second of the demo model (the zoo's ``cnn``, 6 bands, 48x48 tiles,
   one torch thread) forward (NCHW, eager channels-last, and the handle's frozen inference copy, which every
   no-gradient call uses) and forward+backward (NCHW and channels-last), at batch 1, 8, 16, 32, 64, 128 and
   256 (median of ``--repeat`` rounds), and the batch the handle's rule picks
   (``xbench.models.base.preferred_batch``). The limit is the handle's fastest path at that batch.
2. What the benchmark achieves: from a run folder's manifest (``--run``; by default the demo task is run
   into a temporary folder first), each explainer's own model calls and seconds, and each metric's (the
   re-runs of the explainer included), turned into the seconds the model alone would need at its limit
   (forward-only images at the forward rate, images with a backward pass at the forward+backward rate).
   ``in model`` = the seconds measured inside the model's own passes (the handle times each forward pass
   from the first layer's input to the output and each backward pass from the output's gradient to the
   input's); the rest of a cell's wall time is harness overhead beside model calls (numpy work, captum
   glue, sklearn fits, Python). ``at limit`` = model-limited seconds / actual seconds: 1.0 means neither
   the harness nor slower passes (eager layer taps, small batches, both cores busy) add anything. Metrics
   that do not call the model are listed with their seconds only. ``calls/tile, all`` and ``s/tile, all``
   are each explainer's real per-tile cost in a benchmark run: its own calls plus those of every metric
   (re-runs included), and the cell's seconds. ``outside`` = seconds - in model; the ten largest
   (explainer, metric) shares of the time outside the model are listed at the end. The time outside the
   model is split into the compared explainers' own code (each explainer call's seconds outside the model,
   and the metrics' re-runs of it: ``cost.metric_rerun_seconds``) and the benchmark's own code (the metrics'
   arithmetic, data handling, Python glue): the harness overhead in the narrow sense.

The load of the machine (``os.getloadavg``) is printed beside the figures: on a shared machine both sides
of each ratio slow down, but not equally.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from collections import defaultdict
from collections.abc import Callable
from pathlib import Path

import numpy as np
import torch

from xbench.models.base import ModelHandle, preferred_batch
from xbench.models.zoo import build_torch_model

BATCHES = (1, 8, 16, 32, 64, 128, 256)


def throughput(
    module: Callable[[torch.Tensor], torch.Tensor], batch: int, size: int, backward: bool, repeat: int
) -> float:
    """Images per second (median of `repeat` rounds of >= 256 images)."""
    x = torch.rand(batch, 6, size, size)
    rounds = max(1, 256 // batch)

    def once() -> None:
        if backward:
            xi = x.clone().requires_grad_(True)
            module(xi)[:, 0].sum().backward()
        else:
            with torch.no_grad():
                module(x)

    once()
    rates = []
    for _ in range(repeat):
        t = time.perf_counter()
        for _ in range(rounds):
            once()
        rates.append(batch * rounds / (time.perf_counter() - t))
    return float(np.median(rates))


def model_limit(size: int, repeat: int) -> dict[str, float]:
    torch.set_num_threads(1)
    torch.manual_seed(0)
    nchw = build_torch_model("cnn", 6, 3).eval()
    fast = ModelHandle("cnn", 3, module=build_torch_model("cnn", 6, 3).eval())  # the handle's layout
    fast.probabilities(np.random.default_rng(0).random((2, 6, size, size), dtype=np.float32))
    print(f"model limit: demo cnn, {size}x{size}x6 tiles, one torch thread; load {os.getloadavg()[0]:.1f}")
    rows = {}
    paths: list[tuple[str, bool, Callable[[torch.Tensor], torch.Tensor]]] = [
        ("forward, NCHW", False, nchw),
        (f"forward, eager {fast.layout}", False, fast.module),
        ("forward, handle (frozen)", False, fast.inference_logits),  # the handle's no-gradient path
        ("fwd+bwd, NCHW", True, nchw),
        (f"fwd+bwd, handle ({fast.layout})", True, fast.module),  # gradients run the eager module
    ]
    width = max(len(p[0]) for p in paths) + 2
    print(f"{'images/s':<{width}}" + "".join(f"{b:>8}" for b in BATCHES))
    for label, backward, module in paths:
        rates = [throughput(module, b, size, backward, repeat) for b in BATCHES]
        rows[label] = rates
        print(f"{label:<{width}}" + "".join(f"{r:>8.0f}" for r in rates))
    best = preferred_batch(size, size)
    i = BATCHES.index(best) if best in BATCHES else 3
    # the model's limit: the fastest path the handle has for each kind of call, at the batch its rule picks
    fwd = max(rows["forward, handle (frozen)"][i], rows[f"forward, eager {fast.layout}"][i])
    bwd = rows[f"fwd+bwd, handle ({fast.layout})"][i]
    print(f"the handle's batch rule picks {best} images per call: {fwd:.0f} forward/s, {bwd:.0f} fwd+bwd/s")
    return {"forward": fwd, "backward": bwd}


def model_seconds(forward: int, backward: int, limit: dict[str, float]) -> float:
    return max(forward - backward, 0) / limit["forward"] + backward / limit["backward"]


def achieved(run: Path, limit: dict[str, float]) -> None:
    manifest = json.loads((run / "manifest.json").read_text())
    print(f"\nwhat the run achieved ({run}):")
    print(
        f"{'':<28}{'model calls':>12}{'seconds':>9}{'in model':>9}{'outside':>9}{'at limit':>10}"
        f"{'calls/tile, all':>17}{'s/tile, all':>13}"
    )
    per_metric: dict[str, list[float]] = defaultdict(lambda: [0, 0, 0.0, 0.0])
    outside_by_pair: dict[tuple[str, str], float] = {}  # (explainer, its own call or a metric) -> seconds
    total_limit = total_inside = total_seconds = 0.0
    explainers_own = 0.0  # the compared explainers' own code outside the model: their calls and re-runs
    for cell in manifest["cells"]:
        cost = cell.get("cost") or {}
        f, b, s = cost.get("forward_calls", 0), cost.get("backward_calls", 0), cost.get("seconds", 0.0)
        inside = cost.get("model_seconds", 0.0)
        m = model_seconds(f, b, limit)
        total_limit += m
        total_inside += inside
        ratio = f"{m / s:.2f}" if f and s > 0 else "-"
        # the real per-tile cost: the explainer's own calls plus every metric's (re-runs included)
        tiles = max(int(cost.get("tiles", 1)), 1)
        every = f + b + sum(mf + mb for mf, mb in (cost.get("metric_calls") or {}).values())
        print(
            f"explainer {cell['explainer']:<18}{f + b:>12}{s:>9.2f}{inside:>9.2f}{s - inside:>9.2f}{ratio:>10}"
            f"{every / tiles:>17.0f}{(cell.get('seconds') or 0.0) / tiles:>13.3f}"
        )
        outside_by_pair[cell["explainer"], "(its own call)"] = s - inside
        explainers_own += s - inside
        for seconds, model in (cost.get("metric_rerun_seconds") or {}).values():
            explainers_own += seconds - model
        for key, (mf, mb) in (cost.get("metric_calls") or {}).items():
            acc = per_metric[key]
            acc[0] += mf
            acc[1] += mb
            acc[2] += (cost.get("metric_seconds") or {}).get(key, 0.0)
            acc[3] += (cost.get("metric_model_seconds") or {}).get(key, 0.0)
        for key, seconds in (cost.get("metric_seconds") or {}).items():
            outside_by_pair[cell["explainer"], key] = seconds - (cost.get("metric_model_seconds") or {}).get(key, 0.0)
        total_seconds += cell.get("seconds") or 0.0
    for key, (mf, mb, s, inside) in sorted(per_metric.items(), key=lambda kv: -kv[1][2]):
        m = model_seconds(int(mf), int(mb), limit)
        total_limit += m
        total_inside += inside
        ratio = f"{m / s:.2f}" if mf and s > 0 else "-"
        print(f"metric {key:<21}{int(mf + mb):>12}{s:>9.2f}{inside:>9.2f}{s - inside:>9.2f}{ratio:>10}")
    share = total_limit / total_seconds if total_seconds else float("nan")
    inside_share = total_inside / total_seconds if total_seconds else float("nan")
    print(
        f"\ncells: {total_seconds:.1f} s wall; inside the model's passes {total_inside:.1f} s "
        f"({100 * inside_share:.0f}%): harness overhead beside model calls {100 * (1 - inside_share):.0f}% "
        f"of the cells' wall time.\nthe model at its limit would need {total_limit:.1f} s: the passes ran at "
        f"{total_limit / total_inside if total_inside else float('nan'):.2f} of the limit; the cells at "
        f"{100 * share:.0f}% of it (overhead and slower passes together: {100 * (1 - share):.0f}%); "
        f"load {os.getloadavg()[0]:.1f}"
    )
    harness = total_seconds - total_inside - explainers_own
    print(
        f"of the {total_seconds - total_inside:.1f} s outside the model: the compared explainers' own code "
        f"{explainers_own:.1f} s (their calls, and the metrics' re-runs of them: CAV and mixture fits, captum's "
        f"sampling, superpixels, ...), the benchmark's own code (metrics, glue) {harness:.1f} s = "
        f"{100 * harness / total_seconds if total_seconds else float('nan'):.0f}% of the cells' wall time"
        + (
            ""
            if any((c.get("cost") or {}).get("metric_rerun_seconds") is not None for c in manifest["cells"])
            else " (this run folder predates the re-run clock: the re-runs are counted as the benchmark's)"
        )
    )
    largest = sorted(outside_by_pair.items(), key=lambda kv: -kv[1])[:10]
    print(f"largest shares of the {total_seconds - total_inside:.1f} s outside the model (explainer, call):")
    for (explainer, what), seconds in largest:
        print(f"  {seconds:6.2f} s  {explainer:<22}{what}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--run", type=Path, default=None, help="a run folder of the demo task (default: run it)")
    parser.add_argument("--size", type=int, default=48)
    parser.add_argument("--repeat", type=int, default=5)
    args = parser.parse_args()
    limit = model_limit(args.size, args.repeat)
    run = args.run
    if run is None:
        run = Path(tempfile.mkdtemp(prefix="xbench-bench-")) / "demo"
        print(f"\nrunning the demo task into {run} ...", flush=True)
        subprocess.run([sys.executable, "-m", "xbench.cli", "run", "demo", "--out", str(run)], check=True)
    achieved(run, limit)


if __name__ == "__main__":
    main()

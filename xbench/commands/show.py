"""`xbench show RUN_DIR --tile N` (or `--worst METHOD METRIC`): one tile, its truths and every explainer's map.

Writes a PNG: the tile in natural and false colour, the planted truth and the verified evidence, then one
panel per explainer with its colour bar and its metric values for that tile. Tiles come from the run's
gallery artifacts (the first `gallery_tiles` explained tiles of each model and seed).
"""

from __future__ import annotations

import argparse
from pathlib import Path

# Metrics printed under each map, when the run has them (one per question, then a few more).
SHOWN_METRICS = (
    ("mass-accuracy", "planted"),
    ("pointing-game", "planted"),
    ("mass-accuracy", "verified"),
    ("deletion-auc", "none"),
    ("insertion-auc", "none"),
    ("randomization-spearman", "none"),
)


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("run_dir", metavar="RUN_DIR", help="a run folder written by `xbench run`")
    which = parser.add_mutually_exclusive_group(required=True)
    which.add_argument("--tile", type=int, metavar="N", help="test-tile index (as in the records' `tile` column)")
    which.add_argument(
        "--worst",
        nargs=2,
        metavar=("METHOD", "METRIC"),
        help="the gallery tile where METHOD scores worst on METRIC",
    )
    parser.add_argument("--truth", default=None, help="truth kind of --worst's metric (default: planted, else any)")
    parser.add_argument("--model", default=None, help="model name (default: the first with a gallery)")
    parser.add_argument("--seed", type=int, default=None, help="model seed (default: the first with a gallery)")
    parser.add_argument("--out", metavar="PNG", default=None, help="output file (default: RUN_DIR/show/...png)")


def _metric_lines(records, task: str, model: str, seed: int, tile: int) -> dict[str, list[str]]:
    r = records[(records["task"] == task) & (records["model"] == model) & (records["seed"] == seed)]
    r = r[r["tile"] == tile]
    out: dict[str, list[str]] = {}
    have = set(zip(r["metric"], r["truth"], strict=True))
    shown = [c for c in SHOWN_METRICS if c in have][:4]
    for e, g in r.groupby("explainer", sort=False):
        lines = []
        for metric, truth in shown:
            v = g[(g["metric"] == metric) & (g["truth"] == truth)]["value"]
            label = metric if truth == "none" else f"{metric} ({truth[:4]}.)"
            lines.append(f"{label} {v.iloc[0]:.3f}" if len(v) and v.iloc[0] == v.iloc[0] else f"{label} n/a")
        out[str(e)] = lines
    return out


def run(args: argparse.Namespace) -> int:
    import numpy as np

    from xbench.errors import XbenchInputError
    from xbench.report import figures as F
    from xbench.report.compare import order_explainers
    from xbench.report.load import find_artifacts, read_manifest, read_records
    from xbench.report.meta import metric_info

    run_dir = Path(args.run_dir)
    if not run_dir.is_dir():
        raise XbenchInputError(str(run_dir), "run folder not found")
    log: list[str] = []
    galleries = [a for a in find_artifacts(run_dir, log) if a.kind == "gallery"]
    if args.model is not None:
        galleries = [a for a in galleries if a.model == args.model]
    if args.seed is not None:
        galleries = [a for a in galleries if a.seed == args.seed]
    if not galleries:
        raise XbenchInputError(
            str(run_dir / "artifacts"),
            "no gallery artifact" + (" for that model/seed" if args.model or args.seed is not None else ""),
            expected="gallery__TASK__MODEL__SEED.npz written by `xbench run`",
        )
    art = galleries[0]
    data = art.load()
    tiles = [int(t) for t in data.get("tiles", np.arange(len(data["images"])))]
    records = read_records(run_dir, log)
    manifest = read_manifest(run_dir, log)
    mine = records[(records["task"] == art.task) & (records["model"] == art.model) & (records["seed"] == art.seed)]

    if args.tile is not None:
        if args.tile not in tiles:
            raise XbenchInputError(
                f"--tile {args.tile}",
                f"tile not in the gallery of {art.task}/{art.model}/seed {art.seed}",
                expected="one of " + ", ".join(map(str, tiles)),
                found=args.tile,
            )
        tile, why = args.tile, ""
    else:
        method, metric = args.worst
        sel = mine[(mine["explainer"] == method) & (mine["metric"] == metric) & mine["tile"].isin(tiles)]
        if sel.empty:
            raise XbenchInputError(
                f"--worst {method} {metric}",
                "no per-tile values for this explainer and metric on the gallery tiles",
                expected="explainers "
                + ", ".join(sorted(set(mine["explainer"])))
                + "; metrics "
                + ", ".join(sorted(set(mine["metric"]))),
            )
        truths = list(dict.fromkeys(sel["truth"]))
        truth = args.truth or ("planted" if "planted" in truths else truths[0])
        sel = sel[(sel["truth"] == truth) & np.isfinite(sel["value"].to_numpy())]
        hib = metric_info(metric).higher_is_better
        if sel.empty or hib is None:
            raise XbenchInputError(
                f"--worst {method} {metric}",
                "no finite value on the gallery tiles" if hib is not None else "the metric has no direction",
            )
        row = sel.loc[sel["value"].idxmin() if hib else sel["value"].idxmax()]
        tile = int(row["tile"])
        why = f"; worst {method} {metric}{'' if truth == 'none' else f' ({truth})'} = {row['value']:.3f}"

    index = tiles.index(tile)
    target = ""
    if "targets" in data and "class_names" in data:
        target = f", target class {data['class_names'][int(data['targets'][index])]}"
    explainers = order_explainers(mine, [manifest])
    values = _metric_lines(records, art.task, art.model, art.seed, tile)
    title = f"{art.task}, model {art.model}, seed {art.seed}: test tile {tile}{target}{why}"
    fig = F.tile_figure(data, index, explainers, values, title)
    out = Path(args.out) if args.out else run_dir / "show" / f"tile-{tile}__{art.task}__{art.model}__{art.seed}.png"
    out.parent.mkdir(parents=True, exist_ok=True)
    import matplotlib

    with matplotlib.rc_context(F.RC):
        fig.savefig(out, dpi=F.DPI)
    n_maps = sum(1 for k in data if k.startswith("map__"))
    print(f"xbench show: {out} (tile {tile}, {n_maps} explainer maps{why})")
    return 0

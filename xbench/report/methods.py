"""The methods text (``methods.md``) with counts filled in from the run, and the BibTeX keys it cites.

Citations are pandoc-style keys (``[@key]``) into the ``refs.bib`` written beside it.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from xbench.report.bib import MODEL_KEYS, STATISTICS_KEYS, keys_for_citation
from xbench.report.compare import Column, Summary
from xbench.report.load import RunSet
from xbench.report.meta import explainer_info
from xbench.report.stats import nemenyi_q

CONTROLS = {"random", "edges", "oracle"}


@dataclass
class Citations:
    keys: list[str] = field(default_factory=list)
    unmatched: list[str] = field(default_factory=list)

    def cite(self, text: str, what: str = "") -> str:
        """'[@a; @b]' for a free-text citation, or the text itself in parentheses when no entry matches."""
        if not text:
            return ""
        keys = keys_for_citation(text)
        for k in keys:
            if k not in self.keys:
                self.keys.append(k)
        if keys:
            return " [" + "; ".join(f"@{k}" for k in keys) + "]"
        if not re.search(r"(?:19|20)\d\d", text):  # "Common practice", a control: not a publication
            return ""
        self.unmatched.append(f"{what}: {text}")
        return f" ({text})"

    def key(self, key: str) -> str:
        if key not in self.keys:
            self.keys.append(key)
        return f"[@{key}]"


def _plural(n: int, word: str, plural: str | None = None) -> str:
    return f"{n} {word if n == 1 else (plural or word + 's')}"


def _join(items: list[str]) -> str:
    items = [i for i in items if i]
    if len(items) <= 1:
        return "".join(items)
    return ", ".join(items[:-1]) + " and " + items[-1]


def _settings(settings: Any) -> str:
    if not isinstance(settings, dict) or not settings:
        return "default settings"
    return ", ".join(f"{k} = {v}" for k, v in settings.items())


def _mean_sd(values: list[float]) -> str:
    v = np.asarray([x for x in values if x is not None and np.isfinite(x)], dtype=float)
    if v.size == 0:
        return "n/a"
    if v.size == 1:
        return f"{v[0]:.3f}"
    return f"{v.mean():.3f} ± {v.std(ddof=1):.3f}"


def data_paragraph(task: str, m: dict[str, Any], bands: list[str] | None) -> str:
    d = m.get("data") or {}
    if not d:
        return f"Task *{task}*: the run folder has no manifest data description."
    counts = d.get("counts") or {}
    size = d.get("size")
    source = "a user-supplied tile pack of" if d.get("pack") else "synthetic"
    parts = [f"Task *{task}*" + (f" ({m['description']})" if m.get("description") else "") + f" uses {source}"]
    if size:
        parts[-1] += f" {size} × {size}-pixel tiles"
    else:
        parts[-1] += " tiles"
    if bands:
        parts[-1] += f" with {len(bands)} bands ({', '.join(bands)})"
    if d.get("pack"):
        parts[-1] += f" (`{Path(str(d['pack'])).name}`)"
    else:
        parts[-1] += f" rendered from the landscape recipe `{d.get('recipe', 'unknown')}`"
    if counts:
        parts[-1] += (
            f": {counts.get('train', '?')} training, {counts.get('val', '?')} validation and "
            f"{counts.get('test', '?')} test tiles."
        )
    else:
        parts[-1] += "."
    classes = d.get("class_names") or []
    if classes:
        names = ", ".join(map(str, classes))
        text = f"Each tile has one of {_plural(len(classes), 'class', 'classes')} ({names})"
        text += f", given by the rule: {d['label_rule']}" if d.get("label_rule") else ""
        parts.append(text.rstrip(".") + ".")
    driving = d.get("driving_types") or {}
    if driving:
        parts.append(
            "Structure types that make a class: "
            + "; ".join(f"{c}: {', '.join(v) if v else 'none'}" for c, v in driving.items())
            + "."
        )
    if d.get("lookalike_types"):
        parts.append(f"Natural look-alikes present: {', '.join(d['lookalike_types'])}.")
    noise = d.get("label_noise")
    if noise:
        parts.append(f"Label noise rate: {noise:g}.")
    parts.append(f"Spurious cue: {d['cue']}." if d.get("cue") else "No spurious cue was added.")
    if m.get("explain_tiles"):
        parts.append(f"Explanations and metrics were computed on {m['explain_tiles']} test tiles per model and seed.")
    return " ".join(parts)


# Accuracy keys in a manifest's model rows: the short names of the result-store contract, or the long
# names `xbench run` writes.
_ACCURACY_KEYS = {
    "test": ("test", "test_accuracy"),
    "balanced_test": ("balanced_test", "test_balanced_accuracy"),
    "train": ("train", "train_accuracy"),
}


def _acc(row: dict[str, Any], key: str) -> float | None:
    for k in _ACCURACY_KEYS[key]:
        if row.get(k) is not None:
            return float(row[k])
    return None


def models_paragraph(task: str, m: dict[str, Any], cites: Citations) -> str:
    models = m.get("models") or []
    if not models:
        return ""
    by_name: dict[str, list[dict]] = {}
    for row in models:
        by_name.setdefault(str(row.get("name")), []).append(row)
    seeds = m.get("seeds") or sorted({r.get("seed") for r in models if r.get("seed") is not None})
    items = []
    for name, rows in by_name.items():
        kind = rows[0].get("kind", "")
        params = rows[0].get("params")
        ref = " " + cites.key(MODEL_KEYS[kind]) if kind in MODEL_KEYS else ""
        acc = [r.get("accuracy") or {} for r in rows]
        desc = f"*{name}* ({kind}{ref}" + (f", {params:,} parameters" if isinstance(params, int) else "") + ")"
        desc += (
            f": test accuracy {_mean_sd([_acc(a, 'test') for a in acc])}, balanced test accuracy "
            f"{_mean_sd([_acc(a, 'balanced_test') for a in acc])}, training accuracy "
            f"{_mean_sd([_acc(a, 'train') for a in acc])}"
        )
        items.append(desc)
    seed_text = f"{_plural(len(seeds), 'seed')} ({', '.join(map(str, seeds))})"
    spread = " (mean ± sd over seeds)" if len(seeds) > 1 else ""
    return (
        f"On task *{task}* we trained {_plural(len(by_name), 'model')} with {seed_text} each{spread}: "
        + "; ".join(items)
        + "."
    )


def explainers_paragraph(
    explainers: list[str], settings: dict[str, Any], cites: Citations, cells: list[dict[str, Any]]
) -> str:
    methods = [e for e in explainers if e not in CONTROLS]
    controls = [e for e in explainers if e in CONTROLS]
    items = []
    for e in methods:
        info = explainer_info(e)
        desc = info.description if info.description and info.description != e else ""
        items.append(
            f"`{e}`" + (f" ({desc})" if desc else "") + cites.cite(info.citation, e) + f", {_settings(settings.get(e))}"
        )
    text = f"We compared {_plural(len(methods), 'explainer')}: " + "; ".join(items) + "."
    if controls:
        word = "controls frame" if len(controls) > 1 else "control frames"
        text += (
            f" The {word} the scores: " + "; ".join(f"`{c}` ({explainer_info(c).description})" for c in controls) + "."
        )
    text += (
        " Every explainer returns one map per tile at input resolution (larger = more evidence for the target class)."
    )
    if cells:
        failed = [c for c in cells if c.get("status") not in ("ok", None)]
        text += f" The run had {_plural(len(cells), 'cell')} (model × seed × explainer)"
        if failed:
            listed = ", ".join(f"{c.get('explainer')} on {c.get('model')} seed {c.get('seed')}" for c in failed[:10])
            text += (
                f", of which {len(failed)} did not finish and are missing from the tables: {listed}"
                + (", ..." if len(failed) > 10 else "")
                + "."
            )
        else:
            text += "; all finished."
    return text


def metrics_paragraph(columns: list[Column], settings: dict[str, Any], cites: Citations) -> str:
    metrics: dict[str, Column] = {}
    truths: set[str] = set()
    for c in columns:
        metrics.setdefault(c.metric, c)
        if c.truth != "none":
            truths.add(c.truth)
    items = []
    for key, c in metrics.items():
        info = c.info
        arrow = {True: "higher is better", False: "lower is better", None: "no preferred direction"}[
            info.higher_is_better
        ]
        rng = f", range {info.value_range[0]:g} to {info.value_range[1]:g}" if info.value_range else ""
        defn = f"{info.definition}; " if info.definition else ""
        s = settings.get(key)
        extra = f"; {_settings(s)}" if isinstance(s, dict) and s else ""
        items.append(f"`{key}` ({defn}{arrow}{rng}{extra}){cites.cite(info.citation, key)}")
    text = f"We scored each map with {_plural(len(metrics), 'metric')}: " + "; ".join(items) + "."
    if truths:
        desc = {
            "planted": "the planted structure masks (what the scene generator drew)",
            "verified": "model-verified evidence (pixels of the planted structures whose removal in a "
            "counterfactual twin lowers the target-class probability)",
        }
        text += (
            " Localization metrics were scored against "
            + _join([desc.get(t, t) for t in sorted(truths, key=lambda t: (t != "planted", t))])
            + "."
        )
    text += " Undefined values (for example a tile without any planted structure) are left out, not set to zero."
    return text


def statistics_paragraph(summary: Summary, headline: Column | None, cites: Citations) -> str:
    s = summary.settings
    conf = int(round(100 * s["confidence"]))
    method = {"BCa": "bias-corrected and accelerated (BCa)"}.get(s["ci_method"], s["ci_method"])
    t = summary.table
    tiles = t[t["unit"] == "tile"]["n"]
    n_percentile = int((t["ci_method"] == "percentile").sum())
    text = (
        "For every task, model, metric and explainer we report the mean over the explained test tiles "
        "(each tile's value first averaged over the model seeds, so that tiles are the unit of resampling"
        + (f"; n = {int(tiles.min())} to {int(tiles.max())} tiles per value" if len(tiles) else "")
        + f") with a {conf}% {method} bootstrap confidence interval over tiles ({s['n_resamples']} "
        "resamples, "
        f"seed {s['seed']}) {cites.key(STATISTICS_KEYS['bootstrap'])}"
        + (
            f"; in {n_percentile} case(s) BCa was undefined and the percentile interval is given"
            if n_percentile
            else ""
        )
        + ". Metrics with one value per seed rather than per tile are summarised over seeds and not tested. "
        "Within each table column, every explainer is compared with the column's best explainer by a "
        "two-sided "
        f"Wilcoxon signed-rank test paired by tile {cites.key(STATISTICS_KEYS['wilcoxon'])}, and the "
        "p-values "
        "of the comparisons in that column are adjusted with Holm's step-down procedure "
        f"{cites.key(STATISTICS_KEYS['holm'])}; marks give adjusted p < 0.05, 0.01 and 0.001."
    )
    n_blocks = len(summary.blocks)
    text += (
        f" Across the {_plural(n_blocks, 'task × model block')} we rank the explainers within each block "
        "(1 = best, ties averaged), test for any difference with the Friedman test and compare pairs with "
        "the "
        f"Nemenyi critical difference CD = q_α √(k(k+1)/(6N)) at α = {s['alpha']:g}, where q_α is the "
        "studentized "
        f"range quantile for k groups and infinite degrees of freedom divided by √2 "
        f"{cites.key(STATISTICS_KEYS['friedman-nemenyi'])}."
    )
    rt = summary.rank_tests.get(headline.key) if headline is not None else None
    if rt is not None:
        k, n = len(rt.explainers), len(rt.blocks)
        fr = rt.friedman
        ftext = (
            f"Friedman χ² = {fr.statistic:.2f}, p = {fr.p_value:.3g}"
            if np.isfinite(fr.statistic)
            else "the Friedman test needs at least 3 explainers and 2 blocks"
        )
        text += (
            f" For {headline.label}, k = {k} explainers over N = {n} blocks gives q_α = "
            f"{nemenyi_q(k, s['alpha']):.3f} and CD = {rt.cd:.2f} ({ftext})."
        )
    if n_blocks < 2:
        text += " With a single block the rank statistics are descriptive only."
    return text


def provenance(runs: RunSet) -> str:
    lines = []
    for d, m in zip(runs.dirs, runs.manifests, strict=True):
        if not m:
            lines.append(f"- `{d}`: no manifest.")
            continue
        v = m.get("versions") or {}
        machine = m.get("machine") or {}
        vtext = ", ".join(f"{k} {val}" for k, val in v.items()) if isinstance(v, dict) else str(v)
        mtext = ", ".join(f"{val}" for val in machine.values()) if isinstance(machine, dict) else str(machine)
        lines.append(
            f"- `{d}`: task {m.get('task')}, task file hash {str(m.get('task_hash', '?'))[:12]}, "
            f"xbench {m.get('xbench_version', '?')}, git commit {str(m.get('git_commit') or '?')[:12]}"
            + (f"; {vtext}" if vtext else "")
            + (f"; machine: {mtext}" if mtext else "")
            + "."
        )
    return "\n".join(lines)


def methods_text(
    runs: RunSet, summary: Summary, headline: Column | None, bands: dict[str, list[str]]
) -> tuple[str, Citations]:
    cites = Citations()
    tasks = list(dict.fromkeys(t for t, _ in summary.blocks))
    out = [
        "# Methods",
        "",
        "*Written by `xbench report` from the run folders listed at the end; citation keys refer to "
        "`refs.bib`. Edit freely.*",
        "",
        "## Data",
        "",
    ]
    for task in tasks:
        out += [data_paragraph(task, runs.manifest_for(task), bands.get(task)), ""]
    out += ["## Models", ""]
    for task in tasks:
        p = models_paragraph(task, runs.manifest_for(task), cites)
        out += [p or f"Task *{task}*: the manifest lists no models.", ""]
    settings: dict[str, Any] = {}
    metric_settings: dict[str, Any] = {}
    cells: list[dict[str, Any]] = []
    for m in runs.manifests:
        for k, v in (m.get("explainers") or {}).items():
            settings.setdefault(k, v)
        for k, v in (m.get("metrics") or {}).items():
            metric_settings.setdefault(k, v)
        cells += list(m.get("cells") or [])
    out += ["## Explainers", "", explainers_paragraph(summary.explainers, settings, cites, cells), ""]
    out += ["## Metrics", "", metrics_paragraph(summary.columns, metric_settings, cites), ""]
    out += ["## Statistics", "", statistics_paragraph(summary, headline, cites), ""]
    out += ["## Provenance", "", provenance(runs), ""]
    return "\n".join(out), cites

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
from xbench.report.meta import explainer_defaults, explainer_info, metric_defaults
from xbench.stats import min_pairs_for_test, nemenyi_q

CONTROLS = {"random", "edges", "oracle"}
USER_KINDS = {"user-torch": "a torch module", "user-callable": "a black-box callable"}


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


def _settings(settings: Any, defaults: dict[str, Any] | None = None) -> str:
    """Every setting that changes values: the registry's defaults overridden by the task's settings."""
    merged = {**(defaults or {}), **(settings if isinstance(settings, dict) else {})}
    if not merged:
        return "no settings"
    return ", ".join(f"{k} = {v}" for k, v in merged.items())


def _mean_sd(values: list[float | None]) -> str:
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
    parts += concept_sets_sentences(m)
    return " ".join(parts)


def concept_sets_sentences(m: dict[str, Any]) -> list[str]:
    """The [run] settings behind the concept explainers' verdicts, when a concept explainer ran."""
    run, explainers = m.get("run_settings") or {}, m.get("explainers") or {}
    out = []
    if "tcav" in explainers and run.get("concept_set_size") and run.get("random_sets"):
        out.append(
            f"TCAV's concept activation vectors were fitted on example sets of {run['concept_set_size']} synthetic "
            f"tiles per structure type, tested against {run['random_sets']} random sets of the same size."
        )
        evidence = (explainers.get("tcav") or {}).get("evidence", "layer+relu-layers")
        test = {
            "layer+relu-layers": "at the explainer's layer and on the standard scores of every ReLU layer "
            "averaged (Stouffer's pooling), Bonferroni over the two tests",
            "relu-layers": "on the standard scores of every ReLU layer averaged (Stouffer's pooling)",
            "layer": "at the explainer's layer alone",
        }.get(str(evidence), f"with evidence '{evidence}'")
        out.append(
            "A concept's significance was the alignment of the class logit's gradient with its CAV, tested as one "
            f"more draw against the random sets {test}, with Bonferroni over concepts."
        )
    if "activation-clusters" in explainers and run.get("fit_tiles"):
        out.append(f"Activation clusters were fitted on up to {run['fit_tiles']} correctly classified training tiles.")
    return out


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
    loaded = [i for i, rows in zip(items, by_name.values(), strict=True) if rows[0].get("kind") in USER_KINDS]
    trained = [i for i, rows in zip(items, by_name.values(), strict=True) if rows[0].get("kind") not in USER_KINDS]
    parts = []
    if trained:
        parts.append(
            f"On task *{task}* we trained {_plural(len(trained), 'model')} with {seed_text} each{spread}: "
            + "; ".join(trained)
            + "."
        )
    if loaded:
        kinds = sorted({USER_KINDS[r[0]["kind"]] for r in by_name.values() if r[0].get("kind") in USER_KINDS})
        parts.append(
            f"{'On task *' + task + '* we' if not trained else 'We'} loaded {_plural(len(loaded), 'user model')} "
            f"({' and '.join(kinds)}, supplied with the task and not trained by us): " + "; ".join(loaded) + "."
        )
    return " ".join(parts)


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
            f"`{e}`"
            + (f" ({desc})" if desc else "")
            + cites.cite(info.citation, e)
            + f", {_settings(settings.get(e), explainer_defaults(e))}"
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


def metrics_paragraph(
    columns: list[Column], settings: dict[str, Any], cites: Citations, user_masks: bool = False
) -> str:
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
        merged = _settings(settings.get(key), metric_defaults(key))
        extra = f"; {merged}" if merged != "no settings" else ""
        items.append(f"`{key}` ({defn}{arrow}{rng}{extra}){cites.cite(info.citation, key)}")
    text = f"We scored each map with {_plural(len(metrics), 'metric')}: " + "; ".join(items) + "."
    if truths:
        desc = {
            "planted": "the structure masks of the user's tile pack (the user's own annotation)"
            if user_masks
            else "the planted structure masks (what the scene generator drew)",
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
    n_seeds = sorted({len(v) for v in summary.seeds.values()})
    multi = max(n_seeds or [1]) > 1
    n_percentile = int((t["ci_method"] == "percentile").sum())
    column_keys = ["task", "model", "metric", "truth"]
    n_tested = t[t["test_unit"].isin(["tile", "seed"])].groupby(column_keys).ngroups
    n_seed_tested = t[t["test_unit"] == "seed"].groupby(column_keys).ngroups
    text = (
        "For every task, model, metric and explainer we report the mean"
        + (f" (n = {int(tiles.min())} to {int(tiles.max())} seed × tile values)" if len(tiles) else "")
        + f" with a {conf}% bootstrap confidence interval ({s['n_resamples']} resamples, seed {s['seed']}) "
        f"{cites.key(STATISTICS_KEYS['bootstrap'])}: "
        + (
            "with several model seeds a hierarchical bootstrap that draws seeds with replacement and then "
            "tiles within each drawn seed, so that training variance and tile variance both enter the interval "
            "(the mean is the mean of the seeds' tile means); with one seed the "
            f"{method} bootstrap over tiles"
            if multi
            else f"the {method} bootstrap over tiles (one model seed per model, so the interval leaves training "
            "variance out)"
        )
        + (
            f"; in {n_percentile} case(s) BCa was undefined and the percentile interval is given"
            if n_percentile
            else ""
        )
        + ". Metrics with one value per seed rather than per tile are summarised over seeds and not tested."
    )
    text += (
        " The controls (`random`, `edges`, `oracle`) are anchors, not contestants: they never enter the choice "
        "of the best method, the tests or the rankings. Beside each method's mean we give where it sits "
        "between them, (x - random) / (oracle - random) (0 = random, 1 = oracle), undefined where the oracle "
        "does not beat random; a column says when `edges` or `random` beats real methods."
    )
    notes = list(summary.control_notes.values())
    n_columns = t[t["role"] == "method"].groupby(["task", "model", "metric", "truth"]).ngroups
    if notes:
        n_edges = sum("`edges` beats" in x for x in notes)
        n_random = sum("`random` beats" in x for x in notes)
        text += (
            f" Here `edges` beats at least one real method in {n_edges} and `random` in {n_random} of the "
            f"{n_columns} task × model × metric columns (named in the tables)."
        )
    against = s.get("against")
    if against:
        text += (
            f" Within each column, `{against}` (declared before the run) is compared with every other real method "
            f"by a two-sided Wilcoxon signed-rank test paired by tile {cites.key(STATISTICS_KEYS['wilcoxon'])}, "
            f"and the p-values of those comparisons are adjusted with Holm's step-down procedure "
            f"{cites.key(STATISTICS_KEYS['holm'])}."
        )
    else:
        text += (
            " Within each column, every pair of real methods is compared by a two-sided Wilcoxon signed-rank "
            f"test paired by tile {cites.key(STATISTICS_KEYS['wilcoxon'])}, and the p-values of all pairs are "
            f"adjusted together with Holm's step-down procedure {cites.key(STATISTICS_KEYS['holm'])}, which keeps "
            "the family-wise error rate at α whatever the true differences (rather than testing against a best "
            "chosen from the same data, or comparing mean ranks, Benavoli, Corani and Mangili 2016); we report the "
            "group of methods that cannot be told apart from the best by mean."
        )
    methods_k = t[t["role"] == "method"].groupby(["task", "model", "metric", "truth"])["explainer"].nunique()
    if len(methods_k):
        k = int(methods_k.max())
        m = k - 1 if against else k * (k - 1) // 2
        text += (
            f" With k = {k} methods ({m} comparisons) the exact test can reject at α = {s['alpha']:g} after Holm only "
            f"with n ≥ {min_pairs_for_test(m, s['alpha'])} paired tiles; columns with fewer say that no test is "
            "possible."
        )
    text += (
        " The units of these tests are independent training runs (each seed's mean over tiles) where a block "
        "has enough model seeds for the exact test to reject; otherwise the tiles, each tile's value averaged "
        "over the seeds: then the p-values are conditional on the trained network(s) of each task × model block "
        "and hold for these test tiles, not for a new training run"
        + (
            f" ({n_seed_tested} of {n_tested} tested columns use seeds)."
            if n_seed_tested
            else " (all tested columns here use tiles)."
        )
    )
    if any(c.info.by_magnitude for c in summary.columns):
        text += (
            " The randomization metrics are ranked by the magnitude of the similarity between a map and the map "
            "of the randomized model (|Spearman ρ| and |SSIM| toward 0: the map moved), since a signed "
            "'lower is better' would reward anti-correlated maps."
        )
    groups = sorted(set(summary.model_groups.values()))
    text += (
        f" Across blocks we rank the real methods separately for each model family ({', '.join(groups)}), over "
        "task × model × seed blocks (each block's value is a seed's mean over tiles; 1 = best, ties averaged); "
        "blocks of one task share its test tiles and seeds of one model its data, so the blocks are not fully "
        "independent. We test for any difference with the Friedman test and, only where it rejects, compare "
        f"pairs with the Nemenyi critical difference CD = q_α √(k(k+1)/(6N)) at α = {s['alpha']:g}, where q_α is "
        "the studentized range quantile for k groups and infinite degrees of freedom divided by √2 "
        f"{cites.key(STATISTICS_KEYS['friedman-nemenyi'])}."
    )
    rts = summary.rank_tests_for(*headline.key) if headline is not None else []
    for rt in rts:
        assert headline is not None  # rts is empty without a headline
        k, n = len(rt.explainers), len(rt.blocks)
        fr = rt.friedman
        ftext = (
            f"Friedman χ² = {fr.statistic:.2f}, p = {fr.p_value:.3g}"
            if np.isfinite(fr.statistic)
            else "the Friedman test needs at least 3 methods and 2 blocks"
        )
        text += f" For {headline.label} ({rt.group}), k = {k} methods over N = {n} blocks: {ftext}" + (
            f"; q_α = {nemenyi_q(k, s['alpha']):.3f} and CD = {rt.cd:.2f}."
            if rt.rejects
            else "; no critical difference is drawn."
        )
    if len(summary.blocks) < 2 and not multi:
        text += " With a single block the rank statistics are descriptive only."
    return text


def exclusions_paragraph(summary: Summary) -> str:
    """What was left out, and why (from the summary and the run's skipped cells)."""
    items = list(summary.left_out) + sorted(set(summary.column_notes.values()))
    if not items:
        return "Nothing was left out of the tables or the rankings."
    return "\n".join(f"- {x}" for x in items)


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


def _changed(base: dict[str, Any], variant: dict[str, Any]) -> list[str]:
    """Settings (key: name = value) where a variant's manifest differs from the run's."""
    out = []
    for key, settings in (variant or {}).items():
        diff = {k: v for k, v in (settings or {}).items() if (base or {}).get(key, {}).get(k) != v}
        if diff:
            out.append(f"{key}: " + ", ".join(f"{k} = {v}" for k, v in diff.items()))
    return out


def variants_paragraph(runs: RunSet, variant_runs: dict[str, RunSet], flags: list[str]) -> str:
    """The protocol variants: what each changed against the run, and how the rankings moved."""
    if not variant_runs:
        return ""
    items = []
    for name, rs in variant_runs.items():
        m = rs.manifests[0] if rs.manifests else {}
        base = runs.manifest_for(str(m.get("task")))
        changed = _changed(base.get("metrics") or {}, m.get("metrics") or {})
        changed += _changed(base.get("explainers") or {}, m.get("explainers") or {})
        items.append(
            f"`{name}` re-scored {', '.join(sorted(set(rs.records['metric'])))} for "
            f"{', '.join(sorted(set(rs.records['explainer'])))} on {', '.join(sorted(set(rs.records['model'])))}"
            f" with {'; '.join(changed) if changed else 'the same settings'}"
        )
    text = (
        f"We re-ran the protocol in {_plural(len(variant_runs), 'variant')}, each with its own settings over the "
        "task's: " + "; ".join(items) + ". For every variant, block and column we give Kendall's tau between the "
        "ranking of the real methods in the run and in the variant, and flag a ranking as flipped when its top "
        "method changes or tau ≤ 0."
    )
    return text + (f" {_plural(len(flags), 'flag')} raised (listed with the tables)." if flags else " No flag raised.")


def methods_text(
    runs: RunSet,
    summary: Summary,
    headline: Column | None,
    bands: dict[str, list[str]],
    variant_runs: dict[str, RunSet] | None = None,
    variant_flags: list[str] | None = None,
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
    user_masks = any((m.get("data") or {}).get("pack") for m in runs.manifests)
    out += ["## Metrics", "", metrics_paragraph(summary.columns, metric_settings, cites, user_masks), ""]
    out += ["## Statistics", "", statistics_paragraph(summary, headline, cites), ""]
    if variant_runs:
        out += ["## Protocol variants", "", variants_paragraph(runs, variant_runs, variant_flags or []), ""]
    out += ["## What was left out", "", exclusions_paragraph(summary), ""]
    out += ["## Provenance", "", provenance(runs), ""]
    return "\n".join(out), cites

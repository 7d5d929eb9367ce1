"""`xbench metrics`: list the metrics with their definitions, citations, ranges, directions and needs.

xbench metrics                  the catalogue, grouped by family
xbench metrics KEY [KEY ...]    full detail of some metrics (settings with defaults)
xbench metrics --family NAME    one family only
xbench metrics --format markdown | json
"""

from __future__ import annotations

import argparse
import json
import shutil
import textwrap
from typing import TYPE_CHECKING, Any

from xbench.errors import XbenchInputError
from xbench.names import renamed_hint
from xbench.schema import describe

if TYPE_CHECKING:
    from xbench.metrics.base import MetricSpec

FAMILY_NOTES = {
    "overlap": "scored separately against the planted masks and the model-verified evidence",
    "response": "perturb the tile in the attribution's order and watch the target probability",
    "model-dependence": "cascading randomization of the model's layers, top first; explainer re-run at each step",
    "steadiness": "explanations of nearby inputs, and how well they predict score changes",
    "spread": "how much of the absolute attribution sits on few pixels",
    "concepts": "importance per structure type vs. the interventional importance and type roles",
    "cost": "what the explanation took, per tile",
}
ARROW = {True: "higher", False: "lower", None: "-"}


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("keys", nargs="*", metavar="KEY", help="show full detail of these metrics")
    parser.add_argument(
        "--family",
        help="only this family (localization, faithfulness, sanity, stability, concentration, concepts, cost)",
    )
    parser.add_argument(
        "--format", choices=("text", "markdown", "json"), default="text", help="output format (default text)"
    )


def _needs(spec: MetricSpec) -> str:
    return ", ".join(spec.needs) if spec.needs else "attributions only"


def _as_dict(spec: MetricSpec) -> dict[str, Any]:
    lo, hi = spec.value_range
    return {
        "key": spec.key,
        "family": spec.family,
        "definition": spec.definition,
        "citation": spec.citation,
        "range": [None if abs(lo) == float("inf") else lo, None if abs(hi) == float("inf") else hi],
        "higher_is_better": spec.higher_is_better,
        "per_tile": spec.per_tile,
        "needs": list(spec.needs),
        "truths": list(spec.truths),
        "settings": dict(spec.defaults),
        "settings_doc": dict(spec.settings_doc),
        "settings_accepted": {name: text for name, _, text in describe(spec.schema)},
    }


def _text_catalogue(specs: list[Any], width: int) -> str:
    from xbench.metrics import list_metrics

    key_w = max(len(s.key) for s in specs)
    range_w = max(len(s.range_text) for s in specs)
    head = f"  {'metric':<{key_w}}  {'better':<6}  {'range':<{range_w}}  {'values':<8}  needs"
    indent = " " * (key_w + 4)
    lines = [
        f"xbench metrics: {len(specs)} of {len(list_metrics())} metrics. 'values': one per tile or one per result;",
        "undefined values are NaN with a recorded reason.",
        "",
    ]
    family = None
    for s in specs:
        if s.family != family:
            family = s.family
            if lines[-1] != "":
                lines.append("")
            lines.append(f"{family.upper()}: {FAMILY_NOTES.get(family, '')}")
            lines.append(head)
        per = "per tile" if s.per_tile else "one"
        lines.append(
            f"  {s.key:<{key_w}}  {ARROW[s.higher_is_better]:<6}  {s.range_text:<{range_w}}  {per:<8}  {_needs(s)}"
        )
        for text in (s.definition, s.citation):
            lines.extend(
                textwrap.wrap(text, width=max(40, width), initial_indent=indent, subsequent_indent=indent + "  ")
            )
    used = {n for s in specs for n in s.needs}
    lines += ["", "NEEDS"]
    lines += [f"  {k:<26}{v}" for k, v in _needs_text().items() if k in used]
    lines += ["", "Settings and detail: xbench metrics KEY [KEY ...]"]
    return "\n".join(lines)


def _needs_text() -> dict[str, str]:
    from xbench.metrics import NEEDS_TEXT

    return NEEDS_TEXT


def _text_detail(spec: MetricSpec, width: int) -> str:
    truths = "planted and verified (one result each)" if spec.truths != ("none",) else "none"
    rows = [
        ("definition", spec.definition),
        ("citation", spec.citation),
        ("family", spec.family),
        ("range", spec.range_text),
        ("better", ARROW[spec.higher_is_better]),
        ("values", "one per tile" if spec.per_tile else "one per result"),
        ("truth", truths),
        ("needs", "; ".join(f"{n} ({_needs_text()[n]})" for n in spec.needs) or "attributions only"),
    ]
    lines = [spec.key]
    lines += [textwrap.fill(f"  {k:<12}  {v}", width=max(40, width), subsequent_indent=" " * 16) for k, v in rows]
    if spec.defaults:
        lines.append("  settings")
        for name, default in spec.defaults.items():
            field = spec.schema[name]
            doc = spec.settings_doc.get(name) or field.doc
            accepts = field.expected()
            lines.append(
                textwrap.fill(
                    f"    {name} = {default!r} ({accepts}): {doc}", width=max(40, width), subsequent_indent=" " * 8
                )
            )
    else:
        lines.append("  settings      none")
    return "\n".join(lines)


def _markdown(specs: list[Any]) -> str:
    lines = [
        "| metric | family | definition | range | better | per tile | needs | citation |",
        "| --- | --- | --- | --- | --- | --- | --- | --- |",
    ]
    for s in specs:
        cells = [
            f"`{s.key}`",
            s.family,
            s.definition,
            s.range_text,
            ARROW[s.higher_is_better],
            "yes" if s.per_tile else "no",
            _needs(s),
            s.citation,
        ]
        lines.append("| " + " | ".join(c.replace("|", "\\|") for c in cells) + " |")
    return "\n".join(lines)


def run(args: argparse.Namespace) -> int:
    from xbench.metrics import FAMILIES, get_metric, list_metrics

    if args.family is not None and args.family not in FAMILIES:
        hint = renamed_hint("metric family", args.family)
        problem = "unknown metric family" + (f": {hint}" if hint else "")
        raise XbenchInputError("--family", problem, expected=" | ".join(FAMILIES), found=args.family)
    specs = [get_metric(k) for k in args.keys] if args.keys else list_metrics(args.family)
    if args.keys and args.family:
        specs = [s for s in specs if s.family == args.family]
    width = min(110, shutil.get_terminal_size((110, 24)).columns) - 1
    if args.format == "json":
        print(json.dumps([_as_dict(s) for s in specs], indent=2))
    elif args.format == "markdown":
        print(_markdown(specs))
    elif args.keys:
        print("\n\n".join(_text_detail(s, width) for s in specs))
    else:
        print(_text_catalogue(specs, width))
    return 0

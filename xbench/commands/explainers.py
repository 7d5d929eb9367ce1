"""`xbench explainers`: list every explainer (built-in and plugins) with its citation, needs and defaults.

xbench explainers                 one block per explainer, grouped by kind
xbench explainers --key rise      one explainer in full (description, needs, every default)
xbench explainers --json          the same information as JSON
"""

from __future__ import annotations

import argparse
import json
import shutil
import textwrap
from typing import Any

from xbench.explainers import get_explainer, list_explainers, load_plugins
from xbench.explainers.registry import NEEDS, ExplainerSpec
from xbench.schema import describe

KIND_TITLES = {
    "pixel": "Pixel explainers",
    "concept": "Concept explainers",
    "control": "Controls (run through every metric like real explainers)",
}
NEED_WORDS = {
    "gradients": "gradients",
    "layer": "a layer",
    "twins": "twins",
    "masks": "planted masks",
    "fit-set": "fitting set",
    "concept-sets": "concept sets",
}


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--key", help="show one explainer in full")
    parser.add_argument("--json", action="store_true", help="print JSON instead of a table")


def _value(v: Any) -> str:
    if v is None:
        return "auto"
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_value(x) for x in v) + "]"
    return str(v)


def needs_text(spec: ExplainerSpec) -> str:
    parts = [NEED_WORDS[n] for n in NEEDS if n in spec.needs]
    if spec.black_box_ok:
        parts.insert(0, "black box ok")
    return ", ".join(parts) if parts else "black box ok"


def defaults_text(spec: ExplainerSpec) -> str:
    if not spec.defaults:
        return "(no settings)"
    return " ".join(f"{k}={_value(v)}" for k, v in spec.defaults.items())


def as_dict(spec: ExplainerSpec) -> dict[str, Any]:
    return {
        "key": spec.key,
        "kind": spec.kind,
        "source": spec.source,
        "citation": spec.citation,
        "needs": sorted(spec.needs),
        "black_box_ok": spec.black_box_ok,
        "defaults": spec.defaults,
        "settings": {name: accepts for name, _, accepts in describe(spec.schema)},
        "description": spec.description,
    }


def render_table(specs: list[ExplainerSpec], width: int = 100) -> str:
    key_w = max([len(s.key) for s in specs] + [len("key")]) + 2
    need_w = max([len(needs_text(s)) for s in specs] + [len("needs")]) + 2
    text_w = max(width - key_w - need_w, 40)
    lines = []
    for kind, title in KIND_TITLES.items():
        group = [s for s in specs if s.kind == kind and s.source == "xbench"]
        if group:
            lines += _group(title, group, key_w, need_w, text_w)
    plugins = [s for s in specs if s.source != "xbench"]
    if plugins:
        lines += _group("Plugins", plugins, key_w, need_w, text_w)
    return "\n".join(lines)


def _group(title: str, specs: list[ExplainerSpec], key_w: int, need_w: int, text_w: int) -> list[str]:
    pad = " " * (key_w + need_w)
    lines = [title, "-" * len(title), f"{'key':<{key_w}}{'needs':<{need_w}}citation / defaults"]
    for s in specs:
        cite = textwrap.wrap(s.citation, text_w) or [""]
        lines.append(f"{s.key:<{key_w}}{needs_text(s):<{need_w}}{cite[0]}")
        lines += [pad + c for c in cite[1:]]
        defaults = textwrap.wrap("defaults: " + defaults_text(s), text_w, subsequent_indent="  ")
        lines += [pad + d for d in defaults]
        if s.source != "xbench":
            lines.append(pad + f"from: {s.source}")
    lines.append("")
    return lines


def render_one(spec: ExplainerSpec, width: int = 100) -> str:
    def wrap(label: str, text: str) -> list[str]:
        return textwrap.wrap(text, width, initial_indent=f"{label:<13}", subsequent_indent=" " * 13)

    lines = [f"{spec.key} ({spec.kind}, from {spec.source})"]
    lines += wrap("description", spec.description or "-")
    lines += wrap("citation", spec.citation)
    lines += wrap("needs", needs_text(spec))
    lines.append("settings (name = default: accepted values; meaning)")
    if spec.schema:
        for name, _, accepts in describe(spec.schema):
            lines += textwrap.wrap(
                f"{name} = {_value(spec.defaults[name])}: {accepts}",
                width,
                initial_indent="  ",
                subsequent_indent=" " * 6,
            )
    else:
        lines.append("  (no settings)")
    return "\n".join(lines)


def run(args: argparse.Namespace) -> int:
    errors = load_plugins()
    width = max(min(shutil.get_terminal_size((120, 24)).columns, 140), 80)
    if args.key:
        spec = get_explainer(args.key)
        print(json.dumps(as_dict(spec), indent=2) if args.json else render_one(spec, width))
        return 0
    specs = list_explainers()
    if args.json:
        print(json.dumps({"explainers": [as_dict(s) for s in specs], "plugin_errors": errors}, indent=2))
        return 0
    n_plugins = sum(s.source != "xbench" for s in specs)
    print(
        f"{len(specs)} explainers ({len(specs) - n_plugins} built in, {n_plugins} from plugins). "
        "Settings are set per explainer in a task file under [explainers.settings.<key>].\n"
    )
    print(render_table(specs, width))
    for label, err in errors.items():
        print(f"plugin failed to load: {label}: {err}")
    return 0

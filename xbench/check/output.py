"""What a check prints and writes: the plain-text table, the JSON summary and JUnit XML."""

from __future__ import annotations

import json
import math
from dataclasses import asdict
from pathlib import Path
from typing import Any

import numpy as np

from xbench.check.apply import CheckResult, _fmt
from xbench.check.gates import CHECK_LABEL


def format_table(result: CheckResult, only_failures: bool = False) -> str:
    """A plain-text table, one block per (task, model), failures marked FAIL."""
    from xbench.check.manifests import format_changes

    lines = format_changes(result.changes, result.manifests_compared) if result.baseline is not None else []
    for kind, names in result.skipped_missing.items():
        lines.append(f"skipped (in the baseline, not in the current run; allowed): {kind}s {', '.join(names)}")
    lines.append(result.summary_line())
    src = f"current {result.current}"
    if result.baseline is not None:
        src = f"baseline {result.baseline}  ·  " + src
    lines.append(f"{src}  ·  gates {result.gates}")
    rows = [o for o in result.outcomes if o.status == "fail" or not only_failures]
    header = (
        "result",
        "explainer",
        "metric",
        "truth",
        "gate",
        "limit",
        "baseline",
        "current",
        "change",
        "p",
        "n",
        "note",
    )
    blocks: dict[tuple[str, str], list[tuple[str, ...]]] = {}
    for o in rows:
        limit = o.limit
        limit_s = (
            f"{limit:.1%}"
            if o.check == "max-relative-drop" and limit is not None
            else (f"p<{_fmt(limit)}" if o.check == "paired-test" else _fmt(limit))
        )
        change = "-" if o.difference is None or not np.isfinite(o.difference) else f"{o.difference:+.4g}"
        blocks.setdefault((o.task, o.model), []).append(
            (
                {"pass": "ok", "fail": "FAIL", "skip": "skip"}[o.status],
                o.explainer,
                o.metric,
                o.truth,
                CHECK_LABEL[o.check],
                limit_s,
                _fmt(o.baseline),
                _fmt(o.current),
                change,
                _fmt(o.p_value),
                "-" if o.n_pairs is None else str(o.n_pairs),
                o.message,
            )
        )
    all_rows = [header] + [r for b in blocks.values() for r in b]
    widths = [max(len(r[i]) for r in all_rows) for i in range(len(header) - 1)]
    numeric = {5, 6, 7, 8, 9, 10}

    def fmt_row(r: tuple[str, ...]) -> str:
        cells = [r[i].rjust(widths[i]) if i in numeric else r[i].ljust(widths[i]) for i in range(len(r) - 1)]
        return ("  ".join(cells) + ("  " + r[-1] if r[-1] else "")).rstrip()

    for (task, model), block in blocks.items():
        lines.append("")
        lines.append(f"task {task} · model {model}")
        lines.append("  " + fmt_row(header))
        lines.extend("  " + fmt_row(r) for r in block)
    if not rows:
        lines.append("")
        lines.append("(no failing gates)" if only_failures and result.outcomes else "(no gates applied)")
    for w in result.warnings:
        lines.append(f"warning: {w}")
    return "\n".join(lines)


def _json_number(v: float | None) -> float | None:
    if v is None:
        return None
    v = float(v)
    return v if math.isfinite(v) else None


def summary_json(result: CheckResult) -> dict[str, Any]:
    """A JSON-serialisable summary (NaN and infinities become null)."""
    gates = []
    for o in result.outcomes:
        d = {k: v for k, v in asdict(o).items()}
        for k in ("limit", "baseline", "current", "difference", "p_value"):
            d[k] = _json_number(d[k])
        d["name"] = o.name
        gates.append(d)
    return {
        "passed": result.passed,
        "counts": result.counts(),
        "baseline": result.baseline,
        "current": result.current,
        "gates_file": result.gates,
        "settings": asdict(result.settings),
        "warnings": list(result.warnings),
        "failures": [o.name for o in result.failures],
        "manifests_compared": result.manifests_compared,
        "changes": [ch.to_json() for ch in result.changes],
        "skipped_missing": {k: list(v) for k, v in result.skipped_missing.items()},
        "gates": gates,
    }


def junit_xml(result: CheckResult, suite_name: str = "xbench check") -> str:
    """JUnit XML: one testcase per gate; failing gates carry a <failure>, skipped ones a <skipped>."""
    import xml.etree.ElementTree as ET

    c = result.counts()
    suites = ET.Element(
        "testsuites",
        name=suite_name,
        tests=str(c["gates"]),
        failures=str(c["failed"]),
        errors="0",
        skipped=str(c["skipped"]),
    )
    suite = ET.SubElement(
        suites,
        "testsuite",
        name=suite_name,
        tests=str(c["gates"]),
        failures=str(c["failed"]),
        errors="0",
        skipped=str(c["skipped"]),
    )
    props = ET.SubElement(suite, "properties")
    for k, v in (("baseline", result.baseline), ("current", result.current), ("gates", result.gates)):
        ET.SubElement(props, "property", name=k, value=str(v))
    for o in result.outcomes:
        case = ET.SubElement(
            suite,
            "testcase",
            classname=f"xbench.{o.task}.{o.model}.{o.explainer}",
            name=f"{o.metric}[{o.truth}] {CHECK_LABEL[o.check]}",
        )
        detail = (
            f"limit {_fmt(o.limit)}, baseline {_fmt(o.baseline)}, current {_fmt(o.current)}, "
            f"change {_fmt(o.difference)}, p {_fmt(o.p_value)}, pairs {o.n_pairs}"
        )
        if o.status == "fail":
            f = ET.SubElement(case, "failure", message=o.message, type=o.check)
            f.text = detail
        elif o.status == "skip":
            ET.SubElement(case, "skipped", message=o.message)
    ET.indent(suites)
    return ET.tostring(suites, encoding="unicode", xml_declaration=True) + "\n"


def write_outputs(
    result: CheckResult, json_path: str | Path | None = None, junit_path: str | Path | None = None
) -> None:
    """Write the JSON summary and/or JUnit XML files (folders are created)."""
    if json_path is not None:
        p = Path(json_path)
        p.parent.mkdir(parents=True, exist_ok=True)
        p.write_text(json.dumps(summary_json(result), indent=2) + "\n", encoding="utf-8")
    if junit_path is not None:
        p = Path(junit_path)
        p.parent.mkdir(parents=True, exist_ok=True)
        p.write_text(junit_xml(result), encoding="utf-8")

"""What changed between the baseline's and the current run's manifests, said before any gate.

A gate that fails after a retrain means something else than one that fails after an explainer change; the
check therefore compares the two ``manifest.json`` files first: the task (file hash, data description, seeds,
tiles explained), each model (accuracy, weights, architecture settings), each explainer's and metric's
settings, and the package versions. Timings, paths and cell bookkeeping are not compared.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from xbench.runs.store import read_manifest as store_read_manifest

# Model fields that differ between two runs of the same model (not a change of the model).
VOLATILE_MODEL_KEYS = {"seconds", "cached", "path", "cache_path", "train_seconds"}
ACCURACY_KEYS = ("balanced_test", "test_balanced_accuracy", "test", "test_accuracy")
ORDER = ("model", "task", "explainer", "metric", "version")


@dataclass(frozen=True)
class ManifestChange:
    """One difference: ``kind`` (model, task, explainer, metric, version), what it concerns, old and new."""

    kind: str
    subject: str
    baseline: Any
    current: Any
    note: str = ""

    def line(self) -> str:
        text = f"{self.kind} {self.subject}: {_short(self.baseline)} -> {_short(self.current)}"
        return text + (f" ({self.note})" if self.note else "")

    def to_json(self) -> dict[str, Any]:
        return {
            "kind": self.kind,
            "subject": self.subject,
            "baseline": _jsonable(self.baseline),
            "current": _jsonable(self.current),
            "note": self.note,
        }


def _jsonable(v: Any) -> Any:
    if isinstance(v, float) and not math.isfinite(v):
        return None
    return v


def _short(v: Any, limit: int = 70) -> str:
    if v is None:
        return "(none)"
    if isinstance(v, float):
        return f"{v:.4g}"
    text = json.dumps(v, sort_keys=True, default=str) if not isinstance(v, str) else v
    return text if len(text) <= limit else text[: limit - 1] + "…"


def read_manifest(run_dir: str | Path) -> dict[str, Any] | None:
    """A run folder's manifest (the store's reader), or None when it has none (records without a folder)."""
    return store_read_manifest(run_dir) or None


def _accuracy(model: dict[str, Any]) -> float | None:
    acc = model.get("accuracy")
    if isinstance(acc, dict):
        for k in ACCURACY_KEYS:
            if isinstance(acc.get(k), int | float):
                return float(acc[k])
    if isinstance(acc, int | float):
        return float(acc)
    return None


def _models(manifest: dict[str, Any]) -> dict[str, dict[str, Any]]:
    out = {}
    for m in manifest.get("models") or []:
        if isinstance(m, dict):
            key = str(m.get("name", "?")) + (f" seed {m['seed']}" if "seed" in m else "")
            out[key] = m
    return out


def manifest_changes(
    baseline: dict[str, Any] | None, current: dict[str, Any] | None, accuracy_tolerance: float = 1e-6
) -> list[ManifestChange]:
    """Differences between two manifests that can move scores, models first (empty when either is None)."""
    if baseline is None or current is None:
        return []
    out: list[ManifestChange] = []
    bm, cm = _models(baseline), _models(current)
    for name in sorted(set(bm) | set(cm)):
        b, c = bm.get(name), cm.get(name)
        if b is None or c is None:
            out.append(ManifestChange("model", name, "present" if b else None, "present" if c else None))
            continue
        ab, ac = _accuracy(b), _accuracy(c)
        if ab is not None and ac is not None and abs(ab - ac) > accuracy_tolerance:
            out.append(ManifestChange("model", f"{name} test balanced accuracy", ab, ac, f"{ac - ab:+.3f}"))
        for key in sorted((set(b) | set(c)) - VOLATILE_MODEL_KEYS - {"accuracy", "name", "seed"}):
            if b.get(key) != c.get(key):
                note = "retrained or different weights" if "hash" in key or "weights" in key else ""
                out.append(ManifestChange("model", f"{name} {key}", b.get(key), c.get(key), note))
    for key in ("task", "task_hash", "seeds", "explain_tiles", "data"):
        if baseline.get(key) != current.get(key):
            out.append(ManifestChange("task", key, baseline.get(key), current.get(key)))
    for kind, key in (("explainer", "explainers"), ("metric", "metrics")):
        b, c = baseline.get(key) or {}, current.get(key) or {}
        for name in sorted(set(b) | set(c)):
            if name not in b:
                out.append(ManifestChange(kind, name, None, c[name], "added"))
            elif name not in c:
                out.append(ManifestChange(kind, name, b[name], None, "removed"))
            elif b[name] != c[name]:
                out.append(ManifestChange(kind, f"{name} settings", b[name], c[name]))
    bv, cv = baseline.get("versions") or {}, current.get("versions") or {}
    for name in sorted(set(bv) | set(cv)):
        if bv.get(name) != cv.get(name):
            out.append(ManifestChange("version", name, bv.get(name), cv.get(name)))
    return sorted(out, key=lambda ch: ORDER.index(ch.kind) if ch.kind in ORDER else len(ORDER))


def format_changes(changes: list[ManifestChange], have_both: bool) -> list[str]:
    """Lines printed above the gate table."""
    if not have_both:
        return ["manifests: not compared (a run folder has no manifest.json)"]
    if not changes:
        return ["manifests: no change in models, task, explainer or metric settings, or package versions"]
    lines = [f"manifests: {len(changes)} change(s) since the baseline (gate results may follow from these):"]
    lines += [f"  {ch.line()}" for ch in changes]
    return lines

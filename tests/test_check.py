"""Faithfulness regression gates (`xbench check`, xbench/check.py).

The run folders here are fabricated: small planted masks, attribution maps made from them with seeded
noise, and two localization metrics computed on those maps in this file (relevance mass accuracy and
relevance rank accuracy, as defined by Arras et al. 2022, "CLEVR-XAI"). A degraded explainer is the same
explainer with its maps shuffled between tiles, or blurred heavily; its metric values are recomputed from
the degraded maps, so the gates see a real drop, not a hand-edited number.
"""

from __future__ import annotations

import json
import shutil
import xml.etree.ElementTree as ET
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy.ndimage import gaussian_filter

from xbench.check import assert_faithful, compare, load_gates
from xbench.cli import main
from xbench.errors import XbenchInputError, repo_root

pytest_plugins = ["pytester"]

SIZE = 16
TILES = 24
SEEDS = (0, 1)
EXPLAINERS = ("gradient", "occlusion", "random")

# Directions stated in the gate data so these tests do not depend on the metric registry.
DIRECTIONS = [
    {"metric": ["mass-accuracy", "rank-accuracy"], "higher_is_better": True},
    {"metric": "seconds", "higher_is_better": False},
]


# ------------------------------------------------------------------------------------ fabrication
def planted_masks(seed: int) -> np.ndarray:
    """(TILES, SIZE, SIZE) bool: one random rectangle per tile; the last tile has none (metrics NaN)."""
    rng = np.random.default_rng(1000 + seed)
    masks = np.zeros((TILES, SIZE, SIZE), bool)
    for i in range(TILES - 1):
        h, w = rng.integers(3, 7, size=2)
        r, c = rng.integers(0, SIZE - h), rng.integers(0, SIZE - w)
        masks[i, r : r + h, c : c + w] = True
    return masks


def explainer_maps(explainer: str, masks: np.ndarray, seed: int, degrade: str | None = None) -> np.ndarray:
    rng = np.random.default_rng([seed, EXPLAINERS.index(explainer)])
    noise = rng.random(masks.shape)
    if explainer == "gradient":
        maps = masks * 1.0 + 0.4 * noise
    elif explainer == "occlusion":
        maps = gaussian_filter(masks * 1.0, sigma=(0, 1, 1)) + 0.3 * noise
    else:  # random control
        maps = noise
    if degrade == "shuffle":  # each tile gets another tile's map
        maps = np.roll(maps, 1, axis=0)
    elif degrade == "blur":
        maps = gaussian_filter(maps, sigma=(0, 6, 6), mode="wrap")
    return maps.astype(np.float32)


def mass_accuracy(maps: np.ndarray, masks: np.ndarray) -> np.ndarray:
    """Share of positive attribution mass inside the mask (Arras et al. 2022); NaN without a mask."""
    pos = np.clip(maps, 0, None)
    inside = (pos * masks).sum(axis=(1, 2))
    total = pos.sum(axis=(1, 2))
    out = inside / np.where(total > 0, total, 1)
    out[masks.sum(axis=(1, 2)) == 0] = np.nan
    return out


def rank_accuracy(maps: np.ndarray, masks: np.ndarray) -> np.ndarray:
    """Share of the K highest-ranked pixels inside the mask, K = mask size (Arras et al. 2022)."""
    out = np.full(len(maps), np.nan)
    for i, (m, k) in enumerate(zip(maps, masks, strict=True)):
        n = int(k.sum())
        if n:
            top = np.argsort(m.ravel())[::-1][:n]
            out[i] = k.ravel()[top].mean()
    return out


def fabricate_records(
    degrade: dict[str, str] | None = None,
    drop: tuple[str, ...] = (),
    slow: float = 1.0,
    task: str = "upland-mini",
    model: str = "cnn",
) -> pd.DataFrame:
    """Records of a fabricated run; ``degrade`` maps explainer -> "shuffle" | "blur"."""
    degrade = degrade or {}
    rows = []
    for seed in SEEDS:
        masks = planted_masks(seed)
        for ex in EXPLAINERS:
            if ex in drop:
                continue
            maps = explainer_maps(ex, masks, seed, degrade.get(ex))
            for metric, fn in (("mass-accuracy", mass_accuracy), ("rank-accuracy", rank_accuracy)):
                for tile, v in enumerate(fn(maps, masks)):
                    rows.append((metric, "planted", tile, float(v), seed, ex))
            rows.append(("seconds", "none", -1, 0.5 * slow * (1 + EXPLAINERS.index(ex)), seed, ex))
    frame = pd.DataFrame(rows, columns=["metric", "truth", "tile", "value", "seed", "explainer"])
    frame["run_id"] = "fab-" + "-".join(f"{k}:{v}" for k, v in sorted(degrade.items()))
    frame["task"] = task
    frame["model"] = model
    return frame[["run_id", "task", "model", "seed", "explainer", "metric", "truth", "tile", "value"]]


def write_run(folder: Path, records: pd.DataFrame) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    records.to_parquet(folder / "records.parquet", index=False)
    records.to_csv(folder / "records.csv", index=False)
    (folder / "manifest.json").write_text(json.dumps({"note": "fabricated for tests"}))
    return folder


GATES_TOML = """\
# gates for the fabricated runs
[settings]
alpha = 0.01
min_pairs = 8

[default]
max_drop = 0.05
paired_test = true

[[gate]]
metric = ["mass-accuracy", "rank-accuracy"]
higher_is_better = true

[[gate]]
metric = "seconds"
higher_is_better = false
paired_test = false
max_drop = false
max_relative_drop = 0.5

[[gate]]
metric = "mass-accuracy"
explainer = "gradient"
at_least = 0.3
"""


@pytest.fixture(scope="module")
def runs(tmp_path_factory) -> dict[str, Path]:
    root = tmp_path_factory.mktemp("runs")
    base = write_run(root / "baseline", fabricate_records())
    gates = root / "gates.toml"
    gates.write_text(GATES_TOML)
    return {
        "root": root,
        "baseline": base,
        "gates": gates,
        "shuffled": write_run(root / "shuffled", fabricate_records({"gradient": "shuffle"})),
        "blurred": write_run(root / "blurred", fabricate_records({"occlusion": "blur"})),
        "missing": write_run(root / "missing", fabricate_records(drop=("occlusion",))),
        "slow": write_run(root / "slow", fabricate_records(slow=2.0)),
    }


def run_cli(args: list[str], capsys) -> tuple[int, str, str]:
    code = main(["check", *args])
    out = capsys.readouterr()
    return code, out.out, out.err


# -------------------------------------------------------------------------------------- behaviour
def test_fabrication_is_sensible():
    """The degradations really make the explainer worse (the premise of the failing tests)."""
    masks = planted_masks(0)
    good = np.nanmean(mass_accuracy(explainer_maps("gradient", masks, 0), masks))
    shuffled = np.nanmean(mass_accuracy(explainer_maps("gradient", masks, 0, "shuffle"), masks))
    blurred = np.nanmean(mass_accuracy(explainer_maps("occlusion", masks, 0, "blur"), masks))
    occl = np.nanmean(mass_accuracy(explainer_maps("occlusion", masks, 0), masks))
    assert good > shuffled + 0.15
    assert occl > blurred + 0.1


def test_identical_rerun_passes_every_gate(runs, tmp_path, capsys):
    rerun = tmp_path / "rerun"
    shutil.copytree(runs["baseline"], rerun)
    js, ju = tmp_path / "out" / "check.json", tmp_path / "out" / "check.xml"
    code, out, err = run_cli(
        [
            "--baseline",
            str(runs["baseline"]),
            "--current",
            str(rerun),
            "--gates",
            str(runs["gates"]),
            "--json",
            str(js),
            "--junit",
            str(ju),
        ],
        capsys,
    )
    assert code == 0, out + err
    assert "all gates pass" in out and "FAIL" not in out
    summary = json.loads(js.read_text())
    assert summary["passed"] is True and summary["counts"]["failed"] == 0
    # every (explainer, metric) group got its gates: 2 localization metrics x 3 explainers x
    # (max drop + paired test) + 3 seconds gates + 1 absolute gate
    assert summary["counts"]["gates"] == 2 * 3 * 2 + 3 + 1
    paired = [g for g in summary["gates"] if g["check"] == "paired-test"]
    assert paired and all(g["p_value"] == 1.0 and g["status"] == "pass" for g in paired)
    suite = ET.parse(ju).getroot()
    assert suite.tag == "testsuites" and suite.get("failures") == "0"
    assert len(suite.findall(".//testcase")) == summary["counts"]["gates"]


def test_identical_rerun_passes_builtin_gates(runs, tmp_path, capsys):
    rerun = tmp_path / "rerun"
    shutil.copytree(runs["baseline"], rerun)
    (rerun / "records.parquet").unlink()  # the CSV copy of the records is read instead
    # the built-in gates need each metric's direction: give it through a gate file only if the
    # registry is absent
    args = ["--baseline", str(runs["baseline"]), "--current", str(rerun)]
    try:
        from xbench.metrics import get_metric

        get_metric("mass-accuracy"), get_metric("rank-accuracy")
    except Exception:  # noqa: BLE001 - registry not there: state directions with the built-in defaults
        gates = tmp_path / "g.toml"
        gates.write_text(
            "[default]\nmax_relative_drop = 0.05\npaired_test = true\n"
            '[[gate]]\nmetric = "seconds"\nskip = true\n'
            '[[gate]]\nmetric = ["mass-accuracy", "rank-accuracy"]\nhigher_is_better = true\n'
        )
        args += ["--gates", str(gates)]
    code, out, err = run_cli(args, capsys)
    assert code == 0, out + err


def test_shuffled_explainer_fails_and_the_table_names_it(runs, tmp_path, capsys):
    js, ju = tmp_path / "check.json", tmp_path / "check.xml"
    code, out, err = run_cli(
        [
            "--baseline",
            str(runs["baseline"]),
            "--current",
            str(runs["shuffled"]),
            "--gates",
            str(runs["gates"]),
            "--json",
            str(js),
            "--junit",
            str(ju),
        ],
        capsys,
    )
    assert code == 1, out + err
    summary = json.loads(js.read_text())
    failed = {(g["explainer"], g["metric"], g["check"]) for g in summary["gates"] if g["status"] == "fail"}
    assert failed == {
        ("gradient", "mass-accuracy", "max-drop"),
        ("gradient", "mass-accuracy", "paired-test"),
        ("gradient", "rank-accuracy", "max-drop"),
        ("gradient", "rank-accuracy", "paired-test"),
        ("gradient", "mass-accuracy", "at-least"),
    }
    fail_lines = [line for line in out.splitlines() if line.strip().startswith("FAIL")]
    assert len(fail_lines) == 5
    assert all("gradient" in line for line in fail_lines)
    assert any("mass-accuracy" in line and "paired test" in line and "Wilcoxon" in line for line in fail_lines)
    assert "5 FAILED" in next(line for line in out.splitlines() if line.startswith("xbench check:"))
    # JUnit: the failing testcases carry a <failure> with the reason
    root = ET.parse(ju).getroot()
    failing = [c for c in root.iter("testcase") if c.find("failure") is not None]
    assert {(c.get("classname"), c.get("name")) for c in failing} >= {
        ("xbench.upland-mini.cnn.gradient", "mass-accuracy[planted] max drop")
    }
    messages = [c.find("failure").get("message") for c in failing]
    assert all("worse" in m or "significantly" in m or "below" in m for m in messages)


def test_blurred_explainer_fails_its_gates_only(runs):
    result = compare(runs["blurred"], baseline=runs["baseline"], gates=runs["gates"])
    assert not result.passed
    failing = {(o.explainer, o.metric) for o in result.failures}
    assert failing and {ex for ex, _ in failing} == {"occlusion"}
    assert ("occlusion", "mass-accuracy") in failing
    table = result.table(only_failures=True)
    assert "occlusion" in table and "gradient" not in table


def test_absolute_gates_work_without_a_baseline(runs):
    gates = {
        "gate": [
            {"metric": "mass-accuracy", "explainer": "gradient", "truth": "planted", "at_least": 0.3},
            {"metric": "mass-accuracy", "explainer": "random", "at_most": 0.6},
        ]
    }
    ok = assert_faithful(runs["baseline"], gates=gates)
    assert ok.passed and len(ok.outcomes) == 2  # only the absolute gates, no drop rows
    with pytest.raises(AssertionError) as info:
        assert_faithful(runs["shuffled"], gates=gates)
    msg = str(info.value)
    assert "FAIL" in msg and "gradient" in msg and "at least" in msg and "below 0.3" in msg


def test_missing_explainer_fails_with_a_clear_reason(runs, capsys):
    code, out, _ = run_cli(
        ["--baseline", str(runs["baseline"]), "--current", str(runs["missing"]), "--gates", str(runs["gates"])], capsys
    )
    assert code == 1
    missing = [line for line in out.splitlines() if line.strip().startswith("FAIL")]
    assert missing and all("occlusion" in line and "missing from the current run" in line for line in missing)
    assert len(missing) == 3  # mass-accuracy, rank-accuracy, seconds
    allow = load_gates({"gate": DIRECTIONS + [{"explainer": "occlusion", "allow_missing": True}]})
    result = compare(runs["missing"], baseline=runs["baseline"], gates=allow)
    assert result.passed
    assert sum(o.check == "present" and o.status == "skip" for o in result.outcomes) == 3


def test_new_group_in_current_is_not_a_failure(runs):
    result = compare(
        runs["baseline"], baseline=runs["missing"], gates={"default": {"max_drop": 0.01}, "gate": DIRECTIONS}
    )
    assert result.passed
    new = [o for o in result.outcomes if o.explainer == "occlusion"]
    assert new and all(o.status == "skip" and "not in the baseline" in o.message for o in new)


def test_lower_is_better_metrics_fail_on_a_rise(runs):
    gates = {"default": {"max_relative_drop": 0.5}, "gate": DIRECTIONS}
    slower = compare(runs["slow"], baseline=runs["baseline"], gates=gates)
    assert {(o.metric, o.check) for o in slower.failures} == {("seconds", "max-relative-drop")}
    assert "100.0% of the baseline" in slower.failures[0].message
    faster = compare(runs["baseline"], baseline=runs["slow"], gates=gates)
    assert faster.passed


def test_zero_allowed_drop_means_no_worsening_at_all(runs, tmp_path):
    frame = fabricate_records()
    frame.loc[(frame["metric"] == "seconds") & (frame["explainer"] == "random"), "value"] *= 1.01
    gates = {
        "gate": [
            {"metric": "seconds", "higher_is_better": False, "max_relative_drop": 0.0},
            {"metric": ["mass-accuracy", "rank-accuracy"], "skip": True},
        ]
    }
    result = compare(frame, baseline=runs["baseline"], gates=gates)
    assert [(o.explainer, o.check, o.status) for o in result.outcomes] == [
        ("gradient", "max-relative-drop", "pass"),
        ("occlusion", "max-relative-drop", "pass"),
        ("random", "max-relative-drop", "fail"),
    ]


def test_metric_without_direction_counts_any_change(runs, monkeypatch):
    """A metric the registry knows but with no preferred direction: a change either way is "worse"."""
    import xbench.check.apply

    monkeypatch.setattr(xbench.check.apply, "_metric_info", lambda metric: (None, None, True))
    gates = {"default": {"max_relative_drop": 0.4}}
    for current, baseline in (("slow", "baseline"), ("baseline", "slow")):
        result = compare(runs[current], baseline=runs[baseline], gates=gates)
        assert {(o.metric, o.check) for o in result.failures} == {("seconds", "max-relative-drop")}
        assert "no direction" in result.failures[0].message


def test_gate_precedence_and_switching_off(runs):
    spec = load_gates(runs["gates"])
    group = {"task": "upland-mini", "model": "cnn", "explainer": "gradient", "metric": "seconds", "truth": "none"}
    rule = spec.rule_for(group)
    assert "max_drop" not in rule and rule["max_relative_drop"] == 0.5 and rule["paired_test"] is False
    rule = spec.rule_for({**group, "metric": "mass-accuracy", "truth": "planted"})
    assert rule["max_drop"] == 0.05 and rule["at_least"] == 0.3 and rule["paired_test"] is True
    # a more specific rule wins over a less specific one, whatever the order in the file
    spec = load_gates({"gate": [{"metric": "m", "explainer": "e", "max_drop": 0.1}, {"metric": "m", "max_drop": 0.9}]})
    assert spec.rule_for({**group, "metric": "m", "explainer": "e"})["max_drop"] == 0.1
    assert spec.rule_for({**group, "metric": "m", "explainer": "x"})["max_drop"] == 0.9


MARGIN_GATES = {
    "settings": {"alpha": 0.01, "min_pairs": 8},
    "default": {"max_drop": 0.02, "paired_test": True},
    "gate": [*DIRECTIONS, {"metric": "seconds", "skip": True}],
}


def test_a_consistent_drop_inside_the_margin_passes(runs, tmp_path):
    """Every tile 0.01 worse, margin 0.02: the mean is inside the margin and the paired test (on differences
    shifted by the margin, so every shifted difference is +0.01, on the good side) cannot be significant."""
    frame = fabricate_records()
    sel = (frame["explainer"] == "occlusion") & (frame["metric"] == "mass-accuracy")
    frame.loc[sel, "value"] -= 0.01
    result = compare(write_run(tmp_path / "small", frame), baseline=runs["baseline"], gates=MARGIN_GATES)
    assert result.passed, result.table()
    paired = [o for o in result.outcomes if o.explainer == "occlusion" and o.metric == "mass-accuracy"]
    test = next(o for o in paired if o.check == "paired-test")
    assert "margin 0.02" in test.message and test.p_value > 0.5 and test.n_pairs == 2 * (TILES - 1)


def test_a_consistent_drop_beyond_the_margin_fails(runs, tmp_path):
    """Every tile 0.03 worse, margin 0.02: both the mean gate and the shifted paired test fail."""
    frame = fabricate_records()
    sel = (frame["explainer"] == "occlusion") & (frame["metric"] == "mass-accuracy")
    frame.loc[sel, "value"] -= 0.03
    result = compare(write_run(tmp_path / "big", frame), baseline=runs["baseline"], gates=MARGIN_GATES)
    assert sorted((o.explainer, o.metric, o.check) for o in result.failures) == [
        ("occlusion", "mass-accuracy", "max-drop"),
        ("occlusion", "mass-accuracy", "paired-test"),
    ]
    paired = next(o for o in result.failures if o.check == "paired-test")
    # 2 x 11 tiles all shifted by -0.01: the one-sided exact Wilcoxon p-value is 2**-22 (scipy's exact null)
    assert paired.p_value < 1e-5 and "margin" in paired.message


def test_a_noisy_drop_beyond_the_margin_is_caught_by_the_paired_test(runs, tmp_path):
    """Mean drop 0.025 (beyond 0.02) with tile noise: the shifted test still sees it with 22 pairs."""
    frame = fabricate_records()
    sel = (frame["explainer"] == "gradient") & (frame["metric"] == "rank-accuracy")
    rng = np.random.default_rng(3)
    frame.loc[sel, "value"] -= 0.025 + rng.normal(0, 0.001, sel.sum())
    result = compare(write_run(tmp_path / "noisy", frame), baseline=runs["baseline"], gates=MARGIN_GATES)
    assert ("gradient", "rank-accuracy", "paired-test") in [(o.explainer, o.metric, o.check) for o in result.failures]


def test_holm_correction_and_min_pairs(runs):
    frame = fabricate_records()
    rng = np.random.default_rng(7)
    sel = frame["metric"].isin(["mass-accuracy", "rank-accuracy"])
    frame.loc[sel, "value"] += rng.normal(-0.003, 0.02, sel.sum())  # small noisy drift everywhere
    plain = compare(frame, baseline=runs["baseline"], gates={"default": {"paired_test": True}, "gate": DIRECTIONS})
    holm = compare(
        frame,
        baseline=runs["baseline"],
        gates={"settings": {"correction": "holm"}, "default": {"paired_test": True}, "gate": DIRECTIONS},
    )
    p_plain = [o.p_value for o in plain.outcomes if o.check == "paired-test" and o.metric != "seconds"]
    p_holm = [o.p_value for o in holm.outcomes if o.check == "paired-test" and o.metric != "seconds"]
    assert len(p_plain) == len(p_holm) == 6
    assert all(h >= p - 1e-12 for p, h in zip(p_plain, p_holm, strict=True))
    assert min(p_holm) == pytest.approx(min(1.0, 6 * min(p_plain)))  # Holm 1979: smallest p times m
    assert len(plain.failures) > len(holm.failures)
    few = compare(
        frame,
        baseline=runs["baseline"],
        gates={"settings": {"min_pairs": 1000}, "default": {"paired_test": True}, "gate": DIRECTIONS},
    )
    skipped = [o for o in few.outcomes if o.check == "paired-test" and o.metric != "seconds"]
    assert few.passed and len(skipped) == 6 and all(o.status == "skip" for o in skipped)
    assert "min_pairs = 1000" in skipped[0].message


def test_nan_values_are_ignored_in_means_and_pairs(runs):
    result = compare(runs["baseline"], baseline=runs["baseline"], gates=runs["gates"])
    row = next(
        o
        for o in result.outcomes
        if o.explainer == "gradient" and o.metric == "mass-accuracy" and o.check == "paired-test"
    )
    assert np.isfinite(row.current) and row.n_pairs == 2 * (TILES - 1)


def test_json_and_junit_are_well_formed(runs, tmp_path):
    result = compare(runs["shuffled"], baseline=runs["baseline"], gates=runs["gates"])
    text = json.dumps(result.to_json(), allow_nan=False)  # NaN would be invalid JSON
    back = json.loads(text)
    assert back["passed"] is False and len(back["failures"]) == len(result.failures)
    root = ET.fromstring(result.to_junit().split("?>", 1)[1])
    suite = root.find("testsuite")
    assert int(suite.get("tests")) == len(result.outcomes)
    assert int(suite.get("failures")) == len(result.failures)


def test_registry_directions_are_used_when_available(runs):
    metrics = pytest.importorskip("xbench.metrics")
    try:
        info = metrics.get_metric("mass-accuracy")
    except Exception:  # noqa: BLE001
        pytest.skip("the metric registry has no mass-accuracy")
    assert info.higher_is_better is True
    result = compare(
        runs["shuffled"],
        baseline=runs["baseline"],
        gates={"default": {"max_drop": 0.05}, "gate": [{"metric": "seconds", "skip": True}]},
    )
    assert {(o.explainer, o.metric) for o in result.failures} == {
        ("gradient", "mass-accuracy"),
        ("gradient", "rank-accuracy"),
    }


def metric_records(degrade: dict[str, str] | None = None) -> pd.DataFrame:
    """Records whose values come from xbench's own metric implementations on fabricated maps."""
    from xbench.metrics import MetricInputs, compute_metric

    degrade = degrade or {}
    rows = []
    for seed in SEEDS:
        masks = planted_masks(seed)
        images = np.random.default_rng(seed).random((TILES, 6, SIZE, SIZE)).astype(np.float32)
        for ex in ("oracle", "gradient", "random"):
            maps = masks.astype(np.float32) if ex == "oracle" else explainer_maps(ex, masks, seed, degrade.get(ex))
            inputs = MetricInputs(
                attributions=maps, images=images, targets=np.zeros(TILES, int), planted=masks, seed=seed
            )
            for metric in ("mass-accuracy", "rank-accuracy", "mask-auroc", "pointing-game"):
                for res in compute_metric(metric, inputs):  # planted, and verified (all NaN: no twins)
                    for tile, v in enumerate(res.values):
                        rows.append(("real", "upland-mini", "cnn", seed, ex, metric, res.truth, tile, float(v)))
    return pd.DataFrame(
        rows, columns=["run_id", "task", "model", "seed", "explainer", "metric", "truth", "tile", "value"]
    )


def test_shipped_gates_on_values_from_the_metric_registry(tmp_path, capsys):
    """Values computed by xbench.metrics: an identical rerun passes the shipped gates (the control bounds
    for oracle and random included); the explainer shuffled between tiles fails; directions come from
    the registry, since the shipped gate file states none."""
    pytest.importorskip("xbench.metrics")
    gates = str(repo_root() / "results" / "gates.toml")
    base = write_run(tmp_path / "base", metric_records())
    rerun = tmp_path / "rerun"
    shutil.copytree(base, rerun)
    js = tmp_path / "ok.json"
    code, out, err = run_cli(
        ["--baseline", str(base), "--current", str(rerun), "--gates", gates, "--json", str(js)], capsys
    )
    assert code == 0, out + err
    summary = json.loads(js.read_text())
    controls = {(g["explainer"], g["check"]): g for g in summary["gates"] if g["check"] in ("at-least", "at-most")}
    assert set(controls) == {("oracle", "at-least"), ("random", "at-most")}
    assert all(g["status"] == "pass" for g in controls.values())
    # the verified truth is undefined here (no twins): reported as skipped, never failed
    assert all(g["status"] == "skip" for g in summary["gates"] if g["truth"] == "verified")
    assert "explainer = oracle" not in out and "explainer = random" not in out  # no "matched no records"

    shuffled = write_run(tmp_path / "shuffled", metric_records({"gradient": "shuffle"}))
    code, out, err = run_cli(
        ["--baseline", str(base), "--current", str(shuffled), "--gates", gates, "--failures-only"], capsys
    )
    assert code == 1, out + err
    failing = {tuple(line.split()[1:3]) for line in out.splitlines() if line.strip().startswith("FAIL")}
    assert failing == {("gradient", m) for m in ("mass-accuracy", "rank-accuracy", "mask-auroc", "pointing-game")}


# ------------------------------------------------------------------------------------ input errors
MALFORMED = [
    (
        "unknown key",
        "[default]\nmax_drop = 0.1\nmax_dorp = 0.2\n",
        ["line 3", "key default.max_dorp", "unknown key"],
    ),
    (
        "unknown key in a gate",
        '[[gate]]\nmetric = "x"\nmax_drop = 0.1\n\n[[gate]]\nmetric = "y"\nat_leest = 1\n',
        ["line 7", "key gate[1].at_leest", "unknown key"],
    ),
    ("wrong type", '[default]\nmax_drop = "0.1"\n', ["line 2", "key default.max_drop", "a number >= 0"]),
    ("negative drop", "[default]\nmax_relative_drop = -1\n", ["key default.max_relative_drop", "out of range"]),
    ("bad alpha", "[settings]\nalpha = 5\n", ["key settings.alpha", "(0, 1)"]),
    ("bad correction", '[settings]\ncorrection = "bonferoni"\n', ["key settings.correction", "'holm'"]),
    ("unknown section", "[defaults]\nmax_drop = 0.1\n", ["line 1", "key defaults", "unknown key"]),
    ("gate not an array", '[gate]\nmetric = "x"\nmax_drop = 1\n', ["[[gate]] tables"]),
    ("selector type", "[[gate]]\nmetric = 3\nmax_drop = 1\n", ["line 2", "key gate[0].metric", "a name"]),
    ("empty rule", '[[gate]]\nmetric = "x"\n', ["line 1", "sets no gate"]),
    ("syntax", "[default]\nmax_drop = = 0.1\n", ["TOML syntax error", "line 2"]),
    ("empty file", "# nothing here\n", ["sets no gate"]),
    ("empty default", "[default]\n", ["sets no gate"]),
    (
        "misspelled metric",
        '[default]\nmax_drop = 0.1\n[[gate]]\nmetric = "mass-acuracy"\nat_least = 0.1\n',
        ["key gate[0].metric", "unknown metric 'mass-acuracy'", "mass-accuracy"],
    ),
]


@pytest.mark.parametrize("case, text, expected", MALFORMED, ids=[m[0] for m in MALFORMED])
def test_malformed_gate_file_exits_2_with_a_clear_message(runs, tmp_path, capsys, case, text, expected):
    gates = tmp_path / "bad-gates.toml"
    gates.write_text(text)
    code, out, err = run_cli(
        ["--baseline", str(runs["baseline"]), "--current", str(runs["baseline"]), "--gates", str(gates)], capsys
    )
    assert code == 2, (case, out, err)
    lines = err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("xbench check: error: "), err
    assert str(gates) in lines[0]
    for piece in expected:
        assert piece in lines[0], (piece, lines[0])
    assert out == ""


def test_missing_baseline_or_records_exits_2(runs, tmp_path, capsys):
    nowhere = tmp_path / "no-such-run"
    code, _, err = run_cli(["--baseline", str(nowhere), "--current", str(runs["baseline"])], capsys)
    assert code == 2 and str(nowhere) in err and "baseline run folder not found" in err
    empty = tmp_path / "empty-run"
    empty.mkdir()
    code, _, err = run_cli(["--baseline", str(empty), "--current", str(runs["baseline"])], capsys)
    assert code == 2 and str(empty) in err and "no records.parquet" in err
    code, _, err = run_cli(["--baseline", str(runs["baseline"]), "--current", str(nowhere)], capsys)
    assert code == 2 and "current run folder not found" in err
    code, _, err = run_cli(
        [
            "--baseline",
            str(runs["baseline"]),
            "--current",
            str(runs["baseline"]),
            "--gates",
            str(tmp_path / "none.toml"),
        ],
        capsys,
    )
    assert code == 2 and "gate file not found" in err


def test_bad_records_exit_2(runs, tmp_path, capsys):
    bad = tmp_path / "bad"
    bad.mkdir()
    fabricate_records().drop(columns=["tile"]).to_parquet(bad / "records.parquet")
    code, _, err = run_cli(["--baseline", str(runs["baseline"]), "--current", str(bad)], capsys)
    assert code == 2 and "records.parquet" in err and "records lack columns" in err


def test_unknown_metric_direction_exits_2(runs, tmp_path, capsys):
    frame = fabricate_records()
    frame.loc[frame["metric"] == "seconds", "metric"] = "upland-score"
    run = write_run(tmp_path / "odd", frame)
    gates = tmp_path / "g.toml"
    gates.write_text(
        '[default]\nmax_drop = 0.1\n[[gate]]\nmetric = ["mass-accuracy", "rank-accuracy"]\nhigher_is_better = true\n'
    )
    code, _, err = run_cli(["--baseline", str(run), "--current", str(run), "--gates", str(gates)], capsys)
    assert code == 2 and "upland-score" in err and "higher_is_better" in err


def test_usage_errors_exit_2(runs, capsys):
    code, _, err = run_cli(["--baseline", str(runs["baseline"])], capsys)  # neither --current nor --task
    assert code == 2 and "one of the arguments --current --task is required" in err
    code, _, err = run_cli(["--current", "a", "--task", "b.toml"], capsys)
    assert code == 2 and "not allowed with" in err
    code, _, err = run_cli(["--current", str(runs["baseline"])], capsys)
    assert code == 2 and "--baseline" in err


def test_task_option_runs_the_task_then_checks(runs, tmp_path, capsys, monkeypatch):
    """--task: the task file is validated, gates and baseline are checked before any work, then the task
    runs into --out and that folder is compared. The runner is a stand-in copying a fabricated run."""
    import xbench.runs

    calls = []

    class Summary:
        def __init__(self, out_dir):
            self.out_dir, self.cells_failed, self.failures = Path(out_dir), 0, []

    def fake_run_task(task, out_dir, **kw):
        calls.append((str(task), Path(out_dir), kw))
        shutil.copytree(runs["shuffled"], out_dir, dirs_exist_ok=True)
        return Summary(out_dir)

    monkeypatch.setattr(xbench.runs, "run_task", fake_run_task)
    task = Path(__file__).parent / "data" / "tiny_task.toml"
    if not task.is_file():
        pytest.skip("the runner's tiny test task is not there")
    out = tmp_path / "task-run"
    code, stdout, err = run_cli(
        ["--task", str(task), "--baseline", str(runs["baseline"]), "--out", str(out), "--gates", str(runs["gates"])],
        capsys,
    )
    assert code == 1 and "5 FAILED" in stdout and f"into {out}" in err
    assert calls == [(str(task), out, {"jobs": 1})]
    # a missing baseline (here: results/<task name>/ by default) stops before the task runs
    if not (repo_root() / "results" / "tiny").exists():
        code, _, err = run_cli(["--task", str(task), "--out", str(tmp_path / "x")], capsys)
        assert code == 2 and "baseline run folder not found" in err and "tiny" in err
    code, _, err = run_cli(
        ["--task", str(task), "--baseline", str(runs["baseline"]), "--gates", str(tmp_path / "nope.toml")], capsys
    )
    assert code == 2 and "gate file not found" in err
    assert len(calls) == 1


def test_compare_raises_input_errors_for_library_use(runs):
    with pytest.raises(XbenchInputError, match="unknown key"):
        compare(runs["baseline"], gates={"default": {"max_dorp": 1}})


def test_shipped_gate_file_parses():
    spec = load_gates(repo_root() / "results" / "gates.toml")
    assert spec.rules[0].label == "[default]" and len(spec.rules) > 1


# ------------------------------------------------------------------------------------- pytest plugin
def test_plugin_import_is_light():
    """The pytest11 plugin loads in every pytest session of an xbench install: no torch, no pandas."""
    import subprocess
    import sys

    code = (
        "import sys, xbench.pytest_plugin; "
        "print(sorted(m for m in ('torch', 'pandas', 'scipy', 'xbench.check') if m in sys.modules))"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "[]"


def test_plugin_in_a_user_test_suite(pytester, runs):
    """A user's suite: one faithful explainer passes, one shuffled between tiles fails with the table."""
    pytester.makepyfile(
        test_user_explainer=f"""
        from xbench.pytest_plugin import assert_faithful

        GATES = {{
            "default": {{"max_drop": 0.05, "paired_test": True}},
            "gate": [
                {{"metric": ["mass-accuracy", "rank-accuracy"], "higher_is_better": True}},
                {{"metric": "seconds", "skip": True}},
                {{"metric": "mass-accuracy", "explainer": "gradient", "at_least": 0.3}},
            ],
        }}

        def test_faithful_explainer():
            result = assert_faithful({str(runs["baseline"])!r}, gates=GATES)
            assert result.passed

        def test_shuffled_explainer(xbench_assert_faithful):
            xbench_assert_faithful({str(runs["shuffled"])!r}, gates=GATES, baseline={str(runs["baseline"])!r})
    """
    )
    result = pytester.runpytest("-p", "no:cacheprovider")
    result.assert_outcomes(passed=1, failed=1)
    result.stdout.fnmatch_lines(
        [
            "*test_shuffled_explainer*",
            "*xbench check: 5 FAILED*",
            "*FAIL*gradient*mass-accuracy*planted*max drop*",
            "*FAIL*gradient*rank-accuracy*planted*paired test*Wilcoxon*",
        ]
    )
    assert "test_faithful_explainer FAILED" not in result.stdout.str()


def test_plugin_fixture_runs_a_task_with_a_user_explainer(pytester, runs):
    """xbench_task_run hands the task, the user's explainer key, models and seeds to run_task and returns the
    run folder; run_task itself is replaced by a stand-in that copies a fabricated run (no training here)."""
    pytester.makeconftest(f"""
        import shutil
        from pathlib import Path

        import pytest

        import xbench.runs

        CALLS = []

        class Summary:
            def __init__(self, out_dir):
                self.out_dir, self.cells_failed, self.failures = Path(out_dir), 0, []

        def fake_run_task(task, out_dir, **kw):
            CALLS.append((task, kw))
            shutil.copytree({str(runs["baseline"])!r}, out_dir, dirs_exist_ok=True)
            return Summary(out_dir)

        @pytest.fixture(autouse=True)
        def _fake_runner(monkeypatch):
            monkeypatch.setattr(xbench.runs, "run_task", fake_run_task)
            yield CALLS
    """)
    pytester.makeini("""
        [pytest]
        xbench_task = tasks/tiny.toml
    """)
    pytester.makepyfile(
        test_user_run="""
        from conftest import CALLS
        from xbench.pytest_plugin import assert_faithful

        def test_my_explainer(xbench_task_run):
            run_dir = xbench_task_run(explainers="gradient", seeds=[0, 1])
            assert (run_dir / "records.parquet").is_file()
            task, kw = CALLS[-1]
            assert task.endswith("tasks/tiny.toml")
            assert kw == {"jobs": 1, "explainers": ["gradient"], "models": None, "seeds": [0, 1]}
            assert xbench_task_run(explainers=["gradient"], seeds=[0, 1]) == run_dir  # no second run
            assert len(CALLS) == 1
            assert_faithful(run_dir, gates={"gate": [
                {"explainer": "gradient", "metric": "mass-accuracy", "at_least": 0.3}]})

        def test_listed_fixtures(pytestconfig):
            assert pytestconfig.pluginmanager.has_plugin("xbench")
    """
    )
    result = pytester.runpytest("-p", "no:cacheprovider")
    result.assert_outcomes(passed=2)


USER_CONFTEST = """
import numpy as np
import torch
from scipy.ndimage import gaussian_filter

from xbench.explainers import register_explainer


@register_explainer("smooth-saliency", needs={"gradients"}, defaults={"sigma": 1.5},
                    citation="In-house: |input gradient| of the target logit, max over bands, smoothed.")
def smooth_saliency(model, images, targets, context, *, sigma):
    x = torch.from_numpy(images).requires_grad_(True)
    with torch.enable_grad():
        logits = model.module(x)
        logits.gather(1, torch.from_numpy(targets).long()[:, None]).sum().backward()
    maps = x.grad.abs().amax(dim=1).numpy()
    return gaussian_filter(maps, sigma=(0, sigma, sigma)).astype(np.float32)
"""


@pytest.mark.slow
def test_plugin_end_to_end_with_a_user_explainer(pytester, tmp_path, monkeypatch):
    """The README example for real: a user explainer registered in the user's conftest, the runner's tiny
    task run once by the fixture (a small CNN trained into a fresh cache), gates applied to the folder.
    The user's explainer passes; the random control under the same bounds fails with the table."""
    from xbench.explainers import unregister_explainer

    task = Path(__file__).parent / "data" / "tiny_task.toml"
    if not task.is_file():
        pytest.skip("the runner's tiny test task is not there")
    monkeypatch.setenv("XBENCH_CACHE", str(tmp_path / "cache"))
    pytester.makeconftest(USER_CONFTEST)
    pytester.makepyfile(
        test_user_faithfulness=f"""
        import pytest
        from xbench.pytest_plugin import assert_faithful

        def bounds(explainer):
            return {{"gate": [
                {{"explainer": explainer, "metric": "mask-auroc", "truth": "planted", "at_least": 0.7}},
                {{"explainer": explainer, "metric": "pointing-game", "truth": "planted", "at_least": 0.5}},
            ]}}

        @pytest.fixture(scope="module")
        def run_dir(xbench_task_run):
            return xbench_task_run({str(task)!r}, explainers=["smooth-saliency", "random"])

        def test_my_explainer_finds_the_roads(run_dir):
            assert_faithful(run_dir, gates=bounds("smooth-saliency"))

        def test_random_control_does_not(run_dir):
            assert_faithful(run_dir, gates=bounds("random"))
    """
    )
    try:
        result = pytester.runpytest("-p", "no:cacheprovider")
    finally:
        unregister_explainer("smooth-saliency")
    result.assert_outcomes(passed=1, failed=1)
    result.stdout.fnmatch_lines(["*test_random_control_does_not*", "*FAIL*random*mask-auroc*planted*at least*"])


# ----------------------------------------------------------------------------- manifests and flags
def _with_manifest(folder: Path, accuracy: float, weights: str, torch_version: str = "2.13.0") -> Path:
    manifest = {
        "task": "upland-mini",
        "task_hash": "abc",
        "models": [
            {
                "name": "cnn",
                "seed": 0,
                "kind": "cnn",
                "weights_hash": weights,
                "seconds": 3.0,
                "accuracy": {"balanced_test": accuracy},
            }
        ],
        "explainers": {"gradient": {}, "occlusion": {"window": 4}, "random": {}},
        "metrics": {"mass-accuracy": {}, "rank-accuracy": {}},
        "versions": {"torch": torch_version, "xbench": "0.1.0"},
    }
    (folder / "manifest.json").write_text(json.dumps(manifest))
    return folder


def test_check_after_a_retrain_prints_the_model_change_first(runs, tmp_path, capsys):
    base = _with_manifest(write_run(tmp_path / "base", fabricate_records()), 0.969, "w1")
    cur = _with_manifest(
        write_run(tmp_path / "retrained", fabricate_records({"gradient": "shuffle"})), 0.733, "w2", "2.14.0"
    )
    js = tmp_path / "summary.json"
    code, out, _ = run_cli(
        ["--baseline", str(base), "--current", str(cur), "--gates", str(runs["gates"]), "--json", str(js)], capsys
    )
    assert code == 1
    lines = out.splitlines()
    assert lines[0].startswith("manifests: 3 change(s)")
    # the model changes come first, then the package version, all above the gate table
    assert "model cnn seed 0 test balanced accuracy: 0.969 -> 0.733 (-0.236)" in lines[1]
    assert "model cnn seed 0 weights_hash: w1 -> w2" in lines[2]
    assert "version torch: 2.13.0 -> 2.14.0" in lines[3]
    assert lines[4].startswith("xbench check: ")
    summary = json.loads(js.read_text())
    assert summary["manifests_compared"] is True
    assert [c["kind"] for c in summary["changes"]] == ["model", "model", "version"]


def test_unchanged_manifests_say_so(runs, tmp_path, capsys):
    base = _with_manifest(write_run(tmp_path / "b", fabricate_records()), 0.9, "w")
    cur = _with_manifest(write_run(tmp_path / "c", fabricate_records()), 0.9, "w")
    code, out, _ = run_cli(["--baseline", str(base), "--current", str(cur), "--gates", str(runs["gates"])], capsys)
    assert code == 0 and out.splitlines()[0].startswith("manifests: no change")


def test_allow_missing_on_the_command_line_says_what_was_skipped(runs, tmp_path, capsys):
    js = tmp_path / "s.json"
    args = ["--baseline", str(runs["baseline"]), "--current", str(runs["missing"]), "--gates", str(runs["gates"])]
    code, out, _ = run_cli([*args, "--allow-missing", "--json", str(js)], capsys)
    assert code == 0, out
    assert "skipped (in the baseline, not in the current run; allowed): explainers occlusion" in out
    assert json.loads(js.read_text())["skipped_missing"] == {"explainer": ["occlusion"]}


def test_explainers_and_metrics_flags_restrict_the_check(runs, capsys):
    args = ["--baseline", str(runs["baseline"]), "--current", str(runs["shuffled"]), "--gates", str(runs["gates"])]
    code, out, _ = run_cli([*args, "--explainers", "occlusion,random", "--metrics", "mass-accuracy"], capsys)
    assert code == 0, out
    table = "\n".join(line for line in out.splitlines() if not line.startswith("warning:"))
    assert "gradient" not in table and "rank-accuracy" not in table and "mass-accuracy" in table
    code, _, err = run_cli([*args, "--explainers", "gradeint"], capsys)
    assert code == 2 and "explainer 'gradeint' is in neither run" in err


def test_assert_faithful_takes_the_command_options(runs):
    result = assert_faithful(runs["missing"], gates=runs["gates"], baseline=runs["baseline"], allow_missing=True)
    assert result.passed and result.skipped_missing == {"explainer": ["occlusion"]}
    with pytest.raises(AssertionError, match="missing from the current run"):
        assert_faithful(runs["missing"], gates=runs["gates"], baseline=runs["baseline"])

"""One error format for every config file: for each kind of file (recipe, label rule, task sections, explainer
and metric settings, variants, gate file) an unknown key, a wrong type and a value out of range each give one
line ``FILE line L, key K: problem (expected E, found F)`` naming the right file, line and key; through the CLI
the same line is printed and the exit code is 2."""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from xbench.check.gates import load_gates
from xbench.cli import main as cli_main
from xbench.errors import XbenchInputError
from xbench.runs.grid import validate_task_keys
from xbench.scenes import load_recipe
from xbench.tasks import load_task

TASK = """\
name = "catalogue"
seeds = [0]

[data]
recipe = "conifer-upland"
size = 16
train = 8
val = 4
test = 4
seed = 1
label_noise = 0.0

[data.presence]
road = 0.5

[data.labels]
classes = ["intact", "road"]
default = "intact"

[[data.labels.rule]]
class = "road"
type = "road"
above = 0.01

[[models]]
name = "net"
kind = "cnn"
epochs = 1

[explainers]
keys = ["smoothgrad", "random"]

[explainers.settings.smoothgrad]
n_samples = 4

[metrics]
keys = ["topk-iou"]

[metrics.settings.topk-iou]
fraction = 0.1

[run]
explain_tiles = 4
gallery_tiles = 2

[[variants]]
name = "fewer-samples"
explainers = ["smoothgrad"]

[variants.explainer_settings.smoothgrad]
n_samples = 2
"""

GATES = """\
[settings]
alpha = 0.05
min_pairs = 8

[default]
max_drop = 0.1

[[gate]]
metric = "topk-iou"
at_least = 0.2
"""

# (case, old line, new text, the line the error must point at, key, problem). The new text replaces the old
# line; the expected line is the line of the TOML text that holds `at`.
TASK_CASES = [
    ("top unknown", "seeds = [0]", 'seeds = [0]\nnmae = "x"', 'nmae = "x"', "nmae", "unknown key"),
    ("top wrong type", 'name = "catalogue"', "name = 3", "name = 3", "name", "wrong type"),
    ("top out of range", "seeds = [0]", "seeds = [-1]", "seeds = [-1]", "seeds[0]", "out of range"),
    ("data unknown", "seed = 1", "seed = 1\nsede = 2", "sede = 2", "data.sede", "unknown key"),
    ("data wrong type", "size = 16", 'size = "16"', 'size = "16"', "data.size", "wrong type"),
    (
        "data out of range",
        "label_noise = 0.0",
        "label_noise = 0.9",
        "label_noise = 0.9",
        "data.label_noise",
        "out of range",
    ),
    ("presence out of range", "road = 0.5", "road = 1.5", "road = 1.5", "data.presence.road", "out of range"),
    (
        "presence unknown",
        "road = 0.5",
        "road = 0.5\nmotorway = 0.5",
        "motorway = 0.5",
        "data.presence.motorway",
        "unknown key",
    ),
    ("label rule unknown", "above = 0.01", "abov = 0.01", "abov = 0.01", "data.labels.rule[0].abov", "unknown key"),
    ("label rule wrong type", "above = 0.01", 'above = "x"', 'above = "x"', "data.labels.rule[0].above", "wrong type"),
    (
        "label rule out of range",
        "above = 0.01",
        "above = -1",
        "above = -1",
        "data.labels.rule[0].above",
        "out of range",
    ),
    ("models unknown", "epochs = 1", "epoch = 1", "epoch = 1", "models[0].epoch", "unknown key"),
    ("models wrong type", "epochs = 1", 'epochs = "one"', 'epochs = "one"', "models[0].epochs", "wrong type"),
    ("models out of range", "epochs = 1", "epochs = 0", "epochs = 0", "models[0].epochs", "out of range"),
    (
        "models renamed kind",
        'kind = "cnn"',
        'kind = "bottleneck"',
        'kind = "bottleneck"',
        "models[0].kind",
        "unknown model kind: 'bottleneck' was renamed to 'separable'",
    ),
    (
        "run unknown",
        "gallery_tiles = 2",
        "gallery_tiles = 2\nexplain_tile = 4",
        "explain_tile = 4",
        "run.explain_tile",
        "unknown key",
    ),
    (
        "run wrong type",
        "gallery_tiles = 2",
        "gallery_tiles = 2.5",
        "gallery_tiles = 2.5",
        "run.gallery_tiles",
        "wrong type",
    ),
    (
        "run out of range",
        "gallery_tiles = 2",
        "gallery_tiles = 0",
        "gallery_tiles = 0",
        "run.gallery_tiles",
        "out of range",
    ),
    (
        "variants unknown",
        'name = "fewer-samples"',
        'name = "fewer-samples"\nnmae = "x"',
        'nmae = "x"',
        "variants[0].nmae",
        "unknown key",
    ),
    ("variants wrong type", 'name = "fewer-samples"', "name = 3", "name = 3", "variants[0].name", "wrong type"),
    (
        "variants bad value",
        'name = "fewer-samples"',
        'name = "fewer samples"',
        'name = "fewer samples"',
        "variants[0].name",
        "bad variant name",
    ),
]
# settings are checked against the registries (before any work of a run)
SETTINGS_CASES = [
    (
        "metric renamed key",
        'keys = ["topk-iou"]',
        'keys = ["topk-iou", "sparseness"]',
        'keys = ["topk-iou", "sparseness"]',
        "metrics.keys[1]",
        "unknown metric key: 'sparseness' was renamed to 'gini'",
    ),
    (
        "explainer unknown",
        "n_samples = 4",
        "n_sample = 4",
        "n_sample = 4",
        "explainers.settings.smoothgrad.n_sample",
        "unknown setting",
    ),
    (
        "explainer wrong type",
        "n_samples = 4",
        'n_samples = "many"',
        'n_samples = "many"',
        "explainers.settings.smoothgrad.n_samples",
        "wrong type",
    ),
    (
        "explainer out of range",
        "n_samples = 4",
        "n_samples = 0",
        "n_samples = 0",
        "explainers.settings.smoothgrad.n_samples",
        "out of range",
    ),
    (
        "metric unknown",
        "fraction = 0.1",
        "fractoin = 0.1",
        "fractoin = 0.1",
        '"metrics.settings.topk-iou".fractoin',
        "unknown setting",
    ),
    (
        "metric wrong type",
        "fraction = 0.1",
        'fraction = "a tenth"',
        'fraction = "a tenth"',
        "metrics.settings.topk-iou.fraction",
        "wrong type",
    ),
    (
        "metric out of range",
        "fraction = 0.1",
        "fraction = 1.5",
        "fraction = 1.5",
        "metrics.settings.topk-iou.fraction",
        "out of range",
    ),
    (
        "variant setting out of range",
        "n_samples = 2",
        "n_samples = -2",
        "n_samples = -2",
        "variants[0].explainer_settings.smoothgrad.n_samples",
        "out of range",
    ),
]
GATE_CASES = [
    (
        "gate unknown",
        "max_drop = 0.1",
        "max_drop = 0.1\nmax_dorp = 0.2",
        "max_dorp = 0.2",
        "default.max_dorp",
        "unknown key",
    ),
    ("gate wrong type", "min_pairs = 8", 'min_pairs = "8"', 'min_pairs = "8"', "settings.min_pairs", "wrong type"),
    ("gate out of range", "alpha = 0.05", "alpha = 1.5", "alpha = 1.5", "settings.alpha", "out of range"),
    ("gate rule out of range", "at_least = 0.2", "max_drop = -1", "max_drop = -1", "gate[0].max_drop", "out of range"),
]


def _mutate(base: str, old: str, new: str, at: str) -> tuple[str, int]:
    """The text with the one line ``old`` replaced by ``new``, and the 1-based line that holds ``at``."""
    lines = base.splitlines()
    assert lines.count(old) >= 1, old
    text = "\n".join(lines).replace(old, new, 1) + "\n"
    return text, text.splitlines().index(at) + 1


def _assert_one_format(message: str, path: Path, line: int, key: str, problem: str) -> None:
    key = key.replace('"metrics.settings.topk-iou"', "metrics.settings.topk-iou")
    # a key with '-' is bare in TOML and in the message (letters, digits, '-' and '_')
    pattern = (
        rf"^{re.escape(str(path))} line {line}, key {re.escape(key)}: {re.escape(problem)}.* \(expected .+, found .+\)$"
    )
    assert re.match(pattern, message), (message, pattern)
    assert "\n" not in message


def _write(tmp_path: Path, name: str, text: str) -> Path:
    path = tmp_path / name
    path.write_text(text)
    return path


def test_the_base_files_are_valid(tmp_path: Path) -> None:
    task = load_task(_write(tmp_path, "task.toml", TASK))
    validate_task_keys(task)
    assert task.explainer_settings == {"smoothgrad": {"n_samples": 4}}
    assert load_gates(_write(tmp_path, "gates.toml", GATES)).settings.min_pairs == 8


@pytest.mark.parametrize("case, old, new, at, key, problem", TASK_CASES, ids=[c[0] for c in TASK_CASES])
def test_task_file_errors(tmp_path: Path, case: str, old: str, new: str, at: str, key: str, problem: str) -> None:
    text, line = _mutate(TASK, old, new, at)
    path = _write(tmp_path, "task.toml", text)
    with pytest.raises(XbenchInputError) as err:
        load_task(path)
    _assert_one_format(str(err.value), path, line, key, problem)


@pytest.mark.parametrize("case, old, new, at, key, problem", SETTINGS_CASES, ids=[c[0] for c in SETTINGS_CASES])
def test_settings_errors(tmp_path: Path, case: str, old: str, new: str, at: str, key: str, problem: str) -> None:
    text, line = _mutate(TASK, old, new, at)
    path = _write(tmp_path, "task.toml", text)
    task = load_task(path)  # settings are data to the task file; the registries check them
    with pytest.raises(XbenchInputError) as err:
        validate_task_keys(task)
    _assert_one_format(str(err.value), path, line, key, problem)


@pytest.mark.parametrize("case, old, new, at, key, problem", GATE_CASES, ids=[c[0] for c in GATE_CASES])
def test_gate_file_errors(tmp_path: Path, case: str, old: str, new: str, at: str, key: str, problem: str) -> None:
    text, line = _mutate(GATES, old, new, at)
    path = _write(tmp_path, "gates.toml", text)
    with pytest.raises(XbenchInputError) as err:
        load_gates(path)
    _assert_one_format(str(err.value), path, line, key, problem)


RECIPE_CASES = [
    ("recipe unknown", "haze = 0.012", "haze = 0.012\nhaz = 0.01", "haz = 0.01", "sensor.haz", "unknown key"),
    ("recipe wrong type", "haze = 0.012", 'haze = "light"', 'haze = "light"', "sensor.haze", "wrong type"),
    ("recipe out of range", "haze = 0.012", "haze = 0.9", "haze = 0.9", "sensor.haze", "out of range"),
]


@pytest.mark.parametrize("case, old, new, at, key, problem", RECIPE_CASES, ids=[c[0] for c in RECIPE_CASES])
def test_recipe_file_errors(tmp_path: Path, case: str, old: str, new: str, at: str, key: str, problem: str) -> None:
    shipped = Path(load_recipe("conifer-upland").path).read_text()
    text, line = _mutate(shipped, old, new, at)
    path = _write(tmp_path, "recipe.toml", text)
    with pytest.raises(XbenchInputError) as err:
        load_recipe(path)
    _assert_one_format(str(err.value), path, line, key, problem)


def _cli_error(argv: list[str], capsys: pytest.CaptureFixture[str]) -> str:
    code = cli_main(argv)
    err = capsys.readouterr().err.strip()
    assert code == 2, err
    lines = [x for x in err.splitlines() if "warning" not in x]
    assert len(lines) == 1, err
    return lines[0]


@pytest.mark.parametrize(
    "case",
    ["data out of range", "models renamed kind", "run unknown"],
)
def test_cli_prints_the_task_error_and_exits_2(tmp_path: Path, capsys: pytest.CaptureFixture[str], case: str) -> None:
    _, old, new, at, key, problem = next(c for c in TASK_CASES if c[0] == case)
    text, line = _mutate(TASK, old, new, at)
    path = _write(tmp_path, "task.toml", text)
    err = _cli_error(["run", str(path), "--out", str(tmp_path / "out"), "--quiet"], capsys)
    assert err.startswith("xbench run: error: ")
    _assert_one_format(err.removeprefix("xbench run: error: "), path, line, key, problem)
    assert not (tmp_path / "out").exists()


def test_cli_prints_a_settings_error_before_any_work(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    _, old, new, at, key, problem = next(c for c in SETTINGS_CASES if c[0] == "metric out of range")
    text, line = _mutate(TASK, old, new, at)
    path = _write(tmp_path, "task.toml", text)
    err = _cli_error(["run", str(path), "--out", str(tmp_path / "out"), "--quiet"], capsys)
    _assert_one_format(err.removeprefix("xbench run: error: "), path, line, key, problem)


RASTER_CASES = [
    ("raster data unknown", "size = 32", "size = 32\nsise = 32", "sise = 32", "data.sise", "unknown key"),
    ("raster data out of range", "size = 32", "size = 30", "size = 30", "data.size", "bad tile size"),
]


@pytest.mark.parametrize("case, old, new, at, key, problem", RASTER_CASES, ids=[c[0] for c in RASTER_CASES])
def test_raster_data_errors(tmp_path: Path, case: str, old: str, new: str, at: str, key: str, problem: str) -> None:
    """The raster `[data]` form keeps its own checks (xbench.imagery.taskdata) but speaks the same format."""
    shipped = (Path(__file__).parents[1] / "tasks" / "geotiff-roads.toml").read_text()
    text, line = _mutate(shipped, old, new, at)
    path = _write(tmp_path, "task.toml", text)
    with pytest.raises(XbenchInputError) as err:
        load_task(path)
    message = str(err.value)
    assert message.startswith(f"{path} line {line}, key {key}: {problem}"), message


@pytest.mark.parametrize(
    "argv, old, new",
    [
        (["synth", "--recipe", "orrin-vale", "--count", "2", "--out", "OUT"], "orrin-vale", "conifer-upland"),
        (["run", "weak-labels", "--out", "OUT"], "weak-labels", "label-noise"),
        (["metrics", "--family", "sanity"], "sanity", "model-dependence"),
    ],
)
def test_old_names_fail_naming_the_new_one(argv, old, new, tmp_path, capsys) -> None:
    # Renamed keys (xbench.names.RENAMED, CHANGELOG.md): one error line that names the new key, exit 2.
    from xbench.cli import main

    code = main([str(tmp_path / "out") if a == "OUT" else a for a in argv])
    err = capsys.readouterr().err.strip()
    assert code == 2 and f"'{old}' was renamed to '{new}'" in err and len(err.splitlines()) == 1, err

"""Tests of designcalc.scenario: the demo scenarios load and every malformed file is a ScenarioError naming its key."""

from __future__ import annotations

import copy
import subprocess
import sys
import tomllib
from pathlib import Path
from typing import Any

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scenario_text import to_toml

from designcalc.edge_models import BlockModel, KernelModel
from designcalc.errors import ScenarioError
from designcalc.scenario import Scenario, load_scenario, parse_scenario

SCENARIOS = Path(__file__).parents[1] / "scenarios"
DEMOS = sorted(SCENARIOS.glob("*.toml"))

BASE = """
[scenario]
name = "base"

[population]
units = [200, 400]

[network]
model = "blocks"
block_shares = [0.6, 0.4]
block_affinity = [[4.0, 1.0], [1.0, 3.0]]

[network.density]
mean_degree = 8
reference_units = 200
growth_exponent = 0.0

[outcome]
kind = "continuous"
baseline = 1.0
noise_sd = 1.0
direct_effect = 0.5
spillover_effect = 0.3
spillover_shape = "linear"

[design]
treatment_probability = [0.5]

[simulation]
graphs = 4
assignments_per_graph = 2
seed = 3
"""

KERNEL_BASE = """
[population]
units = [300]

[network]
model = "kernel"
kernel = "distance_decay"
length_scale = 0.1
floor = 0.05

[network.density]
mean_degree = 6
reference_units = 300

[outcome]
noise_sd = 1.0
direct_effect = 0.5
spillover_effect = 0.3

[design]
treatment_probability = 0.4
"""

BINARY_BASE = BASE.replace('kind = "continuous"\nbaseline = 1.0\nnoise_sd = 1.0', 'kind = "binary"\nbaseline = 0.3')


def _sub(base: str, old: str, new: str) -> str:
    """Replace exactly one occurrence, so a typo in a test case cannot silently leave the base unchanged."""
    assert base.count(old) == 1, old
    return base.replace(old, new)


def test_demo_scenarios_load() -> None:
    """Every demo scenario loads into a Scenario with the model kind its file states."""
    assert len(DEMOS) >= 2
    kinds = set()
    for path in DEMOS:
        scenario = load_scenario(path)
        assert isinstance(scenario, Scenario)
        assert scenario.source == path.name
        assert len(scenario.sha256) == 64
        kinds.add(scenario.network.kind)
    assert kinds == {"blocks", "kernel", "surveyed"}


def test_base_texts_are_valid() -> None:
    """The bases the malformed cases are derived from are themselves valid."""
    s = parse_scenario(BASE)
    assert isinstance(s.network, BlockModel)
    assert s.population.units == (200, 400)
    assert s.design.treatment_probabilities == (0.5,)
    k = parse_scenario(KERNEL_BASE)
    assert isinstance(k.network, KernelModel) and k.network.family == "distance_decay"
    assert parse_scenario(BINARY_BASE).outcome.kind == "binary"


# (id, text, dotted key expected in the message)
MALFORMED: list[tuple[str, str, str]] = [
    ("missing population table", _sub(BASE, "[population]\nunits = [200, 400]\n", ""), "population"),
    ("missing network table", BASE.split("[network]")[0] + "[outcome]" + BASE.split("[outcome]")[1], "network"),
    ("missing outcome table", BASE.split("[outcome]")[0] + "[design]" + BASE.split("[design]")[1], "outcome"),
    ("missing design table", BASE.split("[design]")[0] + "[simulation]" + BASE.split("[simulation]")[1], "design"),
    ("missing density table", _sub(BASE, "[network.density]\nmean_degree = 8\nreference_units = 200\ngrowth_exponent = 0.0\n", ""), "network.density"),
    ("missing units", _sub(BASE, "units = [200, 400]", ""), "population.units"),
    ("missing model", _sub(BASE, 'model = "blocks"', ""), "network.model"),
    ("missing block_shares", _sub(BASE, "block_shares = [0.6, 0.4]", ""), "network.block_shares"),
    ("missing block_affinity", _sub(BASE, "block_affinity = [[4.0, 1.0], [1.0, 3.0]]", ""), "network.block_affinity"),
    ("missing mean_degree", _sub(BASE, "mean_degree = 8", ""), "network.density.mean_degree"),
    ("missing reference_units", _sub(BASE, "reference_units = 200", ""), "network.density.reference_units"),
    ("missing noise_sd", _sub(BASE, "noise_sd = 1.0", ""), "outcome.noise_sd"),
    ("missing direct_effect", _sub(BASE, "direct_effect = 0.5", ""), "outcome.direct_effect"),
    ("missing spillover_effect", _sub(BASE, "spillover_effect = 0.3", ""), "outcome.spillover_effect"),
    ("missing treatment_probability", _sub(BASE, "treatment_probability = [0.5]", ""), "design.treatment_probability"),
    ("units as text", _sub(BASE, "units = [200, 400]", 'units = "200"'), "population.units"),
    ("units fractional", _sub(BASE, "units = [200, 400]", "units = [200.5]"), "population.units[0]"),
    ("units too small", _sub(BASE, "units = [200, 400]", "units = [3]"), "population.units[0]"),
    ("units duplicated", _sub(BASE, "units = [200, 400]", "units = [200, 200]"), "population.units"),
    ("units empty", _sub(BASE, "units = [200, 400]", "units = []"), "population.units"),
    ("units boolean", _sub(BASE, "units = [200, 400]", "units = [true]"), "population.units[0]"),
    ("treatment probability 1.2", _sub(BASE, "treatment_probability = [0.5]", "treatment_probability = 1.2"), "design.treatment_probability"),
    ("treatment probability 0", _sub(BASE, "treatment_probability = [0.5]", "treatment_probability = 0"), "design.treatment_probability"),
    ("treatment probability 1", _sub(BASE, "treatment_probability = [0.5]", "treatment_probability = [0.3, 1.0]"), "design.treatment_probability[1]"),
    ("treatment probability quoted", _sub(BASE, "treatment_probability = [0.5]", 'treatment_probability = "0.5"'), "design.treatment_probability"),
    ("treatment probability duplicated", _sub(BASE, "treatment_probability = [0.5]", "treatment_probability = [0.5, 0.5]"), "design.treatment_probability"),
    ("treatment probability nan", _sub(BASE, "treatment_probability = [0.5]", "treatment_probability = nan"), "design.treatment_probability"),
    ("misspelt treatment_probability", _sub(BASE, "treatment_probability = [0.5]", "treatment_probability = [0.5]\ntreatment_probabilty = 0.5"), "design.treatment_probabilty"),
    ("significance level 0.7", _sub(BASE, "treatment_probability = [0.5]", "treatment_probability = [0.5]\nsignificance_level = 0.7"), "design.significance_level"),
    ("target power 1", _sub(BASE, "treatment_probability = [0.5]", "treatment_probability = [0.5]\ntarget_power = 1"), "design.target_power"),
    ("unknown alternative", _sub(BASE, "treatment_probability = [0.5]", 'treatment_probability = [0.5]\nalternative = "two_sided"'), "design.alternative"),
    ("negative noise_sd", _sub(BASE, "noise_sd = 1.0", "noise_sd = -1.0"), "outcome.noise_sd"),
    ("noise_sd infinite", _sub(BASE, "noise_sd = 1.0", "noise_sd = inf"), "outcome.noise_sd"),
    ("shares not summing to 1", _sub(BASE, "block_shares = [0.6, 0.4]", "block_shares = [0.6, 0.5]"), "network.block_shares"),
    ("share zero", _sub(BASE, "block_shares = [0.6, 0.4]", "block_shares = [1.0, 0.0]"), "network.block_shares[1]"),
    ("share negative", _sub(BASE, "block_shares = [0.6, 0.4]", "block_shares = [1.2, -0.2]"), "network.block_shares[0]"),
    ("shares scalar", _sub(BASE, "block_shares = [0.6, 0.4]", "block_shares = 1.0"), "network.block_shares"),
    ("asymmetric affinity", _sub(BASE, "block_affinity = [[4.0, 1.0], [1.0, 3.0]]", "block_affinity = [[4.0, 1.0], [2.0, 3.0]]"), "network.block_affinity[0][1]"),
    ("affinity wrong row count", _sub(BASE, "block_affinity = [[4.0, 1.0], [1.0, 3.0]]", "block_affinity = [[4.0, 1.0]]"), "network.block_affinity"),
    ("affinity wrong row length", _sub(BASE, "block_affinity = [[4.0, 1.0], [1.0, 3.0]]", "block_affinity = [[4.0, 1.0], [1.0, 3.0, 2.0]]"), "network.block_affinity[1]"),
    ("affinity flat list", _sub(BASE, "block_affinity = [[4.0, 1.0], [1.0, 3.0]]", "block_affinity = [4.0, 1.0]"), "network.block_affinity"),
    ("affinity negative", _sub(BASE, "block_affinity = [[4.0, 1.0], [1.0, 3.0]]", "block_affinity = [[4.0, 1.0], [1.0, -3.0]]"), "network.block_affinity[1][1]"),
    ("affinity all zero", _sub(BASE, "block_affinity = [[4.0, 1.0], [1.0, 3.0]]", "block_affinity = [[0.0, 0.0], [0.0, 0.0]]"), "network.block_affinity"),
    ("affinity text entry", _sub(BASE, "block_affinity = [[4.0, 1.0], [1.0, 3.0]]", 'block_affinity = [[4.0, "1"], [1.0, 3.0]]'), "network.block_affinity[0][1]"),
    ("unknown model", _sub(BASE, 'model = "blocks"', 'model = "block"'), "network.model"),
    ("kernel key in block model", _sub(BASE, 'model = "blocks"', 'model = "blocks"\nlength_scale = 0.1'), "network.length_scale"),
    ("block key in kernel model", _sub(KERNEL_BASE, "floor = 0.05", "floor = 0.05\nblock_shares = [1.0]"), "network.block_shares"),
    ("unknown kernel family", _sub(KERNEL_BASE, 'kernel = "distance_decay"', 'kernel = "gaussian"'), "network.kernel"),
    ("parameter of another family", _sub(KERNEL_BASE, "floor = 0.05", "floor = 0.05\ndegree_ratio = 3"), "network.degree_ratio"),
    ("length_scale zero", _sub(KERNEL_BASE, "length_scale = 0.1", "length_scale = 0"), "network.length_scale"),
    ("degree_ratio below 1", _sub(KERNEL_BASE, 'kernel = "distance_decay"\nlength_scale = 0.1\nfloor = 0.05', 'kernel = "degree_gradient"\ndegree_ratio = 0.5'), "network.degree_ratio"),
    ("cosine amplitudes too large", _sub(KERNEL_BASE, 'kernel = "distance_decay"\nlength_scale = 0.1\nfloor = 0.05', 'kernel = "cosine"\namplitudes = [0.7, 0.6]'), "network.amplitudes"),
    ("expression importing os", _sub(KERNEL_BASE, 'kernel = "distance_decay"\nlength_scale = 0.1\nfloor = 0.05', "kernel = \"expression\"\nexpression = \"__import__('os')\""), "network.expression"),
    ("asymmetric expression", _sub(KERNEL_BASE, 'kernel = "distance_decay"\nlength_scale = 0.1\nfloor = 0.05', 'kernel = "expression"\nexpression = "1 + u - v"'), "network.expression"),
    ("negative expression", _sub(KERNEL_BASE, 'kernel = "distance_decay"\nlength_scale = 0.1\nfloor = 0.05', 'kernel = "expression"\nexpression = "u*v - 0.5"'), "network.expression"),
    ("expression not text", _sub(KERNEL_BASE, 'kernel = "distance_decay"\nlength_scale = 0.1\nfloor = 0.05', 'kernel = "expression"\nexpression = 3'), "network.expression"),
    ("mean_degree zero", _sub(BASE, "mean_degree = 8", "mean_degree = 0"), "network.density.mean_degree"),
    ("mean_degree >= n - 1", _sub(BASE, "mean_degree = 8", "mean_degree = 199"), "network.density.mean_degree"),
    # mean degree 198.5 at 200 units is allowed, but growth 1 asks for 198.5 * 5 / 200 = 4.96 >= 4 links at 5 units.
    ("growth makes degree too large", _sub(_sub(_sub(BASE, "growth_exponent = 0.0", "growth_exponent = 1.0"), "units = [200, 400]", "units = [5, 400]"), "mean_degree = 8", "mean_degree = 198.5"), "network.density.mean_degree"),
    ("growth exponent above 1", _sub(BASE, "growth_exponent = 0.0", "growth_exponent = 1.5"), "network.density.growth_exponent"),
    ("reference units fractional", _sub(BASE, "reference_units = 200", "reference_units = 200.5"), "network.density.reference_units"),
    ("unknown density key", _sub(BASE, "mean_degree = 8", "mean_degree = 8\nmean_degre = 8"), "network.density.mean_degre"),
    ("threshold outside (0, 1]", _sub(BASE, 'spillover_shape = "linear"', 'spillover_shape = "threshold"\nthreshold = 1.5'), "outcome.threshold"),
    ("threshold zero", _sub(BASE, 'spillover_shape = "linear"', 'spillover_shape = "threshold"\nthreshold = 0'), "outcome.threshold"),
    ("threshold missing", _sub(BASE, 'spillover_shape = "linear"', 'spillover_shape = "threshold"'), "outcome.threshold"),
    ("threshold with linear shape", _sub(BASE, 'spillover_shape = "linear"', 'spillover_shape = "linear"\nthreshold = 0.5'), "outcome.threshold"),
    ("saturation rate with linear shape", _sub(BASE, 'spillover_shape = "linear"', 'spillover_shape = "linear"\nsaturation_rate = 3'), "outcome.saturation_rate"),
    ("saturation rate zero", _sub(BASE, 'spillover_shape = "linear"', 'spillover_shape = "saturating"\nsaturation_rate = 0'), "outcome.saturation_rate"),
    ("unknown shape", _sub(BASE, 'spillover_shape = "linear"', 'spillover_shape = "concave"'), "outcome.spillover_shape"),
    ("unknown kind", _sub(BASE, 'kind = "continuous"', 'kind = "count"'), "outcome.kind"),
    ("binary with noise_sd", _sub(BINARY_BASE, "baseline = 0.3", "baseline = 0.3\nnoise_sd = 1.0"), "outcome.noise_sd"),
    ("binary identity baseline above 1", _sub(BINARY_BASE, "baseline = 0.3", "baseline = 1.3"), "outcome.baseline"),
    ("binary unknown link", _sub(BINARY_BASE, "baseline = 0.3", 'baseline = 0.3\nlink = "probit"'), "outcome.link"),
    ("link on continuous outcome", _sub(BASE, "noise_sd = 1.0", 'noise_sd = 1.0\nlink = "logistic"'), "outcome.link"),
    ("bad type_effect expression", _sub(BASE, "noise_sd = 1.0", "noise_sd = 1.0\ntype_effect = \"__import__('os')\""), "outcome.type_effect"),
    ("block_effects wrong length", _sub(BASE, "noise_sd = 1.0", "noise_sd = 1.0\nblock_effects = [0.0, 1.0, 2.0]"), "outcome.block_effects"),
    ("block_effects in kernel model", _sub(KERNEL_BASE, "noise_sd = 1.0", "noise_sd = 1.0\nblock_effects = [0.0]"), "outcome.block_effects"),
    ("unknown exposure", _sub(BASE, "noise_sd = 1.0", 'noise_sd = 1.0\nexposure = "count"'), "outcome.exposure"),
    ("misspelt top-level table", BASE + "\n[simulaton]\ngraphs = 3\n", "simulaton"),
    ("unknown estimator", BASE + '\n[estimators]\ndirect = ["hajek", "ols"]\n', "estimators.direct[1]"),
    ("duplicate estimator", BASE + '\n[estimators]\ndirect = ["hajek", "hajek"]\n', "estimators.direct"),
    ("eigenvectors text", BASE + '\n[estimators]\neigenvectors = "many"\n', "estimators.eigenvectors"),
    ("eigenvectors too many", BASE + "\n[estimators]\neigenvectors = 51\n", "estimators.eigenvectors"),
    ("graphs zero", _sub(BASE, "graphs = 4", "graphs = 0"), "simulation.graphs"),
    ("too many replicates", _sub(_sub(BASE, "graphs = 4", "graphs = 1000000"), "assignments_per_graph = 2", "assignments_per_graph = 100"), "simulation.graphs"),
    ("negative seed", _sub(BASE, "seed = 3", "seed = -1"), "simulation.seed"),
    ("population is a value", "population = 3\n" + _sub(BASE, "[population]\nunits = [200, 400]\n", ""), "population"),
    ("scenario name not text", _sub(BASE, 'name = "base"', "name = 3"), "scenario.name"),
]


def test_at_least_fifty_malformed_cases() -> None:
    """The malformed corpus holds at least 50 distinct cases."""
    assert len({text for _, text, _ in MALFORMED}) >= 50


@pytest.mark.parametrize(("text", "key"), [(t, k) for _, t, k in MALFORMED], ids=[i for i, _, _ in MALFORMED])
def test_malformed_scenario_names_its_key(text: str, key: str) -> None:
    """Each malformed scenario raises ScenarioError whose message names the dotted key."""
    with pytest.raises(ScenarioError, match=rf"village\.toml: {_re(key)}(\[\d+\])?:") as info:
        parse_scenario(text, source="village.toml")
    assert info.value.key.startswith(key)


def _re(key: str) -> str:
    import re

    return re.escape(key)


def test_misspelt_key_suggests_the_right_one() -> None:
    """An unknown key close to a known one gets a 'did you mean' hint."""
    text = _sub(BASE, "treatment_probability = [0.5]", "treatment_probability = [0.5]\ntreatment_probabilty = [0.5]")
    with pytest.raises(ScenarioError, match=r"did you mean `treatment_probability`\?"):
        parse_scenario(text)


def test_invalid_toml() -> None:
    """Text that is not TOML is a ScenarioError naming the file."""
    with pytest.raises(ScenarioError, match=r"bad\.toml: is not valid TOML"):
        parse_scenario(BASE + "\nunits = [1, 2\n", source="bad.toml")


def test_non_utf8_file(tmp_path: Path) -> None:
    """A file that is not UTF-8 is a ScenarioError, not a UnicodeDecodeError."""
    path = tmp_path / "latin.toml"
    path.write_bytes(BASE.replace("base", "Bogot\xe1").encode("latin-1"))
    with pytest.raises(ScenarioError, match="is not UTF-8 text"):
        load_scenario(path)


def test_missing_file(tmp_path: Path) -> None:
    """A path that does not exist is a ScenarioError."""
    with pytest.raises(ScenarioError, match="no such file"):
        load_scenario(tmp_path / "nowhere.toml")


def test_directory(tmp_path: Path) -> None:
    """A folder is a ScenarioError."""
    with pytest.raises(ScenarioError, match="is a folder"):
        load_scenario(tmp_path)


def test_load_file_quotes_file_name(tmp_path: Path) -> None:
    """load_scenario quotes the file name with the dotted key."""
    path = tmp_path / "village.toml"
    path.write_text(_sub(BASE, "treatment_probability = [0.5]", "treatment_probability = 1.2"), encoding="utf-8")
    with pytest.raises(ScenarioError, match=r"village\.toml: design\.treatment_probability"):
        load_scenario(path)


# ---------------------------------------------------------------------------
# Hypothesis: mutate a valid scenario; only ScenarioError may ever escape.
# ---------------------------------------------------------------------------
def _leaf_paths(data: Any, path: tuple = ()) -> list[tuple]:
    if isinstance(data, dict):
        return [p for k, v in data.items() for p in _leaf_paths(v, path + (k,))] or [path]
    if isinstance(data, list) and data:
        return [path] + [p for i, v in enumerate(data) for p in _leaf_paths(v, path + (i,))]
    return [path]


def _key_paths(data: Any, path: tuple = ()) -> list[tuple]:
    if isinstance(data, dict):
        return [p for k, v in data.items() for p in [path + (k,)] + _key_paths(v, path + (k,))]
    return []


def _set(data: Any, path: tuple, value: Any) -> None:
    for p in path[:-1]:
        data = data[p]
    data[path[-1]] = value


def _delete(data: Any, path: tuple) -> None:
    for p in path[:-1]:
        data = data[p]
    del data[path[-1]]


BASE_DICTS = [tomllib.loads(BASE), tomllib.loads(KERNEL_BASE), tomllib.loads(BINARY_BASE)]
WRONG_VALUES = st.one_of(
    st.booleans(),
    st.integers(min_value=-(2**63), max_value=2**63 - 1),
    st.floats(allow_nan=True, allow_infinity=True),
    st.sampled_from([0, 1, -1, 1.2, 0.0, -0.5, 1e300, 2**62, "", "u", "__import__('os')", "1/0", "u - v", "blocks", "kernel"]),
    st.text(max_size=12),
    st.lists(st.floats(allow_nan=False, width=32), max_size=3),
    st.lists(st.integers(-5, 5), max_size=3),
    st.just([[1.0, 2.0], [3.0]]),
    st.dictionaries(st.sampled_from(["a", "units", "x"]), st.integers(0, 3), max_size=2),
)


@settings(max_examples=150, deadline=None)
@given(base=st.sampled_from(range(len(BASE_DICTS))), data=st.data())
def test_mutated_scenarios_only_raise_scenario_error(base: int, data: st.DataObject) -> None:
    """Replacing a random leaf by a wrong value, or deleting a random key, never raises anything but ScenarioError."""
    scenario = copy.deepcopy(BASE_DICTS[base])
    if data.draw(st.booleans(), label="delete"):
        path = data.draw(st.sampled_from(_key_paths(scenario)), label="deleted key")
        _delete(scenario, path)
    else:
        path = data.draw(st.sampled_from([p for p in _leaf_paths(scenario) if p]), label="replaced leaf")
        _set(scenario, path, data.draw(WRONG_VALUES, label="value"))
    text = to_toml(scenario)
    try:
        parse_scenario(text)
    except ScenarioError as exc:
        assert str(exc)
    # A mutation that happens to be valid (e.g. 0.5 -> 0.3) must load without error: nothing to assert.


# ---------------------------------------------------------------------------
# The command line: `designcalc check FILE`
# ---------------------------------------------------------------------------
CLI_CASES = [case for case in MALFORMED if case[0] in {
    "missing units", "treatment probability 1.2", "negative noise_sd", "shares not summing to 1",
    "asymmetric affinity", "misspelt treatment_probability", "unknown kernel family", "expression importing os",
    "binary with noise_sd", "threshold outside (0, 1]", "mean_degree >= n - 1",
}]


def _run_check(path: Path) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "designcalc", "check", str(path)], check=False, capture_output=True, text=True, timeout=120, env={"NO_COLOR": "1", "COLUMNS": "200", "PATH": ""})


@pytest.mark.parametrize(("text", "key"), [(t, k) for _, t, k in CLI_CASES], ids=[i for i, _, _ in CLI_CASES])
def test_cli_check_rejects_malformed(tmp_path: Path, text: str, key: str) -> None:
    """`designcalc check` exits 2 on a malformed file, names the key on stderr and prints no traceback."""
    path = tmp_path / "bad.toml"
    path.write_text(text, encoding="utf-8")
    result = _run_check(path)
    assert result.returncode == 2, result.stderr
    assert key in " ".join(result.stderr.split())
    assert "Traceback" not in result.stderr + result.stdout


@pytest.mark.parametrize("path", DEMOS, ids=[p.stem for p in DEMOS])
def test_cli_check_accepts_demos(path: Path) -> None:
    """`designcalc check` exits 0 on each demo scenario."""
    result = _run_check(path)
    assert result.returncode == 0, result.stderr
    assert "Traceback" not in result.stderr

"""Clustered populations and two-stage designs at the boundary: scenario validation and the commands that run them.

Every malformed clustered input is a ScenarioError that names the file and
the dotted key (STYLE.md §5); the well-formed ones parse into the cluster
sizes and saturation arms they state.  The command tests run the Tarn Hollow
demo and a tiny fixed-size scenario with 2 to 4 graphs of a few
assignments each, so the whole file stays well under a minute; the
statistics of the saturation estimators are tested elsewhere.
"""

from __future__ import annotations

import copy
import csv
import io
import json
import subprocess
import sys
from pathlib import Path
from typing import Any

import pytest
from scenario_text import to_toml

from designcalc.errors import DesignCalcError, ScenarioError
from designcalc.power import simulate_power
from designcalc.saturation import contrast_names
from designcalc.scenario import Scenario, parse_scenario

ROOT = Path(__file__).resolve().parents[1]
SCENARIOS = ROOT / "scenarios"
TARN = "scenarios/tarn_hollow_water.toml"
LAKE = "scenarios/lake_orrin_savings.toml"
SOURCE = "hamlets.toml"
TINY = ("--graphs", "2", "--assignments", "3")

# Eight clusters of 12 units, half pure control and half at saturation 0.5:
# four clusters per arm, the smallest study every arm's CR1 SE accepts.
CLUSTERED: dict[str, Any] = {
    "population": {"clusters": [8], "cluster_size": 12},
    "network": {
        "model": "blocks",
        "block_shares": [1.0],
        "block_affinity": [[1.0]],
        "density": {"mean_degree": 3.0, "reference_units": 12},
    },
    "outcome": {"kind": "continuous", "baseline": 0.0, "noise_sd": 1.0, "direct_effect": 0.5, "spillover_effect": 0.3},
    "design": {"assignment": "saturation", "pure_control_share": 0.5, "saturations": [0.5]},
    "simulation": {"graphs": 3, "assignments_per_graph": 4, "seed": 11},
}

# One network of 200 units with Bernoulli assignment: the non-clustered counterpart.
SINGLE: dict[str, Any] = {
    "population": {"units": [200]},
    "network": CLUSTERED["network"] | {"density": {"mean_degree": 4.0, "reference_units": 200}},
    "outcome": CLUSTERED["outcome"],
    "design": {"treatment_probability": [0.5]},
    "estimators": {"direct": ["hajek"], "direct_variance": ["neyman"], "spillover": ["centred_ht"], "eigenvectors": 0},
    "simulation": CLUSTERED["simulation"],
}


def _text(base: dict[str, Any], **tables: dict[str, Any] | None) -> str:
    """``base`` with each named table updated (a key given as None is dropped; a table given as None is removed)."""
    data = copy.deepcopy(base)
    for name, changes in tables.items():
        if changes is None:
            data.pop(name, None)
            continue
        table = data.setdefault(name, {})
        for key, value in changes.items():
            if value is None:
                table.pop(key, None)
            else:
                table[key] = value
    return to_toml(data)


def _parse(base: dict[str, Any] = CLUSTERED, **tables: dict[str, Any] | None) -> Scenario:
    return parse_scenario(_text(base, **tables), source=SOURCE)


def _error(base: dict[str, Any] = CLUSTERED, **tables: dict[str, Any] | None) -> ScenarioError:
    with pytest.raises(ScenarioError) as caught:
        _parse(base, **tables)
    exc = caught.value
    assert exc.file == SOURCE
    assert str(exc).startswith(f"{SOURCE}: {exc.key}: ")
    return exc


def _run(*args: str) -> subprocess.CompletedProcess[str]:
    # The results store is the test's own: conftest sets $DESIGNCALC_STORE, which the subprocess inherits.
    return subprocess.run([sys.executable, "-m", "designcalc", *args], check=False, capture_output=True, text=True, cwd=ROOT, timeout=300)


def _ok(*args: str) -> subprocess.CompletedProcess[str]:
    result = _run(*args)
    assert result.returncode == 0, result.stderr
    assert "Traceback" not in result.stderr
    return result


def _user_error(*args: str) -> str:
    result = _run(*args)
    assert result.returncode == 2, result.stdout + result.stderr
    assert "Traceback" not in result.stderr + result.stdout
    return result.stderr


# --- the population: clusters and their sizes ---------------------------------------------------


@pytest.mark.parametrize(
    ("population", "key", "phrase"),
    [
        ({"cluster_size": None}, "population.cluster_size", "required but missing"),
        ({"clusters": None}, "population.clusters", "required but missing"),
        ({"cluster_sizes": [10, 12, 14, 16]}, "population.cluster_size", "conflicts with cluster_sizes"),
        ({"cluster_size": None, "cluster_sizes": [10, 12, 14, 16], "clusters": [5]}, "population.clusters", "number of sizes listed"),
        ({"cluster_size": None, "cluster_sizes": [10, 12, 14, 16], "clusters": None, "max_clusters": 8}, "population.max_clusters", "no use"),
        ({"units": [96]}, "population.units", "has no use in a clustered population"),
        ({"max_units": 400}, "population.max_units", "has no use in a clustered population"),
        ({"cluster_size": {"low": 20, "high": 10}}, "population.cluster_size.high", "must be at least low (20)"),
        ({"cluster_size": {"mean": 15, "sd": 2, "low": 20, "high": 10}}, "population.cluster_size.high", "must be at least low"),
        ({"cluster_size": {"mean": 30, "sd": 2, "low": 10, "high": 20}}, "population.cluster_size.mean", "within [low, high] = [10, 20]"),
        ({"cluster_size": {"mean": 3, "sd": 2, "low": 10, "high": 20}}, "population.cluster_size.mean", "out of range"),
        ({"cluster_size": {"mean": 15, "sd": 2, "spread": 3}}, "population.cluster_size.spread", "not a key designcalc knows"),
        ({"cluster_size": {"mean": 15}}, "population.cluster_size.sd", "required but missing"),
        ({"cluster_size": {"low": 10}}, "population.cluster_size.high", "required but missing"),
        ({"cluster_size": 3}, "population.cluster_size", "out of range"),
        ({"cluster_size": 12.5}, "population.cluster_size", "whole number"),
        ({"clusters": [8, 8]}, "population.clusters", "same number twice"),
        ({"clusters": [1]}, "population.clusters[0]", "out of range"),
        ({"clusters": [8, 16], "max_clusters": 10}, "population.max_clusters", "at least the largest planned number of clusters (16)"),
    ],
    ids=[
        "clusters-without-size", "size-without-clusters", "sizes-and-size", "sizes-vs-clusters", "sizes-and-max-clusters",
        "units-with-clusters", "max-units-with-clusters", "uniform-high-below-low", "normal-high-below-low", "mean-above-high",
        "mean-below-minimum", "unknown-size-key", "normal-without-sd", "uniform-without-high", "size-below-4", "fractional-size",
        "duplicate-clusters", "one-cluster", "max-clusters-too-small",
    ],
)
def test_bad_population_is_a_scenario_error_naming_its_key(population: dict[str, Any], key: str, phrase: str) -> None:
    """Each malformed clustered [population] is a ScenarioError naming the file and the dotted key."""
    exc = _error(population=population)
    assert exc.key == key
    assert phrase in exc.reason


def test_a_fixed_cluster_size_parses_to_equal_clusters() -> None:
    """cluster_size = 12 with clusters = [8, 20]: fixed clusters, nominal totals 96 and 240 units."""
    s = _parse(population={"clusters": [20, 8]})
    population = s.population
    assert population.clustered
    assert population.clusters == (8, 20)
    assert population.cluster_sizes is not None
    assert (population.cluster_sizes.kind, population.cluster_sizes.size) == ("fixed", 12)
    assert population.units == (96, 240)
    assert population.cluster_search_limit == 16 * 20


def test_a_list_of_cluster_sizes_fixes_the_number_of_clusters() -> None:
    """cluster_sizes = [...] without clusters: one cluster per size stated, nominal total their sum."""
    s = _parse(population={"cluster_size": None, "clusters": None, "cluster_sizes": [10, 12, 14, 16, 18, 20]})
    sizes = s.population.cluster_sizes
    assert sizes is not None
    assert sizes.kind == "list"
    assert sizes.sizes == (10, 12, 14, 16, 18, 20)
    assert s.population.clusters == (6,)
    assert s.population.max_clusters == 6
    assert s.population.units == (90,)
    assert (sizes.smallest, sizes.largest, sizes.nominal) == (10, 20, 15.0)
    # Stating the matching number of clusters too is allowed.
    again = _parse(population={"cluster_size": None, "clusters": [6], "cluster_sizes": [10, 12, 14, 16, 18, 20]})
    assert again.population == s.population


def test_a_normal_cluster_size_keeps_its_mean_sd_and_bounds() -> None:
    """cluster_size = {mean, sd, low, high} is a truncated normal; without high it reaches ceil(mean + 4 sd)."""
    s = _parse(population={"cluster_size": {"mean": 15, "sd": 3, "low": 8, "high": 25}})
    sizes = s.population.cluster_sizes
    assert sizes is not None
    assert (sizes.kind, sizes.mean, sizes.sd, sizes.low, sizes.high) == ("normal", 15.0, 3.0, 8, 25)
    assert s.population.units == (8 * 15,)
    default_high = _parse(population={"cluster_size": {"mean": 15, "sd": 2.5, "low": 8}}).population.cluster_sizes
    assert default_high is not None and default_high.high == 25


def test_a_uniform_cluster_size_keeps_its_bounds() -> None:
    """cluster_size = {low, high} draws whole sizes uniformly; the nominal size is the midpoint."""
    s = _parse(population={"cluster_size": {"low": 10, "high": 20}})
    sizes = s.population.cluster_sizes
    assert sizes is not None
    assert (sizes.kind, sizes.low, sizes.high, sizes.nominal) == ("uniform", 10, 20, 15.0)
    assert s.population.units == (120,)


def test_the_density_rule_must_fit_the_smallest_cluster() -> None:
    """A mean degree the smallest cluster cannot hold (>= m - 1) is an error at network.density.mean_degree."""
    # Mean degree 6 at every size (growth 0): clusters of 5 to 40 units; a unit in a cluster of 5 links to at most 4.
    exc = _error(
        population={"cluster_size": {"low": 5, "high": 40}},
        network={"density": {"mean_degree": 6.0, "reference_units": 40}},
    )
    assert exc.key == "network.density.mean_degree"
    assert "cluster of 5 units" in exc.reason and "at most 4 others" in exc.reason
    # Exactly m - 1 is already too much: mean degree 4 in clusters of 5.
    exc = _error(population={"cluster_size": 5}, network={"density": {"mean_degree": 4.0, "reference_units": 40}})
    assert exc.key == "network.density.mean_degree"
    # Stated sizes: the smallest stated cluster decides.
    exc = _error(
        population={"cluster_size": None, "clusters": None, "cluster_sizes": [20, 5, 30, 40, 25, 35]},
        network={"density": {"mean_degree": 6.0, "reference_units": 40}},
    )
    assert exc.key == "network.density.mean_degree" and "cluster of 5 units" in exc.reason
    # The same rule with clusters of at least 8 units is fine.
    assert _parse(population={"cluster_size": {"low": 8, "high": 40}}, network={"density": {"mean_degree": 6.0, "reference_units": 40}})


def test_clusters_on_a_surveyed_network_are_rejected() -> None:
    """A surveyed network fixes the population: [population] clusters is an error naming population.clusters."""
    text = (SCENARIOS / "harrow_fen_survey.toml").read_text()
    assert parse_scenario(text, source="fen.toml", folder=SCENARIOS).population.clustered is False
    for extra, key in (("clusters = [4]", "population.clusters"), ("cluster_size = 40", "population.cluster_size")):
        with pytest.raises(ScenarioError, match="has no use with a surveyed network") as caught:
            parse_scenario(f"[population]\n{extra}\n" + text, source="fen.toml", folder=SCENARIOS)
        assert caught.value.key == key
        assert caught.value.file == "fen.toml"


# --- the design: cluster and saturation assignment -------------------------------------------


@pytest.mark.parametrize(
    ("design", "key", "phrase"),
    [
        ({"treatment_probability": [0.5]}, "design.treatment_probability", 'has no use with assignment = "saturation"'),
        ({"saturation_shares": [0.3]}, "design.saturation_shares", "must add up to 0.5"),
        ({"saturations": [0.25, 0.75], "saturation_shares": [0.5]}, "design.saturation_shares", "one share per saturation (2)"),
        ({"saturations": [0.5, 0.5]}, "design.saturations", "same saturation twice"),
        ({"saturations": [0.0]}, "design.saturations[0]", "out of range"),
        ({"saturations": [0.5, 1.2]}, "design.saturations[1]", "out of range"),
        ({"pure_control_share": 0.0}, "design.pure_control_share", "out of range"),
        ({"pure_control_share": 1.0}, "design.pure_control_share", "out of range"),
        ({"pure_control_share": None}, "design.pure_control_share", "required but missing"),
        ({"saturations": None}, "design.saturations", "required but missing"),
        ({"treated_cluster_share": 0.5}, "design.treated_cluster_share", 'assignment = "cluster" only'),
        ({"within": "systematic"}, "design.within", "not a recognised option"),
        ({"assignment": "clusters"}, "design.assignment", "not a recognised option"),
    ],
    ids=[
        "probability-with-saturation", "shares-not-summing", "wrong-number-of-shares", "duplicate-saturation", "saturation-zero",
        "saturation-above-one", "pure-control-zero", "pure-control-one", "pure-control-missing", "saturations-missing",
        "treated-share-with-saturation", "unknown-within", "unknown-assignment",
    ],
)
def test_bad_saturation_design_is_a_scenario_error_naming_its_key(design: dict[str, Any], key: str, phrase: str) -> None:
    """Each malformed saturation [design] is a ScenarioError naming the file and the dotted key."""
    exc = _error(design=design)
    assert exc.key == key
    assert phrase in exc.reason


@pytest.mark.parametrize(
    ("design", "key"),
    [
        ({"pure_control_share": 0.5}, "design.pure_control_share"),
        ({"saturations": [1.0]}, "design.saturations"),
        ({"within": "complete"}, "design.within"),
    ],
)
def test_saturation_keys_do_not_belong_to_cluster_randomization(design: dict[str, Any], key: str) -> None:
    """assignment = "cluster" treats whole clusters: saturation-only keys are errors naming the key."""
    exc = _error(design={"assignment": "cluster", "pure_control_share": None, "saturations": None} | design)
    assert exc.key == key
    assert 'assignment = "saturation" only' in exc.reason


@pytest.mark.parametrize("assignment", ["saturation", "cluster"])
def test_clustered_assignment_needs_a_clustered_population(assignment: str) -> None:
    """A cluster or saturation assignment on one network is an error at design.assignment."""
    design = {"assignment": assignment, "treatment_probability": None}
    if assignment == "saturation":
        design |= {"pure_control_share": 0.5, "saturations": [0.5]}
    exc = _error(SINGLE, design=design, estimators=None)
    assert exc.key == "design.assignment"
    assert "the population is one network" in exc.reason


@pytest.mark.parametrize("name", ["pure_control_share", "saturations", "saturation_shares", "within", "treated_cluster_share"])
def test_saturation_keys_are_errors_under_bernoulli(name: str) -> None:
    """With assignment = "bernoulli" every saturation key is an error naming it (clustered population or not)."""
    value = {"pure_control_share": 0.5, "saturations": [0.5], "saturation_shares": [0.5], "within": "complete", "treated_cluster_share": 0.5}[name]
    exc = _error(SINGLE, design={name: value})
    assert exc.key == f"design.{name}"
    assert 'applies to assignment = "cluster" or "saturation" only' in exc.reason
    clustered = _error(
        population=CLUSTERED["population"],
        design={"assignment": "bernoulli", "pure_control_share": None, "saturations": None, "treatment_probability": [0.5], name: value},
    )
    assert clustered.key == f"design.{name}"


@pytest.mark.parametrize(
    ("clusters", "design", "phrase"),
    [
        ([3], {}, "3 clusters give"),  # 0.5 x 3: one arm gets a single cluster
        ([10], {"pure_control_share": 0.1}, "pure control 1 cluster(s)"),
        ([8], {"saturations": [0.25, 0.5, 0.75]}, "saturation"),  # 4 + 4/3 each: 1 cluster in some saturation arm
    ],
    ids=["three-clusters", "small-control-share", "many-saturations"],
)
def test_every_arm_needs_three_clusters(clusters: list[int], design: dict[str, Any], phrase: str) -> None:
    """Too few clusters for an arm is an error at population.clusters saying every arm needs 3."""
    exc = _error(population={"clusters": clusters}, design=design)
    assert exc.key == "population.clusters"
    assert phrase in exc.reason
    assert "every arm needs at least 3" in exc.reason
    assert exc.received == clusters[0]


def test_every_planned_number_of_clusters_is_checked() -> None:
    """clusters = [8, 3]: the smaller count fails even though the larger one fits."""
    exc = _error(population={"clusters": [8, 3]})
    assert exc.key == "population.clusters"
    assert exc.received == 3


def test_a_cluster_randomized_design_treats_whole_clusters() -> None:
    """assignment = "cluster" is one saturation, 1.0, with the treated share of clusters; its only contrast is the ITT."""
    s = _parse(population={"clusters": [16]}, design={"assignment": "cluster", "pure_control_share": None, "saturations": None, "treated_cluster_share": 0.25})
    design = s.design.saturation
    assert design is not None
    assert design.saturations == (1.0,)
    assert design.shares == (0.25,)
    assert design.pure_control_share == pytest.approx(0.75)
    assert design.contrasts == ("itt",)
    assert design.is_cluster_randomized
    assert s.estimators.contrasts == ("itt",)
    assert s.design.treatment_probabilities == (0.25,)
    default = _parse(design={"assignment": "cluster", "pure_control_share": None, "saturations": None}).design.saturation
    assert default is not None and default.shares == (0.5,)


def test_saturation_shares_default_to_equal() -> None:
    """Without saturation_shares the treated clusters are split equally between the saturations."""
    s = _parse(population={"clusters": [20]}, design={"pure_control_share": 0.4, "saturations": [0.25, 0.75]})
    design = s.design.saturation
    assert design is not None
    assert design.saturations == (0.25, 0.75)
    assert design.shares == pytest.approx((0.3, 0.3))
    assert design.within == "complete"
    # The design's one treatment probability is the expected share treated: 0.3 x 0.25 + 0.3 x 0.75.
    assert s.design.treatment_probabilities == (pytest.approx(0.3),)
    assert s.design.treatment_probabilities == (design.mean_saturation,)


def test_saturation_shares_follow_their_saturations_when_sorted() -> None:
    """Saturations listed out of order are sorted with their own shares."""
    s = _parse(
        population={"clusters": [30]},
        design={"pure_control_share": 0.5, "saturations": [0.75, 0.25], "saturation_shares": [0.1, 0.4], "within": "bernoulli"},
    )
    design = s.design.saturation
    assert design is not None
    assert design.saturations == (0.25, 0.75)
    assert design.shares == pytest.approx((0.4, 0.1))
    assert design.within == "bernoulli"
    assert s.design.treatment_probabilities == (pytest.approx(0.4 * 0.25 + 0.1 * 0.75),)
    assert s.design.treatment_probabilities == (design.mean_saturation,)


def test_the_tarn_hollow_demo_parses_to_its_stated_arms() -> None:
    """The demo's saturation design: 30% pure control, saturations 0.25/0.5/0.75 in 25/25/20% of hamlets."""
    s = parse_scenario((SCENARIOS / "tarn_hollow_water.toml").read_text(), source="tarn.toml")
    design = s.design.saturation
    assert design is not None
    assert design.pure_control_share == 0.3
    assert design.saturations == (0.25, 0.5, 0.75)
    assert design.shares == pytest.approx((0.25, 0.25, 0.2))
    assert s.design.treatment_probabilities == (pytest.approx(0.25 * 0.25 + 0.25 * 0.5 + 0.2 * 0.75),)
    assert s.population.clusters == (40, 60)
    assert s.outcome.cluster_icc == 0.08
    assert s.estimators.contrasts == ("itt", "snt", "tce", "pooled", "slope")
    assert (s.estimators.direct, s.estimators.spillover) == ((), ())


# --- the outcome's cluster random effect --------------------------------------------------------


def test_cluster_icc_needs_clusters() -> None:
    """cluster_icc on one network is an error at outcome.cluster_icc."""
    exc = _error(SINGLE, outcome={"cluster_icc": 0.1})
    assert exc.key == "outcome.cluster_icc"
    assert "needs a clustered population" in exc.reason


def test_cluster_icc_is_for_continuous_outcomes() -> None:
    """cluster_icc with a binary outcome is an error at outcome.cluster_icc."""
    exc = _error(outcome={"kind": "binary", "baseline": 0.3, "noise_sd": None, "direct_effect": 0.1, "spillover_effect": 0.05, "cluster_icc": 0.1})
    assert exc.key == "outcome.cluster_icc"
    assert "continuous outcomes only" in exc.reason


@pytest.mark.parametrize("icc", [1.0, -0.1, 1.5])
def test_cluster_icc_must_be_below_one(icc: float) -> None:
    """cluster_icc outside [0, 1) is out of range at outcome.cluster_icc."""
    exc = _error(outcome={"cluster_icc": icc})
    assert exc.key == "outcome.cluster_icc"
    assert "out of range" in exc.reason
    assert "[0, 1)" in exc.allowed


def test_a_cluster_icc_below_one_parses() -> None:
    """cluster_icc = 0.2 on a clustered population is kept; without it the ICC is 0."""
    assert _parse(outcome={"cluster_icc": 0.2}).outcome.cluster_icc == 0.2
    assert _parse().outcome.cluster_icc == 0.0


# --- the planned tests: contrasts ---------------------------------------------------------------


def test_contrasts_are_errors_under_bernoulli() -> None:
    """[estimators] contrasts with Bernoulli assignment is an error at estimators.contrasts."""
    exc = _error(SINGLE, estimators={"contrasts": ["itt"]})
    assert exc.key == "estimators.contrasts"
    assert "tests of a clustered design" in exc.reason


@pytest.mark.parametrize(
    ("name", "value"),
    [("spillover", ["centred_ht"]), ("direct", ["hajek"]), ("direct_variance", ["neyman"]), ("centre", 1.0), ("eigenvectors", 0)],
)
def test_network_estimators_are_errors_under_a_saturation_design(name: str, value: Any) -> None:
    """Network estimator keys with a saturation design are errors naming the key and the contrasts allowed."""
    exc = _error(estimators={name: value})
    assert exc.key == f"estimators.{name}"
    assert "applies to Bernoulli assignment" in exc.reason
    assert '"itt"' in exc.allowed


@pytest.mark.parametrize("contrasts", [["slope"], ["pooled"], ["pooled", "slope"]])
def test_contrasts_that_leave_nothing_to_test(contrasts: list[str]) -> None:
    """With one saturation, pooled and slope contrasts name no test: an error at estimators.contrasts."""
    exc = _error(estimators={"contrasts": contrasts})
    assert exc.key == "estimators.contrasts"
    assert "leave nothing to test" in exc.reason
    assert exc.received == contrasts


def test_a_slope_over_a_full_saturation_is_the_itt_slope_alone() -> None:
    """Saturations 0.5 and 1 with contrasts = ["slope"]: the ITT slope only (no untreated units at p = 1)."""
    s = _parse(population={"clusters": [12]}, design={"saturations": [0.5, 1.0]}, estimators={"contrasts": ["slope"]})
    assert s.design.saturation is not None
    assert contrast_names(s.design.saturation) == ["itt_slope"]


def test_cluster_randomization_allows_only_the_itt_contrast() -> None:
    """assignment = "cluster" with contrasts = ["snt"] is an error at estimators.contrasts[0]."""
    exc = _error(design={"assignment": "cluster", "pure_control_share": None, "saturations": None}, estimators={"contrasts": ["snt"]})
    assert exc.key == "estimators.contrasts[0]"
    assert '"itt"' in exc.allowed


def test_planned_contrasts_reach_the_design() -> None:
    """The contrasts of [estimators] become the saturation design's; the default plans itt, snt, tce, pooled and slope."""
    chosen = _parse(population={"clusters": [12]}, design={"saturations": [0.25, 0.75]}, estimators={"contrasts": ["snt", "direct"]})
    assert chosen.design.saturation is not None
    assert chosen.design.saturation.contrasts == ("snt", "direct")
    assert chosen.estimators.contrasts == ("snt", "direct")
    assert _parse().estimators.contrasts == ("itt", "snt", "tce", "pooled", "slope")


# --- the library's overrides (no simulation) -----------------------------------------------------


def test_power_overrides_that_do_not_fit_the_population_are_user_errors() -> None:
    """simulate_power rejects --units on clusters, --clusters on stated sizes, and too few clusters, before simulating."""
    clustered = _parse()
    with pytest.raises(DesignCalcError, match="--clusters"):
        simulate_power(clustered, units=[100])
    listed = _parse(population={"cluster_size": None, "clusters": None, "cluster_sizes": [10, 12, 14, 16, 18, 20]})
    with pytest.raises(DesignCalcError, match="fixes their number"):
        simulate_power(listed, clusters=[8])
    with pytest.raises(DesignCalcError, match="every arm needs at least 3"):
        simulate_power(clustered, clusters=[3])
    single = _parse(SINGLE)
    with pytest.raises(DesignCalcError, match="--units"):
        simulate_power(single, clusters=[8])


# --- the commands -------------------------------------------------------------------------------


def test_power_on_the_demo_reports_clusters_and_saturation_contrasts() -> None:
    """`power --clusters 20 --format json` on Tarn Hollow: every record at 20 clusters, one per planned contrast."""
    data = json.loads(_ok("power", TARN, *TINY, "--clusters", "20", "--format", "json").stdout)
    records = data["results"]
    assert {r["clusters"] for r in records} == {20}
    assert {r["units"] for r in records} == {800}  # 20 hamlets of mean size 40
    estimators = [r["estimator"] for r in records]
    assert "itt@0.25" in estimators and "snt@0.75" in estimators and "snt_slope" in estimators
    assert len(estimators) == 13  # itt, snt, tce at 3 saturations + 2 pooled + 2 slopes
    assert {r["variance_estimator"] for r in records} == {"cluster_robust"}
    assert {r["replicates"] for r in records} == {6}
    by_name = {r["estimator"]: r for r in records}
    assert by_name["itt@0.25"]["estimand"] == "total" and by_name["snt@0.25"]["estimand"] == "spillover"
    # The design's treatment probability is the mean saturation (0.3375), the same for every record.
    assert [r["treatment_probability"] for r in records] == [pytest.approx(0.3375)] * 13


def test_power_csv_on_a_clustered_scenario_has_a_clusters_column() -> None:
    """`power --format csv` writes a clusters column holding the number of clusters."""
    out = _ok("power", TARN, *TINY, "--clusters", "20", "--format", "csv").stdout
    rows = list(csv.DictReader(io.StringIO(out)))
    assert "clusters" in out.splitlines()[0].split(",")
    assert len(rows) == 13
    assert {row["clusters"] for row in rows} == {"20"}


def test_power_units_on_a_clustered_scenario_is_a_user_error() -> None:
    """`power --units 100` on clusters exits 2 and points to --clusters."""
    stderr = _user_error("power", TARN, *TINY, "--units", "100")
    assert "--clusters" in stderr
    assert "clustered population" in stderr


def test_power_treatment_probability_on_a_saturation_design_is_a_user_error() -> None:
    """`power --treatment-probability 0.3` on a saturation design exits 2 and names the option."""
    stderr = _user_error("power", TARN, *TINY, "--treatment-probability", "0.3")
    assert "--treatment-probability" in stderr
    assert "assigns by clusters" in stderr


def test_check_on_the_demo_states_the_design_effect_and_square_root_rule() -> None:
    """`check` on Tarn Hollow prints the Kish design effect, the arms' cluster counts and the square-root rule."""
    out = _ok("check", TARN).stdout
    assert "design effect" in out
    assert "1 + (m - 1) ICC = 4.12" in out  # 1 + 39 x 0.08
    assert "square-root rule" in out
    assert "clusters per arm at 40 clusters: pure control 12, saturation 0.25 10, saturation 0.5 10, saturation 0.75 8" in out


def test_check_rejects_a_bad_clustered_scenario_with_file_and_key(tmp_path: Path) -> None:
    """`check` on a scenario with too few clusters exits 2, naming file and key, no traceback."""
    bad = tmp_path / "few_hamlets.toml"
    bad.write_text((ROOT / TARN).read_text().replace("clusters = [40, 60]", "clusters = [5, 60]"))
    stderr = _user_error("check", str(bad))
    assert "few_hamlets.toml: population.clusters" in stderr
    assert "every arm needs at least 3" in stderr


def test_check_keeps_the_bracketed_table_names_of_a_hint(tmp_path: Path) -> None:
    """The printed hint of a saturation design on one network still says "[population] clusters" (the library's text)."""
    bad = tmp_path / "one_network.toml"
    bad.write_text(_text(SINGLE, design={"assignment": "saturation", "treatment_probability": None, "pure_control_share": 0.5, "saturations": [0.5]}, estimators=None))
    with pytest.raises(ScenarioError, match=r"state \[population\] clusters and cluster_size"):
        parse_scenario(bad.read_text(), source=bad.name)
    stderr = _user_error("check", str(bad))
    assert "one_network.toml: design.assignment" in stderr
    assert "state [population] clusters and cluster_size" in stderr


def test_size_with_too_few_clusters_per_cluster_search_is_a_user_error() -> None:
    """`size --per-cluster 2` leaves arms with fewer than 2 clusters: exit 2, no traceback."""
    stderr = _user_error("size", TARN, *TINY, "--per-cluster", "2")
    assert "every arm needs at least 3" in stderr
    assert "--per-cluster 2: 2 clusters give" in stderr


def test_size_max_units_without_per_cluster_is_a_user_error() -> None:
    """`size --max-units` on a search over clusters exits 2 and points to --max-clusters."""
    stderr = _user_error("size", TARN, *TINY, "--max-units", "800")
    assert "--max-clusters" in stderr


def test_compare_designs_puts_both_designs_at_one_size() -> None:
    """`compare --design` at 800 units: rows of both designs, exactly one best design per estimand family."""
    data = json.loads(_ok("compare", TARN, "--design", LAKE, "--units", "800", *TINY, "--format", "json").stdout)
    assert data["units"] == 800
    rows = data["results"]
    designs = {r["design"] for r in rows}
    assert designs == {"Tarn Hollow water filters", "Lake Orrin savings nudge"}
    tarn = [r for r in rows if r["design"] == "Tarn Hollow water filters"]
    lake = [r for r in rows if r["design"] == "Lake Orrin savings nudge"]
    assert {r["clusters"] for r in tarn} == {20}  # round(800 / 40) hamlets
    assert {r["clusters"] for r in lake} == {0}
    assert {r["units"] for r in rows} == {800}
    families = {r["estimand"] for r in rows}
    assert {"spillover", "total"} <= families
    for family in families:
        best = [r for r in rows if r["estimand"] == family and r["best_design"]]
        assert len(best) == 1, family
        assert best[0]["best_in_design"]
        # Each design with a test of this family has exactly one best test of it.
        for design in {r["design"] for r in rows if r["estimand"] == family}:
            assert sum(r["best_in_design"] for r in rows if r["estimand"] == family and r["design"] == design) == 1
    assert all(r["estimates"] for r in rows)


def test_compare_designs_at_too_few_clusters_is_a_user_error() -> None:
    """`compare --design` at 100 units puts Tarn Hollow at 2 hamlets: exit 2, every arm needs 2 clusters."""
    stderr = _user_error("compare", LAKE, "--design", TARN, "--units", "100", *TINY)
    assert "every arm needs at least 3" in stderr


def test_compare_a_saturation_design_without_design_is_a_user_error() -> None:
    """`compare` on a saturation design without --design exits 2 and suggests --design."""
    stderr = _user_error("compare", TARN, *TINY)
    assert "--design" in stderr


def test_mde_on_a_small_fixed_size_clustered_scenario(tmp_path: Path) -> None:
    """`mde --no-verify` on 8 clusters of 12: one record per contrast, each carrying clusters = 8 and 96 units."""
    scenario = tmp_path / "small_hamlets.toml"
    scenario.write_text(_text(CLUSTERED))
    data = json.loads(_ok("mde", str(scenario), "--graphs", "3", "--assignments", "4", "--no-verify", "--format", "json").stdout)
    records = data["results"]
    assert sorted(r["estimator"] for r in records) == ["itt@0.5", "snt@0.5", "tce@0.5"]
    assert {r["clusters"] for r in records} == {8}
    assert {r["units"] for r in records} == {96}
    assert all(r["mde"] > 0 for r in records)
    # --clusters overrides the planned number of clusters.
    again = json.loads(_ok("mde", str(scenario), "--clusters", "12", "--graphs", "3", "--assignments", "4", "--no-verify", "--format", "json").stdout)
    assert {r["clusters"] for r in again["results"]} == {12}
    assert {r["units"] for r in again["results"]} == {144}


# --- what a two-stage design does not read ---------------------------------------------------------


def test_covariates_and_measurement_are_refused_by_a_saturation_design() -> None:
    """The contrasts read neither baseline covariates nor the network: stating them is an error, not silently ignored."""
    covariates = CLUSTERED | {"covariates": [{"name": "baseline", "r_squared": 0.3}]}
    with pytest.raises(ScenarioError) as caught:
        parse_scenario(to_toml(covariates), source=SOURCE)
    assert caught.value.key == "covariates" and "contrasts" in str(caught.value)
    exc = _error(measurement={"contact_cap": 3})
    assert exc.key == "measurement" and "never read the network" in str(exc)


def test_a_normal_cluster_size_that_is_almost_never_in_range_is_refused_at_load() -> None:
    """Sizes are redrawn until in [low, high]; a spread that almost never lands there is refused when the file is read."""
    exc = _error(population={"clusters": [8], "cluster_size": {"mean": 50, "sd": 1e6, "low": 50, "high": 50}})
    assert exc.key == "population.cluster_size.sd" and "almost never drawn" in str(exc)


def test_slopes_need_complete_randomization_and_saturations_need_treated_and_untreated_units() -> None:
    """Slopes under Bernoulli-within are refused (explicitly) or left out (by default); a saturation that would treat
    nobody or everybody in some cluster size is refused at design.saturations."""
    exc = _error(population={"clusters": [12]}, design={"saturations": [0.25, 0.75], "within": "bernoulli"}, estimators={"contrasts": ["itt", "slope"]})
    assert exc.key == "estimators.contrasts" and 'within = "complete"' in str(exc)
    default = _parse(population={"clusters": [12]}, design={"saturations": [0.25, 0.75], "within": "bernoulli"})
    assert "slope" not in default.design.saturation.contrasts and "itt_slope" not in [k[1] for k in __import__("designcalc").engine.planned_keys(default, 0)]
    # 0.1 x 4 + 1/2 < 1: nobody treated in a cluster of 4 (the smallest size the uniform rule allows).
    exc = _error(population={"clusters": [12], "cluster_size": {"low": 4, "high": 20}}, design={"saturations": [0.1, 0.5]})
    assert exc.key == "design.saturations" and "treats nobody in a cluster of 4 units" in str(exc)
    exc = _error(population={"clusters": [12], "cluster_size": 12}, design={"saturations": [0.5, 0.97]})
    assert exc.key == "design.saturations" and "treats everybody" in str(exc)

"""Network measurement: the survey model, estimators on the observed network, and ``designcalc measure``."""

from __future__ import annotations

import json
import re
import subprocess
import sys
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
import scipy as sp

from designcalc.engine import restrict_tests
from designcalc.errors import ModelError, ScenarioError
from designcalc.graphs import to_csr
from designcalc.measure import compare_measurement
from designcalc.measurement import MeasurementModel, observe_network
from designcalc.power import simulate_power
from designcalc.scenario import load_scenario, parse_scenario

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "scenarios" / "lake_orrin_savings.toml"


def _random_graph(n: int, edges: int, seed: int) -> sp.sparse.csr_array:
    rng = np.random.default_rng(seed)
    rows, cols = rng.integers(0, n, edges), rng.integers(0, n, edges)
    keep = rows != cols
    return to_csr(n, rows[keep], cols[keep])


def _pairs(adjacency: sp.sparse.csr_array) -> set[tuple[int, int]]:
    coo = sp.sparse.triu(adjacency, k=1).tocoo()
    return set(zip(coo.row.tolist(), coo.col.tolist()))


def _canonical_json(result) -> str:
    d = result.to_dict()
    d["provenance"].pop("utc_time")
    return json.dumps(d, sort_keys=True, allow_nan=True)


GRAPH = _random_graph(3000, 24000, seed=5)


# --------------------------------------------------------------------------
# The survey model
# --------------------------------------------------------------------------
def test_the_cap_bounds_every_respondents_names_and_both_is_within_either():
    """Nobody names more than the cap; reciprocated ties ("both") are a subset of either-named ties, from the same draws."""
    either = observe_network(GRAPH, MeasurementModel(contact_cap=3, symmetrise="either"), np.random.default_rng(1))
    both = observe_network(GRAPH, MeasurementModel(contact_cap=3, symmetrise="both"), np.random.default_rng(1))
    degree = np.diff(GRAPH.indptr)
    assert either.named.max() == 3 and np.array_equal(either.named, np.minimum(degree, 3))
    assert _pairs(both.adjacency) <= _pairs(either.adjacency) <= _pairs(GRAPH)
    assert both.degrees.max() <= 3  # a reciprocated tie was named by this unit too
    for observed in (either, both):
        A = observed.adjacency
        assert A.indices.dtype == np.int32 and A.has_canonical_format and (A != A.T).nnz == 0 and A.diagonal().sum() == 0


def test_a_cap_above_every_degree_with_full_recall_returns_the_true_network():
    """Cap >= max degree, recall 1, everyone answers, no false ties: the observed network is the true one, entry for entry."""
    for rule in ("either", "both"):
        seen = observe_network(GRAPH, MeasurementModel(contact_cap=1000, symmetrise=rule), np.random.default_rng(2))
        assert np.array_equal(seen.adjacency.indptr, GRAPH.indptr) and np.array_equal(seen.adjacency.indices, GRAPH.indices)
        assert seen.share_true_ties_observed == 1.0


def test_no_recall_names_nobody_and_non_respondents_name_nobody():
    """Recall 0 leaves the observed network empty; a non-respondent names no one and under "both" is isolated."""
    assert observe_network(GRAPH, MeasurementModel(tie_recall=0.0), np.random.default_rng(3)).adjacency.nnz == 0
    seen = observe_network(GRAPH, MeasurementModel(non_response=0.3, symmetrise="both"), np.random.default_rng(3))
    assert np.all(seen.named[~seen.responded] == 0)
    assert np.all(seen.degrees[~seen.responded] == 0)
    # Under "either" a non-respondent keeps the ties its respondent contacts named (METHODS §7.1 (c)).
    either = observe_network(GRAPH, MeasurementModel(non_response=0.3), np.random.default_rng(3))
    assert either.degrees[~either.responded].sum() > 0


def test_false_ties_match_their_expected_number():
    """Each respondent names Poisson(lambda) non-contacts: the total is within 4 Poisson SEs of n (1 - q) lambda."""
    n, lam, q = 20_000, 0.5, 0.2
    graph = _random_graph(n, 40_000, seed=7)
    seen = observe_network(graph, MeasurementModel(false_ties=lam, non_response=q), np.random.default_rng(4))
    expected = n * (1 - q) * lam
    # The count is Poisson(8000) given the respondents (sd 89) plus the binomial spread of respondents
    # (lambda^2 n q (1 - q) = 800, sd 28); two false names of the same pair (about lambda^2 (1-q)^2 / 2 = 0.08
    # pairs) are negligible.  4 combined SEs: 4 sqrt(8000 + 800) = 375.
    assert abs(seen.n_false_ties_observed - expected) < 4 * np.sqrt(expected + lam**2 * n * q * (1 - q))
    # No cap, full recall: a true tie is lost only when both ends do not respond (probability q^2).  Its
    # variance: E q^2 (1 - q^2) = 1536 for E = 40000 ties, plus pairs of ties sharing a unit,
    # n E[d (d - 1)] q^3 (1 - q) = 20000 x 16 x 0.0064 = 2048 (Poisson degrees, mean 4): sd 60, 4 sd = 240.
    lost = seen.n_true_ties - seen.n_true_ties_observed
    assert abs(lost - seen.n_true_ties * q**2) < 240


def test_a_random_cap_names_each_contact_with_probability_cap_over_degree():
    """A star's centre with 20 leaves and cap 5 names each leaf with probability 1/4 (binomial, 4 SEs over 2000 surveys)."""
    star = to_csr(21, np.zeros(20, dtype=np.int64), np.arange(1, 21))
    model = MeasurementModel(contact_cap=5, symmetrise="both")  # under "both" a leaf is tied iff the centre named it
    hits = np.zeros(21)
    for seed in range(2000):
        hits += observe_network(star, model, np.random.default_rng(seed)).degrees
    share = hits[1:] / 2000
    assert np.all(np.abs(share - 0.25) < 4 * np.sqrt(0.25 * 0.75 / 2000))


def test_the_strongest_rule_names_the_heaviest_ties():
    """With weights, a capped respondent names exactly its cap heaviest contacts."""
    star = to_csr(6, np.zeros(5, dtype=np.int64), np.arange(1, 6))
    weights = star.copy()
    weights.data = np.array([5.0, 1.0, 4.0, 2.0, 3.0, 5.0, 1.0, 4.0, 2.0, 3.0])  # row 0 (ties to leaves 1..5), then each leaf's tie to 0
    seen = observe_network(star, MeasurementModel(contact_cap=2, cap_rule="strongest", symmetrise="both"), np.random.default_rng(0), weights=weights)
    assert _pairs(seen.adjacency) == {(0, 1), (0, 3)}


def test_the_survey_is_linear_in_the_edges_not_the_units():
    """Two million units and few ties: no dense array is built (an n x n array would need 32 TB)."""
    graph = _random_graph(2_000_000, 50_000, seed=9)
    seen = observe_network(graph, MeasurementModel(contact_cap=2, false_ties=0.01, tie_recall=0.9), np.random.default_rng(1))
    assert seen.adjacency.shape == (2_000_000, 2_000_000)


def test_the_model_checks_its_ranges():
    """Out-of-range survey settings are refused, naming the parameter."""
    for bad, match in (({"contact_cap": 0}, "contact_cap"), ({"tie_recall": 1.5}, "tie_recall"), ({"non_response": 1.0}, "non_response"),
                       ({"cap_rule": "loudest"}, "cap_rule"), ({"symmetrise": "or"}, "symmetrise"), ({"false_ties": -1.0}, "false_ties")):
        with pytest.raises(ModelError, match=match):
            MeasurementModel(**bad)
    assert MeasurementModel().perfect and not MeasurementModel(contact_cap=5).perfect


# --------------------------------------------------------------------------
# The scenario table
# --------------------------------------------------------------------------
@pytest.mark.parametrize(
    ("table", "key", "allowed"),
    [
        ("contact_cap = 0", "measurement.contact_cap", r"whole number in \[1, "),
        ("contact_cap = 2.5", "measurement.contact_cap", "whole number"),
        ('cap_rule = "strongest"', "measurement.cap_rule", "no contact_cap"),
        ('contact_cap = 3\ncap_rule = "loud"', "measurement.cap_rule", '"random", "strongest"'),
        ('symmetrise = "or"', "measurement.symmetrise", '"either", "both"'),
        ("tie_recall = 1.2", "measurement.tie_recall", r"\[0, 1\]"),
        ("non_response = 1", "measurement.non_response", r"\[0, 1\)"),
        ("false_ties = -0.1", "measurement.false_ties", ">= 0|0, 1000"),
        ('augmented = "yes"', "measurement.augmented", "true or false"),
        ("cap = 3", "measurement.cap", "contact_cap"),
    ],
)
def test_the_measurement_table_names_the_key_and_what_is_allowed(table, key, allowed):
    """Each mistake in [measurement] names the file, the dotted key and the allowed range."""
    text = DEMO.read_text() + f"\n[measurement]\n{table}\n"
    with pytest.raises(ScenarioError, match=key) as info:
        parse_scenario(text, source="lake.toml")
    assert "lake.toml" in str(info.value)
    assert re.search(allowed, str(info.value))


def test_the_measurement_table_is_read():
    """A full [measurement] table gives the model it states; a scenario without one has none."""
    text = DEMO.read_text() + '\n[measurement]\ncontact_cap = 5\ncap_rule = "strongest"\nsymmetrise = "both"\ntie_recall = 0.9\nnon_response = 0.1\nfalse_ties = 0.2\naugmented = true\n'
    s = parse_scenario(text, source="lake.toml")
    assert s.measurement == MeasurementModel(5, "strongest", "both", 0.9, 0.1, 0.2, True)
    assert load_scenario(DEMO).measurement is None


def test_strongest_without_weights_is_noted():
    """cap_rule = "strongest" on a network without tie weights runs (random strengths) and says so in the warnings."""
    s = replace(load_scenario(DEMO), measurement=MeasurementModel(contact_cap=3, cap_rule="strongest"))
    result = simulate_power(restrict_tests(s, [("direct", "hajek", "neyman")]), units=[300], treatment_probabilities=[0.5], graphs=1, assignments_per_graph=2)
    assert any("strongest" in w and "random" in w for w in result.warnings)


# --------------------------------------------------------------------------
# The engine: outcomes on the true network, estimators on the observed one
# --------------------------------------------------------------------------
SMALL = {"units": [300], "treatment_probabilities": [0.3, 0.5], "graphs": 2, "assignments_per_graph": 4}


def test_a_survey_that_sees_everything_changes_no_number():
    """Cap above every degree, full recall, no non-response or false ties: results equal the unmeasured scenario exactly (issue 8 item 3)."""
    s = load_scenario(DEMO)
    plain = _canonical_json(simulate_power(s, **SMALL))
    for rule in ("either", "both"):
        measured = replace(s, measurement=MeasurementModel(contact_cap=10_000, symmetrise=rule))
        assert _canonical_json(simulate_power(measured, **SMALL)) == plain


SPILLOVER_TESTS = [("direct", "hajek", "neyman"), ("direct", "horvitz_thompson", "neyman"), ("spillover", "centred_ht", "plug_in")]
ATTENUATION = {"units": [600], "treatment_probabilities": [0.5], "graphs": 48, "assignments_per_graph": 25}


@pytest.fixture(scope="module")
def capped_runs():
    """The demo with caps 10, 5 and 2 (either-names), and cap 2 with the augmented design, run once for the tests below."""
    s = restrict_tests(load_scenario(DEMO), SPILLOVER_TESTS)
    out = {None: simulate_power(s, **ATTENUATION)}
    for cap in (10, 5, 2):
        out[cap] = simulate_power(replace(s, measurement=MeasurementModel(contact_cap=cap)), **ATTENUATION)
    out["augmented"] = simulate_power(replace(s, measurement=MeasurementModel(contact_cap=2, augmented=True)), **ATTENUATION)
    return out


def _spillover(result):
    return result.select(estimand="spillover", estimator="centred_ht")[0]


@pytest.mark.statistical
def test_the_spillover_estimate_is_pulled_toward_zero_more_as_the_cap_falls(capped_runs):
    """Centred HT on the observed network loses the effects through unobserved ties: bias toward zero grows as the cap falls.

    METHODS.md §7.2 ("biasing it toward zero roughly in proportion to the
    share of influence-weighted ties lost") and Griffith (2022, J. Labor
    Econ., "Name your friends, but only five?": censoring attenuates peer
    effects).  Each step must exceed 3 combined Monte Carlo SEs of the two
    biases, sqrt(se_a^2 + se_b^2) (conservative: common random numbers make
    the runs positively correlated).
    """
    records = {cap: _spillover(capped_runs[cap]) for cap in (None, 10, 5, 2)}
    true = records[2].true_effect
    assert true > 0
    for looser, tighter in ((10, 5), (5, 2)):
        a, b = records[looser], records[tighter]
        assert a.bias - b.bias > 3 * np.hypot(a.bias_mc_se, b.bias_mc_se), (looser, tighter, a.bias, b.bias)
    assert records[2].mean_estimate > 0  # toward zero, not through it
    assert abs(records[None].bias) < 3 * records[None].bias_mc_se  # unbiased on the true network (METHODS §3.1)


@pytest.mark.statistical
def test_the_direct_effect_estimate_is_untouched_by_measurement(capped_runs):
    """The HT and Hajek direct point estimates do not use the network: the same numbers under any cap (METHODS §7.2)."""
    for name in ("hajek", "horvitz_thompson"):
        plain = capped_runs[None].select(estimand="direct", estimator=name)[0]
        for cap in (10, 5, 2):
            capped = capped_runs[cap].select(estimand="direct", estimator=name)[0]
            assert capped.mean_estimate == plain.mean_estimate
            assert abs(capped.bias) < 3 * capped.bias_mc_se


@pytest.mark.statistical
def test_the_augmented_design_removes_the_caps_bias(capped_runs):
    """Inclusion weights from reported total degrees (Ott et al. 2019, Biostatistics 20(1):97-110; METHODS §7.4) undo the cap's attenuation.

    Under a random cap with full recall the weights are exact, so the
    weighted centred HT estimator is unbiased (measurement.inclusion_weights):
    its bias is within 3 MC SEs of zero and smaller than the uncorrected
    bias by more than 3 combined MC SEs.
    """
    capped, augmented = _spillover(capped_runs[2]), _spillover(capped_runs["augmented"])
    assert abs(augmented.bias) < 3 * augmented.bias_mc_se
    assert abs(capped.bias) - abs(augmented.bias) > 3 * np.hypot(capped.bias_mc_se, augmented.bias_mc_se)


# --------------------------------------------------------------------------
# Side by side: compare_measurement and `designcalc measure`
# --------------------------------------------------------------------------
def test_compare_measurement_pairs_the_same_tests_with_common_random_numbers():
    """Both columns come from the same graphs and assignments: the direct HT estimate's bias is the same in both."""
    s = replace(load_scenario(DEMO), measurement=MeasurementModel(contact_cap=3))
    result = compare_measurement(s, **SMALL)
    assert result.records and not result.partial and result.cautions
    for r in result.select(estimand="direct", estimator="hajek"):
        assert r.bias_change == 0.0 and r.bias_measured == r.bias_perfect
    assert {n.units for n in result.networks} == {300}
    assert result.networks[0].mean_degree_observed < result.networks[0].mean_degree_true
    with pytest.raises(Exception, match="measurement"):
        compare_measurement(load_scenario(DEMO), **SMALL)


def _cli(*args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "designcalc", *args], check=False, capture_output=True, text=True, cwd=ROOT, timeout=300)


def test_the_measure_command_prints_json_and_refuses_bad_options(tmp_path):
    """`designcalc measure` exits 0 with a JSON record per test; a bad option or a scenario without [measurement] exits 2 without a traceback."""
    scenario = tmp_path / "lake.toml"
    scenario.write_text(DEMO.read_text() + "\n[measurement]\ncontact_cap = 3\n")
    ok = _cli("measure", str(scenario), "-n", "300", "-p", "0.5", "--graphs", "2", "--assignments", "3", "--no-store", "--format", "json")
    assert ok.returncode == 0, ok.stderr
    data = json.loads(ok.stdout)
    assert {"scenario", "measurement", "networks", "results", "cautions", "provenance", "warnings", "partial"} <= set(data)
    assert data["cautions"] and data["provenance"]["measurement"].startswith("at most 3")
    first = data["results"][0]
    assert {"bias_perfect", "bias_measured", "power_perfect", "power_measured", "power_change", "size_perfect", "size_measured"} <= set(first)
    csv_text = _cli("measure", str(scenario), "-n", "300", "-p", "0.5", "--graphs", "2", "--assignments", "2", "--no-store", "--format", "csv")
    assert csv_text.returncode == 0 and csv_text.stdout.startswith("estimand,estimator")
    for bad in (("--format", "yaml"), ("-p", "1.5"), ("--graphs", "0")):
        refused = _cli("measure", str(scenario), "--no-store", *bad)
        assert refused.returncode == 2 and "Traceback" not in refused.stderr, bad
    plain = _cli("measure", str(DEMO), "--no-store", "--graphs", "2")
    assert plain.returncode == 2 and "no measurement table" in plain.stderr and "Traceback" not in plain.stderr


def test_a_surveyed_edge_lists_weights_rank_the_ties_under_the_strongest_rule(tmp_path):
    """Harrow Fen's days-per-week column is kept with the adjacency's pattern; "strongest" names each respondent's heaviest ties."""
    s = load_scenario(ROOT / "scenarios" / "harrow_fen_survey.toml")
    weights, A = s.network.weights, s.network.adjacency
    assert weights is not None and np.array_equal(weights.indices, A.indices) and np.array_equal(weights.indptr, A.indptr)
    seen = observe_network(A, MeasurementModel(contact_cap=1, cap_rule="strongest", symmetrise="either"), np.random.default_rng(0), weights=weights)
    # Under "either" with cap 1 every respondent's observed ties include one of its heaviest ties.
    rows = np.repeat(np.arange(A.shape[0]), np.diff(A.indptr))
    heaviest = np.zeros(A.shape[0])
    np.maximum.at(heaviest, rows, weights.data)
    O = seen.adjacency.tocsr()
    for i in np.flatnonzero(np.diff(A.indptr) > 0)[:200]:
        observed_neighbours = O.indices[O.indptr[i]:O.indptr[i + 1]]
        w = dict(zip(A.indices[A.indptr[i]:A.indptr[i + 1]].tolist(), weights.data[A.indptr[i]:A.indptr[i + 1]].tolist()))
        assert max(w[j] for j in observed_neighbours) == heaviest[i]
    from designcalc.measure import measurement_warnings

    assert measurement_warnings(replace(s, measurement=MeasurementModel(contact_cap=1, cap_rule="strongest"))) == []

"""Planning on a surveyed network: the graph held fixed, villages as blocks, clear errors, reproducible reports."""

from __future__ import annotations

import csv
import json
import subprocess
import sys
from pathlib import Path

import networkx as nx
import numpy as np
import pytest

from designcalc.engine import DesignPoint, example_network, simulate_graph
from designcalc.errors import DesignCalcError, ScenarioError
from designcalc.power import simulate_power
from designcalc.scenario import load_scenario, parse_scenario
from designcalc.store import numbers_fingerprint
from designcalc.surveyed import load_surveyed_network

ROOT = Path(__file__).parents[1]
SURVEY = ROOT / "scenarios" / "harrow_fen_survey.toml"
EDGES = ROOT / "scenarios" / "harrow_fen_contacts.csv"


def _networkx_graph(path: Path) -> nx.Graph:
    """The edge list read by networkx, independently of designcalc's reader (self ties dropped, as designcalc does)."""
    with path.open() as handle:
        rows = list(csv.reader(handle))[1:]
    graph = nx.Graph()
    graph.add_edges_from((int(a), int(b)) for a, b, *_ in rows if a != b)
    return graph


def _scenario(tmp_path: Path, network: str, extra: str = "") -> Path:
    """The survey demo with its [network] table replaced, written beside copies of the edge list."""
    text = SURVEY.read_text()
    start, end = text.index("[network]"), text.index("[outcome]")
    path = tmp_path / "plan.toml"
    path.write_text(text[:start] + network + "\n" + text[end:] + extra)
    return path


def test_every_graph_of_a_design_point_is_the_surveyed_network():
    """The engine's graph is the file's network (degrees equal networkx's, sorted by id) for every graph index."""
    s = load_scenario(SURVEY)
    reference = _networkx_graph(EDGES)
    expected = np.array([d for _, d in sorted(reference.degree())])
    point = DesignPoint(s.population.units[0], 0.5)
    for g in range(3):
        net, _ = example_network(s, point, g)
        np.testing.assert_array_equal(net.degrees, expected)
        assert net.adjacency.indices.dtype == np.int32
    assert s.population.units == (reference.number_of_nodes(),)


def test_random_types_change_between_replicates_degree_rank_types_do_not(tmp_path):
    """types = "random": each graph index draws new types on the same graph; "degree_rank": the same types, rising with degree."""
    random = load_scenario(_scenario(tmp_path, '[network]\nmodel = "surveyed"\nedges = "%s"\ntypes = "random"\n' % EDGES))
    ranked = load_scenario(SURVEY)
    point = DesignPoint(ranked.population.units[0], 0.5)
    t0, t1 = (example_network(random, point, g)[0].types for g in (0, 1))
    assert not np.array_equal(t0, t1)
    r0, r1 = (example_network(ranked, point, g)[0] for g in (0, 1))
    np.testing.assert_array_equal(r0.types, r1.types)
    order = np.argsort(r0.degrees, kind="stable")
    assert np.all(np.diff(r0.types[order]) >= -1e-12)  # types sorted by degree
    # The estimands of the fixed, degree-anchored network are the same on every graph.
    a, b = (simulate_graph(ranked, point, g) for g in (0, 1))
    assert a.estimands == b.estimands


def test_several_files_are_villages_and_blocks(tmp_path):
    """Two files: their disjoint union; block_effects are village effects; types fall in each village's interval of u."""
    first, second = tmp_path / "north.csv", tmp_path / "south.csv"
    first.write_text("a,b\n1,2\n2,3\n3,4\n4,1\n1,3\n")
    second.write_text("a,b\n10,11\n11,12\n12,13\n13,10\n10,14\n14,11\n")
    network = load_surveyed_network([first, second])
    assert network.village_sizes == (4, 5) and network.adjacency.shape == (9, 9)
    assert network.adjacency[:4, 4:].nnz == 0  # no ties between villages
    types = network.draw_types(np.random.default_rng(3))
    np.testing.assert_array_equal(network.block_of(types), network.villages)
    path = _scenario(
        tmp_path, '[network]\nmodel = "surveyed"\nedges = ["north.csv", "south.csv"]\n',
    )
    text = path.read_text().replace('type_effect = "10 * u"', "block_effects = [0.0, 5.0]")
    s = parse_scenario(text, source="plan.toml", folder=tmp_path)
    theta = s.outcome.type_values(types, network.villages)
    assert set(theta[network.villages == 1]) == {5.0} and set(theta[network.villages == 0]) == {0.0}
    wrong = path.read_text().replace('type_effect = "10 * u"', "block_effects = [0.0, 5.0, 1.0]")
    with pytest.raises(ScenarioError, match=r"block_effects.*one value per block \(2\)"):
        parse_scenario(wrong, source="plan.toml", folder=tmp_path)


def test_design_based_power_is_unbiased_for_the_direct_effect():
    """On the fixed graph, Horvitz-Thompson is design-unbiased for the direct effect under Bernoulli assignment
    (Horvitz & Thompson 1952; Aronow & Samii 2017 under interference): bias within 3 graph-clustered MC SEs."""
    s = load_scenario(SURVEY)
    result = simulate_power(s, treatment_probabilities=[0.5], graphs=20, assignments_per_graph=20)
    record = result.select(estimand="direct", estimator="horvitz_thompson", variance_estimator="neyman")[0]
    assert abs(record.bias) < 3 * record.bias_mc_se
    assert record.true_effect_spread == 0.0  # one network, degree-anchored types: the estimand never changes


@pytest.mark.parametrize(
    ("network", "extra", "message"),
    [
        ('[network]\nmodel = "surveyed"\nedges = "missing.csv"\n', "", r"network\.edges: .*missing\.csv: no such file"),
        ('[network]\nmodel = "surveyed"\nedges = "%s"\n[network.density]\nmean_degree = 5\nreference_units = 400\n' % EDGES, "", r"network\.density: has no use"),
        ('[network]\nmodel = "surveyed"\nedges = "%s"\nblock_shares = [1.0]\n' % EDGES, "", r"network\.block_shares: has no use"),
        ('[network]\nmodel = "surveyed"\nedges = "%s"\ntypes = "sorted"\n' % EDGES, "", r"network\.types: is not a recognised option"),
        ('[network]\nmodel = "surveyed"\nedges = "%s"\n' % EDGES, "\n[population]\nunits = [500]\n", r"population\.units: must be the surveyed network's size, 400"),
        ('[network]\nmodel = "blocks"\nedges = "x.csv"\n', "", r'network\.edges: belongs to a surveyed network'),
        ('[network]\nmodel = "surveyed"\nedges = []\n', "", r"network\.edges: must be an edge-list file name"),
    ],
    ids=["missing-file", "density", "block-keys", "types", "units", "edges-on-blocks", "empty-list"],
)
def test_scenario_mistakes_name_the_key(tmp_path, network, extra, message):
    """Each mistake in a surveyed [network] is a ScenarioError naming file and key, with what is allowed."""
    path = _scenario(tmp_path, network, extra)
    with pytest.raises(ScenarioError, match=message):
        load_scenario(path)


def test_a_bad_line_in_the_edge_list_names_file_line_and_key(tmp_path):
    """An unreadable edge list stops loading with the scenario key, the edge file and its line."""
    (tmp_path / "ties.csv").write_text("a,b\n1,2\n3,x\n")
    path = _scenario(tmp_path, '[network]\nmodel = "surveyed"\nedges = "ties.csv"\n')
    with pytest.raises(ScenarioError, match=r"network\.edges: .*ties\.csv.*line 3"):
        load_scenario(path)


def test_sizes_other_than_the_surveyed_one_are_refused_by_the_commands():
    """`power -n 800` and `size` on a surveyed scenario exit 2 with one message, no traceback."""
    for args, expected in (
        (["power", str(SURVEY), "-n", "800", "--graphs", "2", "--assignments", "2"], "--units 800"),
        (["size", str(SURVEY), "--graphs", "2", "--assignments", "2"], "no sample size to solve for"),
    ):
        run = subprocess.run([sys.executable, "-m", "designcalc", *args, "--no-store"], cwd=ROOT, capture_output=True, text=True, timeout=120, check=False)
        assert run.returncode == 2, run.stderr
        assert expected in run.stderr and "Traceback" not in run.stderr
    with pytest.raises(DesignCalcError, match="surveyed"):
        simulate_power(load_scenario(SURVEY), units=[800])


def test_the_fingerprint_follows_the_edge_list_content_not_its_name(tmp_path):
    """Same bytes under another name: same stored results; one tie more: a new fingerprint."""
    copy = tmp_path / "renamed.csv"
    copy.write_bytes(EDGES.read_bytes())
    renamed = load_scenario(_scenario(tmp_path, '[network]\nmodel = "surveyed"\nedges = "renamed.csv"\ntypes = "degree_rank"\n'))
    original = load_scenario(SURVEY)
    assert numbers_fingerprint(renamed) == numbers_fingerprint(original)
    copy.write_bytes(EDGES.read_bytes() + b"1001,2010,1\n")
    changed = load_scenario(_scenario(tmp_path, '[network]\nmodel = "surveyed"\nedges = "renamed.csv"\ntypes = "degree_rank"\n'))
    assert numbers_fingerprint(changed) != numbers_fingerprint(original)


def test_a_surveyed_report_carries_its_edge_list_and_rebuilds_identically(tmp_path):
    """The report copies the edge list beside the scenario; its own reproduce line, run in the folder, rebuilds it."""
    out = tmp_path / "report"
    small = ["--graphs", "6", "--assignments", "4", "--precision", "0.4", "--no-store"]
    first = subprocess.run([sys.executable, "-m", "designcalc", "report", str(SURVEY), "--out", str(out), *small], cwd=ROOT, capture_output=True, text=True, timeout=600, check=False)
    assert first.returncode == 0, first.stderr
    assert (out / "scenario" / "harrow_fen_contacts.csv").read_bytes() == EDGES.read_bytes()
    data = json.loads((out / "report.json").read_text())
    assert data["provenance"]["surveyed_network_sha256"] == load_scenario(SURVEY).network.sha256
    again = subprocess.run(
        [sys.executable, "-m", "designcalc", "report", "scenario/harrow_fen_survey.toml", "--out", str(tmp_path / "again"), *small],
        cwd=out, capture_output=True, text=True, timeout=600, check=False,
    )
    assert again.returncode == 0, again.stderr
    rebuilt = json.loads((tmp_path / "again" / "report.json").read_text())
    for d in (data, rebuilt):
        d["provenance"].pop("utc_time")
    assert rebuilt == data

"""Fitting the block model to an observed network: recovery, re-simulation, statistics, the fragment, the command."""

from __future__ import annotations

import json
import math
import sys
from pathlib import Path

import networkx as nx
import numpy as np
import pytest
import scipy as sp
import typer

from designcalc.density import DensityRule
from designcalc.edge_models import BlockModel
from designcalc.edgelist import parse_edge_list, read_edge_list
from designcalc.errors import DesignCalcError
from designcalc.fit import (
    bethe_hessian_count,
    fit_block_model,
    fit_network,
    fragment_toml,
    goodness_of_fit,
    network_statistics,
    transitivity,
    two_hop_sizes,
)
from designcalc.graphs import sample_block_graph, to_csr
from designcalc.networks import sample_network
from designcalc.scenario import parse_scenario

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "scenarios" / "harrow_fen_contacts.csv"

# Everything of a scenario except its [network] tables, for pasting a fragment into.
_REST_OF_SCENARIO = """
[population]
units = [{units}]

[outcome]
kind = "continuous"
baseline = 0.0
noise_sd = 1.0
direct_effect = 0.2
spillover_effect = 0.5

[design]
treatment_probability = [0.5]

[estimators]
direct = ["hajek"]
direct_variance = ["neyman"]
spillover = ["centred_ht"]
eigenvectors = 0

[simulation]
graphs = 4
assignments_per_graph = 2
seed = 1
"""


@pytest.fixture(scope="module")
def three_blocks() -> tuple[object, BlockModel, DensityRule]:
    """One network of 3000 units from a clearly separated 3-block model at mean degree 20, by the project's sampler."""
    model = BlockModel(shares=(0.5, 0.3, 0.2), affinity=((6.0, 1.0, 1.0), (1.0, 8.0, 1.0), (1.0, 1.0, 10.0)))
    rule = DensityRule(mean_degree=20.0, reference_units=3000)
    types, graph = np.random.SeedSequence(20260815, spawn_key=(7,)).spawn(2)
    net = sample_network(model, rule, 3000, types_rng=np.random.default_rng(types), graph_rng=np.random.default_rng(graph))
    return net, model, rule


def test_three_block_model_is_recovered(three_blocks: tuple[object, BlockModel, DensityRule]) -> None:
    """K, shares and block-pair densities of a known 3-block model are recovered within their sampling error.

    Method: regularised spectral clustering (Qin & Rohe 2013, NeurIPS) with K
    from the Bethe-Hessian count (Saade, Krzakala & Zdeborová 2014; Le &
    Levina 2022, Electron. J. Statist. 16:3315-3342).  Tolerances: given the
    true labels, ties_kl ~ Binomial(pairs_kl, p_kl) (Holland, Laskey &
    Leinhardt 1983), so the oracle density has SD sqrt(p (1 - p) / pairs);
    we allow 4 SDs.  On top, misclassification moves at most the degrees of
    the misclassified nodes, D_mis, in ties and changes the pair counts, so
    |p_fit - p_oracle| <= D_mis / pairs_fit + p_oracle |pairs_fit - pairs_true| / pairs_fit
    (triangle inequality); that bound is added.  The misclassification rate
    itself is asked to be below 1% (observed: 2 nodes of 3000 at these seeds).
    """
    net, model, rule = three_blocks
    adjacency = net.adjacency
    fit = fit_block_model(adjacency, seed=5)
    assert fit.block_rule == "bethe_hessian" and fit.n_blocks == 3
    truth = net.blocks
    # Fitted blocks are numbered by size; with shares 0.5 / 0.3 / 0.2 that is the true order.
    misclassified = fit.labels != truth
    assert misclassified.mean() < 0.01
    n = adjacency.shape[0]
    true_sizes = np.bincount(truth, minlength=3)
    np.testing.assert_allclose(fit.shares, true_sizes / n, rtol=0, atol=misclassified.mean() + 1e-15)
    p = rule.rho(n) * model.normalised_matrix()
    pairs_true = np.outer(true_sizes, true_sizes)
    np.fill_diagonal(pairs_true, true_sizes * (true_sizes - 1) // 2)
    pairs_fit = np.asarray(fit.block_pairs)
    degree_mis = float(np.diff(adjacency.indptr)[misclassified].sum())
    bias_bound = degree_mis / pairs_fit + p * np.abs(pairs_fit - pairs_true) / pairs_fit
    tolerance = 4 * np.sqrt(p * (1 - p) / pairs_true) + bias_bound
    assert np.all(np.abs(np.asarray(fit.edge_densities) - p) <= tolerance)
    # Affinities: only ratios matter, so compare r_kl = g_kl / g_00 = p_kl / p_00.  Delta method: the
    # relative variance of a ratio of independent estimates is the sum of their relative variances,
    # (1 - p) / (p pairs) each; 4 SDs plus the misclassification bound, relative, of both densities.
    ratio = p / p[0, 0]
    relative_sd = np.sqrt((1 - p) / (p * pairs_true) + (1 - p[0, 0]) / (p[0, 0] * pairs_true[0, 0]))
    relative_bias = bias_bound / p + bias_bound[0, 0] / p[0, 0]
    fitted_ratio = np.asarray(fit.affinity) / fit.affinity[0][0]
    assert np.all(np.abs(fitted_ratio - ratio) <= ratio * (4 * relative_sd + relative_bias))


def test_fit_is_deterministic_given_the_seed(three_blocks: tuple[object, BlockModel, DensityRule]) -> None:
    """Two fits with the same seed give identical labels and densities; the K-means starts are seeded."""
    adjacency = three_blocks[0].adjacency
    a, b = fit_block_model(adjacency, seed=9), fit_block_model(adjacency, seed=9)
    assert np.array_equal(a.labels, b.labels) and a.edge_densities == b.edge_densities


def test_bethe_hessian_finds_one_block_in_an_erdos_renyi_graph() -> None:
    """G(n, p) has no communities: the Bethe-Hessian rule counts one (Saade, Krzakala & Zdeborová 2014)."""
    adjacency = sample_block_graph([2000], np.array([[10 / 1999]]), rng=np.random.default_rng(3))
    count, r, _ = bethe_hessian_count(adjacency)
    assert count == 1 and r > 1


def test_given_number_of_blocks_overrides_the_rule(three_blocks: tuple[object, BlockModel, DensityRule]) -> None:
    """--blocks K is fitted as given and the rule's count is kept beside it; an impossible K is refused."""
    fit = fit_block_model(three_blocks[0].adjacency, n_blocks=2, seed=1)
    assert (fit.n_blocks, fit.block_rule, fit.bethe_hessian_blocks) == (2, "given", 3)
    with pytest.raises(DesignCalcError, match="`n_blocks` must be a whole number in \\[1, 12\\]; got 13"):
        fit_block_model(three_blocks[0].adjacency, n_blocks=13, seed=1)


def test_refitting_a_networkx_block_model_reproduces_its_degrees_and_density() -> None:
    """Graphs re-simulated from a fit of an nx.stochastic_block_model graph match its degrees and edge density.

    Reference generator: networkx's stochastic_block_model (Holland, Laskey &
    Leinhardt 1983).  Degree distribution: two-sample KS test (scipy.stats.ks_2samp)
    of the observed degrees against the re-simulated ones, p > 0.01.  Mean
    degree: the observed one is a single draw and the simulated mean averages
    G draws, so their difference has SD sd_sim sqrt(1 + 1/G); 4 SDs allowed.
    """
    sizes = [300, 200, 100]
    probabilities = [[0.04, 0.004, 0.002], [0.004, 0.05, 0.004], [0.002, 0.004, 0.08]]
    graph = nx.stochastic_block_model(sizes, probabilities, seed=31)
    adjacency = sp.sparse.csr_array(nx.to_scipy_sparse_array(graph, nodelist=range(sum(sizes)), format="csr"))
    fit = fit_block_model(adjacency, seed=2)
    # A few nodes with most ties outside their block may be misplaced; allow 2% of the nodes.
    assert fit.n_blocks == 3 and np.all(np.abs(np.asarray(fit.block_sizes) - sizes) <= 0.02 * sum(sizes))
    check = goodness_of_fit(adjacency, fit, graphs=30, seed=4)
    assert check.degree_ks_pvalue > 0.01
    mean = check.check("mean_degree")
    assert abs(mean.observed - mean.simulated_mean) <= 4 * mean.simulated_sd * math.sqrt(1 + 1 / check.n_graphs)
    assert not check.misses_clustering


def test_goodness_of_fit_is_reproducible_and_keyed_by_graph() -> None:
    """The check is the same for the same seed, and its first graphs do not change when more are asked for."""
    adjacency = sample_block_graph([120, 80], np.array([[0.08, 0.01], [0.01, 0.1]]), rng=np.random.default_rng(8))
    fit = fit_block_model(adjacency, seed=1)
    few = goodness_of_fit(adjacency, fit, graphs=4, seed=3)
    more = goodness_of_fit(adjacency, fit, graphs=6, seed=3)
    for a, b in zip(few.checks, more.checks):
        assert a.simulated == b.simulated[:4]
    with pytest.raises(DesignCalcError, match="`graphs` must be a whole number in \\[2, 10000\\]; got 1"):
        goodness_of_fit(adjacency, fit, graphs=1, seed=3)


def _reference_graphs() -> list[nx.Graph]:
    clustered = nx.powerlaw_cluster_graph(300, 3, 0.6, seed=5)
    with_isolates = nx.gnp_random_graph(150, 0.02, seed=6)
    return [
        nx.karate_club_graph(),
        nx.gnp_random_graph(200, 0.05, seed=4),
        clustered,
        with_isolates,
        nx.complete_graph(6),
        nx.empty_graph(5),
        nx.path_graph(7),
    ]


@pytest.mark.parametrize("index", range(7))
def test_transitivity_and_two_hop_sizes_match_networkx(index: int) -> None:
    """Transitivity equals networkx.transitivity to 1e-12 and two-hop sizes equal networkx's distance-2 balls."""
    graph = _reference_graphs()[index]
    nodes = sorted(graph.nodes)
    adjacency = sp.sparse.csr_array(nx.to_scipy_sparse_array(graph, nodelist=nodes, format="csr", dtype=float))
    adjacency.data[:] = 1.0  # karate_club_graph carries weights
    assert abs(transitivity(adjacency) - nx.transitivity(graph)) <= 1e-12
    expected = [len(nx.single_source_shortest_path_length(graph, v, cutoff=2)) - 1 for v in nodes]
    assert two_hop_sizes(adjacency).tolist() == expected


def test_network_statistics_of_a_small_graph() -> None:
    """A triangle with a pendant node and an isolate: mean degree 8/5, transitivity 3 x 1 / 5 triples."""
    adjacency = to_csr(5, np.array([0, 1, 2, 2]), np.array([1, 2, 0, 3]))
    s = network_statistics(adjacency)
    assert (s.n_ties, s.mean_degree, s.share_isolated) == (4, 1.6, 0.2)
    # Triples centred at 0, 1: one each; at 2 (degree 3): three; closed: 3 of 5 (nx.transitivity).
    assert s.transitivity == pytest.approx(0.6, abs=1e-15)


def test_fragment_parses_in_a_full_scenario_and_reproduces_the_densities(three_blocks: tuple[object, BlockModel, DensityRule]) -> None:
    """Pasted into a scenario the fragment parses, and at the observed n it draws every pair with its observed density."""
    adjacency = three_blocks[0].adjacency
    fit = fit_block_model(adjacency, seed=2)
    n = adjacency.shape[0]
    text = _REST_OF_SCENARIO.format(units=n) + "\n" + fragment_toml(fit, source="pilot.csv")
    scenario = parse_scenario(text, source="fitted.toml")
    assert scenario.network.shares == fit.shares
    probabilities = scenario.density.rho(n) * scenario.network.normalised_matrix()
    np.testing.assert_allclose(probabilities, np.asarray(fit.edge_densities), rtol=1e-12, atol=0)
    assert scenario.density.growth_exponent == 0.0 and scenario.density.reference_units == n
    assert "cannot identify how mean degree grows" in text


def test_fit_of_the_demo_warns_about_clustering() -> None:
    """The Harrow Fen demo has triangle closure: the check warns that the block model misses its clustering."""
    result = fit_network(read_edge_list(DEMO), graphs=20, seed=1)
    assert result.check.misses_clustering
    assert any("misses clustering badly" in w and "common practice" in w for w in result.warnings)
    assert any("merged" in w for w in result.warnings)
    # Four hamlets were generated: asked for four blocks, the fit finds four blocks of about their sizes (140, 110, 90, 60).
    four = fit_block_model(result.edges.adjacency, n_blocks=4, seed=1)
    assert np.all(np.abs(np.asarray(four.block_sizes) - np.array([140, 110, 90, 60])) <= 6)
    json.dumps(result.to_dict(), allow_nan=True)


def test_fit_refuses_networks_it_cannot_fit() -> None:
    """A network without ties, or with fewer than 4 nodes, is a clear user error."""
    with pytest.raises(DesignCalcError, match="no ties"):
        fit_block_model(parse_edge_list("1,1\n2,2\n3,3\n4,4\n").adjacency, seed=1)
    with pytest.raises(DesignCalcError, match="at least 4"):
        fit_block_model(parse_edge_list("1,2\n2,3\n").adjacency, seed=1)


# ------------------------------------------------------------------ the command


def _run_command(monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str], *args: str) -> tuple[int, str, str]:
    """Run `designcalc fit ...` through the real entry point (cli.main.run, its error mapping) on an app holding only `fit`."""
    from designcalc.cli import fit as fit_command
    from designcalc.cli import main

    app = typer.Typer(pretty_exceptions_enable=False)
    fit_command.register(app)

    @app.callback()
    def _group() -> None:
        """Keep `fit` a subcommand, as in the real app."""

    monkeypatch.setattr(main, "app", app)
    monkeypatch.setattr(sys, "argv", ["designcalc", "fit", *args])
    with pytest.raises(SystemExit) as info:
        main.run()
    out = capsys.readouterr()
    return int(info.value.code or 0), out.out, out.err


def test_command_missing_file_exits_2_with_one_message(monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str], tmp_path: Path) -> None:
    """A missing edge list exits with code 2 and one line naming the file, no traceback."""
    code, out, err = _run_command(monkeypatch, capsys, str(tmp_path / "nowhere.csv"))
    assert code == 2
    assert "nowhere.csv: no such file" in err
    assert "Traceback" not in err + out
    assert len([line for line in err.splitlines() if line.startswith("error:")]) == 1


def test_command_writes_the_fragment_and_refuses_to_overwrite(monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str], tmp_path: Path) -> None:
    """--out writes a fragment that parses; a second run refuses to replace it without --force; --figures draws the check."""
    target = tmp_path / "network.toml"
    code, out, err = _run_command(
        monkeypatch, capsys, str(DEMO), "--out", str(target), "--blocks", "4", "--graphs", "5", "--figures", str(tmp_path / "figs")
    )
    assert code == 0, err
    assert "Goodness of fit" in out and "warning: the fit misses clustering badly" in out and "caution:" in out
    scenario = parse_scenario(_REST_OF_SCENARIO.format(units=400) + target.read_text(), source="x.toml")
    assert scenario.network.n_blocks == 4
    assert (tmp_path / "figs" / "fit_check.png").is_file() and (tmp_path / "figs" / "fit_check.svg").is_file()
    code, _, err = _run_command(monkeypatch, capsys, str(DEMO), "--out", str(target))
    assert code == 2 and "the file exists; give --force" in err
    code, _, err = _run_command(monkeypatch, capsys, str(DEMO), "--out", str(target), "--force", "--graphs", "3", "--format", "json")
    assert code == 0, err


def test_command_json_output(monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]) -> None:
    """--format json prints the fit, the check, the fragment, warnings and cautions as one JSON document."""
    code, out, err = _run_command(monkeypatch, capsys, str(DEMO), "--graphs", "3", "--format", "json", "--seed", "7")
    assert code == 0, err
    data = json.loads(out)
    assert data["fit"]["seed"] == 7 and data["goodness_of_fit"]["graphs"] == 3
    assert data["fragment"].count("[network") == 2 and data["cautions"]
    code, _, err = _run_command(monkeypatch, capsys, str(DEMO), "--format", "csv")
    assert code == 2 and "--format must be one of table, json" in err

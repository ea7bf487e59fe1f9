"""Tests of designcalc.estimands: exact direct, spillover, total and global effects on a fixed graph."""

from __future__ import annotations

import itertools

import networkx as nx
import numpy as np
import pytest

from designcalc.estimands import exact_estimands, mean_outcome_at
from designcalc.outcomes import OutcomeModel

MODELS = {
    "linear": OutcomeModel(baseline=1.0, direct_effect=0.8, spillover_effect=1.3, interaction=-0.6),
    "saturating": OutcomeModel(baseline=1.0, direct_effect=0.8, spillover_effect=1.3, interaction=0.5, spillover_shape="saturating", saturation_rate=5.0),
    "threshold": OutcomeModel(baseline=1.0, direct_effect=0.8, spillover_effect=1.3, interaction=0.7, spillover_shape="threshold", threshold=0.4),
    "logistic": OutcomeModel(kind="binary", link="logistic", baseline=-0.5, direct_effect=0.9, spillover_effect=1.1, interaction=-0.4, spillover_shape="saturating"),
    "logistic-threshold": OutcomeModel(kind="binary", link="logistic", baseline=0.2, direct_effect=-0.9, spillover_effect=1.5, interaction=0.6, spillover_shape="threshold", threshold=0.5),
}


def _graph_data(seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Degrees of a G(300, 0.02) graph plus isolates, and type effects theta(u) = 2u - 1."""
    g = nx.gnp_random_graph(300, 0.02, seed=seed)
    # Ten explicit isolates, since G(300, 0.02) rarely has any (expected 300 e^-6 = 0.7).
    deg = np.concatenate([np.array([d for _, d in g.degree()]), np.zeros(10, dtype=int)])
    rng = np.random.default_rng(seed)
    return deg, 2 * rng.random(deg.size) - 1


@pytest.mark.parametrize("name", list(MODELS))
@pytest.mark.parametrize("pi", [0.2, 0.5, 0.85])
def test_total_is_derivative_of_mean_outcome(name: str, pi: float) -> None:
    """total = direct + spillover = d mean / d pi (METHODS.md §1.2; CHECKS.md §5, Biometrika 109(4) 2022)."""
    degrees, theta = _graph_data(3)
    assert np.any(degrees == 0) and degrees.max() <= 20
    model = MODELS[name]
    e = exact_estimands(degrees, theta, model, pi)
    assert e.total == e.direct + e.spillover
    h = 1e-5
    # Central difference: truncation h^2/6 |mu'''| ~ 1e-10 * (max degree)^3 <= 1e-6 only in the worst
    # case; rounding ~ 1e-16 |mu| / h ~ 1e-11.  In practice the error is far below 1e-7.
    fd = (mean_outcome_at(degrees, theta, model, pi + h) - mean_outcome_at(degrees, theta, model, pi - h)) / (2 * h)
    assert fd == pytest.approx(e.total, abs=1e-7, rel=1e-7)


@pytest.mark.parametrize("pi", [0.1, 0.5, 0.9])
def test_linear_in_means_closed_forms(pi: float) -> None:
    """Linear in means without isolates: direct = tau + gamma pi, spillover = beta + gamma pi, global = tau + beta + gamma (METHODS.md §1.4)."""
    tau, beta, gamma = 0.8, 1.3, -0.6
    model = OutcomeModel(baseline=2.0, direct_effect=tau, spillover_effect=beta, interaction=gamma, type_effect="3 * u")
    degrees = np.array([d for _, d in nx.barabasi_albert_graph(200, 2, seed=1).degree()])
    assert degrees.min() > 0
    theta = model.type_values(np.linspace(0, 1, degrees.size))
    e = exact_estimands(degrees, theta, model, pi)
    assert e.direct == pytest.approx(tau + gamma * pi, abs=1e-13)
    assert e.spillover == pytest.approx(beta + gamma * pi, abs=1e-13)
    assert e.global_effect == pytest.approx(tau + beta + gamma, abs=1e-13)
    assert e.share_isolated == 0.0


@pytest.mark.parametrize("pi", [0.3, 0.7])
def test_linear_in_means_with_isolates(pi: float) -> None:
    """Isolates (exposure 0) add tau to direct and global, nothing to spillover (METHODS.md §1.4)."""
    tau, beta, gamma = 0.8, 1.3, -0.6
    model = OutcomeModel(direct_effect=tau, spillover_effect=beta, interaction=gamma)
    degrees = np.array([0, 0, 0, 1, 1, 2, 3, 5, 8, 13])
    share = 0.7  # non-isolated share
    e = exact_estimands(degrees, np.zeros(degrees.size), model, pi)
    assert e.share_isolated == pytest.approx(0.3)
    assert e.spillover == pytest.approx(share * (beta + gamma * pi), abs=1e-14)
    assert e.direct == pytest.approx(tau + share * gamma * pi, abs=1e-14)
    assert e.global_effect == pytest.approx(tau + share * (beta + gamma), abs=1e-14)


def _brute_force(graph: nx.Graph, theta: np.ndarray, model: OutcomeModel, pi: float) -> dict[str, float]:
    """tau_DIR, tau_IND, mean and GATE from the METHODS.md §1.1 definitions by enumerating all 2^n assignments."""
    n = graph.number_of_nodes()
    a = nx.to_numpy_array(graph, nodelist=range(n))
    deg = a.sum(axis=1)
    w = np.array(list(itertools.product([0.0, 1.0], repeat=n)))  # 2^n x n
    prob = np.prod(np.where(w == 1, pi, 1 - pi), axis=1)
    x = np.divide(w @ a, deg, out=np.zeros_like(w), where=deg > 0)  # isolates: x = 0
    y = model.mean_outcome(theta[None, :], w, x)  # E[Y_j | W] for every assignment
    # E[Y_j | W_i = 1] = sum_{w: w_i = 1} P(w) y_j(w) / pi, and likewise for W_i = 0.
    e1 = (w * prob[:, None]).T @ y / pi
    e0 = ((1 - w) * prob[:, None]).T @ y / (1 - pi)
    diff = e1 - e0  # diff[i, j] = E[Y_j | W_i = 1] - E[Y_j | W_i = 0]
    x_all = np.where(deg > 0, 1.0, 0.0)
    return {
        "direct": float(np.mean(np.diag(diff))),
        "spillover": float((diff.sum() - np.trace(diff)) / n),
        "mean_outcome": float(np.mean(prob @ y)),
        "global_effect": float(np.mean(model.mean_outcome(theta, 1.0, x_all) - model.mean_outcome(theta, 0.0, 0.0))),
    }


def _small_graphs() -> list[tuple[str, nx.Graph]]:
    star = nx.star_graph(5)
    star.add_nodes_from([6, 7])  # two isolates
    return [
        ("petersen", nx.petersen_graph()),
        ("gnp", nx.convert_node_labels_to_integers(nx.gnp_random_graph(10, 0.35, seed=4))),
        ("star+isolates", star),
        ("path", nx.path_graph(9)),
    ]


@pytest.mark.parametrize(("graph_name", "graph"), _small_graphs(), ids=[g for g, _ in _small_graphs()])
@pytest.mark.parametrize("name", ["saturating", "threshold", "logistic", "logistic-threshold"])
@pytest.mark.parametrize("pi", [0.25, 0.6])
def test_matches_brute_force_enumeration(graph_name: str, graph: nx.Graph, name: str, pi: float) -> None:
    """exact_estimands equals tau_DIR and tau_IND computed from their definitions over all 2^n assignments (METHODS.md §1.1)."""
    n = graph.number_of_nodes()
    theta = np.random.default_rng(n).normal(size=n)
    model = MODELS[name]
    truth = _brute_force(graph, theta, model, pi)
    degrees = np.array([graph.degree(i) for i in range(n)])
    e = exact_estimands(degrees, theta, model, pi)
    for key, value in truth.items():
        assert getattr(e, key) == pytest.approx(value, abs=1e-12), key


def test_empty_population() -> None:
    """No units: every estimand is zero."""
    e = exact_estimands(np.array([], dtype=int), np.array([]), MODELS["linear"], 0.5)
    assert e.to_dict()["global"] == 0.0 and e.direct == 0.0


def test_chunking_does_not_change_result(monkeypatch: pytest.MonkeyPatch) -> None:
    """Splitting degree classes into chunks gives identical estimands."""
    import designcalc.estimands as module

    degrees, theta = _graph_data(9)
    full = exact_estimands(degrees, theta, MODELS["saturating"], 0.4)
    monkeypatch.setattr(module, "_CHUNK_CELLS", 7)
    chunked = exact_estimands(degrees, theta, MODELS["saturating"], 0.4)
    assert full == chunked

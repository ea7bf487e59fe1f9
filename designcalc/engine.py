"""The Monte Carlo power engine.

For each design point (units x treatment probability) the engine draws
``graphs`` networks and, on each, ``assignments_per_graph`` Bernoulli
assignments with outcomes; computes the exact estimands of every graph, the
planned estimators with their feasible standard errors, and the same under
the null model of each estimand (the tested effect set to zero, everything
else unchanged, on the very same graphs, assignments and noise).

Random streams (layout version ``STREAM_LAYOUT_VERSION``) form a
``numpy.random.SeedSequence`` tree keyed by content, never by worker or order:

* types and graph: key (0, units, graph index) -> children [types, graph]; the
  same networks serve every treatment probability (common random numbers
  make treatment probabilities comparable);
* assignment and noise: key (1, units, round(pi * 1e9), graph index) ->
  children [assignment, noise].

So a result never depends on how work is split, on ``batch_size``, or on
which estimators are planned.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Callable

import numpy as np

from designcalc.estimands import Estimands, exact_estimands
from designcalc.estimators import (
    EstimateBatch,
    GraphPreparation,
    combine_total,
    estimate_direct_hajek,
    estimate_direct_ht,
    estimate_spillover_exposure_regression,
    estimate_spillover_ht,
    estimate_spillover_pc,
    estimate_spillover_pc_corrected,
    prepare_graph,
)
from designcalc.networks import kernel_grid_cells, sample_network
from designcalc.outcomes import OutcomeModel
from designcalc.scenario import Scenario

__all__ = [
    "STREAM_LAYOUT_VERSION",
    "DesignPoint",
    "GraphDraws",
    "EngineProgress",
    "simulate_graph",
    "simulate_design_point",
    "design_points",
]

STREAM_LAYOUT_VERSION = 1
ESTIMANDS = ("direct", "spillover", "total")
_PROBABILITY_KEY_SCALE = 1_000_000_000
_VARIANCE_OF_SPILLOVER = {
    "centred_ht": "plug_in",
    "pc_balancing": "plug_in",
    "pc_balancing_corrected": "plug_in",
    "exposure_regression": "hc1",
}


@dataclass(frozen=True)
class DesignPoint:
    units: int
    treatment_probability: float


@dataclass(frozen=True)
class EngineProgress:
    """Reported after every finished graph."""

    finished_graphs: int
    total_graphs: int
    elapsed_seconds: float


@dataclass(eq=False)
class GraphDraws:
    """Everything one graph contributes: per estimator, estimates under the model and its null."""

    estimands: Estimands
    null_estimands: dict[str, Estimands]
    estimates: dict[tuple[str, str, str], np.ndarray] = field(default_factory=dict)
    standard_errors: dict[tuple[str, str, str], np.ndarray] = field(default_factory=dict)
    null_estimates: dict[tuple[str, str, str], np.ndarray] = field(default_factory=dict)
    null_standard_errors: dict[tuple[str, str, str], np.ndarray] = field(default_factory=dict)
    mean_degree: float = 0.0
    share_isolated: float = 0.0
    n_eigenvectors: int = 0
    min_shrinkage: float = 1.0


def design_points(scenario: Scenario) -> list[DesignPoint]:
    return [
        DesignPoint(n, p)
        for n in scenario.population.units
        for p in scenario.design.treatment_probabilities
    ]


def _graph_streams(entropy: int, units: int, graph_index: int) -> tuple[np.random.Generator, np.random.Generator]:
    seq = np.random.SeedSequence(entropy, spawn_key=(0, units, graph_index))
    types, graph = seq.spawn(2)
    return np.random.default_rng(types), np.random.default_rng(graph)


def _assignment_streams(entropy: int, point: DesignPoint, graph_index: int) -> tuple[np.random.Generator, np.random.Generator]:
    key = (point.units, int(round(point.treatment_probability * _PROBABILITY_KEY_SCALE)), graph_index)
    # The leading 0 / 1 keeps graph and assignment keys apart.
    assignment, noise = np.random.SeedSequence(entropy, spawn_key=(1,) + key).spawn(2)
    return np.random.default_rng(assignment), np.random.default_rng(noise)


def _outcomes(model: OutcomeModel, theta: np.ndarray, W: np.ndarray, X: np.ndarray, noise: np.ndarray) -> np.ndarray:
    mean = model.mean_outcome(theta[:, None], W, X)
    if model.kind == "continuous":
        return mean + model.noise_sd * noise
    return (noise < mean).astype(float)  # noise holds uniforms for binary outcomes


def _run_estimators(
    scenario: Scenario, prep: GraphPreparation, W: np.ndarray, Y: np.ndarray, pi: float, want: tuple[str, ...]
) -> dict[tuple[str, str, str], EstimateBatch]:
    plan = scenario.estimators
    out: dict[tuple[str, str, str], EstimateBatch] = {}
    direct: dict[str, EstimateBatch] = {}
    if "direct" in want or "total" in want:
        for name in plan.direct:
            for variance in plan.direct_variance:
                if name == "hajek":
                    batch = estimate_direct_hajek(prep, W, Y, treatment_probability=pi, variance=variance)
                else:
                    batch = estimate_direct_ht(prep, W, Y, treatment_probability=pi, centre=plan.centre, variance=variance)
                if "direct" in want:
                    out[("direct", name, variance)] = batch
                direct.setdefault(name, batch)
    spill: dict[str, EstimateBatch] = {}
    if "spillover" in want or "total" in want:
        for name in plan.spillover:
            if name == "centred_ht":
                batch = estimate_spillover_ht(prep, W, Y, treatment_probability=pi, centre=plan.centre)
            elif name == "pc_balancing":
                batch = estimate_spillover_pc(prep, W, Y, treatment_probability=pi)
            elif name == "pc_balancing_corrected":
                batch = estimate_spillover_pc_corrected(prep, W, Y, treatment_probability=pi)
            else:
                batch = estimate_spillover_exposure_regression(prep, W, Y, treatment_probability=pi)
            if "spillover" in want:
                out[("spillover", name, _VARIANCE_OF_SPILLOVER[name])] = batch
            spill[name] = batch
    if "total" in want:
        # The total pairs the first planned direct estimator with each spillover estimator.
        first = direct[plan.direct[0]]
        for name, batch in spill.items():
            total = combine_total(first, batch)
            out[("total", f"{plan.direct[0]}+{name}", "linearised")] = total
    return out


def simulate_graph(scenario: Scenario, point: DesignPoint, graph_index: int, *, batch_size: int = 16) -> GraphDraws:
    """Simulate one graph of a design point with all its assignments.

    ``batch_size`` (columns processed at once) is a speed knob only: every
    random number is drawn before batching, and the estimators reduce each
    column on its own.
    """
    entropy = scenario.simulation.seed
    n, pi = point.units, point.treatment_probability
    types_rng, graph_rng = _graph_streams(entropy, n, graph_index)
    bounds = None
    if scenario.network.kind == "kernel":
        bounds = scenario.network.cell_bounds(kernel_grid_cells(n))
    net = sample_network(scenario.network, scenario.density, n, types_rng=types_rng, graph_rng=graph_rng, cell_bounds=bounds)
    A = net.adjacency
    degrees = net.degrees
    outcome = scenario.outcome
    theta = outcome.type_values(net.types, net.blocks)
    prep = prepare_graph(
        A,
        n_eigenvectors=scenario.estimators.eigenvectors,
        mean_degree_hint=float(degrees.mean()) if n else 0.0,
        two_hop="two_hop" in scenario.estimators.direct_variance,
    )
    assign_rng, noise_rng = _assignment_streams(entropy, point, graph_index)
    B = scenario.simulation.assignments_per_graph
    W_all = (assign_rng.random((n, B)) < pi).astype(float)
    if outcome.kind == "continuous":
        noise_all = noise_rng.standard_normal((n, B))
    else:
        noise_all = noise_rng.random((n, B))
    nulls = {e: outcome.null_for(e) for e in ESTIMANDS}
    draws = GraphDraws(
        estimands=exact_estimands(degrees, theta, outcome, pi),
        null_estimands={e: exact_estimands(degrees, theta, m, pi) for e, m in nulls.items()},
        mean_degree=float(degrees.mean()) if n else 0.0,
        share_isolated=float(np.mean(degrees == 0)) if n else 0.0,
        n_eigenvectors=prep.n_eigenvectors,
        min_shrinkage=prep.min_shrinkage,
    )
    safe_degrees = np.maximum(degrees, 1)[:, None]
    chunks: dict[str, list] = {"est": [], "se": [], "nest": [], "nse": []}
    for start in range(0, B, batch_size):
        W = W_all[:, start : start + batch_size]
        noise = noise_all[:, start : start + batch_size]
        X = (A @ W) / safe_degrees
        Y = _outcomes(outcome, theta, W, X, noise)
        alt = _run_estimators(scenario, prep, W, Y, pi, ESTIMANDS)
        null: dict[tuple[str, str, str], EstimateBatch] = {}
        for estimand, model in nulls.items():
            Y0 = _outcomes(model, theta, W, X, noise)
            null.update({k: v for k, v in _run_estimators(scenario, prep, W, Y0, pi, (estimand,)).items() if k[0] == estimand})
        chunks["est"].append({k: v.estimate for k, v in alt.items()})
        chunks["se"].append({k: v.standard_error for k, v in alt.items()})
        chunks["nest"].append({k: v.estimate for k, v in null.items()})
        chunks["nse"].append({k: v.standard_error for k, v in null.items()})
    for target, name in ((draws.estimates, "est"), (draws.standard_errors, "se"), (draws.null_estimates, "nest"), (draws.null_standard_errors, "nse")):
        for key in chunks[name][0]:
            target[key] = np.concatenate([c[key] for c in chunks[name]])
    return draws


def simulate_design_point(
    scenario: Scenario,
    point: DesignPoint,
    *,
    batch_size: int = 16,
    progress: Callable[[], None] | None = None,
    graph_indices: range | None = None,
) -> list[GraphDraws]:
    """All graphs of one design point, in graph order."""
    indices = graph_indices if graph_indices is not None else range(scenario.simulation.graphs)
    out = []
    for g in indices:
        out.append(simulate_graph(scenario, point, g, batch_size=batch_size))
        if progress is not None:
            progress()
    return out


"""A straightforward reference simulation, written the way an applied researcher would.

Not part of designcalc and not optimised: it exists so that
``benchmarks/bench_engine.py`` can time the engine against a plain
implementation computing the same quantities, and check that the two agree.

Per graph it does what ``designcalc.engine.simulate_graph`` does for a block
model with a linear spillover:

* draw latent types ``u ~ U(0, 1)``, cut them into blocks by the block shares
  and draw the graph with ``networkx.stochastic_block_model``;
* build the dense adjacency matrix and take the top-``k`` eigenvectors (by
  ``|lambda|``) from a dense ``numpy.linalg.eigh``, ``k`` chosen by the
  eigenvalue rule ``|lambda| > 2.1 sqrt(mean degree)``, capped at 10, and
  orthonormalise ``[1/sqrt(n), v_1..v_k]`` by QR (METHODS.md §3.3);
* compute the exact estimands of the model and of its three nulls with a
  binomial sum per unit (METHODS.md §1.4);
* for each assignment: Bernoulli treatments, exposure and outcomes by loops
  over units and neighbours, then the estimators under the model and under
  each null (the tested effect set to zero, same treatments and noise):
  Hájek with the Neyman SE, centred HT spillover, PC-balancing in the
  published form ``(1/n) Y^T A (I - P) omega`` and designcalc's corrected
  variant, each with its plug-in variance, and the totals Hájek + spillover
  with the linearised covariance (METHODS.md §2.1, §3.1-3.3, §4.1).

The PC-balancing steps use the dense ``n x n`` matrices ``A (I - P)`` (and its
diagonal-free version) because that is how the formula reads; everything else
loops in Python.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field, replace

import networkx as nx
import numpy as np
import scipy as sp
import scipy.stats

__all__ = [
    "LinearOutcome",
    "ReferenceGraph",
    "ReferenceDraws",
    "sample_reference_graph",
    "prepare_reference_graph",
    "reference_estimands",
    "reference_estimates",
    "simulate_reference_graph",
]

SPILLOVER_NAMES = ("centred_ht", "pc_balancing", "pc_balancing_corrected")


@dataclass(frozen=True)
class LinearOutcome:
    """``Y = baseline + theta_block + direct w + spillover x + interaction w x + noise_sd e``."""

    baseline: float
    block_effects: tuple[float, ...]
    direct_effect: float
    spillover_effect: float
    interaction: float
    noise_sd: float

    def mean(self, theta: float, w: float, x: float | np.ndarray) -> float | np.ndarray:
        return (
            self.baseline
            + theta
            + self.direct_effect * w
            + self.spillover_effect * x
            + self.interaction * w * x
        )

    def null_for(self, estimand: str) -> "LinearOutcome":
        """The same model with the tested effect (and the interaction) set to zero."""
        if estimand == "direct":
            return replace(self, direct_effect=0.0, interaction=0.0)
        if estimand == "spillover":
            return replace(self, spillover_effect=0.0, interaction=0.0)
        return replace(self, direct_effect=0.0, spillover_effect=0.0, interaction=0.0)


@dataclass
class ReferenceGraph:
    """One graph with everything the estimators need, in plain form."""

    neighbours: list[list[int]]
    degrees: list[int]
    blocks: list[int]
    adjacency: np.ndarray  # dense n x n
    basis: np.ndarray  # Q, n x (k + 1)
    pc_matrix: np.ndarray  # A (I - P), dense
    corrected_matrix: np.ndarray  # A (I - P) with zero diagonal
    shrinkage: list[float]  # r_j
    n_eigenvectors: int
    eigenvalues: np.ndarray


@dataclass
class ReferenceDraws:
    """Estimands and per-assignment estimates of one graph, keyed like the engine's."""

    estimands: dict[str, float]
    null_estimands: dict[str, dict[str, float]]
    estimates: dict[tuple[str, str, str], np.ndarray] = field(default_factory=dict)
    standard_errors: dict[tuple[str, str, str], np.ndarray] = field(default_factory=dict)
    null_estimates: dict[tuple[str, str, str], np.ndarray] = field(default_factory=dict)
    null_standard_errors: dict[tuple[str, str, str], np.ndarray] = field(default_factory=dict)
    n_eigenvectors: int = 0
    mean_degree: float = 0.0
    seconds: dict[str, float] = field(default_factory=dict)


def sample_reference_graph(
    n_units: int, block_shares: tuple[float, ...], probabilities: np.ndarray, *, rng: np.random.Generator
) -> tuple[nx.Graph, list[int]]:
    """Types, blocks and a networkx SBM graph; nodes are numbered block by block."""
    types = np.sort(rng.random(n_units))
    cuts = np.cumsum(block_shares)[:-1]
    blocks = [int(np.searchsorted(cuts, u, side="right")) for u in types]
    sizes = [blocks.count(k) for k in range(len(block_shares))]
    graph = nx.stochastic_block_model(sizes, probabilities.tolist(), seed=int(rng.integers(2**32)))
    return graph, blocks


def prepare_reference_graph(
    graph: nx.Graph, blocks: list[int], *, n_eigenvectors: int | None = None, cap: int = 10
) -> ReferenceGraph:
    """Dense adjacency, dense eigendecomposition, PC-balancing matrices and shrinkage."""
    n = graph.number_of_nodes()
    neighbours = [sorted(graph.neighbors(i)) for i in range(n)]
    degrees = [len(nb) for nb in neighbours]
    A = nx.to_numpy_array(graph, nodelist=range(n))
    values, vectors = np.linalg.eigh(A)
    order = np.argsort(-np.abs(values))
    values, vectors = values[order], vectors[:, order]
    if n_eigenvectors is None:
        threshold = 2.1 * math.sqrt(sum(degrees) / n)  # (2 + eta) sqrt(d), eta = 0.1
        n_eigenvectors = min(cap, int(np.sum(np.abs(values) > threshold)))
    candidates = np.column_stack([np.ones(n) / math.sqrt(n), vectors[:, :n_eigenvectors]])
    Q, _ = np.linalg.qr(candidates)
    M = A - (A @ Q) @ Q.T  # A (I - P)
    B = M.copy()
    np.fill_diagonal(B, 0.0)
    shrinkage = []
    for j in range(n):
        if degrees[j] == 0:
            shrinkage.append(1.0)
        else:
            shrinkage.append(sum(B[j, i] for i in neighbours[j]) / degrees[j])
    return ReferenceGraph(neighbours, degrees, blocks, A, Q, M, B, shrinkage, n_eigenvectors, values[:n_eigenvectors])


def reference_estimands(
    ref: ReferenceGraph, models: dict[str, LinearOutcome], pi: float
) -> dict[str, dict[str, float]]:
    """Exact direct, spillover and total effects of each model by a binomial sum per unit (METHODS.md §1.4)."""
    n = len(ref.degrees)
    direct = dict.fromkeys(models, 0.0)
    spill = dict.fromkeys(models, 0.0)
    for j in range(n):
        theta = models[next(iter(models))].block_effects[ref.blocks[j]]
        N = ref.degrees[j]
        if N == 0:
            for name, model in models.items():
                direct[name] += model.mean(theta, 1, 0.0) - model.mean(theta, 0, 0.0)
            continue
        x = np.arange(N + 1) / N
        pmf = sp.stats.binom.pmf(np.arange(N + 1), N, pi)
        # Effect of switching one given neighbour on: m of the other N - 1 treated.
        pmf_rest = sp.stats.binom.pmf(np.arange(N), N - 1, pi)
        for name, model in models.items():
            direct[name] += np.sum(pmf * (model.mean(theta, 1, x) - model.mean(theta, 0, x)))
            delta = {
                w: np.sum(pmf_rest * (model.mean(theta, w, x[1:]) - model.mean(theta, w, x[:-1])))
                for w in (0, 1)
            }
            spill[name] += N * (pi * delta[1] + (1 - pi) * delta[0])
    return {
        name: {
            "direct": float(direct[name] / n),
            "spillover": float(spill[name] / n),
            "total": float((direct[name] + spill[name]) / n),
        }
        for name in models
    }


def _hajek(W: np.ndarray, Y: np.ndarray) -> tuple[float, float, list[float]]:
    n = len(W)
    treated = [Y[i] for i in range(n) if W[i] == 1]
    control = [Y[i] for i in range(n) if W[i] == 0]
    n1, n0 = len(treated), len(control)
    if n1 < 2 or n0 < 2:
        return math.nan, math.nan, [math.nan] * n
    mu1, mu0 = sum(treated) / n1, sum(control) / n0
    s1 = sum((y - mu1) ** 2 for y in treated) / (n1 - 1)
    s0 = sum((y - mu0) ** 2 for y in control) / (n0 - 1)
    share = n1 / n
    phi = [(Y[i] - mu1) / share if W[i] == 1 else -(Y[i] - mu0) / (1 - share) for i in range(n)]
    return mu1 - mu0, math.sqrt(s1 / n1 + s0 / n0), phi


def _weighted(omega: list[float], totals: np.ndarray | list[float], pi: float) -> tuple[float, float, list[float]]:
    """(1/n) sum omega_i T_i and its plug-in SE sqrt(sum T_i^2 / (n^2 pi (1 - pi)))."""
    n = len(omega)
    phi = [omega[i] * totals[i] for i in range(n)]
    variance = sum(t * t for t in totals) / (n * n * pi * (1 - pi))
    return sum(phi) / n, math.sqrt(variance), phi


def reference_estimates(
    ref: ReferenceGraph, W: np.ndarray, Y: np.ndarray, pi: float, centre: float, want: tuple[str, ...]
) -> dict[tuple[str, str, str], tuple[float, float]]:
    """The planned estimators on one assignment: {(estimand, estimator, variance): (estimate, se)}."""
    n = len(W)
    out: dict[tuple[str, str, str], tuple[float, float]] = {}
    omega = [W[i] / pi - (1 - W[i]) / (1 - pi) for i in range(n)]
    if "direct" in want or "total" in want:
        hajek = _hajek(W, Y)
        if "direct" in want:
            out[("direct", "hajek", "neyman")] = hajek[:2]
    spill = {}
    if "spillover" in want or "total" in want:
        # Centred HT: S_i = sum over neighbours of (Y_j - c) (METHODS.md §3.1).
        S = [sum(Y[j] - centre for j in ref.neighbours[i]) for i in range(n)]
        spill["centred_ht"] = _weighted(omega, S, pi)
        # Published PC-balancing (1/n) Y^T A (I - P) omega; T = (A (I - P))^T Y.
        T_plain = ref.pc_matrix.T @ Y
        spill["pc_balancing"] = _weighted(omega, T_plain, pi)
        # Corrected variant: (1/n) sum_j (Y_j / r_j) (B omega)_j; T = B^T (Y / r).
        scaled = np.array([Y[j] / ref.shrinkage[j] for j in range(n)])
        spill["pc_balancing_corrected"] = _weighted(omega, ref.corrected_matrix.T @ scaled, pi)
        if "spillover" in want:
            for name, (estimate, se, _) in spill.items():
                out[("spillover", name, "plug_in")] = (estimate, se)
    if "total" in want:
        d_est, d_se, d_phi = hajek
        for name, (s_est, s_se, s_phi) in spill.items():
            covariance = sum(d_phi[i] * s_phi[i] for i in range(n)) / n**2
            variance = d_se**2 + s_se**2 + 2 * covariance
            out[("total", f"hajek+{name}", "linearised")] = (d_est + s_est, math.sqrt(max(variance, 0.0)))
    return out


def simulate_reference_graph(
    n_units: int,
    block_shares: tuple[float, ...],
    probabilities: np.ndarray,
    outcome: LinearOutcome,
    pi: float,
    n_assignments: int,
    centre: float,
    *,
    rng: np.random.Generator,
) -> ReferenceDraws:
    """One graph and ``n_assignments`` assignments, timing each stage in ``seconds``."""
    clock = time.perf_counter()
    seconds: dict[str, float] = {}
    graph, blocks = sample_reference_graph(n_units, block_shares, probabilities, rng=rng)
    seconds["graph"] = time.perf_counter() - clock
    clock = time.perf_counter()
    ref = prepare_reference_graph(graph, blocks)
    seconds["eigen_and_pc_matrices"] = time.perf_counter() - clock
    clock = time.perf_counter()
    estimands = ("direct", "spillover", "total")
    nulls = {e: outcome.null_for(e) for e in estimands}
    exact = reference_estimands(ref, {"model": outcome, **nulls}, pi)
    draws = ReferenceDraws(
        estimands=exact["model"],
        null_estimands={e: exact[e] for e in estimands},
        n_eigenvectors=ref.n_eigenvectors,
        mean_degree=sum(ref.degrees) / n_units,
    )
    seconds["estimands"] = time.perf_counter() - clock
    clock = time.perf_counter()
    rows: dict[str, list[dict]] = {"alt": [], "null": []}
    for _ in range(n_assignments):
        W = (rng.random(n_units) < pi).astype(float)
        noise = rng.standard_normal(n_units)
        X = []
        for i in range(n_units):
            nb = ref.neighbours[i]
            X.append(sum(W[j] for j in nb) / len(nb) if nb else 0.0)

        def outcomes(model: LinearOutcome) -> np.ndarray:
            return np.array(
                [
                    model.mean(model.block_effects[blocks[i]], W[i], X[i]) + model.noise_sd * noise[i]
                    for i in range(n_units)
                ]
            )

        rows["alt"].append(reference_estimates(ref, W, outcomes(outcome), pi, centre, estimands))
        null_row = {}
        for estimand, model in nulls.items():
            found = reference_estimates(ref, W, outcomes(model), pi, centre, (estimand,))
            null_row.update({k: v for k, v in found.items() if k[0] == estimand})
        rows["null"].append(null_row)
    seconds["assignments"] = time.perf_counter() - clock
    for kind, est_target, se_target in (
        ("alt", draws.estimates, draws.standard_errors),
        ("null", draws.null_estimates, draws.null_standard_errors),
    ):
        for key in rows[kind][0]:
            est_target[key] = np.array([row[key][0] for row in rows[kind]])
            se_target[key] = np.array([row[key][1] for row in rows[kind]])
    draws.seconds = seconds
    return draws

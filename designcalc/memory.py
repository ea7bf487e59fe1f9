"""How much memory one simulated graph needs, and a clear error before a run that cannot fit.

The engine holds one graph at a time per worker: its CSR adjacency, the
estimator preparation (a few ``(n, k + 1)`` eigenvector arrays), the
assignment block (treatments, noise and covariates for every assignment of
the graph) and, while a batch of ``batch_size`` assignments is estimated, a
working set of ``(n, batch)`` arrays.  ``estimate_graph_memory`` counts
those arrays from the scenario alone (a pure function, no sampling), phase
by phase, and ``check_memory`` compares the peak with the memory the
operating system says is available, so that an impossible scenario (say
10^6 units under a fixed-density rule, about 10^11 edges) stops at once
with the numbers instead of being killed by the kernel after minutes.

The per-edge and per-cell constants below count the arrays of each phase
(see the comments); tests/test_scale.py checks the estimate against the
bytes numpy actually allocates (tracemalloc) on a small graph.
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field

import numpy as np

from designcalc.errors import DesignCalcError
from designcalc.estimators import LARGE_GRAPH_UNITS
from designcalc.scenario import Scenario

__all__ = ["MemoryEstimate", "available_memory_bytes", "check_memory", "estimate_graph_memory", "format_bytes"]

# Sampling, bytes per candidate edge alive at the sampler's peak: the drawn
# positions and their group labels (2 x 8) and the decoded pairs (2 x 8);
# kernels add the thinning arrays (bound, probability, uniforms: 3 x 8).
_SAMPLING_BYTES_PER_CANDIDATE = 32
_THINNING_BYTES_PER_CANDIDATE = 24
# Building the CSR matrix, bytes per edge (each edge is stored twice): the
# int32 row and column copies of both orientations (2 x 8), the float64 ones
# (2 x 8) and scipy's CSR output (2 x 12) overlap with the freed draws;
# measured 75 bytes per edge in all at 6 x 10^5 edges (tracemalloc).
_CSR_BYTES_PER_EDGE = 48
# A stored edge: int32 column index, float64 and float32 entries, both orientations.
_ADJACENCY_BYTES_PER_EDGE = 2 * (4 + 8 + 4)
# Per unit outside the assignment block: types, blocks, theta, degrees (int
# and float), the PC diagonal and shrinkage (7 x 8), the indptr (4).
_BYTES_PER_UNIT = 60
# ARPACK's workspace: (3k + 1) Lanczos vectors in single precision, or
# (2k + 1) in double, plus three work vectors and the returned eigenvectors
# in float64; the Gram-Schmidt step copies the basis twice more.
_GRAM_SCHMIDT_COPIES = 2
# Working set of one batch, in float64 (n, batch) arrays alive at once while
# the estimators run: treatments, noise, counts, exposure, outcomes, the
# covariate slice, residuals and an estimator's temporaries (measured peak:
# tests/test_scale.py).
_BATCH_ARRAYS = 40
_BATCH_ARRAYS_PER_COVARIATE = 6
# The exact estimands of binary outcomes use scratch arrays of at most
# estimands._CHUNK_CELLS cells per degree class, about six at once.
_BINARY_ESTIMAND_BYTES = 6 * 8 * 4_000_000
# Planned two-hop variance (n <= engine.TWO_HOP_MAX_UNITS): a dense n x n
# matrix, its eigenvectors and LAPACK's workspace.
_TWO_HOP_DENSE_COPIES = 3
_EIGEN_CAP = 10  # prepare_graph's default cap on the automatic rule
# Below this share of available memory the check passes without comment;
# the rest is left to the interpreter, other processes and fragmentation.
_USABLE_SHARE = 0.9


@dataclass(frozen=True)
class MemoryEstimate:
    """Bytes one graph of a scenario needs at ``units`` units, by phase.

    Attributes
    ----------
    units : int
        Number of units of the graph.
    expected_edges : float
        Expected number of edges (after clipping of edge probabilities).
    candidate_edges : float
        Expected number of candidate pairs drawn (equal to the edges for
        block models; kernels draw candidates under a bound and thin them).
    assignments : int
        Assignments per graph (columns of the assignment block).
    batch_columns : int
        Columns estimated at once.
    phases : dict of str to int
        Peak bytes of each phase: ``"sampling"``, ``"eigenvectors"``,
        ``"assignment block"``, ``"estimation"`` (and ``"two-hop"`` when
        planned).
    """

    units: int
    expected_edges: float
    candidate_edges: float
    assignments: int
    batch_columns: int
    phases: dict[str, int] = field(default_factory=dict)

    @property
    def peak_bytes(self) -> int:
        """The largest phase: what the graph needs at its worst moment."""
        return max(self.phases.values()) if self.phases else 0

    @property
    def peak_phase(self) -> str:
        return max(self.phases, key=self.phases.__getitem__) if self.phases else ""


def format_bytes(value: float) -> str:
    """Bytes in the largest unit that keeps the number at least 1 (``"3.2 GB"``)."""
    for unit, size in (("TB", 1e12), ("GB", 1e9), ("MB", 1e6), ("kB", 1e3)):
        if abs(value) >= size:
            return f"{value / size:.3g} {unit}"
    return f"{int(value)} B"


def _candidate_edges(scenario: Scenario, units: int, rho: float) -> float:
    """Expected candidate pairs: the edges of a block model, the thinning candidates of a kernel."""
    network = scenario.network
    pairs = units * (units - 1) / 2.0
    if network.kind != "kernel":
        return network.expected_mean_degree(units, rho) * units / 2.0
    from designcalc.networks import kernel_grid_cells

    cells = kernel_grid_cells(units)
    # Each cell pair holds (n / G)^2 node pairs (half of it on the diagonal cells).
    bounds = np.minimum(1.0, rho * network.cell_bounds(cells))
    return float(bounds.mean() * pairs)


def estimate_graph_memory(scenario: Scenario, units: int, *, batch_size: int = 16) -> MemoryEstimate:
    """Peak bytes the engine needs for one graph of ``scenario`` at ``units`` units.

    Parameters
    ----------
    scenario
        A validated scenario.
    units
        Network size n (at least 2).
    batch_size
        Assignments estimated at once (``simulate_graph``'s ``batch_size``).

    Returns
    -------
    MemoryEstimate

    Notes
    -----
    With m expected edges (the density rule and the edge model at n, after
    clipping), B assignments, b = min(B, batch_size) columns per batch, K
    covariates and q <= 12 basis columns, the phases are: sampling
    O(candidates + m); eigenvectors O(m + n q); the assignment block
    O(n B (9 + 8 K)); estimation O(m + n q + n B (9 + 8 K) + n b (40 + 6 K)).
    Only arrays are counted, not the interpreter (about 150 MB). O(1) in n
    for block models, O(G^2) for kernels (the bound grid).

    Examples
    --------
    >>> from pathlib import Path
    >>> from designcalc import load_scenario
    >>> s = load_scenario(Path(__file__).parents[1] / "scenarios" / "lake_orrin_savings.toml")
    >>> e = estimate_graph_memory(s, 1200)
    >>> round(e.expected_edges), e.peak_phase
    (6000, 'estimation')
    """
    n = int(units)
    rho = scenario.density.rho(n)
    edges = scenario.network.expected_mean_degree(n, rho) * n / 2.0
    candidates = _candidate_edges(scenario, n, rho)
    B = scenario.simulation.assignments_per_graph
    b = min(B, max(1, int(batch_size)))
    K = scenario.n_covariates
    requested = scenario.estimators.eigenvectors
    pairs_asked = min(n - 1, (_EIGEN_CAP if requested is None else requested) + 1)
    basis_columns = pairs_asked + 1

    per_candidate = _SAMPLING_BYTES_PER_CANDIDATE + (_THINNING_BYTES_PER_CANDIDATE if scenario.network.kind == "kernel" else 0)
    sampling = per_candidate * candidates + _CSR_BYTES_PER_EDGE * edges + 16 * n
    adjacency = _ADJACENCY_BYTES_PER_EDGE * edges + _BYTES_PER_UNIT * n
    single = n >= LARGE_GRAPH_UNITS
    lanczos = (3 * pairs_asked + 1) * 4 * n if single else (2 * pairs_asked + 1) * 8 * n
    basis = 8 * n * basis_columns * (2 + _GRAM_SCHMIDT_COPIES)  # basis, A Q and the copies
    # The symmetry check builds the transpose (int32 + float64 per stored entry).
    eigenvectors = adjacency + max(lanczos + 8 * n * pairs_asked + 24 * n + basis, 24 * edges)
    prepared = adjacency + 8 * n * basis_columns * 2
    block = n * B * (1 + 8 + 8 * K)  # bool treatments, float64 noise and covariates
    drawing = 8 * n * B * K  # the covariates' own noise while they are drawn
    working = 8 * n * b * (_BATCH_ARRAYS + _BATCH_ARRAYS_PER_COVARIATE * K)
    if scenario.outcome.kind != "continuous":
        working += _BINARY_ESTIMAND_BYTES
    phases = {
        "sampling": int(sampling),
        "eigenvectors": int(eigenvectors),
        "assignment block": int(prepared + block + drawing),
        "estimation": int(prepared + block + working),
    }
    from designcalc.engine import TWO_HOP_MAX_UNITS  # engine imports this module

    if "two_hop" in scenario.estimators.direct_variance and n <= TWO_HOP_MAX_UNITS:
        # (I + A)^2 holds about n d^2 entries; its dense copy and eigendecomposition n^2 each.
        two_hop_entries = min(n * n, n * (1 + 2 * edges / max(n, 1)) ** 2)
        phases["two-hop"] = int(prepared + 12 * two_hop_entries + _TWO_HOP_DENSE_COPIES * 8 * n * n)
    return MemoryEstimate(n, edges, candidates, B, b, phases)


def available_memory_bytes() -> int | None:
    """Memory the operating system can give this process now, or None when it cannot say.

    Reads ``MemAvailable`` from ``/proc/meminfo`` (Linux, kernel 3.14 and
    later: free memory plus what can be reclaimed from caches); elsewhere
    falls back to the free physical pages (``os.sysconf``), which
    underestimates.
    """
    try:
        with open("/proc/meminfo", encoding="ascii") as meminfo:
            for line in meminfo:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        pass
    try:
        return int(os.sysconf("SC_AVPHYS_PAGES")) * int(os.sysconf("SC_PAGE_SIZE"))
    except (ValueError, OSError, AttributeError):
        return None


def check_memory(
    scenario: Scenario, units: int, *, batch_size: int = 16, available: int | None = None, workers: int = 1
) -> MemoryEstimate:
    """Raise ``DesignCalcError`` when one graph at ``units`` units would not fit in memory.

    Parameters
    ----------
    scenario
        A validated scenario.
    units
        Network size n.
    batch_size
        Assignments estimated at once.
    available
        Available bytes; read from the operating system when omitted (if it
        cannot say, the check passes).
    workers
        Graphs simulated at the same time on this machine (local worker
        processes); each gets an equal share of ``available``.

    Returns
    -------
    MemoryEstimate
        The estimate, when it fits.

    Raises
    ------
    DesignCalcError
        The message names the scenario's file and the keys that drive the
        need (``population.units``, ``network.density``,
        ``simulation.assignments_per_graph``), the estimated bytes and the
        available bytes, and what to change.
    """
    estimate = estimate_graph_memory(scenario, units, batch_size=batch_size)
    if available is None:
        available = available_memory_bytes()
    if available is None or estimate.peak_bytes * max(1, workers) <= _USABLE_SHARE * available:
        return estimate
    density = scenario.density
    phase = estimate.peak_phase
    if scenario.network.kind == "surveyed" and phase in ("sampling", "eigenvectors"):
        cause = f"the surveyed network has about {estimate.expected_edges:.3g} ties ({', '.join(scenario.network.files)})"
        fix = "plan on a part of the survey (fewer villages in network.edges), or fit an edge model (designcalc fit) and plan smaller networks"
    elif phase in ("sampling", "eigenvectors") or estimate.expected_edges * 40 > estimate.peak_bytes / 2:
        cause = (
            f"the network has about {estimate.expected_edges:.3g} edges (network.density: mean_degree = "
            f"{density.mean_degree:g} at reference_units = {density.reference_units}, growth_exponent = "
            f"{density.growth_exponent:g}, so mean degree {density.target_mean_degree(units):.4g} at this size)"
        )
        fix = "plan fewer units (population.units) or a sparser density rule (lower network.density.growth_exponent or mean_degree)"
    elif phase == "two-hop":
        cause = "the eigen-clipped two-hop variance needs a dense n x n eigendecomposition"
        fix = 'drop "two_hop" from estimators.direct_variance (two_hop_psd works at any size)'
    else:
        cause = (
            f"every graph holds {estimate.assignments} assignments' treatments, noise"
            f"{' and covariates' if scenario.n_covariates else ''} (simulation.assignments_per_graph = {estimate.assignments})"
        )
        fix = "lower simulation.assignments_per_graph (and raise simulation.graphs to keep the replicates)"
    if workers > 1:
        share = f"{format_bytes(available)} are available to {workers} worker processes ({format_bytes(available // workers)} each)"
        fix += ", or fewer workers (--workers)"
    else:
        share = f"{format_bytes(available)} are available"
    raise DesignCalcError(
        f"{scenario.source}: population.units = {units}: one graph needs about {format_bytes(estimate.peak_bytes)} "
        f"of memory ({phase}) but {share}; {cause}. Fix: {fix}."
    )

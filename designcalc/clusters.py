"""Clustered populations: many independent networks (villages, schools, wards).

A clustered population is K clusters; each cluster's network is drawn
independently from the scenario's edge model with the density rule applied
at the cluster's own size, and there are no edges between clusters (partial
interference, METHODS.md §5.1).  The engine simulates the disjoint union: the
clusters' units are contiguous, in cluster order, so every network estimator
runs on the union unchanged and every exposure is within a cluster.

Random streams (family 4 of ``engine``'s layout): cluster c of graph g draws
its size, its types and its edges from the children of the key
(4, size key, g, c), where the size key is the cluster size a solver imposes
(0 for the scenario's own size rule).  The number of clusters is not in the
key, so the first 20 clusters of a 40-cluster population are the 20 clusters
of a 20-cluster one (common random numbers across cluster counts).

A cluster random effect (``[outcome] cluster_icc``) adds v_c ~ N(0, s_v^2) to
every outcome in cluster c, drawn afresh for every assignment (a new sample
of clusters' circumstances, as the design effect of Kish 1965 assumes).  The
ICC rho is stated against the untreated outcome's variance between units
within a cluster, sigma_w^2 = noise_sd^2 + Var_u(theta(u)), so
s_v^2 = rho / (1 - rho) * sigma_w^2 and rho = s_v^2 / (s_v^2 + sigma_w^2).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy as sp
import scipy.sparse

from designcalc.density import DensityRule
from designcalc.edge_models import BlockModel, EdgeModel
from designcalc.errors import DesignCalcError
from designcalc.networks import SampledNetwork, kernel_grid_cells, sample_network
from designcalc.outcomes import OutcomeModel

__all__ = ["MAX_CLUSTERS", "ClusterSizes", "cluster_effect_sd", "cluster_starts", "sample_clustered_network", "within_cluster_sd"]

MAX_CLUSTERS = 100_000
_SIZE_KINDS = ("fixed", "list", "normal", "uniform")


@dataclass(frozen=True)
class ClusterSizes:
    """How big each cluster is.

    ``kind`` is ``"fixed"`` (every cluster ``size`` units), ``"list"`` (the
    clusters' sizes stated one by one in ``sizes``; the number of clusters is
    then fixed), ``"normal"`` (a normal with ``mean`` and ``sd``, rounded to
    whole units and redrawn until inside [``low``, ``high``]) or
    ``"uniform"`` (whole numbers from ``low`` to ``high``, equally likely).
    Drawn sizes are drawn per cluster and graph, from the cluster's own stream.
    """

    kind: str = "fixed"
    size: int = 0
    sizes: tuple[int, ...] = ()
    mean: float = 0.0
    sd: float = 0.0
    low: int = 4
    high: int = 0

    def __post_init__(self) -> None:
        if self.kind not in _SIZE_KINDS:
            raise DesignCalcError(f"cluster size kind must be one of {_SIZE_KINDS}; got {self.kind!r}")

    @property
    def nominal(self) -> float:
        """The mean cluster size (what ``units`` of a clustered design point is counted in)."""
        if self.kind == "fixed":
            return float(self.size)
        if self.kind == "list":
            return float(np.mean(self.sizes))
        if self.kind == "uniform":
            return (self.low + self.high) / 2.0
        return float(self.mean)

    @property
    def smallest(self) -> int:
        """The smallest size a cluster can have (the density rule must fit it)."""
        if self.kind == "fixed":
            return self.size
        if self.kind == "list":
            return min(self.sizes)
        return self.low

    @property
    def largest(self) -> int:
        if self.kind == "fixed":
            return self.size
        if self.kind == "list":
            return max(self.sizes)
        return self.high

    def draw(self, index: int, rng: np.random.Generator) -> int:
        """The size of cluster ``index``, from its own size stream ``rng``."""
        if self.kind == "fixed":
            return self.size
        if self.kind == "list":
            return self.sizes[index]
        if self.kind == "uniform":
            return int(rng.integers(self.low, self.high + 1))
        for _ in range(10_000):
            size = int(np.floor(self.mean + self.sd * rng.standard_normal() + 0.5))
            if self.low <= size <= self.high:
                return size
        raise DesignCalcError(f"cluster sizes: a normal with mean {self.mean:g} and sd {self.sd:g} almost never falls in [{self.low}, {self.high}]")

    def describe(self) -> str:
        if self.kind == "fixed":
            return f"{self.size} units each"
        if self.kind == "list":
            return f"sizes stated one by one ({min(self.sizes)} to {max(self.sizes)}, mean {self.nominal:.4g})"
        if self.kind == "uniform":
            return f"sizes drawn uniformly from {self.low} to {self.high}"
        return f"sizes drawn from a normal (mean {self.mean:g}, sd {self.sd:g}) kept within [{self.low}, {self.high}]"


def cluster_starts(sizes: np.ndarray) -> np.ndarray:
    """First unit of each cluster in the union (units are contiguous by cluster)."""
    starts = np.zeros(len(sizes), dtype=np.int64)
    np.cumsum(np.asarray(sizes, dtype=np.int64)[:-1], out=starts[1:])
    return starts


def _cluster_streams(entropy: int, size_key: int, graph_index: int, cluster: int) -> tuple[np.random.Generator, ...]:
    seq = np.random.SeedSequence(entropy, spawn_key=(4, size_key, graph_index, cluster))
    return tuple(np.random.default_rng(s) for s in seq.spawn(3))  # size, types, graph


def sample_clustered_network(
    model: EdgeModel,
    rule: DensityRule,
    sizes_rule: ClusterSizes,
    clusters: int,
    *,
    entropy: int,
    graph_index: int,
    cluster_size: int = 0,
) -> SampledNetwork:
    """Draw ``clusters`` independent networks and return their disjoint union.

    ``cluster_size`` > 0 makes every cluster that size (a solver's search
    over cluster sizes); 0 uses ``sizes_rule``.  Each cluster's density is
    the rule's at the cluster's own size.  The result's ``cluster_sizes``
    gives the clusters in order; block labels are the edge model's blocks.
    """
    if clusters < 1:
        raise DesignCalcError(f"a clustered population needs at least one cluster; got {clusters}")
    adjacencies, types, blocks, sizes = [], [], [], []
    bounds_by_size: dict[int, np.ndarray] = {}
    for c in range(clusters):
        size_rng, types_rng, graph_rng = _cluster_streams(entropy, cluster_size, graph_index, c)
        m = cluster_size if cluster_size > 0 else sizes_rule.draw(c, size_rng)
        bounds = None
        if model.kind == "kernel":
            if m not in bounds_by_size:
                bounds_by_size[m] = model.cell_bounds(kernel_grid_cells(m))
            bounds = bounds_by_size[m]
        net = sample_network(model, rule, m, types_rng=types_rng, graph_rng=graph_rng, cell_bounds=bounds)
        adjacencies.append(net.adjacency)
        types.append(net.types)
        if net.blocks is not None:
            blocks.append(net.blocks)
        sizes.append(m)
    adjacency = sp.sparse.block_diag(adjacencies, format="csr")
    adjacency = sp.sparse.csr_array(adjacency)
    adjacency.indices = adjacency.indices.astype(np.int32, copy=False)
    adjacency.indptr = adjacency.indptr.astype(np.int32 if adjacency.nnz < 2**31 else np.int64, copy=False)
    return SampledNetwork(
        adjacency,
        np.concatenate(types),
        np.concatenate(blocks) if blocks else None,
        cluster_sizes=np.asarray(sizes, dtype=np.int64),
    )


def within_cluster_sd(outcome: OutcomeModel, network: EdgeModel, grid: int = 20_000) -> float:
    """SD of the untreated outcome between units of one cluster: noise and type heterogeneity.

    Types are iid U(0, 1) within every cluster, so the type part is
    Var_u(theta(u)), computed on a midpoint grid of u (deterministic).
    """
    u = (np.arange(grid) + 0.5) / grid
    blocks = network.block_of(u) if isinstance(network, BlockModel) else None
    theta = outcome.type_values(u, blocks if outcome.block_effects else None)
    mean = outcome.mean_outcome(theta, np.zeros_like(u), np.zeros_like(u))
    return float(np.sqrt(np.var(mean) + outcome.noise_sd**2))


def cluster_effect_sd(outcome: OutcomeModel, network: EdgeModel, icc: float) -> float:
    """s_v of the cluster random effect for intracluster correlation ``icc`` (module docstring)."""
    if not 0.0 <= icc < 1.0:
        raise DesignCalcError(f"cluster_icc must be in [0, 1); got {icc}")
    if icc == 0.0:
        return 0.0
    return float(np.sqrt(icc / (1.0 - icc)) * within_cluster_sd(outcome, network))

"""Draw one network from a scenario's edge model and density rule.

Glue between the edge models (what g is), the density rule (how dense at n)
and the exact samplers in ``graphs``.  Types and the graph come from separate
random streams so that changing the sampler never shifts the types.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy as sp

from designcalc.density import DensityRule
from designcalc.edge_models import BlockModel, EdgeModel
from designcalc.graphs import sample_block_graph, sample_kernel_graph
from designcalc.surveyed import SurveyedNetwork

__all__ = ["SampledNetwork", "sample_network", "kernel_grid_cells"]


@dataclass(frozen=True, eq=False)
class SampledNetwork:
    """A simulated network: adjacency, latent types (sorted) and block labels.

    ``cluster_sizes`` is set for a clustered population (``designcalc.clusters``):
    the sizes of its clusters, whose units are contiguous in this order.
    """

    adjacency: sp.sparse.csr_array
    types: np.ndarray
    blocks: np.ndarray | None
    cluster_sizes: np.ndarray | None = None

    @property
    def degrees(self) -> np.ndarray:
        return np.diff(self.adjacency.indptr).astype(np.int64)


def kernel_grid_cells(n_units: int) -> int:
    """Cells per axis of the kernel bound grid: finer for larger n keeps acceptance high."""
    return int(np.clip(np.sqrt(n_units) / 4, 4, 48))


def sample_network(
    model: EdgeModel,
    rule: DensityRule,
    n_units: int,
    *,
    types_rng: np.random.Generator,
    graph_rng: np.random.Generator,
    cell_bounds: np.ndarray | None = None,
) -> SampledNetwork:
    """Draw types u ~ U(0, 1) and a graph with edge probabilities min(1, rho_n g).

    Units are ordered by type (they are exchangeable), so a block model's
    blocks are contiguous.  O(n + edges).
    """
    if isinstance(model, SurveyedNetwork):
        # The surveyed graph itself, every time; only the types are drawn (graph_rng is not used).
        return SampledNetwork(model.adjacency, model.draw_types(types_rng), model.villages)
    rho = rule.rho(n_units)
    types = np.sort(types_rng.random(n_units))
    if isinstance(model, BlockModel):
        blocks = model.block_of(types)
        sizes = np.bincount(blocks, minlength=model.n_blocks)
        probabilities = np.minimum(1.0, rho * model.normalised_matrix())
        adjacency = sample_block_graph(sizes, probabilities, rng=graph_rng)
        return SampledNetwork(adjacency, types, blocks)
    if cell_bounds is None:
        cell_bounds = model.cell_bounds(kernel_grid_cells(n_units))
    bounds = np.minimum(1.0, rho * cell_bounds)

    def probability(u: np.ndarray, v: np.ndarray) -> np.ndarray:
        return np.minimum(1.0, rho * model.kernel(u, v))

    adjacency = sample_kernel_graph(types, probability, bounds, rng=graph_rng)
    return SampledNetwork(adjacency, types, None)

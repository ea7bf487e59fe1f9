"""A surveyed network as the study population: the graph is held fixed, only types, assignments and noise are random.

This is the design-based view for a study whose network is already mapped
(a baseline survey, a pilot): every simulated "graph" of a design point is
the same network; what varies between graph indices is the units' latent
types (when ``types = "random"``) and, as always, the assignments and the
outcome noise.  Several edge-list files are several villages: the network is
their disjoint union, and each village is a block (so ``block_effects`` are
village effects).

Latent types follow the block-model convention of the rest of the tool:
village k owns the interval of u from the cumulative share of the villages
before it, and a unit's type is drawn uniformly within its village's
interval (``"random"``) or placed by its degree rank within the village
(``"degree_rank"``, fixed: the type is anchored to degree, METHODS.md §6.4).
Either way ``block_of(u)`` gives the unit's village, so an outcome's
``type_effect`` and ``block_effects`` mean what they mean for a block model.
"""

from __future__ import annotations

import hashlib
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import scipy as sp
import scipy.sparse
import scipy.sparse.linalg

from designcalc.edgelist import read_edge_list_file
from designcalc.errors import DesignCalcError

__all__ = ["SurveyedNetwork", "load_surveyed_network", "TYPE_RULES"]

#: How latent types are placed on a surveyed network (module docstring).
TYPE_RULES = ("random", "degree_rank")


@dataclass(frozen=True, eq=False)
class SurveyedNetwork:
    """A fixed, observed network (module docstring).

    Attributes
    ----------
    sha256
        Of the edge-list files' bytes, in order: what the numbers depend on
        (part of the results store's fingerprint, and of the provenance).
    village_sizes
        Units in each village (one per file), in file order.
    types
        ``"random"`` or ``"degree_rank"``.
    files, adjacency, notes
        The files as named, the symmetric CSR adjacency (int32 indices; the
        villages as diagonal blocks), and what the reader dropped or merged.
    weights
        Tie weights with the adjacency's sparsity pattern when every file
        has a weight column, else None.
    """

    sha256: str
    village_sizes: tuple[int, ...]
    types: str = "random"
    files: tuple[str, ...] = field(default=(), repr=False)
    adjacency: sp.sparse.csr_array | None = field(default=None, repr=False)
    notes: tuple[str, ...] = field(default=(), repr=False)
    # The bytes that were read (their SHA-256 is ``sha256``): a report copies them beside the scenario.
    file_bytes: tuple[bytes, ...] = field(default=(), repr=False)
    # Tie weights (the edge lists' third column) with the adjacency's pattern, when every file has them;
    # only a measurement model's "strongest" cap reads them (designcalc.measurement).
    weights: sp.sparse.csr_array | None = field(default=None, repr=False)
    kind: str = field(default="surveyed", init=False)

    @property
    def n_units(self) -> int:
        return int(sum(self.village_sizes))

    @property
    def n_blocks(self) -> int:
        return len(self.village_sizes)

    @property
    def shares(self) -> tuple[float, ...]:
        return tuple(size / self.n_units for size in self.village_sizes)

    @property
    def degrees(self) -> np.ndarray:
        assert self.adjacency is not None
        return np.diff(self.adjacency.indptr).astype(np.int64)

    @property
    def villages(self) -> np.ndarray:
        """Village (block) of every unit, in the adjacency's order."""
        return np.repeat(np.arange(self.n_blocks), self.village_sizes)

    def block_of(self, u: np.ndarray) -> np.ndarray:
        """The village whose interval of u holds each type (as ``BlockModel.block_of``)."""
        edges = np.cumsum(self.shares)[:-1]
        return np.searchsorted(edges, np.asarray(u, dtype=float), side="right")

    def draw_types(self, rng: np.random.Generator) -> np.ndarray:
        """Latent types of the units: uniform within their village's interval, or by degree rank (then ``rng`` is not used)."""
        starts = np.concatenate([[0.0], np.cumsum(self.shares)[:-1]])
        village = self.villages
        if self.types == "random":
            position = rng.random(self.n_units)
        else:
            # Mid-rank of each unit's degree within its village, ties averaged: a fixed, degree-anchored type.
            position = np.empty(self.n_units)
            first = 0
            degrees = self.degrees
            for size in self.village_sizes:
                block = slice(first, first + size)
                position[block] = (sp.stats.rankdata(degrees[block]) - 0.5) / size
                first += size
        return starts[village] + position * np.asarray(self.shares)[village]

    def mean_degree(self) -> float:
        """Mean number of ties per unit."""
        return float(self.degrees.mean()) if self.n_units else 0.0

    def share_isolated(self) -> float:
        """Share of units with no tie."""
        return float(np.mean(self.degrees == 0)) if self.n_units else 0.0

    def leading_eigenvalues(self, count: int = 6) -> np.ndarray:
        """Largest adjacency eigenvalues of the surveyed network (descending); a sparse solver, the network is fixed."""
        assert self.adjacency is not None
        n = self.n_units
        k = min(count, n - 2)
        if k < 1:
            return np.zeros(0)
        if n <= 600:
            values = np.linalg.eigvalsh(self.adjacency.toarray())[::-1]
            return values[:count]
        values = sp.sparse.linalg.eigsh(self.adjacency.astype(float), k=k, which="LA", return_eigenvectors=False, tol=1e-8)
        return np.sort(values)[::-1]

    # What `designcalc check` asks of an edge model, answered from the network itself
    # (the density rule of a surveyed scenario is the observed one, so rho x 1 is the observed density).
    def expected_mean_degree(self, n_units: int, rho: float) -> float:
        """The observed mean degree (the network is fixed; the arguments are an edge model's)."""
        return self.mean_degree()

    def max_value(self) -> float:
        """1: rho (the observed density) times it is the density ``check`` shows."""
        return 1.0

    def expected_adjacency_eigenvalues(self, n_units: int, rho: float) -> np.ndarray:
        """The surveyed adjacency's own leading eigenvalues."""
        return self.leading_eigenvalues()

    def describe(self) -> str:
        where = ", ".join(self.files) if self.files else "an edge list"
        villages = f" in {self.n_blocks} villages ({', '.join(str(s) for s in self.village_sizes)} units)" if self.n_blocks > 1 else ""
        anchor = "types drawn at random for each simulated replicate" if self.types == "random" else "types anchored to degree rank"
        return (
            f"surveyed network {where}: {self.n_units} units{villages}, mean degree {self.mean_degree():.3g}, held fixed; {anchor}"
        )


def load_surveyed_network(paths: Sequence[str | Path], *, types: str = "random", names: Sequence[str] | None = None) -> SurveyedNetwork:
    """Read one edge-list file per village and join them into one fixed network.

    Parameters
    ----------
    paths
        The edge-list files (``designcalc.edgelist`` format), one per village.
    types
        One of ``TYPE_RULES``.
    names
        The files as the scenario names them (for messages); default the paths.

    Raises
    ------
    DesignCalcError
        From the reader (naming file and line), or when the network is too
        small to plan on.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> folder = pathlib.Path(tempfile.mkdtemp())
    >>> _ = (folder / "north.csv").write_text("a,b\\n1,2\\n2,3\\n3,4\\n4,1\\n")
    >>> _ = (folder / "south.csv").write_text("a,b\\n7,8\\n8,9\\n9,7\\n9,10\\n")
    >>> network = load_surveyed_network([folder / "north.csv", folder / "south.csv"])
    >>> network.village_sizes, network.n_blocks, network.mean_degree()
    ((4, 4), 2, 2.0)
    """
    if types not in TYPE_RULES:
        raise DesignCalcError(f"types must be one of {', '.join(TYPE_RULES)}; got {types!r}")
    names = [str(p) for p in paths] if names is None else list(names)
    digest = hashlib.sha256()
    blocks, sizes, notes, contents, weight_blocks = [], [], [], [], []
    for path, name in zip(paths, names):
        edges, raw = read_edge_list_file(path)  # the hash and the report's copy are of the bytes parsed
        contents.append(raw)
        digest.update(contents[-1])
        digest.update(b"\0")  # file boundaries matter: two villages are not one
        if edges.n_units < 4:
            raise DesignCalcError(f"{name}: only {edges.n_units} units; a surveyed network needs at least 4")
        blocks.append(edges.adjacency)
        weight_blocks.append(edges.weights)
        sizes.append(edges.n_units)
        summary = edges.summary
        for label, count in (("self ties dropped", summary.n_self_ties), ("repeated ties merged", summary.n_duplicate_lines), ("zero-weight lines dropped", summary.n_zero_weight_lines)):
            if count:
                notes.append(f"{name}: {count} {label}")
    adjacency = sp.sparse.csr_array(sp.sparse.block_diag(blocks, format="csr"))
    adjacency.sum_duplicates()  # canonical CSR (sorted, no repeats), as the engine's own samplers build it
    adjacency.indices = adjacency.indices.astype(np.int32)
    adjacency.indptr = adjacency.indptr.astype(np.int32 if adjacency.nnz < 2**31 else np.int64)
    weights = None
    if all(w is not None for w in weight_blocks):
        weights = sp.sparse.csr_array(sp.sparse.block_diag(weight_blocks, format="csr"))
        weights.sum_duplicates()
        weights.indices = weights.indices.astype(np.int32)
        weights.indptr = weights.indptr.astype(adjacency.indptr.dtype)
        if weights.nnz != adjacency.nnz or not np.array_equal(weights.indices, adjacency.indices):
            weights = None  # a zero weight vanished in the join: fall back to random strengths rather than misalign
    return SurveyedNetwork(
        digest.hexdigest(), tuple(sizes), types, tuple(names), adjacency, tuple(notes), tuple(contents), weights=weights
    )

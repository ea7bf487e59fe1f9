"""Fitting the scenario's block model to one observed network, and checking the fit.

The pipeline of METHODS.md §6.3:

1. choose the number of blocks K by the Bethe-Hessian rule (Saade,
   Krzakala & Zdeborová 2014; Le & Levina 2022) unless the user gives K;
2. cluster the nodes by regularised spectral clustering (Qin & Rohe 2013):
   the K leading eigenvectors of D_tau^-1/2 A D_tau^-1/2 with
   D_tau = D + tau I, tau = the mean degree, rows scaled to unit length,
   then k-means (Lloyd's algorithm, k-means++ starts, fixed seed);
3. estimate the shares n_k / n and the block-pair edge densities
   p_kl = ties_kl / pairs_kl, and write them in the scenario's convention
   (an affinity matrix whose ratios matter and a density rule that sets the
   level) so that the scenario sampler, at the observed n, draws each pair
   with exactly probability p_kl;
4. posterior-predictive check: simulate graphs from the fit with the
   project's own sampler and compare degrees, clustering, isolates and
   two-hop neighbourhoods with the observed network.

Everything here is a pure function of the adjacency matrix and a seed.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import scipy as sp

from designcalc._version import __version__
from designcalc.density import DensityRule
from designcalc.edge_models import BlockModel
from designcalc.edgelist import EdgeList
from designcalc.errors import DesignCalcError
from designcalc.networks import sample_network
from designcalc.power import CAUTIONS as _POWER_CAUTIONS

__all__ = [
    "BLOCK_CAP",
    "CAUTIONS",
    "DEFAULT_SEED",
    "BlockFit",
    "GoodnessOfFit",
    "NetworkFit",
    "NetworkStatistics",
    "StatisticCheck",
    "bethe_hessian_count",
    "fit_block_model",
    "fit_network",
    "fragment_toml",
    "goodness_of_fit",
    "network_statistics",
    "transitivity",
    "two_hop_sizes",
]

#: The most blocks the Bethe-Hessian rule may choose (and ``n_blocks`` may ask for).
BLOCK_CAP = 12
#: The root seed ``designcalc fit`` uses unless told otherwise.
DEFAULT_SEED = 20260815

CAUTIONS: tuple[str, ...] = (
    (
        "One observed network cannot identify how the mean degree grows with study size; "
        "the fragment's growth_exponent = 0 is an assumption to replace with your own."
    ),
    "The fitted blocks are clusters of this network, not known groups; label them only after checking who is in them.",
) + _POWER_CAUTIONS

# Dense eigen-solvers below this size: exact, deterministic and fast enough.
_DENSE_MAX_UNITS = 600
_EIGSH_TOLERANCE = 1e-10
_KMEANS_STARTS = 10
_KMEANS_MAX_ITERATIONS = 300
# Warnings of the goodness-of-fit check (see goodness_of_fit, Notes).
_DEGREE_KS_LEVEL = 0.01
_MISFIT_SDS = 3.0
_CLUSTERING_RATIO = 2.0


# ---------------------------------------------------------------- statistics


@dataclass(frozen=True)
class NetworkStatistics:
    """The summaries the posterior-predictive check compares (METHODS.md §6.3 step 5)."""

    n_units: int
    n_ties: int
    mean_degree: float
    degree_variance: float
    transitivity: float
    share_isolated: float
    mean_two_hop: float

    def to_dict(self) -> dict[str, float | int]:
        return dict(self.__dict__)


def _checked_adjacency(adjacency: object) -> sp.sparse.csr_array:
    try:
        matrix = sp.sparse.csr_array(adjacency)
    except (TypeError, ValueError) as exc:
        raise DesignCalcError(f"`adjacency` must be a square sparse 0/1 matrix; {exc}") from None
    if matrix.ndim != 2 or matrix.shape[0] != matrix.shape[1]:
        raise DesignCalcError(f"`adjacency` must be square; got shape {matrix.shape}")
    matrix = matrix.copy()
    matrix.sum_duplicates()
    matrix.eliminate_zeros()
    if matrix.nnz and not np.all(matrix.data == 1):
        raise DesignCalcError("`adjacency` must hold 0/1 entries (use the edge list's adjacency, not its weights)")
    if matrix.diagonal().any():
        raise DesignCalcError("`adjacency` must have a zero diagonal (no self ties)")
    if (matrix != matrix.T).nnz:
        raise DesignCalcError("`adjacency` must be symmetric (an undirected network)")
    matrix.sort_indices()
    return matrix


def transitivity(adjacency: sp.sparse.csr_array) -> float:
    """Global clustering coefficient: closed share of connected triples.

    Parameters
    ----------
    adjacency
        Symmetric 0/1 sparse adjacency matrix with a zero diagonal.

    Returns
    -------
    float
        trace(A^3) / sum_i d_i (d_i - 1); 0 when no node has two neighbours
        (networkx's convention).

    Notes
    -----
    trace(A^3) is six times the triangle count and sum_i d_i (d_i - 1) twice
    the number of connected triples, so this is networkx's
    3 x triangles / triples.  trace(A^3) = sum of the entries of (A A) * A,
    which needs A^2 only on the ties: O(sum_i d_i^2).

    Examples
    --------
    >>> import numpy as np
    >>> from designcalc.graphs import to_csr
    >>> triangle_and_tail = to_csr(4, np.array([0, 1, 2, 2]), np.array([1, 2, 0, 3]))
    >>> round(transitivity(triangle_and_tail), 6)
    0.6
    """
    matrix = sp.sparse.csr_array(adjacency)
    d = np.diff(matrix.indptr).astype(float)
    triples = float(np.sum(d * (d - 1)))
    if triples == 0:
        return 0.0
    closed = float(((matrix @ matrix) * matrix).sum())
    return closed / triples


def two_hop_sizes(adjacency: sp.sparse.csr_array) -> np.ndarray:
    """Number of other nodes within two steps of each node (neighbours and their neighbours).

    Parameters
    ----------
    adjacency
        Symmetric 0/1 sparse adjacency matrix with a zero diagonal.

    Returns
    -------
    numpy.ndarray
        int64 array of length n.

    Notes
    -----
    The non-zeros of row i of A + A^2 are the nodes at distance 1 or 2 and,
    when i has a neighbour, i itself (A^2_ii = d_i); O(sum_i d_i^2).

    Examples
    --------
    >>> import numpy as np
    >>> from designcalc.graphs import to_csr
    >>> two_hop_sizes(to_csr(4, np.array([0, 1, 2]), np.array([1, 2, 3]))).tolist()
    [2, 3, 3, 2]
    """
    matrix = sp.sparse.csr_array(adjacency)
    reach = matrix + matrix @ matrix
    has_neighbour = np.diff(matrix.indptr) > 0
    return (np.diff(reach.indptr) - has_neighbour).astype(np.int64)


def network_statistics(adjacency: sp.sparse.csr_array) -> NetworkStatistics:
    """Degree mean and variance, transitivity, share of isolates and mean two-hop size of one network.

    Parameters
    ----------
    adjacency
        Symmetric 0/1 sparse adjacency matrix with a zero diagonal.

    Returns
    -------
    NetworkStatistics
        ``degree_variance`` is the population variance of the degrees (divisor n).

    Examples
    --------
    >>> import numpy as np
    >>> from designcalc.graphs import to_csr
    >>> s = network_statistics(to_csr(4, np.array([0, 1, 2]), np.array([1, 2, 0])))
    >>> s.mean_degree, s.transitivity, s.share_isolated
    (1.5, 1.0, 0.25)
    """
    matrix = sp.sparse.csr_array(adjacency)
    n = int(matrix.shape[0])
    d = np.diff(matrix.indptr).astype(float)
    return NetworkStatistics(
        n_units=n,
        n_ties=int(matrix.nnz // 2),
        mean_degree=float(d.mean()) if n else 0.0,
        degree_variance=float(d.var()) if n else 0.0,
        transitivity=transitivity(matrix),
        share_isolated=float(np.mean(d == 0)) if n else 0.0,
        mean_two_hop=float(two_hop_sizes(matrix).mean()) if n else 0.0,
    )


# ---------------------------------------------------------------- choosing K


def _start_vector(n: int) -> np.ndarray:
    # A fixed, generic Lanczos start (a Weyl sequence) keeps eigsh deterministic without a random draw.
    return 0.5 + np.mod(np.arange(1, n + 1) * 0.6180339887498949, 1.0)


def _smallest_eigenvalues(matrix: sp.sparse.csr_array, count: int) -> np.ndarray:
    n = matrix.shape[0]
    if n <= _DENSE_MAX_UNITS or count >= n - 1:
        return np.linalg.eigvalsh(matrix.toarray())[:count]
    values = sp.sparse.linalg.eigsh(matrix, k=count, which="SA", tol=_EIGSH_TOLERANCE, v0=_start_vector(n), return_eigenvectors=False)
    return np.sort(values)


def bethe_hessian_count(adjacency: sp.sparse.csr_array, *, cap: int = BLOCK_CAP) -> tuple[int, float, np.ndarray]:
    """Number of communities: the negative eigenvalues of the Bethe-Hessian matrix.

    Parameters
    ----------
    adjacency
        Symmetric 0/1 sparse adjacency matrix with a zero diagonal.
    cap
        The largest count returned.

    Returns
    -------
    count : int
        min(cap, #{negative eigenvalues of H(r)}), and at least 1.
    r : float
        The parameter used, r = sqrt(sum d_i^2 / sum d_i - 1).
    eigenvalues : numpy.ndarray
        The cap + 1 smallest eigenvalues of H(r), in increasing order.

    Notes
    -----
    H(r) = (r^2 - 1) I - r A + D.  Below the detectability threshold its
    spectrum is non-negative; each community structure the
    non-backtracking operator can detect gives one negative eigenvalue
    (Saade, Krzakala & Zdeborová 2014).  r is the square root of the
    non-backtracking spectral radius estimate sum d^2 / sum d - 1, which
    accounts for degree heterogeneity (the "BHm" choice of Le & Levina 2022,
    from memory).  When that estimate is at most 1 the graph is below the
    giant-component threshold and the rule returns 1.  Cost: one sparse
    eigen-solve for cap + 1 eigenvalues.

    References
    ----------
    Saade, A., Krzakala, F. & Zdeborová, L. (2014). Spectral clustering of
    graphs with the Bethe Hessian. NeurIPS 27.
    Le, C. M. & Levina, E. (2022). Estimating the number of communities by
    spectral methods. Electronic Journal of Statistics 16, 3315-3342.

    Examples
    --------
    >>> import numpy as np
    >>> from designcalc.graphs import sample_block_graph
    >>> p = np.array([[0.2, 0.01], [0.01, 0.2]])
    >>> a = sample_block_graph([150, 150], p, rng=np.random.default_rng(4))
    >>> bethe_hessian_count(a)[0]
    2
    """
    matrix = sp.sparse.csr_array(adjacency, dtype=float)
    n = matrix.shape[0]
    d = np.diff(matrix.indptr).astype(float)
    if d.sum() == 0:
        return 1, math.nan, np.zeros(0)
    radius = float((d**2).sum() / d.sum() - 1.0)
    if radius <= 1.0:
        return 1, math.sqrt(max(radius, 0.0)), np.zeros(0)
    r = math.sqrt(radius)
    hessian = (sp.sparse.identity(n, format="csr") * (r * r - 1.0) - r * matrix + sp.sparse.diags_array(d)).tocsr()
    values = _smallest_eigenvalues(hessian, min(cap + 1, n))
    # Eigenvalues within rounding of zero are the (rare) exact threshold case; count them as non-negative.
    count = int(np.count_nonzero(values < -1e-9 * max(1.0, float(np.abs(values).max()))))
    return int(min(max(count, 1), cap)), r, values


# ---------------------------------------------------------------- clustering


def _leading_eigenvectors(matrix: sp.sparse.csr_array, count: int) -> tuple[np.ndarray, np.ndarray]:
    """The ``count`` eigenpairs of largest |lambda| of a symmetric matrix."""
    n = matrix.shape[0]
    if n <= _DENSE_MAX_UNITS or count >= n - 1:
        values, vectors = np.linalg.eigh(matrix.toarray())
    else:
        values, vectors = sp.sparse.linalg.eigsh(matrix, k=count, which="LM", tol=_EIGSH_TOLERANCE, v0=_start_vector(n))
    order = np.argsort(-np.abs(values), kind="stable")[:count]
    return values[order], vectors[:, order]


def _kmeans(points: np.ndarray, k: int, *, rng: np.random.Generator) -> np.ndarray:
    """Lloyd's algorithm from k-means++ starts (Arthur & Vassilvitskii 2007); the best of several starts.

    Deterministic given ``rng``.  An empty cluster is re-seeded at the point
    farthest from its centre.
    """
    n = points.shape[0]
    squared = (points**2).sum(axis=1)
    best_labels = np.zeros(n, dtype=np.int64)
    best_inertia = math.inf
    for _ in range(_KMEANS_STARTS):
        centres = np.empty((k, points.shape[1]))
        centres[0] = points[rng.integers(n)]
        nearest = ((points - centres[0]) ** 2).sum(axis=1)
        for c in range(1, k):
            total = nearest.sum()
            pick = rng.choice(n, p=nearest / total) if total > 0 else rng.integers(n)
            centres[c] = points[pick]
            nearest = np.minimum(nearest, ((points - centres[c]) ** 2).sum(axis=1))
        labels = np.full(n, -1, dtype=np.int64)
        for _ in range(_KMEANS_MAX_ITERATIONS):
            # |x - c|^2 = |x|^2 - 2 x.c + |c|^2: O(n k) memory, not O(n k dim).
            distance = squared[:, None] - 2.0 * points @ centres.T + (centres**2).sum(axis=1)[None, :]
            new = np.argmin(distance, axis=1)
            for c in range(k):
                if not np.any(new == c):
                    far = int(np.argmax(distance[np.arange(n), new]))
                    new[far] = c
            if np.array_equal(new, labels):
                break
            labels = new
            for c in range(k):
                centres[c] = points[labels == c].mean(axis=0)
        inertia = float(((points - centres[labels]) ** 2).sum())
        if inertia < best_inertia - 1e-12:
            best_inertia, best_labels = inertia, labels
    return best_labels


def _canonical_labels(labels: np.ndarray, k: int) -> np.ndarray:
    """Blocks numbered by decreasing size, ties by their first node: the same clusters always print the same way."""
    sizes = np.bincount(labels, minlength=k)
    first = np.array([np.flatnonzero(labels == c)[0] if sizes[c] else labels.size for c in range(k)])
    order = np.lexsort((first, -sizes))
    rank = np.empty(k, dtype=np.int64)
    rank[order] = np.arange(k)
    return rank[labels]


@dataclass(frozen=True, eq=False)
class BlockFit:
    """A stochastic block model fitted to one observed network.

    Attributes
    ----------
    n_units, n_ties, observed_mean_degree
        The observed network: nodes, ties and 2 ties / n.
    n_blocks, block_rule, bethe_hessian_blocks, bethe_hessian_r, bethe_hessian_eigenvalues
        K, how it was chosen (``"bethe_hessian"`` or ``"given"``), what the
        Bethe-Hessian rule says, its parameter r and the smallest eigenvalues
        of H(r) (a clear gap among the negative ones is worth a look).
    labels
        Block of each node (0 = the largest block).
    block_sizes, shares
        n_k and n_k / n.
    block_ties, block_pairs, edge_densities
        Ties and node pairs within and between blocks, and their ratio p_kl.
    affinity
        p_kl / sum_kl s_k s_l p_kl: the scenario's ``block_affinity`` (only
        ratios matter; normalised so that sum_kl s_k s_l g_kl = 1, as
        ``BlockModel.normalised_matrix`` does).
    density
        The suggested density rule: mean degree (n - 1) sum_kl s_k s_l p_kl
        at reference_units = n, growth exponent 0 (an assumption).
    regularisation
        tau of the regularised Laplacian (the observed mean degree).
    eigenvalues
        The K leading eigenvalues of the regularised Laplacian.
    seed
        The root seed of the k-means starts.
    """

    n_units: int
    n_ties: int
    observed_mean_degree: float
    n_blocks: int
    block_rule: str
    bethe_hessian_blocks: int
    bethe_hessian_r: float
    bethe_hessian_eigenvalues: tuple[float, ...]
    labels: np.ndarray = field(repr=False)
    block_sizes: tuple[int, ...]
    shares: tuple[float, ...]
    block_ties: tuple[tuple[int, ...], ...]
    block_pairs: tuple[tuple[int, ...], ...]
    edge_densities: tuple[tuple[float, ...], ...]
    affinity: tuple[tuple[float, ...], ...]
    density: DensityRule
    regularisation: float
    eigenvalues: tuple[float, ...]
    seed: int

    def block_model(self) -> BlockModel:
        """The fitted model as the scenario parser would build it."""
        return BlockModel(shares=self.shares, affinity=self.affinity)

    def to_dict(self) -> dict[str, object]:
        return {
            "units": self.n_units,
            "ties": self.n_ties,
            "observed_mean_degree": self.observed_mean_degree,
            "blocks": self.n_blocks,
            "block_rule": self.block_rule,
            "bethe_hessian_blocks": self.bethe_hessian_blocks,
            "bethe_hessian_r": self.bethe_hessian_r,
            "bethe_hessian_eigenvalues": list(self.bethe_hessian_eigenvalues),
            "block_sizes": list(self.block_sizes),
            "block_shares": list(self.shares),
            "block_ties": [list(r) for r in self.block_ties],
            "block_pairs": [list(r) for r in self.block_pairs],
            "edge_densities": [list(r) for r in self.edge_densities],
            "block_affinity": [list(r) for r in self.affinity],
            "density": {
                "mean_degree": self.density.mean_degree,
                "reference_units": self.density.reference_units,
                "growth_exponent": self.density.growth_exponent,
            },
            "regularisation_tau": self.regularisation,
            "laplacian_eigenvalues": list(self.eigenvalues),
            "seed": self.seed,
        }


def _check_count(value: object, name: str, low: int, high: int) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or not low <= value <= high:
        raise DesignCalcError(f"`{name}` must be a whole number in [{low}, {high}]; got {value!r}")
    return int(value)


def fit_block_model(adjacency: sp.sparse.csr_array, *, n_blocks: int | None = None, seed: int) -> BlockFit:
    """Fit a stochastic block model by regularised spectral clustering.

    Parameters
    ----------
    adjacency
        The observed network: symmetric 0/1 sparse matrix, zero diagonal.
    n_blocks
        K; None chooses it by the Bethe-Hessian rule (:func:`bethe_hessian_count`).
    seed
        Root seed of the k-means starts (stream key (0,) of a SeedSequence).

    Returns
    -------
    BlockFit

    Raises
    ------
    DesignCalcError
        If the network has fewer than 4 nodes or no ties, or ``n_blocks`` is
        not in [1, min(BLOCK_CAP, n / 2)].

    Notes
    -----
    Regularised spectral clustering (Qin & Rohe 2013): with D the degree
    matrix and tau the mean degree, take the K eigenvectors of largest
    |eigenvalue| of L_tau = D_tau^-1/2 A D_tau^-1/2, D_tau = D + tau I, scale
    each row to unit length (rows of isolates stay 0) and cluster the rows by
    k-means.  The regularisation keeps low-degree nodes from dominating the
    eigenvectors of sparse graphs.  Then p_kk = ties_kk / C(n_k, 2) and
    p_kl = ties_kl / (n_k n_l), the maximum-likelihood block densities given
    the labels (METHODS.md §6.2).  O(n K + ties) per Lanczos step plus
    O(n K^2) per k-means iteration.

    References
    ----------
    Qin, T. & Rohe, K. (2013). Regularized spectral clustering under the
    degree-corrected stochastic blockmodel. NeurIPS 26.

    Examples
    --------
    >>> import numpy as np
    >>> from designcalc.graphs import sample_block_graph
    >>> p = np.array([[0.2, 0.01], [0.01, 0.2]])
    >>> fit = fit_block_model(sample_block_graph([200, 100], p, rng=np.random.default_rng(2)), seed=1)
    >>> fit.n_blocks, fit.block_sizes
    (2, (200, 100))
    """
    matrix = _checked_adjacency(adjacency)
    n = int(matrix.shape[0])
    if n < 4:
        raise DesignCalcError(f"the network has {n} node(s); fitting a block model needs at least 4")
    d = np.diff(matrix.indptr).astype(float)
    n_ties = int(matrix.nnz // 2)
    if n_ties == 0:
        raise DesignCalcError("the network has no ties; there is nothing to fit")
    largest = min(BLOCK_CAP, n // 2)
    bh_count, bh_r, bh_values = bethe_hessian_count(matrix, cap=largest)
    if n_blocks is None:
        k, rule = bh_count, "bethe_hessian"
    else:
        k, rule = _check_count(n_blocks, "n_blocks", 1, largest), "given"

    tau = float(d.mean())
    scale = 1.0 / np.sqrt(d + tau)
    laplacian = sp.sparse.csr_array(matrix.multiply(scale[:, None]).multiply(scale[None, :]))
    if k == 1:
        labels = np.zeros(n, dtype=np.int64)
        values = np.array([_leading_eigenvectors(laplacian, 1)[0][0]])
    else:
        values, vectors = _leading_eigenvectors(laplacian, k)
        norms = np.linalg.norm(vectors, axis=1)
        rows = np.divide(vectors, norms[:, None], out=np.zeros_like(vectors), where=norms[:, None] > 0)
        rng = np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(0,)))
        labels = _canonical_labels(_kmeans(rows, k, rng=rng), k)

    members = sp.sparse.csr_array((np.ones(n), (np.arange(n), labels)), shape=(n, k))
    counts = (members.T @ matrix @ members).toarray()
    sizes = np.bincount(labels, minlength=k).astype(np.int64)
    ties = np.rint(counts).astype(np.int64)
    np.fill_diagonal(ties, np.diag(ties) // 2)  # within a block each tie was counted from both ends
    pairs = np.outer(sizes, sizes)
    np.fill_diagonal(pairs, sizes * (sizes - 1) // 2)
    densities = np.divide(ties, pairs, out=np.zeros((k, k)), where=pairs > 0)
    shares = sizes / n
    level = float(shares @ densities @ shares)
    affinity = densities / level
    # rho_n * g_kl = p_kl at n needs rho_n = level, i.e. mean_degree = (n - 1) * level (density.py).
    rule_mean_degree = (n - 1) * level
    return BlockFit(
        n_units=n,
        n_ties=n_ties,
        observed_mean_degree=2.0 * n_ties / n,
        n_blocks=k,
        block_rule=rule,
        bethe_hessian_blocks=bh_count,
        bethe_hessian_r=bh_r,
        bethe_hessian_eigenvalues=tuple(float(x) for x in bh_values),
        labels=labels,
        block_sizes=tuple(int(x) for x in sizes),
        shares=tuple(float(x) for x in shares),
        block_ties=tuple(tuple(int(x) for x in row) for row in ties),
        block_pairs=tuple(tuple(int(x) for x in row) for row in pairs),
        edge_densities=tuple(tuple(float(x) for x in row) for row in densities),
        affinity=tuple(tuple(float(x) for x in row) for row in affinity),
        density=DensityRule(mean_degree=rule_mean_degree, reference_units=n, growth_exponent=0.0),
        regularisation=tau,
        eigenvalues=tuple(float(x) for x in values),
        seed=int(seed),
    )


# ---------------------------------------------------------------- goodness of fit


@dataclass(frozen=True, eq=False)
class StatisticCheck:
    """One summary of the observed network beside its distribution over graphs simulated from the fit."""

    name: str
    label: str
    observed: float
    simulated: tuple[float, ...]

    @property
    def simulated_mean(self) -> float:
        return float(np.mean(self.simulated))

    @property
    def simulated_sd(self) -> float:
        return float(np.std(self.simulated, ddof=1)) if len(self.simulated) > 1 else math.nan

    @property
    def standardised_difference(self) -> float:
        """(observed - simulated mean) / simulated SD; nan when the simulated SD is 0."""
        sd = self.simulated_sd
        return (self.observed - self.simulated_mean) / sd if sd > 0 else math.nan

    def to_dict(self) -> dict[str, object]:
        return {
            "statistic": self.name,
            "label": self.label,
            "observed": self.observed,
            "simulated_mean": self.simulated_mean,
            "simulated_sd": self.simulated_sd,
            "standardised_difference": self.standardised_difference,
            "simulated": list(self.simulated),
        }


@dataclass(frozen=True, eq=False)
class GoodnessOfFit:
    """The posterior-predictive check of a fit (METHODS.md §6.3 step 5).

    Attributes
    ----------
    n_graphs, seed
        Graphs simulated from the fit and the root seed of their streams.
    checks
        Mean and variance of degree, transitivity, share of isolates and mean
        two-hop neighbourhood size: observed beside simulated.
    degree_ks_statistic, degree_ks_pvalue
        Two-sample Kolmogorov-Smirnov test of the observed degrees against
        the simulated graphs' degrees, pooled.
    observed_degrees, simulated_degree_counts
        The observed degrees, and for each simulated graph the number of
        nodes of each degree 0, 1, ... (rows padded with zeros).
    warnings
        Sentences naming each summary the fit misses (see Notes of
        :func:`goodness_of_fit`).
    """

    n_graphs: int
    seed: int
    checks: tuple[StatisticCheck, ...]
    degree_ks_statistic: float
    degree_ks_pvalue: float
    observed_degrees: np.ndarray = field(repr=False)
    simulated_degree_counts: np.ndarray = field(repr=False)
    warnings: tuple[str, ...]

    @property
    def clustering_threshold(self) -> float:
        """2 x simulated mean + 3 simulated SDs of the transitivity: above it the fit misses clustering badly."""
        t = self.check("transitivity")
        return _CLUSTERING_RATIO * t.simulated_mean + _MISFIT_SDS * t.simulated_sd

    @property
    def misses_clustering(self) -> bool:
        return self.check("transitivity").observed > self.clustering_threshold

    def check(self, name: str) -> StatisticCheck:
        """The check of the statistic ``name`` (e.g. ``"transitivity"``)."""
        for c in self.checks:
            if c.name == name:
                return c
        raise KeyError(name)

    def to_dict(self) -> dict[str, object]:
        return {
            "graphs": self.n_graphs,
            "seed": self.seed,
            "checks": [c.to_dict() for c in self.checks],
            "degree_ks_statistic": self.degree_ks_statistic,
            "degree_ks_pvalue": self.degree_ks_pvalue,
            "clustering_threshold": self.clustering_threshold,
            "misses_clustering": self.misses_clustering,
            "warnings": list(self.warnings),
        }


_CHECKED = (
    ("mean_degree", "mean degree"),
    ("degree_variance", "degree variance"),
    ("transitivity", "transitivity (global clustering)"),
    ("share_isolated", "share of isolates"),
    ("mean_two_hop", "mean two-hop neighbourhood size"),
)


def goodness_of_fit(adjacency: sp.sparse.csr_array, fit: BlockFit, *, graphs: int = 20, seed: int) -> GoodnessOfFit:
    """Simulate networks from a fit with the scenario sampler and compare them with the observed one.

    Parameters
    ----------
    adjacency
        The observed network the fit came from.
    fit
        The fitted block model.
    graphs
        Networks to simulate (at least 2, for a standard deviation).
    seed
        Root seed; graph g uses SeedSequence(seed, spawn_key=(1, g)) split
        into [types, graph] streams, as the engine splits its own.

    Returns
    -------
    GoodnessOfFit

    Raises
    ------
    DesignCalcError
        If ``graphs`` is not a whole number in [2, 10000] or the network is
        not the one fitted (a different number of nodes).

    Notes
    -----
    Each graph is drawn by ``networks.sample_network`` from the fragment's
    own model and density rule at the observed n, so block labels are drawn
    at random with the fitted shares, exactly as a scenario using the
    fragment would draw them.  Warnings:

    * clustering: observed transitivity above 2 x the simulated mean + 3
      simulated SDs.  METHODS.md §6.4 states the deficit (block models are
      locally tree-like) but no threshold; this one is a rule of thumb
      (common practice), chosen so a warning means a gross miss, not noise;
    * degrees: the KS test rejects at level 0.01;
    * isolates, two-hop size, degree mean and variance: more than 3
      simulated SDs from the simulated mean (SD floored at 1/n for shares).

    Cost: graphs x O(sum_i d_i^2) for the two-hop and triangle counts.
    """
    matrix = _checked_adjacency(adjacency)
    graphs = _check_count(graphs, "graphs", 2, 10_000)
    n = int(matrix.shape[0])
    if n != fit.n_units:
        raise DesignCalcError(f"the fit is of a network of {fit.n_units} nodes; this one has {n}")
    observed = network_statistics(matrix)
    model = fit.block_model()
    simulated: list[NetworkStatistics] = []
    degree_counts = []
    pooled = []
    for g in range(graphs):
        types_seq, graph_seq = np.random.SeedSequence(seed, spawn_key=(1, g)).spawn(2)
        net = sample_network(
            model, fit.density, n, types_rng=np.random.default_rng(types_seq), graph_rng=np.random.default_rng(graph_seq)
        )
        simulated.append(network_statistics(net.adjacency))
        deg = net.degrees
        pooled.append(deg)
        degree_counts.append(np.bincount(deg))
    observed_degrees = np.diff(matrix.indptr).astype(np.int64)
    width = max(max(c.size for c in degree_counts), int(observed_degrees.max()) + 1)
    counts = np.zeros((graphs, width), dtype=np.int64)
    for row, c in enumerate(degree_counts):
        counts[row, : c.size] = c
    ks = sp.stats.ks_2samp(observed_degrees, np.concatenate(pooled))
    checks = tuple(
        StatisticCheck(name, label, float(getattr(observed, name)), tuple(float(getattr(s, name)) for s in simulated))
        for name, label in _CHECKED
    )
    result_warnings = _fit_warnings(checks, float(ks.statistic), float(ks.pvalue), n)
    return GoodnessOfFit(
        n_graphs=graphs,
        seed=int(seed),
        checks=checks,
        degree_ks_statistic=float(ks.statistic),
        degree_ks_pvalue=float(ks.pvalue),
        observed_degrees=observed_degrees,
        simulated_degree_counts=counts,
        warnings=tuple(result_warnings),
    )


def _fit_warnings(checks: tuple[StatisticCheck, ...], ks_statistic: float, ks_pvalue: float, n: int) -> list[str]:
    by_name = {c.name: c for c in checks}
    out = []
    t = by_name["transitivity"]
    threshold = _CLUSTERING_RATIO * t.simulated_mean + _MISFIT_SDS * t.simulated_sd
    if t.observed > threshold:
        out.append(
            f"the fit misses clustering badly: observed transitivity {t.observed:.3f}, simulated "
            f"{t.simulated_mean:.3f} (SD {t.simulated_sd:.3f}); warned above 2 x simulated mean + 3 SD = "
            f"{threshold:.3f} (a rule of thumb, common practice). Block models are locally tree-like "
            "(METHODS.md §6.4): neighbourhoods in the simulation overlap less than in the data, which "
            "changes the spillover estimators' variances; run a sensitivity analysis"
        )
    if ks_pvalue < _DEGREE_KS_LEVEL:
        out.append(
            f"the degree distribution differs from the fit's (two-sample KS D = {ks_statistic:.3f}, "
            f"p = {ks_pvalue:.2g} < {_DEGREE_KS_LEVEL:g}): degrees are more uneven than a block model "
            "gives within blocks; a degree-corrected model (METHODS.md §6.2) would fit them better"
        )
    for name in ("mean_degree", "degree_variance", "share_isolated", "mean_two_hop"):
        c = by_name[name]
        sd = max(c.simulated_sd, 1.0 / n) if name == "share_isolated" else c.simulated_sd
        if sd > 0 and abs(c.observed - c.simulated_mean) > _MISFIT_SDS * sd:
            out.append(
                f"the {c.label} differs from the fit's: observed {c.observed:.4g}, simulated "
                f"{c.simulated_mean:.4g} (SD {sd:.3g}), more than {_MISFIT_SDS:g} SDs apart"
            )
    return out


# ---------------------------------------------------------------- the fragment


def _number(x: float) -> str:
    # repr round-trips a float exactly, so the fragment reproduces the fit to the last bit.
    return repr(float(x))


def fragment_toml(fit: BlockFit, *, source: str = "") -> str:
    """The ``[network]`` and ``[network.density]`` tables of a scenario, with comments.

    Parameters
    ----------
    fit
        The fitted block model.
    source
        The edge-list file's name, quoted in the opening comment.

    Returns
    -------
    str
        TOML text to paste into a scenario in place of its ``[network]``
        tables.  Parsed with the rest of a scenario and sampled at
        ``reference_units`` it draws each pair of blocks k, l with
        probability exactly ``fit.edge_densities[k][l]``.

    Examples
    --------
    >>> import numpy as np
    >>> from designcalc.graphs import sample_block_graph
    >>> a = sample_block_graph([60, 40], np.array([[0.3, 0.02], [0.02, 0.3]]), rng=np.random.default_rng(3))
    >>> print(fragment_toml(fit_block_model(a, seed=1)).splitlines()[4])
    [network]
    """
    k = fit.n_blocks
    who = f" of {source}" if source else ""
    rule = (
        "chosen by the Bethe-Hessian rule (Saade, Krzakala & Zdeborova 2014; Le & Levina 2022)"
        if fit.block_rule == "bethe_hessian"
        else f"given by the user (the Bethe-Hessian rule suggests {fit.bethe_hessian_blocks})"
    )
    lines = [
        f"# Fitted by designcalc {__version__} (designcalc fit{' ' + source if source else ''}, seed {fit.seed}):",
        f"# a stochastic block model{who} by regularised spectral clustering (Qin & Rohe 2013),",
        f"# K = {k} blocks {rule}.",
        f"# Observed: {fit.n_units} nodes, {fit.n_ties} ties, mean degree {fit.observed_mean_degree:.4g}.",
        "[network]",
        'model = "blocks"',
        "# Share of nodes in each fitted block (largest first): " + ", ".join(f"{s:.3f}" for s in fit.shares),
        "block_shares = [" + ", ".join(_number(s) for s in fit.shares) + "]",
        "# Block-pair tie densities (ties / pairs) divided by their average sum_kl s_k s_l p_kl;",
        "# only ratios matter, the density rule sets the level. Observed densities:",
    ]
    for row in fit.edge_densities:
        lines.append("#   " + "  ".join(f"{p:.4g}" for p in row))
    rows = ["[" + ", ".join(_number(x) for x in row) + "]" for row in fit.affinity]
    lines.append("block_affinity = [" + (",\n                  ".join(rows)) + "]")
    lines += [
        "",
        "[network.density]",
        f"# (n - 1) x average tie density: at {fit.n_units} units the sampler then draws every pair",
        f"# with its observed block-pair density. The observed mean degree is {fit.observed_mean_degree:.6g};",
        "# the two differ by O(mean degree / n) because the sampler draws block labels at random.",
        f"mean_degree = {_number(fit.density.mean_degree)}",
        f"reference_units = {fit.density.reference_units}",
        "# NOT estimated: one network cannot identify how mean degree grows with study size.",
        "# 0 keeps it fixed (friendship networks, METHODS.md §6.1); 1 keeps the density fixed. State your own.",
        "growth_exponent = 0.0",
    ]
    return "\n".join(lines) + "\n"


# ---------------------------------------------------------------- everything


@dataclass(frozen=True, eq=False)
class NetworkFit:
    """What ``designcalc fit`` reports: the edge list read, the fit, its check, warnings and cautions."""

    edges: EdgeList
    fit: BlockFit
    check: GoodnessOfFit
    fragment: str
    warnings: tuple[str, ...]
    cautions: tuple[str, ...] = CAUTIONS

    def to_dict(self) -> dict[str, object]:
        return {
            "designcalc_version": __version__,
            "edge_list": self.edges.summary.to_dict(),
            "fit": self.fit.to_dict(),
            "goodness_of_fit": self.check.to_dict(),
            "fragment": self.fragment,
            "warnings": list(self.warnings),
            "cautions": list(self.cautions),
        }


def fit_network(edges: EdgeList, *, n_blocks: int | None = None, graphs: int = 20, seed: int) -> NetworkFit:
    """Fit the block model to an edge list, check it by simulation and write the scenario fragment.

    Parameters
    ----------
    edges
        The observed network (:func:`designcalc.edgelist.read_edge_list`).
    n_blocks
        K, or None for the Bethe-Hessian rule.
    graphs
        Networks simulated for the goodness-of-fit check.
    seed
        Root seed of the k-means starts and the simulated networks.

    Returns
    -------
    NetworkFit
        Its warnings are the reader's notes on dropped or merged lines, any
        note on the choice of K, and the goodness-of-fit warnings.

    Raises
    ------
    DesignCalcError
        As :func:`fit_block_model` and :func:`goodness_of_fit`.
    """
    fit = fit_block_model(edges.adjacency, n_blocks=n_blocks, seed=seed)
    check = goodness_of_fit(edges.adjacency, fit, graphs=graphs, seed=seed)
    notes = list(edges.summary.messages())
    cap = min(BLOCK_CAP, fit.n_units // 2)
    if fit.block_rule == "bethe_hessian" and fit.bethe_hessian_blocks == cap:
        notes.append(f"the Bethe-Hessian rule reached its cap of {cap} blocks; the network may have more (give --blocks)")
    if fit.block_rule == "given" and fit.n_blocks != fit.bethe_hessian_blocks:
        notes.append(f"fitted {fit.n_blocks} blocks as asked; the Bethe-Hessian rule suggests {fit.bethe_hessian_blocks}")
    small = [i for i, s in enumerate(fit.block_sizes) if s < 10]
    if small:
        notes.append(f"block(s) {', '.join(map(str, small))} have fewer than 10 nodes: their densities are very uncertain")
    after = []
    if check.misses_clustering and fit.block_rule == "bethe_hessian":
        after.append(
            "triangle closure also shows up as extra small communities, so on a clustered network the Bethe-Hessian "
            "rule can split real groups; look at its eigenvalues for a gap and compare a fit with --blocks"
        )
    isolated = int(np.sum(np.diff(edges.adjacency.indptr) == 0))
    if isolated:
        notes.append(
            f"{isolated} node(s) have no ties; spectral clustering cannot place them, so they join the "
            "block whose centre is nearest the origin"
        )
    return NetworkFit(
        edges=edges,
        fit=fit,
        check=check,
        fragment=fragment_toml(fit, source=edges.summary.source),
        warnings=tuple(notes) + check.warnings + tuple(after),
    )

"""Estimators of direct, spillover and total effects, with feasible variances.

Everything here works on one graph and a batch of ``B`` Bernoulli assignments
at once: treatments ``W`` and outcomes ``Y`` are ``(n, B)`` float arrays, one
column per assignment. The graph-dependent work (eigenvectors, the corrected
PC-balancing shrinkage, the two-hop dependency matrix) is done once by
:func:`prepare_graph` and reused for every batch.

Batch size is a speed knob only: every reduction over units is computed per
column by the same floating-point operations whatever ``B`` is (plain BLAS
``Q.T @ W`` is not: its rounding depends on the number of columns), so
estimating a batch of 8 columns gives bit-for-bit the numbers obtained column
by column. The helpers ``_column_sums``, ``_project``, ``_expand`` and
``_clipped_quadratic`` carry that guarantee.

Formulas are in /work/shared/METHODS.md: the HT weight and notation in §0,
direct effects in §2, spillover effects (HT, PC-balancing and designcalc's
corrected variant) in §3, variance estimators in §4.1 and §4.3.
"""

from __future__ import annotations

from dataclasses import dataclass
from collections.abc import Sequence
from typing import Literal

import numpy as np
import scipy as sp
import scipy.sparse
import scipy.sparse.linalg

from designcalc.errors import ModelError

__all__ = [
    "DENSE_EIGEN_MAX_UNITS",
    "DIRECT_VARIANCES",
    "EIGSH_TOLERANCE",
    "LARGE_GRAPH_UNITS",
    "SPARSE_CHUNK_COLUMNS",
    "EstimateBatch",
    "GraphPreparation",
    "choose_eigenvector_count",
    "combine_total",
    "estimate_direct_hajek",
    "estimate_direct_ht",
    "estimate_direct_lin",
    "estimate_spillover_exposure_regression",
    "estimate_spillover_ht",
    "estimate_spillover_pc",
    "estimate_spillover_pc_corrected",
    "prepare_graph",
    "residualise_on_covariates",
    "treated_neighbour_counts",
    "treated_neighbour_fraction",
]

#: Graphs with at most this many units use a dense ``numpy.linalg.eigh``.
DENSE_EIGEN_MAX_UNITS = 400
#: Relative tolerance passed to ``scipy.sparse.linalg.eigsh``. DESIGN.md
#: ("Performance principles") measured that 1e-2 keeps the leading
#: eigenvectors accurate to about 1e-7 in angle while being 3-10x faster.
EIGSH_TOLERANCE = 1e-2
#: Graphs with at least this many units run the Lanczos iteration in single
#: precision and, under the automatic rule, go from 4 requested eigenpairs
#: straight to the largest request (see :func:`prepare_graph`, Notes). Below
#: it the double-precision path is kept, so results of smaller graphs are
#: those of earlier versions bit for bit.
LARGE_GRAPH_UNITS = 50_000
#: Variance estimators offered for the direct-effect estimators.
DIRECT_VARIANCES = ("neyman", "two_hop", "two_hop_unclipped", "two_hop_psd")

# Gram-Schmidt drops a candidate basis column whose residual norm (the column
# has unit norm) falls below this: it lies in the span of the earlier ones.
_RANK_TOLERANCE = 1e-8
# A shrinkage factor r_j below this means unit j's neighbourhood lies in the
# span of the basis and its spillover is not identified by the corrected PC.
_SHRINKAGE_FLOOR = 1e-10
# A 3x3 exposure-regression Gram matrix with a larger condition number is
# treated as singular (e.g. nobody treated, or exposure constant).
_MAX_CONDITION = 1e12
# Dense eigendecomposition is attempted as an eigsh fallback up to this size.
_DENSE_FALLBACK_MAX_UNITS = 8000

DirectVariance = Literal["neyman", "two_hop", "two_hop_unclipped", "two_hop_psd"]


# --------------------------------------------------------------------------
# Result types
# --------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class GraphPreparation:
    """Per-graph quantities shared by every assignment batch.

    Build it with :func:`prepare_graph`; do not construct it by hand.

    Attributes
    ----------
    adjacency : scipy.sparse.csr_array
        Symmetric 0/1 adjacency matrix ``A`` (float64, zero diagonal).
    adjacency_single : scipy.sparse.csr_array
        The same matrix with float32 entries, sharing ``adjacency``'s index
        arrays. Products with 0/1 treatments are integer counts below 2^24,
        exact in float32, so ``A @ W`` runs on it at half the memory traffic.
    degrees : numpy.ndarray
        ``N_i = sum_j A_ij``, shape ``(n,)``.
    n_units : int
        Number of units ``n``.
    mean_degree : float
        Mean degree used by the eigenvalue rule (the hint when given,
        otherwise the realised mean degree ``2|E|/n``).
    n_eigenvectors : int
        Number ``k`` of adjacency eigenvectors used (chosen by the rule of
        :func:`choose_eigenvector_count` when ``prepare_graph`` received
        ``n_eigenvectors=None``).
    eigenvalues : numpy.ndarray
        The ``k`` eigenvalues used, ordered by decreasing ``|lambda|``.
    eigengap : float
        ``|lambda_k| - |lambda_{k+1}|``; NaN when ``k = 0`` or when no
        ``(k+1)``-th eigenvalue was computed.
    eigen_threshold : float
        ``(2 + eta) sqrt(mean_degree)`` with ``eta = 0.1`` (METHODS §3.3).
    eigen_method : str
        ``"dense"``, ``"eigsh"``, ``"eigsh_single"`` (single-precision
        Lanczos, graphs from ``LARGE_GRAPH_UNITS`` units), ``"dense_fallback"``
        (eigsh did not converge) or ``"none"`` (no eigenvectors needed or no
        edges).
    basis : numpy.ndarray
        ``Q``, shape ``(n, q)`` with orthonormal columns; the first column is
        ``1/sqrt(n)``. ``q <= k + 1``; it is smaller when an eigenvector is
        (numerically) in the span of the others, e.g. the Perron vector of a
        regular graph.
    adjacency_times_basis : numpy.ndarray
        ``A Q``, shape ``(n, q)``.
    pc_diagonal : numpy.ndarray
        Diagonal of ``A (I - P)`` with ``P = Q Q^T``: ``-(AQ)_j . Q_j``.
    shrinkage : numpy.ndarray
        ``r_j = 1 - ||(AQ)_j||^2 / N_j`` of the corrected PC-balancing
        estimator (METHODS §3.3); 1 for isolates. Always in ``[0, 1]``.
    min_shrinkage : float
        ``min_j r_j``; METHODS §8 asks callers to warn when it is below 0.5.
    two_hop_matrix : scipy.sparse.csr_array or None
        Dependency matrix ``G_ij = 1{i, j within two hops}`` (with
        ``G_ii = 1``), present when ``two_hop=True``.
    two_hop_clipped_factor : numpy.ndarray or None
        ``F`` with ``F F^T = G_+`` (``G`` with negative eigenvalues set to
        zero), present when ``two_hop=True`` and ``n <= max_two_hop_units``.
    two_hop_note : str
        Why the two-hop data are or are not available.
    """

    adjacency: sp.sparse.csr_array
    adjacency_single: sp.sparse.csr_array
    degrees: np.ndarray
    n_units: int
    mean_degree: float
    n_eigenvectors: int
    eigenvalues: np.ndarray
    eigengap: float
    eigen_threshold: float
    eigen_method: str
    basis: np.ndarray
    adjacency_times_basis: np.ndarray
    pc_diagonal: np.ndarray
    shrinkage: np.ndarray
    min_shrinkage: float
    two_hop_matrix: sp.sparse.csr_array | None
    two_hop_clipped_factor: np.ndarray | None
    two_hop_note: str


@dataclass(frozen=True, eq=False)
class EstimateBatch:
    """Estimates and standard errors for a batch of assignments.

    Attributes
    ----------
    estimator : str
        E.g. ``"hajek"``, ``"horvitz_thompson"``, ``"centred_ht"``,
        ``"pc_balancing"``, ``"pc_balancing_corrected"``,
        ``"exposure_regression"``, or ``"hajek+pc_balancing_corrected"`` for
        a total.
    variance_estimator : str
        E.g. ``"neyman"``, ``"two_hop"``, ``"two_hop_psd"``, ``"plug_in"``,
        ``"hc1"``.
    estimate : numpy.ndarray
        Shape ``(B,)``.
    standard_error : numpy.ndarray
        Shape ``(B,)``; NaN where no variance estimate exists.
    contributions : numpy.ndarray
        Shape ``(n, B)``: per-unit linearised contributions ``phi``. For the
        HT-type estimators (``horvitz_thompson``, ``centred_ht``,
        ``pc_balancing``, ``pc_balancing_corrected``) ``mean(phi)`` equals
        the estimate exactly; for ``hajek`` and ``exposure_regression`` phi is
        the centred influence term (its mean is zero) that carries the
        estimator's first-order error. Either way the linearised covariance
        of two estimators is ``sum(phi * phi') / n**2`` (see
        :func:`combine_total`).
    """

    estimator: str
    variance_estimator: str
    estimate: np.ndarray
    standard_error: np.ndarray
    contributions: np.ndarray


# --------------------------------------------------------------------------
# Batch-invariant reductions (see the module docstring)
# --------------------------------------------------------------------------


def _column_sums(values: np.ndarray) -> np.ndarray:
    """Sum an ``(n, B)`` array over units, identically for every ``B``."""
    values = np.ascontiguousarray(values)
    if values.shape[1] == 1:
        # numpy reduces a C-contiguous (n, B >= 2) array over axis 0 row by row
        # (the same sequential order for every column and every B), but a
        # single column pairwise; a cumulative sum is that sequential order
        # (5x cheaper than padding to two columns at 10^6 units).
        # test_batch_size_does_not_change_the_numbers guards this behaviour.
        if values.shape[0] == 0:
            return np.zeros(1)
        return np.cumsum(values[:, 0], dtype=np.float64)[-1:]
    return values.sum(axis=0)


#: Columns per sparse-times-dense product: DESIGN.md measured chunks of ~16
#: columns 2.5x faster than one wide product (cache); results are identical
#: because scipy computes every column of ``A @ X`` independently.
SPARSE_CHUNK_COLUMNS = 16


def _sparse_product(matrix: sp.sparse.csr_array, values: np.ndarray) -> np.ndarray:
    """``matrix @ values`` for an ``(n, B)`` array, in chunks of columns."""
    if values.shape[1] <= SPARSE_CHUNK_COLUMNS:
        return matrix @ np.ascontiguousarray(values)
    out = np.empty((matrix.shape[0], values.shape[1]), dtype=np.result_type(matrix.dtype, values.dtype))
    for start in range(0, values.shape[1], SPARSE_CHUNK_COLUMNS):
        stop = start + SPARSE_CHUNK_COLUMNS
        out[:, start:stop] = matrix @ np.ascontiguousarray(values[:, start:stop])
    return out


def _project(basis: np.ndarray, values: np.ndarray) -> np.ndarray:
    """``basis.T @ values`` of shape ``(q, B)``, one BLAS call per column."""
    rows = np.ascontiguousarray(values.T)[:, None, :]
    return np.matmul(rows, basis)[:, 0, :].T


def _expand(basis: np.ndarray, coefficients: np.ndarray) -> np.ndarray:
    """``basis @ coefficients`` of shape ``(n, B)`` by elementwise updates."""
    out = np.zeros((basis.shape[0], coefficients.shape[1]))
    term = np.empty_like(out)
    # A loop over the (at most eigen_cap + 1) basis columns, not over units.
    for column in range(basis.shape[1]):
        np.multiply(basis[:, column, None], coefficients[column][None, :], out=term)
        out += term
    return out


def _clipped_quadratic(factor: np.ndarray, values: np.ndarray) -> np.ndarray:
    """``diag(Z^T F F^T Z)`` of shape ``(B,)``, one BLAS call per column."""
    rows = np.ascontiguousarray(values.T)[:, None, :]
    projected = np.matmul(rows, factor)[:, 0, :]
    return (projected * projected).sum(axis=1)


# --------------------------------------------------------------------------
# Per-graph preparation
# --------------------------------------------------------------------------


def choose_eigenvector_count(
    eigenvalues: np.ndarray,
    mean_degree: float,
    *,
    eta: float = 0.1,
    cap: int = 10,
) -> int:
    """Number of adjacency eigenvectors to balance on (METHODS §3.3).

    Parameters
    ----------
    eigenvalues : array_like
        Adjacency eigenvalues (any order, any subset containing the largest
        in absolute value).
    mean_degree : float
        Mean degree ``d``, at least 0.
    eta : float, default 0.1
        Margin above the noise edge, at least 0.
    cap : int, default 10
        Maximum count, at least 0.

    Returns
    -------
    int
        ``min(cap, #{l : |lambda_l| > (2 + eta) sqrt(d)})``. The all-ones
        vector is always added to the basis on top of this count.

    Raises
    ------
    ModelError
        If ``mean_degree``, ``eta`` or ``cap`` is out of range.

    Notes
    -----
    ``2 sqrt(d)`` is roughly the spectral norm of the noise ``A - E[A]`` of a
    sparse random graph, so eigenvalues above it carry the graph's low-rank
    signal; this is the universal singular value thresholding idea
    (Chatterjee 2015, Ann. Statist.; from memory). Over-fitting ``k`` costs
    little and under-fitting a lot (METHODS §3.3), hence the generous rule
    and the cap.

    Examples
    --------
    >>> choose_eigenvector_count([10.0, -9.0, 3.0, 1.0], 4.0)
    2
    """
    if not np.isfinite(mean_degree) or mean_degree < 0:
        raise ModelError(
            f"`mean_degree` must be a finite number >= 0; got {mean_degree!r}."
        )
    if not np.isfinite(eta) or eta < 0:
        raise ModelError(f"`eta` must be a finite number >= 0; got {eta!r}.")
    if isinstance(cap, bool) or not isinstance(cap, (int, np.integer)) or cap < 0:
        raise ModelError(f"`cap` must be an integer >= 0; got {cap!r}.")
    values = np.abs(np.asarray(eigenvalues, dtype=float))
    threshold = (2.0 + eta) * np.sqrt(mean_degree)
    return int(min(int(cap), int(np.count_nonzero(values > threshold))))


def _validate_adjacency(adjacency: object) -> sp.sparse.csr_array:
    """Return ``adjacency`` as a float64 CSR array after checking it."""
    if sp.sparse.issparse(adjacency):
        matrix = sp.sparse.csr_array(adjacency, dtype=float)
    elif isinstance(adjacency, np.ndarray) and adjacency.ndim == 2:
        matrix = sp.sparse.csr_array(adjacency.astype(float))
    else:
        raise ModelError(
            "`adjacency` must be a square scipy.sparse array (or 2-D numpy "
            f"array); got {type(adjacency).__name__}."
        )
    n_rows, n_cols = matrix.shape
    if n_rows != n_cols or n_rows < 2:
        raise ModelError(
            "`adjacency` must be square with at least 2 units; "
            f"got shape {matrix.shape}."
        )
    matrix.sum_duplicates()
    matrix.eliminate_zeros()
    if not np.all(matrix.data == 1.0):
        raise ModelError(
            "`adjacency` must have 0/1 entries; got values "
            f"{np.unique(matrix.data)[:5].tolist()}."
        )
    if matrix.diagonal().any():
        raise ModelError("`adjacency` must have a zero diagonal (no self-loops).")
    matrix.sort_indices()
    # All entries are 1, so A is symmetric iff its transpose has the same
    # canonical pattern (cheaper than the elementwise A != A.T at 10^7 edges).
    transpose = matrix.T.tocsr()
    transpose.sort_indices()
    if not (
        np.array_equal(transpose.indptr, matrix.indptr)
        and np.array_equal(transpose.indices, matrix.indices)
    ):
        raise ModelError("`adjacency` must be symmetric (an undirected graph).")
    return matrix


def _starting_vector(degrees: np.ndarray) -> np.ndarray:
    """Deterministic, generic Lanczos starting vector derived from degrees."""
    # Degrees alone can be an eigenvector (regular graphs), which would stall
    # Lanczos; a Weyl sequence (golden-ratio multiples mod 1) breaks the
    # symmetry deterministically without drawing random numbers.
    weyl = np.mod(np.arange(1, degrees.size + 1) * 0.6180339887498949, 1.0)
    return (1.0 + degrees) * (0.5 + weyl)


def _leading_eigenpairs(
    adjacency: sp.sparse.csr_array,
    count: int,
    degrees: np.ndarray,
    *,
    single: sp.sparse.csr_array | None = None,
) -> tuple[np.ndarray, np.ndarray, str]:
    """The ``count`` eigenpairs of largest ``|lambda|`` (sparse path).

    With ``single`` (the float32 copy of ``adjacency``) ARPACK runs in single
    precision: ``EIGSH_TOLERANCE`` = 1e-2 is five orders of magnitude above
    float32 rounding (6e-8), so the Ritz pairs meet the same tolerance, and
    the matrix-vector products and Lanczos vectors move half the bytes
    (measured at 10^6 units, mean degree 20, 11 pairs: 7.3 s instead of
    18.8 s). The vectors are then orthonormalised in float64. A wider Krylov
    space (3k + 1 instead of ARPACK's 2k + 1 vectors) saves restarts there
    (6.0 s instead of 7.3 s).
    """
    n_units = adjacency.shape[0]
    try:
        if single is None:
            values, vectors = sp.sparse.linalg.eigsh(
                adjacency,
                k=count,
                which="LM",
                tol=EIGSH_TOLERANCE,
                v0=_starting_vector(degrees),
            )
            method = "eigsh"
        else:
            values, vectors = sp.sparse.linalg.eigsh(
                single,
                k=count,
                which="LM",
                tol=EIGSH_TOLERANCE,
                v0=_starting_vector(degrees).astype(np.float32),
                ncv=min(n_units, 3 * count + 1),
            )
            values, vectors = values.astype(np.float64), vectors.astype(np.float64)
            method = "eigsh_single"
    except sp.sparse.linalg.ArpackNoConvergence:
        if n_units > _DENSE_FALLBACK_MAX_UNITS:
            raise RuntimeError(
                f"eigsh did not converge for {count} eigenvectors on a graph of "
                f"{n_units} units, too large for the dense fallback "
                f"(limit {_DENSE_FALLBACK_MAX_UNITS})."
            ) from None
        values, vectors = np.linalg.eigh(adjacency.toarray())
        method = "dense_fallback"
    order = np.argsort(-np.abs(values), kind="stable")[:count]
    return values[order], vectors[:, order], method


def _orthonormal_basis(n_units: int, vectors: np.ndarray) -> np.ndarray:
    """Orthonormalise ``[1/sqrt(n), vectors]``, dropping dependent columns."""
    kept = [np.full(n_units, 1.0 / np.sqrt(n_units))]
    for column in range(vectors.shape[1]):
        candidate = vectors[:, column] / np.linalg.norm(vectors[:, column])
        # Classical Gram-Schmidt applied twice ("twice is enough") keeps the
        # basis orthonormal to rounding even with near-dependent columns.
        residual = candidate.copy()
        current = np.column_stack(kept)  # one copy per candidate, reused by both passes
        for _ in range(2):
            residual = residual - current @ (current.T @ residual)
        norm = np.linalg.norm(residual)
        if norm > _RANK_TOLERANCE:
            kept.append(residual / norm)
    return np.column_stack(kept)


def _two_hop_data(
    adjacency: sp.sparse.csr_array, max_units: int
) -> tuple[sp.sparse.csr_array, np.ndarray | None, str]:
    """Two-hop dependency matrix and, for small graphs, its PSD-clipped factor."""
    n_units = adjacency.shape[0]
    closed = adjacency + sp.sparse.eye_array(n_units, format="csr")
    # (I + A)^2 is positive exactly on pairs within two hops (METHODS §4.3).
    dependency = sp.sparse.csr_array(closed @ closed)
    dependency.data = np.ones_like(dependency.data)
    dependency.sort_indices()
    if n_units > max_units:
        note = (
            f"two-hop clipping needs a dense eigendecomposition and is limited to "
            f"max_two_hop_units={max_units} units; this graph has {n_units}. "
            "Use variance='two_hop_psd' (any n) or raise max_two_hop_units."
        )
        return dependency, None, note
    values, vectors = np.linalg.eigh(dependency.toarray())
    positive = values > 0
    factor = np.ascontiguousarray(vectors[:, positive] * np.sqrt(values[positive]))
    note = (
        f"two-hop matrix available; {int(np.count_nonzero(~positive))} non-positive "
        f"eigenvalues clipped (minimum {values[0]:.4g})."
    )
    return dependency, factor, note


def prepare_graph(
    adjacency: sp.sparse.csr_array,
    *,
    n_eigenvectors: int | None,
    mean_degree_hint: float | None = None,
    two_hop: bool = False,
    max_two_hop_units: int = 4000,
    eigen_cap: int = 10,
    single_precision: bool | None = None,
    check_input: bool = True,
) -> GraphPreparation:
    """Compute the per-graph quantities used by every estimator.

    Parameters
    ----------
    adjacency : scipy.sparse.csr_array
        Symmetric 0/1 adjacency matrix with zero diagonal, ``n >= 2``.
    n_eigenvectors : int or None
        Number ``k`` of leading adjacency eigenvectors (by ``|lambda|``) in
        the PC-balancing basis, in ``[0, n - 1]``. ``None`` chooses ``k`` by
        :func:`choose_eigenvector_count`, capped at ``eigen_cap``. The
        all-ones vector is always added.
    mean_degree_hint : float, optional
        Mean degree for the eigenvalue rule (e.g. the scenario's expected
        mean degree); defaults to the realised mean degree.
    two_hop : bool, default False
        Also build the two-hop dependency matrix (METHODS §4.3), needed by
        ``variance="two_hop"`` and ``"two_hop_unclipped"``.
    max_two_hop_units : int, default 4000
        Largest graph for which the eigen-clipped two-hop matrix is built (a
        dense ``n x n`` eigendecomposition). Beyond it ``variance="two_hop"``
        raises :class:`ModelError`; ``"two_hop_psd"`` works for any ``n``.
    eigen_cap : int, default 10
        Cap on ``k`` under the automatic rule.
    single_precision : bool, optional
        Run the sparse eigensolver in single precision; by default only for
        graphs of at least ``LARGE_GRAPH_UNITS`` units, where it halves the
        time of the dominant step (tests/test_scale.py checks that the
        estimates agree with the double-precision path).
    check_input : bool, default True
        Check that ``adjacency`` is a symmetric 0/1 matrix with zero
        diagonal. Pass False only for a canonical float64 CSR array built by
        :func:`designcalc.graphs.to_csr` (the engine's graphs), which holds
        by construction; the check costs about 1 s at 10^7 edges.

    Returns
    -------
    GraphPreparation

    Raises
    ------
    ModelError
        If the adjacency matrix is not a symmetric 0/1 matrix with zero
        diagonal, or an option is out of range.

    Notes
    -----
    Eigenvectors come from a dense ``numpy.linalg.eigh`` when
    ``n <= DENSE_EIGEN_MAX_UNITS`` and otherwise from
    ``scipy.sparse.linalg.eigsh(which="LM", tol=EIGSH_TOLERANCE)`` started
    from a deterministic vector, so the same graph always gives the same
    basis. Under the automatic rule eigsh is asked for 4 pairs, doubled while
    all exceed the threshold (up to ``eigen_cap + 1``), so the eigengap is
    always measured. From ``LARGE_GRAPH_UNITS`` units on, a request of 4
    whose pairs all exceed the threshold is followed directly by the largest
    request: each eigsh call starts from scratch, and on large
    degree-heterogeneous graphs the eigenvalues near the noise edge exceed
    the threshold in numbers (the cap binds), so the middle request only
    repeated work (measured at 10^6 units: 4.4 s of 14.5 s).

    What the projection needs: the eigenvectors with a large eigengap (the
    graph's low-rank signal) converge far below the tolerance; those near
    the noise edge are mixtures of many nearly equal eigenvalues at any
    affordable tolerance, and any basis computed from the graph alone leaves
    the corrected estimator unbiased (METHODS §3.3), so 1e-2 is kept. Each eigenvector's sign is fixed (largest-magnitude
    entry positive) and ``[1/sqrt(n), v_1, ..., v_k]`` is orthonormalised by
    Gram-Schmidt, dropping dependent columns. On a graph without edges all
    eigenvalues are zero and the basis is ``1/sqrt(n)`` alone.

    Corrected PC (METHODS §3.3, designcalc's variant): with ``P = Q Q^T`` and
    ``B = A(I - P)`` with its diagonal set to zero, ``A`` having a zero
    diagonal gives ``diag(A(I - P))_j = -(AQ)_j . Q_j`` and

    ``r_j = (1/N_j) sum_i B_ji A_ji = (1/N_j)(N_j - (AQ)_j . sum_i A_ji Q_i)
    = 1 - ||(AQ)_j||^2 / N_j``,

    which lies in ``[0, 1]`` because ``(AQ)_j = A_j Q`` is the projection of
    row ``A_j`` (squared norm ``N_j``) onto an orthonormal basis.

    Running time: ``O((n + |E|) k)`` per Lanczos iteration for the sparse
    path, ``O(n^3)`` for the dense path and for two-hop clipping (about
    ``n^2`` floats of memory, which is why it is capped).
    """
    if check_input or not (
        isinstance(adjacency, sp.sparse.csr_array)
        and adjacency.dtype == np.float64
        and adjacency.has_canonical_format
    ):
        matrix = _validate_adjacency(adjacency)
    else:
        matrix = adjacency
    n_units = matrix.shape[0]
    if n_units < 2:
        raise ModelError(
            f"`adjacency` must be square with at least 2 units; got shape {matrix.shape}."
        )
    large = n_units >= LARGE_GRAPH_UNITS
    if single_precision is None:
        single_precision = large
    # Shares the index arrays: only the float32 entries are extra (4 bytes per entry).
    matrix_single = sp.sparse.csr_array(
        (matrix.data.astype(np.float32), matrix.indices, matrix.indptr),
        shape=matrix.shape,
    )
    matrix_single.has_canonical_format = True
    single = matrix_single if single_precision else None
    if n_eigenvectors is not None and (
        isinstance(n_eigenvectors, bool)
        or not isinstance(n_eigenvectors, (int, np.integer))
        or not 0 <= n_eigenvectors <= n_units - 1
    ):
        raise ModelError(
            f"`n_eigenvectors` must be None or an integer in [0, {n_units - 1}] "
            f"(n - 1); got {n_eigenvectors!r}."
        )
    if (
        isinstance(eigen_cap, bool)
        or not isinstance(eigen_cap, (int, np.integer))
        or eigen_cap < 0
    ):
        raise ModelError(f"`eigen_cap` must be an integer >= 0; got {eigen_cap!r}.")
    if (
        isinstance(max_two_hop_units, bool)
        or not isinstance(max_two_hop_units, (int, np.integer))
        or max_two_hop_units < 1
    ):
        raise ModelError(
            f"`max_two_hop_units` must be an integer >= 1; got {max_two_hop_units!r}."
        )
    degrees = np.asarray(matrix.sum(axis=1), dtype=float).ravel()
    if mean_degree_hint is None:
        mean_degree = float(degrees.mean())
    else:
        if not np.isfinite(mean_degree_hint) or mean_degree_hint < 0:
            raise ModelError(
                "`mean_degree_hint` must be a finite number >= 0; "
                f"got {mean_degree_hint!r}."
            )
        mean_degree = float(mean_degree_hint)
    threshold = float(2.1 * np.sqrt(mean_degree))

    # Eigenpairs: `values`/`vectors` hold the computed leading pairs sorted by
    # decreasing |lambda| (possibly one more than used, for the eigengap).
    most_wanted = (
        min(int(eigen_cap), n_units - 1)
        if n_eigenvectors is None
        else int(n_eigenvectors)
    )
    values = np.zeros(0)
    vectors = np.zeros((n_units, 0))
    method = "none"
    if matrix.nnz == 0 or most_wanted == 0:
        n_used = 0
    elif n_units <= DENSE_EIGEN_MAX_UNITS:
        all_values, all_vectors = np.linalg.eigh(matrix.toarray())
        order = np.argsort(-np.abs(all_values), kind="stable")
        values, vectors = all_values[order], all_vectors[:, order]
        method = "dense"
        n_used = (
            choose_eigenvector_count(values, mean_degree, cap=eigen_cap)
            if n_eigenvectors is None
            else int(n_eigenvectors)
        )
        values, vectors = values[: n_used + 1], vectors[:, : n_used + 1]
    elif n_eigenvectors is not None:
        n_used = int(n_eigenvectors)
        # One pair beyond those used, to measure the eigengap.
        values, vectors, method = _leading_eigenpairs(
            matrix, min(n_used + 1, n_units - 1), degrees, single=single
        )
    else:
        largest_request = min(int(eigen_cap) + 1, n_units - 1)
        request = min(4, largest_request)
        while True:
            values, vectors, method = _leading_eigenpairs(
                matrix, request, degrees, single=single
            )
            n_above = choose_eigenvector_count(values, mean_degree, cap=eigen_cap)
            if n_above < request or request == largest_request:
                break
            request = largest_request if large else min(2 * request, largest_request)
        n_used = n_above
    n_used = min(n_used, values.size)
    used_values = values[:n_used].copy()
    used_vectors = vectors[:, :n_used].copy()
    if n_used > 0 and values.size > n_used:
        eigengap = float(abs(values[n_used - 1]) - abs(values[n_used]))
    else:
        eigengap = float("nan")
    # Fix each eigenvector's sign so the basis is reproducible entry by entry.
    if n_used:
        # Row-wise on a contiguous transpose: the same first maxima as
        # argmax(axis=0), without striding through (n, k) memory.
        pivots = np.argmax(np.abs(np.ascontiguousarray(used_vectors.T)), axis=1)
        signs = np.sign(used_vectors[pivots, np.arange(n_used)])
        used_vectors *= np.where(signs == 0, 1.0, signs)

    basis = _orthonormal_basis(n_units, used_vectors)
    adjacency_times_basis = np.ascontiguousarray(matrix @ basis)
    pc_diagonal = -np.einsum("nq,nq->n", adjacency_times_basis, basis)
    with np.errstate(divide="ignore", invalid="ignore"):
        shrinkage = np.where(
            degrees > 0,
            1.0
            - np.einsum("nq,nq->n", adjacency_times_basis, adjacency_times_basis)
            / degrees,
            1.0,
        )
    # Rounding can push r_j a hair outside [0, 1]; the bound is exact.
    shrinkage = np.clip(shrinkage, 0.0, 1.0)

    if two_hop:
        dependency, factor, note = _two_hop_data(matrix, int(max_two_hop_units))
    else:
        dependency, factor = None, None
        note = "two-hop data not requested (prepare_graph(..., two_hop=True))."

    for array in (
        degrees,
        used_values,
        basis,
        adjacency_times_basis,
        pc_diagonal,
        shrinkage,
    ):
        array.setflags(write=False)
    if factor is not None:
        factor.setflags(write=False)
    return GraphPreparation(
        adjacency=matrix,
        adjacency_single=matrix_single,
        degrees=degrees,
        n_units=n_units,
        mean_degree=mean_degree,
        n_eigenvectors=n_used,
        eigenvalues=used_values,
        eigengap=eigengap,
        eigen_threshold=threshold,
        eigen_method=method,
        basis=basis,
        adjacency_times_basis=adjacency_times_basis,
        pc_diagonal=pc_diagonal,
        shrinkage=shrinkage,
        min_shrinkage=float(shrinkage.min()),
        two_hop_matrix=dependency,
        two_hop_clipped_factor=factor,
        two_hop_note=note,
    )


# --------------------------------------------------------------------------
# Input checks and shared pieces
# --------------------------------------------------------------------------


def _validate_batch(
    prep: GraphPreparation, W: np.ndarray, Y: np.ndarray, treatment_probability: float
) -> tuple[np.ndarray, np.ndarray, float]:
    """Return ``W`` and ``Y`` as C-contiguous ``(n, B)`` float64 arrays."""
    if not isinstance(prep, GraphPreparation):
        raise ModelError(
            "`prep` must be a GraphPreparation from prepare_graph; "
            f"got {type(prep).__name__}."
        )
    arrays = []
    for name, values in (("W", W), ("Y", Y)):
        array = np.asarray(values, dtype=float)
        if array.ndim == 1:
            array = array[:, None]
        if array.ndim != 2 or array.shape[0] != prep.n_units:
            raise ModelError(
                f"`{name}` must have shape (n, B) with n = {prep.n_units}; "
                f"got shape {np.shape(values)}."
            )
        arrays.append(np.ascontiguousarray(array))
    treatments, outcomes = arrays
    if treatments.shape != outcomes.shape:
        raise ModelError(
            "`W` and `Y` must have the same shape; "
            f"got {treatments.shape} and {outcomes.shape}."
        )
    if np.any((treatments != 0.0) & (treatments != 1.0)):
        raise ModelError("`W` must contain only 0 and 1 (treatment indicators).")
    if not np.all(np.isfinite(outcomes)):
        raise ModelError("`Y` must be finite (no NaN or infinite outcomes).")
    probability = float(treatment_probability)
    if not 0.0 < probability < 1.0:
        raise ModelError(
            f"`treatment_probability` must be in (0, 1); got {treatment_probability!r}."
        )
    return treatments, outcomes, probability


def _ht_weights(treatments: np.ndarray, probability: float) -> np.ndarray:
    """``omega_i = (W_i - pi) / (pi (1 - pi))`` (METHODS §0)."""
    return (treatments - probability) / (probability * (1.0 - probability))


def _safe_sqrt(variance: np.ndarray) -> np.ndarray:
    """Square root, NaN for negative or NaN variances."""
    with np.errstate(invalid="ignore"):
        return np.where(variance >= 0, np.sqrt(np.maximum(variance, 0.0)), np.nan)


def treated_neighbour_counts(prep: GraphPreparation, W: np.ndarray) -> np.ndarray:
    """Number ``M_i = sum_j A_ij W_j`` of treated neighbours, exactly.

    Parameters
    ----------
    prep : GraphPreparation
    W : numpy.ndarray
        0/1 (or boolean) treatments, shape ``(n, B)`` (or ``(n,)``).

    Returns
    -------
    numpy.ndarray
        float64, shape ``(n, B)``: the same numbers as the float64 product
        ``A @ W``, bit for bit.

    Raises
    ------
    ModelError
        If ``W`` holds values other than 0 and 1.

    Notes
    -----
    One sparse product, ``O(|E| B)``, on the float32 copy of ``A``: every
    count is an integer below ``n < 2^24`` (scenarios allow 2 x 10^6 units),
    exact in float32, so only the bytes moved are halved (measured at 10^6
    units and 25 columns: 1.1 s instead of 2.0 s).
    """
    treatments = np.asarray(W).reshape(prep.n_units, -1)
    if treatments.dtype != bool and np.any((treatments != 0.0) & (treatments != 1.0)):
        raise ModelError("`W` must contain only 0 and 1 (treatment indicators).")
    if prep.n_units >= 2**24:
        return _sparse_product(prep.adjacency, np.ascontiguousarray(treatments, dtype=np.float64))
    single = np.ascontiguousarray(treatments, dtype=np.float32)
    return _sparse_product(prep.adjacency_single, single).astype(np.float64)


def treated_neighbour_fraction(
    prep: GraphPreparation, W: np.ndarray, *, counts: np.ndarray | None = None
) -> np.ndarray:
    """Fraction ``X_i = M_i / N_i`` of treated neighbours, 0 for isolates.

    Parameters
    ----------
    prep : GraphPreparation
    W : numpy.ndarray
        Treatments, shape ``(n, B)`` (or ``(n,)``).
    counts : numpy.ndarray, optional
        ``treated_neighbour_counts(prep, W)`` when the caller has it.

    Returns
    -------
    numpy.ndarray
        Shape ``(n, B)``.

    Notes
    -----
    METHODS §0 and the project decision on isolates (``X_i := 0``). One sparse
    product, ``O(|E| B)`` (see :func:`treated_neighbour_counts`).
    """
    if counts is None:
        counts = treated_neighbour_counts(prep, W)
    inverse_degree = np.divide(
        1.0, prep.degrees, out=np.zeros_like(prep.degrees), where=prep.degrees > 0
    )
    return counts * inverse_degree[:, None]


def _direct_variance(
    prep: GraphPreparation, scores: np.ndarray, variance: str
) -> np.ndarray:
    """Dependency-graph variance ``Z^T G Z / n^2`` for the named ``G``."""
    n_units = prep.n_units
    if variance == "two_hop_psd":
        # K = D^{-1/2}(I+A)^2 D^{-1/2}, D = diag((I+A)^2) = 1 + N_i, so
        # Z^T K Z = ||(I + A) D^{-1/2} Z||^2 (METHODS §4.3): PSD, sparse.
        scaled = scores / np.sqrt(1.0 + prep.degrees)[:, None]
        spread = scaled + _sparse_product(prep.adjacency, scaled)
        return _column_sums(spread * spread) / n_units**2
    if prep.two_hop_matrix is None:
        raise ModelError(
            f"`variance`='{variance}' needs the two-hop dependency matrix; "
            "call prepare_graph(..., two_hop=True)."
        )
    if variance == "two_hop_unclipped":
        return (
            _column_sums(scores * _sparse_product(prep.two_hop_matrix, scores))
            / n_units**2
        )
    if prep.two_hop_clipped_factor is None:
        raise ModelError(
            f"`variance`='two_hop' is unavailable for this graph: {prep.two_hop_note}"
        )
    return _clipped_quadratic(prep.two_hop_clipped_factor, scores) / n_units**2


def _check_direct_variance(variance: str) -> None:
    if variance not in DIRECT_VARIANCES:
        raise ModelError(
            f"`variance` must be one of {', '.join(DIRECT_VARIANCES)}; "
            f"got {variance!r}."
        )


# --------------------------------------------------------------------------
# Direct effect
# --------------------------------------------------------------------------


def estimate_direct_hajek(
    prep: GraphPreparation,
    W: np.ndarray,
    Y: np.ndarray,
    *,
    treatment_probability: float,
    variance: DirectVariance = "neyman",
    observed: np.ndarray | None = None,
) -> EstimateBatch:
    """Hájek (difference-in-means) estimator of the direct effect.

    ``observed`` (``(n, B)`` bool), when given, marks the units whose outcome
    is observed: the arms' means and variances use those units only
    (complete cases under outcome attrition), and the contributions are
    scaled by n / (units observed) so that the estimate's error is still
    their mean.

    Parameters
    ----------
    prep : GraphPreparation
    W, Y : numpy.ndarray
        Treatments (0/1) and outcomes, shape ``(n, B)``.
    treatment_probability : float
        Bernoulli probability ``pi`` of the design, in ``(0, 1)``.
    variance : {"neyman", "two_hop", "two_hop_unclipped", "two_hop_psd"}
        ``"neyman"``: ``s1^2/n1 + s0^2/n0`` (sample variances, ``ddof=1``).
        ``"two_hop"``: ``Z^T G_+ Z / n^2`` with ``G_+`` the two-hop
        dependency matrix eigen-clipped at zero and
        ``Z_i = W_i (Y_i - mu1)/pi - (1 - W_i)(Y_i - mu0)/(1 - pi)``;
        ``"two_hop_unclipped"``: the same with ``G`` itself (may be negative;
        the SE is then NaN); ``"two_hop_psd"``: the same with
        ``K = D^{-1/2}(I + A)^2 D^{-1/2}``.

    Returns
    -------
    EstimateBatch
        ``estimator="hajek"``. Columns with fewer than 2 treated or fewer
        than 2 control units get NaN estimate, SE and contributions.
        Contributions are ``W_i (Y_i - mu1)/pihat - (1 - W_i)(Y_i - mu0)/(1 - pihat)``
        with ``pihat = n1/n`` (mean zero).

    Raises
    ------
    ModelError
        On malformed inputs, an unknown ``variance``, or two-hop data that
        :func:`prepare_graph` did not build.

    Notes
    -----
    METHODS §2.1 (estimator), §4.1 (Neyman variance: the conservative bound
    of Neyman 1923) and §4.3 (dependency-graph HAC; the two-hop matrix is not
    PSD in general, hence the clipped and PSD-by-construction versions).
    Running time ``O(n B)`` plus ``O(|E| B)`` (``two_hop_psd``),
    ``O(nnz(G) B)`` (``two_hop_unclipped``) or ``O(n^2 B)`` (``two_hop``).
    """
    _check_direct_variance(variance)
    treatments, outcomes, probability = _validate_batch(
        prep, W, Y, treatment_probability
    )
    if observed is not None:
        # Complete cases: units whose outcome is missing are in neither arm.
        seen = np.asarray(observed, dtype=float)
        treatments = treatments * seen
        controls = (1.0 - np.asarray(W, dtype=float)) * seen
    else:
        controls = 1.0 - treatments
    n_treated = _column_sums(treatments)
    n_control = _column_sums(controls) if observed is not None else prep.n_units - n_treated
    n_seen = n_treated + n_control
    valid = (n_treated >= 2) & (n_control >= 2)
    with np.errstate(divide="ignore", invalid="ignore"):
        mean_treated = _column_sums(treatments * outcomes) / n_treated
        mean_control = _column_sums(controls * outcomes) / n_control
        # Centre before squaring (two-pass) for accuracy with large levels.
        resid_treated = treatments * (outcomes - mean_treated)
        resid_control = controls * (outcomes - mean_control)
        share_treated = n_treated / n_seen
        contributions = resid_treated / share_treated - resid_control / (
            1.0 - share_treated
        )
        if observed is not None:
            # Scaled so that the estimate's error is (1/n) sum contributions, as for every estimator.
            contributions = contributions * (prep.n_units / n_seen)
        if variance == "neyman":
            var = _column_sums(resid_treated**2) / (
                (n_treated - 1.0) * n_treated
            ) + _column_sums(resid_control**2) / ((n_control - 1.0) * n_control)
        else:
            scores = resid_treated / probability - resid_control / (1.0 - probability)
            scores[:, ~valid] = 0.0
            var = _direct_variance(prep, scores, variance)
            if observed is not None:
                var = var * (prep.n_units / n_seen) ** 2
    estimate = np.where(valid, mean_treated - mean_control, np.nan)
    standard_error = np.where(valid, _safe_sqrt(var), np.nan)
    contributions[:, ~valid] = np.nan
    return EstimateBatch("hajek", variance, estimate, standard_error, contributions)


def estimate_direct_ht(
    prep: GraphPreparation,
    W: np.ndarray,
    Y: np.ndarray,
    *,
    treatment_probability: float,
    centre: float = 0.0,
    variance: DirectVariance = "neyman",
) -> EstimateBatch:
    """Horvitz-Thompson estimator of the direct effect on centred outcomes.

    Parameters
    ----------
    prep : GraphPreparation
    W, Y : numpy.ndarray
        Treatments (0/1) and outcomes, shape ``(n, B)``.
    treatment_probability : float
        Bernoulli probability ``pi``, in ``(0, 1)``.
    centre : float, default 0.0
        Constant ``c`` fixed before seeing the data; subtracting it keeps the
        estimator unbiased and reduces its variance (METHODS §2.4).
    variance : {"neyman", "two_hop", "two_hop_unclipped", "two_hop_psd"}
        ``"neyman"``: ``(1/n^2) sum [W_i (Y_i-c)^2/pi^2 + (1-W_i)(Y_i-c)^2/(1-pi)^2]``,
        the unbiased estimator of the estimable upper bound of METHODS §4.1.
        The two-hop options use ``Z_i = omega_i (Y_i - c)`` (uncentred, the
        dependency-graph analogue of that bound) in ``Z^T G Z / n^2``.

    Returns
    -------
    EstimateBatch
        ``estimator="horvitz_thompson"``, estimate ``(1/n) sum omega_i (Y_i - c)``,
        contributions ``omega_i (Y_i - c)``.

    Raises
    ------
    ModelError
        On malformed inputs or unavailable variance options.

    Notes
    -----
    Exactly unbiased for ``tau_DIR`` on any graph because
    ``E[omega_i Y_i] = E[Y_i | W_i = 1] - E[Y_i | W_i = 0]`` (METHODS §2.1;
    Horvitz & Thompson 1952, JASA 47:663-685). Running time ``O(n B)`` plus
    the variance's cost (see :func:`estimate_direct_hajek`).
    """
    _check_direct_variance(variance)
    treatments, outcomes, probability = _validate_batch(
        prep, W, Y, treatment_probability
    )
    contributions = _ht_weights(treatments, probability) * (outcomes - float(centre))
    estimate = _column_sums(contributions) / prep.n_units
    if variance == "neyman":
        # omega_i^2 = W_i/pi^2 + (1 - W_i)/(1 - pi)^2, so this is the §4.1 sum.
        var = _column_sums(contributions * contributions) / prep.n_units**2
    else:
        var = _direct_variance(prep, contributions, variance)
    return EstimateBatch(
        "horvitz_thompson", variance, estimate, _safe_sqrt(var), contributions
    )


# --------------------------------------------------------------------------
# Spillover (indirect) effect
# --------------------------------------------------------------------------


def _spillover_result(
    name: str,
    prep: GraphPreparation,
    weights: np.ndarray,
    totals: np.ndarray,
    probability: float,
) -> EstimateBatch:
    """Estimate ``(1/n) sum omega_i T_i`` with plug-in variance."""
    contributions = weights * totals
    estimate = _column_sums(contributions) / prep.n_units
    # E[omega_i^2] = 1/(pi(1-pi)) replaces omega_i^2 (METHODS §3.2-3.3).
    var = _column_sums(totals * totals) / (
        prep.n_units**2 * probability * (1.0 - probability)
    )
    return EstimateBatch(name, "plug_in", estimate, _safe_sqrt(var), contributions)


def estimate_spillover_ht(
    prep: GraphPreparation,
    W: np.ndarray,
    Y: np.ndarray,
    *,
    treatment_probability: float,
    centre: float,
) -> EstimateBatch:
    """Horvitz-Thompson estimator of the spillover effect on centred outcomes.

    Parameters
    ----------
    prep : GraphPreparation
    W, Y : numpy.ndarray
        Treatments (0/1) and outcomes, shape ``(n, B)``.
    treatment_probability : float
        Bernoulli probability ``pi``, in ``(0, 1)``.
    centre : float
        Constant ``c`` fixed in advance (required: uncentred HT is
        inconsistent once the mean degree grows like ``sqrt(n)``, METHODS §3.2).

    Returns
    -------
    EstimateBatch
        ``estimator="centred_ht"``, ``variance_estimator="plug_in"``:
        estimate ``(1/n) sum_i omega_i S_i`` with ``S = A(Y - c)``, plug-in
        variance ``sum_i S_i^2 / (n^2 pi (1 - pi))``, contributions
        ``omega_i S_i``.

    Notes
    -----
    Exactly unbiased for ``tau_IND`` under one-hop interference for any
    ``c``, because ``E[omega_i Y_j]`` is the effect of ``i`` on ``j`` and
    vanishes for non-neighbours (METHODS §3.1); the variance drops cross
    terms of relative order ``rho_n`` (§3.2). Running time ``O(|E| B)``.
    """
    treatments, outcomes, probability = _validate_batch(
        prep, W, Y, treatment_probability
    )
    neighbour_sums = _sparse_product(prep.adjacency, outcomes - float(centre))
    return _spillover_result(
        "centred_ht",
        prep,
        _ht_weights(treatments, probability),
        neighbour_sums,
        probability,
    )


def estimate_spillover_pc(
    prep: GraphPreparation,
    W: np.ndarray,
    Y: np.ndarray,
    *,
    treatment_probability: float,
) -> EstimateBatch:
    """PC-balancing estimator of the spillover effect, published form.

    Parameters
    ----------
    prep : GraphPreparation
    W, Y : numpy.ndarray
        Treatments (0/1) and outcomes, shape ``(n, B)``.
    treatment_probability : float
        Bernoulli probability ``pi``, in ``(0, 1)``.

    Returns
    -------
    EstimateBatch
        ``estimator="pc_balancing"``, ``variance_estimator="plug_in"``:
        estimate ``(1/n) Y^T A (I - P) omega`` with ``P = Q Q^T``; plug-in
        variance ``sum_i T_i^2 / (n^2 pi (1 - pi))`` with
        ``T = (I - P) A Y``; contributions ``omega_i T_i``.

    Notes
    -----
    METHODS §3.3 (construction as we reconstruct it; the published choices
    of ``k`` and the diagonal are unresolved there). It is biased: each
    unit's spillover is shrunk by ``r_j < 1`` and the diagonal of
    ``A(I - P)`` leaks direct effects in, so the bias does not vanish under
    the null of no spillover. Prefer :func:`estimate_spillover_pc_corrected`.
    Running time ``O((|E| + n q) B)``.
    """
    treatments, outcomes, probability = _validate_batch(
        prep, W, Y, treatment_probability
    )
    neighbour_sums = _sparse_product(prep.adjacency, outcomes)
    balanced = neighbour_sums - _expand(
        prep.basis, _project(prep.basis, neighbour_sums)
    )
    return _spillover_result(
        "pc_balancing",
        prep,
        _ht_weights(treatments, probability),
        balanced,
        probability,
    )


def _apply_corrected_balancing(
    prep: GraphPreparation, values: np.ndarray
) -> np.ndarray:
    """``B @ values`` with ``B = A(I - P)``, diagonal zeroed, never formed."""
    # B w = A w - (AQ)(Q^T w) - diag(A(I-P)) * w   (METHODS §3.3).
    return (
        _sparse_product(prep.adjacency, values)
        - _expand(prep.adjacency_times_basis, _project(prep.basis, values))
        - prep.pc_diagonal[:, None] * values
    )


def _apply_corrected_balancing_transpose(
    prep: GraphPreparation, values: np.ndarray
) -> np.ndarray:
    """``B.T @ values`` = ``(I - P) A values - diag * values``."""
    spread = _sparse_product(prep.adjacency, values)
    return (
        spread
        - _expand(prep.basis, _project(prep.basis, spread))
        - prep.pc_diagonal[:, None] * values
    )


def estimate_spillover_pc_corrected(
    prep: GraphPreparation,
    W: np.ndarray,
    Y: np.ndarray,
    *,
    treatment_probability: float,
) -> EstimateBatch:
    """Corrected PC-balancing estimator of the spillover effect (designcalc's variant).

    This is designcalc's own proposal (METHODS §3.3, "recommended corrected
    variant"), not a published estimator: label it as such in reports.

    Parameters
    ----------
    prep : GraphPreparation
    W, Y : numpy.ndarray
        Treatments (0/1) and outcomes, shape ``(n, B)``.
    treatment_probability : float
        Bernoulli probability ``pi``, in ``(0, 1)``.

    Returns
    -------
    EstimateBatch
        ``estimator="pc_balancing_corrected"``,
        ``variance_estimator="plug_in"``: estimate
        ``(1/n) sum_j (Y_j / r_j)(B omega)_j`` where ``B`` is ``A(I - P)``
        with its diagonal set to zero; plug-in variance
        ``sum_i T_i^2 / (n^2 pi (1 - pi))`` with ``T = B^T (Y / r)``;
        contributions ``omega_i T_i``.

    Raises
    ------
    ModelError
        If some ``r_j`` is zero: that unit's neighbourhood lies in the span
        of the basis, so its spillover is not identified; use fewer
        eigenvectors. (Callers should warn when ``prep.min_shrinkage < 0.5``.)

    Notes
    -----
    Zeroing the diagonal removes the leakage of direct effects and dividing
    by ``r_j`` undoes the shrinkage, so under anonymous interference (every
    neighbour of ``j`` has the same effect on ``j``) the estimator is exactly
    unbiased for ``tau_IND`` for any basis computed from the graph alone.
    ``B`` is never formed: ``B w = A w - (AQ)(Q^T w) - diag * w``. Running
    time ``O((|E| + n q) B)``.
    """
    treatments, outcomes, probability = _validate_batch(
        prep, W, Y, treatment_probability
    )
    unidentified = prep.shrinkage < _SHRINKAGE_FLOOR
    if np.any(unidentified):
        raise ModelError(
            f"corrected PC-balancing: shrinkage r_j is zero for "
            f"{int(np.count_nonzero(unidentified))} unit(s) (min r_j = "
            f"{prep.min_shrinkage:.3g}), because their neighbourhoods lie in the "
            f"span of the {prep.basis.shape[1]}-column basis; use fewer eigenvectors "
            "(prepare_graph n_eigenvectors)."
        )
    totals = _apply_corrected_balancing_transpose(
        prep, outcomes / prep.shrinkage[:, None]
    )
    return _spillover_result(
        "pc_balancing_corrected",
        prep,
        _ht_weights(treatments, probability),
        totals,
        probability,
    )


def _batched_ols(
    regressors: Sequence[np.ndarray], outcomes: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """OLS of each column of ``outcomes`` on the matching columns of ``regressors``.

    Returns ``(coefficients (B, p), inverse Gram (B, p, p), residuals (n, B),
    singular (B,))``.  Gram matrices are built with per-column sums (so the
    numbers do not depend on the batch size) and inverted as a stack; a
    Gram matrix with condition number above ``_MAX_CONDITION`` is singular
    (e.g. nobody treated, a constant regressor) and its column is flagged.
    """
    p = len(regressors)
    batch = outcomes.shape[1]
    gram = np.empty((batch, p, p))
    moments = np.empty((batch, p))
    for row in range(p):
        moments[:, row] = _column_sums(regressors[row] * outcomes)
        for col in range(row, p):
            gram[:, row, col] = gram[:, col, row] = _column_sums(
                regressors[row] * regressors[col]
            )
    singular = ~(np.linalg.cond(gram) < _MAX_CONDITION)
    gram[singular] = np.eye(p)
    inverse = np.linalg.inv(gram)
    coefficients = (inverse * moments[:, None, :]).sum(axis=2)
    residuals = outcomes - sum(
        regressors[k] * coefficients[:, k][None, :] for k in range(p)
    )
    return coefficients, inverse, residuals, singular


def _covariate_columns(prep: GraphPreparation, covariates: np.ndarray, batch: int) -> list[np.ndarray]:
    """The ``K`` covariates as ``(n, B)`` arrays, checked against the batch."""
    values = np.asarray(covariates, dtype=float)
    if values.ndim == 2:
        values = values[:, :, None]
    if values.ndim != 3 or values.shape[:2] != (prep.n_units, batch):
        raise ModelError(
            f"`covariates` must have shape (n, B, K) with n = {prep.n_units} and "
            f"B = {batch}; got shape {np.shape(covariates)}."
        )
    if not np.all(np.isfinite(values)):
        raise ModelError("`covariates` must be finite.")
    return [np.ascontiguousarray(values[:, :, k]) for k in range(values.shape[2])]


def _centred(prep: GraphPreparation, columns: Sequence[np.ndarray]) -> list[np.ndarray]:
    """Each covariate minus its per-column sample mean."""
    return [c - _column_sums(c)[None, :] / prep.n_units for c in columns]


def residualise_on_covariates(
    prep: GraphPreparation, Y: np.ndarray, covariates: np.ndarray
) -> np.ndarray:
    """Outcomes with their covariate-predicted part removed, by a fit that does not use treatment.

    Parameters
    ----------
    prep : GraphPreparation
    Y : numpy.ndarray
        Outcomes, shape ``(n, B)``.
    covariates : numpy.ndarray
        Baseline covariates, shape ``(n, B, K)`` (or ``(n, B)`` for one).

    Returns
    -------
    numpy.ndarray
        ``Y - (C - Cbar) beta`` per column, ``beta`` the OLS slopes of ``Y``
        on the centred covariates ``C - Cbar`` (no treatment in the fit).

    Notes
    -----
    Only the slopes are removed: the outcome level stays, so the centred HT
    estimator keeps its pre-specified centre and PC-balancing its constant
    basis vector.  Subtracting a fitted intercept as well would move every
    residual by ``tau_DIR W_i / n`` and leak about ``tau_DIR dbar / n`` of
    the direct effect into the spillover estimate; the slopes' remaining
    dependence on treatment is of order ``dbar / n`` times the correlation
    of neighbours' covariates.  Singular fits (a covariate constant in the
    sample) leave the column unchanged.
    """
    outcomes = np.ascontiguousarray(np.asarray(Y, dtype=float))
    if outcomes.ndim == 1:
        outcomes = outcomes[:, None]
    centred = _centred(prep, _covariate_columns(prep, covariates, outcomes.shape[1]))
    _, _, residuals, singular = _batched_ols(centred, outcomes)
    # The fit has no intercept column, so residuals keep the outcome mean
    # (the covariates are centred, hence orthogonal to the constant).
    residuals[:, singular] = outcomes[:, singular]
    return residuals


def estimate_direct_lin(
    prep: GraphPreparation,
    W: np.ndarray,
    Y: np.ndarray,
    *,
    treatment_probability: float,
    covariates: np.ndarray,
) -> EstimateBatch:
    """Lin's regression-adjusted estimator of the direct effect, HC2 standard error.

    Parameters
    ----------
    prep : GraphPreparation
    W, Y : numpy.ndarray
        Treatments (0/1) and outcomes, shape ``(n, B)``.
    treatment_probability : float
        Bernoulli probability ``pi`` (only validated).
    covariates : numpy.ndarray
        Baseline covariates, shape ``(n, B, K)``.

    Returns
    -------
    EstimateBatch
        ``estimator="lin"``, ``variance_estimator="hc2"``: the coefficient of
        ``W`` in the OLS fit of ``Y`` on ``(1, W, C - Cbar, W (C - Cbar))``
        (covariates centred at their sample means, fully interacted with
        treatment), with the HC2 robust variance
        ``sum_i l_i^2 e_i^2 / (1 - h_ii)``, ``l_i`` the row of
        ``(D^T D)^{-1} D^T`` for ``W`` and ``h_ii`` the leverages.
        Contributions are ``n l_i e_i``.  Columns whose design is singular
        (fewer than ``K + 1`` units in an arm, a constant covariate) get NaN.

    Notes
    -----
    Lin (2013), "Agnostic notes on regression adjustments to experimental
    data: reexamining Freedman's critique", Annals of Applied Statistics
    7(1):295-318: with the interactions, adjustment cannot hurt asymptotic
    precision under complete randomisation, and the Huber-White sandwich is
    consistent or conservative.  HC2 (MacKinnon & White 1985) is chosen
    because without covariates it equals the Neyman variance
    ``s1^2/n1 + s0^2/n0`` exactly, so the adjusted and unadjusted tests are
    on the same footing.  With ``K = 0`` columns the estimate is the Hajek
    difference in means.  Running time ``O(n B K^2)``.
    """
    treatments, outcomes, _ = _validate_batch(prep, W, Y, treatment_probability)
    centred = _centred(prep, _covariate_columns(prep, covariates, treatments.shape[1]))
    regressors = [np.ones_like(treatments), treatments]
    regressors += centred + [treatments * c for c in centred]
    coefficients, inverse, residuals, singular = _batched_ols(regressors, outcomes)
    p = len(regressors)
    leverage_w = sum(regressors[k] * inverse[:, 1, k][None, :] for k in range(p))
    hat = np.zeros_like(outcomes)
    for k in range(p):
        spread = sum(regressors[m] * inverse[:, k, m][None, :] for m in range(p))
        hat += regressors[k] * spread
    with np.errstate(divide="ignore", invalid="ignore"):
        var = _column_sums(leverage_w**2 * residuals**2 / (1.0 - hat))
    # A unit alone in its cell has leverage 1: HC2 is undefined.
    singular |= ~np.all(hat < 1.0 - 1e-12, axis=0)
    contributions = prep.n_units * leverage_w * residuals
    contributions[:, singular] = np.nan
    estimate = np.where(singular, np.nan, coefficients[:, 1])
    standard_error = np.where(singular, np.nan, _safe_sqrt(var))
    return EstimateBatch("lin", "hc2", estimate, standard_error, contributions)


def estimate_spillover_exposure_regression(
    prep: GraphPreparation,
    W: np.ndarray,
    Y: np.ndarray,
    *,
    treatment_probability: float,
    covariates: np.ndarray | None = None,
    exposure: np.ndarray | None = None,
) -> EstimateBatch:
    """Spillover effect as the exposure coefficient of an OLS fit, HC1 SE.

    Parameters
    ----------
    prep : GraphPreparation
    W, Y : numpy.ndarray
        Treatments (0/1) and outcomes, shape ``(n, B)``.
    treatment_probability : float
        Bernoulli probability ``pi`` (only validated; OLS does not use it).
    covariates : numpy.ndarray, optional
        Baseline covariates, shape ``(n, B, K)``, added to the regression
        (the estimator is then named ``"exposure_regression_adjusted"``).
    exposure : numpy.ndarray, optional
        ``treated_neighbour_fraction(prep, W)`` when the caller already has
        it (the engine computes it once per batch for every run).

    Returns
    -------
    EstimateBatch
        ``estimator="exposure_regression"``, ``variance_estimator="hc1"``:
        the coefficient of ``X`` in the OLS regression of ``Y`` on
        ``(1, W, X)`` (plus the covariates), ``X`` the treated-neighbour
        fraction (0 for isolates), with the HC1 robust SE
        ``n/(n-p) [(D^T D)^{-1} D^T diag(e^2) D (D^T D)^{-1}]_XX``.
        Columns whose design is singular (e.g. nobody treated, constant
        exposure) get NaN. Contributions are ``n [(D^T D)^{-1} d_i]_X e_i``
        (mean zero by the normal equations).

    Notes
    -----
    A model-based benchmark, not a design-based estimator: it is biased for
    ``tau_IND`` when the spillover is nonlinear in ``X`` or interacts with
    own treatment, and the HC1 SE ignores the dependence between neighbours'
    residuals. HC1 is MacKinnon & White (1985, J. Econometrics; from memory).
    The Gram matrices are built with column sums and inverted as a stack,
    no loop over columns. Running time ``O((|E| + n p^2) B)``.
    """
    treatments, outcomes, _ = _validate_batch(prep, W, Y, treatment_probability)
    n_units = prep.n_units
    if exposure is None:
        exposure = treated_neighbour_fraction(prep, treatments)
    elif np.shape(exposure) != treatments.shape:
        raise ModelError(
            f"`exposure` must have the shape of `W`, {treatments.shape}; got {np.shape(exposure)}."
        )
    regressors = [np.ones_like(treatments), treatments, exposure]
    name = "exposure_regression"
    if covariates is not None:
        regressors += _centred(prep, _covariate_columns(prep, covariates, treatments.shape[1]))
        name = "exposure_regression_adjusted"
    p = len(regressors)
    coefficients, inverse, residuals, singular = _batched_ols(regressors, outcomes)
    # Row X of (D^T D)^{-1} applied to each unit's regressor vector d_i.
    leverage_x = sum(regressors[k] * inverse[:, 2, k][None, :] for k in range(p))
    contributions = n_units * leverage_x * residuals
    var = (n_units / (n_units - float(p))) * _column_sums(leverage_x**2 * residuals**2)
    estimate = np.where(singular, np.nan, coefficients[:, 2])
    standard_error = np.where(singular, np.nan, _safe_sqrt(var))
    contributions[:, singular] = np.nan
    return EstimateBatch(name, "hc1", estimate, standard_error, contributions)


# --------------------------------------------------------------------------
# Total effect
# --------------------------------------------------------------------------


def combine_total(direct: EstimateBatch, spillover: EstimateBatch) -> EstimateBatch:
    """Total effect ``tau_TOT = tau_DIR + tau_IND`` from two estimates.

    Parameters
    ----------
    direct, spillover : EstimateBatch
        Estimates from the same graph and assignment batch.

    Returns
    -------
    EstimateBatch
        Estimate the sum; variance ``V_D + V_S + 2 Cov`` clipped at 0 with
        the linearised covariance ``Cov = (1/n^2) sum_i phi_D,i phi_S,i``;
        contributions ``phi_D + phi_S``; names joined by ``"+"``.

    Raises
    ------
    ModelError
        If the two batches have different shapes.

    Notes
    -----
    ``tau_TOT(pi) = d mean(E Y)/d pi = tau_DIR + tau_IND`` (METHODS §1.2).
    The covariance treats each unit's pair of contributions as driven by its
    own treatment, the same approximation as the plug-in variances, whatever
    variance estimator each input used.
    """
    if direct.contributions.shape != spillover.contributions.shape:
        raise ModelError(
            "`direct` and `spillover` must come from the same batch; got "
            f"contribution shapes {direct.contributions.shape} and "
            f"{spillover.contributions.shape}."
        )
    n_units = direct.contributions.shape[0]
    covariance = (
        _column_sums(direct.contributions * spillover.contributions) / n_units**2
    )
    var = direct.standard_error**2 + spillover.standard_error**2 + 2.0 * covariance
    return EstimateBatch(
        f"{direct.estimator}+{spillover.estimator}",
        f"{direct.variance_estimator}+{spillover.variance_estimator}",
        direct.estimate + spillover.estimate,
        np.sqrt(np.maximum(var, 0.0)),
        direct.contributions + spillover.contributions,
    )

"""Tests of designcalc.graphs: exact block-model and kernel samplers, CSR building.

Statistical checks use fixed seeds and tolerances of 4 Monte Carlo standard
errors (CHECKS.md §3: agreement means |simulated - theory| <= 3-4 MC SE), so
each would fail by chance with probability about 6e-5 under a correct sampler.
Goodness-of-fit tests use a p-value threshold of 1e-3 for the same reason.
"""

from __future__ import annotations

import itertools
import math

import networkx as nx
import numpy as np
import pytest
import scipy as sp
from hypothesis import given, settings
from hypothesis import strategies as st

from designcalc.errors import ModelError
from designcalc.graphs import (
    _decode_positions,
    _distinct_positions,
    degrees,
    sample_block_graph,
    sample_kernel_graph,
    to_csr,
)

# CHECKS.md §4 block model (Holland, Laskey & Leinhardt 1983, Social Networks 5:109-137).
SBM_SIZES = [50, 30, 20]
SBM_P = np.array([[0.30, 0.05, 0.02], [0.05, 0.40, 0.03], [0.02, 0.03, 0.50]])
# Upper-triangle block pairs in the order (0,0), (1,1), (2,2), (0,1), (0,2), (1,2).
SBM_PAIRS = [(0, 0), (1, 1), (2, 2), (0, 1), (0, 2), (1, 2)]
SBM_EXPECTED = np.array([367.5, 174.0, 95.0, 75.0, 20.0, 18.0])  # CHECKS.md §4

GNP_N, GNP_P = 200, 0.05
Z4 = 4.0  # tolerance in Monte Carlo standard errors
P_VALUE_FLOOR = 1e-3


def _pair_counts(sizes: list[int]) -> np.ndarray:
    """Number of node pairs of each upper-triangle block pair, in SBM_PAIRS order."""
    return np.array(
        [
            sizes[a] * (sizes[a] - 1) / 2 if a == b else sizes[a] * sizes[b]
            for a, b in SBM_PAIRS
        ]
    )


def _block_pair_edge_counts(
    rows: np.ndarray, cols: np.ndarray, sizes: list[int]
) -> np.ndarray:
    """Edge counts per block pair (SBM_PAIRS order) from an undirected edge list."""
    cuts = np.cumsum(sizes)[:-1]
    a = np.searchsorted(cuts, rows, side="right")
    b = np.searchsorted(cuts, cols, side="right")
    low, high = np.minimum(a, b), np.maximum(a, b)
    table = np.bincount(low * len(sizes) + high, minlength=len(sizes) ** 2).reshape(
        len(sizes), len(sizes)
    )
    return np.array([table[a, b] for a, b in SBM_PAIRS])


def _upper_edges(adjacency: sp.sparse.csr_array) -> tuple[np.ndarray, np.ndarray]:
    rows = np.repeat(np.arange(adjacency.shape[0]), np.diff(adjacency.indptr))
    upper = rows < adjacency.indices
    return rows[upper], adjacency.indices[upper]


def _sample_variance_se(sigma2: float, excess_kurtosis: float, n_draws: int) -> float:
    """SE of an unbiased sample variance: Var(s^2) = sigma^4 (2/(R-1) + kappa_excess/R)."""
    return math.sqrt(sigma2**2 * (2 / (n_draws - 1) + excess_kurtosis / n_draws))


def _assert_canonical_adjacency(adjacency: sp.sparse.csr_array, n: int) -> None:
    assert isinstance(adjacency, sp.sparse.csr_array)
    assert adjacency.shape == (n, n)
    assert adjacency.data.dtype == np.float64
    assert np.all(adjacency.data == 1.0)
    assert adjacency.indices.dtype == np.int32 and adjacency.indptr.dtype == np.int32
    # Recompute canonical form from scratch instead of trusting the stored flag.
    for start, stop in itertools.pairwise(adjacency.indptr):
        assert np.all(np.diff(adjacency.indices[start:stop]) > 0)
    assert np.all(adjacency.diagonal() == 0)
    assert (adjacency != adjacency.T).nnz == 0


# ---------------------------------------------------------------- block model vs theory and networkx


@pytest.mark.statistical
def test_block_model_edge_counts_match_exact_binomial_laws_and_networkx() -> None:
    """Per-block-pair edge counts have the exact binomial means and variances and match networkx."""
    n_ours, n_nx = 2000, 500
    rng = np.random.default_rng(20240601)
    ours = np.array(
        [
            _block_pair_edge_counts(
                *_upper_edges(sample_block_graph(SBM_SIZES, SBM_P, rng=rng)), SBM_SIZES
            )
            for _ in range(n_ours)
        ]
    )
    reference = []
    for seed in range(n_nx):
        graph = nx.stochastic_block_model(
            SBM_SIZES, SBM_P.tolist(), seed=seed
        )  # networkx reference
        edges = np.array(graph.edges(), dtype=np.int64).reshape(-1, 2)
        reference.append(_block_pair_edge_counts(edges[:, 0], edges[:, 1], SBM_SIZES))
    reference = np.array(reference)

    n_pairs = _pair_counts(SBM_SIZES)
    p = np.array([SBM_P[a, b] for a, b in SBM_PAIRS])
    mean = n_pairs * p
    np.testing.assert_allclose(mean, SBM_EXPECTED)  # CHECKS.md §4 values
    variance = n_pairs * p * (1 - p)  # exact binomial variance
    # Excess kurtosis of Binomial(N, p): (1 - 6pq) / (Npq).
    excess_kurtosis = (1 - 6 * p * (1 - p)) / variance

    for sample, size in ((ours, n_ours), (reference, n_nx)):
        # SE of a mean of R binomial counts is sqrt(Npq / R).
        assert np.all(
            np.abs(sample.mean(axis=0) - mean) <= Z4 * np.sqrt(variance / size)
        )
        se_var = np.array(
            [
                _sample_variance_se(v, k, size)
                for v, k in zip(variance, excess_kurtosis, strict=True)
            ]
        )
        assert np.all(np.abs(sample.var(axis=0, ddof=1) - variance) <= Z4 * se_var)

    # Two-sample: difference of means has SE sqrt(Npq (1/R1 + 1/R2)); same for variances.
    se_diff = np.sqrt(variance * (1 / n_ours + 1 / n_nx))
    assert np.all(np.abs(ours.mean(axis=0) - reference.mean(axis=0)) <= Z4 * se_diff)
    se_var_diff = np.sqrt(
        [
            _sample_variance_se(v, k, n_ours) ** 2
            + _sample_variance_se(v, k, n_nx) ** 2
            for v, k in zip(variance, excess_kurtosis, strict=True)
        ]
    )
    assert np.all(
        np.abs(ours.var(axis=0, ddof=1) - reference.var(axis=0, ddof=1))
        <= Z4 * se_var_diff
    )
    # Counts of different block pairs are independent: correlations of R draws have SE ~ 1/sqrt(R).
    correlation = np.corrcoef(ours, rowvar=False)[np.triu_indices(6, k=1)]
    assert np.all(np.abs(correlation) <= Z4 / math.sqrt(n_ours))
    # Whole-distribution comparison of the total edge count (networkx reference).
    assert (
        sp.stats.ks_2samp(ours.sum(axis=1), reference.sum(axis=1)).pvalue
        > P_VALUE_FLOOR
    )


# ---------------------------------------------------------------- G(n, p)


def _triangle_variance(n: int, p: float) -> float:
    """Var of the triangle count of G(n, p).

    Derivation: T = sum over vertex triples of indicators with mean p^3; two
    distinct triangles are dependent only if they share one edge (5 edges in
    all, covariance p^5 - p^6), and there are C(n,3) * 3 * (n - 3) ordered
    such pairs. (Standard; e.g. Janson, Luczak & Rucinski, Random Graphs, 2000,
    from memory.)
    """
    triples = math.comb(n, 3)
    return triples * (p**3 - p**6) + triples * 3 * (n - 3) * (p**5 - p**6)


def _pooled_chi_square(
    observed: np.ndarray, expected: np.ndarray, minimum: float = 5.0
) -> tuple[np.ndarray, np.ndarray]:
    """Merge adjacent bins from both tails inward until every expected count is >= minimum."""
    obs, exp = list(observed.astype(float)), list(expected.astype(float))
    while len(exp) > 2 and exp[0] < minimum:
        exp[:2] = [exp[0] + exp[1]]
        obs[:2] = [obs[0] + obs[1]]
    while len(exp) > 2 and exp[-1] < minimum:
        exp[-2:] = [exp[-2] + exp[-1]]
        obs[-2:] = [obs[-2] + obs[-1]]
    return np.array(obs), np.array(exp)


@pytest.mark.statistical
def test_gnp_edges_triangles_and_degrees_match_theory_and_networkx() -> None:
    """A one-block model is G(n, p): edges, triangles and degrees have the Erdos-Renyi/Gilbert laws."""
    n_draws, n_triangle_draws, n_nx = 1500, 400, 300
    rng = np.random.default_rng(7)
    one_block = np.array([[GNP_P]])
    edges, degree_spread, one_degree, triangles = [], [], [], []
    for r in range(n_draws):
        adjacency = sample_block_graph([GNP_N], one_block, rng=rng)
        d = degrees(adjacency)
        edges.append(adjacency.nnz // 2)
        # Mean squared deviation from the known mean 9.95: expectation exactly Var(d) = 9.4525.
        degree_spread.append(np.mean((d - (GNP_N - 1) * GNP_P) ** 2))
        # One node per graph gives iid Binomial(199, p) draws (degrees within a graph are dependent).
        one_degree.append(d[r % GNP_N])
        if r < n_triangle_draws:
            triangles.append(
                sum(nx.triangles(nx.from_scipy_sparse_array(adjacency)).values()) / 3
            )  # networkx
    edges, degree_spread, one_degree, triangles = map(
        np.array, (edges, degree_spread, one_degree, triangles)
    )

    n_pairs = GNP_N * (GNP_N - 1) / 2
    edge_mean, edge_var = n_pairs * GNP_P, n_pairs * GNP_P * (1 - GNP_P)
    triangle_mean, triangle_var = (
        math.comb(GNP_N, 3) * GNP_P**3,
        _triangle_variance(GNP_N, GNP_P),
    )
    # CHECKS.md §4 reference values (Erdos-Renyi / Gilbert).
    assert edge_mean == pytest.approx(995) and triangle_mean == pytest.approx(164.175)
    degree_mean, degree_var = (GNP_N - 1) * GNP_P, (GNP_N - 1) * GNP_P * (1 - GNP_P)
    assert degree_mean == pytest.approx(9.95) and degree_var == pytest.approx(9.4525)

    # SE of a mean of R iid per-graph values is sd / sqrt(R).
    assert abs(edges.mean() - edge_mean) <= Z4 * math.sqrt(edge_var / n_draws)
    assert abs(edges.var(ddof=1) - edge_var) <= Z4 * _sample_variance_se(
        edge_var, (1 - 6 * GNP_P * (1 - GNP_P)) / edge_var, n_draws
    )
    assert abs(triangles.mean() - triangle_mean) <= Z4 * math.sqrt(
        triangle_var / n_triangle_draws
    )
    # Mean degree of a graph is 2E/n, so its SE is (2/n) sqrt(edge_var / R).
    assert abs(2 * edges.mean() / GNP_N - degree_mean) <= Z4 * (2 / GNP_N) * math.sqrt(
        edge_var / n_draws
    )
    # The per-graph spread values are iid across graphs: SE from their replicate SD.
    assert abs(degree_spread.mean() - degree_var) <= Z4 * degree_spread.std(
        ddof=1
    ) / math.sqrt(n_draws)

    # Degree distribution vs Binomial(199, .05): chi-square goodness of fit, pooled tail bins (scipy.stats).
    support = np.arange(GNP_N)
    observed = np.bincount(one_degree, minlength=GNP_N)
    expected = n_draws * sp.stats.binom.pmf(support, GNP_N - 1, GNP_P)
    obs, exp = _pooled_chi_square(observed, expected)
    assert len(exp) >= 8
    assert sp.stats.chisquare(obs, exp * obs.sum() / exp.sum()).pvalue > P_VALUE_FLOOR

    # Versus networkx.gnp_random_graph: edge and triangle means, degree distribution.
    nx_edges, nx_triangles, nx_degree = [], [], []
    for seed in range(n_nx):
        graph = nx.gnp_random_graph(GNP_N, GNP_P, seed=seed)
        nx_edges.append(graph.number_of_edges())
        nx_triangles.append(sum(nx.triangles(graph).values()) / 3)
        nx_degree.append(graph.degree(seed % GNP_N))
    assert abs(edges.mean() - np.mean(nx_edges)) <= Z4 * math.sqrt(
        edge_var * (1 / n_draws + 1 / n_nx)
    )
    assert abs(triangles.mean() - np.mean(nx_triangles)) <= Z4 * math.sqrt(
        triangle_var * (1 / n_triangle_draws + 1 / n_nx)
    )
    # Two-sample chi-square on a contingency table, bins pooled so the smaller sample expects >= 5.
    nx_observed = np.bincount(nx_degree, minlength=GNP_N)
    bins = np.digitize(support, [5, 7, 8, 9, 10, 11, 12, 13, 15])
    table = np.array(
        [np.bincount(bins, weights=observed), np.bincount(bins, weights=nx_observed)]
    )
    assert table[1].min() >= 5
    assert sp.stats.chi2_contingency(table).pvalue > P_VALUE_FLOOR


# ---------------------------------------------------------------- the exact-position step


@pytest.mark.statistical
def test_distinct_positions_are_a_uniform_subset() -> None:
    """Each group gets exactly its count of distinct positions, uniform over all subsets of that size."""
    n_groups = 60_000
    rng = np.random.default_rng(11)
    # 3 of 6 positions: 20 possible subsets, each with probability 1/20. Heavy repeats
    # (a 50% fill) exercise the top-up rounds.
    group, position = _distinct_positions(
        np.full(n_groups, 3), np.full(n_groups, 6), rng=rng
    )
    assert np.array_equal(np.bincount(group, minlength=n_groups), np.full(n_groups, 3))
    assert position.min() >= 0 and position.max() < 6
    per_group = position.reshape(n_groups, 3)  # output is sorted by group then position
    assert np.all(np.diff(per_group, axis=1) > 0)
    code = (1 << per_group).sum(axis=1)
    observed = np.bincount(code, minlength=64)[
        [sum(1 << i for i in s) for s in itertools.combinations(range(6), 3)]
    ]
    assert observed.sum() == n_groups
    assert sp.stats.chisquare(observed).pvalue > P_VALUE_FLOOR

    # Mixed group sizes in one call, including a full group (count = size) and empty ones.
    counts, sizes = np.array([0, 4, 1, 0, 2]), np.array([5, 4, 10**12, 3, 2])
    group, position = _distinct_positions(counts, sizes, rng=rng)
    assert np.array_equal(np.bincount(group, minlength=5), counts)
    assert np.array_equal(position[group == 1], [0, 1, 2, 3])
    assert np.array_equal(position[group == 4], [0, 1])
    assert 0 <= position[group == 2][0] < 10**12


def test_triangular_decoding_is_a_bijection_and_exact_for_huge_positions() -> None:
    """Within-block positions decode to every pair i < j once; the integer fix-up holds far beyond 2^53."""
    size = 40
    n_pairs = size * (size - 1) // 2
    sizes, offsets = np.array([size]), np.array([0, size])
    position = np.arange(n_pairs, dtype=np.int64)
    i, j = _decode_positions(
        np.zeros(n_pairs, np.int64),
        position,
        np.array([0]),
        np.array([0]),
        sizes,
        offsets,
    )
    assert np.all(i < j)
    assert len(set(zip(i.tolist(), j.tolist(), strict=True))) == n_pairs
    assert np.array_equal(
        j * (j - 1) // 2 + i, position
    )  # the documented layout t = j(j-1)/2 + i

    huge = 3_000_000_000  # C(huge, 2) ~ 4.5e18 pairs, near the int64 limit
    t = np.array(
        [0, 1, 2**53 + 1, 2**60 + 12345, huge * (huge - 1) // 2 - 1], dtype=np.int64
    )
    i, j = _decode_positions(
        np.zeros(t.size, np.int64),
        t,
        np.array([0]),
        np.array([0]),
        np.array([huge]),
        np.array([0, huge]),
    )
    assert np.array_equal(j * (j - 1) // 2 + i, t)
    assert np.all((0 <= i) & (i < j) & (j < huge))


@pytest.mark.statistical
def test_every_pair_of_a_tiny_block_model_appears_with_its_probability() -> None:
    """On a 5-node model every pair's inclusion frequency matches its probability; sparse and dense paths."""
    n_draws = 4000
    sizes = [3, 2]
    # Within-block pairs (0.2, 0.1) use count-then-positions; between pairs (0.45 > 0.3) the dense path.
    probabilities = np.array([[0.2, 0.45], [0.45, 0.1]])
    block = np.array([0, 0, 0, 1, 1])
    rng = np.random.default_rng(3)
    frequency = np.zeros((5, 5))
    patterns = np.zeros(8, dtype=np.int64)
    for _ in range(n_draws):
        dense = sample_block_graph(sizes, probabilities, rng=rng).toarray()
        frequency += dense
        patterns[int(dense[0, 1] + 2 * dense[0, 2] + 4 * dense[1, 2])] += 1
    frequency /= n_draws
    truth = probabilities[block[:, None], block[None, :]]
    upper = np.triu_indices(5, k=1)
    # SE of a frequency over R draws: sqrt(p(1 - p) / R).
    se = np.sqrt(truth * (1 - truth) / n_draws)
    assert np.all(np.abs(frequency - truth)[upper] <= Z4 * se[upper])
    # Joint law of block 0's three pairs: independent Bernoulli(0.2), 8 patterns.
    k = np.array([code.bit_count() for code in range(8)])
    expected = n_draws * 0.2**k * 0.8 ** (3 - k)
    assert sp.stats.chisquare(patterns, expected).pvalue > P_VALUE_FLOOR


# ---------------------------------------------------------------- kernel sampler


RHO = 0.3


def _cosine_probability(u: np.ndarray, v: np.ndarray, rho: float = RHO) -> np.ndarray:
    return np.minimum(
        1.0, rho * (1 + 0.7 * np.cos(2 * np.pi * u) * np.cos(2 * np.pi * v))
    )


def _cosine_cell_bounds(n_cells: int, rho: float = RHO) -> np.ndarray:
    """Exact maxima of rho (1 + 0.7 c(u) c(v)) on each closed cell, c = cos(2 pi .)."""
    grid = np.linspace(0, 1, n_cells + 1)
    low, high = [], []
    for a in range(n_cells):
        points = [grid[a], grid[a + 1]] + [
            x for x in (0.0, 0.5, 1.0) if grid[a] <= x <= grid[a + 1]
        ]
        values = np.cos(2 * np.pi * np.array(points))
        low.append(values.min())
        high.append(values.max())
    low, high = np.array(low), np.array(high)
    corners = np.stack(
        [
            np.outer(low, low),
            np.outer(low, high),
            np.outer(high, low),
            np.outer(high, high),
        ]
    )
    bounds = rho * (1 + 0.7 * corners.max(axis=0)) + 1e-12
    return np.minimum(1.0, np.maximum(bounds, bounds.T))


@pytest.mark.statistical
@pytest.mark.parametrize("bounds", ["tight", "loose"])
def test_kernel_pair_inclusion_frequencies_match_edge_probability(bounds: str) -> None:
    """For fixed types each pair is an edge with frequency edge_probability(u_i, u_j), for tight or loose bounds."""
    n_draws = 2500
    types = np.array([0.05, 0.2, 0.45, 0.55, 0.8, 0.95, 0.3])
    cell_bounds = _cosine_cell_bounds(4) if bounds == "tight" else np.ones((3, 3))
    rng = np.random.default_rng(5)
    frequency = np.zeros((types.size, types.size))
    for _ in range(n_draws):
        frequency += sample_kernel_graph(
            types, _cosine_probability, cell_bounds, rng=rng
        ).toarray()
    frequency /= n_draws
    truth = _cosine_probability(types[:, None], types[None, :])
    upper = np.triu_indices(types.size, k=1)
    # SE of a frequency over R draws: sqrt(p(1 - p) / R).
    se = np.sqrt(truth * (1 - truth) / n_draws)
    assert np.all(np.abs(frequency - truth)[upper] <= Z4 * se[upper])


@pytest.mark.statistical
def test_kernel_edge_count_matches_sum_of_pair_probabilities() -> None:
    """On n = 2000 fixed types the edge count has mean sum p_ij and variance sum p_ij (1 - p_ij)."""
    n, n_draws, rho = 2000, 150, 0.005
    rng = np.random.default_rng(9)
    types = rng.random(n)
    probability = _cosine_probability(types[:, None], types[None, :], rho)
    upper = np.triu_indices(n, k=1)
    mean, variance = (
        probability[upper].sum(),
        (probability[upper] * (1 - probability[upper])).sum(),
    )
    bounds = _cosine_cell_bounds(8, rho)
    counts = np.array(
        [
            sample_kernel_graph(
                types, lambda u, v: _cosine_probability(u, v, rho), bounds, rng=rng
            ).nnz
            // 2
            for _ in range(n_draws)
        ]
    )
    # Sum of independent Bernoullis: SE of the mean of R counts is sqrt(sum pq / R).
    assert abs(counts.mean() - mean) <= Z4 * math.sqrt(variance / n_draws)
    # Sample variance SE with the count treated as near-normal (excess kurtosis ~ 1/sum pq, negligible).
    assert abs(counts.var(ddof=1) - variance) <= Z4 * _sample_variance_se(
        variance, 1 / variance, n_draws
    )


def test_kernel_bound_too_small_raises_and_names_the_cell() -> None:
    """A cell bound below the edge probability raises ModelError naming the cell."""
    types = np.linspace(0.01, 0.99, 60)
    bounds = _cosine_cell_bounds(4)
    bounds[0, 0] = RHO  # true maximum on cell (0, 0) is RHO * 1.7
    with pytest.raises(ModelError, match=r"bound was wrong: in cell \(0, 0\)"):
        sample_kernel_graph(
            types, _cosine_probability, bounds, rng=np.random.default_rng(0)
        )


def test_kernel_zero_bound_cells_are_skipped() -> None:
    """Cells with bound 0 produce no edges and are never evaluated."""
    types = np.array([0.1, 0.2, 0.3, 0.7, 0.8, 0.9])
    seen: list[np.ndarray] = []

    def probability(u: np.ndarray, v: np.ndarray) -> np.ndarray:
        seen.append(np.abs(np.floor(u * 2) - np.floor(v * 2)))
        return np.ones_like(u)

    adjacency = sample_kernel_graph(
        types,
        probability,
        np.array([[1.0, 0.0], [0.0, 1.0]]),
        rng=np.random.default_rng(1),
    )
    expected = np.kron(np.eye(2), np.ones((3, 3))) - np.eye(6)
    assert np.array_equal(adjacency.toarray(), expected)
    assert all(np.all(d == 0) for d in seen)


@pytest.mark.parametrize(
    ("types", "bounds", "probability", "message"),
    [
        (
            np.array([0.1, 1.2]),
            np.ones((2, 2)),
            _cosine_probability,
            "`types` must be numbers in",
        ),
        (np.array([[0.1, 0.2]]), np.ones((2, 2)), _cosine_probability, "1-D array"),
        (np.array([0.1, 0.2]), np.ones((2, 3)), _cosine_probability, "square G x G"),
        (
            np.array([0.1, 0.2]),
            np.array([[1.0, 0.5], [0.4, 1.0]]),
            _cosine_probability,
            "symmetric",
        ),
        (np.array([0.1, 0.2]), np.full((2, 2), -1.0), _cosine_probability, ">= 0"),
        (
            np.array([0.1, 0.2]),
            np.ones((2, 2)),
            lambda u, v: np.array([0.5, 0.5, 0.5]),
            "one probability per pair",
        ),
        (
            np.array([0.1, 0.2]),
            np.ones((2, 2)),
            lambda u, v: np.full(u.shape, np.nan),
            "finite probabilities",
        ),
    ],
)
def test_kernel_sampler_rejects_invalid_input(
    types, bounds, probability, message
) -> None:
    """Invalid types, bounds or edge_probability outputs raise ModelError with a message naming the problem."""
    with pytest.raises(ModelError, match=message):
        sample_kernel_graph(types, probability, bounds, rng=np.random.default_rng(0))


def test_kernel_sampler_small_and_empty_inputs() -> None:
    """n = 0 and n = 1 give empty matrices; bounds above 1 are accepted and treated as 1."""
    for n in (0, 1):
        adjacency = sample_kernel_graph(
            np.full(n, 0.5),
            _cosine_probability,
            np.ones((2, 2)),
            rng=np.random.default_rng(0),
        )
        assert adjacency.shape == (n, n) and adjacency.nnz == 0
    adjacency = sample_kernel_graph(
        np.array([0.0, 1.0, 0.5]),
        lambda u, v: np.ones_like(u),
        np.full((3, 3), 5.0),
        rng=np.random.default_rng(0),
    )
    _assert_canonical_adjacency(adjacency, 3)
    assert adjacency.nnz == 6


# ---------------------------------------------------------------- structure and edge cases


def test_block_graph_is_a_canonical_symmetric_simple_graph() -> None:
    """The adjacency is symmetric, 0/1 float64, zero-diagonal, with sorted unique int32 indices."""
    adjacency = sample_block_graph(SBM_SIZES, SBM_P, rng=np.random.default_rng(0))
    _assert_canonical_adjacency(adjacency, 100)
    assert adjacency.has_canonical_format
    assert np.array_equal(
        degrees(adjacency), np.asarray(adjacency.sum(axis=1)).astype(np.int64)
    )


def test_empty_and_complete_block_graphs() -> None:
    """p = 0 gives no edges and p = 1 gives every pair, within and between blocks."""
    sizes = [4, 0, 3, 1]
    empty = sample_block_graph(sizes, np.zeros((4, 4)), rng=np.random.default_rng(0))
    _assert_canonical_adjacency(empty, 8)
    assert empty.nnz == 0
    complete = sample_block_graph(sizes, np.ones((4, 4)), rng=np.random.default_rng(0))
    _assert_canonical_adjacency(complete, 8)
    assert np.array_equal(complete.toarray(), np.ones((8, 8)) - np.eye(8))
    # Block structure: only block 0 is complete, blocks do not link.
    only_within = np.diag([1.0, 1.0, 0.0, 1.0])
    within = sample_block_graph(
        sizes, only_within, rng=np.random.default_rng(0)
    ).toarray()
    expected = np.zeros((8, 8))
    expected[:4, :4] = 1 - np.eye(4)
    assert np.array_equal(within, expected)


def test_block_graph_with_zero_or_one_nodes() -> None:
    """n = 0 (no blocks, or empty blocks) and n = 1 return empty matrices of the right shape."""
    cases = [
        ([], np.zeros((0, 0))),
        ([0], np.ones((1, 1))),
        ([0, 0], np.ones((2, 2))),
        ([1], np.ones((1, 1))),
    ]
    for sizes, probabilities in cases:
        adjacency = sample_block_graph(
            sizes, probabilities, rng=np.random.default_rng(0)
        )
        n = sum(sizes)
        assert adjacency.shape == (n, n) and adjacency.nnz == 0
        assert degrees(adjacency).shape == (n,)


@pytest.mark.parametrize(
    ("sizes", "probabilities", "message"),
    [
        ([3, -1], np.ones((2, 2)), "non-negative integer"),
        ([3, 2.5], np.ones((2, 2)), "non-negative integer"),
        ([3, 2], np.ones((3, 3)), r"2 x 2 matrix"),
        ([3, 2], np.array([[0.1, 0.2], [0.3, 0.1]]), r"symmetric; entry \[0, 1\]"),
        ([3, 2], np.array([[1.1, 0.2], [0.2, 0.1]]), r"in \[0, 1\]"),
        ([3, 2], np.array([[np.nan, 0.2], [0.2, 0.1]]), r"in \[0, 1\]"),
    ],
)
def test_block_graph_rejects_invalid_input(sizes, probabilities, message) -> None:
    """Bad block sizes or probability matrices raise ModelError naming the parameter and the rule."""
    with pytest.raises(ModelError, match=message):
        sample_block_graph(sizes, probabilities, rng=np.random.default_rng(0))


def test_sparse_large_block_model_is_fast_path_and_exact_in_count() -> None:
    """A huge sparse block model (5e11 pairs) samples quickly and its edge count is binomially plausible."""
    n = 1_000_000
    p = 2e-6  # about 1e6 expected edges out of ~5e11 pairs: only the sparse path can do this
    adjacency = sample_block_graph([n], np.array([[p]]), rng=np.random.default_rng(4))
    n_pairs = n * (n - 1) / 2
    # A single binomial count: within 5 SD of its mean (one draw, sd = sqrt(Npq)).
    assert abs(adjacency.nnz / 2 - n_pairs * p) <= 5 * math.sqrt(n_pairs * p * (1 - p))
    assert adjacency.shape == (n, n) and adjacency.indices.dtype == np.int32


def test_same_seed_gives_identical_graphs_and_different_seeds_differ() -> None:
    """Both samplers are reproducible from the seed and depend on it."""

    def block(seed: int) -> sp.sparse.csr_array:
        return sample_block_graph(SBM_SIZES, SBM_P, rng=np.random.default_rng(seed))

    def kernel(seed: int) -> sp.sparse.csr_array:
        types = np.random.default_rng(99).random(300)
        return sample_kernel_graph(
            types,
            lambda u, v: _cosine_probability(u, v, 0.05),
            _cosine_cell_bounds(5, 0.05),
            rng=np.random.default_rng(seed),
        )

    for sampler in (block, kernel):
        first, again, other = sampler(123), sampler(123), sampler(124)
        for attribute in ("indptr", "indices", "data"):
            assert np.array_equal(getattr(first, attribute), getattr(again, attribute))
        assert not (
            first.shape == other.shape
            and first.nnz == other.nnz
            and np.array_equal(first.indices, other.indices)
        )


# ---------------------------------------------------------------- to_csr and degrees


def test_to_csr_merges_orientations_and_repeats() -> None:
    """Pairs given in either orientation or repeated become one undirected edge."""
    adjacency = to_csr(4, np.array([0, 1, 3, 2]), np.array([1, 0, 2, 3]))
    _assert_canonical_adjacency(adjacency, 4)
    assert adjacency.nnz == 4
    assert degrees(adjacency).tolist() == [1, 1, 1, 1]
    assert to_csr(
        0, np.array([], dtype=np.int64), np.array([], dtype=np.int64)
    ).shape == (0, 0)
    assert to_csr(3, np.array([]), np.array([])).nnz == 0


@pytest.mark.parametrize(
    ("n", "rows", "cols", "message"),
    [
        (3, [0, 1], [1, 1], "self-loop at node 1"),
        (3, [0, 1], [1, 3], r"in \[0, 3\)"),
        (3, [-1], [1], r"in \[0, 3\)"),
        (3, [0, 1], [1], "same length"),
        (3, [0.0], [1.0], "integer node indices"),
        (-2, [], [], "`n` must be a non-negative integer"),
    ],
)
def test_to_csr_rejects_invalid_edges(n, rows, cols, message) -> None:
    """Self-loops, out-of-range nodes, mismatched or non-integer arrays and negative n raise ModelError."""
    with pytest.raises(ModelError, match=message):
        to_csr(n, np.array(rows), np.array(cols))


@settings(max_examples=60, deadline=None)
@given(
    n=st.integers(min_value=2, max_value=30),
    data=st.data(),
)
def test_to_csr_matches_networkx_for_arbitrary_edge_lists(
    n: int, data: st.DataObject
) -> None:
    """For any edge list the CSR equals networkx's adjacency of the same simple graph."""
    pairs = data.draw(
        st.lists(
            st.tuples(st.integers(0, n - 1), st.integers(0, n - 1)).filter(
                lambda e: e[0] != e[1]
            ),
            max_size=80,
        )
    )
    rows = np.array([a for a, _ in pairs], dtype=np.int64)
    cols = np.array([b for _, b in pairs], dtype=np.int64)
    adjacency = to_csr(n, rows, cols)
    graph = nx.Graph()
    graph.add_nodes_from(range(n))
    graph.add_edges_from(pairs)
    assert np.array_equal(
        adjacency.toarray(), nx.to_numpy_array(graph, nodelist=range(n))
    )  # networkx reference
    _assert_canonical_adjacency(adjacency, n)
    assert np.array_equal(degrees(adjacency), [graph.degree(i) for i in range(n)])


def test_degrees_counts_neighbours_of_noncanonical_input() -> None:
    """degrees() counts distinct neighbours even for unsorted input with explicit zeros."""
    matrix = sp.sparse.csr_array(
        (
            np.array([1.0, 0.0, 1.0, 1.0]),
            np.array([2, 1, 0, 0]),
            np.array([0, 2, 2, 4]),
        ),
        shape=(3, 3),
    )
    assert degrees(matrix).tolist() == [1, 0, 1]
    assert degrees(matrix).dtype == np.int64

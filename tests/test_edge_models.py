"""Tests of designcalc.edge_models: normalisation, degree functions, validity checks, bounds and spectra."""

from __future__ import annotations

import numpy as np
import pytest

from designcalc.edge_models import BlockModel, KernelModel, kernel_quadrature
from designcalc.errors import ModelError

SHARES = (0.5, 0.3, 0.2)
AFFINITY = ((8.0, 1.0, 0.5), (1.0, 10.0, 1.0), (0.5, 1.0, 14.0))


def _integral(model: KernelModel, panels: int = 200, points: int = 8) -> float:
    """Double integral of the normalised kernel on a finer rule than the model's own."""
    nodes, weights = kernel_quadrature(panels, points)
    return float(weights @ model.kernel(nodes[:, None], nodes[None, :]) @ weights)


def test_block_normalisation_exact() -> None:
    """sum_kl s_k s_l g_kl = 1 for the normalised block matrix."""
    model = BlockModel(shares=SHARES, affinity=AFFINITY)
    s = np.array(SHARES)
    g = model.normalised_matrix()
    assert s @ g @ s == pytest.approx(1.0, abs=1e-14)
    # Only ratios matter: the normalised matrix is proportional to the affinity.
    ratio = g / np.array(AFFINITY)
    assert np.allclose(ratio, ratio[0, 0], rtol=1e-14)


def test_block_degree_function() -> None:
    """d(u) equals (G s)_k on block k and integrates to 1."""
    model = BlockModel(shares=SHARES, affinity=AFFINITY)
    g = model.normalised_matrix()
    expected = g @ np.array(SHARES)
    # Mid-points of the three intervals [0, .5), [.5, .8), [.8, 1].
    d = model.degree_function(np.array([0.25, 0.65, 0.9]))
    assert np.allclose(d, expected, rtol=1e-14)
    assert float(np.array(SHARES) @ expected) == pytest.approx(1.0, abs=1e-14)
    assert list(model.block_of(np.array([0.0, 0.4999, 0.5, 0.7999, 0.8, 1.0]))) == [0, 0, 1, 1, 2, 2]


@pytest.mark.parametrize(
    ("shares", "affinity", "match"),
    [
        ((0.5, 0.5), ((1.0, 2.0), (1.0, 1.0)), "symmetric"),
        ((0.6, 0.5), ((1.0, 1.0), (1.0, 1.0)), "sum to 1"),
        ((1.0, 0.0), ((1.0, 1.0), (1.0, 1.0)), "positive"),
        ((0.5, 0.5), ((1.0, 1.0),), "2 x 2"),
        ((0.5, 0.5), ((1.0, -1.0), (-1.0, 1.0)), "non-negative"),
        ((0.5, 0.5), ((0.0, 0.0), (0.0, 0.0)), "all zero"),
    ],
)
def test_block_model_rejects_bad_input(shares: tuple, affinity: tuple, match: str) -> None:
    """Invalid block models raise ModelError naming the rule."""
    with pytest.raises(ModelError, match=match):
        BlockModel(shares=shares, affinity=affinity)


@pytest.mark.parametrize("ratio", [1.0, 2.0, 5.0, 40.0])
def test_degree_gradient_integrates_to_one(ratio: float) -> None:
    """degree_gradient: raw integral is ((r-1)/ln r)^2 (int_0^1 r^u du = (r-1)/ln r, squared by the product form)."""
    model = KernelModel(family="degree_gradient", degree_ratio=ratio)
    closed = 1.0 if ratio == 1.0 else ((ratio - 1) / np.log(ratio)) ** 2
    assert model._scale == pytest.approx(closed, rel=1e-12)
    assert _integral(model) == pytest.approx(1.0, rel=1e-12)
    # d(u) = r^u (ln r / (r - 1)), so max/min degree = r.
    d = model.degree_function(np.array([0.0, 1.0]))
    assert d[1] / d[0] == pytest.approx(ratio, rel=1e-10)


@pytest.mark.parametrize(("ell", "floor"), [(0.01, 0.0), (0.05, 0.0), (0.1, 0.05), (0.5, 1.0), (3.0, 0.0)])
def test_distance_decay_integrates_to_one(ell: float, floor: float) -> None:
    """distance_decay: raw integral is floor + 2l - 2l^2 (1 - exp(-1/l)) (derived: int int exp(-|u-v|/l))."""
    model = KernelModel(family="distance_decay", length_scale=ell, floor=floor)
    closed = floor + 2 * ell - 2 * ell**2 * (1 - np.exp(-1 / ell))
    assert model._scale == pytest.approx(closed, rel=1e-12)
    # The independent check integrates |u - v| exactly by splitting the square along
    # the diagonal kink: int int = 2 int_0^1 int_0^u (floor + exp(-(u - v)/l)) dv du.
    nodes, weights = kernel_quadrature(100, 8)
    inner = np.array([u * (weights @ model.kernel(np.full_like(nodes, u), u * nodes)) for u in nodes])
    assert 2 * float(weights @ inner) == pytest.approx(1.0, rel=1e-9)


def test_distance_decay_short_length_scale() -> None:
    """Regression: a very short length scale still normalises to 1 (the quadrature alone was 67% off at l = 0.001)."""
    model = KernelModel(family="distance_decay", length_scale=0.001)
    assert model._scale == pytest.approx(2 * 0.001 - 2 * 0.001**2, rel=1e-9)


@pytest.mark.parametrize("amplitudes", [(0.5,), (0.3, -0.4), (0.2, 0.2, 0.6)])
def test_cosine_integrates_to_one(amplitudes: tuple) -> None:
    """cosine: raw integral is exactly 1 (every cosine term integrates to zero)."""
    model = KernelModel(family="cosine", amplitudes=amplitudes)
    assert model._scale == pytest.approx(1.0, abs=1e-12)
    assert _integral(model) == pytest.approx(1.0, abs=1e-12)


def test_expression_kernel_matches_family() -> None:
    """An expression kernel equal to a built-in family gives the same normalised kernel."""
    family = KernelModel(family="distance_decay", length_scale=0.08, floor=0.05)
    expr = KernelModel(family="expression", expression="0.05 + exp(-abs(u - v) / 0.08)")
    rng = np.random.default_rng(11)
    u, v = rng.random(1000), rng.random(1000)
    # The family is normalised exactly; the expression by tensor quadrature, which the
    # diagonal kink of |u - v| limits to about 1.3e-4 relative error at l = 0.08.
    assert np.allclose(family.kernel(u, v), expr.kernel(u, v), rtol=5e-4)


@pytest.mark.parametrize(
    ("expression", "match"),
    [
        ("u - v", "non-negative|symmetric"),
        ("1 + u - v", "symmetric"),
        ("u*v - 0.5", "non-negative"),
        ("1 / (u - v)", "finite"),
        ("0 * u * v", "integrates to zero"),
    ],
)
def test_expression_kernel_checks(expression: str, match: str) -> None:
    """Asymmetric, negative, non-finite and all-zero expressions raise ModelError."""
    with pytest.raises(ModelError, match=match):
        KernelModel(family="expression", expression=expression)


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"family": "gaussian"}, "unknown kernel family"),
        ({"family": "degree_gradient", "degree_ratio": 0.5}, "degree_ratio"),
        ({"family": "distance_decay", "length_scale": 0.0}, "length_scale"),
        ({"family": "distance_decay", "floor": -1.0}, "floor"),
        ({"family": "cosine", "amplitudes": (0.7, 0.6)}, "amplitudes"),
        ({"family": "cosine", "amplitudes": ()}, "amplitudes"),
    ],
)
def test_kernel_family_parameters_checked(kwargs: dict, match: str) -> None:
    """Bad family parameters raise ModelError naming the parameter."""
    with pytest.raises(ModelError, match=match):
        KernelModel(**kwargs)


KERNELS = [
    KernelModel(family="degree_gradient", degree_ratio=6.0),
    KernelModel(family="distance_decay", length_scale=0.03, floor=0.0),
    KernelModel(family="distance_decay", length_scale=0.2, floor=0.1),
    KernelModel(family="cosine", amplitudes=(0.5, -0.3, 0.2)),
    KernelModel(family="expression", expression="(u + v) ** 3 + 0.01"),
]


@pytest.mark.parametrize("model", KERNELS, ids=lambda m: m.family)
@pytest.mark.parametrize("n_cells", [1, 7, 32])
def test_cell_bounds_bound_the_kernel(model: KernelModel, n_cells: int) -> None:
    """No kernel value on a fine random sample exceeds the bound of its cell."""
    bounds = model.cell_bounds(n_cells)
    assert bounds.shape == (n_cells, n_cells)
    assert np.allclose(bounds, bounds.T)
    rng = np.random.default_rng(20261202 + n_cells)
    u, v = rng.random(200_000), rng.random(200_000)
    values = model.kernel(u, v)
    a = np.minimum((u * n_cells).astype(int), n_cells - 1)
    b = np.minimum((v * n_cells).astype(int), n_cells - 1)
    assert np.all(values <= bounds[a, b])
    # Also on the diagonal, where the distance-decay kernel peaks.
    diag = model.kernel(u, u)
    assert np.all(diag <= bounds[a, a])
    assert model.max_value() >= values.max()


@pytest.mark.parametrize("rho", [0.01, 0.2])
def test_block_eigenvalues_match_numpy(rho: float) -> None:
    """Block spectrum equals numpy eigenvalues of n diag(s)^1/2 min(1, rho G) diag(s)^1/2."""
    model = BlockModel(shares=SHARES, affinity=AFFINITY)
    n = 1000
    s = np.array(SHARES)
    p = np.minimum(1.0, rho * np.array(AFFINITY) / (s @ np.array(AFFINITY) @ s))
    root = np.diag(np.sqrt(s))
    expected = np.linalg.eigvals(n * root @ p @ root).real
    expected = expected[np.argsort(-np.abs(expected))]
    assert np.allclose(model.expected_adjacency_eigenvalues(n, rho), expected, rtol=1e-12)


def test_cosine_eigenvalues_closed_form() -> None:
    """Cosine kernel: eigenvalues n rho {1, a_k / 2} (int cos^2(2 pi k u) du = 1/2; derived)."""
    a = (0.6, -0.3)
    model = KernelModel(family="cosine", amplitudes=a)
    n, rho = 2000, 0.005
    eig = model.expected_adjacency_eigenvalues(n, rho, count=3)
    expected = n * rho * np.array([1.0, 0.3, -0.15])
    assert np.allclose(eig, expected, rtol=1e-8, atol=1e-8 * n * rho)


@pytest.mark.parametrize("model", [KERNELS[0], KERNELS[2]], ids=["degree_gradient", "distance_decay"])
def test_kernel_eigenvalues_match_dense_sample(model: KernelModel) -> None:
    """Leading kernel eigenvalues match a dense eigen-decomposition of min(1, rho g(U_i, U_j)) on 2500 sampled types."""
    n, rho, m = 5000, 0.004, 2500
    rng = np.random.default_rng(5)
    u = rng.random(m)
    p = np.minimum(1.0, rho * model.kernel(u[:, None], u[None, :]))
    np.fill_diagonal(p, 0.0)
    dense = np.linalg.eigvalsh(p) * (n / m)
    dense = dense[np.argsort(-np.abs(dense))][:3]
    eig = model.expected_adjacency_eigenvalues(n, rho, count=3)
    # The sample operator's leading eigenvalue has relative error O(1/sqrt(m)) = 2%
    # (a mean of m iid kernel evaluations); 8% is 4 such errors.  Smaller ones get
    # an absolute tolerance of the same size relative to the leading eigenvalue.
    assert np.allclose(dense, eig, rtol=0.08, atol=0.08 * abs(eig[0]) / 2)


def test_kernel_mean_degree_matches_block_when_constant() -> None:
    """A constant kernel and a one-block model give the same expected mean degree (n - 1) min(1, rho)."""
    kernel = KernelModel(family="expression", expression="2 + 0 * u * v")
    block = BlockModel(shares=(1.0,), affinity=((3.0,),))
    for rho in (0.01, 1.5):
        assert kernel.expected_mean_degree(500, rho) == pytest.approx(499 * min(1.0, rho), rel=1e-12)
        assert block.expected_mean_degree(500, rho) == pytest.approx(499 * min(1.0, rho), rel=1e-14)

"""Tests of designcalc.density: rho_n, target mean degree, clipping and the expected mean degree."""

from __future__ import annotations

import numpy as np
import pytest

from designcalc.density import DensityRule, density_at_size
from designcalc.edge_models import BlockModel, KernelModel
from designcalc.errors import ModelError
from designcalc.graphs import degrees, sample_block_graph


@pytest.mark.parametrize("gamma", [0.0, 0.5, 1.0])
@pytest.mark.parametrize("n", [100, 1000, 4000])
def test_target_mean_degree_and_rho(gamma: float, n: int) -> None:
    """Target mean degree is d_ref (n / n_ref)^gamma and rho_n = target / (n - 1) (METHODS.md §0, §6.1)."""
    rule = DensityRule(mean_degree=10.0, reference_units=1000, growth_exponent=gamma)
    target = 10.0 * (n / 1000) ** gamma
    assert rule.target_mean_degree(n) == pytest.approx(target, rel=1e-14)
    assert rule.rho(n) == pytest.approx(target / (n - 1), rel=1e-14)


def test_growth_regimes_hand_values() -> None:
    """Hand values: at 4x the reference size, gamma 0 / 0.5 / 1 give mean degree 10 / 20 / 40."""
    values = [DensityRule(10.0, 1000, g).target_mean_degree(4000) for g in (0.0, 0.5, 1.0)]
    assert values == pytest.approx([10.0, 20.0, 40.0], rel=1e-14)
    assert DensityRule(10.0, 1000, 1.0).rho(4000) == pytest.approx(40 / 3999, rel=1e-14)


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"mean_degree": 0.0, "reference_units": 100}, "mean_degree"),
        ({"mean_degree": float("nan"), "reference_units": 100}, "mean_degree"),
        ({"mean_degree": 5.0, "reference_units": 1}, "reference_units"),
        ({"mean_degree": 5.0, "reference_units": 100, "growth_exponent": 1.5}, "growth_exponent"),
        ({"mean_degree": 5.0, "reference_units": 100, "growth_exponent": -0.1}, "growth_exponent"),
    ],
)
def test_rule_rejects_bad_values(kwargs: dict, match: str) -> None:
    """Invalid density rules raise ModelError naming the parameter."""
    with pytest.raises(ModelError, match=match):
        DensityRule(**kwargs)


def test_no_clipping_when_sparse() -> None:
    """A sparse block model is not clipped and its expected mean degree is the target exactly."""
    model = BlockModel(shares=(0.5, 0.3, 0.2), affinity=((8.0, 1.0, 0.5), (1.0, 10.0, 1.0), (0.5, 1.0, 14.0)))
    d = density_at_size(model, DensityRule(10.0, 1200), 1200)
    assert not d.clipped
    assert d.shortfall == 0.0
    assert d.expected_mean_degree == pytest.approx(10.0, rel=1e-13)


def test_clipping_shortfall_exact() -> None:
    """Clipping is detected and the shortfall matches a hand calculation.

    Shares (1/2, 1/2), affinity diag(10, 1): s B s = 11/4, so G = diag(40/11, 4/11).
    Mean degree 50 at n = 101 gives rho = 1/2; rho G_11 = 20/11 > 1 is clipped to 1,
    rho G_22 = 2/11.  Expected mean degree 100 (1/4 + 1/4 * 2/11) = 325/11;
    shortfall 1 - (325/11)/50 = 9/22.
    """
    model = BlockModel(shares=(0.5, 0.5), affinity=((10.0, 0.0), (0.0, 1.0)))
    d = density_at_size(model, DensityRule(50.0, 101), 101)
    assert d.rho == pytest.approx(0.5, rel=1e-15)
    assert d.clipped
    assert d.max_edge_probability == pytest.approx(20 / 11, rel=1e-14)
    assert d.expected_mean_degree == pytest.approx(325 / 11, rel=1e-14)
    assert d.shortfall == pytest.approx(9 / 22, rel=1e-13)
    assert d.to_dict()["clipped"] is True


def test_kernel_clipping_detected() -> None:
    """A steep degree-gradient kernel at high density is clipped and falls short of the target."""
    model = KernelModel(family="degree_gradient", degree_ratio=50.0)
    d = density_at_size(model, DensityRule(60.0, 100), 100)
    assert d.clipped
    assert 0.0 < d.shortfall < 1.0
    # Without clipping the kernel integrates to 1, so the expected degree can only be lower.
    assert d.expected_mean_degree < d.target_mean_degree


@pytest.mark.statistical
def test_sampled_block_graph_mean_degree() -> None:
    """The mean degree of sampled block graphs matches the expected mean degree within MC error."""
    shares = (0.5, 0.3, 0.2)
    model = BlockModel(shares=shares, affinity=((8.0, 1.0, 0.5), (1.0, 10.0, 1.0), (0.5, 1.0, 14.0)))
    n = 1000
    rule = DensityRule(10.0, n)
    d = density_at_size(model, rule, n)
    sizes = [round(s * n) for s in shares]
    p = np.minimum(1.0, d.rho * model.normalised_matrix())
    rng = np.random.default_rng(20261202)
    n_graphs = 30
    means = np.array([degrees(sample_block_graph(sizes, p, rng=rng)).mean() for _ in range(n_graphs)])
    # With fixed block sizes the exact expectation is (1/n) sum_kl n_k (n_l - [k = l]) p_kl;
    # it differs from the iid-label value (n - 1) s P s by s P s - sum_k s_k p_kk = O(rho).
    n_k = np.array(sizes, dtype=float)
    fixed = float((n_k @ p @ n_k - n_k @ np.diag(p)) / n)
    assert abs(fixed - d.expected_mean_degree) < 0.05
    # Mean degree = 2E/n with E a sum of independent Bernoullis, Var E <= E[E] = n * 10 / 2,
    # so SD(mean degree) <= 2 sqrt(5000)/1000 = 0.141 per graph, 0.026 over 30 graphs; allow 4 SE.
    se = 2 * np.sqrt(fixed * n / 2) / n / np.sqrt(n_graphs)
    assert abs(means.mean() - fixed) < 4 * se

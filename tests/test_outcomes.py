"""Tests of designcalc.outcomes: spillover shapes, the response function, nulls and draws."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.special

from designcalc.errors import ModelError
from designcalc.outcomes import SPILLOVER_SHAPES, OutcomeModel, spillover_shape_value


@pytest.mark.parametrize("shape", SPILLOVER_SHAPES)
def test_shapes_normalised(shape: str) -> None:
    """Every shape has s(0) = 0 and s(1) = 1."""
    for rate in (0.5, 4.0, 50.0):
        s = spillover_shape_value(shape, np.array([0.0, 1.0]), rate=rate, threshold=0.3)
        assert s[0] == 0.0
        assert s[1] == pytest.approx(1.0, rel=1e-14)


def test_saturating_formula() -> None:
    """Saturating shape equals (1 - exp(-r x)) / (1 - exp(-r)), is concave and above the line."""
    x = np.linspace(0, 1, 101)
    for rate in (0.01, 1.0, 4.0, 30.0):
        s = spillover_shape_value("saturating", x, rate=rate)
        assert np.allclose(s, (1 - np.exp(-rate * x)) / (1 - np.exp(-rate)), rtol=1e-12)
        assert np.all(np.diff(s, 2) <= 1e-15)
        assert np.all(s >= x - 1e-15)


def test_threshold_shape() -> None:
    """Threshold shape is 1 from the threshold on (including exactly m/N = t) and 0 below."""
    s = spillover_shape_value("threshold", np.array([0.0, 0.3999, 0.4, 2 / 5, 0.7, 1.0]), threshold=0.4)
    assert list(s) == [0.0, 0.0, 1.0, 1.0, 1.0, 1.0]
    # 1/3 computed as a float fraction must reach a threshold written as 1/3.
    assert spillover_shape_value("threshold", np.array([1 / 3]), threshold=0.3333333333333333)[0] == 1.0


def test_linear_shape_and_unknown() -> None:
    """Linear shape is the identity; an unknown shape raises ModelError."""
    x = np.array([0.0, 0.25, 0.9])
    assert np.array_equal(spillover_shape_value("linear", x), x)
    with pytest.raises(ModelError, match="unknown spillover shape"):
        spillover_shape_value("cubic", x)


def test_mean_outcome_formula() -> None:
    """f = baseline + theta + tau w + beta s(x) + gamma w s(x) for continuous outcomes."""
    m = OutcomeModel(baseline=2.0, direct_effect=1.5, spillover_effect=-0.7, interaction=0.4, spillover_shape="saturating", saturation_rate=3.0)
    theta = np.array([0.0, 1.0, -2.0])
    w = np.array([1.0, 0.0, 1.0])
    x = np.array([0.5, 1.0, 0.0])
    s = (1 - np.exp(-3 * x)) / (1 - np.exp(-3))
    expected = 2.0 + theta + 1.5 * w - 0.7 * s + 0.4 * w * s
    assert np.allclose(m.mean_outcome(theta, w, x), expected, rtol=1e-14)


def test_logistic_link_matches_expit() -> None:
    """Binary logistic mean equals scipy.special.expit of the linear predictor, without overflow."""
    m = OutcomeModel(kind="binary", link="logistic", baseline=-1.0, direct_effect=2.0, spillover_effect=1.0)
    theta = np.array([0.0, 3.0, -800.0, 800.0])
    w = np.array([0.0, 1.0, 1.0, 0.0])
    x = np.array([0.2, 0.7, 0.5, 1.0])
    eta = -1.0 + theta + 2.0 * w + 1.0 * x
    with np.errstate(over="raise"):
        mu = m.mean_outcome(theta, w, x)
    assert np.allclose(mu, scipy.special.expit(eta), rtol=1e-12, atol=1e-300)


def test_identity_link_clips() -> None:
    """Binary identity link clips the probability to [0, 1]."""
    m = OutcomeModel(kind="binary", baseline=0.8, direct_effect=0.5)
    mu = m.mean_outcome(np.array([0.0, -1.0, 0.0]), np.array([1.0, 0.0, 0.0]), np.zeros(3))
    assert list(mu) == [1.0, 0.0, 0.8]


def test_null_for_zeroes_right_coefficients() -> None:
    """null_for zeroes the tested effect and the interaction, and nothing else."""
    m = OutcomeModel(baseline=1.0, direct_effect=2.0, spillover_effect=3.0, interaction=4.0, noise_sd=2.5)
    d, s, t = m.null_for("direct"), m.null_for("spillover"), m.null_for("total")
    assert (d.direct_effect, d.spillover_effect, d.interaction) == (0.0, 3.0, 0.0)
    assert (s.direct_effect, s.spillover_effect, s.interaction) == (2.0, 0.0, 0.0)
    assert (t.direct_effect, t.spillover_effect, t.interaction) == (0.0, 0.0, 0.0)
    assert all(x.baseline == 1.0 and x.noise_sd == 2.5 for x in (d, s, t))
    with pytest.raises(ModelError, match="unknown estimand"):
        m.null_for("global")


def test_scaled_for() -> None:
    """scaled_for multiplies the coefficients behind one estimand."""
    m = OutcomeModel(direct_effect=2.0, spillover_effect=3.0, interaction=4.0)
    d = m.scaled_for("direct", 0.5)
    assert (d.direct_effect, d.spillover_effect, d.interaction) == (1.0, 3.0, 2.0)
    t = m.scaled_for("total", 2.0)
    assert (t.direct_effect, t.spillover_effect, t.interaction) == (4.0, 6.0, 8.0)


def test_type_values() -> None:
    """theta combines the type expression and the block effects."""
    m = OutcomeModel(type_effect="-6 * u", block_effects=(0.0, 2.0))
    theta = m.type_values(np.array([0.0, 0.5, 1.0]), np.array([0, 1, 1]))
    assert np.allclose(theta, [0.0, -1.0, -4.0])
    with pytest.raises(ModelError, match="block model"):
        OutcomeModel(block_effects=(0.0, 1.0)).type_values(np.array([0.1]))


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"kind": "count"}, "kind"),
        ({"spillover_shape": "cubic"}, "shape"),
        ({"link": "probit"}, "link"),
        ({"noise_sd": -1.0}, "noise_sd"),
        ({"noise_sd": float("nan")}, "noise_sd"),
    ],
)
def test_outcome_model_rejects_bad_values(kwargs: dict, match: str) -> None:
    """Invalid outcome models raise ModelError naming the parameter."""
    with pytest.raises(ModelError, match=match):
        OutcomeModel(**kwargs)


def test_bad_type_expression_rejected() -> None:
    """A type effect that is not a whitelisted expression is rejected."""
    from designcalc.errors import DesignCalcError

    with pytest.raises(DesignCalcError):
        OutcomeModel(type_effect="__import__('os')")


@pytest.mark.statistical
def test_binary_draws_have_right_mean() -> None:
    """Bernoulli draws average to their probabilities."""
    m = OutcomeModel(kind="binary", baseline=0.3)
    rng = np.random.default_rng(42)
    p = np.array([0.05, 0.3, 0.5, 0.9])
    reps = 20_000
    draws = m.draw(np.broadcast_to(p, (reps, 4)).copy(), rng=rng)
    assert set(np.unique(draws)) <= {0.0, 1.0}
    # SE of a mean of 20000 Bernoulli(p) draws is sqrt(p(1-p)/20000) <= 0.0036; allow 4 SE.
    assert np.all(np.abs(draws.mean(axis=0) - p) < 4 * np.sqrt(p * (1 - p) / reps))


@pytest.mark.statistical
def test_continuous_draws_have_right_mean_and_sd() -> None:
    """Continuous draws have the stated mean and noise SD; noise_sd = 0 returns the mean."""
    m = OutcomeModel(noise_sd=2.0)
    rng = np.random.default_rng(7)
    reps = 40_000
    y = m.draw(np.full(reps, 5.0), rng=rng)
    # SE of the mean is 2/200 = 0.01; SE of the sample SD is about 2/sqrt(2 * 40000) = 0.0071; allow 4 SE.
    assert abs(y.mean() - 5.0) < 0.04
    assert abs(y.std() - 2.0) < 0.03
    assert np.array_equal(OutcomeModel(noise_sd=0.0).draw(np.array([1.0, 2.0]), rng=rng), [1.0, 2.0])

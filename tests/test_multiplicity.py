"""Bonferroni and Holm, checked against Holm (1979), CHECKS.md §6 and statsmodels."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.stats
from hypothesis import given, settings
from hypothesis import strategies as st
from statsmodels.stats.multitest import multipletests

from designcalc.errors import DesignCalcError
from designcalc.multiplicity import (
    bonferroni_alpha,
    bonferroni_reject,
    holm_reject,
    holm_thresholds,
    mde_inflation,
    p_values,
    sample_size_inflation,
)


def test_two_tests_bonferroni_and_holm_levels():
    """Two tests at family-wise .05: Bonferroni .025 each; Holm .025 then .05 (CHECKS.md §6; Holm 1979)."""
    assert bonferroni_alpha(0.05, 2) == pytest.approx(0.025)
    assert holm_thresholds(0.05, 2) == pytest.approx((0.025, 0.05))


def test_sample_size_cost_of_halving_alpha():
    """alpha .05 -> .025 at 80% power costs x1.2110 in n (CHECKS.md §6, normal approximation)."""
    assert sample_size_inflation(0.05, 0.025, 0.8) == pytest.approx(1.2110, abs=5e-5)
    assert mde_inflation(0.05, 0.025, 0.8) == pytest.approx(1.2110**0.5, abs=5e-5)


def test_one_sided_inflation_uses_one_tail():
    """One-sided tests use z_{1-alpha}: ((z.975 + z.8) / (z.95 + z.8))^2 from scipy's quantiles."""
    z = scipy.stats.norm.ppf
    expected = ((z(0.975) + z(0.8)) / (z(0.95) + z(0.8))) ** 2
    assert sample_size_inflation(0.05, 0.025, 0.8, "greater") == pytest.approx(expected, rel=1e-12)


# statsmodels' multipletests takes ~35 ms a call here, so few rows per example.
@settings(max_examples=25, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), m=st.integers(1, 6), alpha=st.sampled_from([0.01, 0.05, 0.1]))
def test_holm_decisions_match_statsmodels(seed, m, alpha):
    """Holm decisions equal statsmodels' multipletests(method="holm") row by row."""
    rng = np.random.default_rng(seed)
    # A mix of tiny and moderate p-values, so that step-down stops at every position.
    p = np.where(rng.random((4, m)) < 0.5, rng.random((4, m)) * alpha, rng.random((4, m)))
    ours = holm_reject(p, alpha)
    for row, decisions in zip(p, ours):
        assert decisions.tolist() == multipletests(row, alpha=alpha, method="holm")[0].tolist()
    bonf = bonferroni_reject(p, alpha)
    for row, decisions in zip(p, bonf):
        assert decisions.tolist() == multipletests(row, alpha=alpha, method="bonferroni")[0].tolist()
    assert np.all(ours >= bonf)  # Holm rejects whatever Bonferroni rejects


def test_missing_p_value_is_never_rejected_and_still_counts():
    """A nan p-value is not rejected and keeps m: 0.02 alone of two is tested at 0.025."""
    assert holm_reject(np.array([[0.02, np.nan]]), 0.05).tolist() == [[True, False]]
    assert holm_reject(np.array([[0.03, np.nan]]), 0.05).tolist() == [[False, False]]


def test_p_values_agree_with_scipy():
    """Two-sided and one-sided p-values equal scipy's normal and t tail areas."""
    t = np.array([-2.5, 0.3, 1.7])
    assert p_values(t, "two-sided") == pytest.approx(2 * scipy.stats.norm.sf(np.abs(t)))
    assert p_values(t, "greater", 30) == pytest.approx(scipy.stats.t.sf(t, 30))
    assert p_values(t, "less") == pytest.approx(scipy.stats.norm.cdf(t))


@pytest.mark.parametrize(
    ("call", "match"),
    [
        (lambda: bonferroni_alpha(1.2, 2), r"`alpha` must be in \(0, 1\); got 1.2"),
        (lambda: holm_thresholds(0.05, 0), r"`n_hypotheses` must be a whole number >= 1; got 0"),
        (lambda: mde_inflation(0.05, 0.0, 0.8), r"`adjusted_alpha` must be in \(0, 1\)"),
        (lambda: p_values(np.zeros(1), "both"), r"`alternative` must be one of"),
    ],
)
def test_bad_arguments_are_named(call, match):
    """Every public function names the argument it rejects."""
    with pytest.raises(DesignCalcError, match=match):
        call()

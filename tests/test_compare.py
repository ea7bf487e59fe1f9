"""Tests of designcalc.compare: the best treatment probability and the grid's MDEs against the allocation formula."""

from __future__ import annotations

import math

import pytest
from scenario_text import no_network_scenario
from statsmodels.stats.power import NormalIndPower

import designcalc
from designcalc.compare import DEFAULT_GRID

# Bloom (1995), Evaluation Review 19(5):547-556: z_{0.975} + z_{0.80} (CHECKS.md §1).
BLOOM_MULTIPLIER = 2.8016
UNITS = 1000


def _allocation_mde(probability: float, units: int = UNITS) -> float:
    """M sigma sqrt(1 / (P (1 - P) N)), sigma = 1 (Duflo, Glennerster & Kremer toolkit; statsmodels NormalIndPower)."""
    return float(
        NormalIndPower().solve_power(
            effect_size=None, nobs1=probability * units, ratio=(1 - probability) / probability, alpha=0.05, power=0.8
        )
    )


def _bernoulli_sd_factor(probability: float, units: int = UNITS) -> float:
    """SD of the difference in means with Bernoulli arm sizes over its fixed-arm value (delta method, E[1/n_1])."""
    p, n = probability, units
    extra = (1 - p) / (n * p**2) + p / (n * (1 - p) ** 2)
    return math.sqrt(1 + extra / (1 / p + 1 / (1 - p)))


@pytest.fixture(scope="module")
def direct_rows() -> dict[float, designcalc.CompareRow]:
    # The no-network reduction: equal outcome variances (noise SD 1) in both arms.
    result = designcalc.compare_treatment_probabilities(no_network_scenario(units=UNITS))
    rows = result.select(estimand="direct", estimator="hajek", variance_estimator="neyman")
    return {row.treatment_probability: row for row in rows}


@pytest.mark.statistical
def test_half_is_the_best_probability_with_equal_variances(direct_rows: dict[float, designcalc.CompareRow]) -> None:
    """With equal outcome variances P = 0.5 has the smallest direct MDE (or is tied with it); 0.1 and 0.9 are clearly worse."""
    # Duflo, Glennerster & Kremer (toolkit, text after their MDE equation):
    # the MDE is smallest at P = 1/2 when the arms' variances are equal.
    assert sorted(direct_rows) == sorted(DEFAULT_GRID)
    assert sum(row.best for row in direct_rows.values()) == 1
    half = direct_rows[0.5]
    assert half.best or half.tied_with_best
    # Theory puts 0.1 and 0.9 a factor 1/sqrt(0.09)/2 = 1.67 above 0.5: far
    # outside Monte Carlo error, so neither best nor tied.
    for p in (0.1, 0.9):
        assert not direct_rows[p].best and not direct_rows[p].tied_with_best
    for row in direct_rows.values():
        assert row.method == "formula (not verified)"


@pytest.mark.statistical
@pytest.mark.parametrize("probability", DEFAULT_GRID)
def test_grid_mdes_match_allocation_formula(direct_rows: dict[float, designcalc.CompareRow], probability: float) -> None:
    """Each probability's formula MDE is M sigma / sqrt(P (1 - P) N) within Monte Carlo error."""
    row = direct_rows[probability]
    reference = _allocation_mde(probability)
    assert reference == pytest.approx(BLOOM_MULTIPLIER / math.sqrt(probability * (1 - probability) * UNITS), rel=1e-4)
    # The formula MDE is 2.8016 x the simulated SD; its reported interval is
    # +-1.96 x 2.8016 x standard_error_mc_se.  Allow 4 MC SEs of the SD
    # (CHECKS.md §3) and the Bernoulli arm-size term (the simulated SD carries
    # it, the fixed-arm formula does not: 0.05% at P = 0.5, 0.4% at 0.1/0.9).
    assert row.mde == pytest.approx(BLOOM_MULTIPLIER * row.standard_error, rel=1e-4)
    half_width = (row.mde_high - row.mde_low) / 2
    assert half_width == pytest.approx(1.959963984540054 * BLOOM_MULTIPLIER * row.standard_error_mc_se, rel=1e-4)
    bernoulli = reference * (_bernoulli_sd_factor(probability) - 1)
    assert abs(row.mde - reference) <= 4 * BLOOM_MULTIPLIER * row.standard_error_mc_se + bernoulli
    # Outcomes have SD 1 when nobody is treated: SD units equal outcome units.
    assert row.mde_sd_units == pytest.approx(row.mde, rel=1e-12)

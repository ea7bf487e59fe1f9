"""Tests of designcalc.sample_size: Cohen's two-sample sizes, density rules that make n unreachable, reproducibility."""

from __future__ import annotations

import math

import pytest
from reproducibility import rerun
from scenario_text import block_model_scenario, no_network_scenario
from statsmodels.stats.power import TTestIndPower

import designcalc


def _two_block_scenario(*, growth_exponent: float, centre: float, graphs: int = 20, assignments: int = 20,
                        relative_precision: float = 0.03, max_graphs: int = 1000, max_units: int = 3200) -> designcalc.Scenario:
    """Two communities whose mean outcomes differ (block effects 0 and 2, baseline 5), mean degree 5 at 200 units."""
    return block_model_scenario(
        units=[200], mean_degree=5.0, graphs=graphs, assignments=assignments, seed=9,
        block_shares=[0.5, 0.5], block_affinity=[[4.0, 1.0], [1.0, 4.0]],
        population={"max_units": max_units}, density={"growth_exponent": growth_exponent},
        outcome={"baseline": 5.0, "block_effects": [0.0, 2.0], "direct_effect": 0.5, "spillover_effect": 1.0},
        estimators={"centre": centre},
        simulation={"relative_precision": relative_precision, "max_graphs": max_graphs},
        source="two_blocks.toml",
    )


# Cohen (1988), Statistical Power Analysis for the Behavioral Sciences, 2nd
# ed., ch. 2 (table number from memory): n per group of the two-sample t test,
# alpha = .05 two-sided, power .80.  (d, tabled n, exact noncentral-t n per
# CHECKS.md §1, a start size near the answer so the grid stays short.)
COHEN_CASES = [(0.2, 393, 393.406, 400), (0.5, 64, 63.766, 100), (0.8, 26, 25.525, 50)]


@pytest.mark.statistical
@pytest.mark.parametrize(("effect_size", "tabled", "exact", "start"), COHEN_CASES)
def test_no_network_size_matches_cohen_two_sample_t(effect_size: float, tabled: int, exact: float, start: int) -> None:
    """Without a network the required n of the Hajek/Neyman t(n-2) test is Cohen's two-sample n (times two arms)."""
    # The reference itself: statsmodels' exact noncentral-t solution, which
    # Cohen's table rounds to the nearest integer (CHECKS.md §1).
    reference = TTestIndPower().solve_power(effect_size=effect_size, alpha=0.05, power=0.8, ratio=1)
    assert reference == pytest.approx(exact, abs=5e-4)
    assert round(reference) == tabled

    # The no-network reduction makes the direct effect Cohen's d, and the
    # Hajek/Neyman test with t(n - 2) quantiles ("auto") the two-sample t test.
    result = designcalc.required_sample_size(no_network_scenario(units=start, direct=effect_size, reference="auto"))
    (record,) = result.select(estimand="direct", estimator="hajek", variance_estimator="neyman")
    assert record.status == "reached"
    assert not record.flags
    # "auto" refers the direct test to t(n - 2), Cohen's two-sample t.
    assert record.reference_distribution == f"t({record.verified_units - 2})"

    # The tool counts all units; per group is n / 2.  The 95% MC interval is
    # n_hat * exp(+-h) with h = record.relative_precision (log scale); the
    # default relative_precision 0.03 bounds h, so the half-width is at most
    # n_hat * sinh(0.03) = 3.0005% of n_hat (n_hat = geometric mean of the ends).
    low, high = record.units_low / 2, record.units_high / 2
    n_hat = math.sqrt(record.units_low * record.units_high)
    assert record.relative_precision <= 0.03
    assert (record.units_high - record.units_low) / 2 <= math.sinh(0.03) * n_hat
    assert n_hat - 1e-6 <= record.required_units < n_hat + 1 + 1e-6  # ceil(n_hat)
    # Bernoulli (not fixed) arm sizes: E[1/n_1] = (2/n)(1 + 1/n + O(n^-2)) for
    # n_1 ~ Binomial(n, 1/2), so the variance of the difference in means is
    # 4 sigma^2 (1 + 1/n) / n and about one more unit in total (half a unit
    # per group) is needed than with fixed arms.  That shift is below the
    # interval's half-width (>= 2% of n here), so Cohen's fixed-arm exact n
    # must lie inside the reported interval ...
    assert low <= exact <= high
    # ... and the Bernoulli-adjusted value (exact + 1/2 per group) inside the
    # interval widened to 4 MC SEs (the interval is +-1.96 SE in log n;
    # CHECKS.md §3).
    widened = 4 / 1.959963984540054 * record.relative_precision
    assert n_hat / 2 * math.exp(-widened) <= exact + 0.5 <= n_hat / 2 * math.exp(widened)
    # The size reported at the verified n is the two-sample test's nominal
    # 0.05 (its level by construction; Cohen 1988 ch. 2): within 4 MC SEs.
    assert abs(record.size - 0.05) <= 4 * record.size_mc_se


@pytest.mark.statistical
def test_lin_adjusted_size_shrinks_by_one_minus_r_squared() -> None:
    """With a covariate of R² = 0.6 the Lin test needs the two-sample t n at d / sqrt(1 - R²) (Borm, Fransen & Lemmens 2007; Bloom 1995)."""
    effect, r_squared = 0.3, 0.6
    # Outside reference: statsmodels' noncentral-t n per group at the
    # covariate-adjusted effect size d / sqrt(1 - R²), the ANCOVA design
    # factor of Borm, Fransen & Lemmens (2007, J. Clin. Epidemiol. 60:1234;
    # from memory) and Bloom's (1995) sqrt(1 - R²) on the MDE scale.
    per_group = TTestIndPower().solve_power(effect_size=effect / math.sqrt(1 - r_squared), alpha=0.05, power=0.8, ratio=1)
    scenario = no_network_scenario(
        units=150, direct=effect, reference="auto", covariates=[{"r_squared": r_squared}], estimators={"direct": ["hajek", "lin"]},
    )
    result = designcalc.required_sample_size(scenario)
    (record,) = result.select(estimand="direct", estimator="lin")
    assert record.status == "reached"
    assert record.reference_distribution == f"t({record.verified_units - 4})"  # two more coefficients than Hajek
    n_hat = math.sqrt(record.units_low * record.units_high) / 2
    # Tolerance: the 95% MC interval widened to 4 SEs (log scale, as in the
    # Cohen check), plus 1.5 units per group for what the reference leaves
    # out: Bernoulli arm sizes (half a unit, see above) and the two
    # estimated slopes (about one unit: variance factor 1 + 1/(n_arm - 3)).
    widened = 4 / 1.959963984540054 * record.relative_precision
    assert n_hat * math.exp(-widened) - 1.5 <= per_group <= n_hat * math.exp(widened) + 1.5
    # Decisive: the unadjusted answer (Cohen's n at d = 0.3, 174.5 per group) is far outside.
    assert n_hat * math.exp(widened) + 1.5 < 0.6 * TTestIndPower().solve_power(effect_size=effect, alpha=0.05, power=0.8, ratio=1)
    assert abs(record.size - 0.05) <= 4 * record.size_mc_se


@pytest.mark.statistical
def test_uncentred_ht_under_fixed_density_is_not_reachable() -> None:
    """Under fixed density the uncentred HT spillover SD grows like n^{+1/2}: no size is reported, a reason is."""
    # Derivation (METHODS.md §3.2): with centre 0 each S_i = sum_j A_ij Y_j is
    # about d * mean(Y); the plug-in variance sum_i S_i^2 / (n^2 pi (1 - pi))
    # is then of order d^2 mean(Y)^2 / n, and with d proportional to n
    # (growth_exponent = 1) the SD grows like n^{+1/2} while the effect stays
    # fixed: power falls as n grows.
    scenario = _two_block_scenario(growth_exponent=1.0, centre=0.0)
    result = designcalc.required_sample_size(scenario)
    (record,) = result.select(estimand="spillover", estimator="centred_ht")
    assert record.status == "not reachable"
    assert record.required_units is None
    assert math.isnan(record.units_low) and math.isnan(record.units_high)
    assert record.reason.startswith("not reachable")
    assert "growth exponent 1" in record.reason
    # The slope of log SD on log n over the grid (200 ... 1600, a 2.08 range in
    # log n): each coarse-grid SD rests on 8 graphs x 20 = 160 replicates,
    # relative MC error about 1/sqrt(2 * 160) = 5.6% if independent (perhaps
    # twice that with clustering by graph), so the slope's MC error is about
    # sqrt(2) * 0.056 / 2.08 = 0.04-0.08; 0.25 is over 3 such SEs and still far
    # from the -1/2 of a consistent estimator.
    assert record.sd_slope == pytest.approx(0.5, abs=0.25)
    assert record.points and max(p.units for p in record.points) <= 3200
    # The direct effect is unaffected by the density rule and is reached.
    (direct,) = result.select(estimand="direct")
    assert direct.status == "reached" and direct.required_units is not None


@pytest.mark.statistical
def test_centred_ht_under_fixed_mean_degree_is_reached() -> None:
    """With fixed mean degree and the centre at the mean outcome the HT spillover SD shrinks like n^{-1/2} and n is found."""
    # Mean outcome at pi = 1/2: baseline 5 + mean block effect 1 + direct
    # 0.5 / 2 + spillover 1 / 2 = 6.75.  With d fixed the plug-in variance is of
    # order d * Var(Y) / n (METHODS.md §3.2): SD proportional to n^{-1/2}.
    scenario = _two_block_scenario(growth_exponent=0.0, centre=6.75)
    result = designcalc.required_sample_size(scenario)
    (record,) = result.select(estimand="spillover", estimator="centred_ht")
    assert record.status == "reached", record.reason
    assert record.required_units is not None and record.reason == ""
    assert record.units_low <= record.required_units <= record.units_high + 1
    # Same slope tolerance as above (over three rough MC SEs of a log-log slope).
    assert record.sd_slope == pytest.approx(-0.5, abs=0.25)
    # The verified size's power is the target within 4 MC SEs (CHECKS.md §3).
    assert abs(record.verified_power - 0.8) <= 4 * record.verified_power_mc_se
    # Normal theory from the largest simulated point: n = n_j (2.8016 SD_j / tau)^2
    # with SD proportional to n^{-1/2} (Bloom 1995 multiplier).  That point's SD
    # has a relative MC error of about 1/sqrt(2 R) < 2%, i.e. < 4% in n, and the
    # feasible test's plug-in SE need not equal the SD (it drops cross terms of
    # order rho_n, METHODS.md §3.2); 25% covers 4 SEs of each plus that, and
    # still excludes an answer off by the factor 2 of a wrong slope.
    best = max(record.points, key=lambda p: p.replicates)
    theory = best.units * (2.8016 * best.sd / best.true_effect) ** 2
    assert record.required_units == pytest.approx(theory, rel=0.25)


def test_size_result_is_reproducible_and_independent_of_batch_size() -> None:
    """The same scenario and seed give identical SizeResult dicts on a rerun and with batch_size 4 instead of 16."""
    # 10 assignments per graph: batches of 4 split them 4 + 4 + 2.
    scenario = _two_block_scenario(growth_exponent=0.0, centre=6.75, graphs=8, assignments=10,
                                   relative_precision=0.2, max_graphs=16, max_units=800)
    runs = rerun(designcalc.required_sample_size, scenario, other_seed=10)
    assert runs.first == runs.again
    assert runs.first == runs.small_batches
    # A different seed changes the numbers (the check above is not vacuous).
    assert runs.other_seed != runs.first


def test_size_of_one_test_does_not_depend_on_the_other_planned_tests() -> None:
    """The Hajek/Neyman n is identical whether two_hop_psd is planned before it, after it, or not at all."""
    # Each test's search uses only the sizes and graph counts it asked for
    # itself; the draws are content-keyed, so a shared simulation is the
    # same numbers either way (STYLE.md: same scenario and seed, same result).
    def answer(variances: list[str]) -> tuple:
        scenario = block_model_scenario(
            units=[200], mean_degree=4, graphs=20, seed=9,
            outcome={"direct_effect": 0.25},
            estimators={"direct": ["hajek"], "direct_variance": variances, "spillover": ["centred_ht"], "eigenvectors": 0},
            simulation={"relative_precision": 0.1},
        )
        (record,) = designcalc.required_sample_size(scenario).select(estimand="direct", variance_estimator="neyman")
        return record.required_units, record.units_low, record.units_high, record.verified_units, record.points

    alone = answer(["neyman"])
    assert answer(["neyman", "two_hop_psd"]) == alone
    assert answer(["two_hop_psd", "neyman"]) == alone

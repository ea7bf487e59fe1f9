"""Tests of designcalc.mde: Bloom's multiplier, the allocation MDE formula, the simulation search, reproducibility, binary outcomes."""

from __future__ import annotations

import math

import pytest
import scipy as sp
import scipy.optimize
import scipy.special
import scipy.stats
from reproducibility import rerun
from scenario_text import block_model_scenario, no_network_scenario
from statsmodels.stats.power import NormalIndPower
from statsmodels.stats.proportion import power_proportions_2indep

import designcalc
from designcalc.mde import AGREEMENT_Z

# Bloom (1995), Evaluation Review 19(5):547-556: z_{0.975} + z_{0.80} (CHECKS.md §1).
BLOOM_MULTIPLIER = 2.8016
Z95 = 1.959963984540054  # the solvers' intervals are +-Z95 Monte Carlo SEs


def _hajek(result: designcalc.MdeResult, probability: float | None = None) -> designcalc.MdeRecord:
    criteria: dict[str, object] = {"estimand": "direct", "estimator": "hajek", "variance_estimator": "neyman"}
    if probability is not None:
        criteria["treatment_probability"] = probability
    (record,) = result.select(**criteria)
    return record


def bernoulli_variance_factor(units: int, probability: float) -> float:
    """Var(difference in means) with Bernoulli arm sizes over its fixed-arm value, to O(n^-2).

    E[1/n_1] = (1/(P N)) (1 + (1 - P)/(P N)) for n_1 ~ Binomial(N, P) (delta
    method), and likewise for n_0; weighting by the fixed-arm terms 1/P and
    1/(1 - P) gives 1 + [(1 - P)/(N P^2) + P/(N (1 - P)^2)] / [1/P + 1/(1 - P)].
    """
    p, n = probability, units
    extra = (1 - p) / (n * p**2) + p / (n * (1 - p) ** 2)
    return 1 + extra / (1 / p + 1 / (1 - p))


def t_mde_allowance(units: int, probability: float, alpha: float = 0.05, power: float = 0.8) -> float:
    """Extra MDE (in SD units of the estimator) when a t-like statistic meets normal quantiles.

    With reference "normal" the feasible test divides by an estimated SE, so
    its statistic is close to a noncentral t with df = smallest arm - 1 (a
    lower bound on the Welch df, so the largest gap; Cohen 1988 ch. 2).  The
    noncentrality that gives the target power then exceeds Bloom's 2.8016.
    """
    df = min(probability, 1 - probability) * units - 1
    z = sp.stats.norm.ppf(1 - alpha / 2)

    def gap(ncp: float) -> float:
        return sp.stats.nct.sf(z, df, ncp) + sp.stats.nct.cdf(-z, df, ncp) - power

    return float(sp.optimize.brentq(gap, 1.0, 6.0) - (z + sp.stats.norm.ppf(power)))


# ---------------------------------------------------------------------------
# 1. Bloom's multiplier
# ---------------------------------------------------------------------------
@pytest.mark.statistical
def test_formula_mde_is_bloom_multiplier_times_se_and_verified_mde_agrees() -> None:
    """Under "normal" the formula MDE is 2.8016 x SE; the verified MDE / SE agrees with 2.80 within its MC interval."""
    # N = 1000, P = 1/2; 200 graphs x 25 = 5000 replicates so the SE's MC error
    # is about 1/sqrt(2 * 5000) = 1%.
    scenario = no_network_scenario(units=1000, probabilities=[0.5], graphs=200)
    record = _hajek(designcalc.minimum_detectable_effects(scenario))
    assert record.reference_distribution == "normal"
    # Bloom (1995): z_{.975} + z_{.80} = 2.8016 (to the 4 decimals published).
    assert record.multiplier == pytest.approx(BLOOM_MULTIPLIER, abs=5e-5)
    assert record.formula_mde / record.standard_error == pytest.approx(BLOOM_MULTIPLIER, abs=5e-5)
    assert record.method == "formula, verified by simulation"

    # Verified MDE / SE against 2.8016.  Relative MC errors: the MDE's is
    # (half-width / Z95) / MDE from its reported 95% interval, the SE's is
    # standard_error_mc_se / SE.  Both come from the same replicates (common
    # random numbers), with a correlation we do not know, so the ratio's
    # relative error is bounded by their sum; allow 4 times that (CHECKS.md
    # §3).  Add the t-vs-normal excess of the feasible test (df = 499,
    # about 0.2%) and the Bernoulli arm-size term: the SE is simulated with
    # Bernoulli arms on both sides of the ratio, so that term cancels.
    ratio = record.mde / record.standard_error
    half = (record.mde_high - record.mde_low) / 2
    relative = half / Z95 / record.mde + record.standard_error_mc_se / record.standard_error
    allowance = t_mde_allowance(1000, 0.5)
    assert 0 < allowance < 0.01
    assert abs(ratio - BLOOM_MULTIPLIER) <= 4 * relative * BLOOM_MULTIPLIER + allowance
    assert 4 * relative * BLOOM_MULTIPLIER < 0.3  # the check has teeth: well under 2.80 +- 11%


def test_auto_reference_multiplier_is_scipy_t_quantile_sum() -> None:
    """Under "auto" the direct test's multiplier is t_{.975}(n-2) + t_{.80}(n-2) from scipy, and formula MDE / SE equals it."""
    units = 100
    scenario = no_network_scenario(units=units, probabilities=[0.5], reference="auto", graphs=10, assignments=10)
    record = _hajek(designcalc.minimum_detectable_effects(scenario, verify=False))
    expected = sp.stats.t.ppf(0.975, units - 2) + sp.stats.t.ppf(0.8, units - 2)
    assert record.reference_distribution == f"t({units - 2})"
    assert record.multiplier == pytest.approx(expected, rel=1e-12)
    assert record.formula_mde / record.standard_error == pytest.approx(expected, rel=1e-12)
    assert record.method == "formula (not verified)"
    # Not the normal multiplier: t(98) quantiles are 1% larger.
    assert record.multiplier > BLOOM_MULTIPLIER + 0.02


# ---------------------------------------------------------------------------
# 2. Duflo, Glennerster & Kremer: MDE with allocation P
# ---------------------------------------------------------------------------
# Duflo, Glennerster & Kremer, "Using Randomization in Development Economics
# Research: A Toolkit" (2007/2008): MDE = M sigma sqrt(1 / (P (1 - P) N)),
# CHECKS.md §1 values; (N, P, MDE in sigma units).
DGK_CASES = [(1000, 0.5, 0.177188), (1000, 0.3, 0.193328), (400, 0.2, 0.350198)]


@pytest.fixture(scope="module")
def dgk_results() -> dict[int, designcalc.MdeResult]:
    """One verified MDE run per N (both probabilities of N = 1000 in one run)."""
    return {
        1000: designcalc.minimum_detectable_effects(no_network_scenario(units=1000, probabilities=[0.3, 0.5])),
        400: designcalc.minimum_detectable_effects(no_network_scenario(units=400, probabilities=[0.2])),
    }


@pytest.mark.statistical
@pytest.mark.parametrize(("units", "probability", "published"), DGK_CASES)
def test_verified_mde_matches_allocation_formula(
    dgk_results: dict[int, designcalc.MdeResult], units: int, probability: float, published: float
) -> None:
    """The verified direct MDE equals M sigma / sqrt(P (1 - P) N) within Monte Carlo error."""
    # The reference, recomputed: statsmodels NormalIndPower (CHECKS.md §1).
    reference = NormalIndPower().solve_power(
        effect_size=None, nobs1=probability * units, ratio=(1 - probability) / probability, alpha=0.05, power=0.8
    )
    # CHECKS.md's 0.193328 is M sigma sqrt(...) with M rounded to 2.8016;
    # statsmodels (exact M = 2.80158) gives 0.1933267: 1.3e-6 apart.
    assert reference == pytest.approx(published, abs=2e-6)
    assert BLOOM_MULTIPLIER / math.sqrt(probability * (1 - probability) * units) == pytest.approx(published, rel=1e-4)

    record = _hajek(dgk_results[units], probability)
    assert record.method == "formula, verified by simulation"
    assert math.isfinite(record.mde)
    # Tolerance: the reported interval is +-Z95 MC SEs; widen it to 4 SEs
    # (CHECKS.md §3), then allow the two systematic terms the normal-theory
    # formula leaves out: Bernoulli arm sizes (SD factor sqrt(1 + O(1/N)),
    # 0.05%-0.4% here) and the feasible test's t-like statistic against
    # normal quantiles (t_mde_allowance, below 1%).
    half = (record.mde_high - record.mde_low) / 2
    se_scale = published / BLOOM_MULTIPLIER  # sigma sqrt(1/(P(1-P)N))
    bernoulli = published * (math.sqrt(bernoulli_variance_factor(units, probability)) - 1)
    t_excess = se_scale * t_mde_allowance(units, probability)
    assert abs(record.mde - published) <= 4 * half / Z95 + bernoulli + t_excess
    # Outcomes have SD 1 when nobody is treated, so SD units equal outcome units.
    assert record.control_sd == pytest.approx(1.0, rel=1e-12)
    assert record.mde_sd_units == pytest.approx(record.mde, rel=1e-12)
    # The power simulated at the last effect is the target within 4 MC SEs.
    assert abs(record.verified_power - 0.8) <= 4 * record.verified_power_mc_se
    # The formula MDE (2.8016 x simulated SD) agrees too: the SD's relative
    # MC error is standard_error_mc_se / standard_error; 4 of them.
    assert abs(record.formula_mde - published) <= (
        4 * BLOOM_MULTIPLIER * record.standard_error_mc_se + bernoulli
    )


# ---------------------------------------------------------------------------
# 2b. Baseline covariates: the MDE shrinks by sqrt(1 - R²)
# ---------------------------------------------------------------------------
@pytest.mark.statistical
@pytest.mark.parametrize("r_squared", [0.0, 0.3, 0.6])
def test_lin_adjusted_mde_matches_bloom_with_r_squared(r_squared: float) -> None:
    """Through the engine, the Lin-adjusted direct MDE is M sigma sqrt((1 - R²) / (P (1 - P) N)) (Bloom 1995)."""
    units, probability = 1000, 0.5
    scenario = no_network_scenario(
        units=units, probabilities=[probability], covariates=[{"name": "baseline outcome", "r_squared": r_squared}],
        estimators={"direct": ["hajek", "lin"]}, simulation={"relative_precision": 0.01, "max_graphs": 2000},
    )
    result = designcalc.minimum_detectable_effects(scenario)
    (record,) = result.select(estimand="direct", estimator="lin")
    # Bloom (1995), Evaluation Review 19(5):547-556, with the covariate's R²
    # (Duflo, Glennerster & Kremer's toolkit form; M from CHECKS.md §1).
    published = BLOOM_MULTIPLIER * math.sqrt((1 - r_squared) / (probability * (1 - probability) * units))
    assert record.method in ("formula, verified by simulation", "searched by simulation")
    # Tolerance as in the allocation check above: 4 MC SEs of the MDE, the
    # Bernoulli arm sizes and the t-like statistic, plus the cost of
    # estimating the slope in each arm (variance factor about 1 + 2K/N for K
    # covariates, 2 K / N = 0.2% here; order from memory of the ANCOVA
    # small-sample inflation).
    half = (record.mde_high - record.mde_low) / 2
    se_scale = published / BLOOM_MULTIPLIER
    bernoulli = published * (math.sqrt(bernoulli_variance_factor(units, probability)) - 1)
    slopes = published * (math.sqrt(1 + 2 / units) - 1)
    allowance = 4 * half / Z95 + bernoulli + slopes + se_scale * t_mde_allowance(units, probability)
    assert abs(record.mde - published) <= allowance
    # Decisive: the tolerance is far smaller than what R² = 0.3 changes (16%).
    assert allowance < 0.06 * published
    # The unadjusted Hajek MDE on the same draws does not shrink.
    (hajek,) = result.select(estimand="direct", estimator="hajek", variance_estimator="neyman")
    unadjusted = BLOOM_MULTIPLIER * math.sqrt(1 / (probability * (1 - probability) * units))
    assert abs(hajek.mde - unadjusted) <= 4 * (hajek.mde_high - hajek.mde_low) / 2 / Z95 + unadjusted * 0.01


@pytest.mark.statistical
def test_spillover_mde_without_a_network_is_not_reachable(dgk_results: dict[int, designcalc.MdeResult]) -> None:
    """With nearly every unit isolated there is no spillover information: no finite spillover MDE is reported."""
    # Isolates contribute nothing to the spillover effect (METHODS.md, decisions):
    # at mean degree 0.001 the true spillover per unit coefficient is ~1e-3, so
    # no effect size can be detected.
    for record in dgk_results[1000].select(estimand="spillover"):
        assert record.method == "not reachable"
        assert math.isnan(record.mde)
        assert any(flag.startswith("not reachable") for flag in record.flags)


# ---------------------------------------------------------------------------
# 3. The search by simulation, and unreachable effects
# ---------------------------------------------------------------------------
def _community_scenario(
    *,
    spillover_effect: float = 1.0,
    spillover: tuple[str, ...] = ("centred_ht", "pc_balancing"),
    graphs: int = 20,
    assignments: int = 20,
    seed: int = 5,
    units: int = 600,
    relative_precision: float = 0.03,
    max_graphs: int = 1000,
) -> designcalc.Scenario:
    """Three communities with different outcome levels (an invented demo-like block model), centre fixed at the baseline."""
    return block_model_scenario(
        units=[units], mean_degree=10, graphs=graphs, assignments=assignments, seed=seed,
        block_shares=[0.5, 0.3, 0.2], block_affinity=[[8.0, 1.0, 0.5], [1.0, 10.0, 1.0], [0.5, 1.0, 14.0]],
        outcome={"baseline": 20.0, "block_effects": [0.0, 2.0, -1.5], "noise_sd": 4.0, "direct_effect": 1.2, "spillover_effect": spillover_effect},
        estimators={"spillover": list(spillover), "centre": 20.0, "eigenvectors": "auto"},
        simulation={"relative_precision": relative_precision, "max_graphs": max_graphs},
        source="communities.toml",
    )


@pytest.fixture(scope="module")
def community_result() -> designcalc.MdeResult:
    return designcalc.minimum_detectable_effects(_community_scenario())


@pytest.mark.statistical
def test_mde_is_searched_when_the_sd_grows_with_the_effect(community_result: designcalc.MdeResult) -> None:
    """PC-balancing's SD grows with the spillover effect: the formula MDE falls short and the search finds a larger one."""
    (record,) = community_result.select(estimand="spillover", estimator="pc_balancing")
    assert record.method == "searched by simulation"
    # The formula's power was clearly short of the target (more than
    # AGREEMENT_Z MC SEs), which is why the search ran.
    assert record.formula_power < 0.8 - AGREEMENT_Z * record.formula_power_mc_se
    # The searched MDE exceeds the formula MDE beyond its own MC interval.
    assert record.mde > record.formula_mde
    assert record.mde_low > record.formula_mde
    assert record.relative_precision <= 0.03
    # The power simulated at the search's last effect agrees with the target.
    assert abs(record.verified_power - 0.8) <= AGREEMENT_Z * record.verified_power_mc_se

    # Outside check of the reported MDE: simulate the power at it with the
    # power table on fresh random streams (seed 77, 200 graphs x 20 = 4000
    # replicates).  The spillover estimand is the coefficient times the
    # non-isolated share (about 1 at mean degree 10), so the coefficient is
    # set to the MDE and the realised estimand checked.  The power there should
    # be 0.8 within 4 combined SEs: the fresh run's MC SE, and the MDE's MC
    # error carried to power by the probit slope phi(z_.8) / SD.
    def power_at(coefficient: float) -> designcalc.PowerRecord:
        run = designcalc.simulate_power(
            _community_scenario(spillover_effect=coefficient, spillover=("pc_balancing",)),
            graphs=200,
            assignments_per_graph=20,
            seed=77,
        )
        (spill,) = run.select(estimand="spillover", estimator="pc_balancing")
        return spill

    at_mde = power_at(record.mde)
    assert at_mde.true_effect == pytest.approx(record.mde, rel=2e-3)
    slope = sp.stats.norm.pdf(sp.stats.norm.ppf(0.8)) / at_mde.sd
    mde_se = (record.mde_high - record.mde_low) / 2 / Z95
    assert abs(at_mde.power - 0.8) <= 4 * math.hypot(at_mde.power_mc_se, slope * mde_se)
    # ... and the formula MDE fails the same outside check: the power at it is
    # clearly below the target.
    at_formula = power_at(record.formula_mde * record.mde / at_mde.true_effect)
    assert at_formula.true_effect == pytest.approx(record.formula_mde, rel=1e-9)
    assert at_formula.power < 0.8 - 4 * at_formula.power_mc_se


@pytest.mark.statistical
def test_centred_ht_with_a_drifting_centre_is_not_reachable(community_result: designcalc.MdeResult) -> None:
    """With the centre fixed at the no-spillover baseline, the HT spillover SD grows in proportion to the effect: no MDE."""
    # Derivation: S_i = sum_j A_ij (Y_j - c) holds tau * sum_j A_ij X_j, whose
    # spread across units grows linearly in tau, so SD ~ a + b tau and
    # effect / SD levels off at 1 / b; when 1 / b < z_.975 + z_.80 no effect
    # has 80% power (METHODS.md §3.2 on centring).
    (record,) = community_result.select(estimand="spillover", estimator="centred_ht")
    assert record.method == "not reachable"
    assert math.isnan(record.mde) and math.isnan(record.mde_low) and math.isnan(record.mde_high)
    assert math.isnan(record.mde_sd_units)
    assert any("not reachable" in flag and "SD grows with the effect" in flag for flag in record.flags)
    # The last simulated effect is far larger than the formula MDE and still
    # has power clearly below the target.
    assert record.verified_effect > 4 * record.formula_mde
    assert record.verified_power < 0.8 - 4 * record.verified_power_mc_se
    # The direct effect of the same scenario is unaffected.
    (direct,) = community_result.select(estimand="direct")
    assert math.isfinite(direct.mde) and direct.method != "not reachable"


# ---------------------------------------------------------------------------
# 4. Reproducibility
# ---------------------------------------------------------------------------
def test_mde_result_is_reproducible_and_independent_of_batch_size() -> None:
    """The same scenario and seed give identical MdeResult dicts on a rerun and with batch_size 4 instead of 16."""
    # A real network with every spillover path (search, plateau, adaptive
    # graphs); 10 assignments per graph are split 4 + 4 + 2 by batch_size 4.
    scenario = _community_scenario(units=200, graphs=6, assignments=10, relative_precision=0.2, max_graphs=12)
    runs = rerun(designcalc.minimum_detectable_effects, scenario, other_seed=6)
    assert runs.first == runs.again
    assert runs.first == runs.small_batches
    assert runs.other_seed != runs.first


# ---------------------------------------------------------------------------
# 5. Binary outcomes
# ---------------------------------------------------------------------------
def _binary_scenario(*, link: str, baseline: float, direct: float, mean_degree: float, units: int = 1000) -> designcalc.Scenario:
    return block_model_scenario(
        units=[units], mean_degree=mean_degree, seed=4,
        outcome={"kind": "binary", "link": link, "baseline": baseline, "noise_sd": None, "direct_effect": direct},
        design={"reference_distribution": "normal"}, source="binary.toml",
    )


def _two_proportion_power(difference: float, control: float, units: int) -> float:
    """Normal-approximation power of the unpooled two-proportion z test, equal arms (statsmodels)."""
    return float(
        power_proportions_2indep(difference, control, units / 2, ratio=1, alpha=0.05, return_results=False)
    )


def _check_binary_direct(record: designcalc.MdeRecord, control: float, units: int) -> None:
    """The direct MDE of a binary outcome without spillover against the two-proportion test."""
    assert math.isfinite(record.mde) and record.mde > 0
    # The reference MDE: the difference at which the unpooled two-proportion z
    # test (statsmodels power_proportions_2indep) has 80% power.
    reference = sp.optimize.brentq(lambda d: _two_proportion_power(d, control, units) - 0.8, 1e-4, 0.5)
    # "Binary outcome near 0.5, equal arms: MDE ~ 2.8 / sqrt(N)" (CHECKS.md §1,
    # back-of-the-envelope rule: sigma = 1/2 in both arms).
    rule = 2.8 / math.sqrt(units)
    assert reference == pytest.approx(rule, rel=0.01)
    # Tolerance: 4 MC SEs from the reported interval, plus the Bernoulli
    # arm-size term and the t-vs-normal excess (both below 0.1% at N = 1000).
    half = (record.mde_high - record.mde_low) / 2
    systematic = reference * (math.sqrt(bernoulli_variance_factor(units, 0.5)) - 1) + reference / BLOOM_MULTIPLIER * t_mde_allowance(units, 0.5)
    assert abs(record.mde - reference) <= 4 * half / Z95 + systematic
    # verified_effect is the mean true estimand of the model the verification
    # simulated: the power simulated there must be the two-proportion power at
    # p_0 and p_0 + verified_effect, within 4 MC SEs (+ the same systematic
    # terms carried to power: < 0.002).
    expected = _two_proportion_power(record.verified_effect, control, units)
    assert abs(record.verified_power - expected) <= 4 * record.verified_power_mc_se + 0.002
    if record.method == "formula, verified by simulation":
        # The verification scales the effect so that its mean true estimand is
        # the formula MDE (root finding on the exact estimands, mde.py step 2).
        assert record.verified_effect == pytest.approx(record.formula_mde, rel=1e-8)


@pytest.mark.statistical
def test_binary_identity_link_mde_matches_two_proportion_test() -> None:
    """A binary outcome (identity link) gives a finite direct MDE that matches the two-proportion z test."""
    # A real network (mean degree 5) with spillover 0: outcomes do not depend
    # on the graph, so the direct effect is the classical two-arm problem.
    scenario = _binary_scenario(link="identity", baseline=0.45, direct=0.1, mean_degree=5.0)
    result = designcalc.minimum_detectable_effects(scenario)
    record = _hajek(result)
    # The control arm's outcome SD is sqrt(0.45 * 0.55).
    assert record.control_sd == pytest.approx(math.sqrt(0.45 * 0.55), rel=1e-9)
    _check_binary_direct(record, 0.45, 1000)
    for other in result.records:
        assert other.method != "formula (not verified)"


@pytest.mark.statistical
@pytest.mark.parametrize(("link", "baseline", "direct"), [("identity", 0.45, 0.1), ("logistic", 0.0, 0.5)])
def test_binary_no_network_mde_matches_two_proportion_test(link: str, baseline: float, direct: float) -> None:
    """The no-network reduction with a binary outcome gives the two-proportion z test's direct MDE."""
    scenario = _binary_scenario(link=link, baseline=baseline, direct=direct, mean_degree=0.001)
    result = designcalc.minimum_detectable_effects(scenario)
    control = baseline if link == "identity" else float(sp.special.expit(baseline))
    _check_binary_direct(_hajek(result), control, 1000)
    for record in result.select(estimand="spillover"):
        assert record.method == "not reachable" and math.isnan(record.mde)


@pytest.mark.statistical
@pytest.mark.parametrize("link", ["identity", "logistic"])
def test_binary_lin_null_se_shrinks_by_sqrt_one_minus_r_squared(link: str) -> None:
    """Binary outcome, no network: Lin's SE under the null is sqrt(p (1 - p) (1 - R²) / (P (1 - P) N)), R² on the probability scale."""
    units, r_squared = 1000, 0.3
    baseline = 0.4 if link == "identity" else float(sp.special.logit(0.4))
    scenario = block_model_scenario(
        units=[units], mean_degree=0.001, seed=4, graphs=200,
        outcome={"kind": "binary", "link": link, "baseline": baseline, "noise_sd": None, "direct_effect": 0.1 if link == "identity" else 0.4},
        design={"reference_distribution": "normal"}, estimators={"direct": ["hajek", "lin"]},
        covariates=[{"name": "baseline take-up", "r_squared": r_squared}], source="binary_covariate.toml",
    )
    result = designcalc.minimum_detectable_effects(scenario, verify=False)
    (lin,) = result.select(estimand="direct", estimator="lin")
    (hajek,) = result.select(estimand="direct", estimator="hajek", variance_estimator="neyman")
    # Under the null both arms have p = 0.4, and the covariate explains R² of
    # the 0/1 outcome's variance p (1 - p) in each (the scenario's definition,
    # checked against statsmodels OLS in tests/test_covariates.py); the
    # classical adjusted SE (Bloom 1995 with sigma² = p (1 - p)) follows.
    p = 0.4
    expected = math.sqrt(p * (1 - p) * (1 - r_squared) / (0.25 * units))
    # Tolerance: 4 MC SEs of the simulated SD, plus the Bernoulli arm-size
    # factor (0.1% at N = 1000) and the slopes' cost (1/N per arm, 0.1%).
    slack = expected * (math.sqrt(bernoulli_variance_factor(units, 0.5)) - 1 + 2 / units)
    assert abs(lin.standard_error - expected) <= 4 * lin.standard_error_mc_se + slack
    unadjusted = math.sqrt(p * (1 - p) / (0.25 * units))
    assert abs(hajek.standard_error - unadjusted) <= 4 * hajek.standard_error_mc_se + slack
    # Decisive: the two differ by 16%, over ten MC SEs.
    assert unadjusted - expected > 10 * lin.standard_error_mc_se

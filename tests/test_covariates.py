"""Tests of designcalc.covariates and the [[covariates]] scenario section: stated R² and type share, errors, no side effects."""

from __future__ import annotations

import math
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import statsmodels.api as sm
from scenario_text import block_model_scenario

import designcalc
from designcalc.covariates import (
    Covariate,
    covariate_loadings,
    draw_covariates,
    latent_individual_scores,
)
from designcalc.edge_models import BlockModel, KernelModel
from designcalc.errors import ScenarioError
from designcalc.outcomes import OutcomeModel

SHARES = (0.5, 0.3, 0.2)
NET = BlockModel(SHARES, ((8.0, 1.0, 0.5), (1.0, 10.0, 1.0), (0.5, 1.0, 14.0)))
UNITS = 200_000


def _population(outcome: OutcomeModel, network, seed: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(theta, noise, untreated outcome) of UNITS units drawn as the engine draws them."""
    rng = np.random.default_rng(seed)
    u = rng.random(UNITS)
    blocks = network.block_of(u) if isinstance(network, BlockModel) else None
    theta = outcome.type_values(u, blocks)
    zeros = np.zeros(UNITS)
    mean = outcome.mean_outcome(theta, zeros, zeros)
    if outcome.kind == "continuous":
        noise = rng.standard_normal((UNITS, 1))
        y0 = mean + outcome.noise_sd * noise[:, 0]
    else:
        noise = rng.random((UNITS, 1))
        y0 = (noise[:, 0] < mean).astype(float)
    return theta, noise, y0


def _r_squared_se(r2: float) -> float:
    """Large-sample SE of a sample R² with one regressor: sqrt(4 R² (1 - R²)² / n) (delta method; Cohen, Cohen, West & Aiken 2003, from memory)."""
    return math.sqrt(4 * r2 * (1 - r2) ** 2 / UNITS) + 1e-4  # + the binary-case excess kurtosis allowance below


CASES = [
    ("continuous, blocks", OutcomeModel(baseline=20.0, block_effects=(0.0, 2.0, -1.5), noise_sd=4.0), NET, 0.5, 0.1),
    ("continuous, kernel type effect", OutcomeModel(baseline=50.0, type_effect="-6 * u", noise_sd=8.0), KernelModel("distance_decay", length_scale=0.08, floor=0.05), 0.3, 0.0),
    ("binary identity", OutcomeModel(kind="binary", baseline=0.3, block_effects=(0.0, 0.2, -0.1)), NET, 0.15, 0.3),
    ("binary logistic", OutcomeModel(kind="binary", link="logistic", baseline=-0.5, type_effect="2 * u"), KernelModel("distance_decay", length_scale=0.08, floor=0.05), 0.2, 0.2),
]


@pytest.mark.parametrize(("label", "outcome", "network", "r2", "share"), CASES, ids=[c[0] for c in CASES])
def test_generated_covariate_explains_the_stated_share(label: str, outcome: OutcomeModel, network, r2: float, share: float) -> None:
    """The OLS R² of the untreated outcome on the covariate is the stated R², the slope is 1, and the stated share runs through the type."""
    loadings = covariate_loadings((Covariate("x", r2, share),), outcome, network)
    theta, noise, y0 = _population(outcome, network, seed=11)
    x = draw_covariates(loadings, theta, latent_individual_scores(outcome.kind, noise), np.random.default_rng(12))[:, 0, 0]
    # Outside reference: statsmodels OLS of Y0 on (1, x).
    fit = sm.OLS(y0, sm.add_constant(x)).fit()
    # Tolerance: 4 large-sample SEs of R² (normal-theory SE; binary outcomes
    # have lighter tails, so the same bound is conservative there).
    assert abs(fit.rsquared - r2) <= 4 * _r_squared_se(r2)
    # Slope 1: its SE is reported by statsmodels; 4 of them.
    assert abs(fit.params[1] - 1.0) <= 4 * fit.bse[1]
    # Share through the type: Cov(a (theta - E theta), Y0) / Cov(x, Y0) = share.
    type_part = loadings.type_loading[0] * (theta - loadings.type_mean)
    through = np.cov(type_part, y0)[0, 1] / np.cov(x, y0)[0, 1]
    # The ratio's MC error is below 0.01 at this n for every case (checked by
    # its delta-method SE, about 0.002-0.004); 0.015 is over 4 of them.
    assert through == pytest.approx(share, abs=0.015)


def test_joint_r_squared_of_two_covariates_matches_ols() -> None:
    """Two covariates' joint R² (reported by the scenario) equals statsmodels' R² of Y0 on both."""
    outcome = OutcomeModel(baseline=20.0, block_effects=(0.0, 2.0, -1.5), noise_sd=4.0)
    covs = (Covariate("a", 0.3, 0.1), Covariate("b", 0.2, 0.0))
    loadings = covariate_loadings(covs, outcome, NET)
    theta, noise, y0 = _population(outcome, NET, seed=21)
    x = draw_covariates(loadings, theta, latent_individual_scores("continuous", noise), np.random.default_rng(22))[:, 0, :]
    fit = sm.OLS(y0, sm.add_constant(x)).fit()
    assert 0.3 < loadings.joint_r_squared < 0.5  # more than either, less than the sum: they overlap
    # Two regressors: the R² SE is about the same as with one; 4 SEs.
    assert abs(fit.rsquared - loadings.joint_r_squared) <= 4 * _r_squared_se(loadings.joint_r_squared)


def test_zero_r_squared_covariate_is_unrelated_noise() -> None:
    """R² = 0 gives a covariate with the outcome's spread and no relation to it."""
    outcome = OutcomeModel(noise_sd=2.0)
    loadings = covariate_loadings((Covariate("x", 0.0),), outcome, BlockModel((1.0,), ((1.0,),)))
    assert loadings.type_loading == (0.0,) and loadings.individual_loading == (0.0,)
    assert loadings.own_noise_sd[0] == pytest.approx(2.0, rel=1e-12)


def _scenario_text(covariates: str, estimators: str = "") -> str:
    return f"""
[population]
units = [200]
[network]
model = "blocks"
block_shares = [0.5, 0.5]
block_affinity = [[4.0, 1.0], [1.0, 4.0]]
[network.density]
mean_degree = 8
reference_units = 200
[outcome]
baseline = 0.0
block_effects = [0.0, 1.0]
noise_sd = 1.0
direct_effect = 0.3
spillover_effect = 0.2
{covariates}
[design]
treatment_probability = 0.5
{estimators}
"""


@pytest.mark.parametrize(
    ("covariates", "estimators", "key", "words"),
    [
        ("[covariates]\nr_squared = 0.3", "", "covariates", "double brackets"),
        ("[[covariates]]\nr_squared = 1.0", "", "covariates[0].r_squared", "[0, 0.99]"),
        ("[[covariates]]\nr_squared = 0.3\nthrough_typ = 0.2", "", "covariates[0].through_typ", "through_type"),
        ("[[covariates]]\nr_squared = 0.5\nthrough_type = 1.0", "", "covariates[0].r_squared", "largest attainable"),
        ("[[covariates]]\nname = \"a\"\nr_squared = 0.3\n[[covariates]]\nname = \"a\"\nr_squared = 0.2", "", "covariates[1].name", "another covariate"),
        ("", "[estimators]\ndirect = [\"lin\"]", "estimators.direct", "states none"),
        ("", "[estimators]\nspillover = [\"centred_ht_adjusted\"]", "estimators.spillover", "states none"),
    ],
)
def test_covariate_mistakes_name_the_key(covariates: str, estimators: str, key: str, words: str) -> None:
    """Each covariate mistake is a ScenarioError naming the dotted key."""
    with pytest.raises(ScenarioError) as info:
        designcalc.parse_scenario(_scenario_text(covariates, estimators), source="plan.toml")
    message = str(info.value)
    assert key in message and "plan.toml" in message and words in message


def test_infeasible_covariate_is_a_clean_cli_error(tmp_path) -> None:
    """`designcalc check` on an impossible covariate exits 2 with the key and the largest attainable R², no traceback."""
    path = tmp_path / "plan.toml"
    path.write_text(_scenario_text("[[covariates]]\nr_squared = 0.5\nthrough_type = 1.0"))
    result = subprocess.run([sys.executable, "-m", "designcalc", "check", str(path)], capture_output=True, text=True, timeout=120)
    assert result.returncode == 2
    # Type share here: Var(block effect) = 0.25 of V0 = 1.25 -> 0.2; through
    # the type alone the covariate can explain at most that.
    assert "covariates[0].r_squared" in result.stderr and "explains 0.2 " in result.stderr
    assert "Traceback" not in result.stderr + result.stdout


def test_default_plan_with_covariates_shows_both_side_by_side() -> None:
    """Without an [estimators] table a scenario with covariates plans adjusted and unadjusted estimators."""
    s = designcalc.parse_scenario(_scenario_text("[[covariates]]\nr_squared = 0.3"))
    assert s.estimators.direct == ("hajek", "lin")
    assert "centred_ht_adjusted" in s.estimators.spillover and "centred_ht" in s.estimators.spillover
    assert s.n_covariates == 1


def test_covariates_change_no_unadjusted_number() -> None:
    """Adding a covariate leaves every unadjusted estimate, SE and estimand exactly as it was (the outcome model is unchanged)."""
    common = dict(units=[300], mean_degree=8, graphs=3, assignments=8, seed=5,
                  block_shares=(0.5, 0.5), block_affinity=((4.0, 1.0), (1.0, 4.0)),
                  outcome={"block_effects": [0.0, 1.0], "direct_effect": 0.3, "spillover_effect": 0.4})
    plain = block_model_scenario(**common, estimators={"spillover": ["centred_ht"]})
    adjusted = block_model_scenario(
        **common, estimators={"direct": ["hajek", "lin"], "spillover": ["centred_ht", "centred_ht_adjusted"]},
        covariates=[{"r_squared": 0.4, "through_type": 0.2}],
    )
    a = {(r.estimand, r.estimator, r.variance_estimator): r for r in designcalc.simulate_power(plain).records}
    b = {(r.estimand, r.estimator, r.variance_estimator): r for r in designcalc.simulate_power(adjusted).records}
    assert set(a) < set(b)
    for key, record in a.items():
        assert record.mean_estimate == b[key].mean_estimate
        assert record.mean_standard_error == b[key].mean_standard_error
        assert record.true_effect == b[key].true_effect
        assert record.power == b[key].power
    # And the adjusted direct test is really adjusted: a smaller SD.
    lin = b["direct", "lin", "hc2"]
    assert lin.sd < a["direct", "hajek", "neyman"].sd


DEMOS = Path(__file__).resolve().parents[1] / "scenarios"
_MARROW_COVARIATE = """
[[covariates]]
name = "baseline hygiene score"
r_squared = 0.4
through_type = 0.2

[design]"""


@pytest.mark.statistical
@pytest.mark.parametrize("demo", ["lake_orrin_savings.toml", "marrow_valley_hygiene.toml"])
def test_adjustment_does_not_change_the_estimand(demo: str) -> None:
    """On the demo scenarios, adjusted estimators average to the exact per-graph estimand within Monte Carlo error."""
    text = (DEMOS / demo).read_text()
    if "[[covariates]]" not in text:
        text = text.replace("[design]", _MARROW_COVARIATE.strip(), 1)
    text = text.replace('direct = ["hajek"]', 'direct = ["hajek", "lin"]')
    text = text.replace('spillover = ["pc_balancing_corrected", "centred_ht"]', 'spillover = ["pc_balancing_corrected_adjusted", "centred_ht_adjusted"]')
    scenario = designcalc.parse_scenario(text, source=demo)
    smallest = min(scenario.population.units)
    # One size; bias is the mean of (estimate - exact estimand of its graph)
    # and bias_mc_se its graph-clustered MC se.  4 SEs (CHECKS.md §3); the
    # fitted slopes add an O(dbar / n) term (below 0.01 SE here, see
    # estimators.residualise_on_covariates) that this cannot detect.
    result = designcalc.simulate_power(scenario, units=[smallest], treatment_probabilities=[scenario.design.treatment_probabilities[-1]])
    checked = 0
    for record in result.records:
        if record.estimator in ("lin", "pc_balancing_corrected_adjusted", "centred_ht_adjusted") or "_adjusted" in record.estimator and record.estimand == "total":
            assert abs(record.bias) <= 4 * record.bias_mc_se, (record.estimator, record.bias, record.bias_mc_se)
            checked += 1
    assert checked >= 4
    # And the adjustment buys precision for the direct effect: Lin's SD is
    # below Hajek's by about sqrt(1 - R²) (not asserted exactly: interference).
    sd = {r.estimator: r.sd for r in result.records if r.estimand == "direct" and r.variance_estimator in ("neyman", "hc2")}
    assert sd["lin"] < 0.9 * sd["hajek"]


@pytest.mark.parametrize("kind", ["continuous", "binary"])
def test_covariate_runs_do_not_depend_on_batch_size(kind: str) -> None:
    """With covariates (continuous or binary outcomes) batch sizes 1, 7 and 16 give identical results."""
    outcome = {"block_effects": [0.0, 1.0], "direct_effect": 0.3, "spillover_effect": 0.4}
    if kind == "binary":
        outcome = {"kind": "binary", "link": "logistic", "baseline": -0.5, "block_effects": [0.0, 1.0],
                   "direct_effect": 0.4, "spillover_effect": 0.5, "noise_sd": None}
    scenario = block_model_scenario(
        units=[200], mean_degree=8, graphs=2, assignments=9, seed=13, block_shares=(0.5, 0.5),
        block_affinity=((4.0, 1.0), (1.0, 4.0)), outcome=outcome,
        estimators={"eigenvectors": 2, "direct": ["hajek", "lin"],
                    "spillover": ["centred_ht_adjusted", "pc_balancing_corrected_adjusted", "exposure_regression_adjusted"]},
        covariates=[{"name": "a", "r_squared": 0.2, "through_type": 0.3}, {"name": "b", "r_squared": 0.1}],
    )
    assert set(scenario.estimators.direct) == {"hajek", "lin"}
    runs = []
    for batch in (1, 7, 16):
        d = designcalc.simulate_power(scenario, batch_size=batch).to_dict()
        d["provenance"].pop("utc_time")
        runs.append(d)
    assert all(math.isfinite(r["mean_estimate"]) for r in runs[0]["results"])
    assert runs[0] == runs[1] == runs[2]

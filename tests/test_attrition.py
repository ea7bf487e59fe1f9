"""Outcome attrition (issue 8, measurement): complete-case analysis against exact expectations.

Missingness is drawn per unit and assignment with probability a_1 (treated)
or a_0 (untreated); the analysis uses the observed outcomes only.  With
response rates r_w = 1 - a_w, shares pi_1 = pi, pi_0 = 1 - pi and the mean
response rbar = sum_w pi_w r_w, the complete-case estimators have these
expectations (our derivation, exact up to the O(1/n) of the random number
of responders; each term is the unit-level identity E[omega_i Y_i] =
E[Y | W=1] - E[Y | W=0] of Horvitz & Thompson 1952 restricted to responders):

* Hajek: the difference of the arms' responder means, E[Y | W=1] - E[Y | W=0]
  when missingness depends on own treatment only (unbiased);
* direct HT (centre c): (r_1 mu_1 - r_0 mu_0) / rbar, mu_w = E[Y - c | W = w];
* centred HT and PC spillover estimators (sums over outcome units j of
  R_j Y_j h_j with h_j a function of the others' treatments):
  sum_w pi_w r_w tau_w / rbar, tau_w the spillover effect on units with own
  treatment w (METHODS.md §1.3: tau_IND = pi tau_1 + (1 - pi) tau_0).

For a linear spillover with interaction, Y = a W + (b + c W) X + noise,
and no isolates (mean degree 12: P(isolate) = e^-12 per unit), tau_w = b + c w
and mu_w = a w + (b + c w) pi.  Estimates are compared with these within 4
graph-clustered Monte Carlo SEs (CHECKS.md §3).
"""

from __future__ import annotations

import pytest
from scenario_text import block_model_scenario

from designcalc.errors import ScenarioError
from designcalc.power import simulate_power

A, B, C, PI = 0.3, 0.5, 0.6, 0.5


def _scenario(measurement: dict | None, seed: int = 5):
    s = block_model_scenario(
        units=[1000], mean_degree=12.0, probabilities=(PI,), graphs=40, assignments=25, seed=seed,
        outcome={"direct_effect": A, "spillover_effect": B, "interaction": C},
        estimators={"direct": ["hajek", "horvitz_thompson"], "spillover": ["centred_ht", "pc_balancing_corrected"], "eigenvectors": 1},
    )
    if measurement is None:
        return s
    from dataclasses import replace

    from designcalc.measurement import MeasurementModel

    return replace(s, measurement=MeasurementModel(**measurement))


def _records(scenario):
    return {r.estimator: r for r in simulate_power(scenario).records}


def test_no_attrition_changes_no_number():
    # A measurement table that loses no outcome and sees the whole network: identical results (exact equality).
    base = _records(_scenario(None))
    same = _records(_scenario({"attrition_treated": 0.0, "attrition_control": 0.0}))
    assert {k: r.to_dict() for k, r in base.items()} == {k: r.to_dict() for k, r in same.items()}


def test_outcomes_missing_at_random_leave_every_estimator_unbiased():
    # a_1 = a_0 = 0.3: rbar = 0.7 and every formula above reduces to the estimand.
    records = _records(_scenario({"attrition_treated": 0.3, "attrition_control": 0.3}))
    for name, r in records.items():
        assert abs(r.bias) <= 4 * r.bias_mc_se, (name, r.bias, r.bias_mc_se)
    full = _records(_scenario(None))
    # Hajek on 70% of the units: its SD grows by about sqrt(1 / 0.7) = 1.195 (two-sample variance, common practice).
    ratio = records["hajek"].sd / full["hajek"].sd
    assert 1.05 < ratio < 1.35


def test_attrition_related_to_treatment_biases_the_unnormalised_estimators_as_derived():
    a1, a0 = 0.4, 0.1
    r1, r0 = 1 - a1, 1 - a0
    rbar = PI * r1 + (1 - PI) * r0
    records = _records(_scenario({"attrition_treated": a1, "attrition_control": a0}))
    hajek = records["hajek"]
    assert abs(hajek.bias) <= 4 * hajek.bias_mc_se  # missingness depends on own treatment only
    mu1, mu0 = A + (B + C) * PI, B * PI
    expected_ht = (r1 * mu1 - r0 * mu0) / rbar
    ht = records["horvitz_thompson"]
    assert abs(ht.mean_estimate - expected_ht) <= 4 * ht.mean_estimate_mc_se, (ht.mean_estimate, expected_ht)
    assert ht.true_effect == pytest.approx(A + C * PI, abs=1e-3)
    expected_spill = (PI * r1 * (B + C) + (1 - PI) * r0 * B) / rbar
    for name in ("centred_ht", "pc_balancing_corrected"):
        r = records[name]
        assert r.true_effect == pytest.approx(B + C * PI, abs=1e-3)
        # Treated units, whose spillover is larger (interaction > 0), drop out more: the estimate falls short.
        assert abs(r.mean_estimate - expected_spill) <= 4 * r.mean_estimate_mc_se, (name, r.mean_estimate, expected_spill)
        assert r.mean_estimate < r.true_effect - 4 * r.mean_estimate_mc_se


def test_attrition_is_read_from_the_scenario_and_refused_where_not_analysed():
    from scenario_text import to_toml

    import designcalc

    base = {
        "population": {"units": [200]},
        "network": {"model": "blocks", "block_shares": [1.0], "block_affinity": [[1.0]], "density": {"mean_degree": 5.0, "reference_units": 200}},
        "outcome": {"baseline": 0.0, "noise_sd": 1.0, "direct_effect": 0.3, "spillover_effect": 0.2},
        "design": {"treatment_probability": [0.5]},
        "estimators": {"direct": ["hajek"], "spillover": ["centred_ht"], "eigenvectors": 0},
        "measurement": {"attrition": 0.2},
    }
    s = designcalc.parse_scenario(to_toml(base), source="a.toml")
    assert (s.measurement.attrition_treated, s.measurement.attrition_control) == (0.2, 0.2)
    assert "20% of outcomes missing at random" in s.measurement.describe()
    both = {**base, "measurement": {"attrition": 0.2, "attrition_treated": 0.3}}
    with pytest.raises(ScenarioError) as caught:
        designcalc.parse_scenario(to_toml(both), source="a.toml")
    assert caught.value.key == "measurement.attrition"
    too_much = {**base, "measurement": {"attrition_control": 1.0}}
    with pytest.raises(ScenarioError) as caught:
        designcalc.parse_scenario(to_toml(too_much), source="a.toml")
    assert caught.value.key == "measurement.attrition_control"
    regression = {**base, "estimators": {"direct": ["hajek"], "spillover": ["exposure_regression"], "eigenvectors": 0}}
    with pytest.raises(ScenarioError) as caught:
        designcalc.parse_scenario(to_toml(regression), source="a.toml")
    assert caught.value.key == "measurement.attrition" and "exposure_regression" in str(caught.value)


def test_a_report_shows_every_test_as_measured_beside_perfect_measurement():
    from dataclasses import replace

    from designcalc.report import ReportSettings, build_report
    from designcalc.report.render import render_markdown
    from designcalc.report.tables import report_tables

    s = _scenario({"attrition_treated": 0.4, "attrition_control": 0.1})
    s = replace(s, estimators=replace(s.estimators, direct=("hajek",), spillover=("centred_ht",)))
    report = build_report(s, ReportSettings(units=(300,), graphs=3, assignments_per_graph=4, precision=0.5, max_units=1200))
    table = {t.id: t for t in report_tables(report)}["measurement"]
    assert len(table.rows) == len(report.power.records) and "40% of treated" in table.caption
    for m in report.measurement:
        # The "as measured" column is the report's own power table; the perfect one a run without [measurement].
        p = report.power.select(estimand=m.estimand, estimator=m.estimator, variance_estimator=m.variance_estimator)[0]
        assert (m.power_measured, m.bias_measured) == (p.power, p.bias)
    assert "As the network and outcomes will be measured" in render_markdown(report, report_tables(report), ())

"""Tests of designcalc.power: the classical no-network reduction, size and coverage, Monte Carlo SEs, Ctrl-C."""

from __future__ import annotations

import numpy as np
import pytest
import scipy as sp
import scipy.stats
from scenario_text import block_model_scenario
from statsmodels.stats.power import NormalIndPower

import designcalc
from designcalc.engine import EngineProgress
from designcalc.power import clustered_mean_se, critical_value

# Bloom (1995), Evaluation Review 19(5):547-556: z_{0.975} + z_{0.80} (CHECKS.md §1).
BLOOM_MULTIPLIER = 2.8016


def _scenario(
    *,
    units: list[int],
    probabilities: list[float],
    direct: float,
    noise_sd: float,
    graphs: int,
    assignments: int,
    mean_degree: float = 1.5,
    block_shares: tuple[float, ...] = (1.0,),
    block_affinity: tuple[tuple[float, ...], ...] = ((1.0,),),
    block_effects: list[float] | None = None,
    seed: int = 3,
) -> designcalc.Scenario:
    """A scenario with no spillover and no interaction on a sparse network (one block unless given), built from TOML text."""
    return block_model_scenario(
        units=units, mean_degree=mean_degree, probabilities=probabilities, graphs=graphs, assignments=assignments, seed=seed,
        block_shares=block_shares, block_affinity=block_affinity,
        outcome={"noise_sd": noise_sd, "direct_effect": direct, "interaction": 0.0, "block_effects": block_effects},
        source="test.toml",
    )


def _hajek_neyman(result: designcalc.PowerResult) -> designcalc.PowerRecord:
    (record,) = result.select(
        estimand="direct", estimator="hajek", variance_estimator="neyman"
    )
    return record


def _t_allowance(
    units: int, probability: float, effect_size: float, alpha: float = 0.05
) -> float:
    """|power of the z-test applied to a t statistic - normal power|.

    The feasible test divides by an estimated SE but uses the normal critical
    value, so its statistic is close to a noncentral t; the smallest arm's
    df = min(n1, n0) - 1 bounds the Welch df from below and so gives the
    largest gap (the classical two-sample comparison, Cohen 1988 ch. 2).
    """
    n1, n0 = probability * units, (1 - probability) * units
    df = min(n1, n0) - 1
    ncp = effect_size / np.sqrt(1 / n1 + 1 / n0)
    z = critical_value(alpha, "two-sided")
    t_power = sp.stats.nct.sf(z, df, ncp) + sp.stats.nct.cdf(-z, df, ncp)
    normal = sp.stats.norm.sf(z - ncp) + sp.stats.norm.cdf(-z - ncp)
    return float(abs(t_power - normal))


# (units, treatment probability, direct effect, noise SD): mid-range power
# 0.5-0.75 by statsmodels, unequal arms in two of three cases.
NO_NETWORK_CASES = [(400, 0.5, 0.25, 1.0), (600, 0.3, 0.2, 1.0), (300, 0.7, 1.0, 4.0)]


@pytest.mark.statistical
@pytest.mark.parametrize(
    ("units", "probability", "direct", "noise_sd"), NO_NETWORK_CASES
)
def test_no_network_power_and_mde_match_statsmodels(
    units: int, probability: float, direct: float, noise_sd: float
) -> None:
    """Without spillover the engine's Hajek/Neyman power and 2.8016 * SD MDE equal the classical two-arm answers."""
    # R = 2000 replicates (100 graphs x 20 assignments). Outcomes do not depend
    # on the graph, so replicates are independent: the power MC SE is about
    # sqrt(p(1 - p)/R) <= 0.011 and the relative SE of an SD estimate of
    # near-normal estimates is 1/sqrt(2(R - 1)) = 1.6%.
    graphs, assignments = 100, 20
    replicates = graphs * assignments
    scenario = _scenario(
        units=[units],
        probabilities=[probability],
        direct=direct,
        noise_sd=noise_sd,
        graphs=graphs,
        assignments=assignments,
    )
    record = _hajek_neyman(designcalc.simulate_power(scenario))
    assert record.replicates == replicates
    assert record.true_effect == pytest.approx(
        direct, abs=1e-12
    )  # no interaction: tau_DIR = tau (METHODS §1.4)

    # Reference: statsmodels NormalIndPower, i.e. the normal-approximation
    # two-arm power of CHECKS.md §1 with nobs1 = pi n, ratio = (1 - pi)/pi.
    nobs1, ratio = probability * units, (1 - probability) / probability
    effect_size = direct / noise_sd
    reference_power = NormalIndPower().power(
        effect_size=effect_size, nobs1=nobs1, ratio=ratio, alpha=0.05
    )
    assert 0.3 < reference_power < 0.9
    # 4 reported MC SEs, plus the normal-vs-t gap (below 0.01 for these n).
    allowance = _t_allowance(units, probability, effect_size)
    assert allowance < 0.01
    assert abs(record.power - reference_power) <= 4 * record.power_mc_se + allowance

    # MDE: Bloom's multiplier times the simulated SD against statsmodels'
    # solved effect size times sigma (CHECKS.md §1, Duflo, Glennerster &
    # Kremer toolkit). The SD has relative MC error 1/sqrt(2(R - 1)); allow 4.
    # Bernoulli arm sizes add a relative O((1 - pi)/(pi n)) < 0.2% to the variance.
    reference_mde = (
        NormalIndPower().solve_power(
            effect_size=None, nobs1=nobs1, ratio=ratio, alpha=0.05, power=0.8
        )
        * noise_sd
    )
    simulated_mde = BLOOM_MULTIPLIER * record.sd
    assert simulated_mde == pytest.approx(
        reference_mde, rel=4 / np.sqrt(2 * (replicates - 1))
    )


@pytest.mark.statistical
def test_hajek_neyman_size_and_coverage_are_nominal() -> None:
    """Under the null the Hajek/Neyman Wald test rejects 3-7% of the time and its 95% CI covers about 95%."""
    # R = 4000 replicates (160 graphs x 25). A two-block model whose blocks
    # differ in mean outcome makes outcomes depend on the graph; with no
    # spillover the Neyman variance is still the right one (METHODS §4.1).
    graphs, assignments = 160, 25
    replicates = graphs * assignments
    scenario = _scenario(
        units=[400],
        probabilities=[0.3],
        direct=0.3,
        noise_sd=1.0,
        graphs=graphs,
        assignments=assignments,
        mean_degree=4.0,
        block_shares=(0.5, 0.5),
        block_affinity=((5.0, 1.0), (1.0, 5.0)),
        block_effects=[0.0, 1.0],
        seed=11,
    )
    record = _hajek_neyman(designcalc.simulate_power(scenario))
    assert record.replicates == replicates
    # Binomial SE at 0.05 is sqrt(0.05 * 0.95 / 4000) = 0.0034, so [0.03, 0.07]
    # is about 6 SE either side (CHECKS.md §3, Morris, White & Crowther 2019).
    assert 0.03 <= record.size <= 0.07
    # Tighter: within 4 reported MC SEs of alpha, plus the z-vs-t excess size
    # P(|t_df| > 1.96) - 0.05 with df = min arm - 1 = 119.
    excess = 2 * sp.stats.t.sf(critical_value(0.05, "two-sided"), 0.3 * 400 - 1) - 0.05
    assert abs(record.size - 0.05) <= 4 * record.size_mc_se + excess
    # Coverage of the per-graph direct effect: SE of a rate near 0.95 is
    # 0.0034; the reported clustered SE is used with 4 SE (+ the same t excess).
    assert abs(record.coverage - 0.95) <= 4 * record.coverage_mc_se + excess
    assert not any(flag.startswith("size") for flag in record.flags)


def test_clustered_mean_se_equals_hand_computation() -> None:
    """clustered_mean_se is the mean of the finite entries and the CR1 cluster-robust SE of that mean."""
    values = np.array(
        [
            [1.0, 2.0, np.nan, 4.0],
            [0.5, np.nan, np.nan, 1.5],
            [3.0, 3.0, 2.0, 1.0],
        ]
    )
    finite = [[1.0, 2.0, 4.0], [0.5, 1.5], [3.0, 3.0, 2.0, 1.0]]
    count = sum(len(row) for row in finite)
    mean = sum(sum(row) for row in finite) / count
    # Var(mean) = g/(g-1) * sum_g (sum_b (x_gb - mean))^2 / R^2 (cluster-robust
    # variance of a mean with the usual small-sample factor; Morris, White &
    # Crowther 2019 for MC SEs in general).
    cluster_sums = [sum(x - mean for x in row) for row in finite]
    variance = 3 / 2 * sum(s * s for s in cluster_sums) / count**2
    got_mean, got_se = clustered_mean_se(values)
    assert got_mean == pytest.approx(mean, rel=1e-14)
    assert got_se == pytest.approx(np.sqrt(variance), rel=1e-12)


def test_clustered_mean_se_edge_cases() -> None:
    """A single graph gives a NaN SE; no finite entry gives NaN mean and SE."""
    mean, se = clustered_mean_se(np.array([[1.0, 0.0, 1.0]]))
    assert mean == pytest.approx(2 / 3) and np.isnan(se)
    mean, se = clustered_mean_se(np.full((3, 2), np.nan))
    assert np.isnan(mean) and np.isnan(se)


def test_clustered_se_of_independent_rates_is_binomial() -> None:
    """With one assignment per graph the clustered SE of a rate is the binomial SE sqrt(p(1-p)/R)."""
    # CHECKS.md §3 (Morris, White & Crowther 2019): p = .8, R = 1000 -> 0.012649.
    # With clusters of one, the CR1 variance is p(1 - p)/(R - 1) exactly, i.e.
    # the binomial value times R/(R - 1): relative gap 1/(2R) = 0.05%.
    rejections = np.zeros((1000, 1))
    rejections[:800] = 1.0
    mean, se = clustered_mean_se(rejections)
    assert mean == 0.8
    assert se == pytest.approx(np.sqrt(0.8 * 0.2 / 999), rel=1e-12)
    assert se == pytest.approx(0.012649, rel=1 / 2000 + 1e-4)
    # Random rates at other p: the same identity, row order irrelevant.
    rng = np.random.default_rng(20261202)
    for p, replicates in ((0.05, 4000), (0.5, 500)):
        draws = (rng.random((replicates, 1)) < p).astype(float)
        phat, se = clustered_mean_se(draws)
        assert se == pytest.approx(
            np.sqrt(phat * (1 - phat) / replicates), rel=1 / replicates
        )
        assert clustered_mean_se(draws[::-1])[1] == pytest.approx(se, rel=1e-12)


def test_clustered_se_accounts_for_within_graph_correlation() -> None:
    """Identical replicates within a graph give the SE of the graph means, not of R independent draws."""
    graph_means = np.array([0.0, 1.0, 0.0, 1.0, 1.0])
    values = np.repeat(graph_means[:, None], 10, axis=1)
    _, clustered = clustered_mean_se(values)
    # Five independent clusters: SE = sd(graph means)/sqrt(5) (ddof=1 via g/(g-1)).
    assert clustered == pytest.approx(graph_means.std(ddof=1) / np.sqrt(5), rel=1e-12)
    naive = np.sqrt(0.6 * 0.4 / values.size)
    assert clustered > 2 * naive


def _two_point_scenario() -> designcalc.Scenario:
    return _scenario(
        units=[100],
        probabilities=[0.3, 0.5],
        direct=0.5,
        noise_sd=1.0,
        graphs=3,
        assignments=4,
    )


@pytest.mark.parametrize("stop_after", [3, 4])
def test_interrupt_from_progress_keeps_finished_points(stop_after: int) -> None:
    """Ctrl-C raised in the progress callback after the first point's graphs keeps that point only, marked partial."""
    # Point 1 (pi = 0.3) has graphs 1-3; stopping at the report of graph 3
    # (its last) or graph 4 (the first of pi = 0.5) must keep point 1 whole.
    scenario = _two_point_scenario()
    seen: list[EngineProgress] = []

    def progress(update: EngineProgress) -> None:
        seen.append(update)
        if update.finished_graphs == stop_after:
            raise KeyboardInterrupt

    result = designcalc.simulate_power(scenario, progress=progress)
    assert result.partial is True
    assert [u.finished_graphs for u in seen] == list(range(1, stop_after + 1))
    assert all(u.total_graphs == 6 for u in seen)
    assert result.records
    assert {r.treatment_probability for r in result.records} == {0.3}
    full = designcalc.simulate_power(scenario)
    assert full.partial is False
    assert [r.to_dict() for r in result.records] == [
        r.to_dict() for r in full.select(treatment_probability=0.3)
    ]


def test_interrupt_before_any_point_finishes_gives_no_records() -> None:
    """Ctrl-C during the first point leaves no records and a partial result."""

    def progress(update: EngineProgress) -> None:
        raise KeyboardInterrupt

    result = designcalc.simulate_power(_two_point_scenario(), progress=progress)
    assert result.partial is True
    assert result.records == ()

"""Coverage of the MDE's Monte Carlo interval against an MDE computed outside the engine.

With no spillover and outcomes unrelated to the graph, the direct effect is
the classical two-arm problem under Bernoulli(P) assignment.  The true MDE of
the feasible test (difference in means, unpooled Neyman SE, t(N - 2)
critical value) is found here by a plain numpy simulation of that statistic
(an exact calculation up to its own small MC error) and root finding in the
effect.  Repeating ``minimum_detectable_effects`` over independent seeds,
its reported 95% interval must cover that truth about 95% of the time
(Morris, White & Crowther 2019, Stat. Med. 38:2074-2102, on judging
simulation intervals by coverage).
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.optimize
import scipy.stats

import designcalc

N_UNITS, PROBABILITY = 400, 0.5


def _true_mde(n: int, p: float, *, replicates: int = 100_000, seed: int = 12345) -> float:
    """Effect at which the Welch-type Wald test with t(n - 2) quantiles has power 0.8 (two-sided 0.05)."""
    rng = np.random.default_rng(seed)
    critical = scipy.stats.t.ppf(0.975, n - 2)
    diffs, ses = [], []
    for _ in range(replicates // 20_000):
        W = rng.random((20_000, n)) < p
        e = rng.standard_normal((20_000, n))
        n1 = W.sum(1)
        n0 = n - n1
        m1 = (e * W).sum(1) / n1
        m0 = (e * ~W).sum(1) / n0
        v1 = (((e - m1[:, None]) * W) ** 2).sum(1) / (n1 - 1) / n1
        v0 = (((e - m0[:, None]) * ~W) ** 2).sum(1) / (n0 - 1) / n0
        diffs.append(m1 - m0)
        ses.append(np.sqrt(v1 + v0))
    d, s = np.concatenate(diffs), np.concatenate(ses)
    return float(scipy.optimize.brentq(lambda tau: np.mean(np.abs(tau + d) > critical * s) - 0.8, 0.01, 2.0, xtol=1e-7))


def _scenario(seed: int) -> designcalc.Scenario:
    return designcalc.parse_scenario(
        f"""
[population]
units = [{N_UNITS}]
[network]
model = "blocks"
block_shares = [1.0]
block_affinity = [[1.0]]
[network.density]
mean_degree = 1.5
reference_units = {N_UNITS}
[outcome]
kind = "continuous"
baseline = 0.0
noise_sd = 1.0
direct_effect = 0.3
spillover_effect = 0.0
[design]
treatment_probability = [{PROBABILITY}]
[estimators]
direct = ["hajek"]
direct_variance = ["neyman"]
spillover = ["centred_ht"]
eigenvectors = 0
[simulation]
graphs = 20
assignments_per_graph = 25
seed = {seed}
relative_precision = 0.03
""",
        source="coverage.toml",
    )


@pytest.mark.statistical
def test_mde_interval_covers_the_true_mde_at_the_nominal_rate() -> None:
    truth = _true_mde(N_UNITS, PROBABILITY)
    # DGK toolkit formula (CHECKS.md §1) with normal quantiles: 2.8016 * 2 / sqrt(400) = 0.28016;
    # t quantiles and Bernoulli arm sizes put the truth a little above it.
    assert 0.2802 < truth < 0.2830
    seeds = 60
    covered, z = [], []
    for seed in range(1, seeds + 1):
        record = designcalc.minimum_detectable_effects(_scenario(seed)).select(estimand="direct")[0]
        half = 0.5 * (record.mde_high - record.mde_low)
        covered.append(record.mde_low <= truth <= record.mde_high)
        z.append((record.mde - truth) / (half / 1.96))
    coverage = float(np.mean(covered))
    # 60 independent seeds: binomial se sqrt(0.95 * 0.05 / 60) = 0.028; allow 3 se below 0.95.
    assert coverage >= 0.95 - 3 * 0.028
    # The standardised errors should centre on 0 (se of their mean 1/sqrt(60) = 0.13; allow 4).
    assert abs(float(np.mean(z))) < 4 / np.sqrt(seeds)

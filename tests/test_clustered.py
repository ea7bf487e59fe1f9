"""Clustered populations and two-stage designs, checked against outside references.

References: exact enumeration (the hypergeometric exposure of complete
randomization; unbiasedness), the design effect 1 + (m - 1) rho of Kish
(1965) and Donner & Klar (2000) with CHECKS.md §2's worked values, the
closed-form saturation-design variances of METHODS.md §5.2 (implemented in
``designcalc.cluster_formulas``, itself checked against CHECKS.md and an
independent simulation in test_cluster_formulas.py) and the square-root rule
of §5.3.  Every simulated quantity is compared within 4 Monte Carlo SEs
(CHECKS.md §3); each tolerance's derivation is beside it.
"""

from __future__ import annotations

import itertools
import math
from pathlib import Path

import numpy as np
import pytest
import scipy.stats
from scenario_text import to_toml

import designcalc
from designcalc import cluster_formulas, engine, saturation
from designcalc.clusters import ClusterSizes, sample_clustered_network
from designcalc.density import DensityRule
from designcalc.edge_models import BlockModel
from designcalc.outcomes import OutcomeModel
from designcalc.power import simulate_power
from designcalc.sample_size import required_sample_size

# Unit-level randomness in these designs is independent across replicates when outcomes ignore the graph and
# types (no spillover, no type effect): every replicate redraws allocation, assignment, noise and cluster effects.
# The sample variance s^2 of R such normal estimates then has se s^2 sqrt(2 / (R - 1)) (normal theory).


def _variance_tolerance(variance: float, replicates: int) -> float:
    return 4.0 * variance * math.sqrt(2.0 / (replicates - 1))


def clustered_scenario(
    *,
    clusters: list[int],
    cluster_size: object,
    design: dict,
    outcome: dict | None = None,
    mean_degree: float = 3.0,
    graphs: int = 20,
    assignments: int = 25,
    seed: int = 11,
    estimators: dict | None = None,
    growth: float = 0.0,
    reference_units: int = 20,
) -> designcalc.Scenario:
    data = {
        "population": {"clusters": clusters, "cluster_size": cluster_size},
        "network": {
            "model": "blocks", "block_shares": [1.0], "block_affinity": [[1.0]],
            "density": {"mean_degree": mean_degree, "reference_units": reference_units, "growth_exponent": growth},
        },
        "outcome": {
            k: v for k, v in {"kind": "continuous", "baseline": 0.0, "noise_sd": 1.0, "direct_effect": 0.5, "spillover_effect": 0.0, **(outcome or {})}.items()
            if v is not None  # None: leave the key out
        },
        "design": design,
        "simulation": {"graphs": graphs, "assignments_per_graph": assignments, "seed": seed},
    }
    if estimators:
        data["estimators"] = estimators
    return designcalc.parse_scenario(to_toml(data), source="clustered.toml")


def _estimates(scenario: designcalc.Scenario, point: engine.DesignPoint, key: tuple[str, str, str]) -> np.ndarray:
    draws = engine.simulate_design_point(scenario, point)
    return np.concatenate([d.estimates[key] for d in draws])


# ---------------------------------------------------------------------------
# The population and the assignment
# ---------------------------------------------------------------------------
def test_union_has_no_ties_between_clusters_sizes_in_range_and_nested_prefixes():
    model = BlockModel((0.5, 0.5), ((3.0, 1.0), (1.0, 3.0)))
    rule = DensityRule(mean_degree=5.0, reference_units=30)
    sizes = ClusterSizes("normal", mean=30, sd=8, low=20, high=45)
    big = sample_clustered_network(model, rule, sizes, 12, entropy=5, graph_index=2)
    small = sample_clustered_network(model, rule, sizes, 6, entropy=5, graph_index=2)
    cluster_of = np.repeat(np.arange(12), big.cluster_sizes)
    rows, cols = big.adjacency.nonzero()
    assert len(rows) > 0 and np.array_equal(cluster_of[rows], cluster_of[cols])  # partial interference: no cross ties
    assert big.cluster_sizes.min() >= 20 and big.cluster_sizes.max() <= 45
    assert len(set(big.cluster_sizes.tolist())) > 1
    # The number of clusters is not in the stream key: the first 6 clusters of 12 are the 6 of a 6-cluster population.
    n6 = int(small.cluster_sizes.sum())
    assert np.array_equal(big.cluster_sizes[:6], small.cluster_sizes)
    assert (big.adjacency[:n6, :n6] != small.adjacency).nnz == 0
    assert np.array_equal(big.types[:n6], small.types)
    assert big.adjacency.has_sorted_indices and (big.adjacency != big.adjacency.T).nnz == 0


def test_each_cluster_follows_the_density_rule_at_its_own_size():
    # One block: every cluster of m units is G(m, p) with p = d(m) / (m - 1), d(m) = 4 (m / 20)^1 (growth 1).
    # E[edges] = C(m, 2) p and Var = C(m, 2) p (1 - p) (Erdos-Renyi / Gilbert; CHECKS.md §4), so the mean degree
    # 2 E / m of K clusters has mean d(m) and se 2 sqrt(K C(m,2) p (1-p)) / (K m); compared within 4 se.
    model = BlockModel((1.0,), ((1.0,),))
    rule = DensityRule(mean_degree=4.0, reference_units=20, growth_exponent=1.0)
    for m in (20, 60):
        net = sample_clustered_network(model, rule, ClusterSizes("fixed", size=m), 200, entropy=9, graph_index=0)
        p = rule.target_mean_degree(m) / (m - 1)
        pairs = m * (m - 1) / 2
        edges = net.adjacency.nnz / 2
        mean_degree = 2 * edges / (200 * m)
        se = 2 * math.sqrt(200 * pairs * p * (1 - p)) / (200 * m)
        assert abs(mean_degree - rule.target_mean_degree(m)) <= 4 * se


def test_complete_randomization_treats_exactly_k_and_allocates_clusters_uniformly():
    design = saturation.SaturationDesign(0.25, (0.3, 0.7), (0.5, 0.25))
    sizes = np.array([7, 10, 13, 9, 8, 12, 11, 10])
    B = 4000
    W, arms = saturation.assign(design, sizes, B, np.random.default_rng(3))
    counts = saturation.arm_counts(design, len(sizes))
    assert counts.tolist() == [2, 4, 2]
    starts = np.concatenate([[0], np.cumsum(sizes)[:-1]])
    treated = np.add.reduceat(W.astype(int), starts, axis=0)
    p_of_arm = np.array([0.0, 0.3, 0.7])
    expected = np.floor(p_of_arm[arms] * sizes[:, None] + 0.5)
    assert np.array_equal(treated, expected)  # exactly k_c = floor(p m_c + 1/2) in every cluster and column
    for b in range(5):
        assert np.bincount(arms[:, b], minlength=3).tolist() == counts.tolist()
    # Each cluster is in arm j with probability counts_j / C; over B columns the share's se is sqrt(q (1 - q) / B).
    for j, c in enumerate(counts):
        q = c / len(sizes)
        share = (arms == j).mean(axis=1)
        assert np.all(np.abs(share - q) <= 4 * math.sqrt(q * (1 - q) / B))
    # Within a cluster every unit is equally likely treated: rate k / m in the arm (exchangeability).
    first = slice(0, 7)
    in_arm1 = arms[0] == 1
    rate = W[first][:, in_arm1].mean(axis=1)
    k = math.floor(0.3 * 7 + 0.5)
    assert np.all(np.abs(rate - k / 7) <= 4 * math.sqrt((k / 7) * (1 - k / 7) / in_arm1.sum()))


@pytest.mark.parametrize("within", ["complete", "bernoulli"])
def test_unit_expectations_equal_exact_enumeration(within):
    """E[f(w, X_i) | W_i = w] at saturation p, against enumerating every within-cluster assignment (exact)."""
    rng = np.random.default_rng(4)
    m, p = 7, 3 / 7
    A = np.triu(rng.random((m, m)) < 0.5, 1)
    A = (A | A.T).astype(int)
    A[0, :] = A[:, 0] = 0  # one isolate (exposure 0 by convention)
    degrees = A.sum(axis=1)
    theta = rng.normal(size=m)
    model = OutcomeModel(kind="binary", baseline=-0.3, link="logistic", direct_effect=0.8, spillover_effect=1.1,
                         spillover_shape="saturating", saturation_rate=2.5, interaction=-0.4)
    design = saturation.SaturationDesign(0.5, (p,), (0.5,), within=within)
    k = math.floor(p * m + 0.5)
    sums = np.zeros((2, m))
    weights = np.zeros((2, m))
    assignments = (
        [np.isin(np.arange(m), c).astype(float) for c in itertools.combinations(range(m), k)]
        if within == "complete" else [np.array(w, dtype=float) for w in itertools.product([0, 1], repeat=m)]
    )
    for w in assignments:
        prob = 1.0 if within == "complete" else float(np.prod(np.where(w == 1, p, 1 - p)))
        x = np.where(degrees > 0, A @ w / np.maximum(degrees, 1), 0.0)
        f = model.mean_outcome(theta, w, x)
        for t in (0, 1):
            mask = w == t
            sums[t, mask] += prob * f[mask]
            weights[t, mask] += prob
    for t in (0, 1):
        exact = sums[t] / weights[t]
        ours = saturation._unit_means(model, design, degrees, theta, np.array([m]), p, bool(t))
        np.testing.assert_allclose(ours, exact, rtol=0, atol=1e-12)


# ---------------------------------------------------------------------------
# Estimators: unbiased, and their variances against the closed forms
# ---------------------------------------------------------------------------
def test_every_contrast_is_unbiased_for_its_exact_truth_with_equal_clusters():
    # With equal cluster sizes and complete randomization every cell's count is fixed, so each contrast (a
    # difference of cell means, or an OLS slope over a fixed multiset of saturations) is exactly unbiased for the
    # truth computed by enumeration-checked expectations; bias is compared with 4 graph-clustered MC SEs.
    s = clustered_scenario(
        clusters=[30], cluster_size=20, mean_degree=5.0,
        design={"assignment": "saturation", "pure_control_share": 0.3, "saturations": [0.25, 0.5, 0.8]},
        outcome={"spillover_effect": 0.8, "spillover_shape": "saturating", "interaction": -0.3, "type_effect": "u - 0.5", "cluster_icc": 0.1},
        estimators={"contrasts": ["itt", "snt", "tce", "direct", "pooled", "slope"]}, graphs=30, assignments=40,
    )
    result = simulate_power(s)
    assert len(result.records) == 3 * 4 + 4
    for r in result.records:
        assert abs(r.bias) <= 4 * r.bias_mc_se, (r.estimator, r.bias, r.bias_mc_se)
        assert r.true_effect != 0
    spill = result.select(estimator="snt@0.8")[0]
    assert spill.estimand == "spillover" and spill.true_effect > result.select(estimator="snt@0.25")[0].true_effect > 0


def test_cluster_randomized_variance_is_the_design_effect_variance():
    # CHECKS.md §2: k = 30 clusters per arm of m = 20 with rho = .05 and sigma = 1 give Var(difference of arm means)
    # = 2 sigma^2 DE / (k m) = 0.0065 (Kish 1965; Donner & Klar 2000). The scenario's ICC is stated against the
    # within-cluster variance: noise_sd^2 = 1 - rho makes the total variance 1.  No spillover, no types: replicates
    # are independent, so the sample variance's tolerance is 4 x its normal-theory se (module note).
    s = clustered_scenario(
        clusters=[60], cluster_size=20, design={"assignment": "cluster", "treated_cluster_share": 0.5},
        outcome={"noise_sd": math.sqrt(0.95), "cluster_icc": 0.05}, graphs=20, assignments=100,
    )
    point = engine.design_points(s)[0]
    est = _estimates(s, point, ("total", "itt@1", "cluster_robust"))
    expected = cluster_formulas.cluster_trial_variance(30, 20, 0.05)
    assert expected == pytest.approx(0.0065)
    assert abs(est.var(ddof=1) - expected) <= _variance_tolerance(expected, est.size)
    # Without clustering the variance would be 2 / 600 = 0.00333: the simulation tells the two apart by far.
    assert est.var(ddof=1) - 2 / 600 > 3 * _variance_tolerance(expected, est.size)
    # The feasible test (CR1 SE, t with 60 - 2 df) holds its size: rejection rate under the null within 4 binomial se.
    record = simulate_power(s).select(estimator="itt@1")[0]
    assert record.reference_distribution == "t(58)"
    assert abs(record.size - 0.05) <= 4 * math.sqrt(0.05 * 0.95 / record.replicates)


def test_size_in_clusters_gives_the_checks_worked_value():
    # CHECKS.md §2: d = 0.5, m = 20, rho = .05 need n_individual DE / m = 62.79 x 1.95 / 20 = 6.12 -> 7 clusters per arm
    # (Donner & Klar 2000, formula form from memory); the size search reports this closed form beside its simulation.
    s = clustered_scenario(
        clusters=[20], cluster_size=20, design={"assignment": "cluster", "treated_cluster_share": 0.5},
        outcome={"noise_sd": math.sqrt(0.95), "cluster_icc": 0.05}, graphs=16, assignments=50,
    )
    result = required_sample_size(s, relative_precision=0.2)
    record = result.records[0]
    assert record.size_axis == "clusters" and record.estimator == "itt@1"
    per_arm = record.closed_form / 2
    assert per_arm == pytest.approx(6.12, abs=0.01)
    assert math.ceil(per_arm) == 7
    # The simulated test (t reference, an estimated SE) has less power at any C than the known-variance normal test of
    # the closed form, so it needs at least as many clusters: the closed form lies below the 95% MC interval's top.
    assert record.status == "reached" and record.units_high >= record.closed_form


@pytest.mark.parametrize(
    "C, m, psi, saturations, icc, checked",
    [
        # METHODS.md §5.2's own sim-check design.
        (120, 30, 0.3, [0.25, 0.5, 0.75], 0.1, ["itt_pooled", "snt_pooled", "itt@0.5", "snt@0.5", "tce@0.5", "dir@0.5"]),
        # A second design: two saturations, a larger ICC, the slope.
        (60, 20, 0.4, [0.3, 0.8], 0.2, ["itt@0.3", "snt@0.3", "tce@0.8", "itt_pooled", "snt_slope"]),
    ],
)
def test_saturation_design_variances_match_the_closed_forms(C, m, psi, saturations, icc, checked):
    # Total variance 1 (noise_sd^2 = 1 - rho, no types), no spillover: the closed forms of METHODS.md §5.2 hold
    # exactly when arm counts and treated counts are whole; the formulas take the realised saturations k / m.
    s = clustered_scenario(
        clusters=[C], cluster_size=m, mean_degree=2.0, reference_units=m,
        design={"assignment": "saturation", "pure_control_share": psi, "saturations": saturations},
        outcome={"noise_sd": math.sqrt(1 - icc), "cluster_icc": icc},
        estimators={"contrasts": ["itt", "snt", "tce", "direct", "pooled", "slope"]}, graphs=40, assignments=50,
    )
    design = s.design.saturation
    counts = saturation.arm_counts(design, C)
    shares = [c / C for c in counts[1:]]
    assert counts[0] == round(psi * C) and all(abs(c - f * C) < 1e-9 for c, f in zip(counts[1:], design.shares))
    realised = [math.floor(p * m + 0.5) / m for p in saturations]
    formulas = cluster_formulas.saturation_variances(C, m, icc, psi, realised, shares)
    draws = engine.simulate_design_point(s, engine.design_points(s)[0])
    for name in checked:
        est = np.concatenate([d.estimates[(saturation.contrast_family(name), name, "cluster_robust")] for d in draws])
        if name.endswith("_slope"):
            expected = formulas.snt_slope_exact
        elif "@" in name:
            kind, p = name.split("@")
            expected = getattr(formulas, kind)[saturations.index(float(p))]
        else:
            expected = getattr(formulas, name)
        assert abs(est.var(ddof=1) - expected) <= _variance_tolerance(expected, est.size), (name, est.var(ddof=1), expected)


def test_square_root_rule_pure_control_share_minimises_the_simulated_variance():
    # METHODS.md §5.3: Var ITT(p) is proportional to a / f + b / psi with f = 1 - psi, a = rho + (1 - rho)/(m p),
    # b = rho + (1 - rho)/m, minimised at psi* = sqrt(b) / (sqrt(a) + sqrt(b)). At m = 20, p = 1/2, rho = .1:
    # psi* = 0.466. The engine's ITT variance at psi = 0.2, 0.46, 0.76 (whole counts of 50 clusters) matches the
    # closed form at each within 4 MC se, and is smallest at the square-root share.
    m, icc, p, C = 20, 0.1, 0.5, 50
    best = cluster_formulas.optimal_pure_control_share_itt(m, icc, p)
    a, b = icc + (1 - icc) / (m * p), icc + (1 - icc) / m
    assert best == pytest.approx(math.sqrt(b) / (math.sqrt(a) + math.sqrt(b)))
    assert best == pytest.approx(0.466, abs=0.001)
    variances = {}
    for psi in (0.2, 0.46, 0.76):
        s = clustered_scenario(
            clusters=[C], cluster_size=m, mean_degree=2.0,
            design={"assignment": "saturation", "pure_control_share": psi, "saturations": [p]},
            outcome={"noise_sd": math.sqrt(1 - icc), "cluster_icc": icc}, estimators={"contrasts": ["itt"]}, graphs=40, assignments=50,
        )
        est = _estimates(s, engine.design_points(s)[0], ("total", "itt@0.5", "cluster_robust"))
        expected = (a / (1 - psi) + b / psi) / C
        assert abs(est.var(ddof=1) - expected) <= _variance_tolerance(expected, est.size), (psi, est.var(ddof=1), expected)
        variances[psi] = est.var(ddof=1)
    assert min(variances, key=variances.get) == 0.46


# ---------------------------------------------------------------------------
# Bernoulli within clusters: the network estimators on the union
# ---------------------------------------------------------------------------
def test_bernoulli_within_clusters_runs_the_network_estimators_unbiased():
    # Bernoulli(pi) within every cluster is Bernoulli(pi) on the union of the clusters' networks (no cross ties),
    # so the Hajek direct and centred HT spillover estimators keep their properties (HT exactly unbiased:
    # Horvitz & Thompson 1952); bias within 4 graph-clustered MC SEs.
    s = clustered_scenario(
        clusters=[25], cluster_size={"low": 20, "high": 40}, mean_degree=4.0,
        design={"treatment_probability": [0.4]}, outcome={"spillover_effect": 0.6, "cluster_icc": 0.1},
        estimators={"direct": ["hajek"], "direct_variance": ["neyman"], "spillover": ["centred_ht"], "eigenvectors": 0}, graphs=30, assignments=30,
    )
    result = simulate_power(s)
    for r in result.records:
        assert r.clusters == 25
        assert abs(r.bias) <= 4 * r.bias_mc_se, (r.estimator, r.bias, r.bias_mc_se)


# ---------------------------------------------------------------------------
# Reproducibility, the store and the solvers on clustered designs
# ---------------------------------------------------------------------------
def _tarn() -> designcalc.Scenario:
    return designcalc.load_scenario(Path(__file__).parents[1] / "scenarios" / "tarn_hollow_water.toml")


def test_clustered_power_is_identical_on_one_and_two_workers_and_from_the_store(tmp_path):
    from designcalc.store import ResultStore

    s = _tarn()
    one = simulate_power(s, clusters=[20], graphs=4, assignments_per_graph=5)
    two = simulate_power(s, clusters=[20], graphs=4, assignments_per_graph=5, workers=2)
    assert one.to_dict()["results"] == two.to_dict()["results"]
    with ResultStore(tmp_path / "r.sqlite") as store:
        first = simulate_power(s, clusters=[20], graphs=4, assignments_per_graph=5, store=store)
        again = simulate_power(s, clusters=[20], graphs=4, assignments_per_graph=5, store=store)
    assert first.to_dict()["results"] == one.to_dict()["results"] == again.to_dict()["results"]
    # Another number of clusters with the same nominal units is another point in the store, never a stored one.
    other = simulate_power(s, clusters=[21], graphs=4, assignments_per_graph=5)
    assert other.records[0].clusters == 21


def test_mde_of_a_binary_saturation_design_finds_the_effect_by_exact_truths():
    # A logistic outcome is not linear in its effects, so the effect simulated at the formula MDE is found by root
    # finding on the exact contrast truths (saturation.contrast_truths of the rescaled model on every graph): the
    # verified effect must equal the formula MDE it aimed at (brentq to 1e-10; the MDE's graphs may grow between).
    s = clustered_scenario(
        clusters=[24], cluster_size=20, mean_degree=4.0,
        design={"assignment": "saturation", "pure_control_share": 0.34, "saturations": [0.5]},
        outcome={"kind": "binary", "baseline": -0.8, "link": "logistic", "noise_sd": None, "direct_effect": 0.1, "spillover_effect": 0.1},
        estimators={"contrasts": ["itt", "snt"]}, graphs=6, assignments=10,
    )
    from designcalc.mde import minimum_detectable_effects

    r = minimum_detectable_effects(s, verify=True)
    assert {rec.estimator for rec in r.records} == {"itt@0.5", "snt@0.5"}
    for rec in r.records:
        assert rec.clusters == 24 and rec.reference_distribution.startswith("t(")
        assert rec.method == "formula, verified by simulation", rec.method
        assert rec.verified_effect == pytest.approx(rec.formula_mde, rel=1e-3)
        assert 0 < rec.mde_low <= rec.mde <= rec.mde_high < 1


def test_contrast_degrees_of_freedom_are_welch_satterthwaite_at_the_design():
    # An arm against pure control: the Welch-Satterthwaite df of the two cluster-robust variance parts at their
    # expected sizes V_a = (rho + (1 - rho) / (m s_a)) / G_a (Satterthwaite 1946). Checked against scipy's Welch
    # t test, whose df for samples of sizes G_a with sample variances G_a V_a is the same expression.
    design = saturation.SaturationDesign(0.3, (0.25, 0.5, 0.75), (0.25, 0.25, 0.2))
    counts = saturation.arm_counts(design, 40)
    assert counts.tolist() == [12, 10, 10, 8]
    icc, m = 0.08, 40.0
    rng = np.random.default_rng(0)

    def sample(size: int, variance: float) -> np.ndarray:
        x = rng.standard_normal(size)
        return (x - x.mean()) / x.std(ddof=1) * math.sqrt(variance)

    for name, G, share in (("itt@0.5", 10, 0.5), ("snt@0.75", 8, 0.25), ("tce@0.25", 10, 1.0)):
        V = (icc + (1 - icc) / (m * share)) / G
        V0 = (icc + (1 - icc) / m) / 12
        welch = scipy.stats.ttest_ind(sample(G, G * V), sample(12, 12 * V0), equal_var=False).df
        assert saturation.contrast_df(design, 40, name, icc, m) == pytest.approx(welch, rel=1e-9)
        assert min(G, 12) - 1 <= saturation.contrast_df(design, 40, name, icc, m) <= G + 12 - 2
    # Two equal arms of k clusters: Welch's df is the pooled 2k - 2 (Donner & Klar 2000's df for a cluster trial).
    trial = saturation.SaturationDesign(0.5, (1.0,), (0.5,))
    assert saturation.contrast_df(trial, 40, "itt@1", 0.05, 20) == pytest.approx(38)
    assert saturation.contrast_df(design, 40, "dir@0.75") == 8 - 1
    assert saturation.contrast_df(design, 40, "snt_slope") == 28 - 2


def test_arm_counts_never_shrink_as_clusters_are_added_and_meet_whole_quotas():
    # Webster's divisor method is house-monotone (Balinski & Young, Fair Representation, 1982): unlike largest-
    # remainder rounding (which gave [3, 1, 5, 51] at 60 clusters after [3, 2, 4, 49]-like counts at 58 for shares
    # 0.05/0.025/0.075/0.85), adding a cluster never takes one from an arm. Whole quotas are met exactly.
    design = saturation.SaturationDesign(0.05, (0.2, 0.5, 0.9), (0.025, 0.075, 0.85))
    previous = saturation.arm_counts(design, 1)
    for C in range(2, 200):
        counts = saturation.arm_counts(design, C)
        assert counts.sum() == C and np.all(counts >= previous)
        assert np.all(np.abs(counts - C * np.array([0.05, 0.025, 0.075, 0.85])) < 1.0 + 1e-9)  # within one of the quota
        previous = counts
    assert saturation.arm_counts(saturation.SaturationDesign(0.3, (0.25, 0.5, 0.75), (0.7 / 3,) * 3), 120).tolist() == [36, 28, 28, 28]


def test_unbalanced_arms_keep_the_size_of_the_cluster_robust_tests():
    # 20 clusters in arms of 8 (pure control), 4 and 8: with one small-sample factor for the pooled G the SE of a
    # 4-cluster arm's contrast was too small (size 0.075-0.22 in a review's simulation). Per-group factors and the
    # Satterthwaite df hold the nominal 0.05: rejection rate under the null within 4 binomial se of 0.05.
    s = clustered_scenario(
        clusters=[20], cluster_size=20, mean_degree=3.0,
        design={"assignment": "saturation", "pure_control_share": 0.4, "saturations": [0.25, 0.75], "saturation_shares": [0.2, 0.4]},
        outcome={"noise_sd": math.sqrt(0.9), "cluster_icc": 0.1, "spillover_effect": 0.5},
        estimators={"contrasts": ["itt", "snt", "tce", "direct", "pooled"]}, graphs=40, assignments=100,
    )
    assert saturation.arm_counts(s.design.saturation, 20).tolist() == [8, 4, 8]
    result = simulate_power(s)
    for r in result.records:
        assert abs(r.size - 0.05) <= 4 * math.sqrt(0.05 * 0.95 / r.replicates), (r.estimator, r.size)


def test_the_within_saturation_direct_contrast_is_null_only_with_every_effect_zero():
    # Complete randomization: a treated unit's neighbours are treated at rate (k - 1)/(m - 1), an untreated one's at
    # k/(m - 1), so with a spillover and no direct effect the contrast is -spillover x E[gap] != 0 (exact, by the
    # enumeration-checked truths); the engine's null for it zeroes every effect, where it is exactly 0.
    s = clustered_scenario(
        clusters=[12], cluster_size=10, mean_degree=6.0, reference_units=10,
        design={"assignment": "saturation", "pure_control_share": 0.34, "saturations": [0.5]},
        outcome={"direct_effect": 0.0, "spillover_effect": 1.0}, estimators={"contrasts": ["direct"]},
    )
    net = engine.sample_point_network(s, engine.design_points(s)[0], 0)
    theta = s.outcome.type_values(net.types, net.blocks)
    gap = engine.contrast_truths(s, s.outcome.null_for("direct"), net.degrees, theta, net.cluster_sizes)["dir@0.5"]
    # Linear spillover: E[X | W = 1] - E[X | W = 0] = -1/(m - 1) for every unit with a neighbour (isolates: 0 and 0).
    assert gap == pytest.approx(-np.mean(net.degrees > 0) / 9.0, abs=1e-12)
    assert engine.contrast_truths(s, engine.null_model(s, "direct"), net.degrees, theta, net.cluster_sizes)["dir@0.5"] == 0.0


def test_a_report_on_a_saturation_design_counts_clusters_and_explains_what_it_skips():
    from designcalc.report import ReportSettings, build_report
    from designcalc.report.render import design_in_words, reproduce_command
    from designcalc.report.tables import report_tables

    report = build_report(_tarn(), ReportSettings(clusters=(14,), graphs=3, assignments_per_graph=3, precision=0.5, search_graphs=4))
    assert [k[1] for k in report.tests] == ["snt_pooled", "itt_pooled"]  # the pooled contrasts head the key answers
    tables = {t.id: t for t in report_tables(report)}
    key = tables["key-answers"]
    assert [c.header for c in key.columns][4] == "required clusters" and key.columns[-1].header == "MDE at 14 clusters"
    assert [c.header for c in tables["power"].columns][:3] == ["clusters", "units (nominal)", "share treated"]
    assert all(row[0] == 14 for row in tables["power"].rows)
    assert tables["treatment-probabilities"].rows == () and tables["treatment-probabilities"].caption.startswith("Not computed")
    words = dict(design_in_words(report))
    assert words["Population"].startswith("14 clusters") and "pure control" in words["Design"]
    assert "--clusters 14" in reproduce_command(report)


def test_a_search_over_cluster_sizes_states_the_large_cluster_limit():
    # METHODS.md §5.3: as m grows, Var ITT(p) -> rho sigma^2 (1/f + 1/psi) / C, so C clusters cap the power whatever
    # their size; the size search says so beside each saturation contrast, from cluster_formulas.max_power_with_clusters.
    from dataclasses import replace as _replace

    from designcalc.sample_size import SizeAxis, SizePoint, SizeRecord, _closed_form

    s = _tarn()
    point = SizePoint(40, 0.5, 0.02, 1.0, 1.0, 0.3, 0.3, 100)
    record = SizeRecord("total", "itt@0.5", "cluster_robust", 0.3375, "reached", 40, 30, 50, 40, 0.8, 0.01, 0.1, "t(20)", -0.5, "", (point,))
    value, note = _closed_form(s, SizeAxis("cluster_size", 20), record)
    design = s.design.saturation
    icc = s.outcome.cluster_icc
    from designcalc.clusters import cluster_effect_sd, within_cluster_sd

    sigma = math.hypot(within_cluster_sd(s.outcome, s.network), cluster_effect_sd(s.outcome, s.network, icc))
    best = cluster_formulas.max_power_with_clusters(0.3, 20, icc, design.pure_control_share, design.shares[1], sigma=sigma)
    assert math.isnan(value) and f"give power {best:.2f}" in note and best < 0.8 and note.endswith("add clusters instead")
    snt = _closed_form(s, SizeAxis("cluster_size", 20), _replace(record, estimand="spillover", estimator="snt@0.5"))[1]
    assert f"give power {best:.2f}" in snt  # the same limit for the untreated's contrast

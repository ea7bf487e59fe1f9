"""Tests of designcalc.engine: content-keyed random streams, null estimands and the scaling facts of METHODS §2-§3."""

from __future__ import annotations

import numpy as np
import pytest
from scenario_text import block_model_scenario

import designcalc
from pathlib import Path

from designcalc.engine import ESTIMANDS, DesignPoint, design_points, simulate_graph
from designcalc.scenario import load_scenario

DEMO = Path(__file__).parents[1] / "scenarios" / "lake_orrin_savings.toml"

# A scenario exercising every estimator and variance estimator, for the
# reproducibility checks (STYLE.md §3-§4).
FULL_SCENARIO = """
[population]
units = [150, 200]

[network]
model = "blocks"
block_shares = [0.6, 0.4]
block_affinity = [[6.0, 1.0], [1.0, 8.0]]

[network.density]
mean_degree = 6
reference_units = 200

[outcome]
kind = "continuous"
baseline = 5.0
block_effects = [0.0, 1.0]
noise_sd = 1.0
direct_effect = 0.4
spillover_effect = 0.6
interaction = 0.2

[design]
treatment_probability = [0.3, 0.5]

[estimators]
direct = ["hajek", "horvitz_thompson"]
direct_variance = ["neyman", "two_hop", "two_hop_psd"]
spillover = ["pc_balancing_corrected", "pc_balancing", "centred_ht", "exposure_regression"]

[simulation]
graphs = 3
assignments_per_graph = 10
seed = 7
"""


def _without_time(result: designcalc.PowerResult) -> dict[str, object]:
    d = result.to_dict()
    provenance = dict(d["provenance"])  # type: ignore[arg-type]
    del provenance["utc_time"]
    d["provenance"] = provenance
    return d


def test_batch_size_never_changes_the_results() -> None:
    """The same scenario and seed give identical results for batch sizes 1, 7 and 16."""
    scenario = designcalc.parse_scenario(FULL_SCENARIO)
    runs = [
        _without_time(designcalc.simulate_power(scenario, batch_size=b))
        for b in (1, 7, 16)
    ]
    # Every number must be finite, or `==` would fail on NaN != NaN and hide nothing.
    assert all(
        np.isfinite(v)
        for rec in runs[0]["results"]
        for v in rec.values()
        if isinstance(v, float)
    )  # type: ignore[union-attr]
    assert len(runs[0]["results"]) == 56  # type: ignore[arg-type]
    assert runs[0] == runs[1] == runs[2]


def test_a_different_seed_gives_different_numbers() -> None:
    """Changing the root seed changes every design point's estimates."""
    scenario = designcalc.parse_scenario(FULL_SCENARIO)
    first = designcalc.simulate_power(
        scenario, units=[150], treatment_probabilities=[0.5]
    )
    second = designcalc.simulate_power(
        scenario, units=[150], treatment_probabilities=[0.5], seed=8
    )
    assert second.provenance["seed_entropy"] == 8
    for a, b in zip(first.records, second.records, strict=True):
        assert (a.estimand, a.estimator, a.variance_estimator) == (
            b.estimand,
            b.estimator,
            b.variance_estimator,
        )
        assert a.mean_estimate != b.mean_estimate
        assert a.sd != b.sd


def test_a_design_point_alone_equals_it_within_a_grid() -> None:
    """Streams are keyed by content: one design point simulated alone gives the records it gets in a grid."""
    scenario = designcalc.parse_scenario(FULL_SCENARIO)
    grid = designcalc.simulate_power(scenario)
    assert len(design_points(scenario)) == 4
    alone = designcalc.simulate_power(
        scenario, units=[200], treatment_probabilities=[0.5]
    )
    in_grid = grid.select(units=200, treatment_probability=0.5)
    assert len(alone.records) == 14
    assert [r.to_dict() for r in alone.records] == [r.to_dict() for r in in_grid]


def test_graphs_are_shared_across_treatment_probabilities() -> None:
    """The network of a graph index does not depend on the treatment probability (common random numbers)."""
    scenario = designcalc.parse_scenario(FULL_SCENARIO)
    low = simulate_graph(scenario, DesignPoint(150, 0.3), 1)
    high = simulate_graph(scenario, DesignPoint(150, 0.5), 1)
    other = simulate_graph(scenario, DesignPoint(150, 0.3), 2)
    assert (low.mean_degree, low.share_isolated) == (
        high.mean_degree,
        high.share_isolated,
    )
    assert low.mean_degree != other.mean_degree


NULL_SCENARIOS = {
    "continuous_saturating_blocks": """
[population]
units = [120]
[network]
model = "blocks"
block_shares = [0.5, 0.5]
block_affinity = [[4.0, 1.0], [1.0, 3.0]]
[network.density]
mean_degree = 3
reference_units = 120
[outcome]
kind = "continuous"
baseline = 2.0
block_effects = [0.0, 1.5]
noise_sd = 1.0
direct_effect = 0.7
spillover_effect = 0.9
spillover_shape = "saturating"
saturation_rate = 3.0
interaction = -0.4
[design]
treatment_probability = [0.35]
[estimators]
spillover = ["centred_ht"]
[simulation]
graphs = 2
assignments_per_graph = 3
""",
    "binary_logistic_threshold_kernel": """
[population]
units = [150]
[network]
model = "kernel"
kernel = "distance_decay"
length_scale = 0.2
[network.density]
mean_degree = 5
reference_units = 150
[outcome]
kind = "binary"
link = "logistic"
baseline = -0.5
type_effect = "sin(3 * u)"
direct_effect = 0.8
spillover_effect = 1.1
spillover_shape = "threshold"
threshold = 0.4
interaction = 0.3
[design]
treatment_probability = [0.6]
[estimators]
spillover = ["centred_ht"]
[simulation]
graphs = 2
assignments_per_graph = 3
""",
}


@pytest.mark.parametrize("name", sorted(NULL_SCENARIOS))
def test_null_of_each_estimand_has_exactly_zero_truth(name: str) -> None:
    """In the null model of each estimand its per-graph truth is exactly 0, while the full model's is not."""
    scenario = designcalc.parse_scenario(NULL_SCENARIOS[name])
    (point,) = design_points(scenario)
    for graph_index in range(2):
        draws = simulate_graph(scenario, point, graph_index)
        assert set(draws.null_estimands) == set(ESTIMANDS)
        for estimand in ESTIMANDS:
            # Exact, not approximate: f(1, x) - f(0, x) and the x-differences
            # of f are computed from identical terms once the effect is zeroed.
            assert draws.null_estimands[estimand].value(estimand) == 0.0
            assert draws.estimands.value(estimand) != 0.0
        # The total's null zeroes both parts.
        assert draws.null_estimands["total"].direct == 0.0
        assert draws.null_estimands["total"].spillover == 0.0
        # The direct null keeps the spillover (and vice versa).
        assert draws.null_estimands["direct"].spillover != 0.0
        assert draws.null_estimands["spillover"].direct != 0.0


def _scaling_scenario(
    *,
    growth_exponent: float,
    mean_degree: float,
    units: list[int],
    graphs: int,
    assignments: int,
    spillover: list[str],
    block_shares: list[float],
    block_affinity: list[list[float]],
    block_effects: list[float],
    eigenvectors: int,
    seed: int,
) -> designcalc.Scenario:
    return block_model_scenario(
        units=units, mean_degree=mean_degree, graphs=graphs, assignments=assignments, seed=seed,
        block_shares=block_shares, block_affinity=block_affinity, density={"growth_exponent": growth_exponent},
        outcome={"baseline": 20.0, "block_effects": block_effects, "direct_effect": 0.3, "spillover_effect": 0.5, "interaction": 0.0},
        # centre 0 is effectively uncentred: the outcome level is about 20.
        estimators={"spillover": spillover, "centre": 0.0, "eigenvectors": eigenvectors},
    )


TWO_BLOCKS = {"block_shares": [0.5, 0.5], "block_affinity": [[4.0, 1.0], [1.0, 4.0]]}
SCALING_GRAPHS, SCALING_ASSIGNMENTS = 40, 40  # R = 1600 replicates per design point


@pytest.fixture(scope="module")
def scaling_runs() -> dict[float, designcalc.PowerResult]:
    """Runs at n = 400 and 1600 under fixed mean degree (gamma = 0) and fixed density (gamma = 1)."""
    return {
        gamma: designcalc.simulate_power(
            _scaling_scenario(
                growth_exponent=gamma,
                mean_degree=6.0,
                units=[400, 1600],
                graphs=SCALING_GRAPHS,
                assignments=SCALING_ASSIGNMENTS,
                spillover=["centred_ht"],
                **TWO_BLOCKS,
                block_effects=[0.0, 1.0],
                eigenvectors=0,
                seed=5,
            ),
            batch_size=40,
        )
        for gamma in (0.0, 1.0)
    }


def _sd(
    result: designcalc.PowerResult, estimand: str, estimator: str, units: int
) -> float:
    (record,) = result.select(estimand=estimand, estimator=estimator, units=units)
    assert record.replicates == SCALING_GRAPHS * SCALING_ASSIGNMENTS
    return record.sd


@pytest.mark.statistical
@pytest.mark.parametrize("gamma", [0.0, 1.0])
def test_direct_sd_shrinks_like_root_n_under_either_density_rule(
    scaling_runs: dict[float, designcalc.PowerResult], gamma: float
) -> None:
    """The Hajek direct-effect SD times sqrt(n) is flat from n = 400 to 1600, at fixed mean degree and at fixed density."""
    result = scaling_runs[gamma]
    small = _sd(result, "direct", "hajek", 400) * np.sqrt(400)
    large = _sd(result, "direct", "hajek", 1600) * np.sqrt(1600)
    # METHODS §2.2-§2.4: sqrt(n)-consistent in both regimes; with additive
    # spillover (no interaction) only the finite-degree term of §2.4,
    # beta^2 [mean 1/N_i + mean over edges 1/(N_i N_k)] ~ 0.25 * 2/d, can move:
    # not at all under gamma = 0, and from 0.08 (d = 6) to 0.02 (d = 24) under
    # gamma = 1, against n Var ~ (1 + Var theta)/(pi(1 - pi)) = 5, i.e. 1.2%
    # of the variance, 0.6% of the SD; allow 1.3%. The SD of R = 1600
    # near-normal estimates has relative SE 1/sqrt(2(R - 1)), so a ratio of
    # two independent SDs has relative SE 1/sqrt(R - 1) = 2.5%; allow 4 SE.
    replicates = SCALING_GRAPHS * SCALING_ASSIGNMENTS
    assert large / small == pytest.approx(1.0, abs=4 / np.sqrt(replicates - 1) + 0.013)


@pytest.mark.statistical
def test_uncentred_ht_spillover_sd_grows_with_n_under_fixed_density(
    scaling_runs: dict[float, designcalc.PowerResult],
) -> None:
    """Uncentred HT spillover SD rises with n at fixed density but falls like 1/sqrt(n) at fixed mean degree."""
    # METHODS §3.2: Var ~ sum_i E[S_i^2] / (n^2 pi(1 - pi)) with S_i ~ mu N_i,
    # so Var ~ mu^2 (d^2 + d)/(n pi(1 - pi)) for Poisson-like degrees d.
    # Fixed density (d = 6 -> 24): SD ratio ~ sqrt((600/1600)/(42/400)) = 1.89.
    dense = scaling_runs[1.0]
    ratio = _sd(dense, "spillover", "centred_ht", 1600) / _sd(
        dense, "spillover", "centred_ht", 400
    )
    # Relative SE of the ratio ~2.5% (see above; somewhat more for the heavier
    # tails of HT), so 1.5 lies more than 8 SE below the predicted 1.89.
    assert ratio > 1.5
    # Fixed mean degree: Var ~ 1/n, so SD * sqrt(n) is flat, up to the
    # same 4 SE (10%) plus 5% for the relative-order-rho cross terms.
    sparse = scaling_runs[0.0]
    flat = (_sd(sparse, "spillover", "centred_ht", 1600) * np.sqrt(1600)) / (
        _sd(sparse, "spillover", "centred_ht", 400) * np.sqrt(400)
    )
    assert flat == pytest.approx(1.0, abs=0.15)


@pytest.mark.statistical
def test_pc_balancing_removes_the_block_level_variance_of_uncentred_ht() -> None:
    """On a block model whose blocks differ in mean outcome, corrected PC-balancing has far smaller SD than uncentred HT."""
    # METHODS §3.3: the large term sum_j A_ij mu_j is rank K for a K-block
    # model and is projected out with k = K eigenvectors and the ones vector.
    # Expected SDs here ~2 (PCc) vs ~20 (HT: outcome level 20 times degree);
    # with R = 400 each SD has relative SE ~3.5%, so the ratio ~0.1 sits far
    # below 0.5.
    scenario = _scaling_scenario(
        growth_exponent=0.0,
        mean_degree=10.0,
        units=[400],
        graphs=10,
        assignments=40,
        spillover=["pc_balancing_corrected", "centred_ht"],
        block_shares=[0.4, 0.3, 0.3],
        block_affinity=[[8.0, 1.0, 0.5], [1.0, 10.0, 1.0], [0.5, 1.0, 12.0]],
        block_effects=[0.0, 5.0, -5.0],
        eigenvectors=3,
        seed=9,
    )
    result = designcalc.simulate_power(scenario, batch_size=40)
    (pc,) = result.select(estimand="spillover", estimator="pc_balancing_corrected")
    (ht,) = result.select(estimand="spillover", estimator="centred_ht")
    assert pc.replicates == ht.replicates == 400
    assert pc.sd / ht.sd < 0.5
    # Both are unbiased (METHODS §3.1, §3.3 corrected variant): 4 clustered MC SEs.
    assert abs(pc.bias) <= 4 * pc.bias_mc_se
    assert abs(ht.bias) <= 4 * ht.bias_mc_se


def test_example_network_is_the_engines_graph_and_first_assignment():
    """example_network returns the graph and first assignment simulate_graph used (same streams)."""
    from designcalc.engine import _prepare, example_network

    s = load_scenario(DEMO)
    point = DesignPoint(300, 0.3)
    net, treated = example_network(s, point, 2)
    prepared = _prepare(s, point, 2)
    assert (net.adjacency != prepared.net.adjacency).nnz == 0
    assert np.array_equal(treated, prepared.W_all[:, 0] == 1)


def test_restricting_tests_keeps_their_numbers():
    """A scenario restricted to some planned tests gives those tests the full run's estimates exactly."""
    from designcalc.engine import planned_keys, restrict_tests

    s = load_scenario(DEMO)
    point = DesignPoint(300, 0.5)
    keys = planned_keys(s, 300)
    chosen = [keys[0], keys[-1]]
    restricted = restrict_tests(s, chosen)
    assert planned_keys(restricted, 300) == chosen
    full = simulate_graph(s, point, 0)
    part = simulate_graph(restricted, point, 0)
    assert set(part.estimates) == set(chosen)
    for key in chosen:
        assert np.array_equal(part.estimates[key], full.estimates[key])

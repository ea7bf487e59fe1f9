"""Time designcalc's engine against a straightforward reference simulation.

A plain script, not a test: ``python benchmarks/bench_engine.py`` (``--help``
for the sizes). It prints four tables:

1. time per replicate (one graph-assignment pair, every estimator under the
   model and its three nulls, exact estimands included) of the reference in
   ``benchmarks/reference_simulation.py`` and of
   ``designcalc.engine.simulate_graph`` on a 3-block SBM, n = 3000, mean
   degree 20 (target: engine at least 50x faster);
2. a same-draw check: the reference's and the engine's estimator functions
   on one identical graph, assignment and outcome vector (must agree to
   rounding and eigsh tolerance);
3. a statistical check on a smaller configuration: mean, SD and mean SE of
   the Hajek, centred HT, PC and corrected PC estimates over independent
   replicates of each implementation, with z-scores from graph-clustered
   Monte Carlo standard errors;
4. the wall time of the demo scenario's default power table (target < 60 s).

About 3-4 minutes on two cores with the defaults.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import networkx as nx
import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

from reference_simulation import (  # noqa: E402
    LinearOutcome,
    prepare_reference_graph,
    reference_estimates,
    simulate_reference_graph,
)

from designcalc import load_scenario, parse_scenario, simulate_power  # noqa: E402
from designcalc.engine import DesignPoint, simulate_graph  # noqa: E402
from designcalc.estimators import (  # noqa: E402
    combine_total,
    estimate_direct_hajek,
    estimate_spillover_ht,
    estimate_spillover_pc,
    estimate_spillover_pc_corrected,
    prepare_graph,
)
from designcalc.networks import sample_network  # noqa: E402
from designcalc.power import clustered_mean_se  # noqa: E402

SCENARIO_TEMPLATE = """
[scenario]
name = "engine benchmark"
description = "3-block SBM with block effects"

[population]
units = [{units}]

[network]
model = "blocks"
block_shares = [0.5, 0.3, 0.2]
block_affinity = [[8.0, 1.0, 0.5], [1.0, 10.0, 1.0], [0.5, 1.0, 14.0]]

[network.density]
mean_degree = 20
reference_units = {units}
growth_exponent = 0.0

[outcome]
kind = "continuous"
baseline = 20.0
block_effects = [0.0, 2.0, -1.5]
noise_sd = 4.0
direct_effect = 1.2
spillover_effect = 1.0
spillover_shape = "linear"
interaction = 0.0

[design]
treatment_probability = [0.5]

[estimators]
direct = ["hajek"]
direct_variance = ["neyman"]
spillover = ["pc_balancing", "pc_balancing_corrected", "centred_ht"]
centre = 20.0
eigenvectors = "auto"

[simulation]
graphs = {graphs}
assignments_per_graph = {assignments}
seed = {seed}
"""

COMPARED = (
    ("direct", "hajek", "neyman"),
    ("spillover", "centred_ht", "plug_in"),
    ("spillover", "pc_balancing", "plug_in"),
    ("spillover", "pc_balancing_corrected", "plug_in"),
    ("total", "hajek+pc_balancing_corrected", "linearised"),
)


def build_scenario(units: int, graphs: int, assignments: int, seed: int):
    text = SCENARIO_TEMPLATE.format(units=units, graphs=graphs, assignments=assignments, seed=seed)
    return parse_scenario(text, source="bench_engine.toml")


def reference_inputs(scenario, units: int):
    """Block shares, edge probabilities and outcome model of the scenario, in plain form."""
    network, outcome = scenario.network, scenario.outcome
    probabilities = np.minimum(1.0, scenario.density.rho(units) * network.normalised_matrix())
    plain = LinearOutcome(
        outcome.baseline,
        tuple(outcome.block_effects),
        outcome.direct_effect,
        outcome.spillover_effect,
        outcome.interaction,
        outcome.noise_sd,
    )
    return tuple(network.shares), probabilities, plain


def run_reference(scenario, units: int, graphs: int, assignments: int, *, rng: np.random.Generator):
    shares, probabilities, plain = reference_inputs(scenario, units)
    pi = scenario.design.treatment_probabilities[0]
    return [
        simulate_reference_graph(
            units, shares, probabilities, plain, pi, assignments, scenario.estimators.centre, rng=rng
        )
        for _ in range(graphs)
    ]


def run_engine(scenario, units: int, graphs: int, *, first_index: int = 0):
    point = DesignPoint(units, scenario.design.treatment_probabilities[0])
    return [simulate_graph(scenario, point, g) for g in range(first_index, first_index + graphs)]


def timing_table(args: argparse.Namespace) -> None:
    units, assignments = args.units, args.assignments
    scenario = build_scenario(units, args.engine_graphs, assignments, args.seed)
    print(f"== 1. Time per replicate: 3-block SBM, n = {units}, mean degree 20, pi = 0.5, "
          f"{assignments} assignments per graph ==")
    print("   (each replicate: exposure, outcomes and all estimators under the model and its 3 nulls;")
    print("    per-graph work — graph, eigenvectors, exact estimands — is spread over the graph's replicates)")
    run_engine(scenario, units, 1, first_index=10_000)  # warm-up: imports, caches
    start = time.perf_counter()
    engine = run_engine(scenario, units, args.engine_graphs)
    engine_seconds = time.perf_counter() - start
    start = time.perf_counter()
    reference = run_reference(scenario, units, args.reference_graphs, assignments, rng=np.random.default_rng(args.seed))
    reference_seconds = time.perf_counter() - start
    engine_reps = args.engine_graphs * assignments
    reference_reps = args.reference_graphs * assignments
    per_engine = engine_seconds / engine_reps
    per_reference = reference_seconds / reference_reps
    print(f"{'':34}{'reference':>14}{'engine':>14}")
    print(f"{'graphs x assignments':34}{f'{args.reference_graphs} x {assignments}':>14}{f'{args.engine_graphs} x {assignments}':>14}")
    print(f"{'total wall time (s)':34}{reference_seconds:>14.2f}{engine_seconds:>14.3f}")
    print(f"{'time per graph (s)':34}{reference_seconds / args.reference_graphs:>14.3f}{engine_seconds / args.engine_graphs:>14.4f}")
    print(f"{'time per replicate (ms)':34}{1e3 * per_reference:>14.2f}{1e3 * per_engine:>14.3f}")
    print(f"{'eigenvectors used (first graph)':34}{reference[0].n_eigenvectors:>14d}{engine[0].n_eigenvectors:>14d}")
    print(f"{'realised mean degree (first graph)':34}{reference[0].mean_degree:>14.2f}{engine[0].mean_degree:>14.2f}")
    ratio = per_reference / per_engine
    print(f"{'speed-up (reference / engine)':34}{ratio:>28.1f}   target >= 50: {'PASS' if ratio >= 50 else 'FAIL'}")
    stages = {k: np.mean([d.seconds[k] for d in reference]) for k in reference[0].seconds}
    print("reference time per graph by stage (s): " + ", ".join(f"{k} {v:.2f}" for k, v in stages.items())
          + f"; per assignment {stages['assignments'] / assignments:.3f}")
    print()


def same_draw_check(args: argparse.Namespace) -> None:
    """Both implementations' estimators on one identical graph, assignment and outcome vector."""
    units = args.check_units
    scenario = build_scenario(units, 1, 1, args.seed)
    rng = np.random.default_rng(args.seed + 1)
    net = sample_network(scenario.network, scenario.density, units, types_rng=rng, graph_rng=rng)
    degrees = net.degrees
    pi, centre = 0.5, scenario.estimators.centre
    theta = scenario.outcome.type_values(net.types, net.blocks)
    W = (rng.random(units) < pi).astype(float)
    X = (net.adjacency @ W) / np.maximum(degrees, 1)
    Y = scenario.outcome.mean_outcome(theta, W, X) + scenario.outcome.noise_sd * rng.standard_normal(units)
    prep = prepare_graph(net.adjacency, n_eigenvectors=None, mean_degree_hint=float(degrees.mean()))
    Wc, Yc = W[:, None], Y[:, None]
    direct = estimate_direct_hajek(prep, Wc, Yc, treatment_probability=pi)
    spill = {
        "centred_ht": estimate_spillover_ht(prep, Wc, Yc, treatment_probability=pi, centre=centre),
        "pc_balancing": estimate_spillover_pc(prep, Wc, Yc, treatment_probability=pi),
        "pc_balancing_corrected": estimate_spillover_pc_corrected(prep, Wc, Yc, treatment_probability=pi),
    }
    engine = {("direct", "hajek", "neyman"): direct}
    engine.update({("spillover", k, "plug_in"): v for k, v in spill.items()})
    engine.update({("total", f"hajek+{k}", "linearised"): combine_total(direct, v) for k, v in spill.items()})
    graph = nx.from_scipy_sparse_array(net.adjacency)
    ref = prepare_reference_graph(graph, [int(b) for b in net.blocks])
    found = reference_estimates(ref, W, Y, pi, centre, ("direct", "spillover", "total"))
    print(f"== 2. Same-draw check: one graph (n = {units}), one assignment, identical inputs ==")
    print(f"   eigenvectors: reference {ref.n_eigenvectors} (dense eigh), engine {prep.n_eigenvectors} ({prep.eigen_method})")
    print(f"{'quantity':44}{'reference':>13}{'engine':>13}{'|diff|/SE':>11}")
    worst = 0.0
    for key, batch in engine.items():
        est, se = found[key]
        for label, a, b in (("estimate", est, batch.estimate[0]), ("SE", se, batch.standard_error[0])):
            scaled = abs(a - b) / batch.standard_error[0]
            worst = max(worst, scaled)
            print(f"{key[1] + ' ' + label:44}{a:>13.6f}{b:>13.6f}{scaled:>11.1e}")
    # eigsh at tol 1e-2 gives eigenvectors accurate to ~1e-7 in angle (DESIGN.md), so differences
    # far below 1e-4 SE are expected; anything near 1e-2 SE would be a formula difference.
    print(f"largest difference {worst:.1e} SE: {'PASS' if worst < 1e-4 else 'FAIL'} (tolerance 1e-4 SE)")
    print()


def _sd_and_se(values: np.ndarray) -> tuple[float, float]:
    """SD over all replicates and its graph-clustered SE (delta method from the variance)."""
    mean = values.mean()
    squared = (values - mean) ** 2
    variance, variance_se = clustered_mean_se(squared)
    sd = float(np.sqrt(variance))
    return sd, variance_se / (2.0 * sd)


def statistical_check(args: argparse.Namespace) -> None:
    units, assignments = args.check_units, args.check_assignments
    scenario = build_scenario(units, args.check_engine_graphs, assignments, args.seed + 2)
    start = time.perf_counter()
    reference = run_reference(scenario, units, args.check_reference_graphs, assignments, rng=np.random.default_rng(args.seed + 3))
    reference_seconds = time.perf_counter() - start
    start = time.perf_counter()
    engine = run_engine(scenario, units, args.check_engine_graphs)
    engine_seconds = time.perf_counter() - start
    print(f"== 3. Statistical check: n = {units}, pi = 0.5, independent draws; reference "
          f"{args.check_reference_graphs} x {assignments} ({reference_seconds:.1f} s), engine "
          f"{args.check_engine_graphs} x {assignments} ({engine_seconds:.1f} s) ==")
    print("   z = difference / sqrt(SE_ref^2 + SE_eng^2), SEs clustered by graph; |z| > 4 flags a disagreement")
    print(f"{'estimator':30}{'statistic':>10}{'reference (SE)':>18}{'engine (SE)':>18}{'z':>7}")
    flagged = 0
    rows = [("estimand", "direct"), ("estimand", "spillover")] + [("estimator", key) for key in COMPARED]
    for kind, key in rows:
        if kind == "estimand":
            ref_values = np.array([[d.estimands[key]] for d in reference])
            eng_values = np.array([[d.estimands.value(key)] for d in engine])
            stats = {"mean": (clustered_mean_se(ref_values), clustered_mean_se(eng_values))}
            label = f"exact {key} estimand"
        else:
            ref_est = np.array([d.estimates[key] for d in reference])
            eng_est = np.array([d.estimates[key] for d in engine])
            ref_se = np.array([d.standard_errors[key] for d in reference])
            eng_se = np.array([d.standard_errors[key] for d in engine])
            stats = {
                "mean": (clustered_mean_se(ref_est), clustered_mean_se(eng_est)),
                "SD": (_sd_and_se(ref_est), _sd_and_se(eng_est)),
                "mean SE": (clustered_mean_se(ref_se), clustered_mean_se(eng_se)),
            }
            label = key[1]
        for name, ((a, a_se), (b, b_se)) in stats.items():
            scale = float(np.hypot(a_se, b_se))
            if scale < 1e-9:
                # Linear spillover: the exact estimands are the same on every graph (METHODS.md
                # §1.4, linear-in-means example), so compare them to rounding instead.
                bad = abs(a - b) > 1e-9
                z_text = "exact" if not bad else "DIFF"
            else:
                z = (a - b) / scale
                bad = abs(z) > 4
                z_text = f"{z:.2f}"
            flagged += bad
            print(f"{label:30}{name:>10}{f'{a:.4f} ({a_se:.4f})':>18}{f'{b:.4f} ({b_se:.4f})':>18}{z_text:>7}")
    # With ~25 comparisons a 4-SE threshold has a family-wise false-alarm rate below 0.2%.
    print(f"comparisons with |z| > 4: {flagged}: {'PASS' if flagged == 0 else 'FAIL'}")
    print()


def power_table_timing() -> None:
    path = HERE.parent / "scenarios" / "lake_orrin_savings.toml"
    scenario = load_scenario(path)
    start = time.perf_counter()
    result = simulate_power(scenario)
    seconds = time.perf_counter() - start
    sim = scenario.simulation
    points = len(scenario.population.units) * len(scenario.design.treatment_probabilities)
    print("== 4. Demo scenario default power table: simulate_power(load_scenario(\"scenarios/lake_orrin_savings.toml\")) ==")
    print(f"   units {list(scenario.population.units)}, pi {list(scenario.design.treatment_probabilities)}, "
          f"{sim.graphs} graphs x {sim.assignments_per_graph} assignments per design point, {points} design points, "
          f"{len(result.records)} power records")
    print(f"wall time {seconds:.1f} s: target < 60 s: {'PASS' if seconds < 60 else 'FAIL'}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--units", type=int, default=3000, help="network size of the timing comparison")
    parser.add_argument("--assignments", type=int, default=16, help="assignments per graph (timing)")
    parser.add_argument("--reference-graphs", type=int, default=2, help="reference graphs (timing)")
    parser.add_argument("--engine-graphs", type=int, default=20, help="engine graphs (timing)")
    parser.add_argument("--check-units", type=int, default=600, help="network size of the checks")
    parser.add_argument("--check-assignments", type=int, default=25)
    parser.add_argument("--check-reference-graphs", type=int, default=12)
    parser.add_argument("--check-engine-graphs", type=int, default=200)
    parser.add_argument("--seed", type=int, default=20260101)
    parser.add_argument("--skip-power", action="store_true", help="skip the demo power-table timing")
    args = parser.parse_args()
    started = time.perf_counter()
    timing_table(args)
    same_draw_check(args)
    statistical_check(args)
    if not args.skip_power:
        power_table_timing()
    print(f"\ntotal benchmark time {time.perf_counter() - started:.0f} s")


if __name__ == "__main__":
    main()

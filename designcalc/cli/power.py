"""``designcalc power SCENARIO``: the power table of every planned estimator and test."""

from __future__ import annotations

from functools import partial
from typing import Annotated

import typer
from rich.console import Console

from designcalc.cli.output import (
    Cluster,
    Clusters,
    Workers,
    Assignments,
    FiguresDir,
    OutputFormat,
    ScenarioFile,
    Seed,
    TreatmentProbabilities,
    Units,
    check_figures_dir,
    size_label,
    emit,
    fmt,
    graphs_option,
    load_checked,
    new_table,
    partial_mark,
    print_footer,
    records_csv,
    simulate_with_progress,
    write_figures,
)
from designcalc.cli.running import NoStore, StorePath, execution
from designcalc.power import PowerResult, simulate_power
from designcalc.scenario import Scenario

_CSV_FIELDS = (
    "estimand", "estimator", "variance_estimator", "units", "treatment_probability", "true_effect",
    "true_effect_spread", "mean_estimate", "bias", "bias_mc_se", "sd", "rmse", "mean_standard_error",
    "power", "power_mc_se", "oracle_power", "oracle_power_mc_se", "size", "size_mc_se", "coverage",
    "coverage_mc_se", "reference_distribution", "replicates", "graphs", "flags", "clusters",
)


def render_table(result: PowerResult, console: Console) -> None:
    clustered = any(r.clusters for r in result.records)
    table = new_table(
        f"Power: {result.scenario_name}" + partial_mark(result),
        ("estimand", "estimator", "variance", "clusters" if clustered else "n", "share treated" if clustered else "pi",
         "true", "bias", "sd", "power ± MC se", "oracle", "size", "coverage", "flags"),
        left=("estimand", "estimator", "variance", "flags"),
    )
    for r in result.records:
        table.add_row(
            r.estimand, r.estimator, r.variance_estimator, size_label(r), f"{r.treatment_probability:.3g}",
            fmt(r.true_effect), fmt(r.bias), fmt(r.sd), f"{fmt(r.power)} ± {fmt(r.power_mc_se)}",
            fmt(r.oracle_power), fmt(r.size), fmt(r.coverage), "; ".join(r.flags),
        )
    console.print(table)
    p = result.provenance
    used = sorted({r.graphs for r in result.records})
    adaptive = []
    if used and used != [p["graphs_per_design_point"]]:
        # --adaptive: some design points were given more graphs than the scenario's number.
        adaptive.append(
            f"adaptive: design points used {used[0]}" + (f" to {used[-1]}" if len(used) > 1 else "")
            + " graphs (see the graphs and replicates of each record in --format json or csv)"
        )
    print_footer(
        result, console,
        f"{p['replicates_per_design_point']} replicates per design point ({p['graphs_per_design_point']} graphs x "
        f"{p['assignments_per_graph']} assignments)",
        after=adaptive,
    )


def render_csv(result: PowerResult) -> str:
    return records_csv(result.records, _CSV_FIELDS)


def register(app: typer.Typer) -> None:
    @app.command("power")
    def power(
        scenario: ScenarioFile,
        units: Units = None,
        clusters: Clusters = None,
        treatment_probability: TreatmentProbabilities = None,
        graphs: Annotated[int | None, graphs_option("Graphs per design point.")] = None,
        assignments: Assignments = None,
        seed: Seed = None,
        adaptive: Annotated[bool, typer.Option("--adaptive", help="Add graphs (doubling, up to simulation.max_graphs) until every test's power is clearly above or below the target or known to within simulation.relative_precision (in power units).")] = False,
        output_format: OutputFormat = "table",
        figures: FiguresDir = None,
        workers: Workers = None,
        cluster: Cluster = None,
        store: StorePath = None,
        no_store: NoStore = False,
    ) -> None:
        """Simulate power, size and coverage of every planned estimator at every design point."""
        loaded = load_checked(scenario, output_format, treatment_probability)
        check_figures_dir(figures)
        with execution(loaded, workers, cluster, store, no_store) as where:
            solve = partial(
                simulate_power, loaded, units=units, treatment_probabilities=treatment_probability, graphs=graphs,
                assignments_per_graph=assignments, seed=seed, adaptive=adaptive,
                workers=where.workers, cluster=where.cluster, store=where.store, clusters=clusters,
            )
            result = simulate_with_progress(solve, known_total=True)
        write_figures(figures, lambda: _figures(result, loaded))
        emit(result, output_format, table=render_table, csv_text=render_csv)


def _figures(result: PowerResult, scenario: Scenario) -> dict[str, object]:
    from designcalc.figures import power_table_figure

    if not result.records:
        return {}
    return {"power_by_units": power_table_figure(result.records, target_power=scenario.design.target_power, title=f"{result.scenario_name}: power at the planned sizes")}

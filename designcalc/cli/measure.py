"""``designcalc measure SCENARIO``: bias, power and size with the scenario's network measurement next to perfect measurement."""

from __future__ import annotations

from functools import partial
from typing import Annotated

import typer
from rich.console import Console

from designcalc.cli.output import (
    Assignments,
    Cluster,
    OutputFormat,
    ScenarioFile,
    Seed,
    TreatmentProbabilities,
    Units,
    Workers,
    emit,
    fmt,
    graphs_option,
    load_checked,
    new_table,
    partial_mark,
    plus_minus,
    print_footer,
    records_csv,
    simulate_with_progress,
)
from designcalc.cli.running import NoStore, StorePath, execution
from designcalc.measure import MeasurementComparison, compare_measurement

_CSV_FIELDS = (
    "estimand", "estimator", "variance_estimator", "units", "treatment_probability", "true_effect",
    "bias_perfect", "bias_perfect_mc_se", "bias_measured", "bias_measured_mc_se", "bias_change",
    "power_perfect", "power_perfect_mc_se", "power_measured", "power_measured_mc_se", "power_change",
    "size_perfect", "size_perfect_mc_se", "size_measured", "size_measured_mc_se", "size_change",
    "replicates", "flags",
)


def render_table(result: MeasurementComparison, console: Console) -> None:
    table = new_table(
        f"Measurement: {result.scenario_name}" + partial_mark(result),
        ("estimand", "estimator", "variance", "n", "pi", "true", "bias perfect", "bias measured", "power perfect",
         "power measured", "change", "size perfect", "size measured"),
        left=("estimand", "estimator", "variance"),
    )
    for r in result.records:
        table.add_row(
            r.estimand, r.estimator, r.variance_estimator, str(r.units), f"{r.treatment_probability:g}", fmt(r.true_effect),
            plus_minus(r.bias_perfect, r.bias_perfect_mc_se), plus_minus(r.bias_measured, r.bias_measured_mc_se),
            plus_minus(r.power_perfect, r.power_perfect_mc_se), plus_minus(r.power_measured, r.power_measured_mc_se),
            fmt(r.power_change), fmt(r.size_perfect), fmt(r.size_measured),
        )
    console.print(table)
    seen = [
        f"n = {s.units}: mean degree {s.mean_degree_true:.3g} true, {s.mean_degree_observed:.3g} observed; "
        f"{s.share_true_ties_observed:.1%} of true ties observed, {s.share_observed_ties_false:.1%} of observed ties false, "
        f"{s.share_responded:.1%} responded (first {s.graphs} graphs)"
        for s in result.networks
    ]
    p = result.provenance
    print_footer(
        result, console,
        f"{p['replicates_per_design_point']} replicates per design point ({p['graphs_per_design_point']} graphs x "
        f"{p['assignments_per_graph']} assignments), the same graphs, assignments and noise for both columns",
        after=[f"measurement: {result.measurement}", *seen],
    )


def render_csv(result: MeasurementComparison) -> str:
    return records_csv(result.records, _CSV_FIELDS)


def register(app: typer.Typer) -> None:
    @app.command("measure")
    def measure(
        scenario: ScenarioFile,
        units: Units = None,
        treatment_probability: TreatmentProbabilities = None,
        graphs: Annotated[int | None, graphs_option("Graphs per design point.")] = None,
        assignments: Assignments = None,
        seed: Seed = None,
        output_format: OutputFormat = "table",
        workers: Workers = None,
        cluster: Cluster = None,
        store: StorePath = None,
        no_store: NoStore = False,
    ) -> None:
        """Bias, power and size of every planned test with the scenario's [measurement] and with the true network."""
        loaded = load_checked(scenario, output_format, treatment_probability)
        with execution(loaded, workers, cluster, store, no_store) as where:
            solve = partial(
                compare_measurement, loaded, units=units, treatment_probabilities=treatment_probability, graphs=graphs,
                assignments_per_graph=assignments, seed=seed, workers=where.workers, cluster=where.cluster, store=where.store,
            )
            result = simulate_with_progress(solve, known_total=True)
        emit(result, output_format, table=render_table, csv_text=render_csv)

"""``designcalc mde SCENARIO``: the minimum detectable effect of every planned test, verified by simulation."""

from __future__ import annotations

from functools import partial
from typing import Annotated

import typer
from rich.console import Console

from designcalc.cli.output import (
    Assignments,
    Cluster,
    Clusters,
    Workers,
    FiguresDir,
    OutputFormat,
    ScenarioFile,
    Seed,
    TreatmentProbabilities,
    Units,
    check_figures_dir,
    size_label,
    emit,
    flag_references,
    fmt,
    graphs_option,
    interval,
    load_checked,
    new_table,
    partial_mark,
    planned_test_phrase,
    plus_minus,
    precision_settings,
    print_flag_notes,
    print_footer,
    records_csv,
    simulate_with_progress,
    span,
    write_figures,
)
from designcalc.cli.running import NoStore, StorePath, execution
from designcalc.mde import AGREEMENT_Z, MdeRecord, MdeResult, minimum_detectable_effects
from designcalc.scenario import Scenario

_CSV_FIELDS = (
    "estimand", "estimator", "variance_estimator", "units", "treatment_probability", "reference_distribution",
    "multiplier", "standard_error", "standard_error_mc_se", "mean_estimated_se", "size", "size_mc_se",
    "formula_mde", "formula_power", "formula_power_mc_se", "mde", "mde_low", "mde_high", "mde_sd_units",
    "control_sd", "verified_effect", "verified_power", "verified_power_mc_se", "method", "relative_precision",
    "graphs", "replicates", "direction", "flags",
)

# MdeRecord.method in a table cell.
_METHOD = {
    "formula, verified by simulation": "formula verified",
    "searched by simulation": "searched",
    "not reachable": "not reachable",
    "formula (not verified)": "formula only",
}


def _method_cell(record: MdeRecord) -> str:
    return _METHOD.get(record.method, record.method)


def render_table(result: MdeResult, console: Console, *, scenario: Scenario, precision: float, max_graphs: int) -> None:
    table = new_table(
        f"Minimum detectable effects: {result.scenario_name}" + partial_mark(result),
        (
            "estimand", "estimator", "variance", "clusters" if any(r.clusters for r in result.records) else "n",
            "share treated" if any(r.clusters for r in result.records) else "pi", "reference", "SE ± MC se", "MDE [95% MC]", "MDE (SD units)",
            "verified power ± MC se", "size", "method", "flags",
        ),
        left=("estimand", "estimator", "variance", "reference", "method", "flags"),
    )
    flag_cells, flag_notes = flag_references([r.flags for r in result.records])
    for r, flag_cell in zip(result.records, flag_cells):
        table.add_row(
            r.estimand, r.estimator, r.variance_estimator, size_label(r), f"{r.treatment_probability:.3g}", r.reference_distribution,
            plus_minus(r.standard_error, r.standard_error_mc_se), interval(r.mde, r.mde_low, r.mde_high), fmt(r.mde_sd_units),
            plus_minus(r.verified_power, r.verified_power_mc_se), fmt(r.size), _method_cell(r), flag_cell,
        )
    console.print(table)
    print_flag_notes(flag_notes, console)
    design = scenario.design
    direction = {
        "two-sided": "in the direction of the scenario's effect",
        "greater": "an increase, as the one-sided test looks for",
        "less": "a decrease, as the one-sided test looks for",
    }[design.alternative]
    console.print(
        f"MDE: the true effect (in outcome units, {direction}) at which the planned test has {planned_test_phrase(design)}; "
        "MDE (SD units) divides it by the SD of the outcome when nobody is treated "
        f"({span([r.control_sd for r in result.records], '{:.3g}')}). "
        "SE: the estimator's Monte Carlo SD when the tested effect is zero; size: the test's rejection rate there.",
        soft_wrap=True,
    )
    console.print(
        "method: 'formula verified' = (critical value + power quantile) x SE, then simulated at that effect and the power "
        f"agreed with the target within {AGREEMENT_Z:g} MC SEs; 'searched' = it did not, so the effect was searched by "
        "simulation; 'not reachable' = no effect reached the target; 'formula only' = not simulated (--no-verify). "
        "verified power: the simulated power at the last effect simulated (the formula MDE, or the search's last step); "
        "the MDE is one probit step from there to the target.",
        soft_wrap=True,
    )
    reached = [r.relative_precision for r in result.records if r.method != "formula (not verified)"]
    if reached:
        console.print(
            f"precision: 95% MC interval half-width {span(reached, '{:.1%}')} of the MDE (requested {precision:.1%}, "
            f"at most {max_graphs} graphs per design point)", soft_wrap=True,
        )
    print_footer(
        result, console,
        f"replicates per test: {span([float(r.replicates) for r in result.records], '{:.0f}')} "
        f"({span([float(r.graphs) for r in result.records], '{:.0f}')} graphs x {result.provenance['assignments_per_graph']} assignments)",
    )


def render_csv(result: MdeResult) -> str:
    return records_csv(result.records, _CSV_FIELDS)


def register(app: typer.Typer) -> None:
    @app.command("mde")
    def mde(
        scenario: ScenarioFile,
        units: Units = None,
        clusters: Clusters = None,
        treatment_probability: TreatmentProbabilities = None,
        graphs: Annotated[int | None, graphs_option("Graphs per design point to start with.")] = None,
        assignments: Assignments = None,
        seed: Seed = None,
        precision: Annotated[float | None, typer.Option(help="Target half-width of the MDE's 95% Monte Carlo interval relative to the MDE, in (0, 0.5]; overrides simulation.relative_precision.")] = None,
        max_graphs: Annotated[int | None, graphs_option("Most graphs per design point spent on precision; overrides simulation.max_graphs.")] = None,
        verify: Annotated[bool, typer.Option("--verify/--no-verify", help="Verify each formula MDE by simulation (default), or report the formula only.")] = True,
        output_format: OutputFormat = "table",
        figures: FiguresDir = None,
        workers: Workers = None,
        cluster: Cluster = None,
        store: StorePath = None,
        no_store: NoStore = False,
    ) -> None:
        """Minimum detectable direct, spillover and total effects of every planned test, verified by simulation."""
        loaded = load_checked(scenario, output_format, treatment_probability, precision=precision, max_graphs=max_graphs, graphs=graphs)
        requested, cap = precision_settings(loaded, precision, max_graphs, graphs)

        def table(res: MdeResult, console: Console) -> None:
            render_table(res, console, scenario=loaded, precision=requested, max_graphs=cap)

        check_figures_dir(figures)
        with execution(loaded, workers, cluster, store, no_store) as where:
            solve = partial(
                minimum_detectable_effects, loaded, units=units, clusters=clusters, treatment_probabilities=treatment_probability, graphs=graphs,
                assignments_per_graph=assignments, seed=seed, relative_precision=precision, max_graphs=max_graphs, verify=verify,
                workers=where.workers, cluster=where.cluster, store=where.store,
            )
            result = simulate_with_progress(solve, known_total=False)
        write_figures(figures, lambda: _figures(result))
        emit(result, output_format, table=table, csv_text=render_csv)


def _figures(result: MdeResult) -> dict[str, object]:
    from designcalc.figures import mde_units_figure

    if not result.records:
        return {}
    return {"mde_by_units": mde_units_figure(result.records, title=f"{result.scenario_name}: minimum detectable effects")}

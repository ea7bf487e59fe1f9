"""``designcalc size SCENARIO``: the number of units (or clusters) each planned test needs for the target power."""

from __future__ import annotations

import math
from functools import partial
from typing import Annotated

import typer
from rich.console import Console

from designcalc.cli.output import (
    Assignments,
    Cluster,
    FiguresDir,
    OutputFormat,
    ScenarioFile,
    Seed,
    TreatmentProbabilities,
    Workers,
    check_figures_dir,
    emit,
    flag_references,
    graphs_option,
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
from designcalc.sample_size import SizeRecord, SizeResult, required_sample_size, size_axis_and_limit
from designcalc.scenario import Scenario

_CSV_FIELDS = (
    "estimand", "estimator", "variance_estimator", "treatment_probability", "status", "required_units", "units_low",
    "units_high", "verified_units", "verified_power", "verified_power_mc_se", "relative_precision",
    "reference_distribution", "sd_slope", "reason", "flags", "points", "size_axis", "clusters", "closed_form", "closed_form_note",
)


def _required_cell(r: SizeRecord) -> str:
    if r.required_units is None:
        return "-"
    if r.status == "reached at the smallest size":
        return f"≤ {r.required_units:,}"
    if math.isfinite(r.units_low) and math.isfinite(r.units_high):
        return f"{r.required_units:,} [{math.floor(r.units_low):,}, {math.ceil(r.units_high):,}]"
    return f"{r.required_units:,}"


def _points_cell(r: SizeRecord) -> str:
    """The simulated sizes of one test as a compact ``n:power`` list."""
    return ";".join(f"{p.units}:{p.power:.3f}" for p in r.points)


_AXIS_WORDS = {"units": "n", "clusters": "clusters", "cluster_size": "cluster size"}


def render_table(result: SizeResult, console: Console, *, scenario: Scenario, limit: int, precision: float, max_graphs: int) -> None:
    axis = result.records[0].size_axis if result.records else ("clusters" if scenario.population.clustered else "units")
    word = _AXIS_WORDS[axis]
    closed = any(math.isfinite(r.closed_form) or r.closed_form_note for r in result.records)
    columns = ["estimand", "estimator", "variance", "share treated" if axis != "units" else "pi", "status", f"required {word} [95% MC]",
               f"verified at {word}", "power ± MC se", "SD slope"] + (["closed form"] if closed else []) + ["reason / flags"]
    table = new_table(
        f"Required sample size: {result.scenario_name}" + partial_mark(result),
        columns,
        left=("estimand", "estimator", "variance", "status", "reason / flags"),
    )
    flag_cells, flag_notes = flag_references([
        ((r.reason,) if r.reason else ()) + r.flags + ((r.closed_form_note,) if r.closed_form_note and not math.isfinite(r.closed_form) else ())
        for r in result.records
    ])
    for r, flag_cell in zip(result.records, flag_cells):
        cells = [
            r.estimand, r.estimator, r.variance_estimator, f"{r.treatment_probability:.3g}", r.status, _required_cell(r),
            "-" if r.verified_units is None else f"{r.verified_units:,}", plus_minus(r.verified_power, r.verified_power_mc_se),
            "-" if not math.isfinite(r.sd_slope) else f"{r.sd_slope:+.2f}",
        ]
        if closed:
            cells.append(f"{r.closed_form:.1f}" if math.isfinite(r.closed_form) else "-")
        table.add_row(*cells, flag_cell)
    console.print(table)
    print_flag_notes(flag_notes, console)
    if axis != "units":
        _clustered_notes(result, console, scenario=scenario, axis=axis, limit=limit, closed=closed)
    else:
        _network_notes(console, scenario=scenario, limit=limit)
    _common_notes(result, console, precision=precision, max_graphs=max_graphs)


def _clustered_notes(result: SizeResult, console: Console, *, scenario: Scenario, axis: str, limit: int, closed: bool) -> None:
    population = scenario.population
    if axis == "clusters":
        text = (
            f"clusters: the number of clusters in the whole study ({population.cluster_sizes.describe()}), each cluster's network "
            f"drawn under the density rule at its own size ({scenario.density.describe()}); searched up to {limit:,} clusters."
        )
    else:
        text = (
            f"cluster size: the units in every one of {result.records[0].clusters if result.records else 0} clusters, each cluster's "
            f"network drawn under the density rule at that size ({scenario.density.describe()}); searched up to {limit:,} units per cluster. "
            "With a cluster random effect, power comes from the number of clusters: past some size, larger clusters stop helping."
        )
    console.print(text, soft_wrap=True)
    if closed:
        console.print(
            "closed form: the answer of METHODS.md §5.2's formulas for the same contrast (no network, equal clusters of the mean size, "
            "normal approximation, the simulated true effect and the outcome's variance); a gap to the simulation is the network's "
            "(and unequal sizes', and the t reference's) doing.",
            soft_wrap=True,
        )


def _network_notes(console: Console, *, scenario: Scenario, limit: int) -> None:
    console.print(
        f"n: the number of units in the whole network (treated and untreated together), each network drawn under the "
        f"scenario's density rule ({scenario.density.describe()}). Required n: the smallest such network at which the "
        f"planned test has {planned_test_phrase(scenario.design)}, found by simulating networks of several sizes up to "
        f"{limit:,} units; no scaling of the SE with n is assumed, so a test whose signal-to-noise ratio stops growing "
        "is reported as not reachable.",
        soft_wrap=True,
    )


def _common_notes(result: SizeResult, console: Console, *, precision: float, max_graphs: int) -> None:
    console.print(
        "verified at n: the size simulated last, with its power; the required n is one probit step in log n from there. "
        "SD slope: the log-log slope of the estimator's SD in n over the simulated sizes (-0.50 when the SD shrinks like n^-1/2). "
        "The simulated sizes and their powers are in --format json (points) and csv.",
        soft_wrap=True,
    )
    reached = [r.relative_precision for r in result.records if r.status == "reached"]
    if reached:
        console.print(
            f"precision: 95% MC interval of n within ±{span(reached, '{:.1%}')} (requested ±{precision:.1%}, "
            f"at most {max_graphs} graphs at the verified size)", soft_wrap=True,
        )
    print_footer(
        result, console,
        f"simulated sizes per test: {span([float(len(r.points)) for r in result.records], '{:.0f}')}; replicates per simulated size: "
        f"{span([float(q.replicates) for r in result.records for q in r.points], '{:.0f}')} "
        f"({result.provenance['assignments_per_graph']} assignments per graph)",
    )


def render_csv(result: SizeResult) -> str:
    return records_csv(result.records, _CSV_FIELDS, extra=lambda r: {"points": _points_cell(r)})


def register(app: typer.Typer) -> None:
    @app.command("size")
    def size(
        scenario: ScenarioFile,
        treatment_probability: TreatmentProbabilities = None,
        max_units: Annotated[int | None, typer.Option(min=8, max=2_000_000, help="Largest network size searched (with --per-cluster: the largest cluster size); overrides population.max_units.")] = None,
        per_cluster: Annotated[int | None, typer.Option("--per-cluster", min=2, max=100_000, help="Clustered population: search the size of every one of this many clusters, instead of the number of clusters.")] = None,
        max_clusters: Annotated[int | None, typer.Option(min=4, max=100_000, help="Clustered population: the most clusters searched; overrides population.max_clusters.")] = None,
        graphs: Annotated[int | None, graphs_option("Graphs at the verified size to start with (the coarse grid uses a quarter of this, at least 8).")] = None,
        assignments: Assignments = None,
        seed: Seed = None,
        precision: Annotated[float | None, typer.Option(help="Target half-width of the 95% Monte Carlo interval of n relative to n, in (0, 0.5]; overrides simulation.relative_precision.")] = None,
        max_graphs: Annotated[int | None, graphs_option("Most graphs at the verified size; overrides simulation.max_graphs.")] = None,
        output_format: OutputFormat = "table",
        figures: FiguresDir = None,
        workers: Workers = None,
        cluster: Cluster = None,
        store: StorePath = None,
        no_store: NoStore = False,
    ) -> None:
        """Units needed for the target power, per treatment probability and planned test; no scaling law assumed."""
        loaded = load_checked(scenario, output_format, treatment_probability, precision=precision, max_graphs=max_graphs, graphs=graphs)
        limit = size_axis_and_limit(loaded, per_cluster, max_units, max_clusters)[1]
        requested, cap = precision_settings(loaded, precision, max_graphs, graphs)

        def table(res: SizeResult, console: Console) -> None:
            render_table(res, console, scenario=loaded, limit=limit, precision=requested, max_graphs=cap)

        check_figures_dir(figures)
        with execution(loaded, workers, cluster, store, no_store) as where:
            solve = partial(
                required_sample_size, loaded, treatment_probabilities=treatment_probability, max_units=max_units, graphs=graphs,
                assignments_per_graph=assignments, seed=seed, relative_precision=precision, max_graphs=max_graphs,
                workers=where.workers, cluster=where.cluster, store=where.store, cluster_size_for=per_cluster, max_clusters=max_clusters,
            )
            result = simulate_with_progress(solve, known_total=False)
        write_figures(figures, lambda: _figures(result, loaded))
        emit(
            result, output_format, table=table, csv_text=render_csv,
            partial_message="interrupted: showing the treatment probabilities that finished",
        )


def _figures(result: SizeResult, scenario: Scenario) -> dict[str, object]:
    from designcalc.figures import power_curve_figure

    curves = [r for r in result.records if r.points]
    if not curves:
        return {}
    return {"power_curves": power_curve_figure(curves, target_power=scenario.design.target_power, title=f"{result.scenario_name}: power against sample size")}

"""``designcalc size SCENARIO``: the number of units each planned test needs for the target power."""

from __future__ import annotations

import math
from pathlib import Path
from typing import Annotated

import typer
from rich.console import Console
from rich.table import Table

from designcalc.cli.output import (
    check_format,
    check_max_graphs,
    check_precision,
    check_probabilities,
    emit,
    flag_references,
    planned_test_phrase,
    plus_minus,
    print_flag_notes,
    print_notes,
    progress_reporter,
    render_rows_csv,
)
from designcalc.sample_size import SizeRecord, SizeResult, required_sample_size
from designcalc.scenario import Scenario, load_scenario

_CSV_FIELDS = (
    "estimand", "estimator", "variance_estimator", "treatment_probability", "status", "required_units", "units_low",
    "units_high", "verified_units", "verified_power", "verified_power_mc_se", "relative_precision",
    "reference_distribution", "sd_slope", "reason", "flags", "points",
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


def _span(values: list[float], text: str = "{:.0f}") -> str:
    finite = sorted(v for v in values if math.isfinite(v))
    if not finite:
        return "-"
    low, high = text.format(finite[0]), text.format(finite[-1])
    return low if low == high else f"{low}-{high}"


def render_table(result: SizeResult, console: Console, *, scenario: Scenario, limit: int, precision: float, max_graphs: int) -> None:
    title = f"Required sample size: {result.scenario_name}" + ("  (PARTIAL: interrupted)" if result.partial else "")
    table = Table(title=title, title_justify="left")
    columns = ("estimand", "estimator", "variance", "pi", "status", "required n [95% MC]", "verified at n", "power ± MC se", "SD slope", "reason / flags")
    for col in columns:
        table.add_column(col, justify="left" if col in ("estimand", "estimator", "variance", "status", "reason / flags") else "right")
    flag_cells, flag_notes = flag_references([((r.reason,) if r.reason else ()) + r.flags for r in result.records])
    for r, flag_cell in zip(result.records, flag_cells):
        table.add_row(
            r.estimand, r.estimator, r.variance_estimator, f"{r.treatment_probability:g}", r.status, _required_cell(r),
            "-" if r.verified_units is None else f"{r.verified_units:,}", plus_minus(r.verified_power, r.verified_power_mc_se),
            "-" if not math.isfinite(r.sd_slope) else f"{r.sd_slope:+.2f}", flag_cell,
        )
    console.print(table)
    print_flag_notes(flag_notes, console)
    console.print(
        f"n: the number of units in the whole network (treated and untreated together), each network drawn under the "
        f"scenario's density rule ({scenario.density.describe()}). Required n: the smallest such network at which the "
        f"planned test has {planned_test_phrase(scenario.design)}, found by simulating networks of several sizes up to "
        f"{limit:,} units; no scaling of the SE with n is assumed, so a test whose signal-to-noise ratio stops growing "
        "is reported as not reachable.",
        soft_wrap=True,
    )
    console.print(
        "verified at n: the size simulated last, with its power; the required n is one probit step in log n from there. "
        "SD slope: the log-log slope of the estimator's SD in n over the simulated sizes (-0.50 when the SD shrinks like n^-1/2). "
        "The simulated sizes and their powers are in --format json (points) and csv.",
        soft_wrap=True,
    )
    reached = [r.relative_precision for r in result.records if r.status == "reached"]
    if reached:
        console.print(
            f"precision: 95% MC interval of n within ±{_span(reached, '{:.1%}')} (requested ±{precision:.1%}, "
            f"at most {max_graphs} graphs at the verified size)", soft_wrap=True,
        )
    p = result.provenance
    console.print(
        f"simulated sizes per test: {_span([float(len(r.points)) for r in result.records])}; replicates per simulated size: "
        f"{_span([float(q.replicates) for r in result.records for q in r.points])} ({p['assignments_per_graph']} assignments per graph); "
        f"Monte Carlo SEs clustered by graph; seed {p['seed_entropy']}; scenario sha256 {str(p['scenario_sha256'])[:12]}...",
        soft_wrap=True,
    )
    print_notes(result, console)


def render_csv(result: SizeResult) -> str:
    rows = []
    for r in result.records:
        row = r.to_dict()
        row["flags"] = "; ".join(r.flags)
        row["points"] = _points_cell(r)
        rows.append(row)
    return render_rows_csv(rows, _CSV_FIELDS)


def register(app: typer.Typer) -> None:
    @app.command("size")
    def size(
        scenario: Annotated[Path, typer.Argument(help="Scenario file (TOML).")],
        treatment_probability: Annotated[list[float] | None, typer.Option("--treatment-probability", "-p", help="Treatment probability(ies) in (0, 1); repeat for several.")] = None,
        max_units: Annotated[int | None, typer.Option(min=8, max=2_000_000, help="Largest network size searched; overrides population.max_units.")] = None,
        graphs: Annotated[int | None, typer.Option(min=2, max=1_000_000, help="Graphs at the verified size to start with (the coarse grid uses a quarter of this, at least 8).")] = None,
        assignments: Annotated[int | None, typer.Option(min=1, max=100_000, help="Assignments per graph.")] = None,
        seed: Annotated[int | None, typer.Option(min=0, help="Root seed, overriding simulation.seed.")] = None,
        precision: Annotated[float | None, typer.Option(help="Target half-width of the 95% Monte Carlo interval of n relative to n, in (0, 0.5]; overrides simulation.relative_precision.")] = None,
        max_graphs: Annotated[int | None, typer.Option(min=2, max=1_000_000, help="Most graphs at the verified size; overrides simulation.max_graphs.")] = None,
        output_format: Annotated[str, typer.Option("--format", help="table, json or csv.")] = "table",
    ) -> None:
        """Units needed for the target power, per treatment probability and planned test; no scaling law assumed."""
        from designcalc.cli.main import stderr_console

        check_format(output_format)
        check_probabilities(treatment_probability, "--treatment-probability")
        check_precision(precision)
        loaded = load_scenario(scenario)
        check_max_graphs(max_graphs, graphs if graphs is not None else loaded.simulation.graphs)
        with progress_reporter(stderr_console(), known_total=False) as report:
            result = required_sample_size(
                loaded, treatment_probabilities=treatment_probability, max_units=max_units, graphs=graphs,
                assignments_per_graph=assignments, seed=seed, relative_precision=precision, max_graphs=max_graphs,
                progress=report,
            )
        limit = max_units or loaded.population.search_limit
        requested = loaded.simulation.relative_precision if precision is None else precision
        cap = max(loaded.simulation.max_graphs if max_graphs is None else max_graphs, graphs or loaded.simulation.graphs)

        def table(res: SizeResult, console: Console) -> None:
            render_table(res, console, scenario=loaded, limit=limit, precision=requested, max_graphs=cap)

        emit(result, output_format, table=table, csv_text=render_csv, partial_message="interrupted: showing the treatment probabilities that finished")

"""``designcalc mde SCENARIO``: the minimum detectable effect of every planned test, verified by simulation."""

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
    fmt,
    interval,
    planned_test_phrase,
    plus_minus,
    print_flag_notes,
    print_notes,
    progress_reporter,
    render_rows_csv,
)
from designcalc.mde import AGREEMENT_Z, MdeRecord, MdeResult, minimum_detectable_effects
from designcalc.scenario import Scenario, load_scenario

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


def _span(values: list[float], text: str = "{:.1%}") -> str:
    """"a" or "a-b" for the finite values, "-" when there are none."""
    finite = sorted(v for v in values if math.isfinite(v))
    if not finite:
        return "-"
    low, high = text.format(finite[0]), text.format(finite[-1])
    return low if low == high else f"{low}-{high}"


def _method_cell(record: MdeRecord) -> str:
    return _METHOD.get(record.method, record.method)


def render_table(result: MdeResult, console: Console, *, scenario: Scenario, precision: float, max_graphs: int) -> None:
    title = f"Minimum detectable effects: {result.scenario_name}" + ("  (PARTIAL: interrupted)" if result.partial else "")
    table = Table(title=title, title_justify="left")
    columns = (
        "estimand", "estimator", "variance", "n", "pi", "reference", "SE ± MC se", "MDE [95% MC]", "MDE (SD units)",
        "verified power ± MC se", "size", "method", "flags",
    )
    for col in columns:
        table.add_column(col, justify="left" if col in ("estimand", "estimator", "variance", "reference", "method", "flags") else "right")
    flag_cells, flag_notes = flag_references([r.flags for r in result.records])
    for r, flag_cell in zip(result.records, flag_cells):
        table.add_row(
            r.estimand, r.estimator, r.variance_estimator, str(r.units), f"{r.treatment_probability:g}", r.reference_distribution,
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
        f"({_span([r.control_sd for r in result.records], '{:.3g}')}). "
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
            f"precision: 95% MC interval half-width {_span(reached)} of the MDE (requested {precision:.1%}, "
            f"at most {max_graphs} graphs per design point)", soft_wrap=True,
        )
    p = result.provenance
    console.print(
        f"replicates per test: {_span([float(r.replicates) for r in result.records], '{:.0f}')} "
        f"({_span([float(r.graphs) for r in result.records], '{:.0f}')} graphs x {p['assignments_per_graph']} assignments); "
        f"Monte Carlo SEs clustered by graph; seed {p['seed_entropy']}; scenario sha256 {str(p['scenario_sha256'])[:12]}...",
        soft_wrap=True,
    )
    print_notes(result, console)


def render_csv(result: MdeResult) -> str:
    rows = []
    for r in result.records:
        row = r.to_dict()
        row["flags"] = "; ".join(r.flags)
        rows.append(row)
    return render_rows_csv(rows, _CSV_FIELDS)


def register(app: typer.Typer) -> None:
    @app.command("mde")
    def mde(
        scenario: Annotated[Path, typer.Argument(help="Scenario file (TOML).")],
        units: Annotated[list[int] | None, typer.Option("--units", "-n", min=4, max=2_000_000, help="Network size(s), overriding population.units; repeat for several.")] = None,
        treatment_probability: Annotated[list[float] | None, typer.Option("--treatment-probability", "-p", help="Treatment probability(ies) in (0, 1); repeat for several.")] = None,
        graphs: Annotated[int | None, typer.Option(min=2, max=1_000_000, help="Graphs per design point to start with.")] = None,
        assignments: Annotated[int | None, typer.Option(min=1, max=100_000, help="Assignments per graph.")] = None,
        seed: Annotated[int | None, typer.Option(min=0, help="Root seed, overriding simulation.seed.")] = None,
        precision: Annotated[float | None, typer.Option(help="Target half-width of the MDE's 95% Monte Carlo interval relative to the MDE, in (0, 0.5]; overrides simulation.relative_precision.")] = None,
        max_graphs: Annotated[int | None, typer.Option(min=2, max=1_000_000, help="Most graphs per design point spent on precision; overrides simulation.max_graphs.")] = None,
        verify: Annotated[bool, typer.Option("--verify/--no-verify", help="Verify each formula MDE by simulation (default), or report the formula only.")] = True,
        output_format: Annotated[str, typer.Option("--format", help="table, json or csv.")] = "table",
    ) -> None:
        """Minimum detectable direct, spillover and total effects of every planned test, verified by simulation."""
        from designcalc.cli.main import stderr_console

        check_format(output_format)
        check_probabilities(treatment_probability, "--treatment-probability")
        check_precision(precision)
        loaded = load_scenario(scenario)
        check_max_graphs(max_graphs, graphs if graphs is not None else loaded.simulation.graphs)
        with progress_reporter(stderr_console(), known_total=False) as report:
            result = minimum_detectable_effects(
                loaded, units=units, treatment_probabilities=treatment_probability, graphs=graphs,
                assignments_per_graph=assignments, seed=seed, relative_precision=precision, max_graphs=max_graphs,
                verify=verify, progress=report,
            )
        requested = loaded.simulation.relative_precision if precision is None else precision
        cap = max(loaded.simulation.max_graphs if max_graphs is None else max_graphs, graphs or loaded.simulation.graphs)

        def table(res: MdeResult, console: Console) -> None:
            render_table(res, console, scenario=loaded, precision=requested, max_graphs=cap)

        emit(result, output_format, table=table, csv_text=render_csv, partial_message="interrupted: showing the design points that finished")

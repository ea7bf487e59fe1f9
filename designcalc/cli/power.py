"""``designcalc power SCENARIO``: the power table of every planned estimator and test."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer
from rich.console import Console
from rich.table import Table

from designcalc.cli.output import (
    check_format,
    check_probabilities,
    emit,
    fmt,
    print_notes,
    progress_reporter,
    render_rows_csv,
)
from designcalc.power import PowerResult, simulate_power
from designcalc.scenario import load_scenario

_CSV_FIELDS = (
    "estimand", "estimator", "variance_estimator", "units", "treatment_probability", "true_effect",
    "true_effect_spread", "mean_estimate", "bias", "bias_mc_se", "sd", "rmse", "mean_standard_error",
    "power", "power_mc_se", "oracle_power", "oracle_power_mc_se", "size", "size_mc_se", "coverage",
    "coverage_mc_se", "reference_distribution", "replicates", "graphs", "flags",
)

def render_table(result: PowerResult, console: Console) -> None:
    table = Table(title=f"Power: {result.scenario_name}" + ("  (PARTIAL: interrupted)" if result.partial else ""), title_justify="left")
    for col in ("estimand", "estimator", "variance", "n", "pi", "true", "bias", "sd", "power ± MC se", "oracle", "size", "coverage", "flags"):
        table.add_column(col, justify="left" if col in ("estimand", "estimator", "variance", "flags") else "right")
    for r in result.records:
        table.add_row(
            r.estimand, r.estimator, r.variance_estimator, str(r.units), f"{r.treatment_probability:g}",
            fmt(r.true_effect), fmt(r.bias), fmt(r.sd), f"{fmt(r.power)} ± {fmt(r.power_mc_se)}",
            fmt(r.oracle_power), fmt(r.size), fmt(r.coverage), "; ".join(r.flags),
        )
    console.print(table)
    p = result.provenance
    console.print(
        f"{p['replicates_per_design_point']} replicates per design point ({p['graphs_per_design_point']} graphs x "
        f"{p['assignments_per_graph']} assignments); Monte Carlo SEs clustered by graph; seed {p['seed_entropy']}; "
        f"scenario sha256 {str(p['scenario_sha256'])[:12]}...", soft_wrap=True,
    )
    used = sorted({r.graphs for r in result.records})
    if used and used != [p["graphs_per_design_point"]]:
        # --adaptive: some design points were given more graphs than the scenario's number.
        console.print(
            f"adaptive: design points used {used[0]}" + (f" to {used[-1]}" if len(used) > 1 else "")
            + " graphs (see the graphs and replicates of each record in --format json or csv)", soft_wrap=True,
        )
    print_notes(result, console)


def render_csv(result: PowerResult) -> str:
    rows = []
    for r in result.records:
        row = r.to_dict()
        row["flags"] = "; ".join(r.flags)
        rows.append(row)
    return render_rows_csv(rows, _CSV_FIELDS)


def register(app: typer.Typer) -> None:
    @app.command("power")
    def power(
        scenario: Annotated[Path, typer.Argument(help="Scenario file (TOML).")],
        units: Annotated[list[int] | None, typer.Option("--units", "-n", min=4, max=2_000_000, help="Network size(s), overriding population.units; repeat for several.")] = None,
        treatment_probability: Annotated[list[float] | None, typer.Option("--treatment-probability", "-p", help="Treatment probability(ies) in (0, 1); repeat for several.")] = None,
        graphs: Annotated[int | None, typer.Option(min=2, max=1_000_000, help="Graphs per design point.")] = None,
        assignments: Annotated[int | None, typer.Option(min=1, max=100_000, help="Assignments per graph.")] = None,
        seed: Annotated[int | None, typer.Option(min=0, help="Root seed, overriding simulation.seed.")] = None,
        adaptive: Annotated[bool, typer.Option("--adaptive", help="Add graphs (doubling, up to simulation.max_graphs) until every test's power is clearly above or below the target or known to within simulation.relative_precision (in power units).")] = False,
        output_format: Annotated[str, typer.Option("--format", help="table, json or csv.")] = "table",
    ) -> None:
        """Simulate power, size and coverage of every planned estimator at every design point."""
        from designcalc.cli.main import stderr_console

        check_format(output_format)
        check_probabilities(treatment_probability, "--treatment-probability")
        loaded = load_scenario(scenario)
        with progress_reporter(stderr_console(), known_total=True) as report:
            result = simulate_power(
                loaded, units=units, treatment_probabilities=treatment_probability, graphs=graphs,
                assignments_per_graph=assignments, seed=seed, progress=report, adaptive=adaptive,
            )
        emit(result, output_format, table=render_table, csv_text=render_csv, partial_message="interrupted: showing the design points that finished")

"""``designcalc power SCENARIO``: the power table of every planned estimator and test."""

from __future__ import annotations

import csv
import io
import json
import math
from pathlib import Path
from typing import Annotated, Optional

import typer
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn, TimeRemainingColumn
from rich.table import Table

from designcalc.power import PowerResult, simulate_power
from designcalc.scenario import load_scenario

_CSV_FIELDS = (
    "estimand", "estimator", "variance_estimator", "units", "treatment_probability", "true_effect",
    "true_effect_spread", "mean_estimate", "bias", "bias_mc_se", "sd", "rmse", "mean_standard_error",
    "power", "power_mc_se", "oracle_power", "oracle_power_mc_se", "size", "size_mc_se", "coverage",
    "coverage_mc_se", "reference_distribution", "replicates", "graphs", "flags",
)


def _fmt(x: float, digits: int = 3) -> str:
    return "-" if x is None or (isinstance(x, float) and math.isnan(x)) else f"{x:.{digits}f}"


def render_table(result: PowerResult, console) -> None:  # type: ignore[no-untyped-def]
    table = Table(title=f"Power: {result.scenario_name}" + ("  (PARTIAL: interrupted)" if result.partial else ""), title_justify="left")
    for col in ("estimand", "estimator", "variance", "n", "pi", "true", "bias", "sd", "power ± MC se", "oracle", "size", "coverage", "flags"):
        table.add_column(col, justify="left" if col in ("estimand", "estimator", "variance", "flags") else "right")
    for r in result.records:
        table.add_row(
            r.estimand, r.estimator, r.variance_estimator, str(r.units), f"{r.treatment_probability:g}",
            _fmt(r.true_effect), _fmt(r.bias), _fmt(r.sd), f"{_fmt(r.power)} ± {_fmt(r.power_mc_se)}",
            _fmt(r.oracle_power), _fmt(r.size), _fmt(r.coverage), "; ".join(r.flags),
        )
    console.print(table)
    p = result.provenance
    console.print(
        f"{p['replicates_per_design_point']} replicates per design point ({p['graphs_per_design_point']} graphs x "
        f"{p['assignments_per_graph']} assignments); Monte Carlo SEs clustered by graph; seed {p['seed_entropy']}; "
        f"scenario sha256 {str(p['scenario_sha256'])[:12]}...", soft_wrap=True,
    )
    for w in result.warnings:
        console.print(f"warning: {w}", soft_wrap=True)
    for c in result.cautions:
        console.print(f"caution: {c}", soft_wrap=True)


def render_csv(result: PowerResult) -> str:
    buffer = io.StringIO()
    writer = csv.DictWriter(buffer, fieldnames=_CSV_FIELDS, extrasaction="ignore", lineterminator="\n")
    writer.writeheader()
    for r in result.records:
        row = r.to_dict()
        row["flags"] = "; ".join(r.flags)
        writer.writerow(row)
    return buffer.getvalue()


def register(app: typer.Typer) -> None:
    @app.command("power")
    def power(
        scenario: Annotated[Path, typer.Argument(help="Scenario file (TOML).")],
        units: Annotated[Optional[list[int]], typer.Option("--units", "-n", min=4, max=2_000_000, help="Network size(s), overriding population.units; repeat for several.")] = None,
        treatment_probability: Annotated[Optional[list[float]], typer.Option("--treatment-probability", "-p", help="Treatment probability(ies) in (0, 1); repeat for several.")] = None,
        graphs: Annotated[Optional[int], typer.Option(min=2, max=1_000_000, help="Graphs per design point.")] = None,
        assignments: Annotated[Optional[int], typer.Option(min=1, max=100_000, help="Assignments per graph.")] = None,
        seed: Annotated[Optional[int], typer.Option(min=0, help="Root seed, overriding simulation.seed.")] = None,
        output_format: Annotated[str, typer.Option("--format", help="table, json or csv.")] = "table",
    ) -> None:
        """Simulate power, size and coverage of every planned estimator at every design point."""
        from designcalc.cli.main import stderr_console, stdout_console
        from designcalc.errors import DesignCalcError

        if output_format not in ("table", "json", "csv"):
            raise DesignCalcError(f"--format must be one of table, json, csv; got {output_format!r}")
        for p in treatment_probability or ():
            if not 0 < p < 1:
                raise DesignCalcError(f"--treatment-probability must be in (0, 1); got {p}")
        loaded = load_scenario(scenario)
        err = stderr_console()
        columns = (TextColumn("simulating"), BarColumn(), MofNCompleteColumn(), TextColumn("graphs"), TimeElapsedColumn(), TextColumn("left"), TimeRemainingColumn())
        with Progress(*columns, console=err, transient=True, disable=not err.is_terminal) as bar:
            task = bar.add_task("power", total=None)

            def report(update) -> None:  # type: ignore[no-untyped-def]
                bar.update(task, total=update.total_graphs, completed=update.finished_graphs)

            result = simulate_power(
                loaded, units=units, treatment_probabilities=treatment_probability, graphs=graphs,
                assignments_per_graph=assignments, seed=seed, progress=report,
            )
        if result.partial:
            err.print("interrupted: showing the design points that finished")
        out = stdout_console()
        if output_format == "json":
            print(json.dumps(result.to_dict(), indent=2, allow_nan=True))
        elif output_format == "csv":
            print(render_csv(result), end="")
        else:
            render_table(result, out)
        if result.partial:
            raise typer.Exit(130)

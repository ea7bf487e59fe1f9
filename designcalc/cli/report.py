"""``designcalc report SCENARIO --out DIR``: the pre-analysis-plan appendix, written atomically."""

from __future__ import annotations

import time
from dataclasses import replace
from pathlib import Path
from typing import Annotated

import typer
from rich.console import Console
from rich.progress import Progress, SpinnerColumn, TextColumn, TimeElapsedColumn

from designcalc.cli.output import (
    Assignments,
    Cluster,
    Clusters,
    ScenarioFile,
    Seed,
    Units,
    Workers,
    check_precision,
    check_probabilities,
    graphs_option,
)
from designcalc.cli.running import NoStore, StorePath, execution
from designcalc.engine import EngineProgress
from designcalc.execution import ClusterConnection
from designcalc.report import ReportSettings, build_report, write_report
from designcalc.report.collect import Report
from designcalc.report.files import check_target
from designcalc.scenario import Scenario, load_scenario
from designcalc.store import ResultStore


def register(app: typer.Typer) -> None:
    @app.command("report")
    def report(
        scenario: ScenarioFile,
        out: Annotated[Path, typer.Option("--out", "-o", help="Folder to write (created; an earlier report there is replaced whole).")],
        units: Units = None,
        clusters: Clusters = None,
        treatment_probability: Annotated[list[float] | None, typer.Option("--treatment-probability", "-p", help="Treatment probability(ies) in (0, 1); repeat for several.")] = None,
        test: Annotated[list[str] | None, typer.Option("--test", help="Key-answer test ESTIMAND[:ESTIMATOR[:VARIANCE]]; repeat for several (default: the first planned test of each estimand).")] = None,
        all_tests: Annotated[bool, typer.Option("--all-tests", help="Solve MDE and sample size for every planned test (slower).")] = False,
        precision: Annotated[float, typer.Option(help="Half-width of the 95% Monte Carlo interval of MDE and required n, relative, in (0, 0.5].")] = 0.1,
        graphs: Annotated[int | None, graphs_option("Graphs per design point, overriding simulation.graphs.")] = None,
        assignments: Assignments = None,
        seed: Seed = None,
        search_graphs: Annotated[int | None, graphs_option("Graphs the sample-size search starts from (default: half of the graphs, at least 8).")] = None,
        max_units: Annotated[int | None, typer.Option(min=8, max=2_000_000, help="Largest network size the sample-size search tries (clustered population: the most clusters).")] = None,
        compare_units: Annotated[int | None, typer.Option(min=4, max=2_000_000, help="Size at which treatment probabilities are compared (default: the middle planned size; clustered population: a number of clusters).")] = None,
        workers: Workers = None,
        cluster: Cluster = None,
        store: StorePath = None,
        no_store: NoStore = False,
    ) -> None:
        """Write the power-analysis appendix: HTML, Markdown, LaTeX, CSV and JSON tables, figures, scenario copy, provenance."""
        from designcalc.cli.main import stderr_console

        check_probabilities(treatment_probability, "--treatment-probability")
        check_precision(precision)
        settings = ReportSettings(
            tests=tuple(test or ()), all_tests=all_tests, precision=precision, search_graphs=search_graphs or 0,
            max_units=max_units, compare_units=compare_units or 0, units=tuple(units or ()), clusters=tuple(clusters or ()),
            treatment_probabilities=tuple(treatment_probability or ()), graphs=graphs, assignments_per_graph=assignments, seed=seed,
        )
        loaded = load_scenario(scenario)
        check_target(out)  # before the simulation, not after it
        console = stderr_console()
        started = time.perf_counter()
        with execution(loaded, workers, cluster, store, no_store) as where:
            result = _build(loaded, replace(settings, workers=where.workers), console, cluster=where.cluster, store=where.store)
        folder = write_report(result, out)
        console.print(f"wrote {folder} in {time.perf_counter() - started:.0f} s: report.html, report.md, tables/, figures/, provenance.json")
        for c in result.power.cautions:
            console.print(f"caution: {c}", soft_wrap=True)


def _build(loaded: Scenario, settings: ReportSettings, console: Console, *, cluster: ClusterConnection | None, store: ResultStore | None) -> Report:
    """Compute the report under a spinner (phase and graph count) on stderr."""
    columns = (SpinnerColumn(), TextColumn("{task.description}:"), TextColumn("{task.completed:.0f} graphs"), TextColumn("elapsed"), TimeElapsedColumn())
    with Progress(*columns, console=console, transient=True, disable=not console.is_terminal) as bar:
        task = bar.add_task("checking", total=None)

        def progress(phase: str, update: EngineProgress) -> None:
            bar.update(task, description=phase, completed=update.finished_graphs)

        return build_report(loaded, settings, progress=progress, cluster=cluster, store=store)

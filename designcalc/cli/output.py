"""What every command shares: options, option checks, number formats, tables, CSV, the progress display, footers.

Nothing here computes a statistic; it only declares and checks options,
draws the library's progress callback and prints results the library
returned.
"""

from __future__ import annotations

import csv
import io
import json
import math
from collections.abc import Callable, Collection, Iterable, Iterator, Mapping, Sequence
from contextlib import contextmanager
from pathlib import Path
from typing import Annotated, Any

import typer
from rich.console import Console
from rich.progress import (
    BarColumn,
    MofNCompleteColumn,
    Progress,
    SpinnerColumn,
    TextColumn,
    TimeElapsedColumn,
    TimeRemainingColumn,
)
from rich.table import Table

from designcalc.engine import EngineProgress
from designcalc.errors import DesignCalcError
from designcalc.scenario import Scenario, load_scenario

__all__ = [
    "FORMATS",
    "Assignments",
    "FiguresDir",
    "Workers",
    "Cluster",
    "OutputFormat",
    "ScenarioFile",
    "Seed",
    "TreatmentProbabilities",
    "Units",
    "check_figures_dir",
    "check_format",
    "check_max_graphs",
    "check_precision",
    "check_probabilities",
    "emit",
    "flag_references",
    "fmt",
    "graphs_option",
    "interval",
    "load_checked",
    "new_table",
    "partial_mark",
    "planned_test_phrase",
    "plus_minus",
    "precision_settings",
    "print_flag_notes",
    "print_footer",
    "print_notes",
    "progress_reporter",
    "records_csv",
    "render_rows_csv",
    "simulate_with_progress",
    "span",
    "write_figures",
]

FORMATS = ("table", "json", "csv")

# Options that mean the same in every command that has them, declared once.
ScenarioFile = Annotated[Path, typer.Argument(help="Scenario file (TOML).")]
Units = Annotated[
    list[int] | None,
    typer.Option("--units", "-n", min=4, max=2_000_000, help="Network size(s), overriding population.units; repeat for several."),
]
Clusters = Annotated[
    list[int] | None,
    typer.Option("--clusters", "-c", min=2, max=100_000, help="Number(s) of clusters of a clustered population, overriding population.clusters; repeat for several."),
]
TreatmentProbabilities = Annotated[
    list[float] | None,
    typer.Option("--treatment-probability", "-p", help="Treatment probability(ies) in (0, 1); repeat for several."),
]
Assignments = Annotated[int | None, typer.Option(min=1, max=100_000, help="Assignments per graph.")]
Seed = Annotated[int | None, typer.Option(min=0, help="Root seed, overriding simulation.seed.")]
OutputFormat = Annotated[str, typer.Option("--format", help="table, json or csv.")]
Workers = Annotated[
    int | None,
    typer.Option("--workers", "-w", min=1, max=1024, help="Local worker processes (default: every core). A speed knob: the numbers are the same for any count."),
]
Cluster = Annotated[
    str | None,
    typer.Option("--cluster", help="Run the simulation on a dask.distributed scheduler at this address (tcp://HOST:8786), or 'local' for a local dask cluster; needs the designcalc[cluster] extra. Same numbers."),
]
FiguresDir = Annotated[
    Path | None,
    typer.Option("--figures", help="Also write this command's figure (PNG and SVG) into this folder; created if missing."),
]


def check_figures_dir(folder: Path | None) -> None:
    """``--figures`` must name a folder (or a new one under an existing folder); checked before any simulation."""
    if folder is None:
        return
    if folder.exists() and not folder.is_dir():
        raise DesignCalcError(f"--figures {folder}: a file of that name exists; give a folder")
    if not folder.exists() and not folder.absolute().parent.is_dir():
        raise DesignCalcError(f"--figures {folder}: the parent folder {folder.absolute().parent} does not exist")


def write_figures(folder: Path | None, make: Callable[[], Mapping[str, Any]]) -> None:
    """Save the figures ``make()`` returns (stem -> matplotlib figure) as PNG and SVG in ``folder``; paths go to stderr."""
    if folder is None:
        return
    from designcalc.cli.main import stderr_console
    from designcalc.figures import save_figure

    folder.mkdir(exist_ok=True)
    console = stderr_console()
    figures = make()
    if not figures:
        console.print("--figures: nothing to draw (no finished results)")
    for stem, fig in figures.items():
        paths = save_figure(fig, folder / stem)
        console.print("figure: " + ", ".join(str(p) for p in paths), soft_wrap=True)


def graphs_option(help_text: str) -> Any:
    """A number of graphs (``--graphs``, ``--max-graphs``): the same range everywhere, help in the command's terms."""
    return typer.Option(min=2, max=1_000_000, help=help_text)


def check_format(output_format: str) -> None:
    """Reject an unknown ``--format`` with the allowed values."""
    if output_format not in FORMATS:
        raise DesignCalcError(f"--format must be one of {', '.join(FORMATS)}; got {output_format!r}")


def check_probabilities(values: Sequence[float] | None, option: str) -> None:
    """Every treatment probability given on the command line must lie in (0, 1)."""
    for p in values or ():
        if not 0 < p < 1:
            raise DesignCalcError(f"{option} must be in (0, 1); got {p}")


def check_precision(value: float | None) -> None:
    """``--precision`` is a relative half-width: in (0, 0.5]."""
    if value is not None and not (0 < value <= 0.5):
        raise DesignCalcError(
            f"--precision must be in (0, 0.5] (the half-width of the 95% Monte Carlo interval relative to the answer, "
            f"e.g. 0.05 for ±5%); got {value}"
        )


def check_max_graphs(max_graphs: int | None, graphs: int) -> None:
    """``--max-graphs`` caps the graphs added for precision, so it cannot be below the starting number."""
    if max_graphs is not None and max_graphs < graphs:
        raise DesignCalcError(f"--max-graphs must be at least the number of graphs per design point ({graphs}); got {max_graphs}")


def load_checked(
    path: Path,
    output_format: str,
    probabilities: Sequence[float] | None,
    *,
    probability_option: str = "--treatment-probability",
    precision: float | None = None,
    max_graphs: int | None = None,
    graphs: int | None = None,
) -> Scenario:
    """Check a command's options, load its scenario, then check what needs the scenario (``--max-graphs``).

    The options are checked before the file is read, so a wrong option is
    reported even when the file is wrong too.
    """
    check_format(output_format)
    check_probabilities(probabilities, probability_option)
    check_precision(precision)
    scenario = load_scenario(path)
    check_max_graphs(max_graphs, graphs if graphs is not None else scenario.simulation.graphs)
    return scenario


def precision_settings(scenario: Scenario, precision: float | None, max_graphs: int | None, graphs: int | None) -> tuple[float, int]:
    """The relative precision asked for and the most graphs per design point, as a solver's footer states them."""
    requested = scenario.simulation.relative_precision if precision is None else precision
    cap = max(scenario.simulation.max_graphs if max_graphs is None else max_graphs, graphs or scenario.simulation.graphs)
    return requested, cap


def size_label(record: Any) -> str:
    """A record's size: its units, or for a clustered population its clusters and nominal units."""
    clusters = getattr(record, "clusters", 0)
    return f"{clusters} (~{record.units} units)" if clusters else str(record.units)


def fmt(x: float | None, digits: int = 3) -> str:
    """A number with ``digits`` decimals, or "-" for a missing value."""
    return "-" if x is None or (isinstance(x, float) and math.isnan(x)) else f"{x:.{digits}f}"


def plus_minus(value: float, se: float, digits: int = 3) -> str:
    """``value ± se``; "-" when there is no value (e.g. a power that was not simulated)."""
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "-"
    return f"{fmt(value, digits)} ± {fmt(se, digits)}"


def _significant(x: float) -> str:
    return "-" if x is None or not math.isfinite(x) else f"{x:.4g}"


def interval(value: float, low: float, high: float) -> str:
    """``value [low, high]`` with four significant figures; "-" when there is no value."""
    if value is None or not math.isfinite(value):
        return "-"
    if not (math.isfinite(low) and math.isfinite(high)):
        return _significant(value)
    return f"{_significant(value)} [{_significant(low)}, {_significant(high)}]"


def span(values: Iterable[float], text: str) -> str:
    """"a" or "a-b" for the smallest and largest finite values in the format ``text``, "-" when there are none."""
    finite = sorted(v for v in values if math.isfinite(v))
    if not finite:
        return "-"
    low, high = text.format(finite[0]), text.format(finite[-1])
    return low if low == high else f"{low}-{high}"


def partial_mark(result: Any) -> str:
    """The suffix of a table's title when the run was interrupted."""
    return "  (PARTIAL: interrupted)" if result.partial else ""


def new_table(title: str | None, columns: Sequence[str], left: Collection[str]) -> Table:
    """A table with a left-justified title; the ``left`` columns (text) left-aligned, the others (numbers) right-aligned."""
    table = Table(title=title, title_justify="left")
    for col in columns:
        table.add_column(col, justify="left" if col in left else "right")
    return table


def render_rows_csv(rows: Iterable[Mapping[str, Any]], fields: Sequence[str]) -> str:
    """A CSV table with a header; fields missing from a row are left empty, extra keys ignored."""
    buffer = io.StringIO()
    writer = csv.DictWriter(buffer, fieldnames=list(fields), extrasaction="ignore", lineterminator="\n")
    writer.writeheader()
    for row in rows:
        writer.writerow(row)
    return buffer.getvalue()


def records_csv(
    records: Iterable[Any], fields: Sequence[str], extra: Callable[[Any], Mapping[str, Any]] | None = None
) -> str:
    """A CSV of result records: each record's ``to_dict()``, its flags joined by "; ", and ``extra(record)``'s columns."""
    rows = []
    for record in records:
        row = record.to_dict()
        row["flags"] = "; ".join(record.flags)
        if extra is not None:
            row.update(extra(record))
        rows.append(row)
    return render_rows_csv(rows, fields)


def flag_references(flag_lists: Sequence[Sequence[str]]) -> tuple[list[str], list[str]]:
    """Number the distinct flags of a table's rows: a short cell per row ("1, 3") and the notes in order.

    The solvers' flags are sentences (why a test cannot reach the target,
    how a search went); printed once below the table they keep it readable.
    """
    numbers: dict[str, int] = {}
    cells = []
    for flags in flag_lists:
        for flag in flags:
            numbers.setdefault(flag, len(numbers) + 1)
        cells.append(", ".join(str(n) for n in sorted({numbers[f] for f in flags})))
    return cells, list(numbers)


def print_flag_notes(notes: Sequence[str], console: Console) -> None:
    for number, note in enumerate(notes, start=1):
        console.print(f"flag {number}: {note}", soft_wrap=True)


@contextmanager
def progress_reporter(console: Console, *, known_total: bool = True) -> Iterator[Callable[[EngineProgress], None]]:
    """A rich progress display on ``console`` (stderr), yielding the library's progress callback.

    With ``known_total`` (the power table) it is a bar with graphs done of
    the total and time left; the solvers do not know in advance how many
    graphs they will simulate (``EngineProgress.total_graphs == 0``), so
    they get a spinner, the count of graphs simulated and the elapsed time.
    Nothing is drawn when stderr is not a terminal.
    """
    if known_total:
        columns: tuple[Any, ...] = (
            TextColumn("simulating"), BarColumn(), MofNCompleteColumn(), TextColumn("graphs"),
            TimeElapsedColumn(), TextColumn("left"), TimeRemainingColumn(),
        )
    else:
        columns = (SpinnerColumn(), TextColumn("simulating:"), TextColumn("{task.completed:.0f} graphs"), TextColumn("elapsed"), TimeElapsedColumn())
    with Progress(*columns, console=console, transient=True, disable=not console.is_terminal) as bar:
        task = bar.add_task("simulate", total=None)

        def report(update: EngineProgress) -> None:
            total = update.total_graphs if update.total_graphs > 0 else None
            bar.update(task, total=total, completed=update.finished_graphs)

        yield report


def print_notes(result: Any, console: Console) -> None:
    """The result's warnings, then its cautions, one line each."""
    for w in result.warnings:
        console.print(f"warning: {w}", soft_wrap=True)
    for c in result.cautions:
        console.print(f"caution: {c}", soft_wrap=True)


def print_footer(result: Any, console: Console, replicates: str, *, after: Sequence[str] = ()) -> None:
    """A table's closing lines: the replicates with the seed and scenario hash, the lines ``after``, the notes.

    ``replicates`` says how the Monte Carlo was run (e.g. "12 replicates per
    design point (3 graphs x 4 assignments)"); the notes are the result's
    warnings and cautions.
    """
    p = result.provenance
    console.print(
        f"{replicates}; Monte Carlo SEs clustered by graph; seed {p['seed_entropy']}; "
        f"scenario sha256 {str(p['scenario_sha256'])[:12]}...",
        soft_wrap=True,
    )
    for line in after:
        console.print(line, soft_wrap=True)
    print_notes(result, console)


def planned_test_phrase(design: Any) -> str:
    """The planned test in words, e.g. "80% power, two-sided alpha 0.05"."""
    sides = "two-sided" if design.alternative == "two-sided" else f"one-sided ({design.alternative})"
    return f"{design.target_power:.0%} power, {sides} alpha {design.significance_level:g}"


_PARTIAL_MESSAGE = "interrupted: showing the design points that finished"


def emit(
    result: Any,
    output_format: str,
    *,
    table: Callable[[Any, Console], None],
    csv_text: Callable[[Any], str],
    partial_message: str = _PARTIAL_MESSAGE,
) -> None:
    """Print ``result`` on stdout in the requested format; a partial result ends with exit code 130."""
    from designcalc.cli.main import stderr_console, stdout_console

    if result.partial:
        stderr_console().print(partial_message)
    if output_format == "json":
        print(json.dumps(result.to_dict(), indent=2, allow_nan=True))
    elif output_format == "csv":
        print(csv_text(result), end="")
    else:
        table(result, stdout_console())
    if result.partial:
        raise typer.Exit(130)



def simulate_with_progress(solve: Callable[..., Any], *, known_total: bool) -> Any:
    """``solve(progress=...)`` under the progress display on stderr (see :func:`progress_reporter`); its result."""
    from designcalc.cli.main import stderr_console

    with progress_reporter(stderr_console(), known_total=known_total) as report:
        return solve(progress=report)

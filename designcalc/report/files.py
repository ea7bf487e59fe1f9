"""Write a report folder atomically: built beside the target, renamed into place.

The folder is assembled in a hidden sibling directory (same file system, so
the final rename is atomic); an exception or Ctrl-C while writing removes it
and leaves any earlier report untouched.  An existing folder is replaced
only if it is empty or an earlier designcalc report (it holds
``report.json``), never a folder of the user's own files.

Layout::

    DIR/report.html          self-contained: inline styles and SVG figures
    DIR/report.md            Markdown, figures linked from figures/
    DIR/report.json          every table's raw numbers, the solvers' full results, provenance
    DIR/provenance.json      tool and library versions, scenario SHA-256, seed, stream layout, replicates, time
    DIR/scenario/NAME.toml   the scenario as read, under its own file name (so the reproduce line gives the same name)
    DIR/tables/ID.csv|.json|.tex   each table (LaTeX: booktabs tabular)
    DIR/figures/NAME.png|.svg
"""

from __future__ import annotations

import json
import os
import shutil
import tempfile
from collections.abc import Callable
from pathlib import Path

from designcalc.errors import DesignCalcError
from designcalc.atomic import current_umask
from designcalc.figures import (
    mde_probability_figure,
    network_figure,
    power_curve_figure,
    sampling_distribution_figure,
    save_figure,
    svg_text,
)
from designcalc.report.collect import Report
from designcalc.report.render import (
    FIGURES,
    render_csv,
    render_html,
    render_json,
    render_latex,
    render_markdown,
    reproduce_command,
    scenario_copy_path,
    surveyed_copies,
)
from designcalc.report.tables import report_tables

__all__ = ["MARKER_FILE", "check_target", "report_data", "report_figures", "write_report"]

MARKER_FILE = "report.json"
REPORT_FORMAT = "designcalc report"



def report_figures(report: Report) -> dict[str, object]:
    """The report's matplotlib figures by file stem (only those with something to draw)."""
    s = report.scenario
    figures: dict[str, object] = {}
    curves = [r for r in report.size.records if r.points]
    if curves:
        figures["power_curves"] = power_curve_figure(curves, target_power=s.design.target_power, title=f"{s.name}: power against sample size")
    if report.compare.rows:
        figures["mde_by_probability"] = mde_probability_figure(report.compare.rows, title=f"{s.name}: MDE against treatment probability")
    if report.samples:
        p = report.sample_point
        figures["sampling_distributions"] = sampling_distribution_figure(
            report.samples, title=f"Sampling distributions at {p.units} units, treatment probability {p.treatment_probability:g}",
        )
    net = report.network
    figures["network"] = network_figure(
        net.adjacency, treated=net.treated, groups=net.groups, types=net.types, seed=s.simulation.seed % (2**32),
        title=f"One simulated network: mean degree {net.mean_degree:.1f}, treatment probability {net.point.treatment_probability:g}",
    )
    return figures


def report_data(report: Report, tables: list, figure_stems: list[str]) -> dict[str, object]:
    """The JSON data model of a report: what every other file shows, with full precision."""

    def without_time(result: dict[str, object]) -> dict[str, object]:
        out = dict(result)
        prov = dict(out.get("provenance", {}))  # type: ignore[arg-type]
        prov.pop("utc_time", None)  # the report has one time stamp, in its own provenance
        out["provenance"] = prov
        return out

    return {
        "format": REPORT_FORMAT,
        "format_version": 1,
        "scenario": report.scenario.name,
        "provenance": report.provenance,
        "key_answer_tests": [":".join(k) for k in report.tests],
        "warnings": list(report.warnings),
        "cautions": list(report.power.cautions),
        "tables": {t.id: t.to_dict() for t in tables},
        "figures": figure_stems,
        "reproduce": reproduce_command(report),
        "results": {
            "power": without_time(report.power.to_dict()),
            "mde": without_time(report.mde.to_dict()),
            "size": without_time(report.size.to_dict()),
            "compare": without_time(report.compare.to_dict()),
        },
    }


def _is_report(folder: Path) -> bool:
    """An earlier designcalc report: its report.json parses and says so (a file name alone is not enough)."""
    try:
        data = json.loads((folder / MARKER_FILE).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return False
    return isinstance(data, dict) and data.get("format") == REPORT_FORMAT


def check_target(out: Path) -> None:
    """Refuse a target that is a file, a folder of the user's own files, or under a missing or read-only parent (before any work)."""
    out = Path(out).absolute()
    if out.exists() and not out.is_dir():
        raise DesignCalcError(f"--out {out}: a file of that name exists; give a folder name")
    if not out.parent.is_dir():
        raise DesignCalcError(f"--out {out}: the parent folder {out.parent} does not exist")
    if not os.access(out.parent, os.W_OK | os.X_OK):
        raise DesignCalcError(f"--out {out}: cannot write in the parent folder {out.parent} (permission denied)")
    try:
        foreign = out.is_dir() and any(out.iterdir()) and not _is_report(out)
    except OSError as exc:
        raise DesignCalcError(f"--out {out}: cannot read the folder ({exc.strerror})") from None
    if foreign:
        raise DesignCalcError(
            f"--out {out}: the folder exists and is not an earlier designcalc report (no designcalc {MARKER_FILE}); "
            "give a new or empty folder so that nothing of yours is overwritten"
        )


def write_report(report: Report, out: Path, *, on_file: Callable[[Path], None] | None = None) -> Path:
    """Write every file of the report into folder ``out``, atomically (module docstring).

    ``on_file`` is called after each file is written inside the temporary
    folder (the tests interrupt there).  Returns ``out``.
    """
    out = Path(out).absolute()
    check_target(out)
    try:
        staging = Path(tempfile.mkdtemp(prefix=f".{out.name}.partial-", dir=out.parent))
    except OSError as exc:
        raise DesignCalcError(f"--out {out}: cannot create a folder in {out.parent} ({exc.strerror})") from None
    os.chmod(staging, 0o777 & ~current_umask())  # mkdtemp makes 0700; the report folder gets the usual permissions
    try:
        _write_all(report, staging, on_file or (lambda path: None))
        _swap_into_place(staging, out)
    except OSError as exc:
        shutil.rmtree(staging, ignore_errors=True)
        raise DesignCalcError(f"--out {out}: could not write the report ({exc}); nothing was changed") from None
    except BaseException:
        shutil.rmtree(staging, ignore_errors=True)
        raise
    return out


def _swap_into_place(staging: Path, out: Path) -> None:
    if not out.exists():
        os.rename(staging, out)
        return
    # Move the old report aside first, then the new one in: at every moment
    # `out` is either the complete old report or the complete new one.
    old = Path(tempfile.mkdtemp(prefix=f".{out.name}.old-", dir=out.parent))
    os.rmdir(old)
    try:
        os.rename(out, old)
        os.rename(staging, out)
    except BaseException:
        # Interrupted between the two renames: put the old report back.
        if not out.exists() and old.exists():
            os.rename(old, out)
        raise
    try:
        shutil.rmtree(old, ignore_errors=True)
    except KeyboardInterrupt:
        # The new report is complete; finish removing the old one before passing the interrupt on.
        shutil.rmtree(old, ignore_errors=True)
        raise


def _write_all(report: Report, folder: Path, on_file: Callable[[Path], None]) -> None:
    def write(relative: str, content: str | bytes) -> None:
        path = folder / relative
        path.parent.mkdir(parents=True, exist_ok=True)
        if isinstance(content, bytes):
            path.write_bytes(content)
        else:
            path.write_text(content, encoding="utf-8", newline="\n")
        on_file(path)

    tables = report_tables(report)
    figures = report_figures(report)
    stems = [stem for stem, _, _ in FIGURES if stem in figures]
    (folder / "figures").mkdir()
    svgs = {}
    for stem in stems:
        fig = figures[stem]
        for path in save_figure(fig, folder / "figures" / stem):  # type: ignore[arg-type]
            on_file(path)
        svgs[stem] = svg_text(fig)  # type: ignore[arg-type]
    for t in tables:
        write(f"tables/{t.id}.csv", render_csv(t))
        write(f"tables/{t.id}.tex", render_latex(t))
        write(f"tables/{t.id}.json", render_json(t.to_dict()))
    # The text the scenario was parsed from (its SHA-256 is the provenance's), never a re-read of a
    # file that may have changed or be another file of the same name in the current folder.
    write(scenario_copy_path(report), report.scenario.text.encode("utf-8"))
    for name, data in surveyed_copies(report):
        write(name, data)  # the edge lists as read, where the copied scenario looks for them
    write("provenance.json", render_json(report.provenance))
    write("report.md", render_markdown(report, tables, stems))
    write("report.html", render_html(report, tables, svgs))
    write(MARKER_FILE, render_json(report_data(report, tables, stems)))  # last: marks a complete report

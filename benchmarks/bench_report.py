"""Time of ``designcalc report`` on each demo scenario, by phase.

A plain script, not a test: ``python benchmarks/bench_report.py`` (``--help``
for options).  For each scenario it builds the report with the default
settings (key answers for the first planned test of each estimand, ±10%
precision), writes it to a temporary folder and prints the wall time of each
phase (power table, MDE, sample size, treatment-probability comparison,
writing tables and figures), the total and the size of the folder.  The
issue's target: under 2 minutes per demo report on this 2-core machine.
"""

from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

from designcalc import load_scenario
from designcalc.engine import EngineProgress
from designcalc.execution import available_workers
from designcalc.report import ReportSettings, build_report, write_report

ROOT = Path(__file__).resolve().parents[1]
DEMOS = ("lake_orrin_savings.toml", "marrow_valley_hygiene.toml")


def bench(path: Path, precision: float, workers: int) -> None:
    scenario = load_scenario(path)
    marks: dict[str, list[float]] = {}

    def progress(phase: str, update: EngineProgress) -> None:
        now = time.perf_counter()
        marks.setdefault(phase, [now, now, 0])[1:] = [now, update.finished_graphs]

    start = time.perf_counter()
    report = build_report(scenario, ReportSettings(precision=precision, workers=workers), progress=progress)
    built = time.perf_counter()
    with tempfile.TemporaryDirectory() as tmp:
        out = write_report(report, Path(tmp) / "report")
        written = time.perf_counter()
        size = sum(p.stat().st_size for p in out.rglob("*") if p.is_file())
    print(f"{path.name}: total {written - start:.1f} s (build {built - start:.1f} s, write {written - built:.1f} s), folder {size / 1e6:.1f} MB")
    previous = start
    for phase, (first, last, graphs) in marks.items():
        # A phase runs from the end of the previous one to its last progress call.
        print(f"  {phase:<28} {last - previous:6.1f} s  {int(graphs):>5} graphs")
        previous = last
    print(f"  {'network, tables, figures':<28} {written - previous:6.1f} s")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("scenarios", nargs="*", type=Path, default=[ROOT / "scenarios" / d for d in DEMOS])
    parser.add_argument("--precision", type=float, default=0.1)
    parser.add_argument("--workers", type=int, default=available_workers(), help="local processes (default: every core, as the command line)")
    args = parser.parse_args()
    for path in args.scenarios:
        print(f"{args.workers} worker(s)")
        bench(path, args.precision, args.workers)


if __name__ == "__main__":
    main()

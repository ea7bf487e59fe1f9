"""Cost of ``designcalc mde``, ``size`` and ``compare`` relative to one power table.

A plain script, not a test: ``python benchmarks/bench_solvers.py`` (``--help``
for options).  On a demo scenario it times, side by side in one run, the
default power table (every planned size and treatment probability), the MDE
table (null pass, verification, search, adaptive precision), the required
sample size and the treatment-probability comparison, and prints each time
and its ratio to the power table (targets from the issue: mde at most 1.5x,
size at most 3x).  Also prints how many graphs each solver simulated and
the precision it reached, since cost follows precision.

With the defaults (lake_orrin_savings, relative precision 0.03) the size
search dominates: about 10-15 minutes on two cores.  ``--precision 0.1``
shows the cost of a quick look.
"""

from __future__ import annotations

import argparse
import math
import time
from pathlib import Path

from designcalc import (
    compare_treatment_probabilities,
    load_scenario,
    minimum_detectable_effects,
    required_sample_size,
    simulate_power,
)

HERE = Path(__file__).resolve().parent


def _timed(label: str, run):  # type: ignore[no-untyped-def]
    graphs = 0

    def count(update) -> None:  # type: ignore[no-untyped-def]
        nonlocal graphs
        graphs = update.finished_graphs

    start = time.perf_counter()
    result = run(count)
    seconds = time.perf_counter() - start
    print(f"  {label:<28} {seconds:8.1f} s   graphs simulated: {graphs}")
    return result, seconds


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--scenario", type=Path, default=HERE.parent / "scenarios" / "lake_orrin_savings.toml")
    parser.add_argument("--precision", type=float, default=None, help="relative precision for mde and size (default: the scenario's)")
    parser.add_argument("--skip-size", action="store_true", help="leave out the (slow) size search")
    args = parser.parse_args()
    scenario = load_scenario(args.scenario)
    precision = args.precision if args.precision is not None else scenario.simulation.relative_precision
    print(f"scenario {args.scenario.name}: units {list(scenario.population.units)}, "
          f"pi {list(scenario.design.treatment_probabilities)}, {scenario.simulation.graphs} graphs x "
          f"{scenario.simulation.assignments_per_graph} assignments, relative precision {precision:g}")
    _, power_s = _timed("power table", lambda cb: simulate_power(scenario, progress=cb))
    mde, mde_s = _timed("mde table", lambda cb: minimum_detectable_effects(scenario, relative_precision=precision, progress=cb))
    _, compare_s = _timed("compare (9-point pi grid)", lambda cb: compare_treatment_probabilities(scenario, progress=cb))
    size_s = math.nan
    size = None
    if not args.skip_size:
        size, size_s = _timed("size", lambda cb: required_sample_size(scenario, relative_precision=precision, progress=cb))
    print()
    print(f"  mde / power     = {mde_s / power_s:6.2f}   (target <= 1.5)")
    print(f"  compare / power = {compare_s / power_s:6.2f}")
    if size is not None:
        print(f"  size / power    = {size_s / power_s:6.2f}   (target <= 3)")
    print()
    methods: dict[str, int] = {}
    for r in mde.records:
        methods[r.method] = methods.get(r.method, 0) + 1
    reached = [r.relative_precision for r in mde.records if math.isfinite(r.relative_precision)]
    print(f"  mde: {len(mde.records)} records, methods {methods}, precision reached up to ±{max(reached):.1%}")
    if size is not None:
        statuses: dict[str, int] = {}
        for r in size.records:
            statuses[r.status] = statuses.get(r.status, 0) + 1
        largest = max((r.verified_units or 0) for r in size.records)
        print(f"  size: {len(size.records)} records, {statuses}, largest verified n {largest:,}")


if __name__ == "__main__":
    main()

"""Wall time of the demo power table on 1 and on N local workers, side by side, with identical results.

A plain script, not a test: ``python benchmarks/bench_parallel.py [--workers N] [--repeats R]``.
Runs ``simulate_power`` on the Lake Orrin demo (3 sizes x 2 probabilities,
40 graphs x 25 assignments, 17 planned tests) in-process (1 worker) and on a
local process pool, alternating the two R times so that machine noise hits
both alike, prints each time, the best-of-R speed-up and whether the two
results are equal (they must be: workers are a speed knob only).  The
issue's target: 2 workers at least 1.8x one worker.
"""

from __future__ import annotations

import argparse
import json
import time
from pathlib import Path

from designcalc import load_scenario, simulate_power
from designcalc.execution import available_workers

ROOT = Path(__file__).resolve().parents[1]


def canonical(result) -> str:
    d = result.to_dict()
    d["provenance"].pop("utc_time", None)
    return json.dumps(d, sort_keys=True)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--scenario", type=Path, default=ROOT / "scenarios" / "lake_orrin_savings.toml")
    parser.add_argument("--workers", type=int, default=max(2, available_workers()))
    parser.add_argument("--repeats", type=int, default=2)
    args = parser.parse_args()
    scenario = load_scenario(args.scenario)
    times: dict[int, list[float]] = {1: [], args.workers: []}
    results = {}
    for _ in range(args.repeats):
        for workers in (1, args.workers):
            start = time.perf_counter()
            results[workers] = simulate_power(scenario, workers=workers)
            times[workers].append(time.perf_counter() - start)
    for workers, values in times.items():
        print(f"{workers} worker(s): " + ", ".join(f"{t:.2f} s" for t in values))
    speedup = min(times[1]) / min(times[args.workers])
    print(f"speed-up of {args.workers} workers over 1 (best of {args.repeats}): {speedup:.2f}x on {available_workers()} cores")
    print("results identical:", canonical(results[1]) == canonical(results[args.workers]))


if __name__ == "__main__":
    main()

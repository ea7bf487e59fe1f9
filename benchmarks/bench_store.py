"""What the results store costs and saves on the demo power table, side by side in one run.

A plain script, not a test: ``python benchmarks/bench_store.py [--workers N]``.
Runs ``simulate_power`` on the Lake Orrin demo (3 sizes x 2 probabilities,
40 graphs x 25 assignments, 17 planned tests) three ways on the same
workers: without a store, with an empty store (every graph computed and
written: the store's overhead), and again with the now-full store (every
graph read: what a rerun costs); then with twice the graphs on the full
store (half read, half computed).  Prints each time, the store's size and
whether every result equals the run without a store (it must).  About a
minute on two cores.
"""

from __future__ import annotations

import argparse
import json
import tempfile
import time
from pathlib import Path

from designcalc import load_scenario, simulate_power
from designcalc.execution import available_workers
from designcalc.store import ResultStore

ROOT = Path(__file__).resolve().parents[1]


def canonical(result) -> str:
    d = result.to_dict()
    d["provenance"].pop("utc_time", None)
    return json.dumps(d, sort_keys=True)


def timed(label: str, run):
    start = time.perf_counter()
    result = run()
    seconds = time.perf_counter() - start
    print(f"{label:<46} {seconds:7.2f} s")
    return result, seconds


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--scenario", type=Path, default=ROOT / "scenarios" / "lake_orrin_savings.toml")
    parser.add_argument("--workers", type=int, default=available_workers())
    args = parser.parse_args()
    scenario = load_scenario(args.scenario)
    graphs = scenario.simulation.graphs
    simulate_power(scenario, workers=args.workers, graphs=2, units=[600])  # warm-up: imports, first pool, first eigen-solve
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / "results.sqlite"
        plain, t_plain = timed("no store", lambda: simulate_power(scenario, workers=args.workers))
        with ResultStore(path) as store:
            first, t_first = timed("empty store (compute and write every graph)", lambda: simulate_power(scenario, workers=args.workers, store=store))
            again, t_again = timed("full store (read every graph)", lambda: simulate_power(scenario, workers=args.workers, store=store))
            print(f"store: {path.stat().st_size / 1e6:.1f} MB for {store.computed} graphs; reused {store.reused} on the rerun")
        more_plain, _ = timed(f"no store, {2 * graphs} graphs", lambda: simulate_power(scenario, workers=args.workers, graphs=2 * graphs))
        with ResultStore(path) as store:
            more, _ = timed(f"full store, {2 * graphs} graphs (half stored)", lambda: simulate_power(scenario, workers=args.workers, store=store, graphs=2 * graphs))
            print(f"  reused {store.reused}, computed {store.computed}")
    print(f"store overhead when computing everything: {t_first / t_plain - 1:+.1%}; a full rerun takes {t_again / t_plain:.1%} of the time")
    print("results identical:", canonical(plain) == canonical(first) == canonical(again) and canonical(more_plain) == canonical(more))


if __name__ == "__main__":
    main()

"""Where graphs are simulated: in this process, a pool of local worker processes, or a dask cluster.

A task is one graph of one design point, ``(point, graph_index)``.  Its
random numbers come from the seed tree keyed by that content
(``engine._graph_streams`` / ``_assignment_streams``), never from the worker
that runs it, so every backend and worker count gives *identical* results;
only the wall time changes.  Results come back in task order.

BLAS threads: ``engine.simulate_graph`` runs every graph with one BLAS
thread (threadpoolctl), wherever it runs.  Processes are the unit of
parallelism; two workers each spinning two OpenBLAS threads on two cores
made the pool slower than one process (measured: 0.96x), and one thread
everywhere keeps the floating-point reductions the same on every backend.

Ctrl-C: workers ignore SIGINT (the terminal sends it to the whole process
group), so only the parent sees it; it cancels what has not started and
raises ``KeyboardInterrupt`` to the caller, which keeps every finished graph.
"""

from __future__ import annotations

import multiprocessing
import os
import signal
from collections.abc import Iterator, Sequence
from concurrent.futures import Future, ProcessPoolExecutor

from designcalc.engine import DesignPoint, GraphDraws, Run, simulate_graph
from designcalc.errors import DesignCalcError
from designcalc.scenario import Scenario

__all__ = ["available_workers", "check_workers", "GraphTask", "simulate_graphs", "LOCAL_CLUSTER"]

#: ``cluster=LOCAL_CLUSTER`` starts a dask ``LocalCluster`` on this machine for the call (tests, trying it out).
LOCAL_CLUSTER = "local"

GraphTask = tuple[DesignPoint, int]

_WORKER_SCENARIO: Scenario | None = None
_WORKER_RUNS: Sequence[Run] | None = None


def available_workers() -> int:
    """The cores this process may use (the default number of workers on the command line)."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # not on Linux
        return max(1, os.cpu_count() or 1)


def check_workers(workers: int) -> int:
    """``workers`` must be a whole number >= 1."""
    if int(workers) != workers or workers < 1:
        raise DesignCalcError(f"`workers` must be a whole number >= 1; got {workers}")
    return int(workers)


def _init_worker(scenario: Scenario, runs: Sequence[Run] | None) -> None:
    global _WORKER_SCENARIO, _WORKER_RUNS
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    _WORKER_SCENARIO, _WORKER_RUNS = scenario, runs


def _run_task(task: GraphTask, batch_size: int) -> GraphDraws:
    assert _WORKER_SCENARIO is not None
    point, g = task
    return simulate_graph(_WORKER_SCENARIO, point, g, runs=_WORKER_RUNS, batch_size=batch_size)


def _run_on_dask(task: GraphTask, scenario: Scenario, runs: Sequence[Run] | None, columns: int) -> GraphDraws:
    point, g = task
    return simulate_graph(scenario, point, g, runs=runs, batch_size=columns)


def _simulate_on_dask(
    scenario: Scenario, tasks: Sequence[GraphTask], cluster: str, batch_size: int, runs: Sequence[Run] | None,
) -> Iterator[GraphDraws]:
    try:
        from distributed import Client, LocalCluster
    except ImportError:
        raise DesignCalcError(
            "--cluster needs dask.distributed, which is not installed; install the extra: pip install 'designcalc[cluster]'"
        ) from None
    local = None
    try:
        if cluster == LOCAL_CLUSTER:
            local = LocalCluster(n_workers=available_workers(), threads_per_worker=1, processes=True, dashboard_address=None)
            client = Client(local)
        else:
            client = Client(cluster, timeout=10)
    except OSError as exc:
        if local is not None:
            local.close()
        raise DesignCalcError(f"--cluster {cluster}: cannot reach the dask scheduler ({exc})") from None
    futures = []
    try:
        # The scenario travels once per worker (scattered), the tasks are tiny.
        shared = client.scatter(scenario, broadcast=True)
        # (Client.map has its own batch_size keyword, hence "columns".)
        futures = client.map(_run_on_dask, list(tasks), scenario=shared, runs=runs, columns=batch_size, pure=False)
        for future in futures:
            yield future.result()
    finally:
        for future in futures:
            future.cancel()
        client.close()
        if local is not None:
            local.close()


def simulate_graphs(
    scenario: Scenario,
    tasks: Sequence[GraphTask],
    *,
    workers: int = 1,
    batch_size: int = 16,
    runs: Sequence[Run] | None = None,
    cluster: str | None = None,
) -> Iterator[GraphDraws]:
    """Yield ``simulate_graph`` for each task, in task order, on ``workers`` processes or a dask cluster.

    ``workers=1`` runs in this process (for debugging and small jobs).  With
    more, a local process pool is started for this call and closed when the
    iterator is exhausted or closed.  ``cluster`` (a dask scheduler address
    such as ``tcp://10.0.0.5:8786``, or ``LOCAL_CLUSTER``) sends the tasks to
    dask.distributed instead (the ``designcalc[cluster]`` extra); ``workers``
    is then ignored.  The numbers are the same on every backend.

    Examples
    --------
    >>> from pathlib import Path
    >>> from designcalc import load_scenario
    >>> s = load_scenario(Path(__file__).parents[1] / "scenarios" / "lake_orrin_savings.toml")
    >>> tasks = [(DesignPoint(200, 0.5), g) for g in range(2)]
    >>> a = [d.estimates for d in simulate_graphs(s, tasks, workers=1)]
    >>> b = [d.estimates for d in simulate_graphs(s, tasks, workers=2)]
    >>> all((x[k] == y[k]).all() for x, y in zip(a, b) for k in x)
    True
    """
    workers = check_workers(workers)
    if cluster is not None:
        if tasks:
            yield from _simulate_on_dask(scenario, tasks, cluster, batch_size, runs)
        return
    if workers == 1 or len(tasks) <= 1:
        for point, g in tasks:
            yield simulate_graph(scenario, point, g, runs=runs, batch_size=batch_size)
        return
    # fork where the platform has it: the scenario reaches the workers without pickling and
    # they start in milliseconds; elsewhere spawn, which pickles it once per worker.
    method = "fork" if "fork" in multiprocessing.get_all_start_methods() else "spawn"
    pool = ProcessPoolExecutor(
        max_workers=min(workers, len(tasks)), mp_context=multiprocessing.get_context(method),
        initializer=_init_worker, initargs=(scenario, runs),
    )
    futures: list[Future[GraphDraws]] = []
    try:
        futures = [pool.submit(_run_task, task, batch_size) for task in tasks]
        for future in futures:
            yield future.result()
    finally:
        # Normal end, Ctrl-C in the parent, or the caller stopped early: drop what has not started.
        for future in futures:
            future.cancel()
        pool.shutdown(wait=True, cancel_futures=True)

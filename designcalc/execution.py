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
group), so only the parent sees it; it cancels what has not started, waits
for the running graphs and raises ``KeyboardInterrupt`` to the caller, which
keeps every finished graph.

With a results store (``designcalc.store``) the stored graphs are read
instead of computed, and every computed graph is written as soon as it
arrives, including graphs that finished out of order when Ctrl-C came.
"""

from __future__ import annotations

import multiprocessing
import os
import signal
from collections.abc import Callable, Iterator, Sequence
from concurrent.futures import Future, ProcessPoolExecutor
from contextlib import closing
from dataclasses import dataclass
from typing import TYPE_CHECKING

from designcalc.engine import DesignPoint, GraphCache, GraphDraws, Run, columns_per_batch, power_runs, simulate_graph
from designcalc.errors import DesignCalcError
from designcalc.scenario import Scenario

if TYPE_CHECKING:
    from designcalc.store import ResultStore

__all__ = ["LOCAL_CLUSTER", "Cluster", "ClusterConnection", "GraphTask", "available_workers", "check_workers", "simulate_graphs"]

#: ``cluster=LOCAL_CLUSTER`` starts a dask ``LocalCluster`` on this machine for the call (tests, trying it out).
LOCAL_CLUSTER = "local"

GraphTask = tuple[DesignPoint, int]
# Called with each graph that finished but was never yielded (the caller stopped early).
Salvage = Callable[[GraphTask, GraphDraws], None] | None



@dataclass(frozen=True)
class GraphJob:
    """How every graph of a call is simulated: which runs, columns per batch, whether to keep units (degrees, types)."""

    runs: Sequence[Run] | None = None
    batch_size: int = 16
    keep_units: bool = False

    def simulate(self, scenario: Scenario, task: GraphTask, cache: GraphCache | None = None) -> GraphDraws:
        point, g = task
        return simulate_graph(scenario, point, g, runs=self.runs, batch_size=self.batch_size, keep_units=self.keep_units, cache=cache)


_WORKER_SCENARIO: Scenario | None = None
_WORKER_JOB: GraphJob | None = None


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


def _init_worker(scenario: Scenario, job: GraphJob) -> None:
    global _WORKER_SCENARIO, _WORKER_JOB
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    _WORKER_SCENARIO, _WORKER_JOB = scenario, job


def _run_task(task: GraphTask) -> GraphDraws:
    assert _WORKER_SCENARIO is not None and _WORKER_JOB is not None
    return _WORKER_JOB.simulate(_WORKER_SCENARIO, task)


def _run_on_dask(task: GraphTask, scenario: Scenario, job: GraphJob) -> GraphDraws:
    return job.simulate(scenario, task)


def _salvage_finished(tasks: Sequence[GraphTask], futures: Sequence[object], start: int, salvage: Salvage) -> None:
    """Hand graphs that finished after the caller stopped reading to ``salvage`` (the store keeps them)."""
    if salvage is None:
        return
    for task, future in zip(tasks[start:], futures[start:]):
        if future.done() and not future.cancelled() and future.exception() is None:  # type: ignore[attr-defined]
            salvage(task, future.result())  # type: ignore[attr-defined]


class ClusterConnection:
    """One dask client for many calls: a size search asks for graphs dozens of times.

    Connecting (or starting a ``LocalCluster``) takes seconds; with a
    connection opened once (``with ClusterConnection(address) as c``) and
    passed as ``cluster=c``, each call only submits its tasks, and each
    scenario is scattered to the workers once.
    """

    def __init__(self, address: str) -> None:
        try:
            from distributed import Client, LocalCluster
        except ImportError:
            raise DesignCalcError(
                "--cluster needs dask.distributed, which is not installed; install the extra: pip install 'designcalc[cluster]'"
            ) from None
        self.address = address
        self._local = None
        try:
            if address == LOCAL_CLUSTER:
                self._local = LocalCluster(n_workers=available_workers(), threads_per_worker=1, processes=True, dashboard_address=None)
                self.client = Client(self._local)
            else:
                self.client = Client(address, timeout=10)
        except OSError as exc:
            if self._local is not None:
                self._local.close()
            raise DesignCalcError(f"--cluster {address}: cannot reach the dask scheduler ({exc})") from None
        # id -> (scenario, its future); the scenario is kept so that its id is never reused.
        self._scattered: dict[int, tuple[Scenario, object]] = {}

    def scattered(self, scenario: Scenario) -> object:
        """The scenario on every worker (sent once per connection)."""
        if id(scenario) not in self._scattered:
            self._scattered[id(scenario)] = (scenario, self.client.scatter(scenario, broadcast=True))
        return self._scattered[id(scenario)][1]

    def close(self) -> None:
        self._scattered.clear()
        self.client.close()
        if self._local is not None:
            self._local.close()

    def __enter__(self) -> ClusterConnection:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


Cluster = str | ClusterConnection


def _simulate_on_dask(
    scenario: Scenario, tasks: Sequence[GraphTask], cluster: Cluster, job: GraphJob, salvage: Salvage = None,
) -> Iterator[GraphDraws]:
    if isinstance(cluster, str):
        with ClusterConnection(cluster) as connection:
            yield from _simulate_on_dask(scenario, tasks, connection, job, salvage)
        return
    futures = []
    yielded = 0
    try:
        futures = cluster.client.map(_run_on_dask, list(tasks), scenario=cluster.scattered(scenario), job=job, pure=False)
        for future in futures:
            result = future.result()
            yielded += 1
            yield result
    finally:
        for future in futures[yielded:]:
            if not future.done():
                future.cancel()
        _salvage_finished(tasks, futures, yielded, salvage)


def simulate_graphs(
    scenario: Scenario,
    tasks: Sequence[GraphTask],
    *,
    workers: int = 1,
    batch_size: int = 16,
    runs: Sequence[Run] | None = None,
    cluster: Cluster | None = None,
    store: ResultStore | None = None,
    keep_units: bool = False,
    cache: GraphCache | None = None,
) -> Iterator[GraphDraws]:
    """Yield ``simulate_graph`` for each task, in task order, on ``workers`` processes or a dask cluster.

    ``workers=1`` runs in this process (for debugging and small jobs).  With
    more, a local process pool is started for this call and closed when the
    iterator is exhausted or closed.  ``cluster`` (a dask scheduler address
    such as ``tcp://10.0.0.5:8786``, ``LOCAL_CLUSTER``, or a
    ``ClusterConnection`` to reuse across calls) sends the tasks to
    dask.distributed instead (the ``designcalc[cluster]`` extra); ``workers``
    is then ignored.  The numbers are the same on every backend.  With a
    ``store`` (``designcalc.store.ResultStore``), stored graphs are read, not
    computed, and each computed graph is stored as it arrives.
    ``keep_units`` keeps each graph's degrees and types in its draws (as
    ``simulate_graph``).  ``cache`` (an ``engine.GraphCache``) is used for
    the graphs computed in this process (``workers=1``, no cluster): a
    solver's later passes then skip sampling and eigenvectors.

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
    job = GraphJob(power_runs(scenario) if runs is None else tuple(runs), batch_size, keep_units)
    if store is None:
        yield from _compute(scenario, tasks, workers, job, cluster, None, cache)
        return
    yield from _through_store(scenario, tasks, workers, job, cluster, store, cache)


def _through_store(
    scenario: Scenario, tasks: Sequence[GraphTask], workers: int, job: GraphJob, cluster: Cluster | None, store: ResultStore,
    cache: GraphCache | None,
) -> Iterator[GraphDraws]:
    from designcalc.store import stored_or_computed

    runs = job.runs
    assert runs is not None
    fingerprint, stored = stored_or_computed(store, scenario, runs, tasks, keep_units=job.keep_units)

    def keep(task: GraphTask, draws: GraphDraws) -> None:
        store.put(fingerprint, scenario, runs, task[0], task[1], draws)
        store.computed += 1

    missing = [task for task, have in zip(tasks, stored) if not have]
    reused: list[GraphTask] = []
    try:
        with closing(_compute(scenario, missing, workers, job, cluster, keep, cache)) as computed:
            for task, have in zip(tasks, stored):
                draws = store.fetch(fingerprint, *task) if have else None
                if draws is not None:
                    store.reused += 1
                    reused.append(task)
                elif have:  # stored but unreadable: compute it again here and replace it
                    draws = job.simulate(scenario, task, cache)
                    keep(task, draws)
                else:
                    draws = next(computed)
                    keep(task, draws)
                yield draws
    finally:
        store.touch(fingerprint, reused)


def _check_memory_here(scenario: Scenario, tasks: Sequence[GraphTask], workers: int, job: GraphJob) -> None:
    """Stop before any worker starts when the graphs, one per worker at a time, would not fit in this machine's memory."""
    from designcalc.memory import available_memory_bytes, check_memory

    available = available_memory_bytes()
    if available is None:
        return
    for n in sorted({point.units for point, _ in tasks}):
        check_memory(scenario, n, batch_size=columns_per_batch(n, job.batch_size), available=available, workers=min(workers, len(tasks)))


def _compute(
    scenario: Scenario, tasks: Sequence[GraphTask], workers: int, job: GraphJob, cluster: Cluster | None, salvage: Salvage,
    cache: GraphCache | None = None,
) -> Iterator[GraphDraws]:
    if not tasks:
        return
    if cluster is None:
        _check_memory_here(scenario, tasks, workers, job)
    if cluster is not None:
        yield from _simulate_on_dask(scenario, tasks, cluster, job, salvage)
        return
    if workers == 1 or len(tasks) <= 1:
        for task in tasks:
            yield job.simulate(scenario, task, cache)
        return
    # fork where the platform has it: the scenario reaches the workers without pickling and
    # they start in milliseconds; elsewhere spawn, which pickles it once per worker.
    method = "fork" if "fork" in multiprocessing.get_all_start_methods() else "spawn"
    pool = ProcessPoolExecutor(
        max_workers=min(workers, len(tasks)), mp_context=multiprocessing.get_context(method),
        initializer=_init_worker, initargs=(scenario, job),
    )
    futures: list[Future[GraphDraws]] = []
    yielded = 0
    try:
        futures = [pool.submit(_run_task, task) for task in tasks]
        for future in futures:
            result = future.result()
            yielded += 1
            yield result
    finally:
        # Normal end, Ctrl-C in the parent, or the caller stopped early: drop what has not
        # started, let the running graphs finish, and hand those to salvage (the store).
        for future in futures:
            future.cancel()
        pool.shutdown(wait=True, cancel_futures=True)
        _salvage_finished(tasks, futures, yielded, salvage)

"""Where a command runs and what it keeps: workers, dask cluster, results store.

Command-line options win over the scenario's ``[execution]`` table, which
wins over the defaults (every core, no cluster, the user's default store).
None of these changes a number.
"""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Annotated

import typer

from designcalc.errors import DesignCalcError
from designcalc.execution import ClusterConnection, available_workers
from designcalc.scenario import Scenario
from designcalc.store import ResultStore, default_store_path

__all__ = ["Execution", "NoStore", "StorePath", "execution"]

StorePath = Annotated[
    Path | None,
    typer.Option(
        "--store",
        help="Results store (SQLite) to read finished graphs from and write new ones to "
        "(default: execution.store of the scenario, else $DESIGNCALC_STORE, else ~/.cache/designcalc/results.sqlite).",
    ),
]
NoStore = Annotated[bool, typer.Option("--no-store", help="Neither read nor write a results store.")]


@dataclass(frozen=True)
class Execution:
    """What a solver call needs to know about where it runs."""

    workers: int
    cluster: ClusterConnection | None
    store: ResultStore | None


@contextmanager
def execution(scenario: Scenario, workers: int | None, cluster: str | None, store: Path | None, no_store: bool) -> Iterator[Execution]:
    """Resolve the execution settings, connect to the cluster, open the store; at the end say what the store saved.

    A store named by ``--store`` or the scenario must open (or the command
    stops with exit 2); the per-user default is a convenience, so when it
    cannot be opened the command warns and runs without it.
    """
    from designcalc.cli.main import stderr_console

    if no_store and store is not None:
        raise DesignCalcError("--store and --no-store contradict each other; give one")
    settings = scenario.execution
    opened: ResultStore | None = None
    if not no_store:
        named = store if store is not None else settings.store
        if named is None:
            try:
                opened = ResultStore(default_store_path())
            except DesignCalcError as exc:
                stderr_console().print(f"warning: {exc}; running without a results store", soft_wrap=True)
        elif named is not False:
            opened = ResultStore(Path(str(named)))
    connection = None
    try:
        address = cluster or settings.cluster
        # Connected once for the whole command: a size search calls the cluster many times.
        connection = ClusterConnection(address) if address else None
        yield Execution(workers or settings.workers or available_workers(), connection, opened)
    finally:
        if connection is not None:
            connection.close()
        if opened is not None:
            if opened.write_error is not None:
                stderr_console().print(f"warning: {opened.write_error}", soft_wrap=True)
            if opened.reused or opened.computed:
                stderr_console().print(
                    f"results store {opened.path}: {opened.reused} graphs reused, {opened.computed} computed"
                    + (" and stored" if opened.write_error is None else " (not all stored)"),
                    soft_wrap=True,
                )
            opened.close()

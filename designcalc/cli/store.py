"""``designcalc store list | export | prune``: what the results store holds, as CSV, and clearing it."""

from __future__ import annotations

import datetime as _dt
import hashlib
import io
import json
import sqlite3
import sys
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Annotated

import typer

from designcalc.atomic import atomic_file
from designcalc.cli.output import OutputFormat, check_format, new_table
from designcalc.errors import DesignCalcError
from designcalc.store import ResultStore, StoredSet, default_store_path

StoreFile = Annotated[
    Path | None,
    typer.Option("--store", help="Results store to use (default: $DESIGNCALC_STORE, else ~/.cache/designcalc/results.sqlite)."),
]
Sets = Annotated[
    list[str] | None,
    typer.Option("--set", help="A stored set, by its fingerprint or a prefix of it as `store list` shows it; repeat for several."),
]
FromScenario = Annotated[
    Path | None,
    typer.Option("--scenario", help="Every set written from a scenario file of this name and content (its SHA-256)."),
]


def _open(path: Path | None) -> ResultStore:
    path = path if path is not None else default_store_path()
    if not path.exists():
        raise DesignCalcError(f"results store {path}: no such file (nothing has been stored there yet)")
    return ResultStore(path)


@contextmanager
def _using(store: ResultStore) -> Iterator[ResultStore]:
    """The store, with any SQLite failure on the way (a damaged page, a lock held too long) said as a user error."""
    try:
        with store:
            yield store
    except sqlite3.Error as exc:
        raise DesignCalcError(f"results store {store.path}: {exc}; if it is damaged, delete it (only stored graphs are lost)") from None


def _scenario_sha256(path: Path) -> str:
    """The SHA-256 a scenario's provenance gives, of its text as it is now (without validating it again)."""
    try:
        return hashlib.sha256(path.read_bytes().decode("utf-8").encode("utf-8")).hexdigest()
    except (OSError, UnicodeDecodeError) as exc:
        raise DesignCalcError(f"--scenario {path}: cannot be read ({exc})") from None


def _chosen(store: ResultStore, prefixes: list[str] | None, scenario: Path | None) -> list[StoredSet]:
    chosen: dict[str, StoredSet] = {}
    for prefix in prefixes or ():
        found = store.matching(prefix)
        if not found:
            raise DesignCalcError(f"--set {prefix}: no stored set has a fingerprint starting so; see `designcalc store list`")
        if len(found) > 1 and len(prefix) < 64:
            raise DesignCalcError(f"--set {prefix}: {len(found)} sets start so; give more of the fingerprint")
        chosen.update((s.fingerprint, s) for s in found)
    if scenario is not None:
        sha = _scenario_sha256(scenario)
        found = [s for s in store.sets() if s.scenario_sha256 == sha]
        if not found:
            raise DesignCalcError(f"--scenario {scenario}: nothing stored from this scenario's current text")
        chosen.update((s.fingerprint, s) for s in found)
    return list(chosen.values())


def _set_dict(s: StoredSet) -> dict[str, object]:
    return {
        "fingerprint": s.fingerprint, "scenario": s.scenario_name, "scenario_file": s.scenario_file,
        "scenario_sha256": s.scenario_sha256, "runs": s.purpose, "tool_version": s.tool_version, "library_versions": json.loads(s.library_versions),
        "random_stream_layout_version": s.stream_layout_version, "reusable": s.reusable,
        "design_points": s.design_points, "graphs": s.blocks, "bytes": s.payload_bytes,
        "created": s.created, "last_used": s.last_used,
    }


def _versions(text: str) -> str:
    return ", ".join(f"{name} {version}" for name, version in json.loads(text).items())


def register(app: typer.Typer) -> None:
    group = typer.Typer(help="List, export and prune the results store (finished graphs kept for reruns).", no_args_is_help=True)
    app.add_typer(group, name="store")

    @group.command("list")
    def list_sets(store: StoreFile = None, output_format: OutputFormat = "table") -> None:
        """One row per stored set: scenario, what was simulated, design points, graphs, size, last use."""
        from designcalc.cli.main import stdout_console

        check_format(output_format)
        with _using(_open(store)) as opened:
            sets = opened.sets()
            where = opened.path
        if output_format == "json":
            print(json.dumps({"store": str(where), "sets": [_set_dict(s) for s in sets]}, indent=2))
            return
        if output_format == "csv":
            rows = [_set_dict(s) for s in sets]
            out = io.StringIO()
            import csv

            writer = csv.DictWriter(out, fieldnames=list(_set_dict(sets[0]) if sets else ["fingerprint"]), lineterminator="\n")
            writer.writeheader()
            writer.writerows(rows)
            sys.stdout.write(out.getvalue())
            return
        table = new_table(
            f"Results store {where}",
            ("set", "scenario", "file", "runs", "points", "graphs", "MB", "last used", "reusable"),
            left=("set", "scenario", "file", "runs", "last used", "reusable"),
        )
        for s in sets:
            table.add_row(
                s.fingerprint[:12], s.scenario_name, s.scenario_file, s.purpose, str(s.design_points), str(s.blocks),
                f"{s.payload_bytes / 1e6:.1f}", s.last_used.replace("+00:00", "Z"),
                "yes" if s.reusable else f"no (designcalc {s.tool_version}, {_versions(s.library_versions)}, layout {s.stream_layout_version})",
            )
        console = stdout_console()
        console.print(table)
        if not sets:
            console.print("The store is empty.")

    @group.command("export")
    def export(
        out: Annotated[Path, typer.Option("--out", "-o", help="CSV file to write: one row per stored estimate (replicate x test).")],
        sets: Sets = None,
        scenario: FromScenario = None,
        store: StoreFile = None,
    ) -> None:
        """Write the raw replicates of stored sets (all, or those chosen) as CSV: estimates, SEs and true estimands."""
        from designcalc.cli.main import stderr_console

        if out.exists() and out.is_dir():
            raise DesignCalcError(f"--out {out}: is a folder; give a file name")
        if not out.absolute().parent.is_dir():
            raise DesignCalcError(f"--out {out}: the folder {out.absolute().parent} does not exist")
        source = store if store is not None else default_store_path()
        if out.exists() and source.exists() and out.resolve() == source.resolve():
            raise DesignCalcError(f"--out {out}: is the results store itself; give another file name")
        with _using(_open(store)) as opened:
            chosen = _chosen(opened, sets, scenario) if (sets or scenario) else opened.sets()
            with atomic_file(out, encoding="utf-8", newline="") as handle:  # never a half-written export
                rows = opened.export_csv(handle, [s.fingerprint for s in chosen])
        stderr_console().print(f"wrote {out}: {rows} rows from {len(chosen)} stored sets")

    @group.command("prune")
    def prune(
        sets: Sets = None,
        scenario: FromScenario = None,
        stale: Annotated[bool, typer.Option("--stale", help="Sets written by another designcalc, numpy or scipy version or random-stream layout (never reusable).")] = False,
        unused_days: Annotated[int | None, typer.Option("--unused-days", min=0, max=100_000, help="Graphs not used for this many days.")] = None,
        everything: Annotated[bool, typer.Option("--all", help="Everything in the store.")] = False,
        store: StoreFile = None,
    ) -> None:
        """Delete stored graphs: chosen sets, stale ones, ones unused for N days, or all. Nothing else is touched."""
        from designcalc.cli.main import stderr_console

        if not (sets or scenario or stale or everything or unused_days is not None):
            raise DesignCalcError("say what to prune: --set FINGERPRINT, --scenario FILE, --stale, --unused-days N or --all")
        with _using(_open(store)) as opened:
            chosen = {s.fingerprint for s in _chosen(opened, sets, scenario)}
            every = opened.sets()
            if stale:
                chosen |= {s.fingerprint for s in every if not s.reusable}
            if everything:
                chosen |= {s.fingerprint for s in every}
            before = None
            if unused_days is not None:
                before = (_dt.datetime.now(_dt.UTC) - _dt.timedelta(days=unused_days)).isoformat(timespec="seconds")
            removed_sets, removed_blocks = opened.prune(sorted(chosen), unused_before=before, everything=everything)
        stderr_console().print(f"removed {removed_blocks} stored graphs ({removed_sets} sets emptied) from {opened.path}")

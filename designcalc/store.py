"""The results store: finished graphs kept in SQLite, so a rerun computes only what is missing.

One block is everything one graph of one design point contributes for one
set of runs (``engine.GraphDraws``): the engine's unit of work and of
randomness.  A block is keyed by

* the **numbers fingerprint**: a SHA-256 over everything that can change
  what ``engine.simulate_graph`` returns for a given graph (network, density
  rule, outcome model, covariates, estimator plan, seed, assignments per
  graph, the runs' outcome models and keys), the designcalc, numpy and
  scipy versions, ``engine.STREAM_LAYOUT_VERSION`` and ``engine.RESULTS_VERSION``; but *not* the planned sizes, treatment
  probabilities, number of graphs, significance level, target power, names
  or execution settings, which only choose which blocks are needed or how
  they are summarised;
* the design point (units, treatment probability) and the graph index.

So adding a size, a probability or more graphs reuses every block already
there; changing the seed or the outcome model starts a new fingerprint and
leaves the old blocks to ``prune``.  Each block is written in its own
transaction (write-ahead log), so Ctrl-C or a killed process loses at most
the graphs still running and never leaves half a block.

Payloads are ``numpy.savez`` archives read back with ``allow_pickle=False``:
a store file from elsewhere cannot run code.
"""

from __future__ import annotations

import csv
import dataclasses
import datetime as _dt
import hashlib
import io
import json
import os
import sqlite3
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import scipy

from designcalc._version import __version__
from designcalc.engine import (
    RESULTS_VERSION,
    STREAM_LAYOUT_VERSION,
    DesignPoint,
    GraphDraws,
    Run,
    RunDraws,
    power_runs,
)
from designcalc.errors import DesignCalcError
from designcalc.estimands import Estimands
from designcalc.scenario import Scenario

__all__ = [
    "SCHEMA_VERSION",
    "ResultStore",
    "StoredSet",
    "decode_draws",
    "default_store_path",
    "encode_draws",
    "numbers_fingerprint",
    "stored_or_computed",
]

#: Version of the tables and the payload format; a store written by a newer version is refused, not misread.
SCHEMA_VERSION = 2
_BUSY_TIMEOUT_MS = 30_000  # another designcalc writing the same store waits, it does not fail

_SCHEMA = """
CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS result_sets (
    fingerprint TEXT PRIMARY KEY,
    scenario_name TEXT NOT NULL,
    scenario_file TEXT NOT NULL,
    scenario_sha256 TEXT NOT NULL,
    runs TEXT NOT NULL,
    tool_version TEXT NOT NULL,
    library_versions TEXT NOT NULL,
    stream_layout_version INTEGER NOT NULL,
    created TEXT NOT NULL
);
CREATE TABLE IF NOT EXISTS blocks (
    fingerprint TEXT NOT NULL REFERENCES result_sets(fingerprint),
    units INTEGER NOT NULL,
    probability TEXT NOT NULL,
    graph_index INTEGER NOT NULL,
    payload BLOB NOT NULL,
    created TEXT NOT NULL,
    last_used TEXT NOT NULL,
    PRIMARY KEY (fingerprint, units, probability, graph_index)
);
"""


def default_store_path() -> Path:
    """``$DESIGNCALC_STORE``, else ``results.sqlite`` in the user's cache folder (``$XDG_CACHE_HOME`` or ``~/.cache``)."""
    named = os.environ.get("DESIGNCALC_STORE")
    if named:
        return Path(named).expanduser()
    cache = os.environ.get("XDG_CACHE_HOME") or str(Path.home() / ".cache")
    return Path(cache).expanduser() / "designcalc" / "results.sqlite"


def _canonical(value: object) -> object:
    """A JSON-ready form of a scenario part that is the same in every process (no set orders, no ids)."""
    if dataclasses.is_dataclass(value) and not isinstance(value, type):
        out: dict[str, object] = {"type": type(value).__name__}
        for f in dataclasses.fields(value):
            if f.repr and not f.name.startswith("_"):  # cached callables and scales are derived, not stated
                out[f.name] = _canonical(getattr(value, f.name))
        return out
    if isinstance(value, dict):
        return {str(k): _canonical(v) for k, v in sorted(value.items(), key=lambda kv: str(kv[0]))}
    if isinstance(value, (set, frozenset)):
        return sorted((_canonical(v) for v in value), key=lambda v: json.dumps(v, sort_keys=True))
    if isinstance(value, (list, tuple)):
        return [_canonical(v) for v in value]
    if isinstance(value, np.ndarray):
        return _canonical(value.tolist())
    if isinstance(value, (np.floating, np.integer, np.bool_)):
        return value.item()
    if value is None or isinstance(value, (bool, int, float, str)):
        return value
    # A new kind of field must be given a stable form here, not hashed by repr (which may hold addresses).
    raise TypeError(f"no canonical form for {type(value).__name__} in the numbers fingerprint")


def _runs_description(runs: Sequence[Run]) -> list[object]:
    return [_canonical({"label": r.label, "model": r.model, "estimands": r.estimands, "keys": r.keys}) for r in runs]


def numbers_fingerprint(scenario: Scenario, runs: Sequence[Run] | None = None, *, keep_units: bool = False) -> str:
    """SHA-256 over everything that changes a graph's results (module docstring); ``runs`` default: the power table's.

    ``keep_units`` (draws that carry the graph's degrees and types) is part
    of it, so a caller that needs them never gets a block without them.
    """
    runs = power_runs(scenario) if runs is None else runs
    content = {
        "keep_units": bool(keep_units),
        "tool_version": __version__,
        # numpy's distributions and scipy's eigen-solvers may change results between releases.
        "numpy": np.__version__,
        "scipy": scipy.__version__,
        "stream_layout_version": STREAM_LAYOUT_VERSION,
        "results_version": RESULTS_VERSION,
        "schema_version": SCHEMA_VERSION,
        "network": _canonical(scenario.network),
        "density": _canonical(scenario.density),
        "outcome": _canonical(scenario.outcome),
        "covariates": _canonical(scenario.covariates),
        "estimators": _canonical(scenario.estimators),
        "seed": scenario.simulation.seed,
        "assignments_per_graph": scenario.simulation.assignments_per_graph,
        "runs": _runs_description(runs),
    }
    if scenario.measurement is not None:
        # Added only when present, so the fingerprints (and stored graphs) of scenarios without one stay as they were.
        content["measurement"] = _canonical(scenario.measurement)
    if scenario.population.clustered:
        # How clusters are sized and (for a two-stage design) allocated: numbers change with either.
        content["clusters"] = _canonical({"sizes": scenario.population.cluster_sizes, "design": scenario.design.saturation})
    text = json.dumps(content, sort_keys=True, separators=(",", ":"), allow_nan=True)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


# ---------------------------------------------------------------------------
# Payload: one GraphDraws as a numpy archive (arrays) plus a JSON header (scalars).
# ---------------------------------------------------------------------------
def encode_draws(draws: GraphDraws) -> bytes:
    """A ``GraphDraws`` as bytes; ``decode_draws`` gives it back exactly (float64 bit for bit)."""
    arrays: dict[str, np.ndarray] = {}
    runs = []
    for label, run in draws.runs.items():
        keys = list(run.estimates)
        for i, key in enumerate(keys):
            arrays[f"{len(runs)}.{i}.estimate"] = run.estimates[key]
            arrays[f"{len(runs)}.{i}.se"] = run.standard_errors[key]
        runs.append({"label": label, "estimands": dataclasses.asdict(run.estimands), "keys": [list(k) for k in keys]})
    for name in ("degrees", "theta", "cluster_sizes"):
        value = getattr(draws, name)
        if value is not None:
            arrays[name] = value
    header = {
        "runs": runs,
        "mean_degree": draws.mean_degree,
        "share_isolated": draws.share_isolated,
        "n_eigenvectors": draws.n_eigenvectors,
        "min_shrinkage": draws.min_shrinkage,
        "control_variance": draws.control_variance,
        "failures": draws.failures,
    }
    arrays["header"] = np.frombuffer(json.dumps(header, allow_nan=True).encode("utf-8"), dtype=np.uint8)
    buffer = io.BytesIO()
    np.savez(buffer, **arrays)
    return buffer.getvalue()


def decode_draws(payload: bytes) -> GraphDraws:
    """The ``GraphDraws`` of ``encode_draws``; raises ``ValueError`` on a damaged payload."""
    try:
        with np.load(io.BytesIO(payload), allow_pickle=False) as archive:
            header = json.loads(archive["header"].tobytes().decode("utf-8"))
            runs = {}
            for r, run in enumerate(header["runs"]):
                target = RunDraws(Estimands(**run["estimands"]))
                for i, key in enumerate(run["keys"]):
                    target.estimates[tuple(key)] = archive[f"{r}.{i}.estimate"]
                    target.standard_errors[tuple(key)] = archive[f"{r}.{i}.se"]
                runs[run["label"]] = target
            return GraphDraws(
                runs=runs,
                mean_degree=header["mean_degree"],
                share_isolated=header["share_isolated"],
                n_eigenvectors=header["n_eigenvectors"],
                min_shrinkage=header["min_shrinkage"],
                control_variance=header["control_variance"],
                degrees=archive["degrees"] if "degrees" in archive.files else None,
                theta=archive["theta"] if "theta" in archive.files else None,
                cluster_sizes=archive["cluster_sizes"] if "cluster_sizes" in archive.files else None,
                failures=dict(header["failures"]),
            )
    except (OSError, KeyError, TypeError, ValueError, json.JSONDecodeError) as exc:
        raise ValueError(f"damaged stored block ({exc})") from None


def _library_versions() -> str:
    return json.dumps({"numpy": np.__version__, "scipy": scipy.__version__}, sort_keys=True)


def _point_key(point: DesignPoint) -> str:
    """The ``probability`` column: the exact float (hex), and a clustered point's clusters and imposed size.

    The estimators use pi itself, so two probabilities that round alike are
    not one point; two clustered points of one nominal total are not either.
    """
    key = float(point.treatment_probability).hex()
    if point.clusters:
        key += f"|clusters={point.clusters}|size={point.cluster_size}"
    return key


def _split_point_key(key: str) -> tuple[float, str]:
    probability, _, rest = key.partition("|")
    return float.fromhex(probability), rest.replace("|", " ")


def _now() -> str:
    return _dt.datetime.now(_dt.UTC).isoformat(timespec="seconds")


@dataclass(frozen=True)
class StoredSet:
    """One fingerprint's blocks, as ``designcalc store list`` shows them."""

    fingerprint: str
    scenario_name: str
    scenario_file: str
    scenario_sha256: str
    purpose: str
    tool_version: str
    library_versions: str
    stream_layout_version: int
    design_points: int
    blocks: int
    payload_bytes: int
    created: str
    last_used: str

    @property
    def reusable(self) -> bool:
        """Written by this designcalc, numpy and scipy and stream layout (others can never be matched again)."""
        return (
            self.tool_version == __version__ and self.library_versions == _library_versions()
            and self.stream_layout_version == STREAM_LAYOUT_VERSION
        )


def _purpose(runs_json: str) -> str:
    """A short description of the runs behind a set: the power table, a size search, a null pass."""
    labels = [r.get("label", "?") for r in json.loads(runs_json)]
    if labels and labels[0] == "alternative" and all(label.startswith("null:") for label in labels[1:]):
        return "power table" if len(labels) > 1 else "scenario model"
    return ", ".join(labels)


class ResultStore:
    """A SQLite results store (module docstring).  Use as a context manager, or call ``close``.

    Counters ``reused`` and ``computed`` say how many blocks this store
    object served from the file and how many it had to compute, so commands
    can tell the user what a rerun saved.

    Examples
    --------
    >>> import tempfile
    >>> from pathlib import Path
    >>> from designcalc import load_scenario
    >>> from designcalc.execution import simulate_graphs
    >>> s = load_scenario(Path(__file__).parents[1] / "scenarios" / "lake_orrin_savings.toml")
    >>> tasks = [(DesignPoint(200, 0.5), g) for g in range(2)]
    >>> with tempfile.TemporaryDirectory() as folder, ResultStore(Path(folder) / "r.sqlite") as store:
    ...     first = [d.estimates for d in simulate_graphs(s, tasks, store=store)]
    ...     again = [d.estimates for d in simulate_graphs(s, tasks, store=store)]
    ...     (store.computed, store.reused)
    (2, 2)
    """

    def __init__(self, path: str | Path) -> None:
        self.path = Path(path)
        self.reused = 0
        self.computed = 0
        self.write_error: str | None = None
        try:
            self.path.parent.mkdir(parents=True, exist_ok=True)
            self._db = sqlite3.connect(self.path, timeout=_BUSY_TIMEOUT_MS / 1000, isolation_level=None)
        except (OSError, sqlite3.Error) as exc:
            raise DesignCalcError(f"results store {self.path}: cannot be opened ({exc}); choose another with --store PATH, or --no-store") from None
        try:
            self._db.execute(f"PRAGMA busy_timeout = {_BUSY_TIMEOUT_MS}")
            # Write-ahead log: a commit survives the process being killed, readers never see half a write.
            self._db.execute("PRAGMA journal_mode = WAL")
            self._db.execute("PRAGMA synchronous = NORMAL")
            if not self._has_tables():  # a foreign SQLite file is refused before anything is written to it
                with self._transaction():
                    for statement in _SCHEMA.split(";"):
                        if statement.strip():
                            self._db.execute(statement)
                    self._db.execute("INSERT OR IGNORE INTO meta VALUES ('schema_version', ?)", (str(SCHEMA_VERSION),))
            row = self._db.execute("SELECT value FROM meta WHERE key = 'schema_version'").fetchone()
            if row is not None and int(row[0]) > SCHEMA_VERSION:
                raise DesignCalcError(
                    f"results store {self.path}: written by a newer designcalc (store format {row[0]}, this one reads {SCHEMA_VERSION}); "
                    "upgrade designcalc or use another --store"
                )
        except sqlite3.OperationalError as exc:
            self._db.close()
            # Locked by another designcalc for longer than the busy timeout, read-only, or unreadable.
            raise DesignCalcError(f"results store {self.path}: cannot be used now ({exc}); try again, or choose another with --store PATH") from None
        except sqlite3.DatabaseError as exc:
            self._db.close()
            raise DesignCalcError(f"results store {self.path}: not a designcalc results store ({exc}); choose another with --store PATH") from None
        except DesignCalcError:
            self._db.close()
            raise

    def _has_tables(self) -> bool:
        """Whether the designcalc tables exist; raises for a database that holds other tables."""
        names = {r[0] for r in self._db.execute("SELECT name FROM sqlite_master WHERE type = 'table'")}
        if names and not {"meta", "result_sets", "blocks"} <= names:
            raise sqlite3.DatabaseError("it holds other tables")
        return bool(names)

    def _transaction(self) -> _Transaction:
        return _Transaction(self._db)

    def __enter__(self) -> ResultStore:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def close(self) -> None:
        self._db.close()

    # -- blocks -----------------------------------------------------------------
    def stored_graphs(self, fingerprint: str, point: DesignPoint) -> set[int]:
        """Graph indices of ``point`` already stored under ``fingerprint``."""
        try:
            rows = self._db.execute(
                "SELECT graph_index FROM blocks WHERE fingerprint = ? AND units = ? AND probability = ?",
                (fingerprint, point.units, _point_key(point)),
            ).fetchall()
        except sqlite3.Error as exc:  # a damaged file: compute everything, store nothing more
            self.write_error = f"results store {self.path}: cannot be read ({exc}); the run goes on without it"
            return set()
        return {r[0] for r in rows}

    def fetch(self, fingerprint: str, point: DesignPoint, graph_index: int) -> GraphDraws | None:
        """The stored block, or None if it is missing or damaged (then it is simply computed again)."""
        try:
            row = self._db.execute(
                "SELECT payload FROM blocks WHERE fingerprint = ? AND units = ? AND probability = ? AND graph_index = ?",
                (fingerprint, point.units, _point_key(point), graph_index),
            ).fetchone()
        except sqlite3.Error:  # an unreadable page: compute the graph again
            return None
        if row is None:
            return None
        try:
            return decode_draws(row[0])
        except ValueError:
            return None

    def put(self, fingerprint: str, scenario: Scenario, runs: Sequence[Run], point: DesignPoint, graph_index: int, draws: GraphDraws) -> None:
        """Write one block in its own transaction (replacing a damaged one).

        A store that cannot be written (disk full, read-only file) must not
        stop a run or lose its numbers: the first failure is kept in
        ``write_error``, and later blocks are not attempted.
        """
        if self.write_error is not None:
            return
        payload = encode_draws(draws)
        now = _now()
        try:
            self._write_block(fingerprint, scenario, runs, point, graph_index, payload, now)
        except sqlite3.Error as exc:
            self.write_error = f"results store {self.path}: could not store a graph ({exc}); the run goes on without storing"
            return

    def _write_block(
        self, fingerprint: str, scenario: Scenario, runs: Sequence[Run], point: DesignPoint, graph_index: int, payload: bytes, now: str,
    ) -> None:
        with self._transaction():
            # Every time, not cached: another process may have pruned the set since (INSERT OR IGNORE is cheap).
            self._db.execute(
                "INSERT OR IGNORE INTO result_sets VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)",
                (
                    fingerprint, scenario.name, scenario.source, scenario.sha256,
                    json.dumps(_runs_description(runs), sort_keys=True), __version__, _library_versions(),
                    STREAM_LAYOUT_VERSION, now,
                ),
            )
            self._db.execute(
                "INSERT OR REPLACE INTO blocks VALUES (?, ?, ?, ?, ?, ?, ?)",
                (fingerprint, point.units, _point_key(point), graph_index, payload, now, now),
            )

    def touch(self, fingerprint: str, blocks: Iterable[tuple[DesignPoint, int]]) -> None:
        """Mark reused blocks as used now (``prune --unused-days`` keeps what is still in use)."""
        rows = [(_now(), fingerprint, p.units, _point_key(p), g) for p, g in blocks]
        if not rows or self.write_error is not None:
            return
        try:
            with self._transaction():
                self._db.executemany(
                    "UPDATE blocks SET last_used = ? WHERE fingerprint = ? AND units = ? AND probability = ? AND graph_index = ?", rows
                )
        except sqlite3.Error as exc:
            self.write_error = f"results store {self.path}: could not record the use of stored graphs ({exc})"

    # -- listing, export, pruning ----------------------------------------------------
    def sets(self) -> list[StoredSet]:
        """Every fingerprint in the store with its block count and size, newest use first."""
        rows = self._db.execute(
            """
            SELECT s.fingerprint, s.scenario_name, s.scenario_file, s.scenario_sha256, s.runs, s.tool_version,
                   s.library_versions, s.stream_layout_version, COUNT(DISTINCT b.units || ':' || b.probability), COUNT(b.graph_index),
                   COALESCE(SUM(LENGTH(b.payload)), 0), s.created, COALESCE(MAX(b.last_used), s.created)
            FROM result_sets s LEFT JOIN blocks b ON b.fingerprint = s.fingerprint
            GROUP BY s.fingerprint ORDER BY 13 DESC, s.fingerprint
            """
        )
        return [
            StoredSet(r[0], r[1], r[2], r[3], _purpose(r[4]), r[5], r[6], int(r[7]), int(r[8]), int(r[9]), int(r[10]), r[11], r[12])
            for r in rows
        ]

    def matching(self, prefix: str) -> list[StoredSet]:
        """Sets whose fingerprint starts with ``prefix`` (as ``list`` shows them, abbreviated)."""
        return [s for s in self.sets() if s.fingerprint.startswith(prefix.lower())]

    def export_csv(self, out: io.TextIOBase, fingerprints: Sequence[str]) -> int:
        """Write every stored replicate of these sets as CSV rows (one per estimate); returns the row count."""
        writer = csv.writer(out, lineterminator="\n")
        writer.writerow((
            "fingerprint", "scenario", "units", "treatment_probability", "graph", "run", "estimand", "estimator",
            "variance_estimator", "assignment", "true_estimand", "estimate", "standard_error", "clusters",
        ))
        count = 0
        for fingerprint in fingerprints:
            name_row = self._db.execute("SELECT scenario_name FROM result_sets WHERE fingerprint = ?", (fingerprint,)).fetchone()
            for units, pkey, graph, payload in self._db.execute(
                "SELECT units, probability, graph_index, payload FROM blocks WHERE fingerprint = ? ORDER BY units, probability, graph_index",
                (fingerprint,),
            ):
                try:
                    draws = decode_draws(payload)
                except ValueError:
                    continue  # a damaged block is not exported; the next run recomputes it
                probability, clusters = _split_point_key(pkey)
                for label, run in draws.runs.items():
                    for key, estimates in run.estimates.items():
                        truth = run.estimands.truth(key)
                        for b, (estimate, se) in enumerate(zip(estimates, run.standard_errors[key])):
                            writer.writerow((
                                fingerprint, name_row[0], units, repr(probability), graph, label, *key, b,
                                repr(truth), repr(float(estimate)), repr(float(se)), clusters,
                            ))
                            count += 1
        return count

    def prune(
        self, fingerprints: Sequence[str] = (), *, unused_before: str | None = None, everything: bool = False,
    ) -> tuple[int, int]:
        """Delete whole sets, blocks last used before an ISO time, or ``everything``; returns (sets, blocks) removed."""
        blocks = sets = 0
        with self._transaction():
            if everything:  # also blocks whose set row another process removed meanwhile
                blocks += self._db.execute("DELETE FROM blocks").rowcount
            for fingerprint in fingerprints:
                blocks += self._db.execute("DELETE FROM blocks WHERE fingerprint = ?", (fingerprint,)).rowcount
            if unused_before is not None:
                blocks += self._db.execute("DELETE FROM blocks WHERE last_used < ?", (unused_before,)).rowcount
            sets = self._db.execute(
                "DELETE FROM result_sets WHERE fingerprint NOT IN (SELECT DISTINCT fingerprint FROM blocks)"
            ).rowcount
        self._db.execute("VACUUM")  # give the space back to the file system
        return sets, blocks


class _Transaction:
    """BEGIN IMMEDIATE ... COMMIT, rolled back on any exception (Ctrl-C included), even one inside ``__enter__``."""

    def __init__(self, db: sqlite3.Connection) -> None:
        self._db = db

    def __enter__(self) -> None:
        if self._db.in_transaction:  # left open by an earlier call interrupted between BEGIN and the with-block
            self._db.execute("ROLLBACK")
        try:
            self._db.execute("BEGIN IMMEDIATE")
        except BaseException:
            # Ctrl-C right after BEGIN returned: __exit__ will not run, so do not keep the write lock.
            if self._db.in_transaction:
                self._db.execute("ROLLBACK")
            raise

    def __exit__(self, kind: object, *exc: object) -> None:
        if kind is None:
            self._db.execute("COMMIT")
        elif self._db.in_transaction:  # SQLite may have rolled back already (e.g. disk full)
            self._db.execute("ROLLBACK")


def stored_or_computed(
    store: ResultStore, scenario: Scenario, runs: Sequence[Run], tasks: Sequence[tuple[DesignPoint, int]], *, keep_units: bool = False,
) -> tuple[str, list[bool]]:
    """The fingerprint of these runs and, per task, whether its block is already stored."""
    fingerprint = numbers_fingerprint(scenario, runs, keep_units=keep_units)
    have: dict[DesignPoint, set[int]] = {}
    stored = []
    for point, g in tasks:
        if point not in have:
            have[point] = store.stored_graphs(fingerprint, point)
        stored.append(g in have[point])
    return fingerprint, stored

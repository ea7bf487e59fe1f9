"""The results store: exact round trips, what invalidates a block, and runs that survive SIGINT and SIGKILL.

The reference for every "same numbers" check is the same calculation without
a store (exact equality of the canonical JSON, STYLE.md §4), not a tolerance.
"""

from __future__ import annotations

import json
import os
import signal
import sqlite3
import subprocess
import sys
import time
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
from reproducibility import without_time

from designcalc.engine import (
    DesignPoint,
    Run,
    power_runs,
    restrict_tests,
    simulate_graph,
)
from designcalc.errors import DesignCalcError
from designcalc.execution import simulate_graphs
from designcalc.power import simulate_power
from designcalc.scenario import load_scenario, parse_scenario
from designcalc.store import (
    ResultStore,
    decode_draws,
    encode_draws,
    numbers_fingerprint,
)

ROOT = Path(__file__).parents[1]
DEMO = ROOT / "scenarios" / "lake_orrin_savings.toml"
KERNEL_DEMO = ROOT / "scenarios" / "marrow_valley_hygiene.toml"
SMALL = dict(units=[200, 300], treatment_probabilities=[0.5], graphs=3, assignments_per_graph=4)


def _same_draws(a, b) -> None:
    assert a.runs.keys() == b.runs.keys()
    for label in a.runs:
        ra, rb = a.runs[label], b.runs[label]
        assert ra.estimands == rb.estimands
        assert ra.estimates.keys() == rb.estimates.keys()
        for key in ra.estimates:
            np.testing.assert_array_equal(ra.estimates[key], rb.estimates[key])
            np.testing.assert_array_equal(ra.standard_errors[key], rb.standard_errors[key])
    for name in ("mean_degree", "share_isolated", "n_eigenvectors", "min_shrinkage", "control_variance", "failures"):
        assert getattr(a, name) == getattr(b, name) or (np.isnan(getattr(a, name)) and np.isnan(getattr(b, name)))
    for name in ("degrees", "theta"):
        x, y = getattr(a, name), getattr(b, name)
        assert (x is None) == (y is None)
        if x is not None:
            np.testing.assert_array_equal(x, y)


@pytest.mark.parametrize("path", [DEMO, KERNEL_DEMO])
def test_a_block_round_trips_bit_for_bit(path):
    """encode/decode keeps every float64 exactly, the units' degrees and types, and the failure notes."""
    s = load_scenario(path)
    draws = simulate_graph(s, DesignPoint(200, 0.3), 1, keep_units=True)
    draws.failures["pc_balancing"] = "an example note"
    draws.runs["alternative"].estimates[next(iter(draws.estimates))][0] = np.nan  # NaN survives too
    _same_draws(draws, decode_draws(encode_draws(draws)))


def test_a_damaged_payload_is_a_value_error():
    """Bytes that are not a stored block are refused (and then recomputed by the store), never misread."""
    with pytest.raises(ValueError, match="damaged stored block"):
        decode_draws(b"not an archive")


def _variant(text: str, old: str, new: str):
    assert old in text
    return parse_scenario(text.replace(old, new, 1), source="variant.toml")


def test_the_fingerprint_ignores_what_only_chooses_or_summarises_blocks():
    """Sizes, probabilities, graph counts, test level, target power, names and [execution] do not change a graph's numbers."""
    text = DEMO.read_text()
    base = numbers_fingerprint(parse_scenario(text, source="a.toml"))
    for old, new in [
        ("units = [600, 1200, 2400]", "units = [600]"),
        ("treatment_probability = [0.3, 0.5]", "treatment_probability = [0.4]"),
        ("graphs = 40", "graphs = 7"),
        ("significance_level = 0.05", "significance_level = 0.01"),
        ("target_power = 0.8", "target_power = 0.9"),
        ('name = "Lake Orrin savings nudge"', 'name = "renamed"'),
        ("seed = 20261202", 'seed = 20261202\n\n[execution]\nworkers = 1\nstore = "x.sqlite"'),
    ]:
        assert numbers_fingerprint(_variant(text, old, new)) == base, new


def test_the_fingerprint_changes_with_anything_that_changes_the_numbers():
    """Seed, assignments per graph, the outcome model, the network, the estimators, the runs: each gives a new fingerprint."""
    text = DEMO.read_text()
    s = parse_scenario(text, source="a.toml")
    base = numbers_fingerprint(s)
    changed = [
        numbers_fingerprint(_variant(text, "seed = 20261202", "seed = 20261203")),
        numbers_fingerprint(_variant(text, "assignments_per_graph = 25", "assignments_per_graph = 26")),
        numbers_fingerprint(_variant(text, "direct_effect = 1.2", "direct_effect = 1.3")),
        numbers_fingerprint(_variant(text, "mean_degree = 10", "mean_degree = 11")),
        numbers_fingerprint(_variant(text, "centre = 20.0", "centre = 21.0")),
        numbers_fingerprint(restrict_tests(s, [("direct", "hajek", "neyman")])),
        numbers_fingerprint(s, [Run("alternative", s.outcome.scaled_for("direct", 2.0), ("direct",))]),
        numbers_fingerprint(parse_scenario(text + "\n[measurement]\ncontact_cap = 5\n", source="a.toml")),
        numbers_fingerprint(parse_scenario(text + "\n[measurement]\ncontact_cap = 4\n", source="a.toml")),
        numbers_fingerprint(parse_scenario(text + "\n[measurement]\ncontact_cap = 5\nsymmetrise = \"both\"\n", source="a.toml")),
        numbers_fingerprint(parse_scenario(text + "\n[measurement]\ncontact_cap = 5\naugmented = true\n", source="a.toml")),
    ]
    assert base not in changed and len(set(changed)) == len(changed)


def test_the_fingerprint_is_the_same_in_another_process():
    """No set order or object address leaks in: a fresh interpreter with another hash seed computes the same fingerprint."""
    code = (
        "from designcalc.scenario import load_scenario; from designcalc.engine import restrict_tests; "
        "from designcalc.store import numbers_fingerprint; "
        f"s = restrict_tests(load_scenario({str(DEMO)!r}), [('direct', 'hajek', 'neyman'), ('spillover', 'pc_balancing', 'plug_in'), ('total', 'hajek+pc_balancing', 'plug_in')]); "
        "print(numbers_fingerprint(s))"
    )
    prints = {
        subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True, env={**os.environ, "PYTHONHASHSEED": seed}).stdout
        for seed in ("1", "2", "3")
    }
    assert len(prints) == 1


def test_power_with_a_store_equals_power_without_and_a_rerun_computes_nothing(tmp_path):
    """First run computes and stores every graph; the rerun reads them all; both equal the run without a store."""
    s = load_scenario(DEMO)
    plain = simulate_power(s, **SMALL)
    with ResultStore(tmp_path / "r.sqlite") as store:
        first = simulate_power(s, store=store, **SMALL)
        assert (store.computed, store.reused) == (6, 0)
        again = simulate_power(s, store=store, workers=2, **SMALL)
        assert (store.computed, store.reused) == (6, 6)
    assert without_time(plain) == without_time(first) == without_time(again)


def test_more_graphs_and_a_new_size_reuse_the_stored_ones(tmp_path):
    """Raising the graph count and adding a size computes only the new graphs; adaptive rounds reuse too."""
    s = load_scenario(DEMO)
    with ResultStore(tmp_path / "r.sqlite") as store:
        simulate_power(s, **SMALL, store=store)
        bigger = dict(SMALL, units=[200, 300, 400], graphs=5)
        result = simulate_power(s, **bigger, store=store)
        # stored: 2 sizes x 3 graphs; new: 2 sizes x 2 graphs + 5 graphs at 400
        assert (store.reused, store.computed) == (6, 6 + 9)
        adaptive = simulate_power(s, **bigger, adaptive=True, max_graphs=10, relative_precision=0.001, store=store)
        assert store.reused == 6 + 15  # the first round is entirely stored
    assert without_time(result) == without_time(simulate_power(s, **bigger))
    assert without_time(adaptive) == without_time(simulate_power(s, **bigger, adaptive=True, max_graphs=10, relative_precision=0.001))


def test_a_damaged_block_is_recomputed_and_replaced(tmp_path):
    """A block whose payload cannot be read is computed again (same numbers) and written over."""
    s = load_scenario(DEMO)
    path = tmp_path / "r.sqlite"
    tasks = [(DesignPoint(200, 0.5), g) for g in range(3)]
    with ResultStore(path) as store:
        reference = list(simulate_graphs(s, tasks, store=store))
    with sqlite3.connect(path) as db:
        db.execute("UPDATE blocks SET payload = ? WHERE graph_index = 1", (b"garbage",))
    with ResultStore(path) as store:
        again = list(simulate_graphs(s, tasks, store=store))
        assert (store.reused, store.computed) == (2, 1)
    for a, b in zip(reference, again):
        _same_draws(a, b)
    with ResultStore(path) as store:
        list(simulate_graphs(s, tasks, store=store))
        assert store.reused == 3


def test_files_that_are_not_stores_are_refused_by_name(tmp_path):
    """A text file, another program's SQLite database and a store from a newer designcalc: DesignCalcError naming the file."""
    text = tmp_path / "notes.sqlite"
    text.write_text("hello " * 1000)
    foreign = tmp_path / "other.sqlite"
    with sqlite3.connect(foreign) as db:
        db.execute("CREATE TABLE customers (id INTEGER)")
    newer = tmp_path / "newer.sqlite"
    ResultStore(newer).close()
    with sqlite3.connect(newer) as db:
        db.execute("UPDATE meta SET value = '99' WHERE key = 'schema_version'")
    for path, why in [(text, "not a designcalc results store"), (foreign, "not a designcalc results store"), (newer, "written by a newer designcalc")]:
        with pytest.raises(DesignCalcError, match=why) as info:
            ResultStore(path)
        assert str(path) in str(info.value)
    with sqlite3.connect(foreign) as db:  # the foreign database was not altered
        assert [r[0] for r in db.execute("SELECT name FROM sqlite_master")] == ["customers"]


def test_the_size_search_reuses_its_stored_graphs(tmp_path):
    """required_sample_size with a store: the rerun simulates nothing and answers the same."""
    from designcalc.sample_size import required_sample_size

    s = load_scenario(DEMO)
    s = replace(s, estimators=replace(s.estimators, direct=("hajek",), direct_variance=("neyman",), spillover=("pc_balancing",)))
    settings = dict(treatment_probabilities=[0.5], graphs=8, assignments_per_graph=5, relative_precision=0.3, max_units=2000)
    with ResultStore(tmp_path / "r.sqlite") as store:
        first = required_sample_size(s, store=store, **settings)
        computed = store.computed
        again = required_sample_size(s, store=store, **settings)
        assert store.computed == computed and store.reused == computed
    assert without_time(first) == without_time(again) == without_time(required_sample_size(s, **settings))


def test_a_dask_run_fills_the_store_a_local_run_reads(tmp_path):
    """Graphs stored from a dask LocalCluster are reused by a local run: one set of numbers, whatever the backend."""
    pytest.importorskip("distributed", reason="dask.distributed not installed (pip install -e '.[test]')")
    s = load_scenario(DEMO)
    with ResultStore(tmp_path / "r.sqlite") as store:
        on_dask = simulate_power(s, cluster="local", store=store, **SMALL)
        local = simulate_power(s, workers=1, store=store, **SMALL)
        assert (store.computed, store.reused) == (6, 6)
    assert without_time(on_dask) == without_time(local)


# ---------------------------------------------------------------------------
# Interrupted runs: the command is killed partway, rerun, and must give the
# uninterrupted numbers while reusing every graph committed before the kill.
# ---------------------------------------------------------------------------
RUN = ["-n", "1200", "-p", "0.3", "-p", "0.5", "--graphs", "40", "--assignments", "10"]
TOTAL_GRAPHS = 2 * 40


def _command(store: Path, *extra: str) -> list[str]:
    return [sys.executable, "-m", "designcalc", "power", str(DEMO), *RUN, "--format", "json", "--store", str(store), *extra]


def _stored(path: Path) -> int:
    try:
        with sqlite3.connect(f"file:{path}?mode=ro", uri=True, timeout=5) as db:
            return int(db.execute("SELECT COUNT(*) FROM blocks").fetchone()[0])
    except sqlite3.OperationalError:  # not created yet
        return 0


def _reference_results() -> str:
    s = load_scenario(DEMO)
    result = simulate_power(s, units=[1200], treatment_probabilities=[0.3, 0.5], graphs=40, assignments_per_graph=10)
    return json.dumps(result.to_dict()["results"], sort_keys=True)


@pytest.fixture(scope="module")
def reference_results() -> str:
    return _reference_results()


@pytest.mark.parametrize("kill", [signal.SIGINT, signal.SIGKILL], ids=["SIGINT", "SIGKILL"])
def test_an_interrupted_run_resumes_from_the_store_with_identical_results(tmp_path, kill, reference_results):
    """Kill `designcalc power --workers 2` partway (Ctrl-C, or SIGKILL to the whole group), rerun: same numbers, stored graphs reused."""
    store = tmp_path / "r.sqlite"
    proc = subprocess.Popen(
        _command(store, "--workers", "2"), cwd=ROOT, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
        start_new_session=True, preexec_fn=lambda: signal.signal(signal.SIGINT, signal.SIG_DFL),
    )
    deadline = time.monotonic() + 120
    while _stored(store) < 12 and proc.poll() is None and time.monotonic() < deadline:
        time.sleep(0.02)
    os.killpg(proc.pid, kill)
    out, err = proc.communicate(timeout=120)
    assert proc.returncode == (130 if kill == signal.SIGINT else -signal.SIGKILL), err
    if kill == signal.SIGINT:
        assert json.loads(out)["partial"] is True
    committed = _stored(store)
    assert 12 <= committed < TOTAL_GRAPHS, "the run was not interrupted partway; make it longer"
    with sqlite3.connect(store) as db:
        assert db.execute("PRAGMA integrity_check").fetchone()[0] == "ok"

    rerun = subprocess.run(_command(store, "--workers", "2"), cwd=ROOT, capture_output=True, text=True, timeout=300, check=False)
    assert rerun.returncode == 0, rerun.stderr
    assert f"{committed} graphs reused, {TOTAL_GRAPHS - committed} computed and stored" in rerun.stderr
    assert json.dumps(json.loads(rerun.stdout)["results"], sort_keys=True) == reference_results
    assert _stored(store) == TOTAL_GRAPHS


def test_ctrl_c_keeps_graphs_that_finished_out_of_order(tmp_path):
    """On a pool, graphs finished after the one the parent waits for are stored too (salvaged), not thrown away."""
    s = load_scenario(DEMO)
    # Graph 0 is slow (large), graphs 1.. are small: they finish first; stop reading after none were yielded.
    tasks = [(DesignPoint(3000, 0.5), 0)] + [(DesignPoint(200, 0.5), g) for g in range(1, 4)]
    with ResultStore(tmp_path / "r.sqlite") as store:
        stream = simulate_graphs(s, tasks, workers=2, store=store)
        first = next(stream)  # waits for the slow graph; the small ones finish meanwhile on the other worker
        stream.close()  # the caller stops (as on Ctrl-C): running graphs finish, finished ones are kept
        assert store.computed == 4
        stored = sum(len(store.stored_graphs(numbers_fingerprint(s), p)) for p in {t[0] for t in tasks})
        assert stored == 4
    assert first.mean_degree > 0


# ---------------------------------------------------------------------------
# The command line: store options, [execution], `designcalc store`.
# ---------------------------------------------------------------------------
def _designcalc(*args: str, cwd: Path = ROOT, env: dict | None = None) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "designcalc", *args], cwd=cwd, capture_output=True, text=True, timeout=300, check=False, env=env)


def test_execution_table_names_the_store_beside_the_scenario(tmp_path):
    """`[execution] store = "results.sqlite"` puts the store next to the scenario file wherever the command runs; --no-store wins."""
    scenario = tmp_path / "project" / "plan.toml"
    scenario.parent.mkdir()
    scenario.write_text(DEMO.read_text() + '\n[execution]\nworkers = 1\nstore = "results.sqlite"\n')
    args = ["power", str(scenario), "-n", "200", "-p", "0.5", "--graphs", "2", "--assignments", "3", "--format", "json"]
    first = _designcalc(*args, cwd=tmp_path)
    assert first.returncode == 0, first.stderr
    assert (scenario.parent / "results.sqlite").exists()
    assert "0 graphs reused, 2 computed" in first.stderr
    second = _designcalc(*args, cwd=ROOT)
    assert "2 graphs reused, 0 computed" in second.stderr
    assert json.loads(first.stdout)["results"] == json.loads(second.stdout)["results"]
    plain = _designcalc(*args, "--no-store")
    assert "results store" not in plain.stderr


def test_a_default_store_that_cannot_be_written_is_a_warning_a_named_one_an_error(tmp_path):
    """The per-user default is a convenience (warn, run on); a store the user named must open (exit 2, named)."""
    blocked = tmp_path / "file"
    blocked.write_text("a file where a folder would be")
    args = ["power", str(DEMO), "-n", "200", "-p", "0.5", "--graphs", "2", "--assignments", "3", "--format", "json"]
    env = {**os.environ, "DESIGNCALC_STORE": str(blocked / "sub" / "r.sqlite")}
    warned = _designcalc(*args, env=env)
    assert warned.returncode == 0 and "running without a results store" in warned.stderr
    named = _designcalc(*args, "--store", str(blocked / "sub" / "r.sqlite"))
    assert named.returncode == 2 and "cannot be opened" in named.stderr and "Traceback" not in named.stderr
    both = _designcalc(*args, "--store", "x.sqlite", "--no-store")
    assert both.returncode == 2 and "--store and --no-store" in both.stderr


def test_store_list_export_and_prune(tmp_path):
    """list shows each set with its counts; export writes one CSV row per stored estimate; prune removes what it is told."""
    store = tmp_path / "r.sqlite"
    args = ["-n", "200", "-p", "0.5", "--graphs", "2", "--assignments", "3", "--store", str(store), "--format", "json"]
    assert _designcalc("power", str(DEMO), *args).returncode == 0
    assert _designcalc("power", str(KERNEL_DEMO), *args).returncode == 0
    listed = json.loads(_designcalc("store", "list", "--store", str(store), "--format", "json").stdout)["sets"]
    assert sorted(s["scenario_file"] for s in listed) == ["lake_orrin_savings.toml", "marrow_valley_hygiene.toml"]
    assert all(s["graphs"] == 2 and s["design_points"] == 1 and s["reusable"] for s in listed)

    out = tmp_path / "raw.csv"
    exported = _designcalc("store", "export", "--store", str(store), "--scenario", str(DEMO), "--out", str(out))
    assert exported.returncode == 0, exported.stderr
    import csv

    rows = list(csv.DictReader(out.open()))
    with ResultStore(store) as opened:
        lake = next(s for s in opened.sets() if s.scenario_file == "lake_orrin_savings.toml")
        draws = [opened.fetch(lake.fingerprint, DesignPoint(200, 0.5), g) for g in range(2)]
    expected = sum(v.size for d in draws for run in d.runs.values() for v in run.estimates.values())
    assert len(rows) == expected and {r["fingerprint"] for r in rows} == {lake.fingerprint}
    first = rows[0]
    key = (first["estimand"], first["estimator"], first["variance_estimator"])
    assert float(first["estimate"]) == draws[0].runs[first["run"]].estimates[key][int(first["assignment"])]

    assert _designcalc("store", "prune", "--store", str(store)).returncode == 2  # nothing chosen: refused
    pruned = _designcalc("store", "prune", "--store", str(store), "--set", lake.fingerprint[:10])
    assert pruned.returncode == 0 and "removed 2 stored graphs (1 sets emptied)" in pruned.stderr
    left = json.loads(_designcalc("store", "list", "--store", str(store), "--format", "json").stdout)["sets"]
    assert [s["scenario_file"] for s in left] == ["marrow_valley_hygiene.toml"]
    assert _designcalc("store", "prune", "--store", str(store), "--all").returncode == 0
    assert json.loads(_designcalc("store", "list", "--store", str(store), "--format", "json").stdout)["sets"] == []
    missing = _designcalc("store", "list", "--store", str(tmp_path / "none.sqlite"))
    assert missing.returncode == 2 and "no such file" in missing.stderr


def test_the_default_runs_use_the_per_test_store():
    """Sanity of the test set-up: commands without --store write $DESIGNCALC_STORE (here a temporary file, conftest.py)."""
    path = Path(os.environ["DESIGNCALC_STORE"])
    run = _designcalc("power", str(DEMO), "-n", "200", "-p", "0.5", "--graphs", "2", "--assignments", "3", "--format", "json")
    assert run.returncode == 0 and path.exists() and str(path) in run.stderr
    assert power_runs(load_scenario(DEMO))  # the set stored is the power table's


def test_a_store_that_cannot_be_written_does_not_stop_the_run(tmp_path, monkeypatch):
    """Disk full (simulated): the run finishes with the same numbers, the failure is kept for the warning, nothing half-written."""
    s = load_scenario(DEMO)
    calls = []

    def full(*args, **kwargs):
        calls.append(args)
        raise sqlite3.OperationalError("database or disk is full")

    with ResultStore(tmp_path / "r.sqlite") as store:
        monkeypatch.setattr(store, "_write_block", full)
        result = simulate_power(s, store=store, **SMALL)
        assert store.computed == 6 and len(calls) == 1  # after the first failure no further write is tried
        assert "database or disk is full" in store.write_error
        assert store.sets() == []
    assert without_time(result) == without_time(simulate_power(s, **SMALL))


def test_sets_from_another_library_version_are_stale(tmp_path):
    """A set written under another numpy is listed as not reusable and removed by prune --stale; the current one stays."""
    s = load_scenario(DEMO)
    path = tmp_path / "r.sqlite"
    with ResultStore(path) as store:
        simulate_power(s, store=store, **SMALL)
        simulate_power(s, store=store, **dict(SMALL, seed=5))
    with sqlite3.connect(path) as db:
        db.execute("UPDATE result_sets SET library_versions = '{\"numpy\": \"1.0\", \"scipy\": \"1.0\"}' WHERE rowid = 1")
    with ResultStore(path) as store:
        assert sorted(x.reusable for x in store.sets()) == [False, True]
    pruned = _designcalc("store", "prune", "--store", str(path), "--stale")
    assert pruned.returncode == 0 and "removed 6 stored graphs (1 sets emptied)" in pruned.stderr, pruned.stderr
    with ResultStore(path) as store:
        assert [x.reusable for x in store.sets()] == [True]


def test_a_report_rebuilt_from_the_store_simulates_nothing_and_is_the_same(tmp_path):
    """build_report twice on one store: the second build reads every graph (power, MDE, size, compare) and gives the same report."""
    from designcalc.report import ReportSettings, build_report
    from designcalc.report.files import report_data
    from designcalc.report.render import render_json
    from designcalc.report.tables import report_tables

    s = load_scenario(DEMO)
    settings = ReportSettings(units=(200,), treatment_probabilities=(0.5,), graphs=4, assignments_per_graph=4, precision=0.5, max_units=800, workers=2)
    with ResultStore(tmp_path / "r.sqlite") as store:
        first = build_report(s, settings, store=store)
        computed, reused = store.computed, store.reused  # the comparison already reuses some of the MDE's null-pass graphs
        second = build_report(s, settings, store=store)
        assert computed > 0 and store.computed == computed and store.reused - reused == computed + reused

    def canonical(report) -> str:
        d = json.loads(render_json(report_data(report, report_tables(report), [])))
        d["provenance"].pop("utc_time", None)
        return json.dumps(d, sort_keys=True)

    assert canonical(first) == canonical(second)


def test_probabilities_that_round_alike_are_different_points(tmp_path):
    """The store keys a design point by its exact probability: 0.3 and 0.3 + 1e-10 are not served from one block."""
    s = load_scenario(DEMO)
    with ResultStore(tmp_path / "r.sqlite") as store:
        list(simulate_graphs(s, [(DesignPoint(200, 0.3), 0)], store=store))
        (other,) = simulate_graphs(s, [(DesignPoint(200, 0.3 + 1e-10), 0)], store=store)
        assert (store.reused, store.computed) == (0, 2)
    assert other.estimands.treatment_probability == 0.3 + 1e-10


def test_graphs_written_after_another_process_pruned_their_set_stay_listed(tmp_path):
    """Store A keeps writing after store B pruned everything: the set comes back in `sets()` and prune --all removes it."""
    s = load_scenario(DEMO)
    path = tmp_path / "r.sqlite"
    with ResultStore(path) as a, ResultStore(path) as b:
        list(simulate_graphs(s, [(DesignPoint(200, 0.5), 0)], store=a))
        b.prune(everything=True)
        list(simulate_graphs(s, [(DesignPoint(200, 0.5), 1)], store=a))
        assert [x.blocks for x in b.sets()] == [1]
        assert b.prune(everything=True) == (1, 1)
        assert b.sets() == []


def test_a_damaged_store_file_never_gives_a_traceback_or_other_numbers(tmp_path):
    """A page of the file overwritten: opening refuses with the store named, or the run finishes with the same numbers."""
    s = load_scenario(DEMO)
    path = tmp_path / "r.sqlite"
    with ResultStore(path) as store:
        reference = simulate_power(s, store=store, **SMALL)
    with sqlite3.connect(path) as db:
        db.execute("PRAGMA wal_checkpoint(TRUNCATE)")
        page = db.execute("PRAGMA page_size").fetchone()[0]
    data = bytearray(path.read_bytes())
    data[5 * page : 6 * page] = b"\xff" * page
    path.write_bytes(bytes(data))
    try:
        store = ResultStore(path)
    except DesignCalcError as exc:
        assert str(path) in str(exc)
        return
    with store:
        again = simulate_power(s, store=store, **SMALL)
    assert without_time(again) == without_time(reference)


def test_the_fingerprint_changes_with_the_engines_results_version(monkeypatch):
    """A build that computes other numbers under the same designcalc version (engine.RESULTS_VERSION) never reuses old blocks."""
    import designcalc.store as store_module

    scenario = parse_scenario(DEMO.read_text(), source="a.toml")
    before = numbers_fingerprint(scenario)
    monkeypatch.setattr(store_module, "RESULTS_VERSION", store_module.RESULTS_VERSION + 1)
    assert numbers_fingerprint(scenario) != before

"""Execution backends: the same numbers on any number of workers (STYLE.md §4), Ctrl-C keeps finished graphs."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
from reproducibility import without_time

from designcalc.errors import DesignCalcError
from designcalc.execution import check_workers
from designcalc.power import simulate_power
from designcalc.scenario import load_scenario

ROOT = Path(__file__).parents[1]
DEMO = ROOT / "scenarios" / "lake_orrin_savings.toml"


@pytest.mark.parametrize("adaptive", [False, True])
def test_power_is_identical_on_one_and_two_workers(adaptive):
    """simulate_power gives equal (not close) results in-process and on a two-process pool, adaptive or not."""
    s = load_scenario(DEMO)
    settings = dict(units=[200, 300], treatment_probabilities=[0.3, 0.5], graphs=4, assignments_per_graph=5)
    if adaptive:
        settings.update(adaptive=True, max_graphs=8, relative_precision=0.001)
    one = simulate_power(s, workers=1, **settings)
    two = simulate_power(s, workers=2, **settings)
    assert without_time(one) == without_time(two)
    if adaptive:
        assert {r.graphs for r in two.records} == {8}


def test_on_point_sees_the_same_draws_on_a_pool():
    """The raw draws handed to on_point are identical whatever the worker count (the report's Holm power uses them)."""
    s = load_scenario(DEMO)
    seen = {1: [], 2: []}
    for workers in (1, 2):
        simulate_power(s, units=[200], treatment_probabilities=[0.5], graphs=3, assignments_per_graph=4, workers=workers,
                       on_point=lambda point, draws, w=workers: seen[w].append([d.estimates for d in draws]))
    for a, b in zip(seen[1][0], seen[2][0]):
        assert a.keys() == b.keys() and all((a[k] == b[k]).all() for k in a)


@pytest.mark.parametrize("bad", [0, -1, 1.5])
def test_workers_must_be_a_positive_whole_number(bad):
    """A worker count below 1 or not whole is refused with its name."""
    with pytest.raises(DesignCalcError, match=r"`workers` must be a whole number >= 1"):
        check_workers(bad)


def test_ctrl_c_on_a_pool_keeps_finished_points_and_leaves_no_workers():
    """SIGINT to `designcalc power --workers 2` prints the finished design points (exit 130) and no worker survives."""
    proc = subprocess.Popen(
        [sys.executable, "-m", "designcalc", "power", str(DEMO), "-n", "300", "-n", "40000", "-p", "0.5", "--graphs", "24",
         "--workers", "2", "--format", "json"],
        cwd=ROOT, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, start_new_session=True,
        # A background job (as CI may run us) inherits SIGINT ignored, and Python then installs no
        # KeyboardInterrupt handler; restore the default so the child behaves as under a terminal.
        preexec_fn=lambda: signal.signal(signal.SIGINT, signal.SIG_DFL),
    )
    time.sleep(7)  # start-up and the 300-unit point take about 2 s; the 40000-unit one about 30 s on two workers
    os.killpg(proc.pid, signal.SIGINT)  # as a terminal does: the whole process group
    out, err = proc.communicate(timeout=120)
    assert proc.returncode == 130, err
    import json

    data = json.loads(out)
    assert data["partial"] is True
    assert {r["units"] for r in data["results"]} == {300}
    with pytest.raises(ProcessLookupError):
        os.killpg(proc.pid, 0)  # nothing left in the group


def test_sample_size_is_identical_on_one_and_two_workers():
    """required_sample_size gives equal results in-process and on a two-process pool (its grid and refinement)."""
    from dataclasses import replace

    from designcalc.sample_size import required_sample_size

    s = load_scenario(DEMO)
    s = replace(s, estimators=replace(s.estimators, direct=("hajek",), direct_variance=("neyman",), spillover=("pc_balancing",)))
    settings = dict(treatment_probabilities=[0.5], graphs=8, assignments_per_graph=5, relative_precision=0.3, max_units=2000)
    one = required_sample_size(s, workers=1, **settings)
    two = required_sample_size(s, workers=2, **settings)
    assert without_time(one) == without_time(two)
    assert any(r.points for r in two.records)


def test_power_on_a_dask_local_cluster_equals_the_local_run():
    """simulate_power on a dask LocalCluster (2 worker processes) gives exactly the in-process numbers, kernel scenario too."""
    pytest.importorskip("distributed", reason="dask.distributed not installed (pip install -e '.[test]')")
    for name in ("lake_orrin_savings.toml", "marrow_valley_hygiene.toml"):
        s = load_scenario(ROOT / "scenarios" / name)
        settings = dict(units=[200, 300], treatment_probabilities=[0.4], graphs=3, assignments_per_graph=4)
        local = simulate_power(s, workers=1, **settings)
        dask = simulate_power(s, cluster="local", **settings)
        assert without_time(local) == without_time(dask), name


def test_an_unreachable_cluster_is_a_user_error():
    """--cluster naming no scheduler exits 2 with a message naming --cluster and the address, no traceback."""
    pytest.importorskip("distributed", reason="dask.distributed not installed")
    run = subprocess.run(
        [sys.executable, "-m", "designcalc", "power", str(DEMO), "-n", "200", "--graphs", "2", "--assignments", "2",
         "--cluster", "tcp://127.0.0.1:9"],
        cwd=ROOT, capture_output=True, text=True, timeout=120, check=False,
    )
    assert run.returncode == 2, run.stderr
    assert "--cluster tcp://127.0.0.1:9: cannot reach the dask scheduler" in run.stderr and "Traceback" not in run.stderr


def test_one_cluster_connection_serves_a_whole_size_search():
    """A size search on one open ClusterConnection (as the commands use it) equals the local search; the scenario is sent once."""
    pytest.importorskip("distributed", reason="dask.distributed not installed")
    from dataclasses import replace

    from designcalc.execution import ClusterConnection
    from designcalc.sample_size import required_sample_size

    s = load_scenario(DEMO)
    s = replace(s, estimators=replace(s.estimators, direct=("hajek",), direct_variance=("neyman",), spillover=("pc_balancing",)))
    settings = dict(treatment_probabilities=[0.5], graphs=8, assignments_per_graph=4, relative_precision=0.3, max_units=1500)
    local = required_sample_size(s, workers=1, **settings)
    with ClusterConnection("local") as connection:
        on_dask = required_sample_size(s, cluster=connection, **settings)
        assert len(connection._scattered) == 1  # one scenario, scattered once for every call of the search
    assert without_time(local) == without_time(on_dask)


def test_kernel_scenarios_pickle_so_spawned_workers_get_the_same_numbers():
    """Plain pickle carries a kernel scenario (its compiled kernel is rebuilt), so a spawn-started pool, as on
    platforms without fork, simulates exactly the graphs of this process; expression kernels included."""
    import multiprocessing
    import pickle
    from concurrent.futures import ProcessPoolExecutor

    from designcalc.engine import DesignPoint, simulate_graph
    from designcalc.scenario import parse_scenario

    text = (ROOT / "scenarios" / "marrow_valley_hygiene.toml").read_text()
    expression = text.replace('kernel = "distance_decay"', 'kernel = "expression"\nexpression = "0.05 + exp(-abs(u - v) / 0.08)"', 1)
    expression = "\n".join(line for line in expression.splitlines() if not line.startswith(("length_scale", "floor")))
    scenarios = (load_scenario(ROOT / "scenarios" / "marrow_valley_hygiene.toml"), parse_scenario(expression, source="expression.toml"))
    assert [s.network.family for s in scenarios] == ["distance_decay", "expression"]
    for s in scenarios:
        copy = pickle.loads(pickle.dumps(s))
        assert copy == s
        here = simulate_graph(s, DesignPoint(200, 0.4), 1)
        with ProcessPoolExecutor(1, mp_context=multiprocessing.get_context("spawn")) as pool:
            there = pool.submit(simulate_graph, s, DesignPoint(200, 0.4), 1).result()
        for key in here.estimates:
            assert (here.estimates[key] == there.estimates[key]).all(), key


def test_mde_and_compare_are_identical_on_one_and_two_workers_and_from_the_store(tmp_path):
    """The MDE search (null pass, verification, adaptive rounds) and the probability comparison give equal results
    in-process (with its graph cache), on a two-process pool, and rerun from a results store that then computes nothing."""
    from designcalc.compare import compare_treatment_probabilities
    from designcalc.mde import minimum_detectable_effects
    from designcalc.store import ResultStore

    s = load_scenario(DEMO)
    settings = dict(units=[300], treatment_probabilities=[0.5], graphs=6, assignments_per_graph=5, relative_precision=0.15, max_graphs=24)
    one = minimum_detectable_effects(s, workers=1, **settings)
    two = minimum_detectable_effects(s, workers=2, **settings)
    with ResultStore(tmp_path / "r.sqlite") as store:
        stored = minimum_detectable_effects(s, workers=2, store=store, **settings)
        computed = store.computed
        again = minimum_detectable_effects(s, workers=1, store=store, **settings)
        assert store.computed == computed and store.reused == computed
    assert without_time(one) == without_time(two) == without_time(stored) == without_time(again)
    assert any(r.graphs > 6 for r in one.records)  # the adaptive rounds ran
    compare = dict(probabilities=[0.3, 0.5], units=[300], graphs=4, assignments_per_graph=4)
    assert without_time(compare_treatment_probabilities(s, workers=1, **compare)) == without_time(compare_treatment_probabilities(s, workers=2, **compare))

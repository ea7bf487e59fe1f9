"""The solver commands `designcalc mde`, `size` and `compare`, and `power --adaptive`: formats, exit codes, Ctrl-C.

Every run uses tiny settings (200 units, 3 graphs x 4 assignments, ±30% precision,
at most 6 graphs) so the whole file takes well under a minute; the statistics of
the solvers are tested in the library's own test files.
"""

from __future__ import annotations

import csv
import io
import json
import math
import re
import subprocess
import sys
from pathlib import Path

import pytest
import scipy.stats
from rich.console import Console
from typer.testing import CliRunner

import designcalc.mde
import designcalc.execution
import designcalc.sample_size
from designcalc.cli.main import app
from designcalc.cli.output import progress_reporter
from designcalc.engine import EngineProgress

ROOT = Path(__file__).resolve().parents[1]
LAKE = "scenarios/lake_orrin_savings.toml"
MARROW = "scenarios/marrow_valley_hygiene.toml"
TINY = ("--graphs", "3", "--assignments", "4")
PRECISE = ("--precision", "0.3", "--max-graphs", "6")


def _run(*args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "designcalc", *args], check=False, capture_output=True, text=True, cwd=ROOT, timeout=300)


def _ok(*args: str) -> subprocess.CompletedProcess[str]:
    result = _run(*args)
    assert result.returncode == 0, result.stderr
    assert "Traceback" not in result.stderr
    return result


def _json(*args: str) -> dict:
    data = json.loads(_ok(*args, "--format", "json").stdout)
    assert {"scenario", "partial", "provenance", "warnings", "cautions", "results"} <= set(data)
    for key in ("tool_version", "scenario_sha256", "seed_entropy", "random_stream_layout_version"):
        assert key in data["provenance"]
    assert data["partial"] is False
    assert len(data["cautions"]) == 3
    return data


# --- designcalc mde ---------------------------------------------------------------------------


def test_mde_table_shows_the_planner_columns_and_says_what_mde_means() -> None:
    """The MDE table has SE, MDE with its interval, SD units, verified power, size and method, and a footer."""
    out = _ok("mde", LAKE, "-n", "200", "-p", "0.5", *TINY, *PRECISE).stdout
    header = next(line for line in out.splitlines() if "estimand" in line)
    for column in ("reference", "SE ± MC se", "MDE [95% MC]", "MDE (SD units)", "verified power ± MC se", "size", "method", "flags"):
        assert column in header, column
    assert "80% power, two-sided alpha 0.05" in out
    assert "precision: 95% MC interval half-width" in out
    assert "replicates per test:" in out
    assert re.search(r"formula verified|searched|not reachable", out)
    assert out.count("caution:") == 3


def test_mde_json_records_hold_the_formula_mde_and_its_interval() -> None:
    """JSON records: formula MDE = (q_0.975 + q_0.8) x SE with the named reference distribution; MDE inside its interval."""
    data = _json("mde", MARROW, "-n", "200", "-p", "0.5", *TINY, *PRECISE)
    # Marrow Valley plans hajek/neyman, two spillover estimators and their two totals.
    assert len(data["results"]) == 5
    for r in data["results"]:
        # Outside reference: scipy.stats quantiles; with the normal this is 2.8016 (Bloom 1995, Evaluation Review 19(5)).
        df = None if r["reference_distribution"] == "normal" else float(r["reference_distribution"][2:-1])
        dist = scipy.stats.norm if df is None else scipy.stats.t(df)
        assert r["multiplier"] == pytest.approx(dist.ppf(0.975) + dist.ppf(0.8), rel=1e-9)
        assert r["formula_mde"] == pytest.approx(r["multiplier"] * r["standard_error"], rel=1e-9)
        assert 3 <= r["graphs"] <= 6, "--max-graphs 6 caps the graphs spent on precision"
        assert r["replicates"] == 4 * r["graphs"]
        if r["method"] == "not reachable":
            assert math.isnan(r["mde"]) and r["flags"]
        else:
            assert r["mde_low"] <= r["mde"] <= r["mde_high"]
    direct = next(r for r in data["results"] if r["estimand"] == "direct")
    assert direct["reference_distribution"] == "t(198)"  # "auto": t(n - 2) for the direct test at n = 200


def test_mde_csv_without_verification_has_one_row_per_test() -> None:
    """`--no-verify --format csv`: a header and one formula-only row per planned test (17 in Lake Orrin)."""
    out = _ok("mde", LAKE, "-n", "200", "-p", "0.5", *TINY, "--no-verify", "--format", "csv").stdout
    rows = list(csv.DictReader(io.StringIO(out)))
    assert out.startswith("estimand,estimator,variance_estimator,units,treatment_probability,reference_distribution")
    assert len(rows) == 17
    assert {r["method"] for r in rows} == {"formula (not verified)"}


# --- designcalc size --------------------------------------------------------------------------


def test_size_table_shows_required_n_and_explains_n() -> None:
    """The size table has status, required n with its interval, the verified point, the SD slope and a footer about n."""
    out = _ok("size", MARROW, "-p", "0.5", "--max-units", "800", *TINY, *PRECISE).stdout
    header = next(line for line in out.splitlines() if "estimand" in line)
    for column in ("status", "required n [95% MC]", "verified at n", "power ± MC se", "SD slope", "reason / flags"):
        assert column in header, column
    assert "number of units in the whole network" in out
    assert "density rule (mean degree 12 at 1000 units" in out
    assert "up to 800 units" in out
    assert out.count("caution:") == 3


def test_size_json_and_csv_report_the_same_simulated_points() -> None:
    """JSON nests every simulated size; CSV summarises the same points as `n:power` (the runs are seeded, so equal)."""
    args = ("size", LAKE, "-p", "0.5", "--max-units", "800", *TINY, *PRECISE)
    data = _json(*args)
    rows = list(csv.DictReader(io.StringIO(_ok(*args, "--format", "csv").stdout)))
    assert len(rows) == len(data["results"]) == 17
    for record, row in zip(data["results"], rows):
        assert record["status"] in ("reached", "not reachable", "reached at the smallest size")
        assert record["points"] and all(p["units"] <= 800 for p in record["points"])
        if record["status"] == "reached":
            assert record["units_low"] <= record["required_units"] <= record["units_high"] + 1
        if record["status"] == "not reachable":
            assert record["required_units"] is None and record["reason"]
            assert row["required_units"] == ""
        assert re.fullmatch(r"\d+:\d\.\d{3}(;\d+:\d\.\d{3})*", row["points"])
        assert row["points"] == ";".join(f"{p['units']}:{p['power']:.3f}" for p in record["points"])


# --- designcalc compare -----------------------------------------------------------------------


def test_compare_table_has_a_block_per_estimand_marks_and_the_choice() -> None:
    """The compare table has one block per size and estimand, best/tied marks, and the joint-criterion choice."""
    out = _ok("compare", MARROW, "-n", "200", "-p", "0.3", "-p", "0.5", *TINY, "--objective", "spillover", "--cap", "direct=100").stdout
    for block in ("n = 200: direct effect", "n = 200: spillover effect", "n = 200: total effect"):
        assert block in out
    assert "best" in out
    assert "Joint criterion: smallest MDE of spillover subject to MDE of direct <= 100" in out
    assert "spillover = spillover:pc_balancing_corrected:plug_in" in out


def test_compare_json_marks_exactly_one_best_per_test_and_ties_by_the_documented_rule() -> None:
    """One best per size and test; tied = within two combined MC SEs of the best (half-widths / 1.96)."""
    data = _json("compare", LAKE, "-n", "200", "-p", "0.3", "-p", "0.5", *TINY, "--objective", "total", "--cap", "direct:hajek=3")
    groups: dict[tuple, list[dict]] = {}
    for r in data["results"]:
        groups.setdefault((r["units"], r["estimand"], r["estimator"], r["variance_estimator"]), []).append(r)
    assert len(groups) == 17 and all(len(g) == 2 for g in groups.values())
    for members in groups.values():
        best = [r for r in members if r["best"]]
        assert len(best) == 1
        b = best[0]
        for r in members:
            if r is b:
                continue
            combined = math.hypot(r["mde_high"] - r["mde_low"], b["mde_high"] - b["mde_low"]) / 2 / 1.959963984540054
            assert r["tied_with_best"] == (abs(r["mde"] - b["mde"]) <= 2 * combined)
    assert len(data["choices"]) == 1
    choice = data["choices"][0]
    assert choice["units"] == 200 and choice["treatment_probability"] in (0.3, 0.5, None)


def test_compare_default_grid_and_csv_mark_the_chosen_probability() -> None:
    """Without -p the grid is 0.1..0.9 plus the scenario's; CSV marks the rows of the chosen probability."""
    out = _ok("compare", MARROW, "-n", "200", *TINY, "--objective", "direct", "--format", "csv").stdout
    rows = list(csv.DictReader(io.StringIO(out)))
    assert out.splitlines()[0].endswith("best,tied_with_best,chosen_by_criterion,flags")
    assert sorted({float(r["treatment_probability"]) for r in rows}) == [0.1, 0.2, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8, 0.9]
    chosen = {r["treatment_probability"] for r in rows if r["chosen_by_criterion"] == "True"}
    assert len(chosen) == 1
    (pi,) = chosen
    # The criterion minimises the direct MDE: the chosen probability has the smallest hajek/neyman MDE.
    direct = {r["treatment_probability"]: float(r["mde"]) for r in rows if r["estimand"] == "direct"}
    assert direct[pi] == min(direct.values())


# --- user mistakes ----------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("args", "expected"),
    [
        (("mde", LAKE, "--precision", "0.7"), "--precision must be in (0, 0.5]"),
        (("mde", LAKE, "--precision", "0"), "--precision must be in (0, 0.5]"),
        (("mde", LAKE, "-p", "1.5"), "--treatment-probability must be in (0, 1)"),
        (("mde", LAKE, "--graphs", "5", "--max-graphs", "3"), "--max-graphs must be at least"),
        (("mde", LAKE, "--format", "md"), "--format must be one of table, json, csv"),
        (("mde", "no_such_scenario.toml"), "no such file"),
        (("size", LAKE, "--max-units", "4"), "--max-units"),
        (("size", LAKE, "-p", "0"), "--treatment-probability must be in (0, 1)"),
        (("compare", LAKE, "-p", "1.2"), "--probabilities must be in (0, 1)"),
        (("compare", LAKE, "--objective", "spill"), "--objective: 'spill' is not ESTIMAND[:ESTIMATOR[:VARIANCE]]"),
        (("compare", LAKE, "--objective", "spillover:nope"), "--objective: no planned test matches"),
        (("compare", LAKE, "--objective", "spillover", "--cap", "direct"), "--cap: 'direct' is not SPEC=VALUE"),
        (("compare", LAKE, "--objective", "spillover", "--cap", "direct=-1"), "must be a positive number"),
        (("compare", LAKE, "--objective", "spillover", "--cap", "direct=abc"), "--cap: 'abc' in 'direct=abc' is not a number"),
        (("compare", LAKE, "--cap", "direct=1"), "--cap needs --objective"),
    ],
)
def test_bad_options_exit_2_and_name_the_option(args: tuple[str, ...], expected: str) -> None:
    """A malformed option gives exit code 2, a message naming the option and its form, and no traceback."""
    result = _run(*args)
    assert result.returncode == 2
    assert expected in result.stderr
    assert "Traceback" not in result.stderr + result.stdout
    assert result.stdout == ""


# --- Ctrl-C -----------------------------------------------------------------------------------


def _interrupt_at(module: object, monkeypatch: pytest.MonkeyPatch, when: object) -> None:
    """Make the graph simulation raise KeyboardInterrupt (what Ctrl-C does) at the chosen design point (size: in the executor, which its workers inherit by fork)."""
    original = module.simulate_graph  # type: ignore[attr-defined]

    def simulate_graph(scenario, point, *args, **kwargs):  # type: ignore[no-untyped-def]
        if when(point):  # type: ignore[operator]
            raise KeyboardInterrupt
        return original(scenario, point, *args, **kwargs)

    monkeypatch.setattr(module, "simulate_graph", simulate_graph)


@pytest.mark.parametrize(
    ("module", "args", "when", "finished"),
    [
        (designcalc.execution, ("mde", MARROW, "-n", "200", "-n", "300", "-p", "0.5", *TINY, *PRECISE), lambda p: p.units == 300, {"units": 200}),
        (designcalc.execution, ("size", MARROW, "-p", "0.4", "-p", "0.5", "--max-units", "800", *TINY, *PRECISE), lambda p: p.treatment_probability == 0.5, {"treatment_probability": 0.4}),
        (designcalc.execution, ("compare", MARROW, "-n", "200", "-n", "300", "-p", "0.5", *TINY, "--objective", "direct"), lambda p: p.units == 300, {"units": 200}),
    ],
    ids=["mde", "size", "compare"],
)
def test_ctrl_c_prints_the_finished_part_and_exits_130(module, args, when, finished, monkeypatch) -> None:  # type: ignore[no-untyped-def]
    """Ctrl-C in the second design point: exit code 130, the first point's results, marked partial."""
    _interrupt_at(module, monkeypatch, when)
    result = CliRunner().invoke(app, [*args, "--format", "json"])
    assert result.exit_code == 130, result.output
    assert "interrupted" in result.stderr
    data = json.loads(result.stdout)
    assert data["partial"] is True
    assert data["results"], "the finished design point is kept"
    (key, value), = finished.items()
    assert {r[key] for r in data["results"]} == {value}
    table = CliRunner().invoke(app, list(args))
    assert table.exit_code == 130
    assert "PARTIAL: interrupted" in table.stdout


# --- progress display and power --adaptive ----------------------------------------------------


def test_solver_progress_shows_a_count_of_graphs_not_a_bar() -> None:
    """With total_graphs = 0 (unknown) the display counts graphs and shows elapsed time; with a total it shows n/total."""
    for known, update, expected in ((False, EngineProgress(7, 0, 1.5), "7 graphs"), (True, EngineProgress(3, 10, 1.0), "3/10")):
        buffer = io.StringIO()
        console = Console(file=buffer, force_terminal=True, width=100, no_color=True)
        with progress_reporter(console, known_total=known) as report:
            report(update)
            report(update)
        assert expected in buffer.getvalue()


def test_power_adaptive_adds_graphs_up_to_max_graphs(tmp_path: Path) -> None:
    """`power --adaptive` gives unsettled design points more graphs, never more than simulation.max_graphs."""
    scenario = tmp_path / "marrow_capped.toml"
    text = (ROOT / MARROW).read_text()
    assert "graphs = 30\n" in text
    # [simulation] is the file's last table; max_graphs must be at least graphs.
    scenario.write_text(text.replace("graphs = 30\n", "graphs = 2\n") + "max_graphs = 8\n")
    args = ("power", str(scenario), "-n", "200", "-p", "0.5", "--graphs", "2", "--assignments", "4", "--format", "json")
    fixed = json.loads(_ok(*args).stdout)["results"]
    adaptive = json.loads(_ok(*args, "--adaptive").stdout)["results"]
    assert {r["graphs"] for r in fixed} == {2}
    graphs = {r["graphs"] for r in adaptive}
    assert max(graphs) > 2 and max(graphs) <= 8
    assert all(r["replicates"] <= 4 * r["graphs"] for r in adaptive)

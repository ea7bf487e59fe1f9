"""The command layer: exit codes, formats, and no tracebacks for user mistakes."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "scenarios" / "lake_orrin_savings.toml"


def _run(*args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "designcalc", *args], capture_output=True, text=True, cwd=ROOT, timeout=300)


def test_import_does_not_pull_in_the_command_layer() -> None:
    """`import designcalc` loads neither typer nor rich (STYLE.md §9)."""
    code = "import sys, designcalc; print(any(m in sys.modules for m in ('typer', 'rich')))"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"


def test_check_accepts_both_demo_scenarios() -> None:
    """`designcalc check` exits 0 on the demo scenarios and prints the regime and estimands."""
    for name in ("lake_orrin_savings.toml", "marrow_valley_hygiene.toml"):
        result = _run("check", f"scenarios/{name}")
        assert result.returncode == 0, result.stderr
        assert "regime:" in result.stdout
        assert "Exact estimands" in result.stdout
    # The Lake Orrin demo states a baseline covariate: check reports it and Bloom's factor.
    result = _run("check", "scenarios/lake_orrin_savings.toml")
    assert "baseline savings (R² 0.5" in result.stdout and "sqrt(1 - R²) = 0.707" in result.stdout


def test_check_rejects_a_bad_probability_with_the_key_and_no_traceback(tmp_path: Path) -> None:
    """An impossible treatment probability gives exit code 2 and names the dotted key."""
    bad = tmp_path / "bad.toml"
    bad.write_text(DEMO.read_text().replace("treatment_probability = [0.3, 0.5]", "treatment_probability = [1.2]"))
    result = _run("check", str(bad))
    assert result.returncode == 2
    assert "bad.toml: design.treatment_probability[0]" in result.stderr
    assert "Traceback" not in result.stderr + result.stdout


def test_missing_file_is_a_user_error() -> None:
    """A scenario path that does not exist gives exit code 2, not a traceback."""
    result = _run("power", "no_such_scenario.toml")
    assert result.returncode == 2
    assert "no such file" in result.stderr
    assert "Traceback" not in result.stderr


def test_power_option_out_of_range_is_a_user_error() -> None:
    """A treatment probability override outside (0, 1) gives exit code 2."""
    result = _run("power", str(DEMO), "-p", "1.5")
    assert result.returncode == 2
    assert "Traceback" not in result.stderr


def test_power_json_has_the_documented_fields() -> None:
    """`--format json` carries provenance and one record per point x estimand x estimator (README)."""
    result = _run("power", str(DEMO), "-n", "200", "-p", "0.5", "--graphs", "2", "--assignments", "3", "--format", "json")
    assert result.returncode == 0, result.stderr
    data = json.loads(result.stdout)
    for key in ("tool_version", "scenario_sha256", "seed_entropy", "random_stream_layout_version", "python", "numpy", "scipy", "utc_time"):
        assert key in data["provenance"]
    required = {"estimand", "estimator", "variance_estimator", "units", "treatment_probability", "true_effect", "mean_estimate",
                "bias", "sd", "power", "power_mc_se", "oracle_power", "size", "coverage", "replicates", "graphs"}
    assert data["results"] and all(required <= set(r) for r in data["results"])
    # 2 direct estimators x 2 variances + lin (hc2) + 6 spillover + 6 totals, as planned in the demo.
    assert len(data["results"]) == 17
    assert {r["replicates"] for r in data["results"] if r["estimand"] == "direct"} == {6}


def test_power_csv_has_a_header_and_rows() -> None:
    """`--format csv` writes a header and one row per record."""
    result = _run("power", str(DEMO), "-n", "200", "-p", "0.5", "--graphs", "2", "--assignments", "2", "--format", "csv")
    assert result.returncode == 0, result.stderr
    lines = result.stdout.strip().splitlines()
    assert lines[0].startswith("estimand,estimator,variance_estimator")
    assert len(lines) == 18  # header + 17 planned tests


def test_figures_option_writes_each_commands_figure_next_to_its_table(tmp_path: Path) -> None:
    """--figures DIR on check, power, mde, size and compare writes that command's figure as PNG and SVG."""
    folder = tmp_path / "figs"
    small = ["--graphs", "3", "--assignments", "3"]
    runs = {
        "network": ["check", str(DEMO)],
        "power_by_units": ["power", str(DEMO), "-n", "200", "-n", "400", "-p", "0.5", *small],
        "mde_by_units": ["mde", str(DEMO), "-n", "200", "-n", "400", "-p", "0.5", "--no-verify", *small],
        "mde_by_probability_200": ["compare", str(DEMO), "-n", "200", "-p", "0.3", "-p", "0.5", *small],
        "power_curves": ["size", str(DEMO), "-p", "0.5", "--graphs", "4", "--assignments", "3", "--precision", "0.5", "--max-units", "800"],
    }
    for stem, args in runs.items():
        run = _run(*args, "--figures", str(folder))
        assert run.returncode == 0, run.stderr
        assert f"figure: {folder / stem}.png" in run.stderr
        assert (folder / f"{stem}.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
        assert (folder / f"{stem}.svg").read_text().lstrip().startswith("<?xml")


def test_figures_option_rejects_a_file_before_simulating(tmp_path: Path) -> None:
    """--figures naming a file is a user error (exit 2, the option named), found before any simulation."""
    target = tmp_path / "taken"
    target.write_text("x")
    run = _run("power", str(DEMO), "--figures", str(target))
    assert run.returncode == 2 and "--figures" in run.stderr and "Traceback" not in run.stderr

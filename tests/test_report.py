"""designcalc report: formats agree with each other and with `designcalc power --format json`, byte-reproducible, atomic."""

from __future__ import annotations

import csv
import hashlib
import html.parser
import json
import math
import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import scipy.stats

from designcalc.errors import DesignCalcError
from designcalc.report import ReportSettings, build_report, write_report
from designcalc.report.tables import MISSING
from designcalc.scenario import load_scenario

DEMO = Path(__file__).parents[1] / "scenarios" / "lake_orrin_savings.toml"
# Small enough for the suite (about 15 s a build): two sizes, one probability, few replicates; the
# size search is capped so the spillover tests end "not reachable" and the direct test is reached.
SMALL = dict(units=(200, 400), treatment_probabilities=(0.5,), graphs=6, assignments_per_graph=5, precision=0.3, max_units=1600)
CLI_SMALL = ["-n", "200", "-n", "400", "-p", "0.5", "--graphs", "6", "--assignments", "5"]


def designcalc(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "designcalc", *args], capture_output=True, text=True, timeout=600, check=False)


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    scenario = load_scenario(DEMO)
    report = build_report(scenario, ReportSettings(**SMALL))
    out = write_report(report, tmp_path_factory.mktemp("reports") / "appendix")
    return report, out


@pytest.fixture(scope="module")
def data(built):
    return json.loads((built[1] / "report.json").read_text())


class _Tables(html.parser.HTMLParser):
    """Every <table id=...> of an HTML page as lists of cell texts."""

    def __init__(self) -> None:
        super().__init__()
        self.tables: dict[str, list[list[str]]] = {}
        self.current: str | None = None
        self.row: list[str] | None = None
        self.cell: list[str] | None = None
        self.resources: list[str] = []

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        for name in ("src", "href"):
            if name in a:
                self.resources.append(f"{tag} {name}={a[name]}")
        if tag in ("script", "link", "iframe", "img"):
            self.resources.append(tag)
        if tag == "table":
            self.current = a.get("id")
            self.tables[self.current] = []
        elif tag == "tr" and self.current:
            self.row = []
        elif tag in ("td", "th") and self.row is not None:
            self.cell = []

    def handle_endtag(self, tag):
        if tag in ("td", "th") and self.cell is not None:
            self.row.append("".join(self.cell))
            self.cell = None
        elif tag == "tr" and self.row is not None:
            self.tables[self.current].append(self.row)
            self.row = None
        elif tag == "table":
            self.current = None

    def handle_data(self, text):
        if self.cell is not None:
            self.cell.append(text)


def _shown(value, column) -> str:
    """How a raw JSON value is shown, by the column's rule (independent re-statement of format_cell)."""
    if value is None:
        return MISSING
    if column["kind"] == "text":
        return str(value)
    if value in ("inf", "-inf"):
        return value
    if column["kind"] == "int":
        return str(int(round(value)))
    if column["kind"] == "fixed":
        return f"{value:.{column['digits']}f}"
    return f"{value:.{column['digits']}g}"


def _markdown_tables(text: str) -> dict[str, list[list[str]]]:
    """Markdown tables keyed by the '### title' above them."""
    out, title, lines = {}, None, text.splitlines()
    for i, line in enumerate(lines):
        if line.startswith("### "):
            title = line[4:]
        if line.startswith("|") and i + 1 < len(lines) and re.match(r"^\|(-+:?\|)+$", lines[i + 1]) and title:
            rows = []
            for row in lines[i + 2 :]:
                if not row.startswith("|"):
                    break
                rows.append([c.strip().replace("\\|", "|") for c in re.split(r"(?<!\\)\|", row)[1:-1]])
            out[title] = rows
            title = None  # one table per title; later tables (provenance) have none
    return out


def _latex_rows(text: str) -> list[list[str]]:
    body = text.split("\\midrule\n")[1].split("\\bottomrule")[0]
    return [[c.strip() for c in re.split(r"(?<!\\)&", line.removesuffix(" \\\\"))] for line in body.strip().splitlines()]


_UNLATEX = (
    ("\\textasciicircum{}", "^"), ("\\textsuperscript{2}", "²"), ("$\\alpha$", "α"), ("$\\pm$", "±"), ("$\\times$", "×"),
    ("$\\le$", "≤"), ("$\\ge$", "≥"), ("$<$", "<"), ("$>$", ">"), ("\\_", "_"), ("\\&", "&"), ("\\%", "%"), ("\\#", "#"),
    ("\\{", "{"), ("\\}", "}"), ("\\$", "$"),
)


def _unlatex(cell: str) -> str:
    """Undo LaTeX escaping (a separate table from the renderer's, so an escaping slip shows)."""
    for escaped, plain in _UNLATEX:
        cell = cell.replace(escaped, plain)
    return cell


def test_every_format_shows_the_json_numbers(built, data):
    """HTML, Markdown, LaTeX and CSV tables show exactly the report.json values (to each column's stated precision)."""
    _, out = built
    page = _Tables()
    page.feed((out / "report.html").read_text())
    markdown = _markdown_tables((out / "report.md").read_text())
    assert data["tables"], "no tables"
    for table_id, table in data["tables"].items():
        columns = table["columns"]
        expected = [[_shown(row[c["key"]], c) for c in columns] for row in table["rows"]]
        assert page.tables[table_id][0] == [c["header"] for c in columns]
        assert page.tables[table_id][1:] == expected, table_id
        assert markdown[table["title"]] == expected, table_id
        latex = (out / "tables" / f"{table_id}.tex").read_text()
        assert latex.isascii(), table_id  # pdflatex-safe
        assert [[_unlatex(c) for c in row] for row in _latex_rows(latex)] == expected, table_id
        with open(out / "tables" / f"{table_id}.csv", newline="") as f:
            rows = list(csv.DictReader(f))
        assert len(rows) == len(table["rows"])
        for parsed, raw in zip(rows, table["rows"]):
            for c in columns:
                value = raw[c["key"]]
                if value is None:
                    assert parsed[c["key"]] == ""
                elif isinstance(value, float):
                    assert float(parsed[c["key"]]) == value  # repr round-trips exactly
                else:
                    assert parsed[c["key"]] == str(value)
        assert json.loads((out / "tables" / f"{table_id}.json").read_text()) == table


def test_power_table_equals_the_power_command_json(data):
    """The report's power table carries exactly the numbers of `designcalc power --format json` for the same settings."""
    run = designcalc("power", str(DEMO), *CLI_SMALL, "--format", "json")
    assert run.returncode == 0, run.stderr
    command = {(r["units"], r["treatment_probability"], r["estimand"], r["estimator"], r["variance_estimator"]): r for r in json.loads(run.stdout)["results"]}
    rows = data["tables"]["power"]["rows"]
    assert len(rows) == len(command) > 0
    for row in rows:
        ref = command[(row["units"], row["treatment_probability"], row["estimand"], row["estimator"], row["variance_estimator"])]
        for field in ("power", "power_mc_se", "true_effect", "bias", "sd", "mean_standard_error", "oracle_power", "replicates"):
            assert row[field] == ref[field], field
        for field in ("size", "size_mc_se", "coverage", "coverage_mc_se"):
            size_row = next(r for r in data["tables"]["size-coverage"]["rows"] if r["units"] == row["units"] and r["estimator"] == row["estimator"] and r["variance_estimator"] == row["variance_estimator"] and r["estimand"] == row["estimand"])
            assert size_row[field] == ref[field], field


def test_key_answers_are_the_solvers_answers(built, data):
    """Key answers repeat the size and MDE records of the key-answer tests (first planned test of each estimand)."""
    report, _ = built
    assert [k[0] for k in report.tests] == ["direct", "spillover", "total"]
    for row in data["tables"]["key-answers"]["rows"]:
        size = report.size.select(estimand=row["estimand"], estimator=row["estimator"], variance_estimator=row["variance_estimator"])[0]
        assert row["required_units"] == size.required_units and row["status"] == size.status
        for n in SMALL["units"]:
            mde = report.mde.select(estimand=row["estimand"], estimator=row["estimator"], variance_estimator=row["variance_estimator"], units=n)[0]
            assert row[f"mde_at_{n}"] == (None if np.isnan(mde.mde) else mde.mde)
    direct = next(r for r in data["tables"]["key-answers"]["rows"] if r["estimand"] == "direct")
    assert direct["status"] == "reached" and 100 < direct["required_units"] < 1600


def test_holm_and_bonferroni_power_come_from_the_power_replicates(built):
    """Unadjusted family power equals the power table's power; Bonferroni <= Holm <= unadjusted on the same replicates."""
    report, _ = built
    mt = report.multiple_testing
    assert mt is not None and len(mt.hypotheses) == 3
    assert mt.bonferroni_alpha == pytest.approx(0.05 / 3) and mt.holm_thresholds == pytest.approx((0.05 / 3, 0.025, 0.05))
    for row in mt.power:
        record = report.power.select(units=row.units, estimand=row.estimand, estimator=row.estimator, variance_estimator=row.variance_estimator)[0]
        assert row.power == pytest.approx(record.power, abs=1e-12)
        assert row.bonferroni_power <= row.holm_power + 1e-12 <= row.power + 2e-12
    for cost in mt.costs:
        # Normal approximation, the formula of CHECKS.md §6 with alpha/3, quantiles from scipy.
        z = scipy.stats.norm.ppf
        assert cost.classical_factor == pytest.approx(((z(1 - 0.05 / 6) + z(0.8)) / (z(0.975) + z(0.8))) ** 2, rel=1e-12)
        assert cost.classical_factor == pytest.approx(1.3338, abs=1e-4)
        assert cost.mde_factor == pytest.approx(cost.classical_factor**0.5, rel=1e-12)
        # With the SD falling as n^slope, the n that restores the power grows by mde_factor^(-1/slope)
        # (solve effect / (c n^slope) = multiplier); slope -1/2 gives back the classical square.
        if cost.estimand == "direct":
            assert cost.sample_size_factor == cost.classical_factor
        elif math.isfinite(cost.sample_size_factor):
            assert cost.sample_size_factor == pytest.approx(cost.mde_factor ** (-1 / cost.sd_slope), rel=1e-12)
        if math.isfinite(cost.sample_size_factor):
            if cost.required_units is not None:
                assert cost.adjusted_units == math.ceil(cost.required_units * cost.sample_size_factor)
    assert any(math.isfinite(c.sample_size_factor) and c.adjusted_units for c in mt.costs)


def test_provenance_and_scenario_copy(built, data):
    """The folder holds the scenario byte for byte, its SHA-256 (hashlib) in the provenance, and the fields a reviewer needs."""
    _, out = built
    copy = (out / "scenario" / DEMO.name).read_bytes()
    assert copy == DEMO.read_bytes()
    prov = json.loads((out / "provenance.json").read_text())
    assert prov == data["provenance"]
    assert prov["scenario_sha256"] == hashlib.sha256(copy).hexdigest()
    for field in ("tool_version", "seed_entropy", "random_stream_layout_version", "replicates_per_design_point", "numpy", "scipy", "networkx", "matplotlib", "utc_time", "relative_precision"):
        assert field in prov, field
    assert prov["replicates_per_design_point"] == 30
    text = (out / "report.md").read_text()
    assert f"designcalc report scenario/{DEMO.name} --out REPORT_DIR" in text
    for caution in data["cautions"]:
        assert caution in text and caution in (out / "report.html").read_text()


def test_html_is_self_contained(built):
    """No scripts, links, images or URLs in the HTML: figures are inline SVG, styles inline."""
    _, out = built
    page_text = (out / "report.html").read_text()
    page = _Tables()
    page.feed(page_text)
    assert page.resources == []
    assert page_text.count("<svg") == 4
    assert re.findall(r"(?:href|src)=\"http|url\(http|@import", page_text) == []


def test_latex_tables_are_booktabs(built):
    """Each LaTeX table is a booktabs tabular with one cell per column on every row."""
    _, out = built
    for path in (out / "tables").glob("*.tex"):
        text = path.read_text()
        assert "\\toprule" in text and "\\midrule" in text and "\\bottomrule" in text
        spec = re.search(r"\\begin\{tabular\}\{([lr]+)\}", text).group(1)
        header = text.split("\\toprule\n")[1].split("\n")[0]
        assert len(re.split(r"(?<!\\)&", header)) == len(spec)
        assert all(len(row) == len(spec) for row in _latex_rows(text))


def test_reproduce_line_rebuilds_a_byte_identical_report(built, data, tmp_path):
    """The report's own "how to reproduce" line, run in its folder, gives identical files except the time stamp."""
    _, first = built
    second = tmp_path / "again"
    command = data["reproduce"].replace("REPORT_DIR", str(second)).split()
    assert command[:2] == ["designcalc", "report"]
    run = subprocess.run([sys.executable, "-m", "designcalc", *command[1:]], capture_output=True, text=True, timeout=600, check=False, cwd=first)
    assert run.returncode == 0, run.stderr
    stamp_1 = json.loads((first / "provenance.json").read_text())["utc_time"]
    stamp_2 = json.loads((second / "provenance.json").read_text())["utc_time"]
    files_1 = sorted(p.relative_to(first) for p in first.rglob("*") if p.is_file())
    files_2 = sorted(p.relative_to(second) for p in second.rglob("*") if p.is_file())
    assert files_1 == files_2
    for rel in files_1:
        a, b = (first / rel).read_bytes(), (second / rel).read_bytes()
        if rel.suffix in (".html", ".md", ".json"):
            a, b = a.replace(stamp_1.encode(), b"TIME"), b.replace(stamp_2.encode(), b"TIME")
        assert a == b, rel


def test_family_power_applies_holm_per_replicate_as_statsmodels_does():
    """Bonferroni and Holm rates equal statsmodels' multipletests applied replicate by replicate, clustered by graph."""
    from statsmodels.stats.multitest import multipletests

    from designcalc.engine import DesignPoint
    from designcalc.power import clustered_mean_se
    from designcalc.report.collect import _Capture, _family_power

    rng = np.random.default_rng(7)
    keys = (("direct", "hajek", "neyman"), ("spillover", "pc_balancing", "plug_in"), ("total", "hajek+pc_balancing", "linearised"))
    point = DesignPoint(100, 0.5)
    p = np.where(rng.random((6, 5, 3)) < 0.5, rng.random((6, 5, 3)) * 0.05, rng.random((6, 5, 3)))
    p[0, 0, 1] = np.nan  # an undefined test in one replicate
    capture = _Capture.__new__(_Capture)
    capture.p_values, capture.single, capture.keys = {point: p}, {point: np.nan_to_num(p, nan=1.0) <= 0.05}, {point: keys}
    rows = _family_power(capture, 0.05)
    for method, field in (("holm", "holm_power"), ("bonferroni", "bonferroni_power")):
        decisions = np.zeros_like(p, dtype=bool)
        for g in range(6):
            for b in range(5):
                ok = ~np.isnan(p[g, b])
                # statsmodels on the defined p-values, with the undefined one counted as p = 1 (never rejected)
                decisions[g, b] = multipletests(np.where(ok, p[g, b], 1.0), alpha=0.05, method=method)[0] & ok
        for j, row in enumerate(rows):
            values = np.where(np.isnan(p[..., j]), np.nan, decisions[..., j].astype(float))
            assert getattr(row, field) == pytest.approx(clustered_mean_se(values)[0], abs=1e-12)


def test_interrupted_write_leaves_no_folder_and_keeps_an_earlier_one(built, tmp_path):
    """Ctrl-C while writing leaves no partial folder; an earlier report in the target stays whole."""
    report, _ = built
    count = 0

    def interrupt_after_three(path):
        nonlocal count
        count += 1
        if count == 3:
            raise KeyboardInterrupt

    target = tmp_path / "appendix"
    with pytest.raises(KeyboardInterrupt):
        write_report(report, target, on_file=interrupt_after_three)
    assert list(tmp_path.iterdir()) == []
    write_report(report, target)
    before = {p: p.read_bytes() for p in target.rglob("*") if p.is_file()}
    count = 0
    with pytest.raises(KeyboardInterrupt):
        write_report(report, target, on_file=interrupt_after_three)
    assert {p: p.read_bytes() for p in target.rglob("*") if p.is_file()} == before
    assert [p.name for p in tmp_path.iterdir()] == ["appendix"]


def test_interrupted_build_raises_and_writes_nothing():
    """Ctrl-C during the solvers raises instead of returning a report built from partial results."""
    calls = []

    def interrupt_in_mde(phase, update):
        calls.append(phase)
        if phase == "minimum detectable effects":
            raise KeyboardInterrupt

    with pytest.raises(KeyboardInterrupt):
        build_report(load_scenario(DEMO), ReportSettings(**SMALL), progress=interrupt_in_mde)
    assert calls[0] == "power" and calls[-1] == "minimum detectable effects"


def test_refuses_to_overwrite_a_folder_of_other_files(built, tmp_path):
    """An existing folder that is not a designcalc report is never replaced: exit 2 with a message naming --out."""
    report, _ = built
    mine = tmp_path / "notes"
    mine.mkdir()
    (mine / "draft.txt").write_text("keep me")
    (mine / "report.json").write_text('{"mine": true}')  # a file of that name does not make it a report
    with pytest.raises(DesignCalcError, match=r"--out .*not an earlier designcalc report"):
        write_report(report, mine)
    assert (mine / "draft.txt").read_text() == "keep me"
    run = designcalc("report", str(DEMO), "--out", str(mine), *CLI_SMALL)
    assert run.returncode == 2 and "not an earlier designcalc report" in run.stderr and "Traceback" not in run.stderr


@pytest.mark.parametrize(
    ("args", "match"),
    [
        (["--precision", "0.9"], r"--precision must be in \(0, 0.5\]"),
        (["-p", "1.5"], r"--treatment-probability must be in \(0, 1\)"),
        (["--test", "indirect"], r"--test: 'indirect' is not ESTIMAND"),
    ],
)
def test_bad_options_are_named(args, match, tmp_path):
    """Bad report options exit 2 with one message naming the option."""
    run = designcalc("report", str(DEMO), "--out", str(tmp_path / "r"), "-n", "200", "--graphs", "2", "--assignments", "2", *args)
    assert run.returncode == 2, run.stderr
    assert re.search(match, run.stderr) and "Traceback" not in run.stderr
    assert not (tmp_path / "r").exists()


def test_interrupt_between_the_two_renames_puts_the_old_report_back(built, tmp_path, monkeypatch):
    """Ctrl-C after the old report is moved aside but before the new one is in: the old report is restored whole."""
    import designcalc.report.files as files

    report, _ = built
    target = write_report(report, tmp_path / "appendix")
    before = {p.relative_to(target): p.read_bytes() for p in target.rglob("*") if p.is_file()}
    real_rename = files.os.rename
    calls = []

    def rename_then_interrupt(src, dst):
        calls.append(dst)
        if len(calls) == 2:  # the staging folder's rename into place
            raise KeyboardInterrupt
        real_rename(src, dst)

    monkeypatch.setattr(files.os, "rename", rename_then_interrupt)
    with pytest.raises(KeyboardInterrupt):
        write_report(report, target)
    monkeypatch.setattr(files.os, "rename", real_rename)
    assert {p.relative_to(target): p.read_bytes() for p in target.rglob("*") if p.is_file()} == before
    assert [p.name for p in tmp_path.iterdir()] == ["appendix"]


@pytest.mark.parametrize(
    ("settings", "match"),
    [
        (dict(precision=0.0), r"`precision` must be in \(0, 0.5\]"),
        (dict(treatment_probabilities=(1.0,)), r"treatment probabilities must be in \(0, 1\); got 1.0"),
        (dict(units=(2,)), r"`units` must be at least 4; got 2"),
        (dict(graphs=1), r"`graphs` must be at least 2; got 1"),
        (dict(search_graphs=1), r"`search_graphs` must be at least 2"),
        (dict(tests=("direct",), all_tests=True), r"not both"),
    ],
)
def test_report_settings_reject_impossible_values(settings, match):
    """ReportSettings names the setting it rejects, with the allowed range and the value received."""
    with pytest.raises(DesignCalcError, match=match):
        ReportSettings(**settings)


def test_an_unplanned_test_is_named_with_the_option():
    """--test naming a test the scenario does not plan lists the planned ones and names --test."""
    with pytest.raises(DesignCalcError, match=r"^--test: no planned test matches 'direct:foo'; planned tests are: direct:hajek:neyman"):
        build_report(load_scenario(DEMO), ReportSettings(tests=("direct:foo",), **{k: v for k, v in SMALL.items()}))

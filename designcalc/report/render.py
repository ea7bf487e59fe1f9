"""Turn a ``Report`` and its tables into HTML, Markdown, LaTeX, CSV and JSON text.

Pure functions of their inputs: no clock, no file system.  The HTML is
self-contained (styles inline, figures as inline SVG, no scripts, no
external requests), so it can be attached to a pre-analysis plan as one file.
"""

from __future__ import annotations

import csv
import html
import io
import json
import re
from collections.abc import Mapping, Sequence
from pathlib import Path

from designcalc.power import CAUTIONS
from designcalc.report.collect import Report
from designcalc.report.tables import Table, json_safe

__all__ = [
    "FIGURES",
    "design_in_words",
    "latex_escape",
    "scenario_copy_path",
    "surveyed_copies",
    "render_csv",
    "render_html",
    "render_json",
    "render_latex",
    "render_markdown",
    "reproduce_command",
]

#: The report's figures: file stem, title, what it shows.
FIGURES = (
    ("power_curves", "Power against sample size", "Simulated power of each key-answer test at the sizes the sample-size search visited, with 95% Monte Carlo bands; the dashed line is the target power and the marks the required size with its 95% Monte Carlo interval."),
    ("mde_by_probability", "Minimum detectable effect against treatment probability", "Formula MDE at one size for a grid of treatment probabilities, with 95% Monte Carlo intervals; the ring marks the best probability."),
    ("sampling_distributions", "Sampling distributions", "Estimates of each key-answer test over all simulated replicates with no effect and with the assumed effect; vertical lines at zero and at the mean true effect."),
    ("network", "One simulated network", "A network the simulation used, drawn with a spring layout: does it look like the study population?"),
)

_ESTIMAND_WORDS = {
    "direct": "the direct effect: the average effect of a unit's own treatment, everyone else assigned as in the design",
    "spillover": "the spillover (indirect) effect: the average summed effect of one unit's treatment on everybody else's outcome",
    "total": "the total effect: direct plus spillover, the change in the mean outcome per unit of treatment probability (the global effect, everyone treated against nobody, is shown by `designcalc check`)",
}


def design_in_words(report: Report) -> list[tuple[str, str]]:
    """The design as a reviewer reads it: (heading, sentence) pairs."""
    s = report.scenario
    d = s.design
    sim = s.simulation
    sizes = ", ".join(f"{n:,}" for n in s.population.units)
    probabilities = ", ".join(f"{p:g}" for p in d.treatment_probabilities)
    population = s.population
    if population.clustered:
        counts = ", ".join(f"{c:,}" for c in population.clusters)
        who = (
            f"{counts} clusters (each number planned separately), {population.cluster_sizes.describe()}; each cluster is its own "
            "network, drawn with the density rule at its own size, with no ties between clusters"
        )
    else:
        who = f"one connected study population (a single network) of {sizes} units, each size planned separately"
    if d.saturation is not None:
        assignment = f"{d.saturation.describe()} (clusters are allocated to the arms in fixed numbers at random, then units within each cluster)."
    elif population.clustered:
        assignment = f"independent (Bernoulli) assignment of each unit to treatment with probability {probabilities}, within every cluster."
    else:
        assignment = f"independent (Bernoulli) assignment of each unit to treatment with probability {probabilities}."
    lines = [
        ("Population", who + "."),
        ("Network model", f"{s.network.describe()}." if s.network.kind == "surveyed" else f"{s.network.describe()}; {s.density.describe()}."),
        ("Outcome model", f"{s.outcome.describe()}; interference runs through the share of a unit's contacts who are treated."),
    ]
    if s.covariates is not None:
        lines.append(("Baseline covariates", report.check.covariate_note.removeprefix("baseline covariates: ") + "."))
    lines += [
        ("Design", assignment),
        ("Estimands", _estimands_in_words(report)),
        ("Estimators and tests", _tests_in_words(report)),
        ("Significance and power", f"{d.alternative} Wald tests at level α = {d.significance_level:g}; target power {d.target_power:.0%}; reference distribution: {d.reference_distribution} ({_reference_words(d.reference_distribution, d.saturation is not None)})."),
        ("Regime", f"{report.check.regime}. {report.check.regime_explanation}"),
        ("Simulation", f"{sim.graphs} networks per design point, {sim.assignments_per_graph} assignments on each ({sim.replicates} replicates); root seed {sim.seed}; MDE and required size to ±{report.settings.precision:.0%} (relative half-width of the 95% Monte Carlo interval)."),
    ]
    return lines


def _reference_words(setting: str, clustered: bool = False) -> str:
    if setting == "normal":
        return "the normal for every test"
    if clustered:
        return "t quantiles with the Welch-Satterthwaite degrees of freedom of the clusters compared (G - 1 within a saturation, G - 2 for a slope)"
    return "t quantiles with n − 2 degrees of freedom for the direct-effect tests (fewer for regressions), the normal for the network spillover tests and the totals"


def _estimands_in_words(report: Report) -> str:
    saturation = report.scenario.design.saturation
    if saturation is None:
        return "; ".join(_ESTIMAND_WORDS[e] for e in ("direct", "spillover", "total")) + "."
    from designcalc.saturation import contrast_names, describe_contrast

    return (
        "contrasts against the pure-control clusters (METHODS.md §5), each with its exact truth on every simulated population: "
        + "; ".join(f"{name}: {describe_contrast(name)}" for name in contrast_names(saturation)) + "."
    )


def _tests_in_words(report: Report) -> str:
    plan = report.scenario.estimators
    if report.scenario.design.saturation is not None:
        chosen = ", ".join(f"{k[0]}: {k[1]}" for k in report.tests)
        return (
            "unit-weighted differences of cell means with cluster-robust standard errors, one small-sample factor per group of clusters "
            "(slopes: OLS on cluster means, HC2), t tests with Welch-Satterthwaite degrees of freedom at the design; "
            f"the key answers use {chosen}."
        )
    planned = f"direct: {', '.join(plan.direct)} with {', '.join(plan.direct_variance)} variance; spillover: {', '.join(plan.spillover)}"
    chosen = ", ".join(f"{k[0]}: {k[1]} / {k[2]}" for k in report.tests)
    return f"planned tests ({planned}); the key answers use {chosen}."


def reproduce_command(report: Report, out: str = "REPORT_DIR") -> str:
    """The command line that rebuilds this report from the copied scenario."""
    st = report.settings
    parts = ["designcalc", "report", scenario_copy_path(report), "--out", out]
    for n in st.units:
        parts += ["--units", str(n)]
    for c in st.clusters:
        parts += ["--clusters", str(c)]
    for p in st.treatment_probabilities:
        parts += ["--treatment-probability", repr(p)]
    for flag, value in (("--graphs", st.graphs), ("--assignments", st.assignments_per_graph), ("--seed", st.seed)):
        if value is not None:
            parts += [flag, str(value)]
    if st.precision != 0.1:
        parts += ["--precision", repr(st.precision)]
    if st.search_graphs:
        parts += ["--search-graphs", str(st.search_graphs)]
    if st.max_units:
        parts += ["--max-units", str(st.max_units)]
    if st.compare_units:
        parts += ["--compare-units", str(st.compare_units)]
    for t in st.tests:
        parts += ["--test", t]
    if st.all_tests:
        parts.append("--all-tests")
    return " ".join(parts)


def surveyed_copies(report: Report) -> list[tuple[str, bytes]]:
    """A surveyed network's edge lists, placed beside the scenario copy under the names the scenario gives them.

    Only plain relative names can be placed so (an absolute path or one
    leaving the folder is not copied; the reproduce line then needs the file
    where the scenario says).
    """
    network = report.scenario.network
    if network.kind != "surveyed":
        return []
    folder = Path(scenario_copy_path(report)).parent
    out = []
    for name, data in zip(network.files, network.file_bytes):
        relative = Path(name)
        if relative.is_absolute() or ".." in relative.parts:
            continue
        out.append(((folder / relative).as_posix(), data))
    return out


def scenario_copy_path(report: Report) -> str:
    """Where the scenario copy goes in the folder: ``scenario/`` under the file's own name."""
    name = Path(report.scenario.source).name
    return f"scenario/{name if name.endswith('.toml') else 'scenario.toml'}"


def _provenance_rows(report: Report) -> list[tuple[str, str]]:
    rows = []
    for key, value in report.provenance.items():
        if isinstance(value, (dict, list)):
            value = json.dumps(value, sort_keys=True)
        rows.append((key, str(value)))
    return rows


# --------------------------------------------------------------------- HTML

_STYLE = """
body { font-family: "DejaVu Sans", Verdana, Arial, sans-serif; color: #1a1a1a; max-width: 1100px; margin: 2em auto; padding: 0 1em; line-height: 1.45; }
h1 { font-size: 1.6em; margin-bottom: 0.2em; } h2 { font-size: 1.25em; margin-top: 2em; border-bottom: 1px solid #ccc; }
p.caption { color: #444; font-size: 0.92em; margin: 0.3em 0 0.6em; }
table { border-collapse: collapse; font-size: 0.85em; margin: 0.5em 0 1.5em; }
th, td { padding: 0.2em 0.6em; text-align: right; border-bottom: 1px solid #e2e2e2; }
th { border-bottom: 2px solid #555; background: #f4f4f4; } td.text, th.text { text-align: left; }
dl.design dt { font-weight: bold; margin-top: 0.5em; } dl.design dd { margin-left: 1.5em; }
.cautions { border: 2px solid #D55E00; padding: 0.6em 1em; background: #fff7f0; }
.warning { color: #8a3b00; } code, pre { background: #f4f4f4; padding: 0.1em 0.3em; }
pre { padding: 0.6em; white-space: pre-wrap; } figure { margin: 1em 0 2em; } figcaption { color: #444; font-size: 0.92em; }
.scroll { overflow-x: auto; }
"""


def _html_table(table: Table) -> str:
    head = "".join(f'<th class="{"text" if c.kind == "text" else "num"}">{html.escape(c.header)}</th>' for c in table.columns)
    body = []
    for row in table.cells():
        cells = "".join(
            f'<td class="{"text" if c.kind == "text" else "num"}">{html.escape(v)}</td>' for c, v in zip(table.columns, row)
        )
        body.append(f"<tr>{cells}</tr>")
    return (
        f'<h3>{html.escape(table.title)}</h3><p class="caption">{html.escape(table.caption)}</p>'
        f'<div class="scroll"><table id="{table.id}"><thead><tr>{head}</tr></thead><tbody>{"".join(body)}</tbody></table></div>'
    )


def render_html(report: Report, tables: Sequence[Table], figures_svg: Mapping[str, str]) -> str:
    """The self-contained HTML report."""
    by_id = {t.id: t for t in tables}
    s = report.scenario
    e = html.escape
    parts = [
        "<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
        f"<title>{e(s.name)}: power analysis appendix</title>", f"<style>{_STYLE}</style></head><body>",
        f"<h1>{e(s.name)}</h1>", f"<p>{e(s.description)}</p>",
        f'<p class="caption">Power analysis appendix made by designcalc {e(str(report.provenance["tool_version"]))} on '
        f'{e(report.generated)} from <code>{e(scenario_copy_path(report))}</code> (SHA-256 <code>{e(s.sha256)}</code>).</p>',
        '<div class="cautions"><strong>Read first.</strong><ul>' + "".join(f"<li>{e(c)}</li>" for c in CAUTIONS) + "</ul></div>",
        '<h2 id="design">1. The design in plain words</h2><dl class="design">',
        *(f"<dt>{e(k)}</dt><dd>{e(v)}</dd>" for k, v in design_in_words(report)),
        "</dl>",
        '<h2 id="answers">2. Key answers</h2>', _html_table(by_id["key-answers"]),
        _html_figure("power_curves", figures_svg), _html_figure("mde_by_probability", figures_svg), _html_table(by_id["mde"]),
        _html_table(by_id["sample-size"]), _html_table(by_id["treatment-probabilities"]),
        '<h2 id="power">3. Power of every planned test</h2>', _html_table(by_id["power"]),
        _html_figure("sampling_distributions", figures_svg),
        *([_html_table(by_id["measurement"])] if "measurement" in by_id else []),
        '<h2 id="size">4. Size and coverage of the feasible tests</h2>', _html_table(by_id["size-coverage"]),
        '<h2 id="assumptions">5. Assumptions and regime warnings</h2>',
        f"<p>{e(report.check.regime)}: {e(report.check.regime_explanation)}</p>", _html_table(by_id["density"]),
        _html_figure("network", figures_svg),
    ]
    if report.warnings:
        parts.append("<ul>" + "".join(f'<li class="warning">{e(w)}</li>' for w in report.warnings) + "</ul>")
    else:
        parts.append("<p>No warnings.</p>")
    parts.append('<h2 id="multiple-testing">6. Several hypotheses</h2>')
    if "multiple-testing-cost" in by_id:
        parts += [_html_table(by_id["multiple-testing-cost"]), _html_table(by_id["multiple-testing-power"])]
    else:
        parts.append("<p>One hypothesis is planned; no adjustment for multiple testing is needed.</p>")
    parts += [
        '<h2 id="provenance">7. Provenance</h2><table id="provenance-table"><tbody>',
        *(f'<tr><th class="text">{e(k)}</th><td class="text">{e(v)}</td></tr>' for k, v in _provenance_rows(report)),
        "</tbody></table>",
        '<h2 id="reproduce">8. How to reproduce</h2>',
        f"<p>From this folder, with designcalc {e(str(report.provenance['tool_version']))}: </p><pre>{e(reproduce_command(report))}</pre>",
        "<p>The same scenario, seed and settings give the same numbers on any machine and number of workers; "
        "only the time stamp differs.</p>",
        '<h2 id="cautions">9. Cautions</h2><div class="cautions"><ul>' + "".join(f"<li>{e(c)}</li>" for c in CAUTIONS) + "</ul>"
        "<p>These are planning figures from simulation, not guarantees. The ethics committee, the consent process and local "
        "rules decide whether and how this study may run; defer to them and to a qualified statistician.</p></div>",
        "</body></html>",
    ]
    return "\n".join(parts) + "\n"


def _prefix_ids(svg: str, prefix: str) -> str:
    """Give an inline SVG's ids (and references to them) a prefix, so several figures on one page never share an id."""
    svg = re.sub(r'\bid="([^"]+)"', lambda m: f'id="{prefix}-{m.group(1)}"', svg)
    svg = re.sub(r"url\(#([^)]+)\)", lambda m: f"url(#{prefix}-{m.group(1)})", svg)
    return re.sub(r'href="#([^"]+)"', lambda m: f'href="#{prefix}-{m.group(1)}"', svg)


def _html_figure(stem: str, figures_svg: Mapping[str, str]) -> str:
    if stem not in figures_svg:
        return ""
    title, caption = next((t, c) for s, t, c in FIGURES if s == stem)
    return (
        f'<figure id="figure-{stem}">{_prefix_ids(figures_svg[stem], stem)}<figcaption><strong>{html.escape(title)}.</strong> '
        f"{html.escape(caption)} (figures/{stem}.png, figures/{stem}.svg)</figcaption></figure>"
    )


# ----------------------------------------------------------------- Markdown


def _md_escape(text: str) -> str:
    return text.replace("|", "\\|")


def _md_table(table: Table) -> str:
    header = "| " + " | ".join(_md_escape(c.header) for c in table.columns) + " |"
    rule = "|" + "|".join("---" if c.kind == "text" else "---:" for c in table.columns) + "|"
    rows = ["| " + " | ".join(_md_escape(v) for v in row) + " |" for row in table.cells()]
    return "\n".join([f"### {table.title}", "", table.caption, "", header, rule, *rows, ""])


def render_markdown(report: Report, tables: Sequence[Table], figure_stems: Sequence[str]) -> str:
    """The Markdown report (figures as links to the PNG files beside it)."""
    by_id = {t.id: t for t in tables}
    s = report.scenario
    out = [
        f"# {s.name}", "", s.description, "",
        f"Power analysis appendix made by designcalc {report.provenance['tool_version']} on {report.generated} from "
        f"`{scenario_copy_path(report)}` (SHA-256 `{s.sha256}`).", "",
        *(f"> **Caution.** {c}" for c in CAUTIONS), "",
        "## 1. The design in plain words", "", *(f"- **{k}.** {v}" for k, v in design_in_words(report)), "",
        "## 2. Key answers", "", _md_table(by_id["key-answers"]),
    ]

    def figure(stem: str) -> list[str]:
        if stem not in figure_stems:
            return []
        title, caption = next((t, c) for st, t, c in FIGURES if st == stem)
        return [f"![{title}](figures/{stem}.png)", "", f"*{title}.* {caption}", ""]

    out += figure("power_curves") + figure("mde_by_probability")
    out += [_md_table(by_id["mde"]), _md_table(by_id["sample-size"]), _md_table(by_id["treatment-probabilities"])]
    out += ["## 3. Power of every planned test", "", _md_table(by_id["power"]), *figure("sampling_distributions")]
    if "measurement" in by_id:
        out += [_md_table(by_id["measurement"])]
    out += ["## 4. Size and coverage of the feasible tests", "", _md_table(by_id["size-coverage"])]
    out += ["## 5. Assumptions and regime warnings", "", f"{report.check.regime}: {report.check.regime_explanation}", "",
            _md_table(by_id["density"]), *figure("network")]
    out += [f"- warning: {w}" for w in report.warnings] or ["No warnings."]
    out += ["", "## 6. Several hypotheses", ""]
    if "multiple-testing-cost" in by_id:
        out += [_md_table(by_id["multiple-testing-cost"]), _md_table(by_id["multiple-testing-power"])]
    else:
        out += ["One hypothesis is planned; no adjustment for multiple testing is needed.", ""]
    out += ["## 7. Provenance", "", "| field | value |", "|---|---|",
            *(f"| {k} | {_md_escape(v)} |" for k, v in _provenance_rows(report)), ""]
    out += ["## 8. How to reproduce", "", "```sh", reproduce_command(report), "```", ""]
    out += ["## 9. Cautions", "", *(f"- {c}" for c in CAUTIONS),
            "- These are planning figures from simulation, not guarantees; the ethics committee, the consent process and local "
            "rules decide whether and how this study may run.", ""]
    return "\n".join(out)


# -------------------------------------------------------------------- LaTeX

_LATEX_SPECIAL = {
    "\\": r"\textbackslash{}", "&": r"\&", "%": r"\%", "$": r"\$", "#": r"\#", "_": r"\_", "{": r"\{", "}": r"\}",
    "~": r"\textasciitilde{}", "^": r"\textasciicircum{}", "α": r"$\alpha$", "±": r"$\pm$", "√": r"$\surd$", "∝": r"$\propto$",
    "²": r"\textsuperscript{2}", "−": "-", "≤": r"$\le$", "≥": r"$\ge$", "×": r"$\times$", "∞": r"$\infty$",
    "–": "--", "—": "---", "§": r"\S{}", "<": r"$<$", ">": r"$>$",
}


def latex_escape(text: str) -> str:
    r"""Escape LaTeX's special characters.

    >>> latex_escape("hajek_x & 5%")
    'hajek\\_x \\& 5\\%'
    """
    return "".join(_LATEX_SPECIAL.get(ch, ch if ch.isascii() else _ascii_fallback(ch)) for ch in text)


def _ascii_fallback(ch: str) -> str:
    """Any other non-ASCII character: its ASCII decomposition (é -> e), else '?', so pdflatex never fails on a table."""
    import unicodedata

    plain = unicodedata.normalize("NFKD", ch).encode("ascii", "ignore").decode()
    return plain or "?"


def render_latex(table: Table) -> str:
    """A booktabs ``tabular`` (needs ``\\usepackage{booktabs}``), ready to ``\\input`` inside a table environment."""
    spec = "".join("l" if c.kind == "text" else "r" for c in table.columns)
    lines = [
        f"% {latex_escape(table.title)}: {latex_escape(table.caption)}",
        f"% designcalc table '{table.id}'; needs \\usepackage{{booktabs}}",
        f"\\begin{{tabular}}{{{spec}}}", r"\toprule",
        " & ".join(latex_escape(c.header) for c in table.columns) + r" \\", r"\midrule",
        *(" & ".join(latex_escape(v) for v in row) + r" \\" for row in table.cells()),
        r"\bottomrule", r"\end{tabular}", "",
    ]
    return "\n".join(lines)


# ---------------------------------------------------------------- CSV, JSON


def render_csv(table: Table) -> str:
    """Raw values (full precision; empty for missing), one header row of field names."""
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow([c.key for c in table.columns])
    for record in table.records():
        writer.writerow(["" if v is None else repr(v) if isinstance(v, float) else v for v in record.values()])
    return buffer.getvalue()


def render_json(value: object) -> str:
    return json.dumps(json_safe(value), indent=2, ensure_ascii=False, allow_nan=False) + "\n"


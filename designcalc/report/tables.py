"""The report's tables as plain data: one definition, rendered alike in every format.

Each ``Table`` holds raw values (full precision, ``None`` for missing) and a
column spec saying how to show them; HTML, Markdown and LaTeX show the same
formatted cell text (``format_cell``), CSV and JSON keep the raw values, so
the formats agree by construction and a test parses them back.
"""

from __future__ import annotations

import math
from collections.abc import Iterable
from dataclasses import dataclass

from designcalc.report.collect import Report

__all__ = ["MISSING", "Column", "Table", "format_cell", "report_tables"]

MISSING = "-"


@dataclass(frozen=True)
class Column:
    """One column: header, JSON/CSV field name, and how cells are shown.

    ``kind`` is ``"text"``, ``"int"``, ``"fixed"`` (``digits`` decimals) or
    ``"sig"`` (``digits`` significant digits).
    """

    header: str
    key: str
    kind: str = "text"
    digits: int = 3


@dataclass(frozen=True)
class Table:
    id: str
    title: str
    caption: str
    columns: tuple[Column, ...]
    rows: tuple[tuple[object, ...], ...]

    def records(self) -> list[dict[str, object]]:
        return [{c.key: json_safe(v) for c, v in zip(self.columns, row)} for row in self.rows]

    def to_dict(self) -> dict[str, object]:
        return {
            "id": self.id, "title": self.title, "caption": self.caption,
            "columns": [{"header": c.header, "key": c.key, "kind": c.kind, "digits": c.digits} for c in self.columns],
            "rows": self.records(),
        }

    def cells(self) -> list[list[str]]:
        """Every row as shown in HTML, Markdown and LaTeX."""
        return [[format_cell(v, c) for c, v in zip(self.columns, row)] for row in self.rows]


def json_safe(value: object) -> object:
    """Nested data with nan as null and infinities as "inf"/"-inf" (JSON has neither); tuples as lists.

    >>> json_safe({"a": float("nan"), "b": (1.0, float("inf"))})
    {'a': None, 'b': [1.0, 'inf']}
    """
    if isinstance(value, float):
        if math.isnan(value):
            return None
        if math.isinf(value):
            return "inf" if value > 0 else "-inf"
        return value
    if isinstance(value, dict):
        return {str(k): json_safe(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [json_safe(v) for v in value]
    return value


def _record_rows(columns: tuple[Column, ...], records: Iterable[object]) -> tuple[tuple[object, ...], ...]:
    """Rows of result records whose field names are the columns' keys (flags joined, marks as yes/blank)."""

    def cell(record: object, key: str) -> object:
        value = getattr(record, key)
        if isinstance(value, tuple):
            return "; ".join(value)
        if isinstance(value, bool):
            return "yes" if value else ""
        return value

    return tuple(tuple(cell(r, c.key) for c in columns) for r in records)


def format_cell(value: object, column: Column) -> str:
    """The text of a cell: numbers by the column's rule, missing values as ``MISSING``.

    >>> format_cell(0.81234, Column("power", "power", "fixed", 3)), format_cell(23511.0, Column("n", "n", "int"))
    ('0.812', '23511')
    >>> format_cell(float("nan"), Column("MDE", "mde", "sig", 3)), format_cell(0.0004567, Column("MDE", "mde", "sig", 3))
    ('-', '0.000457')
    """
    if value is None:
        return MISSING
    if column.kind == "text":
        return str(value)
    x = float(value)  # type: ignore[arg-type]
    if math.isnan(x):
        return MISSING
    if math.isinf(x):
        return "inf" if x > 0 else "-inf"
    if column.kind == "int":
        return str(int(round(x)))
    if column.kind == "fixed":
        return f"{x:.{column.digits}f}"
    return f"{x:.{column.digits}g}"


_TEST_COLUMNS = (Column("estimator", "estimator"), Column("variance", "variance_estimator"))


def _size_columns(report: Report) -> tuple[Column, ...]:
    """Where a record was simulated: its units, or a clustered study's clusters and nominal units, and its share treated."""
    clustered = report.scenario.population.clustered
    share = "share treated" if report.scenario.design.saturation is not None else "treatment probability"
    sizes = (Column("clusters", "clusters", "int"), Column("units (nominal)", "units", "int")) if clustered else (Column("units", "units", "int"),)
    return (*sizes, Column(share, "treatment_probability", "fixed", 3 if clustered else 2))


def _counted(report: Report) -> str:
    """What a required size counts."""
    return "clusters" if report.scenario.population.clustered else "units"


def key_answers_table(report: Report) -> Table:
    population = report.scenario.population
    units = population.units
    labels = [f"{c} clusters" for c in population.clusters] if population.clustered else [f"{n} units" for n in units]
    columns = (
        Column("estimand", "estimand"), *_TEST_COLUMNS, _size_columns(report)[-1],
        Column(f"required {_counted(report)}", "required_units", "int"), Column("95% MC low", "units_low", "int"),
        Column("95% MC high", "units_high", "int"), Column("status", "status"),
        *(Column(f"MDE at {label}", f"mde_at_{n}", "sig", 3) for n, label in zip(units, labels)),
    )
    rows = []
    missing = "size fixed (surveyed network)" if report.scenario.network.kind == "surveyed" else "not computed"
    for key in report.tests:
        for pi in report.scenario.design.treatment_probabilities:
            size = report.size.select(estimand=key[0], estimator=key[1], variance_estimator=key[2], treatment_probability=pi)
            s = size[0] if size else None
            mdes = []
            for n in units:
                m = report.mde.select(estimand=key[0], estimator=key[1], variance_estimator=key[2], treatment_probability=pi, units=n)
                mdes.append(m[0].mde if m else None)
            rows.append((
                *key, pi,
                s.required_units if s else None, s.units_low if s else None, s.units_high if s else None,
                s.status if s else missing, *mdes,
            ))
    return Table(
        "key-answers", "Required size and minimum detectable effect per estimand",
        f"{_counted(report).capitalize()} needed for {report.scenario.design.target_power:.0%} power and the minimum detectable effect "
        "(outcome units) at each planned size, per estimand; 95% Monte Carlo intervals of the required size.",
        columns, tuple(rows),
    )


def power_table(report: Report) -> Table:
    columns = (
        *_size_columns(report),
        Column("estimand", "estimand"), *_TEST_COLUMNS, Column("true effect", "true_effect", "sig", 4),
        Column("power", "power", "fixed", 3), Column("MC se", "power_mc_se", "fixed", 3),
        Column("bias", "bias", "sig", 3), Column("bias MC se", "bias_mc_se", "sig", 2), Column("SD", "sd", "sig", 3),
        Column("mean SE", "mean_standard_error", "sig", 3), Column("oracle power", "oracle_power", "fixed", 3),
        Column("replicates", "replicates", "int"), Column("flags", "flags"),
    )
    rows = _record_rows(columns, report.power.records)
    return Table(
        "power", "Power of every planned test",
        "Simulated power at each planned size and treatment probability with its Monte Carlo standard error "
        "(clustered by graph); oracle power uses the true standard deviation instead of the estimated SE.",
        columns, rows,
    )


def size_coverage_table(report: Report) -> Table:
    columns = (
        *_size_columns(report),
        Column("estimand", "estimand"), *_TEST_COLUMNS, Column("size", "size", "fixed", 3),
        Column("size MC se", "size_mc_se", "fixed", 3), Column("coverage", "coverage", "fixed", 3),
        Column("coverage MC se", "coverage_mc_se", "fixed", 3), Column("flags", "flags"),
    )
    rows = _record_rows(columns, report.power.records)
    alpha = report.scenario.design.significance_level
    return Table(
        "size-coverage", "Size and coverage of the feasible tests",
        f"Rejection rate when the tested effect is zero (nominal {alpha:g}) and coverage of the 95% confidence "
        "interval, with Monte Carlo standard errors; flags mark tests that miss their nominal level.",
        columns, rows,
    )


def mde_table(report: Report) -> Table:
    columns = (
        *_size_columns(report),
        Column("estimand", "estimand"), *_TEST_COLUMNS, Column("MDE", "mde", "sig", 4),
        Column("95% MC low", "mde_low", "sig", 4), Column("95% MC high", "mde_high", "sig", 4),
        Column("MDE (SD units)", "mde_sd_units", "sig", 3), Column("SE", "standard_error", "sig", 3),
        Column("method", "method"), Column("flags", "flags"),
    )
    rows = _record_rows(columns, report.mde.records)
    return Table(
        "mde", "Minimum detectable effects",
        "Smallest effect (outcome units, and in SDs of the untreated outcome) detected with the target power, "
        "with its 95% Monte Carlo interval.",
        columns, rows,
    )


def sample_size_table(report: Report) -> Table:
    columns = (
        _size_columns(report)[-1], Column("estimand", "estimand"), *_TEST_COLUMNS,
        Column("status", "status"), Column(f"required {_counted(report)}", "required_units", "int"),
        Column("95% MC low", "units_low", "int"), Column("95% MC high", "units_high", "int"),
        Column("verified power", "verified_power", "fixed", 3), Column("MC se", "verified_power_mc_se", "fixed", 3),
        Column("size", "size", "fixed", 3), Column("size MC se", "size_mc_se", "fixed", 3), Column("reason", "reason"),
    )
    rows = _record_rows(columns, report.size.records)
    return Table(
        "sample-size", "Required sample size",
        f"{_counted(report).capitalize()} needed for the target power, found by simulation and verified at the answer (power and test size there).",
        columns, rows,
    )


def probability_table(report: Report) -> Table:
    columns = (
        *_size_columns(report),
        Column("estimand", "estimand"), *_TEST_COLUMNS, Column("MDE", "mde", "sig", 4),
        Column("95% MC low", "mde_low", "sig", 4), Column("95% MC high", "mde_high", "sig", 4),
        Column("best", "best"), Column("tied with best", "tied_with_best"),
    )
    rows = _record_rows(columns, report.compare.rows)
    caption = (
        "Formula MDE (multiplier x simulated null SD) at one size for a grid of treatment probabilities; "
        "tied: within two combined Monte Carlo SEs of the best."
    )
    if report.scenario.design.saturation is not None:
        caption = (
            "Not computed: a clustered design's arms (pure-control share and saturations) set who is treated, so there is no "
            "treatment probability to vary; `designcalc compare --design OTHER.toml` puts whole designs side by side."
        )
    return Table("treatment-probabilities", "Minimum detectable effect against treatment probability", caption, columns, rows)


def measurement_table(report: Report) -> Table:
    """Every test as the network will be measured beside perfect measurement (scenarios with ``[measurement]``)."""
    columns = (
        Column("units", "units", "int"), Column("treatment probability", "treatment_probability", "fixed", 2),
        Column("estimand", "estimand"), *_TEST_COLUMNS, Column("true effect", "true_effect", "sig", 4),
        Column("bias, perfect", "bias_perfect", "sig", 3), Column("MC se", "bias_perfect_mc_se", "sig", 2),
        Column("bias, as measured", "bias_measured", "sig", 3), Column("MC se", "bias_measured_mc_se", "sig", 2),
        Column("power, perfect", "power_perfect", "fixed", 3), Column("power, as measured", "power_measured", "fixed", 3),
        Column("power change", "power_change", "fixed", 3), Column("size, perfect", "size_perfect", "fixed", 3),
        Column("size, as measured", "size_measured", "fixed", 3), Column("flags", "flags"),
    )
    return Table(
        "measurement", "As the network and outcomes will be measured",
        f"Measurement: {report.scenario.measurement.describe()}. Bias, power and size of every planned test with that "
        "measurement (the power table) beside perfect measurement, on the same graphs, assignments and noise; "
        "Monte Carlo standard errors clustered by graph.",
        columns, _record_rows(columns, report.measurement),
    )


def density_table(report: Report) -> Table:
    columns = (
        Column("units per cluster" if report.scenario.population.clustered else "units", "units", "int"), Column("rho_n", "rho", "sig", 3), Column("target mean degree", "target_mean_degree", "sig", 3),
        Column("expected mean degree", "expected_mean_degree", "sig", 3), Column("one draw", "realised_mean_degree", "sig", 3),
        Column("share isolated (expected)", "expected_share_isolated", "sig", 3),
        Column("largest edge probability", "max_edge_probability", "sig", 3),
    )
    rows = tuple(
        (s.density.units, s.density.rho, s.density.target_mean_degree, s.density.expected_mean_degree, s.realised_mean_degree,
         s.expected_share_isolated, s.density.max_edge_probability)
        for s in report.check.sizes
    )
    return Table("density", "What the density rule implies", "Edge-probability scale and mean degree at each planned size.", columns, rows)


def multiple_testing_tables(report: Report) -> list[Table]:
    mt = report.multiple_testing
    if mt is None:
        return []
    cost_columns = (
        Column("estimand", "estimand"), *_TEST_COLUMNS, Column("treatment probability", "treatment_probability", "fixed", 2),
        Column("per-test α", "per_test_alpha", "sig", 4), Column("MDE factor", "mde_factor", "fixed", 4),
        Column("classical n factor", "classical_factor", "fixed", 4), Column("SD slope", "sd_slope", "fixed", 2),
        Column("n factor", "sample_size_factor", "fixed", 3), Column(f"required {_counted(report)}", "required_units", "int"),
        Column(f"{_counted(report)} at adjusted α", "adjusted_units", "int"), Column("status", "status"),
    )
    power_columns = (
        *_size_columns(report),
        Column("estimand", "estimand"), *_TEST_COLUMNS, Column("power", "power", "fixed", 3),
        Column("MC se", "power_mc_se", "fixed", 3), Column("Bonferroni", "bonferroni_power", "fixed", 3),
        Column("MC se", "bonferroni_power_mc_se", "fixed", 3), Column("Holm", "holm_power", "fixed", 3),
        Column("MC se", "holm_power_mc_se", "fixed", 3),
    )
    levels = Table(
        "multiple-testing-cost", "Multiple testing: adjusted levels and their cost",
        f"{len(mt.hypotheses)} hypotheses at family-wise α = {mt.alpha:g}: Bonferroni tests each at α/m = {mt.bonferroni_alpha:.4g}; "
        "Holm's smallest threshold is the same, so planning each test at α/m guarantees its power under Holm too. "
        "MDE factor: the normal multipliers' ratio at a fixed size. Classical n factor: its square, if SE fell as 1/√n. "
        "The n factor used here is the classical one for the direct effect (its estimators are √n-consistent) and, for the "
        "spillover and total effects, follows the SD's log-log slope in n measured by the size search (n grows by "
        "MDE factor^(-1/slope)); it is left out where the SD barely shrinks with n.",
        cost_columns, _record_rows(cost_columns, mt.costs),
    )
    power = Table(
        "multiple-testing-power", "Multiple testing: power of each hypothesis under Bonferroni and Holm",
        "Rejection rates on the same simulated replicates as the power table, unadjusted, with Bonferroni and with Holm's "
        "step-down procedure (Holm 1979), with Monte Carlo standard errors.",
        power_columns, _record_rows(power_columns, mt.power),
    )
    return [levels, power]


def report_tables(report: Report) -> list[Table]:
    """Every table of the report, in reading order."""
    return [
        key_answers_table(report), power_table(report), size_coverage_table(report), mde_table(report),
        sample_size_table(report), probability_table(report), density_table(report), *multiple_testing_tables(report),
        *([measurement_table(report)] if report.measurement else []),
    ]

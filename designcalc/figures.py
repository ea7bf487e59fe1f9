"""The report's figures: power curves, MDE by treatment probability, sampling distributions, one network.

Every function takes plain result records (or arrays) and returns a
``matplotlib.figure.Figure`` built without pyplot, so nothing touches global
state, no display is needed, and figures can be built in worker threads.
``save_figure`` writes a PNG and an SVG whose bytes depend only on the
figure's content; ``svg_text`` gives the SVG for inlining into an HTML report.

Conventions shared by all figures:

* Categorical colours come from ``PALETTE`` (Okabe & Ito's colour-blind-safe
  set); each series also gets its own marker, so the figures survive
  grey-scale printing.  Continuous values use the ``cividis`` colour map.
* Every axis is labelled with its units; several series share one legend.
* Non-finite numbers in the records (nan, inf) are skipped, never drawn.
* Styling is applied with ``matplotlib.rc_context`` while a figure is built
  and while it is saved, so the user's global ``rcParams`` are neither read
  for the house style nor changed.
"""

from __future__ import annotations

import io
import math
import pathlib
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, TypeVar

import matplotlib as mpl
import networkx as nx
import numpy as np
import scipy as sp
from matplotlib.axes import Axes
from matplotlib.cm import ScalarMappable
from matplotlib.collections import LineCollection
from matplotlib.colors import Normalize
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.patches import Patch
from matplotlib.ticker import FuncFormatter, NullFormatter

from designcalc.atomic import atomic_file
from designcalc.engine import ESTIMANDS
from designcalc.errors import DesignCalcError

if TYPE_CHECKING:
    from designcalc.compare import CompareRow
    from designcalc.fit import GoodnessOfFit
    from designcalc.mde import MdeRecord
    from designcalc.power import PowerRecord
    from designcalc.sample_size import SizeRecord

_SIMULATED = "simulated"  # status of curves built from a power table: nothing was solved for

__all__ = [
    "PALETTE",
    "SamplingSample",
    "fit_check_figure",
    "mde_probability_figure",
    "mde_units_figure",
    "network_figure",
    "power_curve_figure",
    "power_table_figure",
    "sampling_distribution_figure",
    "save_figure",
    "svg_text",
    "test_label",
]

# Okabe, M. & Ito, K. (2008). Color Universal Design (CUD): how to make
# figures and presentations that are friendly to colorblind people.
# https://jfly.uni-koeln.de/color/ -- the eight colours in their order.
PALETTE: tuple[str, ...] = (
    "#0072B2",  # blue
    "#D55E00",  # vermillion
    "#009E73",  # bluish green
    "#CC79A7",  # reddish purple
    "#E69F00",  # orange
    "#56B4E9",  # sky blue
    "#F0E442",  # yellow
    "#000000",  # black
)
_MARKERS = ("o", "s", "^", "D", "v", "P", "X", "*")
_CONTINUOUS_MAP = "cividis"
_GREY = "#555555"
_EDGE_GREY = "#B8B8B8"
_PNG_DPI = 110
_PANEL_SIZE = (7.5, 3.2)  # inches: a row of up to three panels
_Z95 = 1.96  # two-sided 95% normal quantile, for Monte Carlo bands

# The house style; applied while building *and* while saving, because some
# artists (tick labels) are created lazily at draw time.
_STYLE: dict[str, object] = {
    # DejaVu Sans ships with matplotlib, so the PNG's glyphs are the same
    # everywhere; the SVG names the list, ending in the generic family, so a
    # browser without DejaVu picks a close sans-serif (Verdana shares its metrics' roots).
    "font.family": ["sans-serif"],
    "font.sans-serif": ["DejaVu Sans", "Verdana", "Arial", "Helvetica"],
    "font.size": 8.0,
    "axes.titlesize": 8.5,
    "axes.labelsize": 8.0,
    "xtick.labelsize": 7.0,
    "ytick.labelsize": 7.0,
    "legend.fontsize": 7.0,
    "figure.titlesize": 9.5,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.grid": True,
    "grid.color": "#E6E6E6",
    "grid.linewidth": 0.5,
    "image.cmap": _CONTINUOUS_MAP,
    "savefig.facecolor": "white",
}
# Byte-reproducible output: a fixed salt for the SVG ids (otherwise random),
# text kept as <text> (smaller, searchable), raster parts embedded inline.
_SAVE_STYLE: dict[str, object] = {
    **_STYLE,
    "svg.hashsalt": "designcalc",
    "svg.fonttype": "none",
    "svg.image_inline": True,
}
# spring_layout's cost grows like n^2 per iteration.  Measured at n = 1200,
# mean degree 10, on two cores shared with other jobs: 50 iterations (the
# networkx default) take 6-8 s; 20 take 1.7-2.9 s and give practically the
# same picture (three blocks of 400 separate as well: mean within/between-
# block distance 0.41-0.42 at 20 and at 50 iterations, 0.48 at 15).
_LAYOUT_ITERATIONS_SMALL = 50
_LAYOUT_ITERATIONS_LARGE = 20
_LAYOUT_LARGE_FROM = 500

_T = TypeVar("_T")


def test_label(estimator: str, variance_estimator: str) -> str:
    """The label of a planned test: its estimator and variance estimator.

    Parameters
    ----------
    estimator
        The estimator's name, e.g. ``"hajek"``.
    variance_estimator
        The variance estimator's name, e.g. ``"neyman"``.

    Returns
    -------
    str
        ``"estimator / variance_estimator"``.

    Examples
    --------
    >>> test_label("hajek", "neyman")
    'hajek / neyman'
    """
    return f"{estimator} / {variance_estimator}"


# A library function whose name starts with "test": keep pytest from
# collecting it when a test module imports it by name.
test_label.__test__ = False  # type: ignore[attr-defined]


# ---------------------------------------------------------------- power curves


def power_curve_figure(records: Sequence[SizeRecord], *, target_power: float, title: str = "") -> Figure:
    """Simulated power against the number of units, with the required size marked.

    Parameters
    ----------
    records
        Sample-size records (``designcalc.sample_size.SizeRecord``).  Records
        without simulated points are skipped.
    target_power
        The power the sizes were solved for, in (0, 1); drawn as a dashed line.
    title
        The figure's title (optional).

    Returns
    -------
    matplotlib.figure.Figure
        One panel per estimand present (direct, spillover, total order).

    Raises
    ------
    DesignCalcError
        If ``records`` is empty or ``target_power`` is not in (0, 1).

    Notes
    -----
    Per test (and treatment probability, when the records hold several) one
    line joins the simulated sizes (x on a log scale), with a band of
    power +- 1.96 Monte Carlo SE.  Where the target was reached, a dotted
    vertical line and a marker show the required number of units, and a
    horizontal error bar on the target line its 95% Monte Carlo interval
    ``[units_low, units_high]``.  Tests that cannot reach the target are
    listed in their panel.  Non-finite powers, errors and bounds are skipped.

    Examples
    --------
    >>> from designcalc.sample_size import SizePoint, SizeRecord
    >>> points = tuple(SizePoint(units=n, power=p, power_mc_se=0.02, sd=1.0, mean_standard_error=1.0,
    ...                          mean_estimate=0.3, true_effect=0.3, replicates=200)
    ...                for n, p in [(100, 0.35), (200, 0.6), (400, 0.87)])
    >>> record = SizeRecord(estimand="direct", estimator="hajek", variance_estimator="neyman",
    ...     treatment_probability=0.5, status="reached", required_units=300, units_low=270.0,
    ...     units_high=330.0, verified_units=300, verified_power=0.8, verified_power_mc_se=0.02,
    ...     relative_precision=0.1, reference_distribution="normal", sd_slope=-0.5, reason="",
    ...     points=points)
    >>> fig = power_curve_figure([record], target_power=0.8)
    >>> [ax.get_title() for ax in fig.axes]
    ['direct']
    """
    records = _nonempty(records, "records")
    target = _open_unit_interval(target_power, "target_power")
    estimands = _estimand_order(r.estimand for r in records)
    several_probabilities = len({r.treatment_probability for r in records}) > 1
    styles = _SeriesStyles()
    with mpl.rc_context(_STYLE):
        fig, axes = _panel_row(len(estimands), title)
        required_shown = False
        for ax, estimand in zip(axes, estimands):
            drawn = 0
            unreached: list[str] = []
            for record in (r for r in records if r.estimand == estimand):
                units, power, power_se = _finite_points(record)
                if units.size == 0:
                    continue
                label = test_label(record.estimator, record.variance_estimator)
                if several_probabilities:
                    label += f", P = {record.treatment_probability:g}"
                colour, marker = styles.get(label)
                drawn += 1
                ax.fill_between(
                    units,
                    np.clip(power - _Z95 * power_se, 0.0, 1.0),
                    np.clip(power + _Z95 * power_se, 0.0, 1.0),
                    color=colour,
                    alpha=0.18,
                    linewidth=0,
                )
                ax.plot(units, power, color=colour, marker=marker, markersize=3.5, linewidth=1.2)
                if record.status.startswith("reached") and record.required_units is not None:
                    required_shown |= _mark_required_units(ax, record, target, colour, marker)
                elif not record.status.startswith("reached") and record.status != _SIMULATED:
                    unreached.append(label)
            ax.axhline(target, color=_GREY, linestyle="--", linewidth=0.9)
            if drawn:
                _log_units_axis(ax)
            else:
                _say_empty(ax, "no simulated sizes")
            if unreached:
                ax.text(
                    0.02,
                    0.98,
                    "target not reached:\n" + "\n".join(unreached),
                    transform=ax.transAxes,
                    ha="left",
                    va="top",
                    fontsize=6.5,
                    color=_GREY,
                )
            ax.set_ylim(0.0, 1.0)
            ax.set_xlabel("units in the study (log scale)")
            ax.set_ylabel("power")
            ax.set_title(estimand)
        handles = styles.handles()
        handles.append(Patch(facecolor=_GREY, alpha=0.25, label=f"power \u00b1 {_Z95} MC SE"))
        handles.append(Line2D([], [], color=_GREY, linestyle="--", linewidth=0.9, label="target power"))
        if required_shown:
            handles.append(
                Line2D([], [], color=_GREY, linestyle=":", marker="o", markerfacecolor=_GREY,
                       markeredgecolor="black", label="required units (95% MC interval)")
            )
        _figure_legend(fig, handles)
    return fig


def _finite_points(record: SizeRecord) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """A record's simulated sizes with finite power, sorted by size; missing SEs become nan (no band)."""
    rows = [
        (float(p.units), float(p.power), float(p.power_mc_se))
        for p in record.points
        if math.isfinite(float(p.units)) and float(p.units) > 0 and math.isfinite(float(p.power))
    ]
    rows.sort()
    if not rows:
        empty = np.empty(0)
        return empty, empty, empty
    units, power, power_se = (np.array(column) for column in zip(*rows))
    power_se = np.where(np.isfinite(power_se) & (power_se >= 0), power_se, np.nan)
    return units, power, power_se


def _mark_required_units(ax: Axes, record: SizeRecord, target: float, colour: str, marker: str) -> bool:
    """Draw the required size and its Monte Carlo interval on the target line; False when it cannot be drawn."""
    required = float(record.required_units)  # type: ignore[arg-type]
    if not (math.isfinite(required) and required > 0):
        return False
    low, high = float(record.units_low), float(record.units_high)
    below = required - low if math.isfinite(low) and 0 < low <= required else 0.0
    above = high - required if math.isfinite(high) and high >= required else 0.0
    ax.plot([required, required], [0.0, target], color=colour, linestyle=":", linewidth=1.0)
    ax.errorbar(
        [required],
        [target],
        xerr=[[below], [above]],
        fmt=marker,
        color=colour,
        markeredgecolor="black",
        markersize=5.5,
        capsize=2.5,
        elinewidth=1.2,
        zorder=4,
    )
    return True


# ------------------------------------------------------- MDE by probability


def power_table_figure(records: Sequence[PowerRecord], *, target_power: float, title: str = "") -> Figure:
    """Power of every planned test against the planned sizes (``designcalc power --figures``).

    The power table's records, one line per test and treatment probability
    through the planned sizes, drawn as ``power_curve_figure`` draws the
    sample-size search (bands of +- 1.96 Monte Carlo SE, the target line)
    but with no required size marked: nothing was solved for.

    Examples
    --------
    >>> from pathlib import Path
    >>> from designcalc import load_scenario, simulate_power
    >>> s = load_scenario(Path(__file__).parents[1] / "scenarios" / "lake_orrin_savings.toml")
    >>> r = simulate_power(s, units=[200, 400], treatment_probabilities=[0.5], graphs=2, assignments_per_graph=3)
    >>> [ax.get_title() for ax in power_table_figure(r.records, target_power=0.8).axes]
    ['direct', 'spillover', 'total']
    """
    from designcalc.sample_size import SizePoint, SizeRecord

    records = _nonempty(records, "records")
    groups: dict[tuple[str, str, str, float], list[PowerRecord]] = {}
    for r in records:
        groups.setdefault((r.estimand, r.estimator, r.variance_estimator, r.treatment_probability), []).append(r)
    curves = [
        SizeRecord(
            estimand=key[0], estimator=key[1], variance_estimator=key[2], treatment_probability=key[3], status=_SIMULATED,
            required_units=None, units_low=math.nan, units_high=math.nan, verified_units=None, verified_power=math.nan,
            verified_power_mc_se=math.nan, relative_precision=math.nan, reference_distribution=members[0].reference_distribution,
            sd_slope=math.nan, reason="",
            points=tuple(
                SizePoint(m.units, m.power, m.power_mc_se, m.sd, m.mean_standard_error, m.mean_estimate, m.true_effect, m.replicates)
                for m in sorted(members, key=lambda m: m.units)
            ),
        )
        for key, members in groups.items()
    ]
    return power_curve_figure(curves, target_power=target_power, title=title)


def mde_units_figure(records: Sequence[MdeRecord], *, title: str = "") -> Figure:
    """The minimum detectable effect of each test against the planned sizes (``designcalc mde --figures``).

    One panel per estimand; per test (and treatment probability, when there
    are several) the MDE at each size on a log scale of units, with its 95%
    Monte Carlo interval as error bars.  Non-finite MDEs (not reachable) are
    skipped.

    Examples
    --------
    >>> from pathlib import Path
    >>> from designcalc import load_scenario, minimum_detectable_effects
    >>> s = load_scenario(Path(__file__).parents[1] / "scenarios" / "lake_orrin_savings.toml")
    >>> r = minimum_detectable_effects(s, units=[200, 400], treatment_probabilities=[0.5], graphs=3,
    ...                                assignments_per_graph=3, verify=False)
    >>> mde_units_figure(r.records).axes[0].get_ylabel().splitlines()
    ['minimum detectable effect', '(outcome units)']
    """
    records = _nonempty(records, "records")
    estimands = _estimand_order(r.estimand for r in records)
    several_probabilities = len({r.treatment_probability for r in records}) > 1
    styles = _SeriesStyles()
    with mpl.rc_context(_STYLE):
        fig, axes = _panel_row(len(estimands), title)
        for ax, estimand in zip(axes, estimands):
            by_test: dict[str, list[MdeRecord]] = {}
            for r in records:
                if r.estimand == estimand:
                    label = test_label(r.estimator, r.variance_estimator)
                    if several_probabilities:
                        label += f", P = {r.treatment_probability:g}"
                    by_test.setdefault(label, []).append(r)
            drawn = 0
            for label, rows in by_test.items():
                finite = sorted((r for r in rows if _finite(r.mde)), key=lambda r: r.units)
                if not finite:
                    continue
                drawn += 1
                colour, marker = styles.get(label)
                units = np.array([float(r.units) for r in finite])
                mde = np.array([float(r.mde) for r in finite])
                below, above = _interval_arms(finite, mde)
                ax.errorbar(units, mde, yerr=[below, above], color=colour, marker=marker, markersize=3.5, linewidth=1.2,
                            elinewidth=0.9, capsize=2.0)
            if drawn:
                _log_units_axis(ax)
                ax.set_ylim(bottom=0.0)
            else:
                _say_empty(ax, "no finite MDE")
            ax.set_xlabel("units in the study (log scale)")
            ax.set_ylabel("minimum detectable effect\n(outcome units)")
            ax.set_title(estimand)
        _figure_legend(fig, styles.handles())
    return fig


def mde_probability_figure(rows: Sequence[CompareRow], *, units: int | None = None, title: str = "") -> Figure:
    """The minimum detectable effect of each test against the treatment probability, at one study size.

    Parameters
    ----------
    rows
        Comparison rows (``designcalc.compare.CompareRow``).
    units
        The study size to draw; ``None`` picks the smallest size in ``rows``.
    title
        The figure's title (optional); the size is appended.

    Returns
    -------
    matplotlib.figure.Figure
        One panel per estimand present (direct, spillover, total order).

    Raises
    ------
    DesignCalcError
        If ``rows`` is empty or ``units`` is not a size in ``rows``.

    Notes
    -----
    Per test a line joins the MDEs over the probabilities, with error bars
    from the 95% Monte Carlo interval ``[mde_low, mde_high]``; non-finite
    MDEs are skipped and non-finite bounds drawn without that arm.  The best
    probability of each test is ringed in black, probabilities tied with it
    (within Monte Carlo error) in grey.

    Examples
    --------
    >>> from designcalc.compare import CompareRow
    >>> rows = [CompareRow(units=500, treatment_probability=p, estimand="direct", estimator="hajek",
    ...     variance_estimator="neyman", standard_error=s, standard_error_mc_se=0.002,
    ...     mean_estimated_se=s, mde=2.8 * s, mde_low=2.7 * s, mde_high=2.9 * s, mde_sd_units=2.8 * s,
    ...     size=0.05, size_mc_se=0.005, method="formula (not verified)", best=p == 0.5, tied_with_best=False)
    ...     for p, s in [(0.3, 0.098), (0.5, 0.09), (0.7, 0.098)]]
    >>> fig = mde_probability_figure(rows)
    >>> fig.axes[0].get_xlabel()
    'treatment probability'
    """
    rows = _nonempty(rows, "rows")
    sizes = sorted({int(r.units) for r in rows})
    if units is None:
        units = sizes[0]
    elif int(units) not in sizes:
        raise DesignCalcError(
            f"`units` = {units} is not a study size in `rows`; sizes present: {', '.join(map(str, sizes))}"
        )
    units = int(units)
    at_size = [r for r in rows if int(r.units) == units]
    estimands = _estimand_order(r.estimand for r in at_size)
    styles = _SeriesStyles()
    size_text = f"{units} units"
    with mpl.rc_context(_STYLE):
        fig, axes = _panel_row(len(estimands), f"{title} ({size_text})" if title else size_text)
        tied_shown = best_shown = False
        for ax, estimand in zip(axes, estimands):
            by_test: dict[str, list[CompareRow]] = {}
            for row in at_size:
                if row.estimand == estimand:
                    by_test.setdefault(test_label(row.estimator, row.variance_estimator), []).append(row)
            drawn = 0
            all_non_negative = True
            for label, test_rows in by_test.items():
                finite = sorted(
                    (r for r in test_rows if _finite(r.mde) and _finite(r.treatment_probability)),
                    key=lambda r: float(r.treatment_probability),
                )
                if not finite:
                    continue
                colour, marker = styles.get(label)
                drawn += 1
                probability = np.array([float(r.treatment_probability) for r in finite])
                mde = np.array([float(r.mde) for r in finite])
                all_non_negative &= bool(np.all(mde >= 0))
                below, above = _interval_arms(finite, mde)
                ax.errorbar(probability, mde, yerr=[below, above], color=colour, marker=marker, markersize=3.5,
                            linewidth=1.2, elinewidth=0.9, capsize=2.0)
                best = [i for i, r in enumerate(finite) if r.best]
                tied = [i for i, r in enumerate(finite) if r.tied_with_best and not r.best]
                if best:
                    best_shown = True
                    ax.scatter(probability[best], mde[best], s=90, facecolors="none", edgecolors="black",
                               linewidths=1.1, zorder=5)
                if tied:
                    tied_shown = True
                    ax.scatter(probability[tied], mde[tied], s=90, facecolors="none", edgecolors=_GREY,
                               linewidths=0.9, linestyles="--", zorder=5)
            if not drawn:
                _say_empty(ax, "no finite MDE")
            elif all_non_negative:
                ax.set_ylim(bottom=0.0)
            ax.set_xlim(0.0, 1.0)
            ax.set_xlabel("treatment probability")
            ax.set_ylabel("minimum detectable effect\n(outcome units)")
            ax.set_title(estimand)
        handles = styles.handles()
        if best_shown:
            handles.append(Line2D([], [], linestyle="none", marker="o", markersize=8, markerfacecolor="none",
                                  markeredgecolor="black", label="best probability"))
        if tied_shown:
            handles.append(Line2D([], [], linestyle="none", marker="o", markersize=8, markerfacecolor="none",
                                  markeredgecolor=_GREY, label="tied with best (within MC error)"))
        _figure_legend(fig, handles)
    return fig


# ----------------------------------------------------- sampling distributions


@dataclass(frozen=True, eq=False)
class SamplingSample:
    """The simulated estimates of one planned test at one design point, with and without the effect.

    ``eq=False``: the fields hold arrays, so equality is identity.

    Parameters
    ----------
    estimand, estimator, variance_estimator
        The planned test.
    units, treatment_probability
        The design point.
    null_estimates
        1-D array of estimates when the tested effect is zero.
    estimates
        1-D array of estimates under the scenario's effects.
    true_effect
        The mean exact estimand under the scenario's effects.

    Raises
    ------
    DesignCalcError
        If an estimates array is not one-dimensional.

    Examples
    --------
    >>> import numpy as np
    >>> s = SamplingSample("direct", "hajek", "neyman", 500, 0.5, np.zeros(3), np.ones(3), 1.0)
    >>> s.estimates.shape
    (3,)
    """

    estimand: str
    estimator: str
    variance_estimator: str
    units: int
    treatment_probability: float
    null_estimates: np.ndarray
    estimates: np.ndarray
    true_effect: float

    def __post_init__(self) -> None:
        for name in ("null_estimates", "estimates"):
            values = np.asarray(getattr(self, name), dtype=float)
            if values.ndim != 1:
                raise DesignCalcError(
                    f"`{name}` must be a 1-D array of estimates; got shape {values.shape} "
                    f"(test {self.estimand}: {test_label(self.estimator, self.variance_estimator)})"
                )
            object.__setattr__(self, name, values)


def sampling_distribution_figure(samples: Sequence[SamplingSample], *, title: str = "") -> Figure:
    """Histograms of the estimates with no effect and with the assumed effect, one small panel per test.

    Parameters
    ----------
    samples
        One ``SamplingSample`` per panel.
    title
        The figure's title (optional).

    Returns
    -------
    matplotlib.figure.Figure
        A grid of at most three columns; its height grows with the rows.

    Raises
    ------
    DesignCalcError
        If ``samples`` is empty or an item is not a ``SamplingSample``.

    Notes
    -----
    Both histograms of a panel share their bins and are normalised to
    densities, so their overlap shows how often a test can tell the assumed
    effect from none.  Vertical lines mark zero and the true effect.
    Non-finite estimates are ignored.

    Examples
    --------
    >>> import numpy as np
    >>> rng = np.random.default_rng(0)
    >>> s = SamplingSample("direct", "hajek", "neyman", 500, 0.5, rng.normal(0, 1, 200), rng.normal(2, 1, 200), 2.0)
    >>> fig = sampling_distribution_figure([s])
    >>> fig.axes[0].get_title().splitlines()
    ['direct', 'hajek / neyman']
    """
    samples = _nonempty(samples, "samples")
    for i, sample in enumerate(samples):
        if not isinstance(sample, SamplingSample):
            raise DesignCalcError(f"`samples[{i}]` must be a SamplingSample; got {type(sample).__name__}")
    n_columns = min(3, len(samples))
    n_rows = math.ceil(len(samples) / 3)
    width = min(_PANEL_SIZE[0], 2.5 * n_columns + 0.6)
    height = 0.9 + 2.1 * n_rows
    with mpl.rc_context(_STYLE):
        fig = Figure(figsize=(width, height), layout="constrained")
        grid = fig.subplots(n_rows, n_columns, squeeze=False)
        for ax in grid.flat[len(samples):]:
            fig.delaxes(ax)
        for ax, sample in zip(grid.flat, samples):
            null = sample.null_estimates[np.isfinite(sample.null_estimates)]
            assumed = sample.estimates[np.isfinite(sample.estimates)]
            both = np.concatenate([null, assumed])
            if both.size:
                edges = _shared_bins(both)
                for values, colour, label in ((null, PALETTE[0], "no effect"), (assumed, PALETTE[1], "assumed effect")):
                    if values.size:
                        ax.hist(values, bins=edges, density=True, histtype="stepfilled", alpha=0.45,
                                color=colour, edgecolor=colour, linewidth=0.6, label=label)
            else:
                _say_empty(ax, "no finite estimates")
            ax.axvline(0.0, color=_GREY, linestyle=":", linewidth=1.0)
            if _finite(sample.true_effect):
                ax.axvline(float(sample.true_effect), color="black", linestyle="-", linewidth=1.0)
            ax.text(0.98, 0.97, f"{sample.units} units\nP = {sample.treatment_probability:g}",
                    transform=ax.transAxes, ha="right", va="top", fontsize=6.5, color=_GREY)
            # Two lines: test labels are long enough to run into the next panel's title.
            ax.set_title(f"{sample.estimand}\n{test_label(sample.estimator, sample.variance_estimator)}", fontsize=8)
            ax.set_xlabel("estimate (outcome units)")
            ax.set_ylabel("density (per outcome unit)")
        if title:
            fig.suptitle(title)
        handles = [
            Patch(facecolor=PALETTE[0], alpha=0.45, edgecolor=PALETTE[0], label="no effect"),
            Patch(facecolor=PALETTE[1], alpha=0.45, edgecolor=PALETTE[1], label="assumed effect"),
            Line2D([], [], color=_GREY, linestyle=":", label="zero"),
            Line2D([], [], color="black", label="true effect"),
        ]
        _figure_legend(fig, handles)
    return fig


def _shared_bins(values: np.ndarray, max_bins: int = 40) -> np.ndarray:
    """Histogram bin edges for all of a panel's values, at most ``max_bins`` bins."""
    edges = np.histogram_bin_edges(values, bins="auto")
    if edges.size - 1 > max_bins:
        edges = np.linspace(edges[0], edges[-1], max_bins + 1)
    return edges


# ------------------------------------------------------------------- network


def network_figure(
    adjacency: sp.sparse.csr_array,
    *,
    treated: np.ndarray,
    groups: np.ndarray | None = None,
    types: np.ndarray | None = None,
    seed: int = 0,
    max_nodes: int = 1200,
    title: str = "",
) -> Figure:
    """One simulated network: who is linked to whom, who is treated, and each unit's block or latent type.

    Parameters
    ----------
    adjacency
        Symmetric sparse adjacency matrix of shape (n, n).
    treated
        Length-n array of treatment indicators (booleans or 0/1).
    groups
        Length-n array of integer block labels; the k-th smallest label is
        drawn as "block k".  Takes precedence over ``types``.
    types
        Length-n array of latent types in [0, 1], used when ``groups`` is None.
    seed
        Seeds the layout and, when n > ``max_nodes``, the choice of units shown.
    max_nodes
        At most this many units are drawn (a positive integer).
    title
        The figure's title (optional); the number of units shown is appended.

    Returns
    -------
    matplotlib.figure.Figure
        One panel without axes (layout coordinates carry no units).

    Raises
    ------
    DesignCalcError
        If ``adjacency`` is not a non-empty square symmetric sparse matrix, an
        array's shape does not match it, ``treated`` is not 0/1, ``groups`` is
        not integer, ``types`` is outside [0, 1], or ``max_nodes`` < 1.

    Notes
    -----
    Treated units are filled with a black edge, untreated units hollow.  When
    n > ``max_nodes``, the subgraph induced by ``max_nodes`` units drawn
    uniformly without replacement (``np.random.default_rng(seed)``) is shown,
    so edges to units left out are not drawn.  The layout is networkx's
    Fruchterman-Reingold ``spring_layout`` with 50 iterations below 500
    units and 20 from 500 on (the cost of an iteration grows like n^2; 20
    iterations keep n = 1200 at about 2-3 s on two cores).

    References
    ----------
    Fruchterman, T. M. J. & Reingold, E. M. (1991). Graph drawing by
    force-directed placement. Software: Practice and Experience 21(11), 1129-1164.

    Examples
    --------
    >>> import networkx as nx
    >>> import numpy as np
    >>> adjacency = nx.to_scipy_sparse_array(nx.cycle_graph(12), format="csr")
    >>> fig = network_figure(adjacency, treated=np.arange(12) % 2 == 0, groups=np.arange(12) // 6)
    >>> fig.axes[0].get_title()
    '12 units'
    """
    adjacency = _validate_adjacency(adjacency)
    n = adjacency.shape[0]
    treated = _validate_treated(treated, n)
    if groups is not None:
        groups = _validate_groups(groups, n)
        types = None
    elif types is not None:
        types = _validate_types(types, n)
    max_nodes = _positive_count(max_nodes, "max_nodes")

    shown = np.arange(n)
    if n > max_nodes:
        shown = np.sort(np.random.default_rng(seed).choice(n, size=max_nodes, replace=False))
        adjacency = adjacency[shown][:, shown]
    n_shown = shown.size
    iterations = _LAYOUT_ITERATIONS_SMALL if n_shown < _LAYOUT_LARGE_FROM else _LAYOUT_ITERATIONS_LARGE
    layout = nx.spring_layout(nx.from_scipy_sparse_array(adjacency), seed=seed, iterations=iterations)
    position = np.array([layout[i] for i in range(n_shown)], dtype=float).reshape(n_shown, 2)

    upper = sp.sparse.triu(adjacency, k=1).tocoo()
    segments = np.stack([position[upper.row], position[upper.col]], axis=1)
    is_treated = treated[shown]
    marker_area = float(np.clip(14000.0 / n_shown, 8.0, 40.0))

    count_text = f"{n_shown} of {n} units shown" if n_shown < n else f"{n} units"
    with mpl.rc_context(_STYLE):
        fig = Figure(figsize=(6.2, 5.4), layout="constrained")
        ax = fig.add_subplot()
        # Thousands of links as vectors would make the SVG megabytes; as an
        # embedded raster (at the PNG's dpi) they cost tens of kilobytes.
        ax.add_collection(LineCollection(segments, colors=_EDGE_GREY, linewidths=0.3, zorder=1, rasterized=True))
        if groups is not None:
            labels = np.unique(groups)
            block = np.searchsorted(labels, groups[shown])
            block_colours = np.array([mpl.colors.to_rgba(PALETTE[k % len(PALETTE)]) for k in range(labels.size)])
            colours = block_colours[block].reshape(n_shown, 4)
        elif types is not None:
            norm = Normalize(0.0, 1.0)
            colours = mpl.colormaps[_CONTINUOUS_MAP](norm(types[shown])).reshape(n_shown, 4)
        else:
            colours = np.tile(mpl.colors.to_rgba(PALETTE[0]), (n_shown, 1))
        ax.scatter(position[~is_treated, 0], position[~is_treated, 1], s=marker_area, facecolors="white",
                   edgecolors=colours[~is_treated], linewidths=0.8, zorder=2)
        ax.scatter(position[is_treated, 0], position[is_treated, 1], s=marker_area, facecolors=colours[is_treated],
                   edgecolors="black", linewidths=0.4, zorder=3)
        ax.set_aspect("equal")
        ax.set_xticks([])
        ax.set_yticks([])
        ax.set_axis_off()
        ax.autoscale_view()
        ax.set_title(f"{title} ({count_text})" if title else count_text)

        handles: list[Line2D] = [
            Line2D([], [], linestyle="none", marker="o", markerfacecolor=_GREY, markeredgecolor="black",
                   markeredgewidth=0.6, label="treated (filled)"),
            Line2D([], [], linestyle="none", marker="o", markerfacecolor="white", markeredgecolor=_GREY,
                   markeredgewidth=1.0, label="untreated (hollow)"),
            Line2D([], [], color=_EDGE_GREY, linewidth=1.0, label="link"),
        ]
        if groups is not None:
            handles += [
                Line2D([], [], linestyle="none", marker="o", markerfacecolor=PALETTE[k % len(PALETTE)],
                       markeredgecolor=PALETTE[k % len(PALETTE)], label=f"block {k + 1}")
                for k in range(labels.size)
            ]
        elif types is not None:
            colour_bar = fig.colorbar(ScalarMappable(norm=norm, cmap=_CONTINUOUS_MAP), ax=ax, shrink=0.7, pad=0.02)
            colour_bar.set_label("latent type u (in [0, 1])")
        _figure_legend(fig, handles)
    return fig


def _validate_adjacency(adjacency: object) -> sp.sparse.csr_array:
    if not sp.sparse.issparse(adjacency):
        raise DesignCalcError(f"`adjacency` must be a scipy sparse matrix; got {type(adjacency).__name__}")
    matrix = sp.sparse.csr_array(adjacency)
    if matrix.ndim != 2 or matrix.shape[0] != matrix.shape[1]:
        raise DesignCalcError(f"`adjacency` must be a square (n, n) matrix; got shape {matrix.shape}")
    if matrix.shape[0] == 0:
        raise DesignCalcError("`adjacency` is empty (no units); nothing to draw")
    if (matrix != matrix.T).nnz:
        raise DesignCalcError("`adjacency` must be symmetric (an undirected network)")
    return matrix


def _validate_treated(treated: object, n: int) -> np.ndarray:
    values = np.asarray(treated)
    if values.shape != (n,):
        raise DesignCalcError(f"`treated` must have shape ({n},), one entry per unit; got shape {values.shape}")
    if values.dtype != bool:
        if not (np.issubdtype(values.dtype, np.number) and np.all((values == 0) | (values == 1))):
            raise DesignCalcError("`treated` must hold booleans or 0/1 treatment indicators")
        values = values == 1
    return values


def _validate_groups(groups: object, n: int) -> np.ndarray:
    values = np.asarray(groups)
    if values.shape != (n,):
        raise DesignCalcError(f"`groups` must have shape ({n},), one block label per unit; got shape {values.shape}")
    if not (np.issubdtype(values.dtype, np.integer) or values.dtype == bool):
        raise DesignCalcError(f"`groups` must hold integer block labels; got dtype {values.dtype}")
    return values.astype(np.int64)


def _validate_types(types: object, n: int) -> np.ndarray:
    values = np.asarray(types, dtype=float)
    if values.shape != (n,):
        raise DesignCalcError(f"`types` must have shape ({n},), one latent type per unit; got shape {values.shape}")
    if not np.all((values >= 0) & (values <= 1)):
        raise DesignCalcError("`types` must be latent types in [0, 1] (finite)")
    return values


# ---------------------------------------------------------------- saving


def save_figure(fig: Figure, stem: pathlib.Path) -> list[pathlib.Path]:
    """Write a figure as ``stem.png`` and ``stem.svg``, byte-for-byte reproducibly.

    Parameters
    ----------
    fig
        The figure.
    stem
        The path without a suffix; its folder must exist (none is created).

    Returns
    -------
    list of pathlib.Path
        The PNG's path and the SVG's path.

    Raises
    ------
    DesignCalcError
        If the folder of ``stem`` does not exist.

    Notes
    -----
    The same figure content gives the same bytes on every call: no software
    or date stamps, a fixed salt for the SVG's ids, text kept as SVG text.
    Each file is written to a temporary file in the same folder and renamed,
    so an interrupted run never leaves half a file.

    Examples
    --------
    >>> import pathlib, tempfile
    >>> fig = Figure(figsize=(2, 2))
    >>> folder = pathlib.Path(tempfile.mkdtemp())
    >>> [p.name for p in save_figure(fig, folder / "empty")]
    ['empty.png', 'empty.svg']
    """
    stem = pathlib.Path(stem)
    folder = stem.parent
    if not folder.is_dir():
        raise DesignCalcError(f"`stem`: the folder {str(folder)!r} does not exist; create it first")
    paths = [folder / f"{stem.name}.png", folder / f"{stem.name}.svg"]
    for path in paths:
        _write_atomically(fig, path)
    return paths


def svg_text(fig: Figure) -> str:
    """The figure as SVG markup for inlining into an HTML page.

    Parameters
    ----------
    fig
        The figure.

    Returns
    -------
    str
        Markup starting at ``<svg`` (no XML declaration, DOCTYPE or
        metadata), keeping the ``width`` and ``height`` attributes; text is
        SVG text, raster parts are embedded, nothing is fetched from a URL.

    Examples
    --------
    >>> svg_text(Figure(figsize=(2, 2))).startswith("<svg")
    True
    """
    buffer = io.BytesIO()
    with mpl.rc_context(_SAVE_STYLE):
        # All metadata keys None: no <metadata> block (its Dublin Core links mean nothing inside HTML).
        fig.savefig(buffer, format="svg", metadata={"Date": None, "Format": None, "Type": None, "Creator": None})
    text = buffer.getvalue().decode("utf-8")
    return text[text.index("<svg"):]


def _write_atomically(fig: Figure, path: pathlib.Path) -> None:
    suffix = path.suffix.lstrip(".")
    metadata: dict[str, str | None] = {"Software": None} if suffix == "png" else {"Date": None}
    with atomic_file(path, "wb") as file, mpl.rc_context(_SAVE_STYLE):
        fig.savefig(file, format=suffix, dpi=_PNG_DPI, metadata=metadata)


# ---------------------------------------------------------------- helpers


class _SeriesStyles:
    """Colour and marker per series label, in order of first appearance, shared by a figure's panels."""

    def __init__(self) -> None:
        self._order: dict[str, tuple[str, str]] = {}

    def get(self, label: str) -> tuple[str, str]:
        if label not in self._order:
            k = len(self._order)
            self._order[label] = (PALETTE[k % len(PALETTE)], _MARKERS[k % len(_MARKERS)])
        return self._order[label]

    def handles(self) -> list[Line2D | Patch]:
        return [
            Line2D([], [], color=colour, marker=marker, markersize=3.5, linewidth=1.2, label=label)
            for label, (colour, marker) in self._order.items()
        ]


def _panel_row(n_panels: int, title: str) -> tuple[Figure, list[Axes]]:
    fig = Figure(figsize=_PANEL_SIZE, layout="constrained")
    axes = list(fig.subplots(1, n_panels, squeeze=False).flat)
    if title:
        fig.suptitle(title)
    return fig, axes


def _figure_legend(fig: Figure, handles: Sequence[Line2D | Patch]) -> None:
    if handles:
        # Long test labels need fewer columns, or the legend runs off the figure's sides.
        widest = max(len(str(h.get_label())) for h in handles)
        width_chars = fig.get_figwidth() * 17  # about 17 legend characters per inch at 7 pt, with the marker
        ncols = max(1, min(4, len(handles), int(width_chars // (widest + 6))))
        rows = -(-len(handles) // ncols)
        if rows > 3:  # a long legend (every planned test) gets its own height instead of squeezing the panels
            fig.set_figheight(fig.get_figheight() + 0.16 * (rows - 3))
        fig.legend(handles=list(handles), loc="outside lower center", ncols=ncols, frameon=False)


def _log_units_axis(ax: Axes) -> None:
    """A log-scale axis of unit counts labelled 100, 200, 500, 1,000, ... (no 2 x 10^2 clutter)."""
    ax.set_xscale("log")
    low, high = ax.get_xlim()
    # 1-2-5 ticks inside the range; a narrow range (300 to 600 units) with fewer than two of them
    # takes every whole multiple of the power of ten (300, 400, 500, 600) instead.
    decades = range(int(math.floor(math.log10(low))), int(math.ceil(math.log10(high))) + 1)
    ticks: list[float] = []
    for mantissas in ((1.0, 2.0, 5.0), (1.0, 1.5, 2.0, 3.0, 4.0, 5.0, 6.0, 7.0, 8.0, 9.0)):
        ticks = [m * 10.0**k for k in decades for m in mantissas if low <= m * 10.0**k <= high]
        if len(ticks) >= 2:
            break
    if len(ticks) < 2:
        ticks = sorted({float(f"{t:.2g}") for t in (low * 1.05, math.sqrt(low * high), high / 1.05)})
    ax.set_xticks(ticks)
    ax.xaxis.set_major_formatter(FuncFormatter(_units_label))
    ax.xaxis.set_minor_formatter(NullFormatter())


def _units_label(x: float, _: object = None) -> str:
    """Unit counts as 500, 2,000, 10k, 200k, 1M: short enough not to run into each other on a small panel."""
    if x >= 1e6:
        return f"{x / 1e6:g}M"
    if x >= 1e4:
        return f"{x / 1e3:g}k"
    return f"{x:,.0f}"


def _interval_arms(rows: Sequence[CompareRow | MdeRecord], mde: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Error-bar arms from each row's [mde_low, mde_high]; a missing or inverted bound draws no arm."""
    below = np.array([m - float(r.mde_low) if _finite(r.mde_low) and r.mde_low <= m else 0.0 for r, m in zip(rows, mde)])
    above = np.array([float(r.mde_high) - m if _finite(r.mde_high) and r.mde_high >= m else 0.0 for r, m in zip(rows, mde)])
    return below, above


def _say_empty(ax: Axes, message: str) -> None:
    ax.text(0.5, 0.5, message, transform=ax.transAxes, ha="center", va="center", color=_GREY)
    ax.set_xticks([])
    ax.set_yticks([])


def _estimand_order(estimands: Iterable[str]) -> list[str]:
    """Estimands present, in the planned order (direct, spillover, total), any others after."""
    present = list(dict.fromkeys(estimands))
    return [e for e in ESTIMANDS if e in present] + [e for e in present if e not in ESTIMANDS]


def _nonempty(items: Iterable[_T], name: str) -> list[_T]:
    values = list(items)
    if not values:
        raise DesignCalcError(f"`{name}` is empty; nothing to draw")
    return values


def _open_unit_interval(value: object, name: str) -> float:
    try:
        number = float(value)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        number = math.nan
    if not 0.0 < number < 1.0:
        raise DesignCalcError(f"`{name}` must be a number in (0, 1); got {value!r}")
    return number


def _positive_count(value: object, name: str) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 1:
        raise DesignCalcError(f"`{name}` must be a positive integer; got {value!r}")
    return int(value)


def _finite(value: object) -> bool:
    try:
        return math.isfinite(float(value))  # type: ignore[arg-type]
    except (TypeError, ValueError):
        return False


# ------------------------------------------------------------ goodness of fit


def fit_check_figure(check: GoodnessOfFit, *, title: str = "") -> Figure:
    """Observed network beside networks simulated from its fitted block model (``designcalc fit``).

    Parameters
    ----------
    check
        The goodness-of-fit check (:func:`designcalc.fit.goodness_of_fit`).
    title
        The figure's title (optional).

    Returns
    -------
    matplotlib.figure.Figure
        Four panels: the degree distribution (observed share of nodes at
        each degree; simulated mean with the range of the middle 95% of
        graphs), then transitivity, share of isolates and mean two-hop
        neighbourhood size (each simulated graph a dot, the simulated mean
        ± 1.96 SD a bar, the observed value a diamond).

    Raises
    ------
    DesignCalcError
        If ``check`` is not a goodness-of-fit result.

    Notes
    -----
    The band and the bars show the spread of the statistic across graphs
    drawn from the fit (what a network from the fitted model looks like),
    not the Monte Carlo error of the simulated mean.  Non-finite values are
    skipped.

    Examples
    --------
    >>> import numpy as np
    >>> from designcalc.graphs import sample_block_graph
    >>> from designcalc.fit import fit_block_model, goodness_of_fit
    >>> a = sample_block_graph([60, 40], np.array([[0.3, 0.02], [0.02, 0.3]]), rng=np.random.default_rng(3))
    >>> fig = fit_check_figure(goodness_of_fit(a, fit_block_model(a, seed=1), graphs=5, seed=2))
    >>> [ax.get_title() for ax in fig.axes]
    ['degree distribution', 'transitivity', 'isolates', 'two-hop reach']
    """
    from matplotlib.ticker import MaxNLocator

    for attribute in ("checks", "observed_degrees", "simulated_degree_counts", "n_graphs"):
        if not hasattr(check, attribute):
            raise DesignCalcError(f"`check` must be a GoodnessOfFit result; got {type(check).__name__}")
    by_name = {c.name: c for c in check.checks}
    # (statistic, panel title, axis label): two-line labels fit the narrow panels.
    panels = (
        ("transitivity", "transitivity", "share of connected\ntriples closed"),
        ("share_isolated", "isolates", "share of nodes\nwith no ties"),
        ("mean_two_hop", "two-hop reach", "mean nodes within\ntwo steps"),
    )
    with mpl.rc_context(_STYLE):
        fig = Figure(figsize=(_PANEL_SIZE[0], 3.1), layout="constrained")
        axes = fig.subplots(1, 4, gridspec_kw={"width_ratios": [2.4, 1, 1, 1]})
        ax = axes[0]
        counts = np.asarray(check.simulated_degree_counts, dtype=float)
        observed = np.asarray(check.observed_degrees, dtype=np.int64)
        if counts.size and observed.size:
            shares = counts / counts.sum(axis=1, keepdims=True)
            degree = np.arange(shares.shape[1])
            low, high = np.percentile(shares, [2.5, 97.5], axis=0)
            ax.fill_between(degree, low, high, step="mid", color=PALETTE[0], alpha=0.25, linewidth=0)
            ax.step(degree, shares.mean(axis=0), where="mid", color=PALETTE[0], linewidth=1.2)
            observed_share = np.bincount(observed, minlength=degree.size) / observed.size
            ax.plot(np.arange(observed_share.size), observed_share, linestyle="none", marker="D",
                    markersize=3.2, color=PALETTE[1])
        else:
            _say_empty(ax, "no degrees")
        ax.set_xlabel("degree (ties per node)")
        ax.set_ylabel("share of nodes")
        ax.set_title("degree distribution")
        for ax, (name, panel_title, label) in zip(axes[1:], panels):
            stat = by_name.get(name)
            values = np.asarray(stat.simulated if stat is not None else (), dtype=float)
            values = values[np.isfinite(values)]
            if stat is None or (values.size == 0 and not _finite(stat.observed)):
                _say_empty(ax, "not computed")
                ax.set_xlabel(label)
                continue
            if values.size:
                # Dots spread evenly over the panel's height, in the simulation's order: no random jitter.
                heights = np.linspace(-0.25, 0.25, values.size) if values.size > 1 else np.zeros(1)
                ax.plot(values, heights, linestyle="none", marker="o", markersize=2.5, color=PALETTE[0], alpha=0.6)
                if values.size > 1:
                    mean, sd = float(values.mean()), float(values.std(ddof=1))
                    ax.errorbar([mean], [-0.45], xerr=[[_Z95 * sd], [_Z95 * sd]], fmt="o", color=PALETTE[0],
                                markersize=4, capsize=2, linewidth=1.0)
            if _finite(stat.observed):
                ax.plot([float(stat.observed)], [0.45], linestyle="none", marker="D", markersize=5, color=PALETTE[1])
            ax.set_ylim(-0.7, 0.7)
            ax.set_yticks([])
            ax.xaxis.set_major_locator(MaxNLocator(3))
            ax.set_xlabel(label)
            ax.set_title(panel_title)
        if title:
            fig.suptitle(title)
        handles = [
            Line2D([], [], linestyle="none", marker="D", markersize=4, color=PALETTE[1], label="observed"),
            Line2D([], [], color=PALETTE[0], marker="o", markersize=3, label=f"simulated from the fit ({check.n_graphs} graphs)"),
            Patch(facecolor=PALETTE[0], alpha=0.25, label="middle 95% of simulated graphs / mean ± 1.96 SD"),
        ]
        _figure_legend(fig, handles)
    return fig

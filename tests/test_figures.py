"""Tests of designcalc.figures: panels, labels and legends, skipped non-finite values, reproducible files, inline SVG."""

from __future__ import annotations

import dataclasses
import math
import pathlib
import re
from collections.abc import Callable

import matplotlib as mpl
import networkx as nx
import numpy as np
import pytest
import scipy as sp
from matplotlib.collections import PathCollection
from matplotlib.figure import Figure

from designcalc.compare import CompareRow
from designcalc.errors import DesignCalcError
from designcalc.figures import (
    PALETTE,
    SamplingSample,
    mde_probability_figure,
    network_figure,
    power_curve_figure,
    sampling_distribution_figure,
    save_figure,
    svg_text,
    test_label,
)
from designcalc.sample_size import SizePoint, SizeRecord

NAN = float("nan")
INF = float("inf")

# Okabe, M. & Ito, K. (2008). Color Universal Design (CUD): how to make figures
# and presentations that are friendly to colorblind people (jfly.uni-koeln.de/color/).
OKABE_ITO = ("#0072B2", "#D55E00", "#009E73", "#CC79A7", "#E69F00", "#56B4E9", "#F0E442", "#000000")


# ------------------------------------------------------------- hand-made inputs


def _points(*pairs: tuple[float, float], se: float = 0.02) -> tuple[SizePoint, ...]:
    return tuple(
        SizePoint(units=units, power=power, power_mc_se=se, sd=1.0, mean_standard_error=1.0,
                  mean_estimate=0.3, true_effect=0.3, replicates=200)
        for units, power in pairs
    )


_BASE_RECORD = SizeRecord(
    estimand="direct", estimator="hajek", variance_estimator="neyman", treatment_probability=0.5,
    status="reached", required_units=300, units_low=270.0, units_high=330.0, verified_units=300,
    verified_power=0.8, verified_power_mc_se=0.02, relative_precision=0.1, reference_distribution="normal",
    sd_slope=-0.5, reason="", points=_points((100, 0.35), (200, 0.6), (400, 0.87), (800, 0.99)),
)


def _record(**changes: object) -> SizeRecord:
    return dataclasses.replace(_BASE_RECORD, **changes)  # type: ignore[arg-type]


def _records() -> list[SizeRecord]:
    return [
        _record(),
        _record(estimator="ht", required_units=500, units_low=NAN, units_high=620.0),
        _record(estimand="total", status="reached at the smallest size", required_units=100, units_low=90.0),
        _record(estimand="spillover", status="not reachable", required_units=None, units_low=NAN, units_high=NAN,
                points=_points((100, 0.1), (400, 0.2), (1600, 0.3))),
    ]


_BASE_ROW = CompareRow(
    units=500, treatment_probability=0.5, estimand="direct", estimator="hajek", variance_estimator="neyman",
    standard_error=0.1, standard_error_mc_se=0.002, mean_estimated_se=0.1, mde=0.28, mde_low=0.27, mde_high=0.29,
    mde_sd_units=0.28, size=0.05, size_mc_se=0.005, method="formula (not verified)", best=False, tied_with_best=False,
)


def _rows(units: tuple[int, ...] = (500, 1000)) -> list[CompareRow]:
    rows = []
    for n in units:
        for estimand in ("spillover", "direct"):  # deliberately out of the planned order
            for estimator in ("hajek", "ht"):
                for p in (0.2, 0.5, 0.8):
                    mde = 0.28 / math.sqrt(4 * p * (1 - p)) * (1.2 if estimator == "ht" else 1.0) * (500 / n) ** 0.5
                    rows.append(dataclasses.replace(
                        _BASE_ROW, units=n, estimand=estimand, estimator=estimator, treatment_probability=p,
                        mde=mde, mde_low=0.95 * mde, mde_high=1.05 * mde, best=p == 0.5,
                    ))
    return rows


def _samples(count: int) -> list[SamplingSample]:
    rng = np.random.default_rng(7)
    return [
        SamplingSample("direct", f"estimator{k}", "neyman", 500, 0.5,
                       rng.normal(0.0, 1.0, 300), rng.normal(2.0, 1.0, 300), 2.0)
        for k in range(count)
    ]


def _network(n: int = 60, seed: int = 3) -> tuple[sp.sparse.csr_array, np.ndarray, np.ndarray]:
    graph = nx.gnm_random_graph(n, 3 * n, seed=seed)
    adjacency = sp.sparse.csr_array(nx.to_scipy_sparse_array(graph, format="csr"))
    rng = np.random.default_rng(seed)
    return adjacency, rng.random(n) < 0.4, np.arange(n) % 3


def _axes_labelled(fig: Figure) -> bool:
    return all(ax.get_xlabel() and ax.get_ylabel() for ax in fig.axes)


def _legend_texts(fig: Figure) -> list[str]:
    legends = list(fig.legends) + [ax.get_legend() for ax in fig.axes if ax.get_legend() is not None]
    return [text.get_text() for legend in legends for text in legend.get_texts()]


def _all_texts(fig: Figure) -> str:
    return " ".join(t.get_text() for ax in fig.axes for t in ax.texts)


# ------------------------------------------------------------------ palette


def test_palette_is_the_okabe_ito_set() -> None:
    """The first eight palette colours are Okabe & Ito's colour-blind-safe set, in their order."""
    assert PALETTE[:8] == OKABE_ITO
    assert all(mpl.colors.is_color_like(colour) for colour in PALETTE)


def test_test_label_joins_estimator_and_variance() -> None:
    """A test's label is 'estimator / variance_estimator'."""
    assert test_label("hajek", "neyman") == "hajek / neyman"


# ------------------------------------------------------------- power curves


def test_power_curve_has_one_labelled_panel_per_estimand_in_planned_order() -> None:
    """One panel per estimand present, in direct/spillover/total order, log-scaled units, power in [0, 1]."""
    fig = power_curve_figure(_records()[::-1], target_power=0.8, title="sizes")
    assert [ax.get_title() for ax in fig.axes] == ["direct", "spillover", "total"]
    assert _axes_labelled(fig)
    for ax in fig.axes:
        assert ax.get_xlabel() == "units in the study (log scale)"
        assert ax.get_ylabel() == "power"
        assert ax.get_xscale() == "log"
        assert ax.get_ylim() == (0.0, 1.0)
    texts = _legend_texts(fig)
    assert {"hajek / neyman", "ht / neyman", "target power"} <= set(texts)
    assert any(t.startswith("required units") for t in texts)
    assert "target not reached" in _all_texts(fig)


def test_power_curve_labels_probabilities_when_there_are_several() -> None:
    """With several treatment probabilities each line's label names its probability."""
    records = [_record(), _record(treatment_probability=0.3)]
    texts = _legend_texts(power_curve_figure(records, target_power=0.8))
    assert {"hajek / neyman, P = 0.5", "hajek / neyman, P = 0.3"} <= set(texts)


def test_power_curve_says_so_when_a_panel_has_no_simulated_sizes() -> None:
    """A record without points is skipped; an estimand left with nothing to draw says 'no simulated sizes'."""
    fig = power_curve_figure([_record(), _record(estimand="total", points=())], target_power=0.8)
    assert len(fig.axes) == 2
    assert "no simulated sizes" in " ".join(t.get_text() for t in fig.axes[1].texts)
    assert "no simulated sizes" not in " ".join(t.get_text() for t in fig.axes[0].texts)


def test_power_curve_skips_non_finite_values(tmp_path: pathlib.Path) -> None:
    """nan and inf powers, errors and interval bounds are skipped without error and the figure still saves."""
    points = (*_points((100, 0.3), (200, NAN), (400, 0.9)), *_points((800, 0.95), se=INF), *_points((INF, 0.99)))
    records = [
        _record(points=points, units_low=NAN, units_high=INF),
        _record(estimand="spillover", points=_points((100, NAN), (200, INF))),
    ]
    fig = power_curve_figure(records, target_power=0.8)
    line = fig.axes[0].get_lines()[0]
    assert list(line.get_xdata()) == [100.0, 400.0, 800.0]
    assert "no simulated sizes" in " ".join(t.get_text() for t in fig.axes[1].texts)
    assert all(p.stat().st_size > 0 for p in save_figure(fig, tmp_path / "power"))


def test_power_curve_rejects_empty_records_and_a_bad_target() -> None:
    """Empty records and a target power outside (0, 1) raise, naming the argument."""
    with pytest.raises(DesignCalcError, match="`records` is empty; nothing to draw"):
        power_curve_figure([], target_power=0.8)
    with pytest.raises(DesignCalcError, match="`target_power` must be a number in \\(0, 1\\)"):
        power_curve_figure(_records(), target_power=1.0)


# ------------------------------------------------------- MDE by probability


def test_mde_figure_draws_the_smallest_size_by_default_with_labelled_panels() -> None:
    """units=None draws the smallest size: one labelled panel per estimand, a line per test, the best ringed."""
    fig = mde_probability_figure(_rows())
    assert [ax.get_title() for ax in fig.axes] == ["direct", "spillover"]
    assert "500 units" in fig.get_suptitle()
    assert _axes_labelled(fig)
    for ax in fig.axes:
        assert ax.get_xlabel() == "treatment probability"
        assert "minimum detectable effect" in ax.get_ylabel() and "(outcome units)" in ax.get_ylabel()
        rings = [c for c in ax.collections if isinstance(c, PathCollection)]
        assert sum(len(c.get_offsets()) for c in rings) == 2  # one best probability per test
    assert {"hajek / neyman", "ht / neyman", "best probability"} <= set(_legend_texts(fig))


def test_mde_figure_draws_the_requested_size() -> None:
    """An explicit study size selects its rows; a size not in the rows raises, listing the sizes present."""
    fig = mde_probability_figure(_rows(), units=1000, title="grid")
    assert fig.get_suptitle() == "grid (1000 units)"
    with pytest.raises(DesignCalcError, match="`units` = 750 is not a study size in `rows`; sizes present: 500, 1000"):
        mde_probability_figure(_rows(), units=750)


def test_mde_figure_skips_non_finite_values() -> None:
    """Non-finite MDEs are left out of the line and non-finite bounds drop their error-bar arm."""
    rows = _rows(units=(500,))
    rows[0] = dataclasses.replace(rows[0], mde=INF)
    rows[1] = dataclasses.replace(rows[1], mde_low=NAN, mde_high=INF)
    rows[2] = dataclasses.replace(rows[2], mde=NAN)
    fig = mde_probability_figure(rows)
    spillover = fig.axes[1]
    first_line = spillover.get_lines()[0]
    assert list(first_line.get_xdata()) == [0.5]
    everything_nan = [dataclasses.replace(r, mde=NAN) for r in rows if r.estimand == "direct"]
    fig = mde_probability_figure(everything_nan)
    assert "no finite MDE" in " ".join(t.get_text() for t in fig.axes[0].texts)


def test_mde_figure_rejects_empty_rows() -> None:
    """Empty rows raise, naming the argument."""
    with pytest.raises(DesignCalcError, match="`rows` is empty; nothing to draw"):
        mde_probability_figure([])


# ----------------------------------------------------- sampling distributions


def test_sampling_figure_has_one_panel_per_sample_in_at_most_three_columns() -> None:
    """Four samples give four labelled panels in two rows of at most three, titled 'estimand' over 'estimator / variance'."""
    fig = sampling_distribution_figure(_samples(4), title="estimates")
    assert len(fig.axes) == 4
    assert _axes_labelled(fig)
    assert fig.axes[0].get_title() == "direct\nestimator0 / neyman"
    assert fig.axes[0].get_xlabel() == "estimate (outcome units)"
    columns = {round(ax.get_position().x0, 3) for ax in fig.axes}
    rows = {round(ax.get_position().y0, 3) for ax in fig.axes}
    assert len(columns) == 3 and len(rows) == 2
    assert {"no effect", "assumed effect", "true effect"} <= set(_legend_texts(fig))
    for ax in fig.axes:
        assert len(ax.patches) == 2  # two histograms sharing their bins
        assert [line.get_xdata()[0] for line in ax.get_lines()] == [0.0, 2.0]


def test_sampling_figure_grows_with_the_number_of_rows() -> None:
    """Seven samples (three rows) make a taller figure than two (one row)."""
    short = sampling_distribution_figure(_samples(2)).get_size_inches()[1]
    tall = sampling_distribution_figure(_samples(7)).get_size_inches()[1]
    assert tall > short


def test_sampling_figure_ignores_non_finite_estimates() -> None:
    """nan and inf estimates are ignored; a sample with none finite says so; a nan true effect draws no line."""
    sample = _samples(1)[0]
    dirty = dataclasses.replace(sample, estimates=np.r_[sample.estimates, NAN, INF, -INF])
    empty = dataclasses.replace(sample, null_estimates=np.array([NAN]), estimates=np.array([INF]), true_effect=NAN)
    fig = sampling_distribution_figure([dirty, empty])
    assert len(fig.axes[0].patches) == 2
    assert "no finite estimates" in " ".join(t.get_text() for t in fig.axes[1].texts)
    assert len(fig.axes[1].get_lines()) == 1  # only the zero line


def test_sampling_inputs_are_validated() -> None:
    """Empty samples, non-sample items and estimates that are not 1-D raise, naming the argument."""
    with pytest.raises(DesignCalcError, match="`samples` is empty; nothing to draw"):
        sampling_distribution_figure([])
    with pytest.raises(DesignCalcError, match=r"`samples\[0\]` must be a SamplingSample"):
        sampling_distribution_figure([np.zeros(3)])  # type: ignore[list-item]
    with pytest.raises(DesignCalcError, match="`estimates` must be a 1-D array"):
        SamplingSample("direct", "hajek", "neyman", 500, 0.5, np.zeros(4), np.zeros((2, 2)), 1.0)


# ------------------------------------------------------------------ network


def test_network_figure_colours_blocks_and_marks_treatment() -> None:
    """Every unit is drawn once: treated filled with a black edge, untreated hollow; blocks and treatment in the legend."""
    adjacency, treated, groups = _network()
    fig = network_figure(adjacency, treated=treated, groups=groups, seed=1, title="village")
    ax = fig.axes[0]
    assert ax.get_title() == "village (60 units)"
    untreated_nodes, treated_nodes = (c for c in ax.collections if isinstance(c, PathCollection))
    assert len(treated_nodes.get_offsets()) == treated.sum()
    assert len(untreated_nodes.get_offsets()) == (~treated).sum()
    assert np.allclose(treated_nodes.get_edgecolor()[:, :3], 0.0)
    assert np.allclose(untreated_nodes.get_facecolor()[:, :3], 1.0)
    assert {"treated (filled)", "untreated (hollow)", "block 1", "block 2", "block 3"} <= set(_legend_texts(fig))
    assert ax.get_aspect() == 1.0
    assert list(ax.get_xticks()) == [] and list(ax.get_yticks()) == []


def test_network_figure_uses_cividis_and_a_colour_bar_for_latent_types() -> None:
    """Without blocks, latent types colour the units through cividis with a labelled colour bar."""
    adjacency, treated, _ = _network()
    types = np.linspace(0.0, 1.0, 60)
    fig = network_figure(adjacency, treated=treated, types=types)
    colour_bar_axes = fig.axes[1]
    assert colour_bar_axes.get_ylabel().startswith("latent type u")
    untreated_nodes = next(c for c in fig.axes[0].collections if isinstance(c, PathCollection))
    expected = mpl.colormaps["cividis"](types[~treated])
    assert np.allclose(untreated_nodes.get_edgecolor(), expected)


def test_network_figure_draws_a_random_subset_of_large_networks() -> None:
    """Above max_nodes a seeded random subset of max_nodes units is drawn and the title says how many of how many."""
    adjacency, treated, groups = _network(n=90)
    fig = network_figure(adjacency, treated=treated, groups=groups, max_nodes=40, seed=5)
    assert "40 of 90 units shown" in fig.axes[0].get_title()
    nodes = [c for c in fig.axes[0].collections if isinstance(c, PathCollection)]
    assert sum(len(c.get_offsets()) for c in nodes) == 40


def test_network_inputs_are_validated() -> None:
    """Bad shapes, non-0/1 treatment, asymmetric or empty adjacency, types outside [0, 1] and max_nodes < 1 raise."""
    adjacency, treated, groups = _network()
    with pytest.raises(DesignCalcError, match=r"`treated` must have shape \(60,\)"):
        network_figure(adjacency, treated=treated[:10])
    with pytest.raises(DesignCalcError, match="`treated` must hold booleans or 0/1"):
        network_figure(adjacency, treated=np.full(60, 0.5))
    with pytest.raises(DesignCalcError, match=r"`groups` must have shape \(60,\)"):
        network_figure(adjacency, treated=treated, groups=groups[:5])
    with pytest.raises(DesignCalcError, match="`groups` must hold integer block labels"):
        network_figure(adjacency, treated=treated, groups=groups + 0.5)
    with pytest.raises(DesignCalcError, match=r"`types` must be latent types in \[0, 1\]"):
        network_figure(adjacency, treated=treated, types=np.full(60, 1.5))
    with pytest.raises(DesignCalcError, match="`max_nodes` must be a positive integer"):
        network_figure(adjacency, treated=treated, max_nodes=0)
    with pytest.raises(DesignCalcError, match="`adjacency` must be a scipy sparse matrix"):
        network_figure(adjacency.toarray(), treated=treated)
    with pytest.raises(DesignCalcError, match="`adjacency` must be a square"):
        network_figure(sp.sparse.csr_array((3, 4)), treated=np.zeros(3, dtype=bool))
    with pytest.raises(DesignCalcError, match="`adjacency` is empty"):
        network_figure(sp.sparse.csr_array((0, 0)), treated=np.zeros(0, dtype=bool))
    with pytest.raises(DesignCalcError, match="`adjacency` must be symmetric"):
        network_figure(sp.sparse.csr_array(np.triu(np.ones((3, 3)), 1)), treated=np.zeros(3, dtype=bool))


# ------------------------------------------------------------------ saving


def _network_builder(n: int, max_nodes: int) -> Callable[[], Figure]:
    def build() -> Figure:
        adjacency, treated, groups = _network(n=n)
        return network_figure(adjacency, treated=treated, groups=groups, seed=11, max_nodes=max_nodes)

    return build


BUILDERS: dict[str, Callable[[], Figure]] = {
    "power": lambda: power_curve_figure(_records(), target_power=0.8, title="power"),
    "mde": lambda: mde_probability_figure(_rows()),
    "sampling": lambda: sampling_distribution_figure(_samples(4)),
    "network": _network_builder(60, 1200),
    "network_subset": _network_builder(90, 40),
}


@pytest.mark.parametrize("name", sorted(BUILDERS))
def test_save_figure_is_byte_reproducible(name: str, tmp_path: pathlib.Path) -> None:
    """Two figures built separately from the same inputs save to byte-identical PNG and SVG files."""
    first = save_figure(BUILDERS[name](), tmp_path / f"{name}_1")
    second = save_figure(BUILDERS[name](), tmp_path / f"{name}_2")
    assert [p.name for p in first] == [f"{name}_1.png", f"{name}_1.svg"]
    for a, b in zip(first, second):
        assert a.read_bytes() == b.read_bytes()
    assert first[0].read_bytes().startswith(b"\x89PNG")
    assert b"<svg" in first[1].read_bytes()
    assert sorted(p.name for p in tmp_path.iterdir()) == sorted(p.name for p in first + second)  # no temporary files left


def test_save_figure_leaves_global_settings_alone(tmp_path: pathlib.Path) -> None:
    """Saving changes no global rcParams (the reproducibility settings live in an rc_context)."""
    before = dict(mpl.rcParams)
    save_figure(BUILDERS["power"](), tmp_path / "power")
    svg_text(BUILDERS["power"]())
    assert dict(mpl.rcParams) == before


def test_save_figure_creates_no_folders(tmp_path: pathlib.Path) -> None:
    """A stem in a missing folder raises instead of creating it."""
    with pytest.raises(DesignCalcError, match="`stem`: the folder .* does not exist"):
        save_figure(BUILDERS["power"](), tmp_path / "missing" / "power")
    assert not (tmp_path / "missing").exists()


def test_save_figure_keeps_dots_in_the_stem(tmp_path: pathlib.Path) -> None:
    """A stem with a dot gets the suffixes appended, not substituted."""
    paths = save_figure(Figure(figsize=(1, 1)), tmp_path / "size.v2")
    assert [p.name for p in paths] == ["size.v2.png", "size.v2.svg"]


@pytest.mark.parametrize("name", ["power", "network"])
def test_svg_text_is_inline_markup_without_external_references(name: str) -> None:
    """The inline SVG starts at <svg, keeps its size, is reproducible, and links to nothing outside itself."""
    text = svg_text(BUILDERS[name]())
    assert text.startswith("<svg")
    assert "<?xml" not in text and "<!DOCTYPE" not in text
    assert re.search(r'<svg[^>]* width="[0-9.]+pt"', text) and re.search(r'<svg[^>]* height="[0-9.]+pt"', text)
    assert 'href="http' not in text and "url(http" not in text
    # Every remaining URL is an XML namespace declaration.
    assert set(re.findall(r'([\w:.-]+)="https?://', text)) <= {"xmlns", "xmlns:xlink"}
    assert "<text" in text  # text stays text
    assert svg_text(BUILDERS[name]()) == text

"""Compute everything a report shows, once, from one scenario and seed.

The report runs the solvers the planner would run by hand (``check``,
``power``, ``mde``, ``size``, ``compare``), keeps the raw estimates it needs
for the sampling-distribution figure and for Holm's procedure (through
``simulate_power``'s ``on_point`` hook, not by simulating again), and draws
one network with the engine's own streams.  Every number of the report's
tables and figures comes from the ``Report`` returned here; the renderers
only format it.

The key answers (required size and MDE) are solved for one test per
estimand by default, the first planned estimator and variance estimator of
each, because the size search over every planned test is the slow part;
``ReportSettings.tests`` names others and ``all_tests`` solves for every
one.  Restricting the tests never changes a test's numbers
(``engine.restrict_tests``).
"""

from __future__ import annotations

import datetime as _dt
import math
from collections.abc import Callable, Sequence
from dataclasses import asdict, dataclass, field, replace

import numpy as np
import scipy as sp

from designcalc.compare import (
    CompareResult,
    compare_treatment_probabilities,
    parse_test_spec,
)
from designcalc.diagnostics import ScenarioCheck, check_scenario
from designcalc.engine import (
    clustered_point,
    reference_of,
    ESTIMANDS,
    DesignPoint,
    EngineProgress,
    GraphDraws,
    example_network,
    planned_keys,
    restrict_tests,
)
from designcalc.errors import DesignCalcError
from designcalc.figures import SamplingSample
from designcalc.inference import critical_value
from designcalc.mde import MdeResult, minimum_detectable_effects
from designcalc.measure import MeasurementRecord, pair_records
from designcalc.multiplicity import (
    bonferroni_alpha,
    bonferroni_reject,
    holm_reject,
    holm_thresholds,
    mde_inflation,
    p_values,
    sample_size_inflation,
)
from designcalc.power import (
    PowerResult,
    _override,
    clustered_mean_se,
    provenance,
    reject,
    simulate_power,
)
from designcalc.sample_size import SizeResult, required_sample_size
from designcalc.scenario import Scenario
from designcalc.execution import Cluster
from designcalc.store import ResultStore

__all__ = ["CostRow", "ExampleNetwork", "FamilyPowerRow", "MultipleTesting", "Report", "ReportSettings", "build_report"]

Key = tuple[str, str, str]


@dataclass(frozen=True)
class ReportSettings:
    """What a report computes beyond the scenario: which tests get key answers, precision, overrides.

    ``tests`` are ``ESTIMAND[:ESTIMATOR[:VARIANCE]]`` specs (empty: the first
    planned test of each estimand); ``precision`` is the relative half-width
    of the 95% Monte Carlo interval asked of the MDE and the required size;
    ``search_graphs`` is the number of graphs the size search starts from
    (0: half the scenario's, at least 8; more are added until the precision
    is met); ``compare_units`` is the size of the MDE-against-probability
    comparison (0: the middle planned size, the lower of two).  ``units``
    (``clusters`` for a clustered population), ``treatment_probabilities``,
    ``graphs``, ``assignments_per_graph`` and ``seed`` override the
    scenario, as on the command line.  For a clustered population
    ``max_units`` and ``compare_units`` count clusters.
    """

    tests: tuple[str, ...] = ()
    all_tests: bool = False
    precision: float = 0.1
    search_graphs: int = 0
    max_units: int | None = None
    compare_units: int = 0
    units: tuple[int, ...] = ()
    treatment_probabilities: tuple[float, ...] = ()
    graphs: int | None = None
    assignments_per_graph: int | None = None
    seed: int | None = None
    batch_size: int = 16
    workers: int = 1  # local processes for every phase; a speed knob, not in the provenance
    clusters: tuple[int, ...] = ()

    def __post_init__(self) -> None:
        if not 0 < self.precision <= 0.5:
            raise DesignCalcError(f"`precision` must be in (0, 0.5] (relative half-width, e.g. 0.1 for ±10%); got {self.precision}")
        for p in self.treatment_probabilities:
            if not 0 < p < 1:
                raise DesignCalcError(f"treatment probabilities must be in (0, 1); got {p}")
        if self.search_graphs and self.search_graphs < 2:
            raise DesignCalcError(f"`search_graphs` must be at least 2; got {self.search_graphs}")
        if self.tests and self.all_tests:
            raise DesignCalcError("give key-answer tests (--test) or --all-tests, not both")
        checks = (
            ("units", min(self.units, default=4), 4), ("graphs", self.graphs or 2, 2),
            ("assignments_per_graph", self.assignments_per_graph or 1, 1), ("compare_units", self.compare_units or 4, 4),
            ("max_units", self.max_units or 8, 8), ("batch_size", self.batch_size, 1), ("seed", self.seed or 0, 0),
            ("workers", self.workers, 1),
        )
        for name, value, low in checks:
            if value < low:
                raise DesignCalcError(f"`{name}` must be at least {low}; got {value}")

    def to_dict(self) -> dict[str, object]:
        """The settings that shape the numbers (batch size and workers are speed knobs only)."""
        d = asdict(self)
        del d["batch_size"], d["workers"]
        return d


@dataclass(frozen=True)
class CostRow:
    """What testing at the adjusted level costs one hypothesis's test.

    ``mde_factor``: the MDE at a fixed size grows by the ratio of the
    normal multipliers (``multiplicity.mde_inflation``).  ``classical_factor``:
    the sample-size factor if SE fell as n^-1/2 (its square).  The tool does
    not assume that for network estimators, so for spillover and total tests
    ``sample_size_factor`` uses the SD's log-log slope ``sd_slope`` measured
    by the size search (n grows by ``mde_factor ** (-1 / sd_slope)``; nan
    when the SD hardly shrinks with n); direct-effect tests, which are
    sqrt(n)-consistent, use the classical factor.  ``adjusted_units``
    applies it to a reached size.
    """

    estimand: str
    estimator: str
    variance_estimator: str
    treatment_probability: float
    per_test_alpha: float
    mde_factor: float
    classical_factor: float
    sd_slope: float
    sample_size_factor: float
    status: str
    required_units: int | None
    adjusted_units: int | None


@dataclass(frozen=True)
class FamilyPowerRow:
    """Power of one hypothesis's test at one design point: alone, under Bonferroni, under Holm (same replicates)."""

    units: int
    treatment_probability: float
    estimand: str
    estimator: str
    variance_estimator: str
    power: float
    power_mc_se: float
    bonferroni_power: float
    bonferroni_power_mc_se: float
    holm_power: float
    holm_power_mc_se: float
    replicates: int
    clusters: int = 0


@dataclass(frozen=True)
class MultipleTesting:
    """The family of hypotheses (one test per estimand), the adjusted levels and their costs."""

    hypotheses: tuple[Key, ...]
    alpha: float
    alternative: str
    target_power: float
    bonferroni_alpha: float
    holm_thresholds: tuple[float, ...]
    costs: tuple[CostRow, ...]
    power: tuple[FamilyPowerRow, ...]


@dataclass(frozen=True, eq=False)
class ExampleNetwork:
    """One simulated network of the scenario, as the engine drew it, for the drawing."""

    point: DesignPoint
    adjacency: sp.sparse.csr_array
    groups: np.ndarray | None
    types: np.ndarray
    treated: np.ndarray

    @property
    def mean_degree(self) -> float:
        return float(self.adjacency.nnz / max(self.point.units, 1))


@dataclass(frozen=True, eq=False)
class Report:
    """Everything one report shows: the results of each solver, the raw draws for figures, provenance."""

    scenario: Scenario
    settings: ReportSettings
    tests: tuple[Key, ...]
    check: ScenarioCheck
    power: PowerResult
    mde: MdeResult
    size: SizeResult
    compare: CompareResult
    multiple_testing: MultipleTesting | None
    samples: tuple[SamplingSample, ...]
    sample_point: DesignPoint
    network: ExampleNetwork
    provenance: dict[str, object]
    warnings: tuple[str, ...] = field(default=())
    # With a [measurement] table: every test as measured (the power table) beside perfect measurement.
    measurement: tuple[MeasurementRecord, ...] = field(default=())

    @property
    def generated(self) -> str:
        return str(self.provenance["utc_time"])


def _chosen_tests(scenario: Scenario, settings: ReportSettings) -> tuple[Key, ...]:
    units = scenario.population.units[0]
    keys = planned_keys(scenario, units)
    if settings.all_tests:
        return tuple(keys)
    if settings.tests:
        chosen = []
        for text in settings.tests:
            try:
                chosen.append(parse_test_spec(text, option="--test").resolve(scenario, units))
            except DesignCalcError as exc:
                message = str(exc)
                raise DesignCalcError(message if message.startswith("--test") else f"--test: {message}") from None
        return tuple(dict.fromkeys(chosen))
    if scenario.design.saturation is not None:
        # A saturation design's headline answers are its pooled contrasts (METHODS.md §5.1) when planned.
        keys = sorted(keys, key=lambda k: not k[1].endswith("_pooled"))
    firsts = [next(k for k in keys if k[0] == e) for e in ESTIMANDS if any(k[0] == e for k in keys)]
    return tuple(firsts)


def _family(scenario: Scenario, tests: Sequence[Key]) -> tuple[Key, ...]:
    """One hypothesis per planned estimand, tested by its first key-answer test, else by its first planned test.

    Several tests of one estimand are alternative analyses of one hypothesis,
    not several hypotheses; every estimand the plan tests counts.
    """
    planned = planned_keys(scenario, scenario.population.units[0])
    family = []
    for e in ESTIMANDS:
        chosen = [k for k in tests if k[0] == e] or [k for k in planned if k[0] == e]
        if chosen:
            family.append(chosen[0])
    return tuple(family)


class _Capture:
    """``on_point`` hook: keeps the hypotheses' statistics at every point and the raw estimates at one."""

    def __init__(self, scenario: Scenario, family: Sequence[Key], tests: Sequence[Key], sample_point: DesignPoint) -> None:
        self.scenario = scenario
        self.family = tuple(family)
        self.tests = tuple(tests)
        self.sample_point = sample_point
        self.p_values: dict[DesignPoint, np.ndarray] = {}  # (graphs, assignments, hypotheses); nan where undefined
        self.single: dict[DesignPoint, np.ndarray] = {}  # the unadjusted test's decisions, same shape
        self.keys: dict[DesignPoint, tuple[Key, ...]] = {}
        self.samples: list[SamplingSample] = []

    def __call__(self, point: DesignPoint, draws: Sequence[GraphDraws]) -> None:
        design = self.scenario.design
        available = draws[0].estimates
        family = [k for k in self.family if k in available]  # a test dropped at this size (two_hop) is left out
        p_columns, single_columns = [], []
        for key in family:
            est = np.stack([d.estimates[key] for d in draws])
            se = np.stack([d.standard_errors[key] for d in draws])
            reference = reference_of(self.scenario, point, key)
            critical = critical_value(design.significance_level, design.alternative, reference.df)
            # The power table's own rule and mask (power.summarise_design_point), so the unadjusted
            # rate is that table's power exactly; p-values only order the tests for Holm.
            ok = np.isfinite(est) & np.isfinite(se)
            with np.errstate(divide="ignore", invalid="ignore"):
                t = est / se
                single_columns.append(np.where(ok, reject(t, critical, design.alternative), False))
                p_columns.append(np.where(ok, p_values(np.nan_to_num(t, nan=0.0), design.alternative, reference.df), np.nan))
        if family:
            self.keys[point] = tuple(family)
            self.p_values[point] = np.stack(p_columns, axis=-1)
            self.single[point] = np.stack(single_columns, axis=-1)
        if point == self.sample_point:
            for key in (k for k in self.tests if k in available):
                estimates = np.concatenate([d.estimates[key] for d in draws])
                nulls = np.concatenate([d.null_estimates[key] for d in draws])
                truth = float(np.mean([d.estimands.truth(key) for d in draws]))
                self.samples.append(SamplingSample(*key, point.units, point.treatment_probability, nulls, estimates, truth))


def _family_power(capture: _Capture, alpha: float) -> list[FamilyPowerRow]:
    rows = []
    for point, p in capture.p_values.items():
        graphs, assignments, m = p.shape
        flat = p.reshape(-1, m)
        valid = ~np.isnan(flat)
        decisions = {
            "single": capture.single[point].reshape(-1, m),
            "bonferroni": bonferroni_reject(flat, alpha),
            "holm": holm_reject(flat, alpha),
        }
        for j, key in enumerate(capture.keys[point]):
            # Clustered by graph, as every Monte Carlo error of the tool; replicates whose test is
            # undefined are left out of all three rates alike.
            rates = {}
            for name, d in decisions.items():
                values = np.where(valid[:, j], d[:, j].astype(float), np.nan).reshape(graphs, assignments)
                rates[name] = clustered_mean_se(values)
            rows.append(
                FamilyPowerRow(
                    point.units, point.treatment_probability, *key,
                    *rates["single"], *rates["bonferroni"], *rates["holm"], int(valid[:, j].sum()), point.clusters,
                )
            )
    return rows


def _costs(scenario: Scenario, family: Sequence[Key], size: SizeResult) -> list[CostRow]:
    design = scenario.design
    adjusted = bonferroni_alpha(design.significance_level, len(family))
    mde_factor = mde_inflation(design.significance_level, adjusted, design.target_power, design.alternative)
    n_factor = sample_size_inflation(design.significance_level, adjusted, design.target_power, design.alternative)
    rows = []
    for key in family:
        for pi in design.treatment_probabilities:
            found = size.select(estimand=key[0], estimator=key[1], variance_estimator=key[2], treatment_probability=pi)
            record = found[0] if found else None
            slope = record.sd_slope if record is not None else math.nan
            # Below this the SD barely shrinks with n and the power law would extrapolate wildly.
            if key[0] == "direct":
                # The direct-effect estimators are sqrt(n)-consistent (METHODS §2.2), so the classical
                # square holds; a slope fitted to a few simulated sizes would only add noise.
                factor = n_factor
            else:
                factor = mde_factor ** (-1.0 / slope) if math.isfinite(slope) and slope < -_MIN_SLOPE else math.nan
            # Only an exact answer is scaled: "reached at the smallest size" is an upper bound.
            required = record.required_units if record is not None and record.status == "reached" else None
            adjusted_units = math.ceil(required * factor) if required is not None and math.isfinite(factor) else None
            status = record.status if record is not None else "not computed (not a key-answer test)"
            rows.append(CostRow(*key, pi, adjusted, mde_factor, n_factor, slope, factor, status, required, adjusted_units))
    return rows


_MIN_SLOPE = 0.1


def build_report(
    scenario: Scenario,
    settings: ReportSettings | None = None,
    *,
    progress: Callable[[str, EngineProgress], None] | None = None,
    cluster: Cluster | None = None,
    store: "ResultStore | None" = None,
) -> Report:
    """Run every calculation a report shows and return it as plain data.

    Parameters
    ----------
    scenario
        A validated scenario.
    settings
        Which tests get key answers, the precision, overrides (``ReportSettings``).
    progress
        Called with the phase name ("power", "minimum detectable effects",
        "sample size", "treatment probabilities") and the engine's progress.
    cluster, store
        A dask scheduler address (or an open ``execution.ClusterConnection``)
        and a ``designcalc.store.ResultStore`` for every phase (power, MDE,
        sample size, comparison), which reuse and extend its stored graphs;
        neither changes a number (``simulate_power``).

    Returns
    -------
    Report

    Raises
    ------
    KeyboardInterrupt
        When interrupted: a report is never built from partial results.

    Examples
    --------
    >>> from pathlib import Path
    >>> from designcalc import load_scenario
    >>> s = load_scenario(Path(__file__).parents[2] / "scenarios" / "lake_orrin_savings.toml")
    >>> r = build_report(s, ReportSettings(units=(200,), treatment_probabilities=(0.5,), graphs=4,
    ...                  assignments_per_graph=4, precision=0.5, max_units=800))
    >>> [k[0] for k in r.tests]
    ['direct', 'spillover', 'total']
    """
    settings = settings or ReportSettings()
    scenario = _override(
        scenario, settings.units or None, settings.treatment_probabilities or None,
        settings.graphs, settings.assignments_per_graph, settings.seed, settings.clusters or None,
    )
    clustered = scenario.population.clustered
    check = check_scenario(scenario)
    tests = _chosen_tests(scenario, settings)
    family = _family(scenario, tests)
    solving = scenario if settings.all_tests else restrict_tests(scenario, tests)
    units = scenario.population.units
    sample_point = _point(scenario, -1)
    capture = _Capture(scenario, family, tests, sample_point)

    def phase(name: str) -> Callable[[EngineProgress], None] | None:
        return (lambda update: progress(name, update)) if progress is not None else None

    G = scenario.simulation.graphs
    search_graphs = settings.search_graphs or max(8, G // 2)
    sizes = scenario.population.clusters if clustered else units  # what a clustered study counts: clusters
    compare_units = settings.compare_units or sizes[(len(sizes) - 1) // 2]
    power = simulate_power(scenario, batch_size=settings.batch_size, progress=phase("power"), on_point=capture, workers=settings.workers,
        cluster=cluster, store=store,
    )
    _refuse_partial(power.partial)
    measurement: tuple[MeasurementRecord, ...] = ()
    if scenario.measurement is not None:
        # The power table is the study as measured; the same run without the survey and attrition is the yardstick.
        perfect = simulate_power(
            replace(scenario, measurement=None), batch_size=settings.batch_size, progress=phase("perfect measurement"),
            workers=settings.workers, cluster=cluster, store=store,
        )
        _refuse_partial(perfect.partial)
        measurement = pair_records(perfect.records, power.records)
    mde = minimum_detectable_effects(
        solving, relative_precision=settings.precision, batch_size=settings.batch_size, progress=phase("minimum detectable effects"),
        workers=settings.workers, cluster=cluster, store=store,
    )
    _refuse_partial(mde.partial)
    if scenario.network.kind == "surveyed":
        # The surveyed network fixes the size: there is nothing to search (the key answers give the MDE there).
        size = SizeResult(scenario.name, (), provenance(scenario), (
            f"network.model = \"surveyed\": the study size is the surveyed {units[0]} units, so no sample size is solved for",
        ))
    else:
        size = required_sample_size(
            solving, graphs=search_graphs, relative_precision=settings.precision,
            max_units=None if clustered else settings.max_units, max_clusters=settings.max_units if clustered else None,
            batch_size=settings.batch_size, progress=phase("sample size"), workers=settings.workers,
            cluster=cluster, store=store,
        )
    _refuse_partial(size.partial)
    if scenario.design.saturation is not None:
        # A two-stage design's arms fix who is treated: there is no treatment probability to vary.
        compare = CompareResult(scenario.name, (), (), provenance(scenario), (
            "a clustered design's arms set who is treated, so treatment probabilities are not compared; "
            "`designcalc compare --design` puts it beside other designs",
        ))
    else:
        compare = compare_treatment_probabilities(
            solving, units=None if clustered else [compare_units], clusters=[compare_units] if clustered else None,
            batch_size=settings.batch_size, progress=phase("treatment probabilities"), workers=settings.workers, cluster=cluster, store=store,
        )
    _refuse_partial(compare.partial)

    point = _point(scenario, 0)
    net, treated = example_network(scenario, point)
    network = ExampleNetwork(point, net.adjacency, net.blocks, net.types, treated)

    multiple = None
    if len(family) > 1:
        alpha = scenario.design.significance_level
        multiple = MultipleTesting(
            family, alpha, scenario.design.alternative, scenario.design.target_power,
            bonferroni_alpha(alpha, len(family)), holm_thresholds(alpha, len(family)),
            tuple(_costs(scenario, family, size)), tuple(_family_power(capture, alpha)),
        )
    record = _report_provenance(scenario, settings, tests, search_graphs, compare_units, size, mde)
    warnings = tuple(dict.fromkeys([*check.warnings, *power.warnings, *mde.warnings, *size.warnings, *compare.warnings]))
    return Report(
        scenario, settings, tests, check, power, mde, size, compare, multiple, tuple(capture.samples), sample_point,
        network, record, warnings, measurement,
    )


def _refuse_partial(partial: bool) -> None:
    if partial:
        raise KeyboardInterrupt


def _point(scenario: Scenario, index: int) -> DesignPoint:
    """The design point of the ``index``-th planned size at the first treatment probability."""
    pi = scenario.design.treatment_probabilities[0]
    if scenario.population.clustered:
        return clustered_point(scenario, scenario.population.clusters[index], pi)
    return DesignPoint(scenario.population.units[index], pi)


def _report_provenance(
    scenario: Scenario, settings: ReportSettings, tests: Sequence[Key], search_graphs: int, compare_units: int,
    size: SizeResult, mde: MdeResult,
) -> dict[str, object]:
    import matplotlib

    record = provenance(
        scenario,
        report_settings=settings.to_dict(),
        key_answer_tests=[":".join(k) for k in tests],
        relative_precision=settings.precision,
        size_search_start_graphs=search_graphs,
        size_search_max_units=size.provenance.get("max_units"),
        max_graphs=mde.provenance.get("max_graphs"),
        compare_units=compare_units,
        matplotlib=matplotlib.__version__,
    )
    # One time stamp for the whole report (the solvers' own are dropped from its files).
    record["utc_time"] = _dt.datetime.now(_dt.UTC).isoformat(timespec="seconds")
    return record

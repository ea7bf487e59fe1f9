"""Required sample size: the number of units that gives each planned test its target power.

No scaling law is assumed (METHODS.md §3.2, §4.6): under a density rule the
SD of a spillover estimator may shrink like n^-1/2, more slowly, or not at
all.  For every treatment probability and planned test:

1. **Coarse grid.**  Simulate the scenario's model at sizes doubling from
   the smallest planned size (halving when that already has the power), at
   a few graphs each, until every test's simulated power brackets the
   target, or ``population.max_units`` is reached, or the trend shows the
   target cannot be reached (the signal-to-noise ratio stops growing).
2. **Trend and proposal.**  Within the bracket, interpolate the SD and the
   mean estimated SE on the log-log scale and the mean estimate linearly in
   log n, predict the feasible test's power from the normal approximation,
   and solve for the target.
3. **Verify and refine.**  Simulate at the proposal; one probit-Newton step
   in log n from the verified power gives the estimate, its 95% Monte Carlo
   interval comes from the power's clustered MC error over the slope of the
   power curve.  When the estimate moves beyond that interval the proposal
   is replaced (staying inside the bracket, which the verified point
   narrows) and simulated again; when the interval is wider than
   ``simulation.relative_precision`` more graphs are added, up to
   ``simulation.max_graphs``.

Sizes are simulated at integers rounded to three significant figures above
1000, so tests whose answers are close share simulations; every simulated
point is reported.

For a clustered population the size searched is the number of clusters (at
the scenario's cluster sizes) or, with ``cluster_size_for`` = C, the size of
every one of C clusters (``SizeAxis``); everything above holds with n read
as that number.  Beside the simulated answer, a two-stage design's
saturation contrasts get the closed-form answer of METHODS.md §5.2
(``designcalc.cluster_formulas``: no network, equal clusters), and a search
over cluster sizes says how much power even infinitely large clusters would
give (METHODS.md §5.3: with a large ICC, power comes from clusters).
"""

from __future__ import annotations

import math
import time
from contextlib import closing
from dataclasses import asdict, dataclass, replace
from typing import TYPE_CHECKING, Callable, Sequence

import numpy as np
import scipy.stats

from designcalc import cluster_formulas
from designcalc.clusters import within_cluster_sd
from designcalc.engine import (
    ALTERNATIVE,
    ESTIMANDS,
    TWO_HOP_MAX_UNITS,
    DesignPoint,
    EngineProgress,
    GraphDraws,
    Run,
    clustered_point,
    null_label,
    null_model,
    planned_keys,
    reference_of,
)
from designcalc.errors import DesignCalcError
from designcalc.execution import Cluster, check_workers, simulate_graphs
from designcalc.inference import Z95, critical_value, floored_power_se, probit
from designcalc.power import CAUTIONS, FlaggedRecord, ResultTable, clustered_mean_se, clustered_sd, provenance, reject, stack_run
from designcalc.saturation import MIN_CLUSTERS_PER_ARM, arm_counts, check_cluster_sizes, check_clusters
from designcalc.scenario import Scenario

if TYPE_CHECKING:
    from designcalc.store import ResultStore

__all__ = ["SizeAxis", "SizePoint", "SizeRecord", "SizeResult", "required_sample_size", "MAX_ADJACENCY_ENTRIES"]

MAX_ADJACENCY_ENTRIES = 40_000_000  # ~ 0.5 GB of sparse adjacency; larger sizes are not simulated
_MAX_REFINE_STEPS = 12


@dataclass(frozen=True)
class SizeAxis:
    """What the search counts: ``"units"`` of one network, ``"clusters"``, or ``"cluster_size"`` of ``clusters`` clusters."""

    name: str = "units"
    clusters: int = 0

    @property
    def noun(self) -> str:
        return {"units": "units", "clusters": "clusters", "cluster_size": "units per cluster"}[self.name]

    def point(self, scenario: Scenario, n: int, pi: float) -> DesignPoint:
        if self.name == "clusters":
            return clustered_point(scenario, n, pi)
        if self.name == "cluster_size":
            return clustered_point(scenario, self.clusters, pi, cluster_size=n)
        return DesignPoint(n, pi)

    def smallest(self, scenario: Scenario, pi: float) -> int:
        """The smallest size the design allows."""
        if self.name == "clusters":
            design = scenario.design.saturation
            c = 2
            if design is not None:
                while c < 10_000 and min(arm_counts(design, c)) < MIN_CLUSTERS_PER_ARM:
                    c += 1
            return max(c, 4)
        if self.name == "cluster_size":
            m = 4
            while m < 100_000 and not self.allowed(scenario, m):
                m += 1
            return m
        return max(8, math.ceil(4 / min(pi, 1 - pi)))

    def allowed(self, scenario: Scenario, n: int) -> bool:
        """Whether the density rule can be met at this size (a unit links to at most m - 1 others)."""
        m = n if self.name == "units" else (n if self.name == "cluster_size" else scenario.population.cluster_sizes.smallest)
        if self.name == "cluster_size" and scenario.design.saturation is not None:
            try:
                check_cluster_sizes(scenario.design.saturation, m, m)
            except DesignCalcError:
                return False  # a saturation would treat nobody (or everybody) in clusters this small
        return scenario.density.target_mean_degree(m) < m - 1

    def adjacency_entries(self, scenario: Scenario, n: int) -> float:
        if self.name == "units":
            return n * scenario.density.target_mean_degree(n)
        m = n if self.name == "cluster_size" else scenario.population.cluster_sizes.nominal
        clusters = self.clusters if self.name == "cluster_size" else n
        return clusters * m * scenario.density.target_mean_degree(int(round(m)))


@dataclass(frozen=True)
class SizePoint:
    """One simulated size for one test: what the search saw there."""

    units: int
    power: float
    power_mc_se: float
    sd: float
    mean_standard_error: float
    mean_estimate: float
    true_effect: float
    replicates: int


@dataclass(frozen=True)
class SizeRecord(FlaggedRecord):
    """The required number of units for one planned test at one treatment probability."""

    estimand: str
    estimator: str
    variance_estimator: str
    treatment_probability: float
    status: str  # "reached", "not reachable", "reached at the smallest size"
    required_units: int | None
    units_low: float
    units_high: float
    verified_units: int | None
    verified_power: float
    verified_power_mc_se: float
    relative_precision: float
    reference_distribution: str
    sd_slope: float
    reason: str
    points: tuple[SizePoint, ...] = ()
    flags: tuple[str, ...] = ()
    size: float = float("nan")  # the feasible test's rejection rate under the null, at verified_units
    size_mc_se: float = float("nan")
    # What required_units, units_low/high, verified_units and the points count (SizeAxis.name),
    # and the fixed number of clusters of a search over cluster sizes.
    size_axis: str = "units"
    clusters: int = 0
    # A two-stage design's closed-form answer (METHODS.md §5.2, no network; cluster_formulas), and its note.
    closed_form: float = float("nan")
    closed_form_note: str = ""

    def to_dict(self) -> dict[str, object]:
        d = super().to_dict()
        d["points"] = [asdict(p) for p in self.points]
        return d


@dataclass(frozen=True)
class SizeResult(ResultTable):
    scenario_name: str
    records: tuple[SizeRecord, ...]
    provenance: dict[str, object]
    warnings: tuple[str, ...] = ()
    partial: bool = False
    cautions: tuple[str, ...] = CAUTIONS



def _round_units(x: float) -> int:
    """Round to an integer, and to three significant figures above 1000 (so nearby proposals coincide)."""
    n = max(int(round(x)), 1)
    if n < 1000:
        return n
    digits = int(math.floor(math.log10(n))) - 2
    return int(round(n, -digits))


@dataclass
class _Summary:
    power: float
    power_se: float
    sd: float
    mean_se: float
    mean_estimate: float
    truth: float
    replicates: int
    failed: int = 0


class _Sizes:
    """Simulations of the scenario's model at several sizes for one treatment probability."""

    def __init__(
        self, scenario: Scenario, pi: float, batch_size: int, tick: Callable[[], None], workers: int = 1,
        cluster: Cluster | None = None, store: "ResultStore | None" = None, axis: SizeAxis = SizeAxis(),
    ) -> None:
        self.scenario = scenario
        self.axis = axis
        self.workers = workers
        self.cluster = cluster
        self.store = store
        self.pi = pi
        self.batch_size = batch_size
        self.tick = tick
        self.draws: dict[int, list[GraphDraws]] = {}
        self.run = [Run(ALTERNATIVE, scenario.outcome, ESTIMANDS)]
        # Each test sees only the sizes (and graph counts) its own search asked
        # for, so its answer does not depend on which other tests are planned;
        # the draws themselves are shared (content-keyed, so identical anyway).
        self.paths: dict[tuple[str, str, str], dict[int, int]] = {}

    def ensure(self, n: int, graphs: int, keys: Sequence[tuple[str, str, str]] = ()) -> None:
        have = self.draws.setdefault(n, [])
        point = self.point(n)
        tasks = [(point, g) for g in range(len(have), graphs)]
        with closing(simulate_graphs(self.scenario, tasks, workers=self.workers, batch_size=self.batch_size, runs=self.run, cluster=self.cluster, store=self.store)) as stream:
            for draws in stream:
                have.append(draws)
                self.tick()
        for key in keys:
            path = self.paths.setdefault(key, {})
            path[n] = max(path.get(n, 0), graphs)

    def graphs(self, n: int, key: tuple[str, str, str]) -> int:
        return self.paths.get(key, {}).get(n, 0)

    def sizes_of(self, key: tuple[str, str, str]) -> list[int]:
        return sorted(self.paths.get(key, {}))

    def null_size(self, n: int, key: tuple[str, str, str], graphs: int) -> tuple[float, float]:
        """Rejection rate (and MC se) of the test under the null of its estimand at n, on the same graphs and assignments."""
        label = null_label(key[0])
        run = [Run(label, null_model(self.scenario, key[0]), (key[0],), frozenset({key}))]
        point = self.point(n)
        draws = []
        tasks = [(point, g) for g in range(graphs)]
        with closing(simulate_graphs(self.scenario, tasks, workers=self.workers, batch_size=self.batch_size, runs=run, cluster=self.cluster, store=self.store)) as stream:
            for d in stream:
                draws.append(d)
                self.tick()
        design = self.scenario.design
        reference = reference_of(self.scenario, point, key)
        critical = critical_value(design.significance_level, design.alternative, reference.df)
        est, se, _ = stack_run(draws, label, key)
        ok = np.isfinite(est) & np.isfinite(se)
        with np.errstate(divide="ignore", invalid="ignore"):
            return clustered_mean_se(np.where(ok, reject(est / se, critical, design.alternative).astype(float), np.nan))

    def summary(self, n: int, key: tuple[str, str, str]) -> _Summary | None:
        """The test's summary at n over the graphs its own search asked for (None if it never asked)."""
        count = self.graphs(n, key)
        draws = self.draws.get(n, [])[:count]
        if not draws or key not in draws[0].runs[ALTERNATIVE].estimates:
            return None
        design = self.scenario.design
        reference = reference_of(self.scenario, self.point(n), key)
        critical = critical_value(design.significance_level, design.alternative, reference.df)
        est, se, truth = stack_run(draws, ALTERNATIVE, key)
        ok = np.isfinite(est) & np.isfinite(se)
        with np.errstate(divide="ignore", invalid="ignore"):
            power, power_se = clustered_mean_se(np.where(ok, reject(est / se, critical, design.alternative).astype(float), np.nan))
        sd, _ = clustered_sd(np.where(ok, est, np.nan))
        mean_est, _ = clustered_mean_se(np.where(ok, est, np.nan))
        mean_se = float(np.nanmean(np.where(ok, se, np.nan))) if ok.any() else float("nan")
        return _Summary(power, power_se, sd, mean_se, mean_est, float(truth.mean()), int(ok.sum()), int(est.size - ok.sum()))

    def point(self, n: int) -> DesignPoint:
        return self.axis.point(self.scenario, n, self.pi)

    def points(self, key: tuple[str, str, str]) -> tuple[SizePoint, ...]:
        out = []
        for n in self.sizes_of(key):
            s = self.summary(n, key)
            if s is not None:
                out.append(SizePoint(n, s.power, s.power_se, s.sd, s.mean_se, s.mean_estimate, s.truth, s.replicates))
        return tuple(out)


def _local_trend(points: Sequence[tuple[int, _Summary]], n: float) -> tuple[float, float, float]:
    """SD, mean estimated SE and mean estimate at n from the (up to) three simulated sizes nearest n.

    SD and SE are fitted log-linearly in log n (so any power law, not only
    n^-1/2, is followed), the mean estimate linearly in log n.
    """
    usable = [(m, s) for m, s in points if s.sd > 0 and s.mean_se > 0 and math.isfinite(s.sd) and math.isfinite(s.mean_se)]
    if len(usable) < 2:
        raise ValueError("a trend needs two sizes")
    near = sorted(usable, key=lambda item: abs(math.log(item[0]) - math.log(n)))[:3]
    x = np.log([m for m, _ in near])
    if np.ptp(x) == 0:
        raise ValueError("a trend needs two distinct sizes")
    at = math.log(n)

    def fit(y: np.ndarray) -> float:
        slope, intercept = np.polyfit(x, y, 1)
        return float(intercept + slope * at)

    sd = math.exp(fit(np.log([s.sd for _, s in near])))
    se = math.exp(fit(np.log([s.mean_se for _, s in near])))
    mean = fit(np.array([s.mean_estimate for _, s in near]))
    return sd, se, mean


def _predicted_power(sizes: _Sizes, key: tuple[str, str, str], n: float, points: Sequence[tuple[int, _Summary]]) -> float:
    """Normal-approximation power of the feasible test at n from the local trend."""
    sd, se, mean = _local_trend(points, n)
    scenario = sizes.scenario
    design = scenario.design
    reference = reference_of(scenario, sizes.point(max(int(round(n)), 4)), key)
    q = critical_value(design.significance_level, design.alternative, reference.df)
    if design.alternative == "greater":
        return float(scipy.stats.norm.cdf((mean - q * se) / sd))
    if design.alternative == "less":
        return float(scipy.stats.norm.cdf((-mean - q * se) / sd))
    return float(scipy.stats.norm.cdf((abs(mean) - q * se) / sd) + scipy.stats.norm.cdf((-abs(mean) - q * se) / sd))


def _sd_slope(points: Sequence[tuple[int, _Summary]]) -> float:
    """Least-squares slope of log SD on log n over the given points."""
    pts = [(math.log(n), math.log(s.sd)) for n, s in points if s.sd > 0 and math.isfinite(s.sd)]
    if len(pts) < 2:
        return float("nan")
    x, y = np.array(pts).T
    return float(np.polyfit(x, y, 1)[0])


def required_sample_size(
    scenario: Scenario,
    *,
    treatment_probabilities: Sequence[float] | None = None,
    max_units: int | None = None,
    graphs: int | None = None,
    assignments_per_graph: int | None = None,
    seed: int | None = None,
    relative_precision: float | None = None,
    max_graphs: int | None = None,
    batch_size: int = 16,
    progress: Callable[[EngineProgress], None] | None = None,
    workers: int = 1,
    cluster: Cluster | None = None,
    store: "ResultStore | None" = None,
    cluster_size_for: int | None = None,
    max_clusters: int | None = None,
) -> SizeResult:
    """Units (or clusters) needed for the target power, per treatment probability and planned test (module docstring).

    Parameters
    ----------
    scenario
        A validated scenario.
    treatment_probabilities, graphs, assignments_per_graph, seed
        Optional overrides, as in ``simulate_power``.
    max_units
        Largest size searched (default ``population.max_units``).
    relative_precision, max_graphs
        Overrides of ``simulation.relative_precision`` (target half-width of
        the 95% Monte Carlo interval of n, relative to n) and
        ``simulation.max_graphs`` (cap on graphs at the verified size).
    workers
        Local worker processes for the graphs of each simulated size (1: this
        process); the numbers are identical for any number.  ``cluster``: a
        dask scheduler address instead (``designcalc.execution``).
    store
        A ``designcalc.store.ResultStore`` that keeps every simulated graph,
        so a rerun (or a report) reuses them; same numbers without it.
    cluster_size_for, max_clusters
        A clustered population's search counts clusters (up to
        ``max_clusters``, default ``population.max_clusters``); with
        ``cluster_size_for`` = C it counts the units of every one of C
        clusters instead (up to ``max_units``, default 16 times the mean
        cluster size).

    Examples
    --------
    >>> from pathlib import Path
    >>> from designcalc import load_scenario, required_sample_size
    >>> s = load_scenario(Path(__file__).parents[1] / "scenarios" / "lake_orrin_savings.toml")
    >>> from dataclasses import replace
    >>> s = replace(s, estimators=replace(s.estimators, direct=("hajek",), direct_variance=("neyman",), spillover=("pc_balancing",)))
    >>> r = required_sample_size(s, treatment_probabilities=[0.5], graphs=8, assignments_per_graph=10, relative_precision=0.2)
    >>> rec = r.select(estimand="direct")[0]
    >>> rec.status, 200 < rec.required_units < 800
    ('reached', True)
    """
    from designcalc.power import _override

    if scenario.network.kind == "surveyed":
        raise DesignCalcError(
            f"{scenario.source}: network.model = \"surveyed\" fixes the study at the surveyed {scenario.population.units[0]} units, "
            "so there is no sample size to solve for; use `designcalc power` or `mde` at that size, "
            "or fit an edge model to the survey (`designcalc fit`) to plan other sizes"
        )
    scenario = _override(scenario, None, treatment_probabilities, graphs, assignments_per_graph, seed)
    sim = scenario.simulation
    precision = sim.relative_precision if relative_precision is None else relative_precision
    cap = sim.max_graphs if max_graphs is None else max(max_graphs, sim.graphs)
    axis, limit = size_axis_and_limit(scenario, cluster_size_for, max_units, max_clusters)
    started = time.perf_counter()
    finished = 0
    records: list[SizeRecord] = []
    warnings: list[str] = []
    partial = False

    def tick() -> None:
        nonlocal finished
        finished += 1
        if progress is not None:
            progress(EngineProgress(finished, 0, time.perf_counter() - started))

    try:
        for pi in scenario.design.treatment_probabilities:
            sizes = _Sizes(scenario, pi, batch_size, tick, check_workers(workers), cluster, store, axis)
            records.extend(_with_closed_form(scenario, axis, r) for r in _search(scenario, sizes, limit, precision, cap, warnings))
    except KeyboardInterrupt:
        partial = True
    limits = {"max_units": limit} if axis.name != "clusters" else {"max_clusters": limit}
    if axis.name != "units":
        limits["size_axis"] = axis.name
    if axis.name == "cluster_size":
        limits["clusters"] = axis.clusters
    return SizeResult(
        scenario.name, tuple(records),
        provenance(scenario, relative_precision=precision, max_graphs=cap, **limits), tuple(warnings), partial,
    )


def size_axis_and_limit(scenario: Scenario, cluster_size_for: int | None, max_units: int | None, max_clusters: int | None) -> tuple[SizeAxis, int]:
    """What the search counts and how far it may go (``required_sample_size``'s parameters)."""
    population = scenario.population
    if not population.clustered:
        if cluster_size_for is not None or max_clusters is not None:
            raise DesignCalcError(f"{scenario.source} plans one network, not clusters: search its units (leave out the cluster options)")
        return SizeAxis(), max_units or population.search_limit
    if cluster_size_for is not None:
        if scenario.design.saturation is not None:
            try:
                check_clusters(scenario.design.saturation, cluster_size_for)
            except DesignCalcError as exc:
                raise DesignCalcError(f"--per-cluster {cluster_size_for}: {exc}") from None
        limit = max_units or max(16 * int(round(population.cluster_sizes.nominal)), 64)
        return SizeAxis("cluster_size", cluster_size_for), min(limit, 2_000_000 // cluster_size_for)
    if max_units is not None:
        raise DesignCalcError("--max-units bounds a search over cluster sizes (--per-cluster); a search over clusters is bounded by --max-clusters")
    if population.cluster_sizes.kind == "list":
        raise DesignCalcError(
            f"{scenario.source} states every cluster's size (population.cluster_sizes), which fixes their number; "
            "give cluster_size (a number or a distribution) to search the number of clusters, or search cluster sizes with --per-cluster"
        )
    return SizeAxis("clusters"), max_clusters or population.cluster_search_limit


def _with_closed_form(scenario: Scenario, axis: SizeAxis, record: SizeRecord) -> SizeRecord:
    """Label the record with its axis and, for a saturation contrast, add METHODS.md §5.2's closed-form answer."""
    record = replace(record, size_axis=axis.name, clusters=axis.clusters)
    design = scenario.design.saturation
    if design is None or axis.name == "units":
        return record
    value, note = _closed_form(scenario, axis, record)
    return replace(record, closed_form=value, closed_form_note=note)


def _closed_form(scenario: Scenario, axis: SizeAxis, record: SizeRecord) -> tuple[float, str]:
    """Closed-form clusters (or the large-cluster limit) of a saturation-specific contrast; NaN where none applies."""
    design = scenario.design.saturation
    name = record.estimator
    if "@" not in name or not record.points:
        return float("nan"), ""
    kind, label = name.split("@")
    p = float(label)
    j = min(range(len(design.saturations)), key=lambda i: abs(design.saturations[i] - p))
    effect = abs(record.points[-1].true_effect)
    icc = scenario.outcome.cluster_icc
    # Total SD: the within-cluster SD and the cluster effect's, s_v^2 = icc / (1 - icc) sigma_w^2 (designcalc.clusters).
    sigma = within_cluster_sd(scenario.outcome, scenario.network) / math.sqrt(1.0 - icc)
    d = scenario.design
    if effect == 0 or sigma == 0:
        return float("nan"), ""
    m = scenario.population.cluster_sizes.nominal if axis.name == "clusters" else None
    assumptions = "closed form of METHODS.md §5.2 (no network, equal clusters, normal approximation)"
    if axis.name == "clusters":
        answer = cluster_formulas.required_clusters(
            effect, m, icc, design.pure_control_share, p, design.shares[j], kind,
            alpha=d.significance_level, power=d.target_power, sigma=sigma, alternative=d.alternative,
        )
        return float(answer.clusters), f"{assumptions}: {answer.clusters:.1f} clusters"
    if kind in ("itt", "tce", "snt"):  # as m grows each tends to rho sigma^2 (1/f + 1/psi) / C (METHODS.md §5.3)
        best = cluster_formulas.max_power_with_clusters(
            effect, axis.clusters, icc, design.pure_control_share, design.shares[j], d.significance_level, d.alternative, sigma=sigma,
        )
        return float("nan"), (
            f"{assumptions}: with {axis.clusters} clusters even infinitely large clusters give power {best:.2f} "
            f"(ICC {icc:g})" + ("; add clusters instead" if best < d.target_power else "")
        )
    return float("nan"), ""


def _memory_ok(scenario: Scenario, n: int, axis: SizeAxis = SizeAxis()) -> bool:
    return axis.adjacency_entries(scenario, n) <= MAX_ADJACENCY_ENTRIES


@dataclass
class _KeyState:
    key: tuple[str, str, str]
    below: int | None = None  # largest simulated size known to fall short of the target
    above: int | None = None  # smallest simulated size known to reach it
    reason: str = ""
    done: bool = False
    ready: bool = False  # bracketed by the trend: the target lies below the next grid size
    status: str = ""


def _search(scenario: Scenario, sizes: _Sizes, limit: int, precision: float, cap: int, warnings: list[str]) -> list[SizeRecord]:
    target = scenario.design.target_power
    pi = sizes.pi
    G = scenario.simulation.graphs
    coarse = max(8, G // 4)
    axis = sizes.axis
    noun = axis.noun
    smallest = axis.smallest(scenario, pi)
    first = {
        "units": lambda: scenario.population.units[0],
        "clusters": lambda: scenario.population.clusters[0],
        "cluster_size": lambda: int(round(scenario.population.cluster_sizes.nominal)),
    }[axis.name]()
    start = min(max(first, smallest), limit)
    keys = planned_keys(scenario, axis.point(scenario, start, pi).units)
    states = {k: _KeyState(k) for k in keys}
    uppers = {k: _upper_size(scenario, k, start, limit, axis) for k in keys}

    def score(n: int, st: _KeyState) -> None:
        s = sizes.summary(n, st.key)
        if s is None:
            return
        if s.power >= target:
            st.above = n if st.above is None else min(st.above, n)
        elif st.above is None or n < st.above:
            # Once bracketed, a noisy shortfall above the bracket must not invert it.
            st.below = n if st.below is None else max(st.below, n)

    # 1. Coarse grid: double up until each test is bracketed, ruled out, or at its largest size.
    sizes.ensure(start, coarse, keys)
    n = start
    while True:
        open_up = []
        for st in states.values():
            if st.done:
                continue
            score(n, st)
            if st.above is None and not st.ready:
                open_up.append(st)
        for st in open_up:
            trend = _trend_points(sizes, st.key)[-3:]
            st.reason = _plateau_reason(scenario, st.key, trend, uppers[st.key], noun)
            if st.reason:
                st.done = True
        open_up = [st for st in open_up if not st.done]
        nxt = min(2 * n, limit)
        # A test whose trend already predicts the target before the next size needs no more grid.
        for st in open_up:
            if min(nxt, uppers[st.key]) > n and _solve_trend(scenario, sizes, st.key, n, min(nxt, uppers[st.key])) is not None:
                st.ready = True
        open_up = [st for st in open_up if not st.ready]
        # Tests whose largest simulable size comes before the next grid size get one last look there.
        for st in open_up:
            up = uppers[st.key]
            if up >= nxt:
                continue
            if up > n:
                sizes.ensure(up, coarse, [st.key])
                score(up, st)
            if st.above is None:
                s = sizes.summary(max(up, n), st.key)
                st.reason = _limit_reason(scenario, st.key, max(up, n), limit, s, noun)
                st.status = "not reachable" if up >= limit else "beyond simulation limit"
                st.done = True
        open_up = [st for st in open_up if not st.done and st.above is None]
        if not open_up or nxt == n:
            break
        sizes.ensure(nxt, coarse, [st.key for st in open_up])
        n = nxt
    # Halve down for tests already powered at the start.
    n = start
    while True:
        low = [st for st in states.values() if not st.done and st.below is None and st.above == n]
        if not low:
            break
        nxt = max(n // 2, smallest)
        if nxt == n or not axis.allowed(scenario, nxt):
            for st in low:
                st.reason = (
                    f"the target power is reached already at {n} {noun}, the smallest size searched "
                    "(and the smallest the density rule and design allow)"
                )
                st.status = "reached at the smallest size"
                st.done = True
            break
        sizes.ensure(nxt, coarse, [st.key for st in low])
        for st in low:
            score(nxt, st)
        n = nxt

    # 2-3. Propose, verify, refine, per test.
    records = []
    for key, st in states.items():
        if not st.done:
            records.append(_refine(scenario, sizes, st, precision, cap, uppers[key]))
            continue
        points = sizes.points(key)
        reached = st.status == "reached at the smallest size"
        flags = []
        last = sizes.summary(st.above, key) if reached else None
        if last is not None and last.failed:
            flags.append(f"{last.failed} of {last.failed + last.replicates} replicates at {st.above} {noun} had no estimate")
        records.append(
            SizeRecord(
                estimand=key[0], estimator=key[1], variance_estimator=key[2], treatment_probability=pi,
                status=st.status or "not reachable",
                required_units=st.above if reached else None,
                units_low=float("nan"), units_high=float("nan"), verified_units=None,
                verified_power=float("nan"), verified_power_mc_se=float("nan"), relative_precision=float("nan"),
                reference_distribution=reference_of(scenario, sizes.point(points[-1].units if points else start), key).name,
                sd_slope=_sd_slope(_trend_points(sizes, key)), reason=st.reason, points=points, flags=tuple(flags),
            )
        )
    return records


def _upper_size(scenario: Scenario, key: tuple[str, str, str], start: int, limit: int, axis: SizeAxis = SizeAxis()) -> int:
    """Largest size at most ``limit`` at which the test exists and its network fits in memory."""
    upper = limit
    if key[0] == "direct" and key[2] == "two_hop" and axis.name == "units":
        upper = min(upper, TWO_HOP_MAX_UNITS)
    if not _memory_ok(scenario, upper, axis):
        lo, hi = start, upper  # n * mean degree grows with n: bisect for the largest size that fits
        while hi - lo > 1:
            mid = (lo + hi) // 2
            lo, hi = (mid, hi) if _memory_ok(scenario, mid, axis) else (lo, mid)
        upper = lo
    return max(upper, start)


def _limit_reason(scenario: Scenario, key: tuple[str, str, str], n: int, limit: int, s: _Summary | None, noun: str = "units") -> str:
    seen = f"simulated power {s.power:.3f} ± {s.power_se:.3f} there" if s is not None else "no estimate there"
    if n >= limit:
        where = "population.max_clusters or --max-clusters" if noun == "clusters" else "population.max_units or --max-units"
        return f"not reachable up to {limit:,} {noun} ({where}): {seen}"
    if key[2] == "two_hop" and n >= TWO_HOP_MAX_UNITS:
        return f"not reached by {n:,} units, the largest size at which the two_hop variance is available ({seen}); two_hop_psd works at any size"
    return (
        f"not reached by {n:,} {noun} ({seen}); larger networks were not simulated: their adjacency would hold more "
        f"than {MAX_ADJACENCY_ENTRIES:,} entries"
    )


def _plateau_reason(scenario: Scenario, key: tuple[str, str, str], trend: Sequence[tuple[int, _Summary]], upper: int, noun: str = "units") -> str:
    """Why the target cannot be reached by ``upper`` units, judged from the last three sizes (empty: keep searching).

    The effect-to-SD ratio is fitted as a power of n; the test is ruled out
    when that ratio does not grow at all, or when its extrapolation to
    ``upper`` predicts power well short of the target.
    """
    if trend and all(abs(s.truth) < 1e-12 for _, s in trend):
        return (
            f"not reachable: the scenario plans no {key[0]} effect (its true value is 0), "
            "so no size gives power beyond the test's size"
        )
    if len(trend) < 3:
        return ""
    ratios = [(m, abs(s.mean_estimate) / s.sd) for m, s in trend if s.sd > 0 and math.isfinite(s.sd)]
    if len(ratios) < 3 or min(r for _, r in ratios) <= 0:
        return ""
    x = np.log([m for m, _ in ratios])
    growth, intercept = np.polyfit(x, np.log([r for _, r in ratios]), 1)
    (n0, _), (n2, s2) = trend[0], trend[-1]
    design = scenario.design
    q = critical_value(design.significance_level, design.alternative)
    at_upper = math.exp(intercept + growth * math.log(upper))
    predicted = float(scipy.stats.norm.cdf(at_upper - q))
    if growth > 0.02 and predicted >= design.target_power - 0.1:
        return ""
    slope = _sd_slope(trend)
    growth_rule = scenario.density.growth_exponent
    if slope > -0.1:
        why = (
            f"the estimator's SD stops shrinking as n grows (log-log slope {slope:+.2f} from {n0:,} to {n2:,} {noun}"
            + (f"; the density rule has growth exponent {growth_rule:g}" if growth_rule > 0 else "")
            + ")"
        )
    elif abs(s2.mean_estimate) < 0.5 * abs(s2.truth):
        why = f"bias dominates: the mean estimate {s2.mean_estimate:.4g} is far from the true effect {s2.truth:.4g} and does not approach it as n grows"
    elif noun == "units per cluster":
        why = (
            f"the estimator's SD falls only slowly with cluster size (log-log slope {slope:+.2f} from {n0:,} to {n2:,} units per cluster): "
            "differences between clusters set a floor that only more clusters lower"
        )
    else:
        why = "the mean estimate shrinks nearly as fast as its SD"
    return (
        f"not reachable within {upper:,} {noun}: {why}; effect/SD grows like n^{growth:.2f}, "
        f"which extrapolates to power {predicted:.2f} at {upper:,} {noun}"
    )


def _trend_points(sizes: _Sizes, key: tuple[str, str, str]) -> list[tuple[int, _Summary]]:
    return [(n, sm) for n in sizes.sizes_of(key) if (sm := sizes.summary(n, key)) is not None]


def _solve_trend(scenario: Scenario, sizes: _Sizes, key: tuple[str, str, str], low: float, high: float) -> float | None:
    """Size in [low, high] where the trend's predicted power equals the target, if it crosses there."""
    target = scenario.design.target_power
    points = _trend_points(sizes, key)
    try:
        if not _predicted_power(sizes, key, low, points) < target <= _predicted_power(sizes, key, high, points):
            return None
        lo, hi = math.log(low), math.log(high)
        for _ in range(50):
            mid = 0.5 * (lo + hi)
            if _predicted_power(sizes, key, math.exp(mid), points) < target:
                lo = mid
            else:
                hi = mid
    except (ValueError, ZeroDivisionError, FloatingPointError):
        return None
    return math.exp(0.5 * (lo + hi))


def _probit_slope(scenario: Scenario, sizes: _Sizes, key: tuple[str, str, str], n: float) -> float:
    """d probit(power) / d log n near the target.

    Near the target, probit(power) is about effect/SD - q with effect/SD =
    q + z_power, so with SD proportional to n^b the slope is -b (q + z_power).
    b is the log-log slope of the SD over every simulated size (many points,
    so steadier than a local derivative), kept within [-1, -0.05].
    """
    design = scenario.design
    b = _sd_slope(_trend_points(sizes, key))
    b = -0.5 if not math.isfinite(b) else min(max(b, -1.0), -0.05)
    return -b * (critical_value(design.significance_level, design.alternative) + probit(design.target_power))


_POOL_WINDOW = 0.15  # |log(n_i / n)| within which simulated sizes are pooled into one estimate


def _pooled(scenario: Scenario, sizes: _Sizes, key: tuple[str, str, str], centre: float, slope: float) -> tuple[float, float, float]:
    """Pooled probit-Newton estimate of log n from every simulated size near ``centre``.

    Each size n_i with power p_i (MC se s_i) gives log n_i + (Phi^-1(target)
    - Phi^-1(p_i)) / slope with variance (s_i / (phi(Phi^-1(p_i)) slope))^2;
    the estimates are combined by inverse variance.  Returns (log n, the
    95% half-width in log n, total information).
    """
    target = scenario.design.target_power
    num = den = 0.0
    for n, sm in _trend_points(sizes, key):
        if abs(math.log(n) - math.log(centre)) > _POOL_WINDOW or sm.replicates == 0:
            continue
        # Never trust a clustered se below the binomial one (few graphs make it noisy).
        se = floored_power_se(sm.power, sm.power_se, sm.replicates)
        z = probit(sm.power)
        dens = float(scipy.stats.norm.pdf(z)) * slope
        weight = (dens / se) ** 2
        num += weight * (math.log(n) + (probit(target) - z) / slope)
        den += weight
    if den == 0:
        return math.log(centre), float("inf"), 0.0
    return num / den, Z95 / math.sqrt(den), den


def _refine(scenario: Scenario, sizes: _Sizes, st: _KeyState, precision: float, cap: int, limit: int) -> SizeRecord:
    G = scenario.simulation.graphs
    key = st.key
    low = st.below
    high = st.above if st.above is not None else min(2 * low, limit)
    guess = _solve_trend(scenario, sizes, key, low, high)
    if guess is None:
        # The trend does not cross the target between the two sizes: interpolate their powers on the probit scale.
        a, b = sizes.summary(low, key), sizes.summary(high, key)
        za, zb = probit(a.power), probit(b.power) if b is not None else probit(a.power) + 1.0
        w = (probit(scenario.design.target_power) - za) / (zb - za) if zb != za else 0.5
        guess = math.exp(math.log(low) + min(max(w, 0.0), 1.0) * (math.log(high) - math.log(low)))
    n_v = min(max(_round_units(guess), low + 1), limit)
    log_hat, h = math.log(n_v), float("inf")
    settled = False
    for step_index in range(_MAX_REFINE_STEPS):
        last = step_index == _MAX_REFINE_STEPS - 1
        sizes.ensure(n_v, max(G, sizes.graphs(n_v, key)), [key])
        slope = _probit_slope(scenario, sizes, key, n_v)
        log_hat, h, _ = _pooled(scenario, sizes, key, n_v, slope)
        moving = abs(log_hat - math.log(n_v)) > max(h, precision / 2)
        if moving and not last:
            # Move, at most by a factor of 2, above the size known to fall short, within the test's largest size.
            step = min(max(log_hat - math.log(n_v), -math.log(2)), math.log(2))
            nxt = min(max(_round_units(n_v * math.exp(step)), low + 1), limit)
            if nxt != n_v:
                n_v = nxt
                continue
        settled = not moving
        if h > precision and sizes.graphs(n_v, key) < cap and not last:
            # Information grows with replicates: add what the precision needs, plus 10%.
            now = sizes.graphs(n_v, key)
            # No usable information yet (h infinite, e.g. power 0 or 1 everywhere near): double.
            needed = math.ceil(now * ((h / precision) ** 2 - 1) * 1.1) + 1 if math.isfinite(h) else now
            sizes.ensure(n_v, min(cap, 4 * now, now + max(needed, 1)), [key])
            continue
        break
    s = sizes.summary(n_v, key)
    n_hat = math.exp(log_hat)
    flags = []
    if not settled:
        flags.append(f"the refinement did not settle within {_MAX_REFINE_STEPS} steps: the estimate lies away from the last simulated size")
    if h > precision:
        why = f"max_graphs = {cap}" if sizes.graphs(n_v, key) >= cap else f"the {_MAX_REFINE_STEPS} refinement steps allowed"
        flags.append(f"precision ±{h:.1%} short of the requested ±{precision:.1%} ({why})")
    if s.failed:
        flags.append(f"{s.failed} of {s.failed + s.replicates} replicates at {n_v:,} {sizes.axis.noun} had no estimate (an empty arm, or the estimator undefined on the graph); power counts the others")
    if n_hat > limit:
        flags.append(f"the estimate lies beyond the search limit of {limit:,} {sizes.axis.noun}")
    points = sizes.points(key)
    reference = reference_of(scenario, sizes.point(n_v), key)
    # The test's size at the verified n: an over-rejecting test reaches its power "too early".
    size, size_se = sizes.null_size(n_v, key, G)
    alpha = scenario.design.significance_level
    if math.isfinite(size) and (size - 2 * size_se > 1.4 * alpha or size + 2 * size_se < 0.6 * alpha):
        flags.append(
            f"the test's size at {n_v:,} {sizes.axis.noun} is {size:.3f} (MC se {size_se:.3f}), outside "
            f"[{0.6 * alpha:.3f}, {1.4 * alpha:.3f}]: its power, and so this n, are not trustworthy"
        )
    return SizeRecord(
        estimand=key[0], estimator=key[1], variance_estimator=key[2], treatment_probability=sizes.pi,
        status="reached", required_units=math.ceil(n_hat), units_low=n_hat * math.exp(-h), units_high=n_hat * math.exp(h),
        verified_units=n_v, verified_power=s.power, verified_power_mc_se=s.power_se, relative_precision=h,
        reference_distribution=reference.name,
        sd_slope=_sd_slope(_trend_points(sizes, key)),
        reason="", points=points, flags=tuple(flags), size=size, size_mc_se=size_se,
    )

"""Power tables: run the engine over the design grid and summarise with Monte Carlo error.

Per design point, estimand and estimator the summary gives the mean true
estimand (and its spread across graphs), mean estimate, bias, SD, RMSE,
feasible power (the planned Wald test), oracle power (the Monte Carlo SD of
the estimator under the null in place of the estimated SE), the feasible
test's size under the null, and the coverage of its confidence interval for
the per-graph estimand (METHODS.md §4.6).  Replicates on one graph are not
independent, so every Monte Carlo standard error is clustered by graph.
"""

from __future__ import annotations

import datetime as _dt
import platform
from dataclasses import asdict, dataclass, replace
from typing import TYPE_CHECKING, Callable, Sequence

import numpy as np
import scipy as sp
import scipy.stats

from designcalc._version import __version__
from designcalc.engine import (
    reference_of,
    STREAM_LAYOUT_VERSION,
    DesignPoint,
    EngineProgress,
    GraphDraws,
    design_points,
    dropped_keys,
)
from designcalc.errors import DesignCalcError
from designcalc.inference import Z95, critical_value, floored_power_se
from designcalc.saturation import check_clusters
from designcalc.scenario import Scenario

if TYPE_CHECKING:
    from designcalc.execution import Cluster
    from designcalc.store import ResultStore

__all__ = [
    "PowerRecord",
    "PowerResult",
    "simulate_power",
    "summarise_design_point",
    "clustered_mean_se",
    "clustered_sd",
    "critical_value",
    "reject",
    "stack_run",
    "ResultTable",
    "FlaggedRecord",
]

CAUTIONS = (
    "Simulated power rests on the assumed network, outcome and measurement models; "
    "if they are wrong, so are these numbers.",
    "Ethics review, informed consent and local rules govern the study; this tool does not replace them.",
    "Have a qualified statistician review the design before fieldwork.",
)


def reject(statistic: np.ndarray, z: float, alternative: str) -> np.ndarray:
    if alternative == "two-sided":
        return np.abs(statistic) > z
    if alternative == "greater":
        return statistic > z
    return statistic < -z


def clustered_mean_se(values: np.ndarray) -> tuple[float, float]:
    """Mean of a (graphs, assignments) array and its standard error clustered by graph.

    Var(mean) = sum_g (sum_b (x_gb - mean))^2 / R^2 over the R finite entries
    (the cluster-robust variance of a mean; Morris, White & Crowther 2019,
    Stat. Med. 38:2074-2102, for Monte Carlo SEs in general).  With a single
    graph the SE is NaN: between-graph variation cannot be estimated.
    """
    ok = np.isfinite(values)
    count = int(ok.sum())
    if count == 0:
        return float("nan"), float("nan")
    mean = float(values[ok].sum() / count)
    centred = np.where(ok, values - mean, 0.0)
    groups = centred.sum(axis=1)
    if values.shape[0] < 2:
        return mean, float("nan")
    g = values.shape[0]
    # Small-sample factor g / (g - 1), as in the usual cluster-robust variance.
    variance = (groups @ groups) / count**2 * g / (g - 1)
    return mean, float(np.sqrt(variance))


def clustered_sd(values: np.ndarray) -> tuple[float, float]:
    """SD of a (graphs, assignments) array about its overall mean, with a graph-clustered MC error.

    The variance is the mean of squared deviations (times R / (R - 1)); its
    MC error is the clustered SE of that mean (``clustered_mean_se``), and
    the SD's error follows by the delta method, se(SD) = se(Var) / (2 SD).
    """
    ok = np.isfinite(values)
    count = int(ok.sum())
    if count < 2:
        return float("nan"), float("nan")
    mean = values[ok].mean()
    squares = np.where(ok, (values - mean) ** 2, np.nan) * count / (count - 1)
    variance, variance_se = clustered_mean_se(squares)
    sd = float(np.sqrt(variance))
    return sd, float(variance_se / (2 * sd)) if sd > 0 else float("nan")


def stack_run(draws: Sequence[GraphDraws], label: str, key: tuple[str, str, str]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Estimates and SEs as (graphs, assignments) arrays and the per-graph true estimand, for one run and key."""
    est = np.stack([d.runs[label].estimates[key] for d in draws])
    se = np.stack([d.runs[label].standard_errors[key] for d in draws])
    truth = np.array([d.runs[label].estimands.truth(key) for d in draws])
    return est, se, truth


class ResultTable:
    """What every result of the tool shares: its JSON form and record selection.

    Subclasses are frozen dataclasses with ``scenario_name``, ``records``,
    ``provenance``, ``warnings``, ``partial`` and ``cautions``.
    """

    def to_dict(self) -> dict[str, object]:
        return {
            "scenario": self.scenario_name,  # type: ignore[attr-defined]
            "partial": self.partial,  # type: ignore[attr-defined]
            "provenance": self.provenance,  # type: ignore[attr-defined]
            "warnings": list(self.warnings),  # type: ignore[attr-defined]
            "cautions": list(self.cautions),  # type: ignore[attr-defined]
            "results": [r.to_dict() for r in self.records],  # type: ignore[attr-defined]
        }

    def select(self, **criteria: object) -> list:
        """Records whose fields equal the given values, e.g. ``select(estimand="direct")``."""
        return [r for r in self.records if all(getattr(r, k) == v for k, v in criteria.items())]  # type: ignore[attr-defined]


class FlaggedRecord:
    """A frozen-dataclass record whose JSON form turns its ``flags`` tuple into a list."""

    def to_dict(self) -> dict[str, object]:
        d = asdict(self)  # type: ignore[call-overload]
        d["flags"] = list(self.flags)  # type: ignore[attr-defined]
        return d


@dataclass(frozen=True)
class PowerRecord(FlaggedRecord):
    """One design point x estimand x estimator, every Monte Carlo number with its error."""

    estimand: str
    estimator: str
    variance_estimator: str
    units: int
    treatment_probability: float
    true_effect: float
    true_effect_spread: float
    mean_estimate: float
    mean_estimate_mc_se: float
    bias: float
    bias_mc_se: float
    sd: float
    rmse: float
    mean_standard_error: float
    power: float
    power_mc_se: float
    oracle_power: float
    oracle_power_mc_se: float
    size: float
    size_mc_se: float
    coverage: float
    coverage_mc_se: float
    null_sd: float
    replicates: int
    graphs: int
    failed_replicates: int
    flags: tuple[str, ...] = ()
    reference_distribution: str = "normal"
    clusters: int = 0  # a clustered population's number of clusters (``units`` is then their nominal total)


@dataclass(frozen=True)
class PowerResult(ResultTable):
    """All records of a power run, its provenance, warnings and whether it was cut short."""

    scenario_name: str
    records: tuple[PowerRecord, ...]
    provenance: dict[str, object]
    warnings: tuple[str, ...] = ()
    partial: bool = False
    cautions: tuple[str, ...] = CAUTIONS


def summarise_design_point(scenario: Scenario, point: DesignPoint, draws: Sequence[GraphDraws]) -> list[PowerRecord]:
    """Summarise the graphs of one design point into records (see module docstring)."""
    alpha = scenario.design.significance_level
    alternative = scenario.design.alternative
    target = scenario.design.target_power
    records = []
    for key in draws[0].estimates:
        estimand, estimator, variance = key
        reference = reference_of(scenario, point, key)
        z = critical_value(alpha, alternative, reference.df)
        z_ci = critical_value(alpha, "two-sided", reference.df)
        est = np.stack([d.estimates[key] for d in draws])
        se = np.stack([d.standard_errors[key] for d in draws])
        nest = np.stack([d.null_estimates[key] for d in draws])
        nse = np.stack([d.null_standard_errors[key] for d in draws])
        truth = np.array([d.estimands.truth(key) for d in draws])[:, None]
        valid = np.isfinite(est) & np.isfinite(se)
        nvalid = np.isfinite(nest) & np.isfinite(nse)

        def rate(mask: np.ndarray, ok: np.ndarray) -> tuple[float, float]:
            return clustered_mean_se(np.where(ok, mask.astype(float), np.nan))

        mean_est, mean_est_se = clustered_mean_se(np.where(valid, est, np.nan))
        error = np.where(valid, est - truth, np.nan)
        bias, bias_se = clustered_mean_se(error)
        sd = float(np.nanstd(np.where(valid, est, np.nan), ddof=1)) if valid.sum() > 1 else float("nan")
        rmse = float(np.sqrt(np.nanmean(error**2))) if valid.any() else float("nan")
        with np.errstate(divide="ignore", invalid="ignore"):
            power, power_se = rate(reject(est / se, z, alternative), valid)
            size, size_se = rate(reject(nest / nse, z, alternative), nvalid)
            covered = np.abs(est - truth) <= z_ci * se
        coverage, coverage_se = rate(covered, valid)
        null_values = np.where(nvalid, nest, np.nan)
        null_sd = float(np.nanstd(null_values, ddof=1)) if nvalid.sum() > 1 else float("nan")
        with np.errstate(divide="ignore", invalid="ignore"):
            # Oracle test: the estimator's own null SD replaces the estimated SE.
            oracle, oracle_se = rate(reject(est / null_sd, z, alternative), valid)
        flags = []
        low, high = 0.6 * alpha, 1.4 * alpha  # [0.03, 0.07] at alpha = 0.05
        if np.isfinite(size) and not low <= size <= high:
            flags.append(f"size {size:.3f} (MC se {size_se:.3f}) outside [{low:.3f}, {high:.3f}]")
        if np.isfinite(power_se) and abs(power - target) < 2 * power_se:
            flags.append("Monte Carlo error too large to tell power from the target")
        if valid.sum() < est.size:
            flags.append(f"{est.size - int(valid.sum())} replicates had no estimate (an empty arm, or the estimator undefined on the graph)")
        truth_values = truth.ravel()
        records.append(
            PowerRecord(
                estimand=estimand,
                estimator=estimator,
                variance_estimator=variance,
                units=point.units,
                treatment_probability=point.treatment_probability,
                true_effect=float(truth_values.mean()),
                true_effect_spread=float(truth_values.std(ddof=1)) if truth_values.size > 1 else 0.0,
                mean_estimate=mean_est,
                mean_estimate_mc_se=mean_est_se,
                bias=bias,
                bias_mc_se=bias_se,
                sd=sd,
                rmse=rmse,
                mean_standard_error=float(np.nanmean(np.where(valid, se, np.nan))) if valid.any() else float("nan"),
                power=power,
                power_mc_se=power_se,
                oracle_power=oracle,
                oracle_power_mc_se=oracle_se,
                size=size,
                size_mc_se=size_se,
                coverage=coverage,
                coverage_mc_se=coverage_se,
                null_sd=null_sd,
                replicates=int(valid.sum()),
                graphs=len(draws),
                failed_replicates=int(est.size - valid.sum()),
                flags=tuple(flags),
                reference_distribution=reference.name,
                clusters=point.clusters,
            )
        )
    return records


def provenance(scenario: Scenario, **settings: object) -> dict[str, object]:
    """What a reviewer needs to reproduce the numbers; ``settings`` adds a solver's own (precision, caps)."""
    import networkx

    return {
        "tool": "designcalc",
        "tool_version": __version__,
        "scenario_file": scenario.source,
        "scenario_sha256": scenario.sha256,
        "seed_entropy": scenario.simulation.seed,
        **({"surveyed_network_sha256": scenario.network.sha256, "surveyed_network_files": list(scenario.network.files)}
           if scenario.network.kind == "surveyed" else {}),
        "random_stream_layout_version": STREAM_LAYOUT_VERSION,
        "graphs_per_design_point": scenario.simulation.graphs,
        "assignments_per_graph": scenario.simulation.assignments_per_graph,
        "replicates_per_design_point": scenario.simulation.replicates,
        "python": platform.python_version(),
        "numpy": np.__version__,
        "scipy": sp.__version__,
        "networkx": networkx.__version__,
        "utc_time": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        **settings,
    }


def _override(
    scenario: Scenario, units: Sequence[int] | None, probabilities: Sequence[float] | None, graphs: int | None,
    assignments_per_graph: int | None, seed: int | None, clusters: Sequence[int] | None = None,
) -> Scenario:
    population = scenario.population
    if units and population.clustered:
        raise DesignCalcError(f"--units: {scenario.source} plans a clustered population; give its number of clusters with --clusters")
    if clusters and not population.clustered:
        raise DesignCalcError(f"--clusters: {scenario.source} plans one network, not clusters; give its size with --units")
    if clusters and population.cluster_sizes.kind == "list":
        raise DesignCalcError(f"--clusters: {scenario.source} states every cluster's size (population.cluster_sizes), which fixes their number")
    if probabilities and scenario.design.saturation is not None:
        raise DesignCalcError(
            f"--treatment-probability: {scenario.source} assigns by clusters (design.assignment); its arms set who is treated. "
            "To weigh other arms, write them as another scenario and put both side by side with `designcalc compare`"
        )
    if clusters:
        counts = tuple(sorted(set(clusters)))
        for c in counts:
            if scenario.design.saturation is not None:
                check_clusters(scenario.design.saturation, c)
        scenario = replace(scenario, population=replace(population, clusters=counts, units=tuple(population.nominal_units(c) for c in counts)))
    if units and scenario.network.kind == "surveyed" and tuple(sorted(set(units))) != scenario.population.units:
        raise DesignCalcError(
            f"--units {', '.join(str(u) for u in units)}: {scenario.source} plans on a surveyed network of "
            f"{scenario.population.units[0]} units, held fixed; leave --units out (or fit an edge model with `designcalc fit` to plan other sizes)"
        )
    pop = replace(scenario.population, units=tuple(sorted(units))) if units else scenario.population
    design = replace(scenario.design, treatment_probabilities=tuple(sorted(probabilities))) if probabilities else scenario.design
    sim = scenario.simulation
    if graphs is not None:
        sim = replace(sim, graphs=graphs)
    if assignments_per_graph is not None:
        sim = replace(sim, assignments_per_graph=assignments_per_graph)
    if seed is not None:
        sim = replace(sim, seed=seed)
    return replace(scenario, population=pop, design=design, simulation=sim)


def simulate_power(
    scenario: Scenario,
    *,
    units: Sequence[int] | None = None,
    treatment_probabilities: Sequence[float] | None = None,
    graphs: int | None = None,
    assignments_per_graph: int | None = None,
    seed: int | None = None,
    batch_size: int = 16,
    progress: Callable[[EngineProgress], None] | None = None,
    adaptive: bool = False,
    max_graphs: int | None = None,
    relative_precision: float | None = None,
    on_point: Callable[[DesignPoint, Sequence[GraphDraws]], None] | None = None,
    workers: int = 1,
    cluster: "Cluster | None" = None,
    store: "ResultStore | None" = None,
    clusters: Sequence[int] | None = None,
) -> PowerResult:
    """Simulate the power of every planned estimator at every design point.

    Parameters
    ----------
    scenario
        A validated scenario (``load_scenario``).
    units, treatment_probabilities, graphs, assignments_per_graph, seed
        Optional overrides of the scenario's values (validate them first;
        the command line does).
    clusters
        Numbers of clusters, overriding ``population.clusters`` of a
        clustered population (``units`` is refused for one).
    batch_size
        Assignment columns processed at once; a speed knob that never changes
        the numbers.
    progress
        Called after every finished graph with an ``EngineProgress``.
    adaptive, max_graphs, relative_precision
        With ``adaptive=True`` a design point gets more graphs (doubling, up
        to ``max_graphs``, default ``simulation.max_graphs``) until every
        test's power is settled: at least ``SETTLED_Z`` Monte Carlo SEs
        from the target, or known to +/- ``relative_precision`` (default
        ``simulation.relative_precision``, read as power units: 0.03 is
        three percentage points).  Each record says how many graphs it used.
    on_point
        Called with each finished design point and its graphs' draws (the
        raw estimates behind the records), for callers that need more than
        the summaries: the report's sampling distributions and Holm power.
    workers
        Local worker processes (1: this process).  A speed knob only: the
        numbers are identical for any number (``designcalc.execution``).
    cluster
        A dask scheduler address (or ``"local"``, or an open
        ``execution.ClusterConnection``) to run the graphs on instead of local
        processes; same numbers (``designcalc.execution``).
    store
        A ``designcalc.store.ResultStore``: graphs already stored for this
        scenario's numbers are read instead of simulated, and each simulated
        graph is stored as it finishes, so a rerun after Ctrl-C or a crash
        computes only what is missing.  Same numbers with or without it.

    Returns
    -------
    PowerResult
        Interrupted with Ctrl-C, it holds every design point whose graphs all
        finished and ``partial=True``.

    Examples
    --------
    >>> from pathlib import Path
    >>> from designcalc import load_scenario, simulate_power
    >>> s = load_scenario(Path(__file__).parents[1] / "scenarios" / "lake_orrin_savings.toml")
    >>> result = simulate_power(s, units=[300], treatment_probabilities=[0.5], graphs=2, assignments_per_graph=4)
    >>> result.select(estimand="direct", estimator="hajek", variance_estimator="neyman")[0].replicates
    8
    """
    import time
    from contextlib import closing

    from designcalc.execution import check_workers, simulate_graphs

    workers = check_workers(workers)
    scenario = _override(scenario, units, treatment_probabilities, graphs, assignments_per_graph, seed, clusters)
    points = design_points(scenario)
    total = len(points) * scenario.simulation.graphs
    started = time.perf_counter()
    finished = 0
    records: list[PowerRecord] = []
    warnings: list[str] = []
    partial = False
    cap = max(max_graphs or scenario.simulation.max_graphs, scenario.simulation.graphs)
    precision = scenario.simulation.relative_precision if relative_precision is None else relative_precision
    G = scenario.simulation.graphs

    def accept(point: DesignPoint, draws: list[GraphDraws], summary: list[PowerRecord]) -> None:
        records.extend(summary)
        warnings.extend(_point_warnings(scenario, point, draws))
        if on_point is not None:
            on_point(point, draws)

    def tick() -> None:
        nonlocal finished
        finished += 1
        if progress is not None:
            progress(EngineProgress(finished, total, time.perf_counter() - started))

    try:
        if not adaptive:
            # Every (point, graph) task at once, so the workers stay busy across design points.
            tasks = [(point, g) for point in points for g in range(G)]
            with closing(simulate_graphs(scenario, tasks, workers=workers, batch_size=batch_size, cluster=cluster, store=store)) as stream:
                for point in points:
                    draws: list[GraphDraws] = []
                    for g in range(G):
                        draws.append(next(stream))
                        if g == G - 1:
                            # Summarise before reporting progress, so that Ctrl-C in the
                            # callback after a point's last graph keeps that point.
                            accept(point, draws, summarise_design_point(scenario, point, draws))
                        tick()
        else:
            for point in points:
                draws = []
                goal = G
                while True:
                    summary = None
                    batch = [(point, g) for g in range(len(draws), goal)]
                    with closing(simulate_graphs(scenario, batch, workers=workers, batch_size=batch_size, cluster=cluster, store=store)) as stream:
                        for d in stream:
                            draws.append(d)
                            if len(draws) == goal:
                                summary = summarise_design_point(scenario, point, draws)
                                if goal >= cap or _settled(summary, scenario.design.target_power, precision):
                                    accept(point, draws, summary)
                            tick()
                    if goal >= cap or (summary is not None and _settled(summary, scenario.design.target_power, precision)):
                        break
                    goal = min(cap, 2 * goal)
                    total += goal - len(draws)
    except KeyboardInterrupt:
        partial = True
    warnings.extend(_scenario_warnings(scenario))
    extra = {"adaptive": True, "relative_precision": precision, "max_graphs": cap} if adaptive else {}
    return PowerResult(scenario.name, tuple(records), provenance(scenario, **extra), tuple(warnings), partial)


SETTLED_Z = 3.0


def _settled(records: Sequence[PowerRecord], target: float, precision: float) -> bool:
    """Every test's power clearly above or below the target, or known precisely enough."""
    for r in records:
        if not np.isfinite(r.power_mc_se):
            continue
        # A clustered se of 0 (every replicate agreeing, few graphs) is no evidence.
        se = floored_power_se(r.power, r.power_mc_se, r.replicates)
        if abs(r.power - target) < SETTLED_Z * se and Z95 * se > precision:
            return False
    return True


def _scenario_warnings(scenario: Scenario) -> list[str]:
    from designcalc.measure import measurement_warnings

    out = measurement_warnings(scenario)
    skipped = sorted({n for n in scenario.population.units if dropped_keys(scenario, n)})
    if skipped:
        out.append(
            "two_hop: the eigen-clipped two-hop variance needs a dense n x n eigendecomposition and is left out at "
            + ", ".join(f"n = {n}" for n in skipped)
            + "; two_hop_psd works at any size"
        )
    outcome = scenario.outcome
    regressions = [s for s in scenario.estimators.spillover if s.startswith("exposure_regression")]
    if regressions:
        out.append(
            f"{' and '.join(regressions)}: OLS of y on own treatment and treated-neighbour share targets the spillover only "
            "when it is linear with no interaction"
            + ("" if outcome.spillover_shape == "linear" and outcome.interaction == 0 else " (not so here: expect bias)")
            + "; its HC1 standard error ignores that neighbours share treated friends, so check its size"
        )
    return out


def _point_warnings(scenario: Scenario, point: DesignPoint, draws: Sequence[GraphDraws]) -> list[str]:
    out = []
    where = f"n = {point.units}, pi = {point.treatment_probability:g}"
    if {"pc_balancing_corrected", "pc_balancing_corrected_adjusted"} & set(scenario.estimators.spillover):
        low = min(d.min_shrinkage for d in draws)
        if low < 0.5:
            out.append(f"{where}: the corrected PC-balancing estimator divides by r_j as small as {low:.2f} (< 0.5); its variance may be large")
    mean_degree = float(np.mean([d.mean_degree for d in draws]))
    if mean_degree**2 / point.units > 1:
        out.append(f"{where}: mean degree^2 / n = {mean_degree**2 / point.units:.2f} > 1; uncentred HT spillover estimates are unreliable here (METHODS.md §3.2)")
    reasons = {name: why for d in draws for name, why in d.failures.items()}
    for name, why in sorted(reasons.items()):
        graphs_failed = sum(name in d.failures for d in draws)
        out.append(f"{where}: {name} is undefined on {graphs_failed} of {len(draws)} graphs ({why})")
    isolated = float(np.mean([d.share_isolated for d in draws]))
    if isolated > 0.05:
        out.append(f"{where}: {isolated:.1%} of units are isolated; they carry no spillover information")
    return out

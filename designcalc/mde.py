"""Minimum detectable effects, computed from the null SD and verified by simulation.

For every design point and planned test (METHODS.md §4.6):

1. **Null pass.**  Simulate the null of each estimand (the tested effect set
   to zero, everything else as in the scenario).  The Monte Carlo SD of the
   estimator there is its standard error; the formula MDE is
   ``(q_{1-alpha/2} + q_power) x SE`` with normal or t quantiles
   (``designcalc.inference``).  The same pass gives the test's size.
2. **Verification.**  Simulate the scenario's outcome model with the effect
   behind the estimand rescaled (``OutcomeModel.scaled_for``) so that the
   mean true estimand equals the formula MDE, on the same graphs,
   assignments and noise, and record the feasible test's power.
3. **Search, when needed.**  If that power differs from the target by more
   than ``AGREEMENT_Z`` Monte Carlo SEs (bias, a feasible SE that is off, a
   non-normal estimator), step the effect by Newton's method on the probit
   scale, where power is close to linear in the effect with slope 1/SD,
   and simulate again, until the power agrees with the target.
4. **Estimate and precision.**  The reported MDE is one probit-Newton step
   from the last simulated effect, ``m + (Phi^-1(target) - Phi^-1(p)) SD``,
   with a 95% Monte Carlo interval from the power's clustered MC error;
   more graphs are simulated until its half-width is within the scenario's
   ``simulation.relative_precision`` or ``simulation.max_graphs`` is reached.

The MDE is a magnitude in the direction of the scenario's effect (or the
direction a one-sided test looks in); in standard-deviation units it is
divided by the SD of the outcome when nobody is treated.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field, replace
from contextlib import closing
from typing import TYPE_CHECKING, Callable, Sequence

import numpy as np
import scipy.optimize
import scipy.stats

from designcalc.engine import (
    contrast_truths,
    effect_coefficients,
    null_model,
    reference_of,
    ESTIMANDS,
    DesignPoint,
    EngineProgress,
    GraphCache,
    GraphDraws,
    Run,
    design_points,
    null_label,
    planned_keys,
)
from designcalc.errors import ModelError
from designcalc.estimands import exact_estimands
from designcalc.inference import Z95, critical_value, floored_power_se, mde_multiplier, probit
from designcalc.outcomes import OutcomeModel
from designcalc.power import CAUTIONS, FlaggedRecord, ResultTable, clustered_mean_se, clustered_sd, provenance, reject, stack_run
from designcalc.execution import Cluster, check_workers, simulate_graphs
from designcalc.scenario import Scenario

if TYPE_CHECKING:
    from designcalc.store import ResultStore

__all__ = ["MdeRecord", "MdeResult", "minimum_detectable_effects", "effect_direction_model", "AGREEMENT_Z"]

AGREEMENT_Z = 3.0  # |power - target| within this many MC SEs counts as agreement (CHECKS.md §3)
_MAX_SEARCH_STEPS = 6


@dataclass(frozen=True)
class MdeRecord(FlaggedRecord):
    """The minimum detectable effect of one planned test at one design point."""

    estimand: str
    estimator: str
    variance_estimator: str
    units: int
    treatment_probability: float
    reference_distribution: str
    multiplier: float
    standard_error: float
    standard_error_mc_se: float
    mean_estimated_se: float
    size: float
    size_mc_se: float
    formula_mde: float
    formula_power: float
    formula_power_mc_se: float
    mde: float
    mde_low: float
    mde_high: float
    mde_sd_units: float
    control_sd: float
    verified_effect: float
    verified_power: float
    verified_power_mc_se: float
    method: str
    relative_precision: float
    graphs: int
    replicates: int
    direction: int
    flags: tuple[str, ...] = ()
    clusters: int = 0  # a clustered population's number of clusters (``units`` is then their nominal total)


@dataclass(frozen=True)
class MdeResult(ResultTable):
    """Every MDE record of a run, with provenance, warnings and whether it was cut short."""

    scenario_name: str
    records: tuple[MdeRecord, ...]
    provenance: dict[str, object]
    warnings: tuple[str, ...] = ()
    partial: bool = False
    cautions: tuple[str, ...] = CAUTIONS



def effect_direction_model(model: OutcomeModel, estimand: str) -> OutcomeModel:
    """The scenario's model, or, when it has no effect behind ``estimand``, one with a unit effect.

    A scenario may plan an estimand whose coefficients are zero (no spillover
    assumed); its MDE is then found along a unit coefficient: direct effect
    1, spillover effect 1, or both for the total.
    """
    zero_direct = model.direct_effect == 0 and model.interaction == 0
    zero_spill = model.spillover_effect == 0 and model.interaction == 0
    if estimand == "direct" and zero_direct:
        return replace(model, direct_effect=1.0)
    if estimand == "spillover" and zero_spill:
        return replace(model, spillover_effect=1.0)
    if estimand == "total" and zero_direct and zero_spill:
        return replace(model, direct_effect=1.0, spillover_effect=1.0)
    return model


@dataclass
class _Track:
    """Search state of one planned test at one design point."""

    key: tuple[str, str, str]
    base: OutcomeModel
    direction: int
    base_effect: float  # mean true estimand of ``base`` along the direction (continuous: linear in the scale)
    multiplier: float
    critical: float
    formula: float
    factor: float = float("nan")  # scale applied to ``base``
    effect: float = float("nan")  # mean true estimand magnitude at ``factor``
    power: float = float("nan")
    power_se: float = float("nan")
    sd: float = float("nan")
    mean_se: float = float("nan")
    mean_estimate: float = float("nan")
    null_sd: float = float("nan")
    null_mean_se: float = float("nan")
    formula_power: float = float("nan")
    formula_power_se: float = float("nan")
    searched: bool = False
    steps: int = 0
    done: bool = False
    unreachable: str = ""
    at_bound: bool = False
    replicates: int = 0
    failed: int = 0
    graphs: int = 0
    history: list[tuple[float, float, float, float]] = field(default_factory=list)  # (effect, power, power_se, sd)
    flags: tuple[str, ...] = ()

    @property
    def label(self) -> str:
        return "mde:" + "/".join(self.key)


def _mean_effect(draws: Sequence[GraphDraws], model: OutcomeModel, key: tuple[str, str, str], pi: float, scenario: Scenario) -> float:
    """Mean over graphs of the exact truth of test ``key`` under ``model`` (graphs kept with keep_units=True)."""
    if scenario.design.saturation is not None:
        values = [contrast_truths(scenario, model, d.degrees, d.theta, d.cluster_sizes)[key[1]] for d in draws]
    else:
        values = [exact_estimands(d.degrees, d.theta, model, pi).value(key[0]) for d in draws]
    return float(np.mean(values))


def _factor_for(track: _Track, target: float, draws: Sequence[GraphDraws], pi: float, scenario: Scenario) -> tuple[float, float]:
    """Scale factor whose mean true estimand is ``target`` (magnitude along the direction), and that estimand.

    Continuous outcomes: every estimand is linear in the effect
    coefficients, so the factor is a ratio.  Binary outcomes (clipped or
    logistic) are not; the factor is found by root finding on the exact
    estimands of the simulated graphs.  Probabilities bound a binary
    effect: beyond the bound the factor of (almost) the largest effect is
    returned and ``track.at_bound`` set, so the search can tell whether even
    that effect has the target power.
    """
    track.at_bound = False
    if track.base.kind == "continuous":
        return target / track.base_effect, target
    estimand = track.key[0]

    def effect(c: float) -> float:
        return track.direction * _mean_effect(draws, track.base.scaled_for(effect_coefficients(scenario, estimand), c), track.key, pi, scenario)

    high = target / track.base_effect
    for _ in range(40):
        if effect(high) >= target:
            break
        high *= 2
    else:
        largest = effect(high)
        if not largest > 0:
            raise ModelError("this binary outcome model allows no effect in the tested direction")
        track.at_bound = True
        target = 0.999 * largest
    c = scipy.optimize.brentq(lambda c: effect(c) - target, 0.0, high, xtol=1e-12 * abs(high), rtol=1e-10)
    return c, effect(c)


def _rates(draws: Sequence[GraphDraws], label: str, key: tuple[str, str, str], critical: float, alternative: str) -> tuple[float, float, float, float, float, int, int]:
    """Feasible power (and MC se), SD, mean estimated SE, mean estimate, replicates and failed replicates of one key."""
    est, se, _ = stack_run(draws, label, key)
    ok = np.isfinite(est) & np.isfinite(se)
    with np.errstate(divide="ignore", invalid="ignore"):
        rejected = np.where(ok, reject(est / se, critical, alternative).astype(float), np.nan)
    power, power_se = clustered_mean_se(rejected)
    sd, _ = clustered_sd(np.where(ok, est, np.nan))
    mean_se = float(np.nanmean(np.where(ok, se, np.nan))) if ok.any() else float("nan")
    mean_est = float(np.nanmean(np.where(ok, est, np.nan))) if ok.any() else float("nan")
    return power, power_se, sd, mean_se, mean_est, int(ok.sum()), int(est.size - ok.sum())


def _stable_se(t: _Track) -> float:
    """The track's power MC se, floored at the binomial se (``floored_power_se``)."""
    return floored_power_se(t.power, t.power_se, t.replicates)


def _power_model(t: _Track, alternative: str) -> Callable[[float], float] | None:
    """Predicted power as a function of the effect (see ``_model_step``), or None without the inputs."""
    m = t.effect
    mu = t.direction * t.mean_estimate
    if not (m > 0 and mu > 0 and t.sd > 0 and t.null_sd > 0 and t.mean_se > 0 and t.null_mean_se > 0):
        return None

    def predicted(e: float) -> float:
        r2 = (e / m) ** 2
        sd = math.sqrt(max(t.null_sd**2 + (t.sd**2 - t.null_sd**2) * r2, 1e-300))
        se = math.sqrt(max(t.null_mean_se**2 + (t.mean_se**2 - t.null_mean_se**2) * r2, 1e-300))
        signal = e * mu / m
        p = float(scipy.stats.norm.cdf((signal - t.critical * se) / sd))
        if alternative == "two-sided":
            p += float(scipy.stats.norm.cdf((-signal - t.critical * se) / sd))
        return p

    return predicted


def _probit_slope(t: _Track, alternative: str) -> float:
    """d probit(power) / d effect at the last simulated effect: from the power model, else 1/SD."""
    predicted = _power_model(t, alternative)
    if predicted is not None:
        h = 0.01 * t.effect
        slope = (probit(predicted(t.effect + h)) - probit(predicted(t.effect - h))) / (2 * h)
        if math.isfinite(slope) and slope > 0:
            return slope
    return 1.0 / t.sd if t.sd > 0 else float("nan")


def _model_step(t: _Track, target: float, alternative: str) -> float:
    """The effect where a two-point model of the sampling distribution predicts the target power.

    Between the null (effect 0: SD0, mean SE S0) and the last simulated effect
    m (SD, mean SE S, mean estimate mu), variances are taken quadratic in the
    effect, Var(e) = SD0^2 + (SD^2 - SD0^2)(e/m)^2 (the effect enters the
    outcome linearly, so its share of the variance grows with its square),
    the mean estimate proportional to e, and power normal:
    Phi((e mu/m - q S(e)) / SD(e)).  Newton steps that use only SD at m
    undershoot when the SD grows with the effect; this model does not.
    """
    m = t.effect
    predicted = _power_model(t, alternative)
    if predicted is None:
        return m + (probit(target) - probit(t.power)) * t.sd
    low, high = 0.25 * m, 4.0 * m
    if predicted(high) < target:
        return 2.0 * m  # the model sees no crossing: take a bounded step and let the plateau check decide
    if predicted(low) >= target:
        return 0.5 * m
    for _ in range(60):
        mid = 0.5 * (low + high)
        if predicted(mid) < target:
            low = mid
        else:
            high = mid
    return 0.5 * (low + high)


def minimum_detectable_effects(
    scenario: Scenario,
    *,
    units: Sequence[int] | None = None,
    treatment_probabilities: Sequence[float] | None = None,
    graphs: int | None = None,
    assignments_per_graph: int | None = None,
    seed: int | None = None,
    relative_precision: float | None = None,
    max_graphs: int | None = None,
    verify: bool = True,
    batch_size: int = 16,
    progress: Callable[[EngineProgress], None] | None = None,
    workers: int = 1,
    cluster: Cluster | None = None,
    store: ResultStore | None = None,
    clusters: Sequence[int] | None = None,
) -> MdeResult:
    """Minimum detectable direct, spillover and total effects of every planned test.

    Parameters
    ----------
    scenario
        A validated scenario (``load_scenario``).
    units, treatment_probabilities, graphs, assignments_per_graph, seed
        Optional overrides, as in ``simulate_power``.
    relative_precision, max_graphs
        Overrides of ``simulation.relative_precision`` (target half-width of
        the MDE's 95% Monte Carlo interval, relative to the MDE) and of
        ``simulation.max_graphs`` (cap on graphs per design point).
    verify
        ``False`` reports the formula MDE only (no verification, no search,
        no adaptive precision); ``designcalc compare`` uses this.
    workers, cluster, store
        Where each pass's graphs are simulated and kept, as in
        ``simulate_power``; the numbers are identical for any choice.  In
        this process without a store, prepared graphs are cached between
        passes instead (``engine.GraphCache``).

    Returns
    -------
    MdeResult
        Interrupted with Ctrl-C it holds the design points that finished and
        ``partial=True``.

    Examples
    --------
    >>> from pathlib import Path
    >>> from designcalc import load_scenario, minimum_detectable_effects
    >>> s = load_scenario(Path(__file__).parents[1] / "scenarios" / "lake_orrin_savings.toml")
    >>> r = minimum_detectable_effects(s, units=[300], treatment_probabilities=[0.5], graphs=3,
    ...                                assignments_per_graph=4, verify=False)
    >>> rec = r.select(estimand="direct", estimator="hajek", variance_estimator="neyman")[0]
    >>> round(rec.formula_mde / rec.standard_error, 2)   # t(298) quantiles
    2.81
    """
    from designcalc.power import _override

    scenario = _override(scenario, units, treatment_probabilities, graphs, assignments_per_graph, seed, clusters)
    sim = scenario.simulation
    precision = sim.relative_precision if relative_precision is None else relative_precision
    cap = sim.max_graphs if max_graphs is None else max(max_graphs, sim.graphs)
    started = time.perf_counter()
    finished = 0
    records: list[MdeRecord] = []
    warnings: list[str] = []
    partial = False

    def tick() -> None:
        nonlocal finished
        finished += 1
        if progress is not None:
            progress(EngineProgress(finished, 0, time.perf_counter() - started))

    source = _GraphSource(scenario, batch_size, check_workers(workers), cluster, store, tick)
    try:
        for point in design_points(scenario):
            records.extend(_design_point(scenario, point, source, precision, cap, verify, warnings))
            source.forget(point)
    except KeyboardInterrupt:
        partial = True
    extra = {"relative_precision": precision, "max_graphs": cap, "verified": verify}
    return MdeResult(scenario.name, tuple(records), provenance(scenario, **extra), tuple(warnings), partial)


class _GraphSource:
    """Where a pass's graphs come from: ``execution.simulate_graphs``, many graphs per call.

    In one process the prepared graphs (network, eigenvectors, assignments)
    are cached between the passes of a design point.  With workers or a
    cluster, graphs are prepared again in the workers (about a fifth of a
    graph's time on the demo, measured) but run in parallel.  A store, if
    given, is read and written either way; the numbers are the same.
    """

    def __init__(
        self, scenario: Scenario, batch_size: int, workers: int, cluster: Cluster | None, store: ResultStore | None,
        tick: Callable[[], None],
    ) -> None:
        self.scenario, self.batch_size, self.workers, self.cluster, self.store, self.tick = scenario, batch_size, workers, cluster, store, tick
        self.cache = GraphCache()

    def simulate(self, point: DesignPoint, runs: list[Run], indices: range, keep_units: bool) -> list[GraphDraws]:
        out = []
        tasks = [(point, g) for g in indices]
        with closing(simulate_graphs(
            self.scenario, tasks, workers=self.workers, batch_size=self.batch_size, runs=runs, cluster=self.cluster,
            store=self.store, keep_units=keep_units, cache=self.cache,
        )) as stream:
            for draws in stream:
                out.append(draws)
                self.tick()
        return out

    def forget(self, point: DesignPoint) -> None:
        self.cache.forget(point)


def _design_point(
    scenario: Scenario,
    point: DesignPoint,
    source: _GraphSource,
    precision: float,
    cap: int,
    verify: bool,
    warnings: list[str],
) -> list[MdeRecord]:
    design = scenario.design
    alpha, alternative, target = design.significance_level, design.alternative, design.target_power
    pi = point.treatment_probability
    keys = planned_keys(scenario, point.units)
    binary = scenario.outcome.kind == "binary"
    G = scenario.simulation.graphs

    def simulate(runs: list[Run], indices: range) -> list[GraphDraws]:
        return source.simulate(point, runs, indices, binary)

    # 1. Null pass (the scenario's model rides along: its estimands give each direction).
    null_runs = [Run(null_label(e), null_model(scenario, e), (e,)) for e in ESTIMANDS]
    direction_runs = [
        Run(f"direction:{e}", effect_direction_model(scenario.outcome, e), (e,), frozenset()) for e in ESTIMANDS
    ]
    null_draws = simulate(null_runs + direction_runs, range(G))
    control_sd = math.sqrt(float(np.mean([d.control_variance for d in null_draws])))

    tracks: list[_Track] = []
    null_summary: dict[tuple[str, str, str], tuple[float, float, float, float, float]] = {}
    for key in keys:
        estimand, estimator, _ = key
        reference = reference_of(scenario, point, key)
        critical = critical_value(alpha, alternative, reference.df)
        multiplier = mde_multiplier(alpha, target, alternative, reference.df)
        est, se, _ = stack_run(null_draws, null_label(estimand), key)
        ok = np.isfinite(est) & np.isfinite(se)
        sd, sd_se = clustered_sd(np.where(ok, est, np.nan))
        with np.errstate(divide="ignore", invalid="ignore"):
            size, size_se = clustered_mean_se(np.where(ok, reject(est / se, critical, alternative).astype(float), np.nan))
        mean_se = float(np.nanmean(np.where(ok, se, np.nan))) if ok.any() else float("nan")
        null_summary[key] = (sd, sd_se, mean_se, size, size_se)
        base = effect_direction_model(scenario.outcome, estimand)
        base_effect = float(np.mean([d.runs[f"direction:{estimand}"].estimands.truth(key) for d in null_draws]))
        if alternative == "greater":
            direction = 1
        elif alternative == "less":
            direction = -1
        else:
            direction = 1 if base_effect >= 0 else -1
        track = _Track(key, base, direction, direction * base_effect, multiplier, critical, multiplier * sd, null_sd=sd, null_mean_se=mean_se)
        track.flags = (reference.name,)
        tracks.append(track)
        if not (track.base_effect > 0):
            track.done = True
            if alternative != "two-sided" and direction * base_effect < 0:
                why = "the scenario's effect points against the one-sided test"
            else:
                why = "the scenario's model gives this estimand no effect to scale (it is zero on these graphs)"
            track.flags += (f"{why}; the MDE was not searched",)

    # 2-4. Verify, search, refine.
    draws_by_track: dict[str, list[GraphDraws]] = {}
    if verify:
        active = [t for t in tracks if not t.done and math.isfinite(t.formula) and t.formula > 0]
        for t in active:
            try:
                t.factor, t.effect = _factor_for(t, t.formula, null_draws, pi, scenario)
            except ModelError as exc:
                t.unreachable, t.done = f"not reachable: {exc}", True
        active = [t for t in active if not t.done]
        graphs_now = G
        while active:
            runs = [Run(t.label, t.base.scaled_for(effect_coefficients(scenario, t.key[0]), t.factor), (t.key[0],), frozenset({t.key})) for t in active]
            new = simulate(runs, range(graphs_now))
            for t in active:
                draws_by_track[t.label] = new
                t.power, t.power_se, t.sd, t.mean_se, t.mean_estimate, t.replicates, t.failed = _rates(new, t.label, t.key, t.critical, alternative)
                t.graphs = len(new)
                t.effect = float(np.mean([d.runs[t.label].estimands.truth(t.key) for d in new])) * t.direction
                if t.steps == 0:
                    t.formula_power, t.formula_power_se = t.power, t.power_se
            still = []
            for t in active:
                t.history.append((t.effect, t.power, t.power_se, t.sd))
                agree = abs(t.power - target) <= AGREEMENT_Z * _stable_se(t)
                if not agree and t.power < target and t.at_bound:
                    bound = "probabilities clip at 0 and 1" if t.base.link == "identity" else "the logistic link bounds probabilities"
                    t.unreachable = (
                        f"not reachable: the largest effect this binary outcome model allows ({t.effect:.4g}; {bound}) "
                        f"has power {t.power:.3f} ± {_stable_se(t):.3f}"
                    )
                    t.done = True
                    continue
                if not agree and t.power < target:
                    t.unreachable = _plateau(t.history)
                    if t.unreachable:
                        t.done = True
                        continue
                if not agree and t.steps < _MAX_SEARCH_STEPS:
                    t.searched = True
                    t.steps += 1
                    # Keep each step within a factor of 2 of the current effect.
                    new_effect = min(max(_model_step(t, target, alternative), 0.5 * t.effect), 2.0 * t.effect)
                    try:
                        t.factor, t.effect = _factor_for(t, new_effect, null_draws, pi, scenario)
                    except ModelError as exc:
                        t.unreachable, t.done = f"not reachable: {exc}", True
                        continue
                    still.append(t)
                    continue
                if not agree:
                    t.flags += (f"search stopped after {_MAX_SEARCH_STEPS} steps without reaching the target power",)
                t.done = True
            active = still
        # Adaptive precision: more graphs for the effects not yet known precisely enough.
        for _ in range(8):
            loose = [
                t for t in tracks
                if t.label in draws_by_track and not t.unreachable and len(draws_by_track[t.label]) < cap
                and half_width(t, alternative) > precision * _estimate(t, target, alternative)
            ]
            if not loose:
                break
            # The interval shrinks like 1/sqrt(graphs): each test gets what it needs, plus 10%, at most 4x.
            goals = {}
            for t in loose:
                have = len(draws_by_track[t.label])
                ratio = (half_width(t, alternative) / (precision * _estimate(t, target, alternative))) ** 2
                goals[t.label] = min(cap, 4 * have, max(have + 1, math.ceil(have * ratio * 1.1)))
            haves = {t.label: len(draws_by_track[t.label]) for t in loose}
            end = max(goals.values())

            def needing(g: int) -> list[_Track]:
                return [t for t in loose if haves[t.label] <= g < goals[t.label]]

            # Graph g is simulated for every test that needs it; consecutive graphs needed by the
            # same tests go in one call, so a pool gets many graphs at once (same numbers: each
            # run's draws on a graph do not depend on which other runs ride along).
            g = min(haves.values())
            while g < end:
                members = needing(g)
                stop = g + 1
                while stop < end and needing(stop) == members:
                    stop += 1
                if members:
                    runs = [Run(t.label, t.base.scaled_for(effect_coefficients(scenario, t.key[0]), t.factor), (t.key[0],), frozenset({t.key})) for t in members]
                    extra = simulate(runs, range(g, stop))
                    for t in members:
                        draws_by_track[t.label] = draws_by_track[t.label] + extra
                g = stop
            for t in loose:
                t.power, t.power_se, t.sd, t.mean_se, t.mean_estimate, t.replicates, t.failed = _rates(draws_by_track[t.label], t.label, t.key, t.critical, alternative)
                t.graphs = len(draws_by_track[t.label])
                t.effect = t.direction * float(np.mean([d.runs[t.label].estimands.truth(t.key) for d in draws_by_track[t.label]]))

    records = []
    for t in tracks:
        sd, sd_se, mean_se, size, size_se = null_summary[t.key]
        verified = t.label in draws_by_track
        if t.unreachable:
            mde, hw = float("nan"), float("nan")
            method = "not reachable"
            n_graphs = len(draws_by_track[t.label]) if verified else G
        elif verified:
            mde = _estimate(t, target, alternative)
            hw = half_width(t, alternative)
            final_agree = abs(t.power - target) <= AGREEMENT_Z * _stable_se(t)
            method = "searched by simulation" if t.searched or not final_agree else "formula, verified by simulation"
            n_graphs = len(draws_by_track[t.label])
        else:
            mde = t.formula
            hw = Z95 * t.multiplier * sd_se
            method = "formula (not verified)"
            n_graphs = G
        flags = list(t.flags)
        if t.unreachable:
            flags.append(t.unreachable)
        if t.searched:
            flags.append(
                f"formula MDE {t.formula:.4g} gave power {t.formula_power:.3f} ± {t.formula_power_se:.3f}, "
                "not the target: the MDE was searched by simulation"
            )
        low, high = 0.6 * alpha, 1.4 * alpha
        if math.isfinite(size) and not low <= size <= high:
            flags.append(f"size {size:.3f} (MC se {size_se:.3f}) outside [{low:.3f}, {high:.3f}]")
        if verified and not t.unreachable and hw > precision * mde:
            limit = f"max_graphs = {cap}" if n_graphs >= cap else "the rounds allowed"
            flags.append(f"precision {hw / mde:.1%} short of the requested {precision:.1%} at {limit}")
        if verified and not t.unreachable and abs(t.power - target) > AGREEMENT_Z * _stable_se(t):
            flags.append(
                f"power at the last simulated effect {t.effect:.4g} is {t.power:.3f} ± {_stable_se(t):.3f}; "
                "the MDE is the probit-Newton correction from it"
            )
        if verified and t.failed:
            flags.append(
                f"{t.failed} of {t.failed + t.replicates} replicates had no estimate (an empty arm, or the estimator "
                "undefined on the graph); power counts the others"
            )
        records.append(
            MdeRecord(
                estimand=t.key[0],
                estimator=t.key[1],
                variance_estimator=t.key[2],
                units=point.units,
                treatment_probability=pi,
                reference_distribution=t.flags[0],
                multiplier=t.multiplier,
                standard_error=sd,
                standard_error_mc_se=sd_se,
                mean_estimated_se=mean_se,
                size=size,
                size_mc_se=size_se,
                formula_mde=t.formula,
                formula_power=t.formula_power,
                formula_power_mc_se=t.formula_power_se,
                mde=mde,
                mde_low=mde - hw,
                mde_high=mde + hw,
                mde_sd_units=mde / control_sd if control_sd > 0 else float("nan"),
                control_sd=control_sd,
                verified_effect=t.effect if verified else float("nan"),
                verified_power=t.power if verified else float("nan"),
                verified_power_mc_se=t.power_se if verified else float("nan"),
                method=method,
                relative_precision=hw / mde if mde > 0 else float("nan"),
                graphs=n_graphs,
                replicates=n_graphs * scenario.simulation.assignments_per_graph,
                direction=t.direction,
                flags=tuple(flags[1:]),
                clusters=point.clusters,
            )
        )
    return records


def _plateau(history: list[tuple[float, float, float, float]]) -> str:
    """Why no effect reaches the target, if the signal-to-noise ratio stopped growing with the effect.

    For an estimator whose SD grows in proportion to the effect (an HT
    estimator whose centring constant drifts away from the mean outcome as
    the effect grows), effect / SD levels off and power never reaches the
    target however large the effect.
    """
    if len(history) < 3:
        return ""
    (e0, _, _, sd0), (e2, p2, se2, sd2) = history[-3], history[-1]
    if e2 < 1.5 * e0 or sd0 <= 0 or sd2 <= 0:
        return ""
    if e2 / sd2 < 1.1 * (e0 / sd0):
        return (
            f"not reachable: multiplying the effect by {e2 / e0:.2g} raised effect/SD only from {e0 / sd0:.2f} to "
            f"{e2 / sd2:.2f} (power {p2:.3f} ± {se2:.3f}); the estimator's SD grows with the effect"
        )
    return ""


def half_width(t: _Track, alternative: str) -> float:
    """Half-width of the 95% MC interval of the MDE: the power's MC error over the slope of the power curve.

    Uses the stabilised se (``_stable_se``) and a t quantile with graphs - 1
    degrees of freedom, since the MC se is clustered by graph.
    """
    slope = float(scipy.stats.norm.pdf(probit(t.power))) * _probit_slope(t, alternative)
    q = float(scipy.stats.t.ppf(0.975, t.graphs - 1)) if t.graphs >= 2 else float("inf")
    return q * _stable_se(t) / slope if slope > 0 else float("inf")


def _estimate(t: _Track, target: float, alternative: str) -> float:
    """One probit-Newton step from the last simulated effect to the target power."""
    return t.effect + (probit(target) - probit(t.power)) / _probit_slope(t, alternative)

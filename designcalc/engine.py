"""The Monte Carlo power engine.

For each design point (units x treatment probability) the engine draws
``graphs`` networks and, on each, ``assignments_per_graph`` Bernoulli
assignments with outcomes; computes the exact estimands of every graph, the
planned estimators with their feasible standard errors, and the same under
the null model of each estimand (the tested effect set to zero, everything
else unchanged, on the very same graphs, assignments and noise).

Random streams (layout version ``STREAM_LAYOUT_VERSION``) form a
``numpy.random.SeedSequence`` tree keyed by content, never by worker or order:

* types and graph: key (0, units, graph index) -> children [types, graph]; the
  same networks serve every treatment probability (common random numbers
  make treatment probabilities comparable);
* assignment and noise: key (1, units, round(pi * 1e9), graph index) ->
  children [assignment, noise, covariates]; the third child (the baseline
  covariates' own noise) is drawn only when the scenario states covariates,
  and spawning it leaves the first two streams unchanged;
* a clustered population (``designcalc.clusters``): family 4, one key per
  cluster, (4, imposed cluster size or 0, graph index, cluster) -> [size,
  types, graph]; the assignment key's fourth child draws the cluster random
  effects (spawning it leaves the other three unchanged);
* the network survey (only with a ``[measurement]`` table): key (3, units,
  graph index) -> one stream for ``measurement.observe_network``.  A survey
  happens once per graph, before assignment, so every treatment probability
  sees the same observed network; scenarios without ``[measurement]`` never
  touch it, so their numbers are those of layout version 1.  (Family 2 is
  used by ``designcalc.diagnostics``.)

With a measurement model, outcomes and exact estimands use the true network
and every estimator (exposures, eigenvectors, HT and PC weights, HAC
dependency) the observed one (METHODS.md §7).  With outcome attrition the
assignment key's fifth child draws which outcomes are missing, for every
assignment, and the estimators analyse complete cases: Hajek's arms hold the
observed units, and the HT-type estimators (direct HT, centred HT, the PC
estimators), sums over outcome units, drop the missing units' terms and
scale by n / (units observed).  The estimands stay those of the whole
population, so attrition related to treatment shows as bias.

So a result never depends on how work is split, on ``batch_size``, or on
which estimators are planned.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from typing import Callable, Iterable, Sequence

import numpy as np
from threadpoolctl import threadpool_limits

from designcalc import saturation
from designcalc.clusters import cluster_effect_sd, sample_clustered_network
from designcalc.covariates import draw_covariates, latent_individual_scores
from designcalc.edge_models import BlockModel
from designcalc.estimands import Estimands, ExposureMoments, estimands_from_moments, exact_estimands, exposure_moments
from designcalc.errors import DesignCalcError, ModelError
from designcalc.estimators import (
    EstimateBatch,
    GraphPreparation,
    combine_total,
    estimate_direct_hajek,
    estimate_direct_ht,
    estimate_direct_lin,
    estimate_spillover_exposure_regression,
    estimate_spillover_ht,
    estimate_spillover_pc,
    estimate_spillover_pc_corrected,
    prepare_graph,
    residualise_on_covariates,
    treated_neighbour_counts,
    treated_neighbour_fraction,
)
from designcalc.measurement import ObservedNetwork, inclusion_weights, observe_network
from designcalc.inference import ReferenceDistribution, reference_distribution
from designcalc.memory import check_memory
from designcalc.networks import SampledNetwork, kernel_grid_cells, sample_network
from designcalc.outcomes import OutcomeModel
from designcalc.scenario import Scenario

__all__ = [
    "RESULTS_VERSION",
    "STREAM_LAYOUT_VERSION",
    "DesignPoint",
    "GraphDraws",
    "EngineProgress",
    "simulate_graph",
    "Run",
    "RunDraws",
    "power_runs",
    "planned_keys",
    "restrict_tests",
    "example_network",
    "dropped_keys",
    "null_label",
    "ALTERNATIVE",
    "simulate_design_point",
    "design_points",
    "GraphCache",
    "control_variance",
    "TWO_HOP_MAX_UNITS",
    "observed_network",
]

STREAM_LAYOUT_VERSION = 1
#: Bumped whenever a change alters what a graph's simulation returns (an estimate, a standard error, a truth)
#: without changing the random streams, so that a results store never serves numbers an older build computed
#: under the same version number.  2: k = K eigenvectors for block models, the clustered contrasts' SEs.
RESULTS_VERSION = 2
ESTIMANDS = ("direct", "spillover", "total")
TWO_HOP_MAX_UNITS = 4000  # prepare_graph's default limit for the eigen-clipped two-hop matrix
_PROBABILITY_KEY_SCALE = 1_000_000_000
_VARIANCE_OF_SPILLOVER = {
    "centred_ht": "plug_in",
    "pc_balancing": "plug_in",
    "pc_balancing_corrected": "plug_in",
    "exposure_regression": "hc1",
}
_VARIANCE_OF_SPILLOVER.update({f"{name}_adjusted": v for name, v in list(_VARIANCE_OF_SPILLOVER.items())})
_LIN_VARIANCE = "hc2"


@dataclass(frozen=True)
class DesignPoint:
    """Where the engine simulates: a size and a treatment probability.

    For a clustered population ``clusters`` is the number of clusters and
    ``units`` their nominal total; ``cluster_size`` > 0 makes every cluster
    that size (a solver searching cluster sizes), 0 keeps the scenario's rule.
    """

    units: int
    treatment_probability: float
    clusters: int = 0
    cluster_size: int = 0

    def describe(self) -> str:
        if not self.clusters:
            return f"{self.units} units"
        size = f" of {self.cluster_size}" if self.cluster_size else ""
        return f"{self.clusters} clusters{size} (~{self.units} units)"


@dataclass(frozen=True)
class EngineProgress:
    """Reported after every finished graph."""

    finished_graphs: int
    total_graphs: int
    elapsed_seconds: float


@dataclass(frozen=True)
class Run:
    """One outcome model simulated on every graph of a design point.

    The power table runs the scenario's model (``"alternative"``) and one
    null per estimand; the solvers run nulls and models with a rescaled
    effect.  ``keys`` restricts the estimators computed (``None``: every
    planned one for ``estimands``).
    """

    label: str
    model: OutcomeModel
    estimands: tuple[str, ...]
    keys: frozenset[tuple[str, str, str]] | None = None


@dataclass(eq=False)
class RunDraws:
    """What one run gives on one graph: its exact estimands, estimates and SEs per key."""

    estimands: Estimands
    estimates: dict[tuple[str, str, str], np.ndarray] = field(default_factory=dict)
    standard_errors: dict[tuple[str, str, str], np.ndarray] = field(default_factory=dict)


@dataclass(eq=False)
class GraphDraws:
    """Everything one graph contributes, per run, plus facts about the graph."""

    runs: dict[str, RunDraws]
    mean_degree: float = 0.0
    share_isolated: float = 0.0
    n_eigenvectors: int = 0
    min_shrinkage: float = 1.0
    control_variance: float = float("nan")
    # Kept only on request (keep_units=True): lets a solver compute exact
    # estimands of other outcome models on this graph without resampling it.
    degrees: np.ndarray | None = None
    theta: np.ndarray | None = None
    cluster_sizes: np.ndarray | None = None
    failures: dict[str, str] = field(default_factory=dict)  # estimator -> why it is undefined on this graph

    # Views used by the power table: the scenario's model and the null of each estimand.
    @property
    def estimands(self) -> Estimands:
        return self.runs[ALTERNATIVE].estimands

    @property
    def estimates(self) -> dict[tuple[str, str, str], np.ndarray]:
        return self.runs[ALTERNATIVE].estimates

    @property
    def standard_errors(self) -> dict[tuple[str, str, str], np.ndarray]:
        return self.runs[ALTERNATIVE].standard_errors

    @property
    def null_estimands(self) -> dict[str, Estimands]:
        return {e: self.runs[null_label(e)].estimands for e in ESTIMANDS if null_label(e) in self.runs}

    @property
    def null_estimates(self) -> dict[tuple[str, str, str], np.ndarray]:
        return {k: v for e in ESTIMANDS if null_label(e) in self.runs for k, v in self.runs[null_label(e)].estimates.items()}

    @property
    def null_standard_errors(self) -> dict[tuple[str, str, str], np.ndarray]:
        return {k: v for e in ESTIMANDS if null_label(e) in self.runs for k, v in self.runs[null_label(e)].standard_errors.items()}


ALTERNATIVE = "alternative"


def null_label(estimand: str) -> str:
    return f"null:{estimand}"


def effect_coefficients(scenario: Scenario, estimand: str) -> str:
    """Whose coefficients a test of ``estimand`` zeroes for its null and rescales for an MDE (``OutcomeModel.null_for``).

    Under complete randomization inside clusters a treated unit's neighbours
    are treated at rate (k - 1)/(m - 1), an untreated one's at k/(m - 1), so
    the within-saturation direct contrast differs from zero by a spillover
    gap even with no direct effect: its null and its scaling take every
    effect ("total"), which makes its truth zero and linear in the scale.
    """
    design = scenario.design.saturation
    if estimand == "direct" and design is not None and design.within == "complete":
        return "total"
    return estimand


def null_model(scenario: Scenario, estimand: str) -> OutcomeModel:
    """The scenario's outcome model under the null of ``estimand`` (see ``effect_coefficients``)."""
    return scenario.outcome.null_for(effect_coefficients(scenario, estimand))


def power_runs(scenario: Scenario) -> list[Run]:
    """The scenario's model plus the null of each estimand (the power table's runs)."""
    model = scenario.outcome
    return [Run(ALTERNATIVE, model, ESTIMANDS)] + [Run(null_label(e), null_model(scenario, e), (e,)) for e in ESTIMANDS]


def _available_variances(scenario: Scenario, units: int) -> list[str]:
    return [v for v in scenario.estimators.direct_variance if v != "two_hop" or units <= TWO_HOP_MAX_UNITS]


def _direct_variances(scenario: Scenario, name: str, units: int) -> list[str]:
    """Variance estimators of one direct estimator: Lin's regression has its own (HC2)."""
    return [_LIN_VARIANCE] if name == "lin" else _available_variances(scenario, units)


def _total_direct(scenario: Scenario, spillover: str) -> str:
    """The direct estimator a total pairs with ``spillover``: Lin with adjusted spillovers, else an unadjusted one."""
    direct = scenario.estimators.direct
    if spillover.endswith("_adjusted") and "lin" in direct:
        return "lin"
    unadjusted = [d for d in direct if d != "lin"]
    return unadjusted[0] if unadjusted else direct[0]


def planned_keys(scenario: Scenario, units: int) -> list[tuple[str, str, str]]:
    """(estimand, estimator, variance estimator) of every planned test available at ``units``.

    The eigen-clipped two-hop variance needs a dense n x n eigendecomposition,
    so it is left out above ``TWO_HOP_MAX_UNITS`` (``two_hop_psd`` is not).
    A total pairs each spillover estimator with the first planned direct
    estimator of its kind (Lin's with covariate-adjusted spillovers).
    """
    plan = scenario.estimators
    if scenario.design.saturation is not None:
        keys = saturation.planned_contrast_keys(scenario.design.saturation)
        return [k for k in keys if plan.only_tests is None or k in plan.only_tests]
    keys = [("direct", d, v) for d in plan.direct for v in _direct_variances(scenario, d, units)]
    keys += [("spillover", s, _VARIANCE_OF_SPILLOVER[s]) for s in plan.spillover]
    keys += [("total", f"{_total_direct(scenario, s)}+{s}", "linearised") for s in plan.spillover]
    if plan.only_tests is not None:
        keys = [k for k in keys if k in plan.only_tests]
    return keys


def restrict_tests(scenario: Scenario, tests: Iterable[tuple[str, str, str]]) -> Scenario:
    """The scenario with only ``tests`` planned (a subset of ``planned_keys``).

    Every solver enumerates tests through ``planned_keys``, so a restricted
    scenario computes only these; the random streams do not depend on which
    tests are planned, so each test's numbers are those of the full run.
    """
    wanted = frozenset(tests)
    if not wanted:
        raise DesignCalcError("at least one planned test is needed")
    return replace(scenario, estimators=replace(scenario.estimators, only_tests=wanted))


def dropped_keys(scenario: Scenario, units: int) -> list[tuple[str, str, str]]:
    """Planned tests not available at ``units`` (see ``planned_keys``)."""
    plan = scenario.estimators
    if "two_hop" not in plan.direct_variance or units <= TWO_HOP_MAX_UNITS:
        return []
    return [("direct", d, "two_hop") for d in plan.direct if d != "lin"]


def design_points(scenario: Scenario) -> list[DesignPoint]:
    population = scenario.population
    if population.clustered:
        return [
            DesignPoint(n, p, clusters=c)
            for c, n in zip(population.clusters, population.units)
            for p in scenario.design.treatment_probabilities
        ]
    return [
        DesignPoint(n, p)
        for n in population.units
        for p in scenario.design.treatment_probabilities
    ]


def clustered_point(scenario: Scenario, clusters: int, treatment_probability: float, cluster_size: int = 0) -> DesignPoint:
    """The design point of ``clusters`` clusters (each ``cluster_size`` units when > 0)."""
    units = scenario.population.nominal_units(clusters, cluster_size)
    return DesignPoint(units, treatment_probability, clusters=clusters, cluster_size=cluster_size)


def reference_of(scenario: Scenario, point: DesignPoint, key: tuple[str, str, str]) -> ReferenceDistribution:
    """The null distribution of a planned test's Wald statistic at ``point`` (``inference``).

    A clustered design's contrasts refer to t with degrees of freedom from
    the clusters (``saturation.contrast_df``) unless the scenario asks for
    the normal.
    """
    design = scenario.design
    if design.saturation is not None and saturation.is_contrast(key[1]):
        if design.reference_distribution == "normal":
            return ReferenceDistribution()
        size = point.cluster_size or scenario.population.cluster_sizes.nominal
        return ReferenceDistribution(saturation.contrast_df(design.saturation, point.clusters, key[1], scenario.outcome.cluster_icc, size))
    return reference_distribution(design.reference_distribution, key[0], key[1], point.units, scenario.n_covariates)


def _graph_streams(entropy: int, units: int, graph_index: int) -> tuple[np.random.Generator, np.random.Generator]:
    seq = np.random.SeedSequence(entropy, spawn_key=(0, units, graph_index))
    types, graph = seq.spawn(2)
    return np.random.default_rng(types), np.random.default_rng(graph)


def _measurement_stream(entropy: int, units: int, graph_index: int) -> np.random.Generator:
    # Family 3 (module docstring): one survey per graph, whatever the treatment probability.
    return np.random.default_rng(np.random.SeedSequence(entropy, spawn_key=(3, units, graph_index)))


def observed_network(scenario: Scenario, net: SampledNetwork, units: int, graph_index: int) -> ObservedNetwork | None:
    """The survey of graph ``graph_index`` the engine draws (None without ``[measurement]``)."""
    if scenario.measurement is None:
        return None
    weights = getattr(scenario.network, "weights", None) if scenario.measurement.cap_rule == "strongest" else None
    return observe_network(net.adjacency, scenario.measurement, _measurement_stream(scenario.simulation.seed, units, graph_index), weights=weights)


def _assignment_streams(entropy: int, point: DesignPoint, graph_index: int) -> tuple[np.random.Generator, ...]:
    key = (point.units, int(round(point.treatment_probability * _PROBABILITY_KEY_SCALE)), graph_index)
    # The leading 0 / 1 keeps graph and assignment keys apart; the fourth child
    # (cluster effects) leaves the first three as spawn(3) made them.
    children = np.random.SeedSequence(entropy, spawn_key=(1,) + key).spawn(5)
    return tuple(np.random.default_rng(c) for c in children)  # assignment, noise, covariates, cluster effects, attrition


def sample_point_network(scenario: Scenario, point: DesignPoint, graph_index: int) -> SampledNetwork:
    """Graph ``graph_index`` of ``point``: one network, or the union of a clustered population's networks."""
    n = point.units
    if point.clusters:
        population = scenario.population
        return sample_clustered_network(
            scenario.network, scenario.density, population.cluster_sizes, point.clusters,
            entropy=scenario.simulation.seed, graph_index=graph_index, cluster_size=point.cluster_size,
        )
    types_rng, graph_rng = _graph_streams(scenario.simulation.seed, n, graph_index)
    bounds = scenario.network.cell_bounds(kernel_grid_cells(n)) if scenario.network.kind == "kernel" else None
    return sample_network(scenario.network, scenario.density, n, types_rng=types_rng, graph_rng=graph_rng, cell_bounds=bounds)


def draw_assignments(scenario: Scenario, net: SampledNetwork, point: DesignPoint, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray | None]:
    """The (units, B) treatments of a graph, and for a clustered design the (clusters, B) arms."""
    B = scenario.simulation.assignments_per_graph
    design = scenario.design.saturation
    if design is not None:
        return saturation.assign(design, net.cluster_sizes, B, rng)
    return rng.random((net.adjacency.shape[0], B)) < point.treatment_probability, None


def _outcomes(model: OutcomeModel, theta: np.ndarray, W: np.ndarray, X: np.ndarray, noise: np.ndarray) -> np.ndarray:
    mean = model.mean_outcome(theta[:, None], W, X)
    if model.kind == "continuous":
        return mean + model.noise_sd * noise
    return (noise < mean).astype(float)  # noise holds uniforms for binary outcomes


def _run_estimators(
    scenario: Scenario,
    prep: GraphPreparation,
    W: np.ndarray,
    Y: np.ndarray,
    pi: float,
    keys: Sequence[tuple[str, str, str]],
    failures: dict[str, str] | None = None,
    covariates: np.ndarray | None = None,
    exposure: Callable[[], np.ndarray] | None = None,
    ht_prep: GraphPreparation | None = None,
    observed: np.ndarray | None = None,
) -> dict[tuple[str, str, str], EstimateBatch]:
    """The estimates of ``keys`` on one assignment batch; each estimator runs at most once.

    A spillover estimator undefined on the graph gives NaN and its reason in
    ``failures``.  ``covariates`` (n, B, K) feed Lin's estimator and the
    ``*_adjusted`` spillover estimators, which run their unadjusted form on
    covariate-residualised outcomes (the exposure regression adds them as
    regressors instead).  ``exposure()`` gives the batch's treated-neighbour
    fraction, computed once for every run and both exposure regressions.
    ``ht_prep`` (an augmented survey's inclusion-weighted network,
    ``measurement.inclusion_weights``) replaces ``prep`` in the centred HT
    spillover estimator.  ``observed`` (``(n, B)`` bool) marks the outcomes
    observed under attrition: complete cases (module docstring).
    """
    failures = {} if failures is None else failures
    if exposure is None:
        def exposure() -> np.ndarray:
            return treated_neighbour_fraction(prep, W)
    plan = scenario.estimators
    cache: dict[tuple[str, str], EstimateBatch] = {}

    def complete_cases(outcomes: np.ndarray, neutral: float) -> np.ndarray:
        # A missing outcome becomes the value whose term vanishes from an HT-type sum (scaled back in ``rescaled``).
        return outcomes if observed is None else np.where(observed, outcomes, neutral)

    def rescaled(batch: EstimateBatch) -> EstimateBatch:
        if observed is None:
            return batch
        with np.errstate(divide="ignore", invalid="ignore"):
            scale = W.shape[0] / observed.sum(axis=0)
        return replace(
            batch, estimate=batch.estimate * scale, standard_error=batch.standard_error * scale,
            contributions=batch.contributions * scale[None, :],
        )

    def direct(name: str, variance: str) -> EstimateBatch:
        if (name, variance) not in cache:
            if name == "hajek":
                cache[name, variance] = estimate_direct_hajek(prep, W, Y, treatment_probability=pi, variance=variance, observed=observed)
            elif name == "lin":
                cache[name, variance] = estimate_direct_lin(prep, W, Y, treatment_probability=pi, covariates=covariates)
            else:
                cache[name, variance] = rescaled(estimate_direct_ht(
                    prep, W, complete_cases(Y, plan.centre), treatment_probability=pi, centre=plan.centre, variance=variance,
                ))
        return cache[name, variance]

    def spillover(name: str) -> EstimateBatch:
        if (name, "") not in cache:
            try:
                cache[name, ""] = _spillover_batch(name)
            except ModelError as exc:
                # Undefined on this graph (e.g. r_j = 0 for the corrected PC
                # estimator): no estimate, counted as failed replicates.
                failures[name] = str(exc)
                B = W.shape[1]
                nan = np.full(B, np.nan)
                cache[name, ""] = EstimateBatch(name, _VARIANCE_OF_SPILLOVER[name], nan, nan.copy(), np.full(W.shape, np.nan))
        return cache[name, ""]

    residualised: list[np.ndarray] = []

    def _spillover_batch(name: str) -> EstimateBatch:
        if name == "exposure_regression_adjusted":
            return estimate_spillover_exposure_regression(
                prep, W, Y, treatment_probability=pi, covariates=covariates, exposure=exposure()
            )
        if name.endswith("_adjusted"):
            if not residualised:
                residualised.append(residualise_on_covariates(prep, Y, covariates))
            return replace(_unadjusted(name.removesuffix("_adjusted"), residualised[0]), estimator=name)
        return _unadjusted(name, Y)

    def _unadjusted(name: str, outcomes: np.ndarray) -> EstimateBatch:
        if name == "centred_ht":
            return rescaled(estimate_spillover_ht(ht_prep or prep, W, complete_cases(outcomes, plan.centre), treatment_probability=pi, centre=plan.centre))
        if name == "pc_balancing":
            return rescaled(estimate_spillover_pc(prep, W, complete_cases(outcomes, 0.0), treatment_probability=pi))
        if name == "pc_balancing_corrected":
            return rescaled(estimate_spillover_pc_corrected(prep, W, complete_cases(outcomes, 0.0), treatment_probability=pi))
        return estimate_spillover_exposure_regression(prep, W, outcomes, treatment_probability=pi, exposure=exposure())

    out: dict[tuple[str, str, str], EstimateBatch] = {}
    for key in keys:
        estimand, name, variance = key
        if estimand == "direct":
            out[key] = direct(name, variance)
        elif estimand == "spillover":
            out[key] = spillover(name)
        else:
            # The total pairs a planned direct estimator (with its first variance
            # estimator available at this size) with a spillover estimator.
            first, second = name.split("+", 1)
            out[key] = combine_total(direct(first, _direct_variances(scenario, first, W.shape[0])[0]), spillover(second))
    return out


def _run_contrasts(
    scenario: Scenario, W: np.ndarray, Y: np.ndarray, sizes: np.ndarray, arms: np.ndarray, keys: Sequence[tuple[str, str, str]]
) -> dict[tuple[str, str, str], EstimateBatch]:
    """A clustered design's contrasts on one assignment batch (``saturation.estimate_contrasts``)."""
    results = saturation.estimate_contrasts(scenario.design.saturation, [k[1] for k in keys], W, Y, sizes, arms)
    return {k: EstimateBatch(k[1], k[2], *results[k[1]], None) for k in keys}


@dataclass(eq=False)
class _PreparedGraph:
    """A graph with its estimator preparation, assignments and noise: reusable across runs."""

    net: object
    theta: np.ndarray
    prep: GraphPreparation
    W_all: np.ndarray  # (n, B) bool: 1 byte per cell, turned into float64 one batch at a time
    noise_all: np.ndarray
    covariates_all: np.ndarray | None = None  # (n, B, K) baseline covariates, when the scenario states any
    moments: ExposureMoments | None = None
    # With a measurement model: the true network in float32 (outcomes use it; ``prep`` is the observed one),
    # the survey, and the inclusion-weighted preparation of the centred HT estimator (augmented surveys).
    true_single: object | None = None
    observed: ObservedNetwork | None = None
    ht_prep: GraphPreparation | None = None
    # A clustered design: each cluster's arm per assignment (clusters, B; 0 = pure control);
    # a cluster random effect: its draws per cluster and assignment (clusters, B).
    arms_all: np.ndarray | None = None
    cluster_effects: np.ndarray | None = None
    cluster_effect_sd: float = 0.0
    contrast_cache: dict = field(default_factory=dict)  # saturation.contrast_truths' exposure expectations
    observed_all: np.ndarray | None = None  # (n, B) bool: outcomes observed, under attrition


def _estimands(g: _PreparedGraph, model: OutcomeModel, pi: float, scenario: Scenario | None = None) -> Estimands:
    """Exact estimands of ``model`` on the graph; O(1) per model for continuous outcomes."""
    if model.kind != "continuous":
        out = exact_estimands(g.net.degrees, g.theta, model, pi)
    else:
        if g.moments is None or g.moments.shape_key != (model.spillover_shape, float(model.saturation_rate), float(model.threshold)):
            g.moments = exposure_moments(g.net.degrees, g.theta, model, pi)
        out = estimands_from_moments(g.moments, model)
    if scenario is not None and scenario.design.saturation is not None:
        out = replace(out, contrasts=contrast_truths(scenario, model, g.net.degrees, g.theta, g.net.cluster_sizes, g.contrast_cache))
    return out


def contrast_truths(
    scenario: Scenario, model: OutcomeModel, degrees: np.ndarray, theta: np.ndarray, cluster_sizes: np.ndarray, cache: dict | None = None
) -> dict[str, float]:
    """Exact truths of a clustered design's planned contrasts on one graph (``saturation.contrast_truths``)."""
    design = scenario.design.saturation
    names = saturation.contrast_names(design)
    counts = saturation.arm_counts(design, len(cluster_sizes))
    return saturation.contrast_truths(model, design, names, degrees, theta, cluster_sizes, counts, cache)


def eigenvector_count(scenario: Scenario, point: DesignPoint, units: int) -> int | None:
    """How many adjacency eigenvectors the PC-balancing estimators project out (None: the eigenvalue rule).

    ``eigenvectors = "auto"`` follows METHODS.md §3.3: K for a K-block model
    (its expected adjacency has rank K), the eigenvalue rule otherwise
    (kernels, surveyed networks, a clustered population's union of
    networks).  A two-stage design's contrasts read no eigenvectors.
    """
    if scenario.design.saturation is not None:
        return 0
    stated = scenario.estimators.eigenvectors
    if stated is not None:
        return stated
    if isinstance(scenario.network, BlockModel) and not point.clusters:
        return min(scenario.network.n_blocks, max(units - 1, 0))
    return None


def _prepare(scenario: Scenario, point: DesignPoint, graph_index: int, batch_size: int = 16) -> _PreparedGraph:
    entropy = scenario.simulation.seed
    n = point.units
    # Before anything is drawn: a graph that cannot fit stops with the estimate, not an out-of-memory kill.
    check_memory(scenario, n, batch_size=batch_size)
    net = sample_point_network(scenario, point, graph_index)
    n = net.adjacency.shape[0]  # a clustered population's total varies with drawn cluster sizes
    theta = scenario.outcome.type_values(net.types, net.blocks)
    # The analyst's network: the survey's when the scenario measures it (METHODS.md §7), else the true one.
    observed = observed_network(scenario, net, n, graph_index)
    analysed = observed.adjacency if observed is not None else net.adjacency
    degrees = observed.degrees if observed is not None else net.degrees
    prep = prepare_graph(
        analysed,
        n_eigenvectors=eigenvector_count(scenario, point, n),
        mean_degree_hint=float(degrees.mean()) if n else 0.0,
        two_hop="two_hop" in scenario.estimators.direct_variance and n <= TWO_HOP_MAX_UNITS,
        check_input=False,  # graphs.to_csr builds symmetric 0/1 canonical CSR by construction
    )
    assign_rng, noise_rng, covariate_rng, cluster_rng, attrition_rng = _assignment_streams(entropy, point, graph_index)
    B = scenario.simulation.assignments_per_graph
    W_all, arms_all = draw_assignments(scenario, net, point, assign_rng)
    observed_all = None
    if scenario.measurement is not None and scenario.measurement.attrition:
        # Who keeps an outcome: a uniform per unit and assignment against the missing rate of its own arm.
        m = scenario.measurement
        missing = np.where(W_all, m.attrition_treated, m.attrition_control)
        observed_all = attrition_rng.random(W_all.shape) >= missing
    cluster_effects, sd = None, 0.0
    if point.clusters and scenario.outcome.cluster_icc > 0:
        sd = cluster_effect_sd(scenario.outcome, scenario.network, scenario.outcome.cluster_icc)
        cluster_effects = sd * cluster_rng.standard_normal((point.clusters, B))
    if scenario.outcome.kind == "continuous":
        noise_all = noise_rng.standard_normal((n, B))
    else:
        noise_all = noise_rng.random((n, B))  # uniforms, thresholded at the mean
    covariates_all = None
    if scenario.covariates is not None:
        # Baseline covariates share the type and the individual noise with the
        # outcome; they are the same for every run (common random numbers).
        zeta = latent_individual_scores(scenario.outcome.kind, noise_all)
        covariates_all = draw_covariates(scenario.covariates, theta, zeta, covariate_rng)
    true_single = ht_prep = None
    if observed is not None:
        true_single = net.adjacency.astype(np.float32)
        if scenario.measurement.augmented:
            # Only the HT estimator reads these fields: adjacency (weighted) and n_units.
            ht_prep = replace(prep, adjacency=inclusion_weights(observed, scenario.measurement))
    return _PreparedGraph(
        net, theta, prep, W_all, noise_all, covariates_all, true_single=true_single, observed=observed, ht_prep=ht_prep,
        arms_all=arms_all, cluster_effects=cluster_effects, cluster_effect_sd=sd, observed_all=observed_all,
    )


def example_network(scenario: Scenario, point: DesignPoint, graph_index: int = 0) -> tuple[SampledNetwork, np.ndarray]:
    """The network and first assignment the engine draws for graph ``graph_index`` of ``point``.

    Uses the engine's own streams (same layout as ``simulate_graph``), so a
    drawing in a report shows a network the simulation really used.  Returns
    the network and a boolean vector of treated units.
    """
    net = sample_point_network(scenario, point, graph_index)
    assign_rng = _assignment_streams(scenario.simulation.seed, point, graph_index)[0]
    # The whole (n, B) block is drawn as in _prepare so that column 0 is the engine's first assignment.
    treated = draw_assignments(scenario, net, point, assign_rng)[0][:, 0]
    return net, treated


def control_variance(model: OutcomeModel, theta: np.ndarray) -> float:
    """Variance of the outcome across units when nobody is treated (for effects in SD units)."""
    mean = model.mean_outcome(theta, np.zeros_like(theta), np.zeros_like(theta))
    if model.kind == "continuous":
        return float(np.var(mean) + model.noise_sd**2)
    return float(np.var(mean) + np.mean(mean * (1.0 - mean)))


def _buffers(value: object) -> list[np.ndarray]:
    if isinstance(value, np.ndarray):
        return [value]
    if hasattr(value, "data") and hasattr(value, "indices") and hasattr(value, "indptr"):
        return [value.data, value.indices, value.indptr]  # a sparse matrix
    return []


def _footprint(prepared: _PreparedGraph) -> int:
    """Bytes a cached graph holds: assignments, noise, adjacency and every array of the estimator preparation.

    Arrays that share memory (the float32 adjacency shares the index arrays,
    the preparation holds the sampled adjacency itself) are counted once.
    """
    prep = prepared.prep
    values = [getattr(prep, f) for f in getattr(prep, "__dataclass_fields__", {})]
    values += [prepared.covariates_all, prepared.W_all, prepared.noise_all, prepared.net.adjacency, prepared.theta, prepared.true_single]
    values += [prepared.arms_all, prepared.cluster_effects, prepared.observed_all]
    if prepared.ht_prep is not None:
        values.append(prepared.ht_prep.adjacency)
    seen: dict[tuple[int, int], int] = {}
    for value in values:
        for array in _buffers(value):
            base = array if array.base is None or not isinstance(array.base, np.ndarray) else array.base
            seen[(base.__array_interface__["data"][0], base.nbytes)] = base.nbytes
    return sum(seen.values())


class GraphCache:
    """Prepared graphs of one design point kept in memory between passes, within a byte budget.

    The solvers simulate the same graphs several times (null pass, then runs
    at candidate effects); resampling would give identical graphs, so keeping
    them only saves time and never changes a number.
    """

    def __init__(self, max_bytes: int = 400_000_000) -> None:
        self.max_bytes = max_bytes
        self._used = 0
        self._items: dict[tuple[DesignPoint, int], _PreparedGraph] = {}

    def get(self, scenario: Scenario, point: DesignPoint, graph_index: int, batch_size: int = 16) -> _PreparedGraph:
        key = (point, graph_index)
        if key in self._items:
            return self._items[key]
        prepared = _prepare(scenario, point, graph_index, batch_size)
        size = _footprint(prepared)
        if self._used + size <= self.max_bytes:
            self._items[key] = prepared
            self._used += size
        return prepared

    def forget(self, point: DesignPoint) -> None:
        for key in [k for k in self._items if k[0] == point]:
            self._used -= _footprint(self._items.pop(key))


def simulate_graph(
    scenario: Scenario,
    point: DesignPoint,
    graph_index: int,
    *,
    runs: Sequence[Run] | None = None,
    batch_size: int = 16,
    cache: GraphCache | None = None,
    keep_units: bool = False,
) -> GraphDraws:
    """Simulate one graph of a design point with all its assignments, for every run.

    ``runs`` defaults to ``power_runs(scenario)``.  Every run sees the same
    graph, assignments and noise (common random numbers).  ``batch_size``
    (columns processed at once) is a speed knob only: every random number is
    drawn before batching, and the estimators reduce each column on its own.
    """
    # One BLAS thread: eigen-solvers and dense products then reduce in the same order on every
    # machine, backend and worker count, so the numbers are identical, not close (a report
    # rebuilt in another process differed in the last digits with threaded OpenBLAS).
    batch_size = columns_per_batch(point.units, batch_size)
    with threadpool_limits(1):
        return _simulate_graph(scenario, point, graph_index, runs=runs, batch_size=batch_size, cache=cache, keep_units=keep_units)


#: Cells of one (units x columns) working array of a batch: about 32 MB of float64.
BATCH_CELLS = 4_000_000


def columns_per_batch(units: int, batch_size: int) -> int:
    """Assignment columns estimated at once: ``batch_size``, fewer on large networks.

    The estimators hold a few dozen (units x columns) arrays per batch; at
    10^6 units and 16 columns that was most of a 5.5 GB peak.  Fewer columns
    change no number (every random number is drawn before batching).
    """
    return max(1, min(int(batch_size), BATCH_CELLS // max(int(units), 1)))


def _simulate_graph(
    scenario: Scenario,
    point: DesignPoint,
    graph_index: int,
    *,
    runs: Sequence[Run] | None,
    batch_size: int,
    cache: GraphCache | None,
    keep_units: bool,
) -> GraphDraws:
    runs = power_runs(scenario) if runs is None else runs
    pi = point.treatment_probability
    g = cache.get(scenario, point, graph_index, batch_size) if cache is not None else _prepare(scenario, point, graph_index, batch_size)
    degrees = g.net.degrees
    n = len(degrees)
    available = planned_keys(scenario, point.units)
    run_keys = {
        run.label: [k for k in available if k[0] in run.estimands and (run.keys is None or k in run.keys)] for run in runs
    }
    draws = GraphDraws(
        runs={run.label: RunDraws(_estimands(g, run.model, pi, scenario)) for run in runs},
        mean_degree=float(degrees.mean()) if n else 0.0,
        share_isolated=float(np.mean(degrees == 0)) if n else 0.0,
        n_eigenvectors=g.prep.n_eigenvectors,
        min_shrinkage=g.prep.min_shrinkage,
        # With a cluster random effect the outcome's SD counts it too (effects in SD units, designcalc.clusters).
        control_variance=control_variance(scenario.outcome, g.theta) + g.cluster_effect_sd**2,
        degrees=degrees if keep_units else None,
        theta=g.theta if keep_units else None,
        cluster_sizes=g.net.cluster_sizes if keep_units else None,
    )
    safe_degrees = np.maximum(degrees, 1)[:, None]
    B = g.W_all.shape[1]
    chunks: dict[str, list[tuple[dict, dict]]] = {run.label: [] for run in runs}
    for start in range(0, B, batch_size):
        W = g.W_all[:, start : start + batch_size].astype(np.float64)
        noise = g.noise_all[:, start : start + batch_size]
        C = g.covariates_all[:, start : start + batch_size] if g.covariates_all is not None else None
        # One exact sparse product per batch (float32 counts, estimators.treated_neighbour_counts)
        # serves the outcomes and every exposure regression of every run.
        counts = treated_neighbour_counts(g.prep, W)
        if g.true_single is not None:
            # Outcomes happen on the true network; ``counts`` (the estimators' exposure) on the observed one.
            # 0/1 products are integers below 2^24, exact in float32 (estimators.treated_neighbour_counts).
            X = (g.true_single @ np.ascontiguousarray(W, dtype=np.float32)).astype(np.float64) / safe_degrees
        else:
            X = counts / safe_degrees
        exposure: list[np.ndarray] = []
        arms = g.arms_all[:, start : start + batch_size] if g.arms_all is not None else None
        seen = g.observed_all[:, start : start + batch_size] if g.observed_all is not None else None
        if g.cluster_effects is not None:
            # Every unit shares its cluster's effect (contiguous clusters, designcalc.clusters).
            shift = np.repeat(g.cluster_effects[:, start : start + batch_size], g.net.cluster_sizes, axis=0)

        def batch_exposure(W: np.ndarray = W, counts: np.ndarray = counts, exposure: list[np.ndarray] = exposure) -> np.ndarray:
            if not exposure:
                exposure.append(treated_neighbour_fraction(g.prep, W, counts=counts))
            return exposure[0]

        for run in runs:
            if not run_keys[run.label]:
                continue  # a run kept for its exact estimands only
            Y = _outcomes(run.model, g.theta, W, X, noise)
            if g.cluster_effects is not None:
                Y += shift
            if arms is not None:
                batches = _run_contrasts(scenario, W, Y, g.net.cluster_sizes, arms, run_keys[run.label])
            else:
                batches = _run_estimators(scenario, g.prep, W, Y, pi, run_keys[run.label], draws.failures, C, batch_exposure, g.ht_prep, seen)
            chunks[run.label].append(({k: v.estimate for k, v in batches.items()}, {k: v.standard_error for k, v in batches.items()}))
    for run in runs:
        if not run_keys[run.label]:
            continue
        target = draws.runs[run.label]
        for key in run_keys[run.label]:
            target.estimates[key] = np.concatenate([c[0][key] for c in chunks[run.label]])
            target.standard_errors[key] = np.concatenate([c[1][key] for c in chunks[run.label]])
    return draws


def simulate_design_point(
    scenario: Scenario,
    point: DesignPoint,
    *,
    runs: Sequence[Run] | None = None,
    batch_size: int = 16,
    progress: Callable[[], None] | None = None,
    graph_indices: range | None = None,
    cache: GraphCache | None = None,
    keep_units: bool = False,
) -> list[GraphDraws]:
    """All graphs of one design point, in graph order."""
    indices = graph_indices if graph_indices is not None else range(scenario.simulation.graphs)
    out = []
    for g in indices:
        out.append(simulate_graph(scenario, point, g, runs=runs, batch_size=batch_size, cache=cache, keep_units=keep_units))
        if progress is not None:
            progress()
    return out

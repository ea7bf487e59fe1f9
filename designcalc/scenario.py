"""Scenario files: TOML in, frozen typed objects out, every mistake named.

A scenario states the population, the network model and its density rule,
the outcome model, the design, the planned estimators and the simulation
settings.  ``load_scenario(path)`` validates everything at once, at this
boundary; the rest of the package trusts what it returns.  Every error names
the file, the dotted key, what is allowed and what was received, and offers
a fix when one is likely ("did you mean ...").
"""

from __future__ import annotations

import difflib
import hashlib
import math
import tomllib
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

from designcalc.clusters import MAX_CLUSTERS, ClusterSizes
from designcalc.covariates import (
    Covariate,
    CovariateError,
    CovariateLoadings,
    covariate_loadings,
)
from designcalc.density import DensityRule
from designcalc.edge_models import KERNEL_FAMILIES, BlockModel, EdgeModel, KernelModel
from designcalc.errors import DesignCalcError, ScenarioError
from designcalc.measurement import CAP_RULES, SYMMETRISE_RULES, MeasurementModel
from designcalc.outcomes import SPILLOVER_SHAPES, OutcomeModel
from designcalc.saturation import (
    CONTRAST_KINDS,
    WITHIN_RULES,
    SaturationDesign,
    check_cluster_sizes,
    check_clusters,
    contrast_names,
)
from designcalc.surveyed import TYPE_RULES, SurveyedNetwork, load_surveyed_network

__all__ = [
    "ADJUSTED_ESTIMATORS",
    "ALTERNATIVES",
    "DIRECT_ESTIMATORS",
    "DIRECT_VARIANCES",
    "REFERENCE_DISTRIBUTIONS",
    "SPILLOVER_ESTIMATORS",
    "Design",
    "EstimatorPlan",
    "ExecutionSettings",
    "Population",
    "Scenario",
    "SimulationSettings",
    "load_scenario",
    "parse_scenario",
]

DIRECT_ESTIMATORS = ("hajek", "horvitz_thompson", "lin")
DIRECT_VARIANCES = ("neyman", "two_hop", "two_hop_psd")
SPILLOVER_ESTIMATORS = (
    "pc_balancing_corrected", "pc_balancing", "centred_ht", "exposure_regression",
    "pc_balancing_corrected_adjusted", "pc_balancing_adjusted", "centred_ht_adjusted", "exposure_regression_adjusted",
)
#: Estimators that use the baseline covariates (they need a [[covariates]] entry).
ADJUSTED_ESTIMATORS = ("lin",) + tuple(name for name in SPILLOVER_ESTIMATORS if name.endswith("_adjusted"))
_MAX_COVARIATES = 10
ALTERNATIVES = ("two-sided", "greater", "less")
REFERENCE_DISTRIBUTIONS = ("auto", "normal")

_MAX_UNITS = 2_000_000
_MAX_REPLICATES = 10_000_000


@dataclass(frozen=True)
class Population:
    """One network of each planned size, or a clustered population (``designcalc.clusters``).

    ``max_units`` bounds the search of ``designcalc size``; 0 means the
    default, 16 times the largest planned size (at most the hard limit).
    A clustered population plans each number of clusters in ``clusters``,
    sized by ``cluster_sizes``; its ``units`` are the nominal totals
    (clusters times the mean cluster size), one per entry of ``clusters``.
    """

    units: tuple[int, ...]
    max_units: int = 0
    clusters: tuple[int, ...] = ()
    cluster_sizes: ClusterSizes | None = None
    max_clusters: int = 0

    @property
    def clustered(self) -> bool:
        return bool(self.clusters)

    @property
    def search_limit(self) -> int:
        return self.max_units or min(16 * max(self.units), _MAX_UNITS)

    @property
    def cluster_search_limit(self) -> int:
        return self.max_clusters or min(16 * max(self.clusters), MAX_CLUSTERS)

    def nominal_units(self, clusters: int, cluster_size: int = 0) -> int:
        """The nominal total of ``clusters`` clusters (of ``cluster_size`` each, when a solver fixes it)."""
        assert self.cluster_sizes is not None
        return int(round(clusters * (cluster_size or self.cluster_sizes.nominal)))


@dataclass(frozen=True)
class Design:
    """Bernoulli assignment at one or more treatment probabilities, and the test settings.

    ``saturation`` is set for a two-stage (randomized saturation or
    cluster-randomized) design on a clustered population; its one treatment
    probability is then the design's expected share treated.
    """

    treatment_probabilities: tuple[float, ...]
    significance_level: float = 0.05
    target_power: float = 0.8
    alternative: str = "two-sided"
    reference_distribution: str = "auto"
    saturation: SaturationDesign | None = None


@dataclass(frozen=True)
class EstimatorPlan:
    """Which estimators and variance estimators the analysis will use."""

    direct: tuple[str, ...] = ("hajek",)
    direct_variance: tuple[str, ...] = ("neyman",)
    spillover: tuple[str, ...] = ("pc_balancing_corrected", "centred_ht")
    centre: float = 0.0
    eigenvectors: int | None = None  # None: the eigenvalue rule of METHODS.md §3.3
    contrasts: tuple[str, ...] = ()  # a clustered design's contrast kinds (designcalc.saturation)
    # Not a scenario key: a run may restrict itself to some planned tests
    # (engine.restrict_tests; the report's key answers).  None: every one.
    only_tests: frozenset[tuple[str, str, str]] | None = None


@dataclass(frozen=True)
class SimulationSettings:
    """Monte Carlo settings: graphs per design point, assignments per graph, root seed."""

    graphs: int = 40
    assignments_per_graph: int = 25
    seed: int = 1
    relative_precision: float = 0.03
    max_graphs: int = 1000

    @property
    def replicates(self) -> int:
        return self.graphs * self.assignments_per_graph


@dataclass(frozen=True)
class ExecutionSettings:
    """Where and how to run (``[execution]``); never changes a number.

    ``store`` is a path (relative paths are relative to the scenario file's
    folder once loaded from a file), ``False`` for no store, or ``None`` for
    the default (``designcalc.store.default_store_path``).  Command-line
    options win over these.
    """

    workers: int | None = None
    cluster: str | None = None
    store: str | bool | None = None


@dataclass(frozen=True)
class Scenario:
    """A validated scenario: everything the engine needs, nothing unchecked."""

    name: str
    description: str
    population: Population
    network: EdgeModel
    density: DensityRule
    outcome: OutcomeModel
    design: Design
    estimators: EstimatorPlan
    simulation: SimulationSettings
    covariates: CovariateLoadings | None = None  # None: no baseline covariates
    execution: ExecutionSettings = ExecutionSettings()
    measurement: MeasurementModel | None = None  # None: estimators see the true network
    source: str = "<scenario>"
    sha256: str = ""
    text: str = field(default="", repr=False)

    @property
    def n_covariates(self) -> int:
        """How many baseline covariates the scenario states."""
        return self.covariates.count if self.covariates is not None else 0


# ---------------------------------------------------------------------------
# A small reader that tracks which keys were used, so that unknown keys can be
# reported with a "did you mean" suggestion.
# ---------------------------------------------------------------------------
_MISSING: Any = object()


def _describe_type(value: object) -> str:
    if isinstance(value, bool):
        return "true/false"
    if isinstance(value, (int, float)):
        return "a number"
    if isinstance(value, str):
        return "text"
    if isinstance(value, list):
        return "a list"
    if isinstance(value, dict):
        return "a table"
    return type(value).__name__


class _Table:
    """One TOML table with its dotted path; hands out validated values."""

    def __init__(self, data: dict[str, Any], path: str, file: str, known: Sequence[str]) -> None:
        self.data = data
        self.path = path
        self.file = file
        self.known = tuple(known)
        self.used: set[str] = set()

    def key(self, name: str) -> str:
        return f"{self.path}.{name}" if self.path else name

    def error(self, name: str, message: str, *, allowed: str = "", received: object = None, hint: str = "") -> ScenarioError:
        return ScenarioError(message, file=self.file, key=self.key(name), allowed=allowed, received=received, hint=hint)

    def has(self, name: str) -> bool:
        return name in self.data

    def raw(self, name: str, default: Any = _MISSING) -> Any:
        self.used.add(name)
        if name in self.data:
            return self.data[name]
        if default is _MISSING:
            raise self.error(name, "this key is required but missing", hint=f"add `{name} = ...` to the [{self.path or 'top'}] table")
        return default

    def number(
        self,
        name: str,
        default: Any = _MISSING,
        *,
        low: float | None = None,
        high: float | None = None,
        low_open: bool = False,
        high_open: bool = False,
        integer: bool = False,
    ) -> Any:
        if name not in self.data and default is not _MISSING:
            self.used.add(name)
            return default
        value = self.raw(name)
        return self.check_number(name, value, low=low, high=high, low_open=low_open, high_open=high_open, integer=integer)

    def check_number(
        self,
        name: str,
        value: Any,
        *,
        low: float | None = None,
        high: float | None = None,
        low_open: bool = False,
        high_open: bool = False,
        integer: bool = False,
    ) -> Any:
        allowed = _range_text(low, high, low_open, high_open, integer)
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            hint = ""
            if isinstance(value, str):
                try:
                    float(value)
                    hint = "write the number without quotes"
                except ValueError:
                    pass
            raise self.error(name, f"must be {'a whole number' if integer else 'a number'}, not {_describe_type(value)}", allowed=allowed, received=value, hint=hint)
        if integer and (isinstance(value, float) and not value.is_integer()):
            raise self.error(name, "must be a whole number", allowed=allowed, received=value)
        if isinstance(value, float) and not math.isfinite(value):
            raise self.error(name, "must be a finite number", allowed=allowed, received=value)
        below = low is not None and (value <= low if low_open else value < low)
        above = high is not None and (value >= high if high_open else value > high)
        if below or above:
            raise self.error(name, "is out of range", allowed=allowed, received=value)
        return int(value) if integer else float(value)

    def text(self, name: str, default: Any = _MISSING) -> Any:
        if name not in self.data and default is not _MISSING:
            self.used.add(name)
            return default
        value = self.raw(name)
        if not isinstance(value, str):
            raise self.error(name, f"must be text in quotes, not {_describe_type(value)}", received=value)
        return value

    def choice(self, name: str, choices: Sequence[str], default: Any = _MISSING) -> Any:
        if name not in self.data and default is not _MISSING:
            self.used.add(name)
            return default
        value = self.raw(name)
        return self.check_choice(name, value, choices)

    def check_choice(self, name: str, value: Any, choices: Sequence[str]) -> str:
        allowed = "one of " + ", ".join(f'"{c}"' for c in choices)
        if not isinstance(value, str):
            raise self.error(name, f"must be text in quotes, not {_describe_type(value)}", allowed=allowed, received=value)
        if value not in choices:
            close = difflib.get_close_matches(value, choices, n=1, cutoff=0.6)
            raise self.error(name, "is not a recognised option", allowed=allowed, received=value, hint=f'did you mean "{close[0]}"?' if close else "")
        return value

    def number_list(self, name: str, default: Any = _MISSING, *, allow_scalar: bool = True, min_length: int = 1, **limits: Any) -> Any:
        if name not in self.data and default is not _MISSING:
            self.used.add(name)
            return default
        value = self.raw(name)
        if allow_scalar and isinstance(value, (int, float)) and not isinstance(value, bool):
            value = [value]
        if not isinstance(value, list):
            raise self.error(name, f"must be a list of numbers, not {_describe_type(value)}", received=value, hint=f"write it as `{name} = [ ... ]`")
        if len(value) < min_length:
            raise self.error(name, f"must hold at least {min_length} value{'s' if min_length > 1 else ''}", received=value)
        return tuple(self.check_number(f"{name}[{i}]", v, **limits) for i, v in enumerate(value))

    def choice_list(self, name: str, choices: Sequence[str], default: Any = _MISSING) -> Any:
        if name not in self.data and default is not _MISSING:
            self.used.add(name)
            return default
        value = self.raw(name)
        if isinstance(value, str):
            value = [value]
        if not isinstance(value, list) or not value:
            raise self.error(name, "must be a non-empty list of names", allowed="a list drawn from " + ", ".join(f'"{c}"' for c in choices), received=value)
        out = tuple(self.check_choice(f"{name}[{i}]", v, choices) for i, v in enumerate(value))
        if len(set(out)) != len(out):
            raise self.error(name, "lists the same name twice", received=value)
        return out

    def table(self, name: str, known: Sequence[str], *, required: bool = True) -> _Table | None:
        self.used.add(name)
        if name not in self.data:
            if required:
                raise self.error(name, "this table is required but missing", hint=f"add a [{self.key(name)}] table")
            return None
        value = self.data[name]
        if not isinstance(value, dict):
            raise self.error(name, f"must be a table, not {_describe_type(value)}", received=value, hint=f"write it as a [{self.key(name)}] section")
        return _Table(value, self.key(name), self.file, known)

    def finish(self) -> None:
        """Reject keys that no reader asked for, with a suggestion."""
        for name in self.data:
            if name in self.used:
                continue
            close = difflib.get_close_matches(name, self.known, n=1, cutoff=0.6)
            hint = f"did you mean `{close[0]}`?" if close else ""
            allowed = "known keys here: " + ", ".join(self.known)
            raise ScenarioError("is not a key designcalc knows", file=self.file, key=self.key(name), allowed=allowed, hint=hint)


def _range_text(low: float | None, high: float | None, low_open: bool, high_open: bool, integer: bool) -> str:
    kind = "a whole number" if integer else "a number"
    if low is None and high is None:
        return kind
    if high is None:
        return f"{kind} {'>' if low_open else '>='} {low:g}"
    if low is None:
        return f"{kind} {'<' if high_open else '<='} {high:g}"
    left = "(" if low_open else "["
    right = ")" if high_open else "]"
    return f"{kind} in {left}{low:g}, {high:g}{right}"


# ---------------------------------------------------------------------------
# Section readers
# ---------------------------------------------------------------------------
_TOP_KEYS = ("scenario", "population", "network", "outcome", "covariates", "design", "estimators", "simulation", "execution", "measurement")
_MEASUREMENT_KEYS = (
    "contact_cap", "cap_rule", "symmetrise", "tie_recall", "non_response", "false_ties", "augmented",
    "attrition", "attrition_treated", "attrition_control",
)
# Estimators that analyse complete cases when outcomes are missing (``engine._run_estimators``).
_ATTRITION_ESTIMATORS = ("hajek", "horvitz_thompson", "centred_ht", "pc_balancing", "pc_balancing_corrected")
_EXECUTION_KEYS = ("workers", "cluster", "store")
_COVARIATE_KEYS = ("name", "r_squared", "through_type")
_SCENARIO_KEYS = ("name", "description")
_POPULATION_KEYS = ("units", "max_units", "clusters", "cluster_size", "cluster_sizes", "max_clusters")
_CLUSTER_SIZE_KEYS = ("mean", "sd", "low", "high")
_NETWORK_KEYS = (
    "model", "block_shares", "block_affinity", "kernel", "degree_ratio", "length_scale", "floor", "amplitudes", "expression",
    "density", "edges", "types",
)
_BLOCK_AND_KERNEL_KEYS = ("block_shares", "block_affinity", "kernel", "degree_ratio", "length_scale", "floor", "amplitudes", "expression")
_DENSITY_KEYS = ("mean_degree", "reference_units", "growth_exponent")
_OUTCOME_KEYS = (
    "kind", "baseline", "type_effect", "block_effects", "noise_sd", "direct_effect", "spillover_effect",
    "spillover_shape", "saturation_rate", "threshold", "interaction", "link", "exposure", "cluster_icc",
)
_DESIGN_KEYS = (
    "assignment", "treatment_probability", "significance_level", "target_power", "alternative", "reference_distribution",
    "treated_cluster_share", "pure_control_share", "saturations", "saturation_shares", "within",
)
ASSIGNMENTS = ("bernoulli", "cluster", "saturation")
_ESTIMATOR_KEYS = ("direct", "direct_variance", "spillover", "centre", "eigenvectors", "contrasts")
_SIMULATION_KEYS = ("graphs", "assignments_per_graph", "seed", "relative_precision", "max_graphs")


def _read_population(top: _Table, network: EdgeModel) -> Population:
    if isinstance(network, SurveyedNetwork):
        return _surveyed_population(top, network)
    t = top.table("population", _POPULATION_KEYS)
    assert t is not None
    if t.has("clusters") or t.has("cluster_sizes") or t.has("cluster_size"):
        return _clustered_population(t)
    units = t.number_list("units", low=4, high=_MAX_UNITS, integer=True)
    if len(set(units)) != len(units):
        raise t.error("units", "lists the same size twice", received=list(units))
    max_units = t.number("max_units", 0, low=0, high=_MAX_UNITS, integer=True)
    if max_units and max_units < max(units):
        raise t.error("max_units", f"must be at least the largest planned size ({max(units)})", received=max_units)
    t.finish()
    return Population(units=tuple(sorted(units)), max_units=max_units)


def _clustered_population(t: _Table) -> Population:
    """``clusters`` with ``cluster_size`` (a number or a {mean, sd, low, high} table), or ``cluster_sizes`` (each stated)."""
    for name in ("units", "max_units"):
        if t.has(name):
            raise t.error(name, "has no use in a clustered population: state clusters and cluster_size", hint="remove it; max_clusters bounds the size search")
    if t.has("cluster_sizes"):
        if t.has("cluster_size"):
            raise t.error("cluster_size", "conflicts with cluster_sizes (each cluster stated): keep one", hint="remove one of them")
        stated = t.number_list("cluster_sizes", low=4, high=_MAX_UNITS, integer=True, allow_scalar=False, min_length=2)
        if t.has("clusters") and tuple(t.number_list("clusters", low=2, high=MAX_CLUSTERS, integer=True)) != (len(stated),):
            raise t.error("clusters", f"must be the number of sizes listed in cluster_sizes ({len(stated)}), or left out", received=t.raw("clusters"))
        if t.has("max_clusters"):
            raise t.error("max_clusters", "has no use when every cluster's size is stated (their number is fixed)", hint="remove it, or give cluster_size instead")
        sizes = ClusterSizes("list", sizes=tuple(stated))
        clusters: tuple[int, ...] = (len(stated),)
        max_clusters = len(stated)
    else:
        clusters = tuple(sorted(t.number_list("clusters", low=2, high=MAX_CLUSTERS, integer=True)))
        if len(set(clusters)) != len(clusters):
            raise t.error("clusters", "lists the same number twice", received=list(clusters))
        sizes = _cluster_size_rule(t)
        max_clusters = t.number("max_clusters", 0, low=0, high=MAX_CLUSTERS, integer=True)
        if max_clusters and max_clusters < max(clusters):
            raise t.error("max_clusters", f"must be at least the largest planned number of clusters ({max(clusters)})", received=max_clusters)
    if any(c * sizes.largest > _MAX_UNITS for c in clusters):
        raise t.error("clusters", f"clusters times the largest cluster size must be at most {_MAX_UNITS:,} units", received=list(clusters))
    t.finish()
    units = tuple(int(round(c * sizes.nominal)) for c in clusters)
    return Population(units=units, clusters=clusters, cluster_sizes=sizes, max_clusters=max_clusters)


def _cluster_size_rule(t: _Table) -> ClusterSizes:
    raw = t.raw("cluster_size")
    if not isinstance(raw, dict):
        size = t.check_number("cluster_size", raw, low=4, high=_MAX_UNITS, integer=True)
        return ClusterSizes("fixed", size=size)
    d = _Table(raw, t.key("cluster_size"), t.file, _CLUSTER_SIZE_KEYS)
    if d.has("mean"):
        mean = d.number("mean", low=4, high=_MAX_UNITS)
        sd = d.number("sd", low=0, high=_MAX_UNITS)
        low = d.number("low", 4, low=4, high=_MAX_UNITS, integer=True)
        high = d.number("high", int(math.ceil(mean + 4 * sd)), low=4, high=_MAX_UNITS, integer=True)
        kind = "normal"
    else:
        mean = sd = 0.0
        low = d.number("low", low=4, high=_MAX_UNITS, integer=True)
        high = d.number("high", low=4, high=_MAX_UNITS, integer=True)
        kind = "uniform"
    if high < low:
        raise d.error("high", f"must be at least low ({low})", received=high)
    if kind == "normal" and not low <= mean <= high:
        raise d.error("mean", f"must lie within [low, high] = [{low}, {high}]", received=mean)
    if kind == "normal" and sd > 0:
        # Sizes are redrawn until they fall in [low, high]: that must happen often enough to be drawn at all.
        def phi(z: float) -> float:
            return 0.5 * (1.0 + math.erf(z / math.sqrt(2.0)))

        inside = phi((high + 0.5 - mean) / sd) - phi((low - 0.5 - mean) / sd)
        if inside < 1e-3:
            raise d.error("sd", f"is so large that a size in [low, high] = [{low}, {high}] is almost never drawn (chance {inside:.2g})", received=sd, hint="use a smaller sd, or { low, high } for equally likely sizes")
    d.finish()
    return ClusterSizes(kind, mean=mean, sd=sd, low=low, high=high)


def _surveyed_population(top: _Table, network: SurveyedNetwork) -> Population:
    """A surveyed network is the population: its size is the only size (``[population]`` may restate it)."""
    n = network.n_units
    t = top.table("population", _POPULATION_KEYS, required=False)
    if t is not None:
        units = t.number_list("units", (n,), low=4, high=_MAX_UNITS, integer=True)
        if tuple(units) != (n,):
            raise t.error(
                "units", f"must be the surveyed network's size, {n}: the network is held fixed", received=list(units),
                hint="leave [population] out; to plan other sizes, fit an edge model to the survey (designcalc fit)",
            )
        if t.has("max_units"):
            raise t.error("max_units", "has no use with a surveyed network (its size is fixed)", hint="remove it")
        for name in ("clusters", "cluster_size", "cluster_sizes", "max_clusters"):
            if t.has(name):
                raise t.error(name, "has no use with a surveyed network: its size and villages are fixed by the edge lists", hint="remove it")
        t.finish()
    return Population(units=(n,), max_units=n)


def _read_surveyed(t: _Table, folder: Path) -> tuple[SurveyedNetwork, DensityRule]:
    raw = t.raw("edges")
    files = [raw] if isinstance(raw, str) else raw
    if not isinstance(files, list) or not files or not all(isinstance(f, str) and f.strip() for f in files):
        raise t.error("edges", "must be an edge-list file name in quotes, or a list of them (one per village)", received=raw)
    paths = [Path(f).expanduser() if Path(f).expanduser().is_absolute() else folder / f for f in files]
    if len({p.resolve() for p in paths}) != len(paths):  # "v1.csv" and "./v1.csv" are one village
        raise t.error("edges", "names the same file twice", received=raw)
    types = t.choice("types", TYPE_RULES, "random")
    for name in _BLOCK_AND_KERNEL_KEYS:
        if t.has(name):
            raise t.error(name, 'has no use with model = "surveyed": the network is the survey itself', hint="remove it")
    if t.has("density"):
        raise t.error("density", 'has no use with model = "surveyed": the survey fixes the density', hint="remove the [network.density] table")
    try:
        network = load_surveyed_network(paths, types=types, names=files)
    except DesignCalcError as exc:
        raise t.error("edges", str(exc)) from None
    if network.mean_degree() <= 0:
        raise t.error("edges", "the surveyed network has no ties: there is nothing to spill over", received=raw)
    t.finish()
    # The rule only records the observed level (check and the report show it); nothing is sampled from it.
    return network, DensityRule(mean_degree=network.mean_degree(), reference_units=network.n_units, growth_exponent=0.0)


def _wrap_model_error(t: _Table, key: str, build: Callable[[], Any]) -> Any:
    try:
        return build()
    except DesignCalcError as exc:
        if isinstance(exc, ScenarioError):
            raise
        raise t.error(key, str(exc)) from None


def _read_network(top: _Table, folder: Path) -> tuple[EdgeModel, DensityRule]:
    t = top.table("network", _NETWORK_KEYS)
    assert t is not None
    model = t.choice("model", ("blocks", "kernel", "surveyed"))
    edge_model: EdgeModel
    for name in ("edges", "types"):
        if model != "surveyed" and t.has(name):
            raise t.error(name, f'belongs to a surveyed network (model = "surveyed"), but model = "{model}"', hint="remove it")
    if model == "surveyed":
        return _read_surveyed(t, folder)
    if model == "blocks":
        shares = t.number_list("block_shares", low=0, high=1, low_open=True, allow_scalar=False)
        if abs(sum(shares) - 1) > 1e-6:
            raise t.error("block_shares", f"must sum to 1; they sum to {sum(shares):.6g}", received=list(shares), hint="divide each share by their sum")
        raw = t.raw("block_affinity")
        k = len(shares)
        if not isinstance(raw, list) or len(raw) != k or not all(isinstance(r, list) for r in raw):
            raise t.error("block_affinity", f"must be a {k} x {k} list of lists (one row per block)", received=raw)
        rows = []
        for i, row in enumerate(raw):
            if len(row) != k:
                raise t.error(f"block_affinity[{i}]", f"must hold {k} numbers, one per block", received=row)
            rows.append(tuple(t.check_number(f"block_affinity[{i}][{j}]", v, low=0) for j, v in enumerate(row)))
        for i in range(k):
            for j in range(i + 1, k):
                if not math.isclose(rows[i][j], rows[j][i], rel_tol=1e-12, abs_tol=1e-15):
                    raise t.error(
                        f"block_affinity[{i}][{j}]",
                        f"the affinity matrix must be symmetric: [{i}][{j}] = {rows[i][j]:g} but [{j}][{i}] = {rows[j][i]:g}",
                        hint="links are undirected; make the two entries equal",
                    )
        edge_model = _wrap_model_error(t, "block_affinity", lambda: BlockModel(shares=tuple(shares), affinity=tuple(rows)))
        for name in ("kernel", "degree_ratio", "length_scale", "floor", "amplitudes", "expression"):
            if t.has(name):
                raise t.error(name, "belongs to a kernel model, but model = \"blocks\"", hint="remove it, or set model = \"kernel\"")
    else:
        family = t.choice("kernel", tuple(KERNEL_FAMILIES))
        for name in ("block_shares", "block_affinity"):
            if t.has(name):
                raise t.error(name, "belongs to a block model, but model = \"kernel\"", hint="remove it, or set model = \"blocks\"")
        params: dict[str, Any] = {}
        for other_family, names in KERNEL_FAMILIES.items():
            for name in names:
                if other_family != family and name not in KERNEL_FAMILIES[family] and t.has(name):
                    raise t.error(name, f"is not a parameter of the '{family}' kernel", allowed=", ".join(KERNEL_FAMILIES[family]))
        if family == "degree_gradient":
            params["degree_ratio"] = t.number("degree_ratio", low=1, high=1e6)
        elif family == "distance_decay":
            params["length_scale"] = t.number("length_scale", low=0, high=100, low_open=True)
            params["floor"] = t.number("floor", 0.0, low=0, high=1e6)
        elif family == "cosine":
            params["amplitudes"] = t.number_list("amplitudes", low=-1, high=1)
        else:
            params["expression"] = t.text("expression")
        edge_model = _wrap_model_error(
            t, KERNEL_FAMILIES[family][0], lambda: KernelModel(family=family, **params)
        )
    d = t.table("density", _DENSITY_KEYS)
    assert d is not None
    mean_degree = d.number("mean_degree", low=0, high=1e6, low_open=True)
    reference = d.number("reference_units", low=2, high=_MAX_UNITS, integer=True)
    gamma = d.number("growth_exponent", 0.0, low=0, high=1)
    if mean_degree >= reference - 1:
        raise d.error("mean_degree", f"must be below reference_units - 1 = {reference - 1} (a unit cannot link to more than everyone else)", received=mean_degree)
    d.finish()
    t.finish()
    return edge_model, DensityRule(mean_degree=mean_degree, reference_units=reference, growth_exponent=gamma)


def _read_outcome(top: _Table, network: EdgeModel) -> OutcomeModel:
    t = top.table("outcome", _OUTCOME_KEYS)
    assert t is not None
    kind = t.choice("kind", ("continuous", "binary"), "continuous")
    t.choice("exposure", ("fraction",), "fraction")
    shape = t.choice("spillover_shape", SPILLOVER_SHAPES, "linear")
    values: dict[str, Any] = {"kind": kind, "spillover_shape": shape}
    if kind == "binary":
        values["link"] = t.choice("link", ("identity", "logistic"), "identity")
        if t.has("cluster_icc"):
            raise t.error("cluster_icc", "is modelled for continuous outcomes only (a normal cluster effect)", hint="remove it, or set kind = \"continuous\"")
        if t.has("noise_sd"):
            raise t.error("noise_sd", "applies to continuous outcomes only; binary outcomes draw their own noise", hint="remove it, or set kind = \"continuous\"")
        if values["link"] == "identity":
            values["baseline"] = t.number("baseline", low=0, high=1)
        else:
            values["baseline"] = t.number("baseline", low=-50, high=50)
    else:
        if t.has("link"):
            raise t.error("link", "applies to binary outcomes only", hint="remove it, or set kind = \"binary\"")
        values["baseline"] = t.number("baseline", 0.0, low=-1e12, high=1e12)
        values["noise_sd"] = t.number("noise_sd", low=0, high=1e12)
        values["cluster_icc"] = t.number("cluster_icc", 0.0, low=0, high=1, high_open=True)
    big = 1e12
    values["direct_effect"] = t.number("direct_effect", low=-big, high=big)
    values["spillover_effect"] = t.number("spillover_effect", low=-big, high=big)
    values["interaction"] = t.number("interaction", 0.0, low=-big, high=big)
    if shape == "saturating":
        values["saturation_rate"] = t.number("saturation_rate", 4.0, low=0, high=200, low_open=True)
    elif t.has("saturation_rate"):
        raise t.error("saturation_rate", f"applies only to spillover_shape = \"saturating\" (here \"{shape}\")", hint="remove it")
    if shape == "threshold":
        values["threshold"] = t.number("threshold", low=0, high=1, low_open=True)
    elif t.has("threshold"):
        raise t.error("threshold", f"applies only to spillover_shape = \"threshold\" (here \"{shape}\")", hint="remove it")
    if t.has("type_effect"):
        text = t.text("type_effect")
        _wrap_model_error(t, "type_effect", lambda: OutcomeModel(type_effect=text))
        values["type_effect"] = text
    if t.has("block_effects"):
        if not isinstance(network, (BlockModel, SurveyedNetwork)):
            raise t.error("block_effects", "needs a block model (network.model = \"blocks\")", hint="use type_effect, an expression in u, for kernels")
        effects = t.number_list("block_effects", low=-big, high=big, allow_scalar=False)
        if len(effects) != network.n_blocks:
            raise t.error("block_effects", f"must hold one value per block ({network.n_blocks})", received=list(effects))
        values["block_effects"] = effects
    t.finish()
    return _wrap_model_error(t, "kind", lambda: OutcomeModel(**values))


_SATURATION_KEYS = ("treated_cluster_share", "pure_control_share", "saturations", "saturation_shares", "within")


def _read_design(top: _Table, population: Population) -> Design:
    t = top.table("design", _DESIGN_KEYS)
    assert t is not None
    assignment = t.choice("assignment", ASSIGNMENTS, "bernoulli")
    if assignment != "bernoulli" and not population.clustered:
        raise t.error(
            "assignment", f'"{assignment}" assigns whole clusters, but the population is one network',
            hint="state [population] clusters and cluster_size, or use assignment = \"bernoulli\"",
        )
    saturation = None
    if assignment == "bernoulli":
        for name in _SATURATION_KEYS:
            if t.has(name):
                raise t.error(name, 'applies to assignment = "cluster" or "saturation" only', hint="remove it, or choose a clustered assignment")
        probs = t.number_list("treatment_probability", low=0, high=1, low_open=True, high_open=True)
        if len(set(probs)) != len(probs):
            raise t.error("treatment_probability", "lists the same probability twice", received=list(probs))
    else:
        if t.has("treatment_probability"):
            raise t.error(
                "treatment_probability", f'has no use with assignment = "{assignment}": the design\'s arms set who is treated',
                hint="use treated_cluster_share (cluster) or pure_control_share and saturations (saturation)",
            )
        saturation = _read_saturation(t, assignment)
        probs = (saturation.mean_saturation,)
    alpha = t.number("significance_level", 0.05, low=0, high=0.5, low_open=True, high_open=True)
    power = t.number("target_power", 0.8, low=0, high=1, low_open=True, high_open=True)
    alternative = t.choice("alternative", ALTERNATIVES, "two-sided")
    reference = t.choice("reference_distribution", REFERENCE_DISTRIBUTIONS, "auto")
    t.finish()
    if saturation is not None:
        for c in population.clusters:
            try:
                check_clusters(saturation, c)
            except DesignCalcError as exc:
                raise ScenarioError(str(exc), file=t.file, key="population.clusters", received=c, hint="plan more clusters, or give the small arms larger shares") from None
        sizes = population.cluster_sizes
        try:
            if sizes.kind == "list":
                for m in sorted(set(sizes.sizes)):
                    check_cluster_sizes(saturation, m, m)
            else:
                check_cluster_sizes(saturation, sizes.smallest, sizes.largest)
        except DesignCalcError as exc:
            raise ScenarioError(str(exc), file=t.file, key="design.saturations", received=list(saturation.saturations), hint="raise the smallest cluster size (population.cluster_size), or move the saturation away from 0 and 1") from None
    return Design(tuple(sorted(probs)), alpha, power, alternative, reference, saturation)


def _read_saturation(t: _Table, assignment: str) -> SaturationDesign:
    if assignment == "cluster":
        for name in ("pure_control_share", "saturations", "saturation_shares", "within"):
            if t.has(name):
                raise t.error(name, 'applies to assignment = "saturation" only; a cluster-randomized design treats whole clusters', hint="remove it")
        share = t.number("treated_cluster_share", 0.5, low=0, high=1, low_open=True, high_open=True)
        return SaturationDesign(1.0 - share, (1.0,), (share,), "complete", ("itt",))
    if t.has("treated_cluster_share"):
        raise t.error("treated_cluster_share", 'applies to assignment = "cluster" only', hint="use pure_control_share and saturation_shares")
    psi = t.number("pure_control_share", low=0, high=1, low_open=True, high_open=True)
    saturations = t.number_list("saturations", low=0, high=1, low_open=True)
    if len(set(saturations)) != len(saturations):
        raise t.error("saturations", "lists the same saturation twice", received=list(saturations))
    if t.has("saturation_shares"):
        shares = t.number_list("saturation_shares", low=0, high=1, low_open=True, high_open=True)
        if len(shares) != len(saturations):
            raise t.error("saturation_shares", f"must hold one share per saturation ({len(saturations)})", received=list(shares))
        if abs(psi + sum(shares) - 1.0) > 1e-6:
            raise t.error(
                "saturation_shares", f"with pure_control_share {psi:g} the shares must add up to {1 - psi:g} (every cluster is in one arm)",
                received=list(shares),
            )
        shares = tuple(s * (1.0 - psi) / sum(shares) for s in shares)  # exact sum after rounding in the file
    else:
        shares = tuple((1.0 - psi) / len(saturations) for _ in saturations)
    within = t.choice("within", WITHIN_RULES, "complete")
    order = sorted(range(len(saturations)), key=lambda j: saturations[j])
    return SaturationDesign(psi, tuple(saturations[j] for j in order), tuple(shares[j] for j in order), within)


def _read_covariates(top: _Table, outcome: OutcomeModel, network: EdgeModel) -> CovariateLoadings | None:
    """The ``[[covariates]]`` array of tables: one entry per baseline covariate."""
    top.used.add("covariates")
    if not top.has("covariates"):
        return None
    entries = top.data["covariates"]
    if isinstance(entries, dict):
        raise top.error("covariates", "must be an array of tables, one per covariate", hint="write each covariate as a [[covariates]] section (double brackets)")
    if not isinstance(entries, list) or not entries or not all(isinstance(e, dict) for e in entries):
        raise top.error("covariates", "must be one or more [[covariates]] sections", received=entries)
    if len(entries) > _MAX_COVARIATES:
        raise top.error("covariates", f"at most {_MAX_COVARIATES} covariates", received=len(entries))
    items = []
    for i, entry in enumerate(entries):
        t = _Table(entry, f"covariates[{i}]", top.file, _COVARIATE_KEYS)
        name = t.text("name", f"covariate {i + 1}")
        r2 = t.number("r_squared", low=0, high=0.99)
        share = t.number("through_type", 0.0, low=0, high=1)
        t.finish()
        if name in [c.name for c in items]:
            raise t.error("name", "is used by another covariate", received=name)
        items.append(Covariate(name, r2, share))
    try:
        return covariate_loadings(tuple(items), outcome, network)
    except CovariateError as exc:
        key = "covariates" if exc.index is None else f"covariates[{exc.index}].r_squared"
        raise ScenarioError(str(exc), file=top.file, key=key, hint="lower r_squared, or change through_type") from None


def _read_estimators(top: _Table, outcome: OutcomeModel, has_covariates: bool, design: Design) -> EstimatorPlan:
    t = top.table("estimators", _ESTIMATOR_KEYS, required=False)
    if design.saturation is not None:
        return _read_contrasts(t, design.saturation)
    # With covariates the default plan shows adjusted and unadjusted estimators side by side.
    default_direct = ("hajek", "lin") if has_covariates else ("hajek",)
    default_spillover = ("pc_balancing_corrected", "centred_ht")
    if has_covariates:
        default_spillover = ("pc_balancing_corrected", "pc_balancing_corrected_adjusted", "centred_ht", "centred_ht_adjusted")
    if t is None:
        return EstimatorPlan(direct=default_direct, spillover=default_spillover, centre=outcome.baseline)
    if t.has("contrasts"):
        raise t.error("contrasts", 'are the tests of a clustered design (assignment = "cluster" or "saturation")', hint="remove it, or choose a clustered assignment")
    direct = t.choice_list("direct", DIRECT_ESTIMATORS, default_direct)
    variance = t.choice_list("direct_variance", DIRECT_VARIANCES, ("neyman",))
    spillover = t.choice_list("spillover", SPILLOVER_ESTIMATORS, default_spillover)
    if not has_covariates:
        for key, names in (("direct", direct), ("spillover", spillover)):
            adjusted = [name for name in names if name in ADJUSTED_ESTIMATORS]
            if adjusted:
                raise t.error(key, f"{adjusted[0]!r} adjusts for baseline covariates, but the scenario states none", hint="add a [[covariates]] section with its r_squared, or remove the adjusted estimator")
    # The centring constant must be fixed before the data exist; the baseline
    # is the planner's own prior guess of the outcome level.
    centre = t.number("centre", outcome.baseline, low=-1e12, high=1e12)
    eig = t.raw("eigenvectors", "auto")
    if eig == "auto":
        k: int | None = None
    else:
        if isinstance(eig, str):
            raise t.error("eigenvectors", "must be \"auto\" or a whole number", allowed="\"auto\" or a whole number in [0, 50]", received=eig)
        k = t.check_number("eigenvectors", eig, low=0, high=50, integer=True)
    t.finish()
    return EstimatorPlan(direct, variance, spillover, centre, k)


def _read_contrasts(t: _Table | None, design: SaturationDesign) -> EstimatorPlan:
    """A clustered design's tests are its contrasts (``designcalc.saturation``); the network estimators do not apply."""
    # Slopes need complete randomization inside clusters; the default plan leaves them out otherwise.
    default = design.contrasts if design.within == "complete" else tuple(c for c in design.contrasts if c != "slope")
    if t is None:
        return EstimatorPlan(direct=(), direct_variance=(), spillover=(), contrasts=default)
    for name in ("direct", "direct_variance", "spillover", "centre", "eigenvectors"):
        if t.has(name):
            raise t.error(
                name, "applies to Bernoulli assignment; a clustered design is analysed by its contrasts",
                allowed="contrasts = a list drawn from " + ", ".join(f'"{c}"' for c in CONTRAST_KINDS), hint="remove it",
            )
    if design.is_cluster_randomized:
        contrasts = t.choice_list("contrasts", ("itt",), ("itt",))
    else:
        contrasts = t.choice_list("contrasts", CONTRAST_KINDS, default)
    if "slope" in contrasts and design.within == "bernoulli":
        raise t.error(
            "contrasts", 'lists "slope", which needs within = "complete": with Bernoulli assignment inside clusters '
            "the cluster means a slope averages are weighted by random treated counts", received=list(contrasts), hint='remove "slope", or use within = "complete"',
        )
    if not contrast_names(replace(design, contrasts=contrasts)):
        raise t.error(
            "contrasts", "leave nothing to test with this design (pooled needs two saturations, a slope two below 1)",
            received=list(contrasts), hint='add "itt" or "snt"',
        )
    t.finish()
    return EstimatorPlan(direct=(), direct_variance=(), spillover=(), contrasts=contrasts)


def _read_simulation(top: _Table) -> SimulationSettings:
    t = top.table("simulation", _SIMULATION_KEYS, required=False)
    if t is None:
        return SimulationSettings()
    graphs = t.number("graphs", 40, low=1, high=1_000_000, integer=True)
    per_graph = t.number("assignments_per_graph", 25, low=1, high=100_000, integer=True)
    seed = t.number("seed", 1, low=0, high=2**63 - 1, integer=True)
    if graphs * per_graph > _MAX_REPLICATES:
        raise t.error("graphs", f"graphs x assignments_per_graph must be at most {_MAX_REPLICATES:,}", received=graphs * per_graph)
    precision = t.number("relative_precision", 0.03, low=0.001, high=0.5)
    max_graphs = t.number("max_graphs", max(1000, graphs), low=2, high=1_000_000, integer=True)
    if max_graphs < graphs:
        raise t.error("max_graphs", f"must be at least graphs ({graphs})", received=max_graphs)
    if max_graphs * per_graph > _MAX_REPLICATES:
        raise t.error("max_graphs", f"max_graphs x assignments_per_graph must be at most {_MAX_REPLICATES:,}", received=max_graphs * per_graph)
    t.finish()
    return SimulationSettings(graphs, per_graph, seed, precision, max_graphs)


def _read_execution(top: _Table) -> ExecutionSettings:
    t = top.table("execution", _EXECUTION_KEYS, required=False)
    if t is None:
        return ExecutionSettings()
    workers = t.number("workers", None, low=1, high=1024, integer=True)
    cluster = t.text("cluster", None)
    if cluster is not None and not cluster.strip():
        raise t.error("cluster", "must be a dask scheduler address or \"local\"", allowed='"tcp://HOST:PORT" or "local"', received=cluster)
    store = t.raw("store", None)
    if store is True or (store is not None and not isinstance(store, (str, bool))) or (isinstance(store, str) and not store.strip()):
        raise t.error(
            "store", "must be a file path in quotes, or false for no results store",
            allowed='"results.sqlite" (relative to the scenario file) or false', received=store,
        )
    t.finish()
    return ExecutionSettings(workers, cluster, store)


def _read_measurement(top: _Table) -> MeasurementModel | None:
    """``[measurement]``: how the network survey sees the true network (``designcalc.measurement``)."""
    t = top.table("measurement", _MEASUREMENT_KEYS, required=False)
    if t is None:
        return None
    cap = t.number("contact_cap", None, low=1, high=_MAX_UNITS, integer=True)
    cap_rule = t.choice("cap_rule", CAP_RULES, "random")
    symmetrise = t.choice("symmetrise", SYMMETRISE_RULES, "either")
    recall = t.number("tie_recall", 1.0, low=0.0, high=1.0)
    non_response = t.number("non_response", 0.0, low=0.0, high=1.0, high_open=True)
    false_ties = t.number("false_ties", 0.0, low=0.0, high=1000.0)
    augmented = t.raw("augmented", False)
    if not isinstance(augmented, bool):
        raise t.error("augmented", "must be true or false", allowed="true or false", received=augmented)
    if cap is None and t.has("cap_rule"):
        raise t.error("cap_rule", "chooses which contacts a capped respondent names, but no contact_cap is set", hint="add `contact_cap = ...` or remove cap_rule")
    if t.has("attrition") and (t.has("attrition_treated") or t.has("attrition_control")):
        raise t.error("attrition", "states outcomes missing at random; attrition_treated and attrition_control state it by treatment: give one form", hint="remove one of them")
    if t.has("attrition"):
        treated = control = t.number("attrition", low=0.0, high=1.0, high_open=True)
    else:
        treated = t.number("attrition_treated", 0.0, low=0.0, high=1.0, high_open=True)
        control = t.number("attrition_control", 0.0, low=0.0, high=1.0, high_open=True)
    t.finish()
    return MeasurementModel(cap, cap_rule, symmetrise, recall, non_response, false_ties, augmented, treated, control)


def parse_scenario(text: str, *, source: str = "<scenario>", folder: str | Path | None = None) -> Scenario:
    """Validate the TOML text of a scenario.

    Parameters
    ----------
    text
        The scenario's TOML text.
    source
        The file name to quote in error messages.
    folder
        Where files the scenario names (a surveyed network's edge lists) are
        looked for; default the current folder.

    Returns
    -------
    Scenario

    Raises
    ------
    ScenarioError
        For any mistake, naming the file, the dotted key, what is allowed and
        what was received.
    """
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ScenarioError(f"is not valid TOML: {exc}", file=source, hint="check quotes, brackets and '=' signs on the line named") from None
    top = _Table(data, "", source, _TOP_KEYS)
    meta = top.table("scenario", _SCENARIO_KEYS, required=False)
    name = description = ""
    if meta is not None:
        name = meta.text("name", "")
        description = meta.text("description", "")
        meta.finish()
    network, density = _read_network(top, Path(folder) if folder is not None else Path.cwd())
    population = _read_population(top, network)
    outcome = _read_outcome(top, network)
    design = _read_design(top, population)
    covariates = _read_covariates(top, outcome, network)
    estimators = _read_estimators(top, outcome, covariates is not None, design)
    if design.saturation is not None:
        design = replace(design, saturation=replace(design.saturation, contrasts=estimators.contrasts or design.saturation.contrasts))
    simulation = _read_simulation(top)
    execution = _read_execution(top)
    measurement = _read_measurement(top)
    top.finish()
    if design.saturation is not None:
        # A two-stage design's contrasts read neither covariates nor the network: accepting them would mislead.
        if covariates is not None:
            raise ScenarioError(
                "are not used by a clustered design's contrasts (no covariate adjustment for them yet)",
                file=source, key="covariates", hint="remove the [[covariates]] sections, or use assignment = \"bernoulli\"",
            )
        if measurement is not None:
            raise ScenarioError(
                "has no effect on a clustered design: its contrasts compare arms and never read the network"
                " (outcome attrition is not modelled for them yet)",
                file=source, key="measurement", hint="remove the [measurement] table, or use assignment = \"bernoulli\" to see what measurement does to the network estimators",
            )
    if population.clustered:
        m = population.cluster_sizes.smallest
        if density.target_mean_degree(m) >= m - 1:
            raise ScenarioError(
                f"in a cluster of {m} units the density rule asks for mean degree {density.target_mean_degree(m):.4g}, but a unit can link to at most {m - 1} others",
                file=source, key="network.density.mean_degree", hint="each cluster's density follows the rule at its own size: lower mean_degree, or plan larger clusters",
            )
    elif outcome.cluster_icc > 0:
        raise ScenarioError("cluster_icc needs a clustered population", file=source, key="outcome.cluster_icc", hint="state [population] clusters and cluster_size, or remove cluster_icc")
    for n in () if population.clustered else population.units:
        if density.target_mean_degree(n) >= n - 1:
            raise ScenarioError(
                f"at {n} units the density rule asks for mean degree {density.target_mean_degree(n):.4g}, but a unit can link to at most {n - 1} others",
                file=source, key="network.density.mean_degree", hint="lower mean_degree or growth_exponent, or plan larger networks",
            )
    if measurement is not None and measurement.attrition:
        unsupported = [n for n in (*estimators.direct, *estimators.spillover) if n not in _ATTRITION_ESTIMATORS]
        if unsupported:
            raise ScenarioError(
                f"with outcome attrition the analysis uses complete cases, which {', '.join(unsupported)} does not do yet",
                file=source, key="measurement.attrition", allowed="estimators " + ", ".join(_ATTRITION_ESTIMATORS),
                hint="remove those estimators from [estimators], or the attrition",
            )
    return Scenario(
        name=name or Path(source).stem,
        description=description,
        population=population,
        network=network,
        density=density,
        outcome=outcome,
        design=design,
        estimators=estimators,
        simulation=simulation,
        covariates=covariates,
        execution=execution,
        measurement=measurement,
        source=source,
        sha256=hashlib.sha256(text.encode("utf-8")).hexdigest(),
        text=text,
    )


def load_scenario(path: str | Path) -> Scenario:
    """Read and validate a scenario file.

    Examples
    --------
    >>> from pathlib import Path
    >>> s = load_scenario(Path(__file__).parents[1] / "scenarios" / "lake_orrin_savings.toml")
    >>> s.network.kind
    'blocks'
    """
    path = Path(path)
    try:
        raw = path.read_bytes()
    except FileNotFoundError:
        raise ScenarioError("no such file", file=str(path), hint="check the path; the demo scenarios in scenarios/ are a starting point") from None
    except IsADirectoryError:
        raise ScenarioError("is a folder, not a scenario file", file=str(path)) from None
    except OSError as exc:
        raise ScenarioError(f"cannot be read: {exc.strerror}", file=str(path)) from None
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError:
        raise ScenarioError("is not UTF-8 text", file=str(path), hint="save the scenario as plain UTF-8 text") from None
    scenario = parse_scenario(text, source=path.name, folder=path.parent)
    store = scenario.execution.store
    if isinstance(store, str):
        # A project's store sits with its scenario, wherever the command is run from ("~" is the home folder).
        named = Path(store).expanduser()
        scenario = replace(scenario, execution=replace(scenario.execution, store=str(named if named.is_absolute() else path.parent / named)))
    return scenario

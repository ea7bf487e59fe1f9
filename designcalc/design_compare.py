"""Designs side by side: one network with Bernoulli assignment against clustered designs, per estimand.

Each design is a scenario (its own population, assignment and planned
tests).  All are put at the same total number of units: a single network of
N units, a clustered population of round(N / mean cluster size) clusters.
For every planned test the null pass of ``designcalc.mde`` gives the
estimator's SE (its Monte Carlo SD under the null), the formula MDE with its
Monte Carlo interval and the test's size, as ``designcalc compare`` does for
treatment probabilities.

Per estimand family (direct, spillover, total) each design's best test is
its smallest MDE, and the design whose best test has the smallest MDE is
marked best, with designs within two combined Monte Carlo SEs of it marked
tied.  The families group tests whose estimands differ between designs: a
network design's spillover effect is the average effect of others'
treatment at probability pi (METHODS.md §1), a saturation design's SNT(p)
the untreated units' effect at saturation p against pure control (§5), so
every row says in words what its test estimates.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, replace
from typing import TYPE_CHECKING

from designcalc.engine import ESTIMANDS, EngineProgress
from designcalc.errors import DesignCalcError
from designcalc.execution import Cluster
from designcalc.inference import Z95
from designcalc.mde import MdeRecord, minimum_detectable_effects
from designcalc.power import CAUTIONS, FlaggedRecord
from designcalc.saturation import check_clusters, describe_contrast, is_contrast
from designcalc.scenario import Scenario

if TYPE_CHECKING:
    from designcalc.store import ResultStore

__all__ = ["DesignComparison", "DesignRow", "compare_designs", "describe_test", "units_of_design"]


@dataclass(frozen=True)
class DesignRow(FlaggedRecord):
    """One planned test of one design at the common total size."""

    design: str
    scenario_file: str
    population: str
    assignment: str
    units: int
    clusters: int
    treatment_probability: float
    estimand: str
    estimator: str
    variance_estimator: str
    estimates: str
    standard_error: float
    standard_error_mc_se: float
    mde: float
    mde_low: float
    mde_high: float
    mde_sd_units: float
    size: float
    size_mc_se: float
    best_in_design: bool
    best_design: bool
    tied_with_best: bool
    flags: tuple[str, ...] = ()


@dataclass(frozen=True)
class DesignComparison:
    """Every design's rows, and each design's provenance."""

    units: int
    rows: tuple[DesignRow, ...]
    provenance: tuple[dict[str, object], ...]
    warnings: tuple[str, ...] = ()
    partial: bool = False
    cautions: tuple[str, ...] = CAUTIONS

    @property
    def records(self) -> tuple[DesignRow, ...]:
        return self.rows

    @property
    def scenario_name(self) -> str:
        return " vs ".join(dict.fromkeys(r.design for r in self.rows))

    def to_dict(self) -> dict[str, object]:
        return {
            "units": self.units,
            "partial": self.partial,
            "provenance": list(self.provenance),
            "warnings": list(self.warnings),
            "cautions": list(self.cautions),
            "results": [r.to_dict() for r in self.rows],
        }

    def select(self, **criteria: object) -> list[DesignRow]:
        return [r for r in self.rows if all(getattr(r, k) == v for k, v in criteria.items())]


def units_of_design(scenario: Scenario, units: int) -> tuple[list[int] | None, list[int] | None]:
    """(units, clusters) overrides that put ``scenario`` at a total of about ``units`` units."""
    population = scenario.population
    if not population.clustered:
        if scenario.network.kind == "surveyed":
            return None, None  # its size is the survey's
        return [units], None
    if population.cluster_sizes.kind == "list":
        return None, None  # every cluster stated: the study is what it is
    clusters = max(2, round(units / population.cluster_sizes.nominal))
    if scenario.design.saturation is not None:
        check_clusters(scenario.design.saturation, clusters)
    return None, [clusters]


def describe_test(scenario: Scenario, estimand: str, estimator: str) -> str:
    """What a test estimates, in words."""
    if is_contrast(estimator):
        return describe_contrast(estimator)
    return {
        "direct": "direct effect of own treatment at pi",
        "spillover": "spillover of others' treatment at pi",
        "total": "total effect of raising pi",
    }[estimand]


def _population_text(scenario: Scenario, record: MdeRecord) -> str:
    population = scenario.population
    if not population.clustered:
        return f"one network of {record.units:,} units"
    return f"{record.clusters} clusters, {population.cluster_sizes.describe()} (~{record.units:,} units)"


def _assignment_text(scenario: Scenario, record: MdeRecord) -> str:
    if scenario.design.saturation is not None:
        return scenario.design.saturation.describe()
    where = " within every cluster" if scenario.population.clustered else ""
    return f"Bernoulli({record.treatment_probability:g}){where}"


def _half(row: DesignRow) -> float:
    return 0.5 * (row.mde_high - row.mde_low)


def compare_designs(
    scenarios: Sequence[Scenario],
    *,
    units: int | None = None,
    graphs: int | None = None,
    assignments_per_graph: int | None = None,
    seed: int | None = None,
    batch_size: int = 16,
    progress: Callable[[EngineProgress], None] | None = None,
    workers: int = 1,
    cluster: Cluster | None = None,
    store: ResultStore | None = None,
) -> DesignComparison:
    """Put the designs of ``scenarios`` side by side at about ``units`` units each (module docstring).

    ``units`` defaults to the first scenario's first planned total.  Each
    scenario keeps its own outcome model, seed and simulation settings
    unless overridden here.

    Examples
    --------
    >>> from pathlib import Path
    >>> from designcalc import load_scenario
    >>> folder = Path(__file__).parents[1] / "scenarios"
    >>> single = load_scenario(folder / "lake_orrin_savings.toml")
    >>> hamlets = load_scenario(folder / "tarn_hollow_water.toml")
    >>> r = compare_designs([single, hamlets], units=1600, graphs=3, assignments_per_graph=4)
    >>> sorted({row.design for row in r.rows}) == sorted({single.name, hamlets.name})
    True
    """
    if len(scenarios) < 2:
        raise DesignCalcError("a design comparison needs at least two scenarios (designs)")
    total = units or scenarios[0].population.units[0]
    rows: list[DesignRow] = []
    provenance: list[dict[str, object]] = []
    warnings: list[str] = []
    partial = False
    for scenario in scenarios:
        unit_override, cluster_override = units_of_design(scenario, total)
        if unit_override is None and cluster_override is None:
            warnings.append(f"{scenario.name}: its study size is fixed by the scenario ({scenario.population.units[0]:,} units), not {total:,}")
        mde = minimum_detectable_effects(
            scenario, units=unit_override, clusters=cluster_override, graphs=graphs, assignments_per_graph=assignments_per_graph,
            seed=seed, verify=False, batch_size=batch_size, progress=progress, workers=workers, cluster=cluster, store=store,
        )
        provenance.append(mde.provenance)
        warnings.extend(f"{scenario.name}: {w}" for w in mde.warnings)
        for r in mde.records:
            rows.append(DesignRow(
                design=scenario.name, scenario_file=scenario.source, population=_population_text(scenario, r),
                assignment=_assignment_text(scenario, r), units=r.units, clusters=r.clusters,
                treatment_probability=r.treatment_probability, estimand=r.estimand, estimator=r.estimator,
                variance_estimator=r.variance_estimator, estimates=describe_test(scenario, r.estimand, r.estimator),
                standard_error=r.standard_error, standard_error_mc_se=r.standard_error_mc_se, mde=r.mde,
                mde_low=r.mde_low, mde_high=r.mde_high, mde_sd_units=r.mde_sd_units, size=r.size, size_mc_se=r.size_mc_se,
                best_in_design=False, best_design=False, tied_with_best=False, flags=r.flags,
            ))
        if mde.partial:
            partial = True
            break
    return DesignComparison(total, tuple(_mark(rows)), tuple(provenance), tuple(warnings), partial)


def _mark(rows: list[DesignRow]) -> list[DesignRow]:
    """Each design's best test per family, and the best design per family (module docstring)."""
    best_in: dict[tuple[str, str], DesignRow] = {}
    for r in rows:
        if not math.isfinite(r.mde):
            continue
        key = (r.design + "\x00" + r.scenario_file, r.estimand)
        if key not in best_in or r.mde < best_in[key].mde:
            best_in[key] = r
    marked = {id(r) for r in best_in.values()}
    best_design: dict[str, DesignRow] = {}
    for (_, family), r in best_in.items():
        if family not in best_design or r.mde < best_design[family].mde:
            best_design[family] = r
    out = []
    for r in rows:
        top = best_design.get(r.estimand)
        is_best = top is not None and r is top
        tied = False
        if top is not None and id(r) in marked and not is_best:
            tied = abs(r.mde - top.mde) <= 2 * math.hypot(_half(r), _half(top)) / Z95
        out.append(replace(r, best_in_design=id(r) in marked, best_design=is_best, tied_with_best=tied))
    order = {e: i for i, e in enumerate(ESTIMANDS)}
    return sorted(out, key=lambda r: order.get(r.estimand, 9))


"""Side-by-side comparison of treatment probabilities (and estimators) by SE, MDE and test size.

For each planned size, each treatment probability of a grid and each
planned test, the null pass of ``designcalc.mde`` gives the estimator's SE
(its Monte Carlo SD under the null), the formula MDE with its Monte Carlo
interval, and the feasible test's size; ``verify=True`` runs the full MDE
verification too.  The best probability per size and test is marked, with
the probabilities whose MDE is within Monte Carlo error of the best marked
as tied.  A joint criterion picks one probability per size: minimise the
MDE of one test subject to caps on the MDE of others (for example the
spillover MDE subject to a direct-effect MDE of at most 0.5).
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass
from typing import TYPE_CHECKING, Callable, Sequence

from designcalc.engine import ESTIMANDS, EngineProgress, planned_keys
from designcalc.errors import DesignCalcError
from designcalc.mde import MdeRecord, minimum_detectable_effects
from designcalc.inference import Z95
from designcalc.power import CAUTIONS, FlaggedRecord
from designcalc.execution import Cluster
from designcalc.scenario import Scenario

if TYPE_CHECKING:
    from designcalc.store import ResultStore

__all__ = ["DEFAULT_GRID", "TestSpec", "Criterion", "CompareRow", "Choice", "CompareResult", "parse_test_spec", "compare_treatment_probabilities"]

DEFAULT_GRID = (0.1, 0.2, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8, 0.9)


@dataclass(frozen=True)
class TestSpec:
    """A planned test named by estimand and optionally estimator and variance estimator."""

    estimand: str
    estimator: str = ""
    variance_estimator: str = ""

    def matches(self, key: tuple[str, str, str]) -> bool:
        return key[0] == self.estimand and self.estimator in ("", key[1]) and self.variance_estimator in ("", key[2])

    def resolve(self, scenario: Scenario, units: int) -> tuple[str, str, str]:
        """The first planned test that matches (planned order: first estimator, first variance)."""
        for key in planned_keys(scenario, units):
            if self.matches(key):
                return key
        planned = ", ".join(":".join(k) for k in planned_keys(scenario, units))
        raise DesignCalcError(f"no planned test matches {self.text!r}; planned tests are: {planned}")

    @property
    def text(self) -> str:
        return ":".join(p for p in (self.estimand, self.estimator, self.variance_estimator) if p)


def parse_test_spec(text: str, *, option: str = "--objective") -> TestSpec:
    """``ESTIMAND[:ESTIMATOR[:VARIANCE]]``, e.g. ``spillover`` or ``direct:hajek:neyman``."""
    parts = [p.strip() for p in text.split(":")]
    if not parts[0] or parts[0] not in ESTIMANDS or len(parts) > 3 or any(not p for p in parts):
        raise DesignCalcError(
            f"{option}: {text!r} is not ESTIMAND[:ESTIMATOR[:VARIANCE]] with ESTIMAND one of {', '.join(ESTIMANDS)}"
        )
    return TestSpec(*parts)


@dataclass(frozen=True)
class Criterion:
    """Minimise the MDE of ``objective`` subject to MDE(cap test) <= cap value for every cap."""

    objective: TestSpec
    caps: tuple[tuple[TestSpec, float], ...] = ()

    def describe(self) -> str:
        text = f"smallest MDE of {self.objective.text}"
        if self.caps:
            text += " subject to " + " and ".join(f"MDE of {spec.text} <= {value:g}" for spec, value in self.caps)
        return text


@dataclass(frozen=True)
class CompareRow(FlaggedRecord):
    units: int
    treatment_probability: float
    estimand: str
    estimator: str
    variance_estimator: str
    standard_error: float
    standard_error_mc_se: float
    mean_estimated_se: float
    mde: float
    mde_low: float
    mde_high: float
    mde_sd_units: float
    size: float
    size_mc_se: float
    method: str
    best: bool
    tied_with_best: bool
    flags: tuple[str, ...] = ()
    clusters: int = 0  # a clustered population's number of clusters (``units`` is then their nominal total)


@dataclass(frozen=True)
class Choice:
    """The probability a joint criterion picks at one size (None when no probability meets the caps)."""

    units: int
    criterion: str
    treatment_probability: float | None
    objective_mde: float
    note: str

    def to_dict(self) -> dict[str, object]:
        return asdict(self)


@dataclass(frozen=True)
class CompareResult:
    scenario_name: str
    rows: tuple[CompareRow, ...]
    choices: tuple[Choice, ...]
    provenance: dict[str, object]
    warnings: tuple[str, ...] = ()
    partial: bool = False
    cautions: tuple[str, ...] = CAUTIONS

    @property
    def records(self) -> tuple[CompareRow, ...]:
        return self.rows

    def to_dict(self) -> dict[str, object]:
        return {
            "scenario": self.scenario_name,
            "partial": self.partial,
            "provenance": self.provenance,
            "warnings": list(self.warnings),
            "cautions": list(self.cautions),
            "results": [r.to_dict() for r in self.rows],
            "choices": [c.to_dict() for c in self.choices],
        }

    def select(self, **criteria: object) -> list[CompareRow]:
        return [r for r in self.rows if all(getattr(r, k) == v for k, v in criteria.items())]


def _half(record: MdeRecord) -> float:
    return 0.5 * (record.mde_high - record.mde_low)


def compare_treatment_probabilities(
    scenario: Scenario,
    *,
    probabilities: Sequence[float] | None = None,
    units: Sequence[int] | None = None,
    criterion: Criterion | None = None,
    verify: bool = False,
    graphs: int | None = None,
    assignments_per_graph: int | None = None,
    seed: int | None = None,
    relative_precision: float | None = None,
    max_graphs: int | None = None,
    batch_size: int = 16,
    progress: Callable[[EngineProgress], None] | None = None,
    workers: int = 1,
    cluster: Cluster | None = None,
    store: ResultStore | None = None,
    clusters: Sequence[int] | None = None,
) -> CompareResult:
    """Compare treatment probabilities for every planned size and test (module docstring).

    ``probabilities`` defaults to 0.1, 0.2, ..., 0.9 together with the
    scenario's own.  ``relative_precision`` and ``max_graphs`` apply with
    ``verify=True`` (see ``minimum_detectable_effects``).  Best probability: the smallest MDE; tied: an MDE whose
    difference from the best is within two combined Monte Carlo SEs.
    ``workers``, ``cluster`` and ``store`` as in ``minimum_detectable_effects``.

    Examples
    --------
    >>> from pathlib import Path
    >>> from designcalc import load_scenario
    >>> s = load_scenario(Path(__file__).parents[1] / "scenarios" / "lake_orrin_savings.toml")
    >>> r = compare_treatment_probabilities(s, probabilities=[0.3, 0.5], units=[300], graphs=3, assignments_per_graph=4)
    >>> len(r.select(estimand="direct", estimator="hajek", variance_estimator="neyman"))
    2
    """
    grid = sorted(set(probabilities) if probabilities else set(DEFAULT_GRID) | set(scenario.design.treatment_probabilities))
    for p in grid:
        if not 0 < p < 1:
            raise DesignCalcError(f"treatment probabilities must lie in (0, 1); got {p}")
    mde = minimum_detectable_effects(
        scenario, units=units, treatment_probabilities=grid, graphs=graphs, assignments_per_graph=assignments_per_graph,
        seed=seed, relative_precision=relative_precision, max_graphs=max_graphs, verify=verify,
        batch_size=batch_size, progress=progress, workers=workers, cluster=cluster, store=store, clusters=clusters,
    )
    records = list(mde.records)
    groups: dict[tuple[int, str, str, str], list[MdeRecord]] = {}
    for r in records:
        groups.setdefault((r.units, r.estimand, r.estimator, r.variance_estimator), []).append(r)
    best_ids: set[int] = set()
    tied_ids: set[int] = set()
    for members in groups.values():
        finite = [r for r in members if math.isfinite(r.mde)]
        if not finite:
            continue
        best = min(finite, key=lambda r: r.mde)
        best_ids.add(id(best))
        for r in finite:
            combined_se = math.hypot(_half(r), _half(best)) / Z95
            if r is not best and abs(r.mde - best.mde) <= 2 * combined_se:
                tied_ids.add(id(r))
    rows = tuple(
        CompareRow(
            units=r.units, treatment_probability=r.treatment_probability, estimand=r.estimand, estimator=r.estimator,
            variance_estimator=r.variance_estimator, standard_error=r.standard_error, standard_error_mc_se=r.standard_error_mc_se,
            mean_estimated_se=r.mean_estimated_se, mde=r.mde, mde_low=r.mde_low, mde_high=r.mde_high, mde_sd_units=r.mde_sd_units,
            size=r.size, size_mc_se=r.size_mc_se, method=r.method, best=id(r) in best_ids, tied_with_best=id(r) in tied_ids,
            flags=r.flags, clusters=r.clusters,
        )
        for r in records
    )
    choices = tuple(_choose(scenario, rows, criterion)) if criterion is not None else ()
    return CompareResult(mde.scenario_name, rows, choices, mde.provenance, mde.warnings, mde.partial)


def _choose(scenario: Scenario, rows: Sequence[CompareRow], criterion: Criterion) -> list[Choice]:
    out = []
    for n in sorted({r.units for r in rows}):
        objective = criterion.objective.resolve(scenario, n)
        caps = [(spec.resolve(scenario, n), value) for spec, value in criterion.caps]

        def mde_of(key: tuple[str, str, str], p: float) -> float:
            for r in rows:
                if r.units == n and r.treatment_probability == p and (r.estimand, r.estimator, r.variance_estimator) == key:
                    return r.mde
            return float("nan")

        probs = sorted({r.treatment_probability for r in rows if r.units == n})
        feasible = [p for p in probs if all(mde_of(k, p) <= v for k, v in caps) and math.isfinite(mde_of(objective, p))]
        if not feasible:
            out.append(Choice(n, criterion.describe(), None, float("nan"), "no treatment probability meets the caps"))
            continue
        chosen = min(feasible, key=lambda p: mde_of(objective, p))
        note = f"{len(feasible)} of {len(probs)} probabilities meet the caps" if caps else ""
        out.append(Choice(n, criterion.describe(), chosen, mde_of(objective, chosen), note))
    return out

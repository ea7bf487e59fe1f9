"""The scenario as measured next to the perfectly measured case: bias, power and size side by side.

``compare_measurement`` runs ``simulate_power`` twice with the same seed: on
the scenario as its ``[measurement]`` table states (estimators on the
observed network) and on the same scenario with ``measurement = None``
(estimators on the true network).  The graphs, assignments and noise are the
same in both (common random numbers: the survey has its own stream family,
``designcalc.engine``), so each change is the effect of measurement alone
(METHODS.md §7.4).
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass, replace
from typing import Any

import numpy as np

from designcalc.engine import (
    DesignPoint,
    EngineProgress,
    example_network,
    observed_network,
)
from designcalc.errors import DesignCalcError
from designcalc.power import (
    CAUTIONS,
    FlaggedRecord,
    PowerRecord,
    ResultTable,
    simulate_power,
)
from designcalc.scenario import Scenario

__all__ = ["MeasurementComparison", "MeasurementRecord", "NetworkSeen", "compare_measurement", "measurement_warnings"]

#: Graphs per size whose survey is summarised in ``MeasurementComparison.networks``.
_SURVEYS_SUMMARISED = 3


@dataclass(frozen=True)
class MeasurementRecord(FlaggedRecord):
    """One test at one design point, perfectly measured and as measured (``*_perfect`` / ``*_measured``), with the changes."""

    estimand: str
    estimator: str
    variance_estimator: str
    units: int
    treatment_probability: float
    true_effect: float
    bias_perfect: float
    bias_perfect_mc_se: float
    bias_measured: float
    bias_measured_mc_se: float
    bias_change: float
    power_perfect: float
    power_perfect_mc_se: float
    power_measured: float
    power_measured_mc_se: float
    power_change: float
    size_perfect: float
    size_perfect_mc_se: float
    size_measured: float
    size_measured_mc_se: float
    size_change: float
    replicates: int
    flags: tuple[str, ...] = ()


@dataclass(frozen=True)
class NetworkSeen:
    """What the survey of the first graphs of a size saw (means over those graphs)."""

    units: int
    graphs: int
    mean_degree_true: float
    mean_degree_observed: float
    share_true_ties_observed: float
    share_observed_ties_false: float
    share_responded: float

    def to_dict(self) -> dict[str, object]:
        return dict(self.__dict__)


@dataclass(frozen=True)
class MeasurementComparison(ResultTable):
    """Records of both runs side by side, the surveys' summaries, provenance, warnings and cautions."""

    scenario_name: str
    measurement: str
    records: tuple[MeasurementRecord, ...]
    networks: tuple[NetworkSeen, ...]
    provenance: dict[str, object]
    warnings: tuple[str, ...] = ()
    partial: bool = False
    cautions: tuple[str, ...] = CAUTIONS

    def to_dict(self) -> dict[str, object]:
        out = super().to_dict()
        out["measurement"] = self.measurement
        out["networks"] = [n.to_dict() for n in self.networks]
        return out


def measurement_warnings(scenario: Scenario) -> list[str]:
    """Notes on a measurement model that the numbers alone do not show."""
    m = scenario.measurement
    if m is None or m.contact_cap is None or m.cap_rule != "strongest":
        return []
    if getattr(scenario.network, "weights", None) is not None:
        return []
    where = "the surveyed edge list has no weight column" if scenario.network.kind == "surveyed" else "a simulated network has no tie weights"
    return [f"measurement.cap_rule = \"strongest\": {where}, so tie strengths are drawn at random (the same as cap_rule = \"random\" in distribution)"]


def pair_records(perfect: Sequence[PowerRecord], measured: Sequence[PowerRecord]) -> tuple["MeasurementRecord", ...]:
    """Each test and design point perfectly measured beside the same as measured (records of two power runs)."""
    by_key = {_key(r): r for r in measured}
    return tuple(_pair(r, by_key[_key(r)]) for r in perfect if _key(r) in by_key)


def _key(r: PowerRecord) -> tuple[object, ...]:
    return (r.estimand, r.estimator, r.variance_estimator, r.units, r.treatment_probability)


def _pair(perfect: PowerRecord, measured: PowerRecord) -> MeasurementRecord:
    flags = tuple(dict.fromkeys(measured.flags))
    return MeasurementRecord(
        perfect.estimand, perfect.estimator, perfect.variance_estimator, perfect.units, perfect.treatment_probability,
        perfect.true_effect,
        perfect.bias, perfect.bias_mc_se, measured.bias, measured.bias_mc_se, measured.bias - perfect.bias,
        perfect.power, perfect.power_mc_se, measured.power, measured.power_mc_se, measured.power - perfect.power,
        perfect.size, perfect.size_mc_se, measured.size, measured.size_mc_se, measured.size - perfect.size,
        measured.replicates, flags,
    )


def _networks_seen(scenario: Scenario) -> tuple[NetworkSeen, ...]:
    out = []
    graphs = min(_SURVEYS_SUMMARISED, scenario.simulation.graphs)
    pi = scenario.design.treatment_probabilities[0]
    for n in scenario.population.units:
        rows = []
        for g in range(graphs):
            net, _ = example_network(scenario, DesignPoint(n, pi), g)
            seen = observed_network(scenario, net, n, g)
            assert seen is not None
            total = seen.n_true_ties_observed + seen.n_false_ties_observed
            rows.append((
                float(net.degrees.mean()), float(seen.degrees.mean()), seen.share_true_ties_observed,
                seen.n_false_ties_observed / total if total else 0.0, float(np.mean(seen.responded)),
            ))
        means = np.mean(np.array(rows), axis=0)
        out.append(NetworkSeen(n, graphs, *(float(v) for v in means)))
    return tuple(out)


def compare_measurement(
    scenario: Scenario,
    *,
    progress: Callable[[EngineProgress], None] | None = None,
    **power_kwargs: Any,
) -> MeasurementComparison:
    """Power, bias and size of every planned test with the scenario's network measurement and without it.

    Parameters
    ----------
    scenario
        A validated scenario with a ``[measurement]`` table.
    progress
        Called after every graph of either run (the total counts both).
    **power_kwargs
        Passed to both ``simulate_power`` calls (units, treatment
        probabilities, graphs, assignments, seed, workers, cluster, store).

    Returns
    -------
    MeasurementComparison
        One record per test and design point; ``partial`` if either run was interrupted.

    Raises
    ------
    DesignCalcError
        If the scenario has no ``[measurement]`` table.
    """
    if scenario.measurement is None:
        raise DesignCalcError(
            f"{scenario.source}: the scenario has no measurement table, so there is nothing to compare with perfect "
            "measurement; add a `measurement` table (keys contact_cap, cap_rule, symmetrise, tie_recall, non_response, "
            "false_ties, augmented)"
        )
    offset = [0, 0]  # graphs of the first run (the second run's count follows it), last total seen

    def shifted(update: EngineProgress) -> None:
        offset[1] = update.total_graphs
        if progress is not None:
            progress(EngineProgress(offset[0] + update.finished_graphs, 2 * update.total_graphs, update.elapsed_seconds))

    perfect = simulate_power(replace(scenario, measurement=None), progress=shifted, **power_kwargs)
    measured = None
    if not perfect.partial:
        offset[0] = offset[1]
        measured = simulate_power(scenario, progress=shifted, **power_kwargs)
    records = pair_records(perfect.records, measured.records if measured is not None else ())
    warnings = list(dict.fromkeys((measured.warnings if measured is not None else perfect.warnings) + tuple(measurement_warnings(scenario))))
    base = measured if measured is not None else perfect
    settled = replace(scenario, population=replace(scenario.population, units=tuple(sorted({r.units for r in records}))) if records else scenario.population)
    networks = _networks_seen(_overridden(settled, base)) if records else ()
    provenance = dict(base.provenance)
    provenance["measurement"] = scenario.measurement.describe()
    return MeasurementComparison(
        scenario.name, scenario.measurement.describe(), records, networks, provenance, tuple(warnings),
        perfect.partial or (measured is not None and measured.partial) or measured is None,
    )


def _overridden(scenario: Scenario, result: Any) -> Scenario:
    """The scenario with the seed, graphs and probabilities the run used (the surveys summarised are the run's)."""
    p = result.provenance
    probabilities = tuple(sorted({r.treatment_probability for r in result.records})) or scenario.design.treatment_probabilities
    sim = replace(scenario.simulation, seed=int(p["seed_entropy"]), graphs=int(p["graphs_per_design_point"]))
    return replace(scenario, simulation=sim, design=replace(scenario.design, treatment_probabilities=probabilities))

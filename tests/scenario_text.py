"""Scenario TOML for the tests, written in one place.

Many test files need a small block-model scenario that differs from the
next one in a few values only.  ``to_toml`` writes a nested dict as TOML
text (it also serves the mutation property in test_scenario.py), and
``block_model_scenario`` fills in the keys those scenarios share, so a
test names only what it sets.  Why a value is what it is, and the outside
reference a check uses, stay in the test beside the check.

Not a test module: the tests import it as a plain module (``from
scenario_text import ...``); pytest puts ``tests/`` on ``sys.path`` and
conftest.py makes sure of it whatever the import mode.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

import designcalc

__all__ = ["block_model_scenario", "no_network_scenario", "to_toml", "toml_value"]


def toml_value(value: Any) -> str:
    """One TOML value: numbers, strings, (nested) lists and inline tables."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if math.isnan(value):
            return "nan"
        if math.isinf(value):
            return "inf" if value > 0 else "-inf"
        return repr(value)
    if isinstance(value, str):
        return '"' + value.replace("\\", "\\\\").replace('"', '\\"').replace("\n", "\\n") + '"'
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(toml_value(v) for v in value) + "]"
    if isinstance(value, dict):
        return "{" + ", ".join(f"{_toml_key(k)} = {toml_value(v)}" for k, v in value.items()) + "}"
    raise TypeError(type(value))


def _toml_key(key: str) -> str:
    return key if key.replace("_", "").isalnum() and key.isascii() else toml_value(key)


def to_toml(data: Mapping[str, Any], prefix: str = "") -> str:
    """A tiny TOML writer: scalars and lists inline, sub-tables as [sections]."""
    scalars = [f"{_toml_key(k)} = {toml_value(v)}" for k, v in data.items() if not isinstance(v, dict)]
    out = []
    if prefix:
        out.append(f"[{prefix}]")
    out.extend(scalars)
    for k, v in data.items():
        if isinstance(v, dict):
            out.append(to_toml(v, f"{prefix}.{_toml_key(k)}" if prefix else _toml_key(k)))
    return "\n".join(out) + "\n"


def _table(defaults: Mapping[str, Any], given: Mapping[str, Any] | None) -> dict[str, Any]:
    """``defaults`` updated by ``given``; a key given as None is left out (the library's default applies)."""
    merged = {**defaults, **(given or {})}
    return {k: v for k, v in merged.items() if v is not None}


def block_model_scenario(
    *,
    units: Sequence[int],
    mean_degree: float,
    probabilities: Sequence[float] = (0.5,),
    graphs: int = 40,
    assignments: int = 25,
    seed: int,
    block_shares: Sequence[float] = (1.0,),
    block_affinity: Sequence[Sequence[float]] = ((1.0,),),
    population: Mapping[str, Any] | None = None,
    density: Mapping[str, Any] | None = None,
    outcome: Mapping[str, Any] | None = None,
    design: Mapping[str, Any] | None = None,
    estimators: Mapping[str, Any] | None = None,
    simulation: Mapping[str, Any] | None = None,
    covariates: Sequence[Mapping[str, Any]] | None = None,
    source: str = "<scenario>",
) -> designcalc.Scenario:
    """A validated block-model scenario built from TOML text.

    Parameters
    ----------
    units, mean_degree, probabilities, graphs, assignments, seed
        ``population.units``, ``network.density.mean_degree`` (at
        ``reference_units = units[0]`` unless ``density`` says otherwise),
        ``design.treatment_probability`` and the ``[simulation]`` counts.
    block_shares, block_affinity
        The block model; one block by default.
    population, density, outcome, design, estimators, simulation
        Keys of those tables added to, or replacing, the shared ones: a
        continuous outcome with baseline 0, noise SD 1 and no spillover;
        the Hajek direct estimator with the Neyman variance, the centred HT
        spillover estimator and no eigenvectors.  A key given as None is
        left out of the file.
    covariates
        ``[[covariates]]`` entries (written as an inline array of tables);
        none by default.
    source
        The file name the scenario quotes in messages.
    """
    data = {
        "population": _table({"units": list(units)}, population),
        "network": {
            "model": "blocks",
            "block_shares": list(block_shares),
            "block_affinity": [list(row) for row in block_affinity],
            "density": _table({"mean_degree": mean_degree, "reference_units": units[0]}, density),
        },
        "outcome": _table({"kind": "continuous", "baseline": 0.0, "noise_sd": 1.0, "spillover_effect": 0.0}, outcome),
        "design": _table({"treatment_probability": list(probabilities)}, design),
        "estimators": _table(
            {"direct": ["hajek"], "direct_variance": ["neyman"], "spillover": ["centred_ht"], "eigenvectors": 0}, estimators
        ),
        "simulation": _table({"graphs": graphs, "assignments_per_graph": assignments, "seed": seed}, simulation),
    }
    if covariates:
        data = {"covariates": [dict(c) for c in covariates], **data}
    return designcalc.parse_scenario(to_toml(data), source=source)


def no_network_scenario(
    *,
    units: int,
    probabilities: Sequence[float] = (0.5,),
    direct: float = 0.3,
    reference: str = "normal",
    graphs: int = 40,
    assignments: int = 25,
    seed: int = 3,
    covariates: Sequence[Mapping[str, Any]] | None = None,
    estimators: Mapping[str, Any] | None = None,
    simulation: Mapping[str, Any] | None = None,
) -> designcalc.Scenario:
    """The no-network reduction: one block, mean degree 0.001 (nearly every unit isolated), no spillover, noise SD 1.

    Outcomes then do not depend on the graph, so the direct effect is the
    classical two-arm comparison with standardised effect ``direct`` (noise
    SD 1 in both arms).  The centred HT spillover estimator is planned
    because some spillover estimator must be (the PC-balancing variants are
    undefined on a near-empty graph).  ``reference`` is
    ``design.reference_distribution``; ``covariates``, ``estimators`` and
    ``simulation`` pass through to :func:`block_model_scenario`.
    """
    return block_model_scenario(
        units=[units], mean_degree=0.001, probabilities=probabilities, graphs=graphs, assignments=assignments, seed=seed,
        outcome={"direct_effect": direct}, design={"reference_distribution": reference}, source="no_network.toml",
        covariates=covariates, estimators=estimators, simulation=simulation,
    )

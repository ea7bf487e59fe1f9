"""Reruns of a solver for the reproducibility tests of test_mde.py and test_sample_size.py.

Not a test module: imported as a plain module, like scenario_text.py (see conftest.py).
"""

from __future__ import annotations

import json
from collections.abc import Callable
from typing import Any, NamedTuple

import designcalc


class Reruns(NamedTuple):
    """Canonical JSON of the same solver call: twice with batch_size 16, once with 4, once with another seed."""

    first: str
    again: str
    small_batches: str
    other_seed: str


def without_time(result: Any) -> str:
    """The result's dict as canonical JSON (NaN-safe equality), without the wall-clock time."""
    d = result.to_dict()
    d["provenance"] = {k: v for k, v in d["provenance"].items() if k != "utc_time"}
    return json.dumps(d, sort_keys=True)


def rerun(solve: Callable[..., Any], scenario: designcalc.Scenario, *, other_seed: int) -> Reruns:
    """Run ``solve(scenario, ...)`` four times; the tests compare the results (equal, and unequal for the other seed)."""
    return Reruns(
        first=without_time(solve(scenario, batch_size=16)),
        again=without_time(solve(scenario, batch_size=16)),
        small_batches=without_time(solve(scenario, batch_size=4)),
        other_seed=without_time(solve(scenario, seed=other_seed)),
    )

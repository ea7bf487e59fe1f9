"""designcalc: plan randomized experiments on social networks.

Simulates latent-type random graphs, Bernoulli assignments and outcomes with
interference, and reports the power of the planned estimators and tests for
the direct, spillover and total effects, with Monte Carlo error.

Examples
--------
>>> from pathlib import Path
>>> import designcalc
>>> s = designcalc.load_scenario(Path(designcalc.__file__).parents[1] / "scenarios" / "lake_orrin_savings.toml")
>>> s.design.treatment_probabilities
(0.3, 0.5)
"""

from designcalc._version import __version__

from designcalc.errors import DesignCalcError, ExpressionError, ModelError, ScenarioError
from designcalc.scenario import Scenario, load_scenario, parse_scenario
from designcalc.diagnostics import ScenarioCheck, check_scenario
from designcalc.power import PowerRecord, PowerResult, simulate_power
from designcalc.mde import MdeRecord, MdeResult, minimum_detectable_effects
from designcalc.sample_size import SizePoint, SizeRecord, SizeResult, required_sample_size
from designcalc.compare import CompareResult, CompareRow, Criterion, compare_treatment_probabilities, parse_test_spec
from designcalc.design_compare import DesignComparison, DesignRow, compare_designs

__all__ = [
    "__version__",
    "DesignCalcError",
    "ExpressionError",
    "ModelError",
    "ScenarioError",
    "Scenario",
    "load_scenario",
    "parse_scenario",
    "ScenarioCheck",
    "check_scenario",
    "PowerRecord",
    "PowerResult",
    "simulate_power",
    "MdeRecord",
    "MdeResult",
    "minimum_detectable_effects",
    "SizePoint",
    "SizeRecord",
    "SizeResult",
    "required_sample_size",
    "CompareResult",
    "CompareRow",
    "Criterion",
    "compare_treatment_probabilities",
    "parse_test_spec",
    "DesignComparison",
    "DesignRow",
    "compare_designs",
]

"""Density scaling: how the network's mean degree grows with study size.

The planner states the mean degree d_ref at a reference size n_ref and an
exponent gamma in [0, 1]: mean degree at n is d_ref * (n / n_ref)**gamma.
gamma = 0 keeps the mean degree fixed (friendship networks: people do not
gain friends because the study is bigger); gamma = 1 keeps the density fixed.
Because the kernel integrates to 1, rho_n = mean_degree(n) / (n - 1) before
clipping (METHODS.md §0, §6.1).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from designcalc.edge_models import EdgeModel
from designcalc.errors import ModelError

__all__ = ["DensityRule", "DensityAtSize", "density_at_size"]


@dataclass(frozen=True)
class DensityRule:
    """Mean degree ``mean_degree`` at ``reference_units``, growing as n**growth_exponent."""

    mean_degree: float
    reference_units: int
    growth_exponent: float = 0.0

    def __post_init__(self) -> None:
        if not np.isfinite(self.mean_degree) or self.mean_degree <= 0:
            raise ModelError(f"mean_degree must be a positive number; got {self.mean_degree}")
        if self.reference_units < 2:
            raise ModelError(f"reference_units must be at least 2; got {self.reference_units}")
        if not 0.0 <= self.growth_exponent <= 1.0:
            raise ModelError(f"growth_exponent must be in [0, 1]; got {self.growth_exponent}")

    def target_mean_degree(self, n_units: int) -> float:
        """The mean degree the rule asks for at n units (before any clipping)."""
        return float(self.mean_degree * (n_units / self.reference_units) ** self.growth_exponent)

    def rho(self, n_units: int) -> float:
        """The sparsity factor rho_n = target mean degree / (n - 1)."""
        if n_units < 2:
            return 0.0
        return self.target_mean_degree(n_units) / (n_units - 1)

    def describe(self) -> str:
        if self.growth_exponent == 0:
            growth = "held fixed as the study grows"
        elif self.growth_exponent == 1:
            growth = "growing in proportion to n (fixed density)"
        else:
            growth = f"growing as n^{self.growth_exponent:g}"
        return f"mean degree {self.mean_degree:g} at {self.reference_units} units, {growth}"


@dataclass(frozen=True)
class DensityAtSize:
    """What the density rule implies for one network size."""

    units: int
    rho: float
    target_mean_degree: float
    expected_mean_degree: float
    max_edge_probability: float

    @property
    def clipped(self) -> bool:
        """True when rho * g exceeds 1 somewhere, so probabilities were clipped."""
        return self.max_edge_probability > 1.0

    @property
    def shortfall(self) -> float:
        """Relative shortfall of the realised mean degree caused by clipping."""
        if self.target_mean_degree <= 0:
            return 0.0
        return max(0.0, 1.0 - self.expected_mean_degree / self.target_mean_degree)

    def to_dict(self) -> dict[str, float | int | bool]:
        return {
            "units": self.units,
            "rho": self.rho,
            "target_mean_degree": self.target_mean_degree,
            "expected_mean_degree": self.expected_mean_degree,
            "max_edge_probability_before_clipping": self.max_edge_probability,
            "clipped": self.clipped,
            "mean_degree_shortfall": self.shortfall,
        }


def density_at_size(model: EdgeModel, rule: DensityRule, n_units: int) -> DensityAtSize:
    """Derive rho_n, the clipped expected mean degree and the clipping margin.

    Exact for block models; Gauss-Legendre quadrature for kernels.
    """
    rho = rule.rho(n_units)
    return DensityAtSize(
        units=n_units,
        rho=rho,
        target_mean_degree=rule.target_mean_degree(n_units),
        expected_mean_degree=model.expected_mean_degree(n_units, rho),
        max_edge_probability=rho * model.max_value(),
    )

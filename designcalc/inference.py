"""Reference distributions, critical values and the MDE multiplier of the planned Wald tests.

The direct-effect estimators compare two arms and the exposure regression is
an OLS fit, so with small samples their Wald statistics are closer to a
Student t than to a normal; under ``reference_distribution = "auto"`` they
use t quantiles with n - 2 (two arms) or n - 3 (three coefficients) degrees
of freedom, as the two-sample t test of Cohen (1988, ch. 2) does, less one
per further coefficient of a covariate-adjusted regression.  The
network spillover estimators and the totals have no such degrees of freedom
and use the normal.  For the sizes this tool plans the two agree to a few
thousandths; the choice matters only for small studies.
"""

from __future__ import annotations

from dataclasses import dataclass

import scipy.stats

__all__ = [
    "Z95",
    "ReferenceDistribution",
    "reference_distribution",
    "critical_value",
    "mde_multiplier",
    "quantile",
    "probit",
    "floored_power_se",
]

Z95 = 1.959963984540054  # the normal 0.975 quantile: 95% Monte Carlo intervals


@dataclass(frozen=True)
class ReferenceDistribution:
    """The null distribution of a Wald statistic: the normal, or t with ``df`` degrees of freedom."""

    df: float | None = None

    @property
    def name(self) -> str:
        return "normal" if self.df is None else f"t({self.df:g})"

    def quantile(self, p: float) -> float:
        return quantile(p, self.df)


def quantile(p: float, df: float | None = None) -> float:
    """The p-quantile of the normal (``df=None``) or of Student's t."""
    if df is None:
        return float(scipy.stats.norm.ppf(p))
    return float(scipy.stats.t.ppf(p, df))


def reference_distribution(
    setting: str, estimand: str, estimator: str, units: int, covariates: int = 0
) -> ReferenceDistribution:
    """Which distribution the planned test of ``estimator`` refers to (see the module docstring).

    ``covariates`` is the number of baseline covariates: Lin's regression
    spends 2 degrees of freedom on each (the covariate and its interaction
    with treatment), the adjusted exposure regression one.

    >>> reference_distribution("auto", "direct", "lin", 100, covariates=2).name
    't(94)'
    """
    if setting == "normal":
        return ReferenceDistribution()
    parameters = {"lin": 2 + 2 * covariates}.get(estimator, 2)
    if estimand == "direct" and units > parameters:
        return ReferenceDistribution(units - parameters)
    if estimand == "spillover" and estimator.startswith("exposure_regression"):
        parameters = 3 + (covariates if estimator.endswith("_adjusted") else 0)
        if units > parameters:
            return ReferenceDistribution(units - parameters)
    return ReferenceDistribution()


def critical_value(alpha: float, alternative: str, df: float | None = None) -> float:
    """Critical value of the Wald test: q_{1 - alpha/2} two-sided, q_{1 - alpha} one-sided."""
    return quantile(1 - alpha / 2 if alternative == "two-sided" else 1 - alpha, df)


def mde_multiplier(alpha: float, power: float, alternative: str, df: float | None = None) -> float:
    """q_{1 - alpha/2} + q_{power} (one-sided: q_{1 - alpha} + q_{power}).

    With the normal, alpha = 0.05 two-sided and power 0.8 this is 2.8016
    (Bloom 1995, Evaluation Review 19(5):547-556).

    >>> round(mde_multiplier(0.05, 0.8, "two-sided"), 4)
    2.8016
    """
    return critical_value(alpha, alternative, df) + quantile(power, df)


def probit(p: float) -> float:
    """Phi^-1(p), with p kept inside [0.001, 0.999] so that simulated powers of 0 or 1 stay finite."""
    return float(scipy.stats.norm.ppf(min(max(p, 0.001), 0.999)))


def floored_power_se(power: float, clustered_se: float, replicates: int) -> float:
    """A simulated power's MC se, never below the binomial se (with p(1 - p) at least 1/R).

    A graph-clustered se from few graphs is noisy, and a run that stops
    when it happens to be small under-covers; the binomial floor (exact for
    independent replicates) guards the low side and is never 0.

    >>> round(floored_power_se(1.0, 0.0, 100), 3)
    0.01
    """
    R = max(replicates, 1)
    floor = (max(power * (1 - power), 1 / R) / R) ** 0.5
    return max(clustered_se, floor) if clustered_se == clustered_se else floor

"""Several hypotheses in one plan: Bonferroni and Holm, and what they cost.

A pre-analysis plan that tests the direct, spillover and total effects tests
several hypotheses; a reviewer asks how the family-wise error rate is held.
Two standard answers:

* **Bonferroni** tests each of the ``m`` hypotheses at ``alpha / m``.
* **Holm's step-down procedure** (Holm 1979) orders the p-values
  ``p_(1) <= ... <= p_(m)`` and rejects ``H_(1), ..., H_(k)`` while
  ``p_(j) <= alpha / (m - j + 1)``; it rejects everything Bonferroni rejects
  and holds the same family-wise rate under any dependence.

What adjustment costs, by the normal approximation of a Wald test whose
standard error falls as ``1 / sqrt(n)``: the minimum detectable effect grows
by ``(z_{1-a'} + z_{power}) / (z_{1-a} + z_{power})`` (``a = alpha / 2`` for
two-sided tests) and the sample size by the square of that ratio.  Holm's
smallest threshold is Bonferroni's, so planning each test to have the target
power at ``alpha / m`` guarantees it under Holm too; Holm's power, computed
from the same simulated replicates, is at least Bonferroni's.

References
----------
Holm, S. (1979). A simple sequentially rejective multiple test procedure.
Scandinavian Journal of Statistics 6, 65-70.
"""

from __future__ import annotations

import math

import numpy as np
import scipy.stats

from designcalc.errors import DesignCalcError

__all__ = [
    "bonferroni_alpha",
    "bonferroni_reject",
    "holm_reject",
    "holm_thresholds",
    "mde_inflation",
    "p_values",
    "sample_size_inflation",
]

_ALTERNATIVES = ("two-sided", "greater", "less")


def _validate(alpha: float, n_hypotheses: int) -> None:
    if not 0 < alpha < 1:
        raise DesignCalcError(f"`alpha` must be in (0, 1); got {alpha}")
    if int(n_hypotheses) != n_hypotheses or n_hypotheses < 1:
        raise DesignCalcError(f"`n_hypotheses` must be a whole number >= 1; got {n_hypotheses}")


def bonferroni_alpha(alpha: float, n_hypotheses: int) -> float:
    """The per-test level that holds the family-wise rate at ``alpha``: ``alpha / m``.

    >>> bonferroni_alpha(0.05, 2)
    0.025
    """
    _validate(alpha, n_hypotheses)
    return alpha / n_hypotheses


def holm_thresholds(alpha: float, n_hypotheses: int) -> tuple[float, ...]:
    """Holm's thresholds for the ordered p-values: ``alpha / m, alpha / (m - 1), ..., alpha``.

    >>> holm_thresholds(0.05, 2)
    (0.025, 0.05)
    """
    _validate(alpha, n_hypotheses)
    return tuple(alpha / (n_hypotheses - j) for j in range(n_hypotheses))


def bonferroni_reject(p: np.ndarray, alpha: float) -> np.ndarray:
    """Bonferroni decisions for each row of p-values (replicates x hypotheses)."""
    p = np.atleast_2d(np.asarray(p, dtype=float))
    return p <= bonferroni_alpha(alpha, p.shape[1])


def holm_reject(p: np.ndarray, alpha: float) -> np.ndarray:
    """Holm step-down decisions for each row of p-values (replicates x hypotheses).

    A missing p-value (nan) is never rejected and counts as a hypothesis, so
    the procedure stays conservative.

    >>> holm_reject(np.array([[0.01, 0.04], [0.03, 0.04]]), 0.05).tolist()
    [[True, True], [False, False]]
    """
    p = np.atleast_2d(np.asarray(p, dtype=float))
    m = p.shape[1]
    thresholds = np.asarray(holm_thresholds(alpha, m))
    filled = np.where(np.isnan(p), np.inf, p)
    order = np.argsort(filled, axis=1, kind="stable")
    ordered = np.take_along_axis(filled, order, axis=1)
    # Step down: reject the j-th smallest only if it and all smaller ones pass.
    passed = np.cumprod(ordered <= thresholds, axis=1).astype(bool)
    decisions = np.zeros_like(passed)
    np.put_along_axis(decisions, order, passed, axis=1)
    return decisions


def p_values(statistic: np.ndarray, alternative: str, df: float | None = None) -> np.ndarray:
    """P-values of Wald statistics against the normal (``df=None``) or Student's t.

    >>> round(float(p_values(np.array([1.959963984540054]), "two-sided")[0]), 6)
    0.05
    """
    if alternative not in _ALTERNATIVES:
        raise DesignCalcError(f"`alternative` must be one of {', '.join(_ALTERNATIVES)}; got {alternative!r}")
    dist = scipy.stats.norm if df is None else scipy.stats.t(df)
    t = np.asarray(statistic, dtype=float)
    if alternative == "two-sided":
        return 2 * dist.sf(np.abs(t))
    if alternative == "greater":
        return dist.sf(t)
    return dist.cdf(t)


def mde_inflation(alpha: float, adjusted_alpha: float, power: float, alternative: str = "two-sided") -> float:
    """Factor by which the MDE grows when a test moves from ``alpha`` to ``adjusted_alpha`` (normal approximation).

    >>> round(mde_inflation(0.05, 0.025, 0.8), 4)   # sqrt of CHECKS.md's 1.2110
    1.1005
    """
    for name, value in (("alpha", alpha), ("adjusted_alpha", adjusted_alpha), ("power", power)):
        if not 0 < value < 1:
            raise DesignCalcError(f"`{name}` must be in (0, 1); got {value}")
    if alternative not in _ALTERNATIVES:
        raise DesignCalcError(f"`alternative` must be one of {', '.join(_ALTERNATIVES)}; got {alternative!r}")
    sides = 2 if alternative == "two-sided" else 1
    z = scipy.stats.norm.ppf
    return float((z(1 - adjusted_alpha / sides) + z(power)) / (z(1 - alpha / sides) + z(power)))


def sample_size_inflation(alpha: float, adjusted_alpha: float, power: float, alternative: str = "two-sided") -> float:
    """Factor by which the required sample size grows (SE proportional to 1 / sqrt(n)): the MDE factor squared.

    >>> round(sample_size_inflation(0.05, 0.025, 0.8), 4)   # CHECKS.md §6
    1.211
    """
    return math.pow(mde_inflation(alpha, adjusted_alpha, power, alternative), 2)

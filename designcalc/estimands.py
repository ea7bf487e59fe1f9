"""Exact estimands for one realised graph, by binomial sums grouped by degree.

Under Bernoulli(pi) assignment with fraction exposure, a unit of degree N has
M ~ Binomial(N, pi) treated neighbours independently of its own treatment, so
every estimand of METHODS.md §1.4 is a finite sum; no Monte Carlo is needed
for the truth.  Units of equal degree share the binomial weights, so the cost
is O(n + edges).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import scipy.special

from designcalc.outcomes import OutcomeModel

__all__ = ["Estimands", "exact_estimands", "mean_outcome_at", "ExposureMoments", "exposure_moments", "estimands_from_moments"]

# Units are processed in chunks so that a degree class never needs more than
# this many cells of scratch memory at once.
_CHUNK_CELLS = 4_000_000


@dataclass(frozen=True)
class Estimands:
    """Exact estimands on one graph at treatment probability ``treatment_probability``.

    ``direct``, ``spillover`` and ``total`` follow METHODS.md §1.1-1.2 (total is
    the marginal policy effect d mean / d pi = direct + spillover); ``global_effect``
    is everyone treated against nobody treated.  Isolates count in the direct and
    global effects with exposure 0 and add nothing to the spillover effect.
    """

    treatment_probability: float
    direct: float
    spillover: float
    total: float
    global_effect: float
    mean_outcome: float
    share_isolated: float
    # A clustered design's contrasts (estimator name -> exact truth, designcalc.saturation); empty otherwise.
    contrasts: dict[str, float] = field(default_factory=dict, compare=False)

    def value(self, estimand: str) -> float:
        return float(getattr(self, estimand))

    def truth(self, key: tuple[str, str, str]) -> float:
        """What the test ``key`` = (estimand, estimator, variance) estimates: its contrast's truth, else the estimand's."""
        if key[1] in self.contrasts:
            return float(self.contrasts[key[1]])
        return self.value(key[0])

    def to_dict(self) -> dict[str, float]:
        return {
            "treatment_probability": self.treatment_probability,
            "direct": self.direct,
            "spillover": self.spillover,
            "total": self.total,
            "global": self.global_effect,
            "mean_outcome": self.mean_outcome,
            "share_isolated": self.share_isolated,
        }


def _degree_classes(degrees: np.ndarray) -> list[tuple[int, np.ndarray]]:
    order = np.argsort(degrees, kind="stable")
    sorted_deg = degrees[order]
    values, starts = np.unique(sorted_deg, return_index=True)
    ends = np.append(starts[1:], sorted_deg.size)
    return [(int(d), order[s:e]) for d, s, e in zip(values, starts, ends)]


def _binomial_pmf(size: int, p: float) -> np.ndarray:
    """b(m; size, p) for m = 0..size, via log-gamma (scipy.stats.binom.pmf's per-call overhead dominated here)."""
    m = np.arange(size + 1)
    log_pmf = (
        scipy.special.gammaln(size + 1)
        - scipy.special.gammaln(m + 1)
        - scipy.special.gammaln(size - m + 1)
        + scipy.special.xlogy(m, p)
        + scipy.special.xlog1py(size - m, -p)
    )
    return np.exp(log_pmf)


def exact_estimands(
    degrees: np.ndarray,
    theta: np.ndarray,
    outcome: OutcomeModel,
    treatment_probability: float,
) -> Estimands:
    """Direct, spillover, total and global effects on a fixed graph, exactly.

    Parameters
    ----------
    degrees
        Degree N_j of every unit.
    theta
        Latent-type effect of every unit (``OutcomeModel.type_values``).
    outcome
        The outcome model; only its mean function f(theta, w, x) is used.
    treatment_probability
        Bernoulli treatment probability pi in (0, 1).

    Returns
    -------
    Estimands

    Notes
    -----
    With b(m; N, pi) the binomial pmf (METHODS.md §1.4):
    m_j(w) = sum_m b(m; N_j, pi) f_j(w, m/N_j);
    Delta_j(w) = sum_{m<N_j} b(m; N_j - 1, pi) [f_j(w, (m+1)/N_j) - f_j(w, m/N_j)];
    direct = mean_j m_j(1) - m_j(0);
    spillover = mean_j N_j [pi Delta_j(1) + (1 - pi) Delta_j(0)];
    total = direct + spillover (Biometrika 109(4), 2022; METHODS.md §1.2).
    Running time O(n + sum of degrees).

    Examples
    --------
    >>> import numpy as np
    >>> from designcalc.outcomes import OutcomeModel
    >>> model = OutcomeModel(direct_effect=1.0, spillover_effect=0.5, interaction=0.2)
    >>> e = exact_estimands(np.array([2, 2, 3]), np.zeros(3), model, 0.5)
    >>> round(e.direct, 12), round(e.spillover, 12)   # tau + gamma pi, beta + gamma pi
    (1.1, 0.6)
    """
    degrees = np.asarray(degrees, dtype=np.int64)
    theta = np.asarray(theta, dtype=float)
    pi = float(treatment_probability)
    n = degrees.size
    if n == 0:
        return Estimands(pi, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0)
    mean1 = np.empty(n)
    mean0 = np.empty(n)
    spill = np.zeros(n)
    f = outcome.mean_outcome
    for d, members in _degree_classes(degrees):
        if d == 0:
            mean1[members] = f(theta[members], 1.0, 0.0)
            mean0[members] = f(theta[members], 0.0, 0.0)
            continue
        x = np.arange(d + 1) / d
        pmf = _binomial_pmf(d, pi)
        pmf_minus = _binomial_pmf(d - 1, pi)
        rows = max(1, _CHUNK_CELLS // (d + 1))
        for start in range(0, members.size, rows):
            idx = members[start : start + rows]
            th = theta[idx][:, None]
            f1 = f(th, 1.0, x[None, :])
            f0 = f(th, 0.0, x[None, :])
            # Row sums, not BLAS matrix-vector products: a BLAS result may
            # depend on how many rows it is handed, and the estimands must
            # not depend on the chunk size.
            mean1[idx] = (f1 * pmf).sum(axis=1)
            mean0[idx] = (f0 * pmf).sum(axis=1)
            delta1 = (np.diff(f1, axis=1) * pmf_minus).sum(axis=1)
            delta0 = (np.diff(f0, axis=1) * pmf_minus).sum(axis=1)
            spill[idx] = d * (pi * delta1 + (1 - pi) * delta0)
    isolated = degrees == 0
    x_full = np.where(isolated, 0.0, 1.0)
    global_effect = float(np.mean(f(theta, 1.0, x_full) - f(theta, 0.0, 0.0)))
    direct = float(np.mean(mean1 - mean0))
    spillover = float(np.mean(spill))
    return Estimands(
        treatment_probability=pi,
        direct=direct,
        spillover=spillover,
        total=direct + spillover,
        global_effect=global_effect,
        mean_outcome=float(np.mean(pi * mean1 + (1 - pi) * mean0)),
        share_isolated=float(np.mean(isolated)),
    )


def mean_outcome_at(
    degrees: np.ndarray, theta: np.ndarray, outcome: OutcomeModel, treatment_probability: float
) -> float:
    """The mean outcome bar mu(pi) on a fixed graph (used to check total = d bar mu / d pi)."""
    return exact_estimands(degrees, theta, outcome, treatment_probability).mean_outcome


@dataclass(frozen=True)
class ExposureMoments:
    """Graph-level binomial moments of the spillover shape, shared by every continuous model on a graph.

    A continuous outcome is linear in its coefficients,
    f = baseline + theta + tau w + beta s(x) + gamma w s(x), so every
    estimand is a linear combination of the means below; the power table
    and the solvers evaluate many models (nulls, rescaled effects) on one
    graph, and this makes each evaluation O(1) instead of O(n + edges).
    """

    treatment_probability: float
    shape_key: tuple[str, float, float]
    mean_theta: float
    mean_exposure_shape: float  # mean_j E s(M_j / N_j), M_j ~ Binomial(N_j, pi); isolates s(0)
    mean_degree_increment: float  # mean_j N_j E[s((m + 1)/N_j) - s(m/N_j)], m ~ Binomial(N_j - 1, pi)
    mean_full_shape: float  # mean_j s(1) for linked units, s(0) for isolates
    shape_at_zero: float
    share_isolated: float


def _shape_key(outcome: OutcomeModel) -> tuple[str, float, float]:
    return (outcome.spillover_shape, float(outcome.saturation_rate), float(outcome.threshold))


def exposure_moments(degrees: np.ndarray, theta: np.ndarray, outcome: OutcomeModel, treatment_probability: float) -> ExposureMoments:
    """The moments of ``ExposureMoments`` on one graph, by binomial sums per degree class."""
    from designcalc.outcomes import spillover_shape_value

    degrees = np.asarray(degrees, dtype=np.int64)
    pi = float(treatment_probability)
    key = _shape_key(outcome)

    def s(x: np.ndarray) -> np.ndarray:
        return spillover_shape_value(key[0], np.asarray(x, dtype=float), rate=key[1], threshold=key[2])

    n = degrees.size
    s0 = float(s(np.array([0.0]))[0])
    if n == 0:
        return ExposureMoments(pi, key, 0.0, s0, 0.0, s0, s0, 0.0)
    shape_sum = 0.0
    increment_sum = 0.0
    for d, members in _degree_classes(degrees):
        if d == 0:
            shape_sum += members.size * s0
            continue
        values = s(np.arange(d + 1) / d)
        shape_sum += members.size * float(values @ _binomial_pmf(d, pi))
        increment_sum += members.size * d * float(np.diff(values) @ _binomial_pmf(d - 1, pi))
    isolated = float(np.mean(degrees == 0))
    s1 = float(s(np.array([1.0]))[0])
    return ExposureMoments(
        treatment_probability=pi,
        shape_key=key,
        mean_theta=float(np.mean(theta)),
        mean_exposure_shape=shape_sum / n,
        mean_degree_increment=increment_sum / n,
        mean_full_shape=(1 - isolated) * s1 + isolated * s0,
        shape_at_zero=s0,
        share_isolated=isolated,
    )


def estimands_from_moments(moments: ExposureMoments, outcome: OutcomeModel) -> Estimands:
    """Exact estimands of a continuous model from its graph's moments (equal to ``exact_estimands``).

    direct = tau + gamma E s; spillover = (beta + gamma pi) mean N D;
    global = tau + (beta + gamma) mean s(x_full) - beta s(0).
    """
    if outcome.kind != "continuous" or _shape_key(outcome) != moments.shape_key:
        raise ValueError("moments hold only for a continuous model with the same spillover shape")
    pi = moments.treatment_probability
    tau, beta, gamma = outcome.direct_effect, outcome.spillover_effect, outcome.interaction
    es = moments.mean_exposure_shape
    direct = tau + gamma * es
    spillover = (beta + gamma * pi) * moments.mean_degree_increment
    return Estimands(
        treatment_probability=pi,
        direct=direct,
        spillover=spillover,
        total=direct + spillover,
        global_effect=tau + (beta + gamma) * moments.mean_full_shape - beta * moments.shape_at_zero,
        mean_outcome=outcome.baseline + moments.mean_theta + tau * pi + beta * es + gamma * pi * es,
        share_isolated=moments.share_isolated,
    )

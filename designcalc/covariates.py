"""Baseline covariates: how they are generated alongside the outcome model.

A planner knows a baseline covariate by what it explains: the share R² of
the variance of the untreated outcome that its best linear prediction
explains, and how much of that runs through the latent type (so the
covariate also carries community information) rather than through the
unit's individual noise.  designcalc generates each covariate as a baseline
*prediction of the untreated outcome*, in outcome units and with mean zero:

    x = a * (theta - E theta) + b * zeta + c * nu,

where ``theta`` is the unit's type effect, ``zeta`` the standard-normal
latent behind its individual noise and ``nu`` fresh standard-normal noise
of the covariate's own.  For continuous outcomes ``zeta`` is the outcome
noise divided by ``noise_sd``; for binary outcomes it is the normal score
of the uniform that decides the 0/1 draw (``Y = 1`` when ``zeta`` is large),
so the covariate is a prediction on the probability scale.

The loadings are chosen so that the regression of the untreated outcome on
the covariate has slope 1 and explains exactly R² of its variance V0:

    Cov(x, Y0) = Var(x) = R² V0,
    a Cov(theta, Y0) = s R² V0,   b Cov(zeta, Y0) = (1 - s) R² V0,

with ``s`` the stated share through the type.  ``c`` takes up the rest of
``Var(x)``; when the rest would be negative the covariate is impossible
(it cannot explain more through the type than the type explains) and
:func:`covariate_loadings` says what the largest attainable R² is.

The covariate does not change the outcome model: every outcome, estimand
and unadjusted estimate is the same with or without it, so adjusted and
unadjusted estimators are compared on the very same draws.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.special
import scipy.stats

from designcalc.edge_models import BlockModel, EdgeModel
from designcalc.surveyed import SurveyedNetwork
from designcalc.errors import ModelError
from designcalc.outcomes import OutcomeModel

__all__ = ["Covariate", "CovariateError", "CovariateLoadings", "covariate_loadings", "draw_covariates", "latent_individual_scores"]

# Midpoint quadrature over the latent type u ~ U(0, 1): exact for block
# effects up to the cells cut by a block boundary (error below 1e-4).
_TYPE_NODES = 1 << 14
# A covariate whose own-noise share of variance falls below this is a
# deterministic function of type and noise; two such covariates can coincide.
_SINGULAR_TOLERANCE = 1e-9


class CovariateError(ModelError):
    """A covariate the outcome model cannot produce; ``index`` is its position (None: the set as a whole)."""

    def __init__(self, message: str, index: int | None = None) -> None:
        super().__init__(message)
        self.index = index


@dataclass(frozen=True)
class Covariate:
    """One baseline covariate as a planner states it.

    Parameters
    ----------
    name
        Label used in reports.
    r_squared
        Share of the untreated outcome's variance the covariate explains, in [0, 1).
    through_type
        Share of that explained variance carried by the latent type (community), in [0, 1].
    """

    name: str
    r_squared: float
    through_type: float = 0.0


@dataclass(frozen=True)
class CovariateLoadings:
    """How each covariate is generated from type, individual latent and own noise (see the module docstring)."""

    covariates: tuple[Covariate, ...]
    type_loading: tuple[float, ...]
    individual_loading: tuple[float, ...]
    own_noise_sd: tuple[float, ...]
    type_mean: float
    outcome_variance: float
    type_share: float  # share of V0 that the type explains on its own
    joint_r_squared: float

    @property
    def count(self) -> int:
        return len(self.covariates)

    def describe(self) -> str:
        items = [
            f"{c.name} (R² {c.r_squared:g}, {c.through_type:.0%} through the latent type)" for c in self.covariates
        ]
        joint = f"; together they explain R² = {self.joint_r_squared:.3f}" if self.count > 1 else ""
        return "baseline covariates: " + ", ".join(items) + joint


def _type_distribution(outcome: OutcomeModel, network: EdgeModel) -> np.ndarray:
    """theta(u) at midpoint nodes of u ~ U(0, 1): the population distribution of the type effect."""
    u = (np.arange(_TYPE_NODES) + 0.5) / _TYPE_NODES
    # A surveyed network's villages are blocks on intervals of u, as in a block model.
    blocks = network.block_of(u) if isinstance(network, (BlockModel, SurveyedNetwork)) else None
    if outcome.block_effects and blocks is None:
        raise ModelError("block_effects need a block model")
    return outcome.type_values(u, blocks)


def _untreated_moments(outcome: OutcomeModel, theta: np.ndarray) -> tuple[float, float, float, float]:
    """(Var theta, V0 = Var Y0, Cov(theta, Y0), Cov(zeta, Y0)) over the population of types."""
    centred = theta - theta.mean()
    var_theta = float(np.mean(centred**2))
    if outcome.kind == "continuous":
        return var_theta, var_theta + outcome.noise_sd**2, var_theta, outcome.noise_sd
    p0 = outcome.mean_outcome(theta, np.zeros_like(theta), np.zeros_like(theta))
    mean = float(p0.mean())
    # Y0 = 1{zeta > Phi^-1(1 - p0)}: Cov(zeta, Y0) = E phi(Phi^-1(p0)) (a truncated-normal mean).
    score = scipy.stats.norm.pdf(scipy.special.ndtri(np.clip(p0, 1e-300, 1.0)))
    score = np.where((p0 <= 0) | (p0 >= 1), 0.0, score)
    return var_theta, mean * (1.0 - mean), float(np.mean(centred * p0)), float(score.mean())


def covariate_loadings(
    covariates: tuple[Covariate, ...], outcome: OutcomeModel, network: EdgeModel
) -> CovariateLoadings:
    """The loadings that give each covariate its stated R² and type share.

    Raises
    ------
    CovariateError
        When a covariate asks for more than the model can give (``index`` is
        its position), or two covariates would be the same variable.

    Examples
    --------
    No type effect, noise SD 2: a covariate with R² 0.5 is a noisy copy of
    half the noise variance, slope 1.

    >>> from designcalc.edge_models import BlockModel
    >>> net = BlockModel((1.0,), ((1.0,),))
    >>> L = covariate_loadings((Covariate("x", 0.5),), OutcomeModel(noise_sd=2.0), net)
    >>> round(L.individual_loading[0], 6), round(L.own_noise_sd[0] ** 2, 6)
    (1.0, 1.0)
    """
    theta = _type_distribution(outcome, network)
    var_theta, v0, cov_theta, cov_zeta = _untreated_moments(outcome, theta)
    a_all, b_all, c_all = [], [], []
    for i, cov in enumerate(covariates):
        explained = cov.r_squared * v0
        s = cov.through_type
        if cov.r_squared == 0:
            # Unrelated to the outcome: pure noise with the outcome's spread.
            a_all.append(0.0)
            b_all.append(0.0)
            c_all.append(float(np.sqrt(v0)) if v0 > 0 else 1.0)
            continue
        if s > 0 and not cov_theta > 0:
            raise CovariateError(
                f"through_type = {s:g} asks the latent type to carry part of the covariate, "
                "but the type does not move the untreated outcome here (no type_effect or block_effects)",
                i,
            )
        if s < 1 and not cov_zeta > 0:
            raise CovariateError(
                "the untreated outcome has no individual noise to predict "
                "(noise_sd = 0, or binary probabilities of exactly 0 or 1); set through_type = 1",
                i,
            )
        a = s * explained / cov_theta if s > 0 else 0.0
        b = (1 - s) * explained / cov_zeta if s < 1 else 0.0
        rest = explained - a * a * var_theta - b * b
        if rest < -1e-12 * max(v0, 1e-300):
            # R² <= 1 / (V0 (s² Var theta / Cov(theta, Y0)² + (1 - s)² / Cov(zeta, Y0)²))
            demand = (s * s * var_theta / cov_theta**2 if s > 0 else 0.0) + ((1 - s) ** 2 / cov_zeta**2 if s < 1 else 0.0)
            largest = 1.0 / (v0 * demand)
            raise CovariateError(
                f"r_squared = {cov.r_squared:g} with through_type = {s:g} is more than this outcome "
                f"model allows: at that share the largest attainable R² is {largest:.4g} (the latent type explains "
                f"{var_theta / v0 if cov_theta > 0 else 0.0:.3g} of the untreated outcome's variance on its own)",
                i,
            )
        a_all.append(a)
        b_all.append(b)
        c_all.append(float(np.sqrt(max(rest, 0.0))))
    # Joint R² of all covariates: c' Sigma^-1 c / V0, Sigma the covariates' covariance.
    a_vec, b_vec, c_vec = np.array(a_all), np.array(b_all), np.array(c_all)
    sigma = np.outer(a_vec, a_vec) * var_theta + np.outer(b_vec, b_vec) + np.diag(c_vec**2)
    target = np.array([c.r_squared for c in covariates]) * v0
    joint = 0.0
    if covariates:
        eig = np.linalg.eigvalsh(sigma)
        if eig.min() <= _SINGULAR_TOLERANCE * max(eig.max(), 1e-300):
            raise CovariateError(
                "two or more covariates would be the same variable (no noise of their own "
                "and the same mix of type and individual noise); drop one or lower its r_squared"
            )
        joint = float(target @ np.linalg.solve(sigma, target) / v0) if v0 > 0 else 0.0
    return CovariateLoadings(
        covariates=tuple(covariates),
        type_loading=tuple(a_all),
        individual_loading=tuple(b_all),
        own_noise_sd=tuple(c_all),
        type_mean=float(theta.mean()),
        outcome_variance=v0,
        type_share=var_theta / v0 if v0 > 0 and cov_theta > 0 else 0.0,
        joint_r_squared=joint,
    )


def latent_individual_scores(kind: str, noise: np.ndarray) -> np.ndarray:
    """zeta from the engine's noise draws: the normals themselves, or normal scores of binary outcomes' uniforms."""
    if kind == "continuous":
        return noise
    # Y = 1{U < p}: a small uniform means a likely 1, so zeta = Phi^-1(1 - U).
    return scipy.special.ndtri(np.clip(1.0 - noise, 1e-16, 1.0 - 1e-16))


def draw_covariates(
    loadings: CovariateLoadings, theta: np.ndarray, zeta: np.ndarray, rng: np.random.Generator
) -> np.ndarray:
    """Covariate values, shape ``(n, B, K)``, for types ``theta`` (n,) and latents ``zeta`` (n, B)."""
    n, B = zeta.shape
    own = rng.standard_normal((n, B, loadings.count))
    centred = (theta - loadings.type_mean)[:, None]
    out = np.empty((n, B, loadings.count))
    for k in range(loadings.count):
        out[:, :, k] = (
            loadings.type_loading[k] * centred
            + loadings.individual_loading[k] * zeta
            + loadings.own_noise_sd[k] * own[:, :, k]
        )
    return out

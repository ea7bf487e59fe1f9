"""Closed-form variances, MDEs and allocations for clustered and randomized saturation designs.

These functions are the analytic path of METHODS.md §5.2-5.3.  They cover
clustered designs with a cluster random effect and no network:

* outcome ``Y_ic = mu + (arm effect) + v_c + e_ic`` with total variance
  ``sigma^2`` and intracluster correlation ``rho``, so that
  ``Var(v_c) = rho sigma^2`` and ``Var(e_ic) = (1 - rho) sigma^2``;
* ``C`` clusters of equal size ``m``;
* a share ``psi`` of pure-control clusters (saturation 0);
* saturations ``p_j`` given to shares ``f_j`` of *all* clusters, with
  ``sum_j f_j = 1 - psi``;
* complete randomisation inside a cluster: exactly ``p_j m`` of its units
  are treated.

Every estimator is a difference of cell means (METHODS.md §5.2: OLS on the
saturation-by-treatment dummies reduces to cell means), so its variance is a
sum of independent cluster-level terms.  The formulas are exact for that
model when ``C psi``, ``C f_j`` and ``p_j m`` are whole numbers; otherwise
they are the natural continuous approximation.  Pass the realised
saturations (treated count / m) when you want the exact value for a design
that rounds ``p_j m``.  No finite-population corrections are applied: the
model is a superpopulation random-effects model.

Effects and MDEs are in the units of ``sigma`` (``sigma = 1``: standardised
effects).  Every normal-approximation power or MDE here uses the multiplier
of Bloom (1995); pass ``df`` to :func:`minimum_detectable_effect` for t
quantiles with few clusters (METHODS.md §4.6).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import asdict, dataclass

import numpy as np
import scipy as sp
import scipy.optimize
import scipy.stats

from designcalc.errors import DesignCalcError
from designcalc.inference import critical_value, mde_multiplier

__all__ = [
    "RequiredClusters",
    "SaturationVariances",
    "best_pure_control_share",
    "cluster_trial_variance",
    "clusters_per_arm",
    "clusters_per_arm_ceil",
    "design_effect",
    "large_cluster_limit",
    "max_power_with_clusters",
    "minimum_detectable_effect",
    "optimal_pure_control_share",
    "optimal_pure_control_share_itt",
    "required_clusters",
    "saturation_variances",
]

_ALTERNATIVES = ("two-sided", "greater", "less")
_SINGLE_CONTRASTS = ("itt", "snt", "tce", "dir")
# Shares are user input, often typed as decimals (0.7 / 3); allow rounding error only.
_SHARE_TOLERANCE = 1e-9


# --- validation -----------------------------------------------------------------


def _check_icc(icc: float) -> float:
    icc = float(icc)
    if not 0.0 <= icc < 1.0:
        raise DesignCalcError(f"`icc` must be a float in [0, 1); got {icc!r}.")
    return icc


def _check_cluster_size(m: float) -> float:
    m = float(m)
    if not (m >= 1.0 and math.isfinite(m)):
        raise DesignCalcError(f"`m` (cluster size) must be a finite number >= 1; got {m!r}.")
    return m


def _check_positive(name: str, value: float) -> float:
    value = float(value)
    if not (value > 0.0 and math.isfinite(value)):
        raise DesignCalcError(f"`{name}` must be a finite number > 0; got {value!r}.")
    return value


def _check_open_unit(name: str, value: float) -> float:
    value = float(value)
    if not 0.0 < value < 1.0:
        raise DesignCalcError(f"`{name}` must be a float in (0, 1); got {value!r}.")
    return value


def _check_saturation(name: str, value: float) -> float:
    value = float(value)
    if not 0.0 < value <= 1.0:
        raise DesignCalcError(f"`{name}` must be a float in (0, 1]; got {value!r}.")
    return value


def _check_alternative(alternative: str) -> str:
    if alternative not in _ALTERNATIVES:
        raise DesignCalcError(f"`alternative` must be one of {_ALTERNATIVES}; got {alternative!r}.")
    return alternative


def _check_contrast(contrast: str, allowed: tuple[str, ...]) -> str:
    if contrast not in allowed:
        raise DesignCalcError(f"`contrast` must be one of {allowed}; got {contrast!r}.")
    return contrast


def _check_design(
    psi: float, saturations: Sequence[float], shares: Sequence[float]
) -> tuple[float, np.ndarray, np.ndarray]:
    psi = _check_open_unit("psi", psi)
    p = np.atleast_1d(np.asarray(saturations, dtype=float))
    f = np.atleast_1d(np.asarray(shares, dtype=float))
    if p.ndim != 1 or p.size == 0:
        raise DesignCalcError(f"`saturations` must be a non-empty list of floats in (0, 1]; got {saturations!r}.")
    if f.shape != p.shape:
        raise DesignCalcError(
            f"`shares` must have one entry per saturation ({p.size}); got {f.size} entries: {shares!r}."
        )
    for j, pj in enumerate(p):
        _check_saturation(f"saturations[{j}]", pj)
    for j, fj in enumerate(f):
        if not 0.0 < fj < 1.0:
            raise DesignCalcError(f"`shares[{j}]` must be a float in (0, 1); got {float(fj)!r}.")
    if abs(f.sum() - (1.0 - psi)) > _SHARE_TOLERANCE:
        raise DesignCalcError(
            f"`shares` must sum to 1 - psi = {1.0 - psi:g} (they are shares of ALL clusters); "
            f"got sum {float(f.sum()):g}. Hint: multiply shares of the treated clusters by 1 - psi."
        )
    return psi, p, f


# --- the classical two-arm cluster trial -----------------------------------------


def design_effect(m: float, icc: float) -> float:
    """Design effect 1 + (m - 1) rho of a cluster sample with equal cluster sizes.

    Parameters
    ----------
    m
        Cluster size (>= 1).
    icc
        Intracluster correlation rho in [0, 1).

    Returns
    -------
    float
        The factor by which clustering inflates the variance of a mean.

    Raises
    ------
    DesignCalcError
        If an argument is outside its range.

    Notes
    -----
    The mean of a cluster of m units has variance
    sigma^2 [rho + (1 - rho)/m] = sigma^2 DE / m.

    References
    ----------
    Kish (1965), *Survey Sampling*; Donner & Klar (2000), *Design and Analysis
    of Cluster Randomization Trials*.

    Examples
    --------
    >>> round(design_effect(20, 0.05), 4)
    1.95
    """
    m = _check_cluster_size(m)
    icc = _check_icc(icc)
    return 1.0 + (m - 1.0) * icc


def clusters_per_arm(n_individual: float, m: float, icc: float, *, rounded: bool = False) -> float:
    """Clusters per arm n_individual DE / m that match an individually randomised trial.

    Parameters
    ----------
    n_individual
        Units per arm an individually randomised trial would need (> 0).
    m
        Cluster size (>= 1).
    icc
        Intracluster correlation in [0, 1).
    rounded
        Return the ceiling (as a float) instead of the exact value.

    Returns
    -------
    float
        Clusters per arm; not rounded unless ``rounded=True``.

    Raises
    ------
    DesignCalcError
        If an argument is outside its range.

    References
    ----------
    Donner & Klar (2000), *Design and Analysis of Cluster Randomization
    Trials* (formula form as quoted in CHECKS.md §2).

    Examples
    --------
    >>> round(clusters_per_arm(62.79, 20, 0.05), 2)
    6.12
    >>> clusters_per_arm(62.79, 20, 0.05, rounded=True)
    7.0
    """
    n_individual = _check_positive("n_individual", n_individual)
    exact = n_individual * design_effect(m, icc) / float(m)
    return float(math.ceil(exact)) if rounded else exact


def clusters_per_arm_ceil(n_individual: float, m: float, icc: float) -> int:
    """The whole number of clusters per arm: the ceiling of :func:`clusters_per_arm`.

    Examples
    --------
    >>> clusters_per_arm_ceil(62.79, 20, 0.05)
    7
    """
    return math.ceil(clusters_per_arm(n_individual, m, icc))


def cluster_trial_variance(clusters_per_arm: float, m: float, icc: float, sigma: float = 1.0) -> float:
    """Variance 2 sigma^2 DE / (k m) of a difference of two arm means with k clusters per arm.

    Parameters
    ----------
    clusters_per_arm
        Clusters per arm k (> 0).
    m
        Cluster size (>= 1).
    icc
        Intracluster correlation in [0, 1).
    sigma
        Total outcome standard deviation (> 0).

    Returns
    -------
    float

    Raises
    ------
    DesignCalcError
        If an argument is outside its range.

    References
    ----------
    Derived from the design effect of Kish (1965): each arm mean averages k
    independent cluster means of variance sigma^2 DE / m.

    Examples
    --------
    >>> round(cluster_trial_variance(30, 20, 0.05), 6)
    0.0065
    """
    k = _check_positive("clusters_per_arm", clusters_per_arm)
    sigma = _check_positive("sigma", sigma)
    return 2.0 * sigma**2 * design_effect(m, icc) / (k * float(m))


# --- randomized saturation designs (METHODS.md §5.2) ------------------------------


@dataclass(frozen=True)
class SaturationVariances:
    """Closed-form variances of the estimators of a randomized saturation design.

    Per-saturation entries are tuples in the order of ``saturations``; an
    entry is ``None`` where the contrast does not exist (SNT and the direct
    contrast need untreated units, so not at saturation 1).  Scalars are
    ``None`` when undefined (pooled SNT when every saturation is 1; the
    slope with fewer than two distinct saturations below 1).

    Attributes
    ----------
    itt, snt, tce, dir
        Saturation-specific ITT(p_j), SNT(p_j), TCE(p_j) and the
        within-saturation direct contrast (treated vs untreated in the
        p_j clusters).
    itt_pooled, snt_pooled
        Pooled ITT and SNT, individuals weighted equally.
    snt_slope
        METHODS.md §5.2's approximate variance of the slope of SNT in p
        (OLS of untreated cluster means on p over treated clusters with
        p < 1; heteroskedasticity in p ignored).
    snt_slope_exact
        The exact variance of that same unweighted OLS slope [D].  Prefer it:
        on C = 60, m = 20, rho = .2, saturations .3/.8 the approximation is
        about 12% below the exact (and simulated) variance, because
        1/(1 - p) is convex and the approximation evaluates it at pbar.
    """

    C: float
    m: float
    icc: float
    psi: float
    saturations: tuple[float, ...]
    shares: tuple[float, ...]
    sigma: float
    itt: tuple[float, ...]
    snt: tuple[float | None, ...]
    tce: tuple[float, ...]
    dir: tuple[float | None, ...]
    itt_pooled: float
    snt_pooled: float | None
    snt_slope: float | None
    snt_slope_exact: float | None

    def to_dict(self) -> dict[str, object]:
        """All inputs and variances as plain Python data."""
        return asdict(self)


def _cluster_mean_variance(m: float, icc: float, n_units: float) -> float:
    """Var of the mean of n_units units of one cluster, over sigma^2: rho + (1 - rho)/n_units."""
    return icc + (1.0 - icc) / n_units


def saturation_variances(
    C: float,
    m: float,
    icc: float,
    psi: float,
    saturations: Sequence[float],
    shares: Sequence[float],
    sigma: float = 1.0,
) -> SaturationVariances:
    """Closed-form variances of the saturation-specific, pooled and slope estimators.

    Parameters
    ----------
    C
        Number of clusters (> 0).
    m
        Cluster size (>= 1).
    icc
        Intracluster correlation rho in [0, 1).
    psi
        Share of pure-control clusters, in (0, 1).
    saturations
        Saturations p_j in (0, 1] of the treated clusters.
    shares
        Shares f_j of ALL clusters at each saturation; they must sum to
        1 - psi.
    sigma
        Total outcome standard deviation (> 0).

    Returns
    -------
    SaturationVariances

    Raises
    ------
    DesignCalcError
        If an argument is outside its range or the shares do not sum to 1 - psi.

    Notes
    -----
    With r(n) = rho + (1 - rho)/n the variance (over sigma^2) of the mean of
    n units of one cluster, and r_0 = r(m) (METHODS.md §5.2):

    * ITT(p_j): [r(m p_j)/f_j + r_0/psi] / C;
    * SNT(p_j): [r(m (1 - p_j))/f_j + r_0/psi] / C;
    * TCE(p_j): r_0 (1/f_j + 1/psi) / C;
    * pooled ITT: [(rho E[p^2]/mu^2 + (1 - rho)/(m mu))/(1 - psi) + r_0/psi] / C,
      moments over treated clusters (shares renormalised to sum to 1);
      pooled SNT replaces p by 1 - p;
    * slope of SNT in p (approximate): r(m (1 - pbar)) / (C' Var(p)) with
      C' = C x (share of clusters with 0 < p < 1), pbar and Var(p) over
      those clusters;
    * direct contrast [D]: (1 - rho)(1/p_j + 1/(1 - p_j)) / (C f_j m).

    References
    ----------
    Baird, Bohren, McIntosh & Özler (2018), Review of Economics and
    Statistics, design; the variance expressions are derived in
    METHODS.md §5.2 (not the paper's printed forms).

    Examples
    --------
    >>> v = saturation_variances(120, 30, 0.1, 0.3, [0.25, 0.5, 0.75], [0.7 / 3] * 3)
    >>> round(v.itt_pooled, 6), round(v.tce[1], 6)
    (0.005714, 0.008254)
    """
    C = _check_positive("C", C)
    m = _check_cluster_size(m)
    icc = _check_icc(icc)
    sigma = _check_positive("sigma", sigma)
    psi, p, f = _check_design(psi, saturations, shares)
    s2 = sigma**2
    control = _cluster_mean_variance(m, icc, m) / psi  # the pure-control arm's term, times C

    itt = tuple(float(s2 * (_cluster_mean_variance(m, icc, m * pj) / fj + control) / C) for pj, fj in zip(p, f))
    snt = tuple(
        float(s2 * (_cluster_mean_variance(m, icc, m * (1 - pj)) / fj + control) / C) if pj < 1 else None
        for pj, fj in zip(p, f)
    )
    # TCE = p ITT + (1 - p) SNT is the cluster mean (exactly p m treated) minus the control mean.
    tce = tuple(float(s2 * _cluster_mean_variance(m, icc, m) * (1 / fj + 1 / psi) / C) for fj in f)
    # [D] Direct contrast in the p_j clusters: within cluster c the difference of
    # treated and untreated means is (v_c + ebar_T) - (v_c + ebar_U), so v_c
    # cancels and Var = (1 - rho) sigma^2 [1/(m p) + 1/(m (1 - p))].  The
    # C f_j clusters are independent and equally weighted (equal counts), so
    # the average over them divides this by C f_j.  Complete randomisation
    # inside clusters; no finite-population correction (superpopulation model).
    direct = tuple(
        float(s2 * (1 - icc) * (1 / pj + 1 / (1 - pj)) / (C * fj * m)) if pj < 1 else None
        for pj, fj in zip(p, f)
    )

    def pooled(weight: np.ndarray) -> float | None:
        # Individuals weighted equally: cluster c enters with weight m w_c
        # (w = p for treated, 1 - p for untreated units), so
        # Var = rho sum w^2/(sum w)^2 + (1 - rho)/(m sum w), sums over the
        # C (1 - psi) treated clusters; sum w = C(1 - psi) mu, sum w^2 = C(1 - psi) E[w^2].
        g = f / f.sum()
        mu = float(g @ weight)
        if mu <= 0:
            return None
        second = float(g @ weight**2)
        treated = (icc * second / mu**2 + (1 - icc) / (m * mu)) / (1 - psi)
        return float(s2 * (treated + control) / C)

    itt_pooled = pooled(p)
    assert itt_pooled is not None  # every saturation is > 0
    snt_pooled = pooled(1 - p)

    snt_slope: float | None = None
    snt_slope_exact: float | None = None
    below = p < 1
    if np.unique(p[below]).size >= 2:
        # Only clusters with untreated units enter the regression, so the
        # cluster count is C times their share (METHODS writes C(1 - psi),
        # which is the same when no saturation is 1).
        share = float(f[below].sum())
        g = f[below] / share
        pb = p[below]
        pbar = float(g @ pb)
        var_p = float(g @ (pb - pbar) ** 2)
        n_clusters = C * share
        # METHODS.md §5.2: the untreated-mean variance is evaluated at pbar
        # for every cluster, i.e. heteroskedasticity in p is ignored.
        snt_slope = float(s2 * _cluster_mean_variance(m, icc, m * (1 - pbar)) / (n_clusters * var_p))
        # [D] Exact variance of the same unweighted OLS slope b = sum (p_c - pbar) y_c / S,
        # S = sum (p_c - pbar)^2 = n Var(p), y_c independent with Var r(m (1 - p_c)):
        # Var b = sum (p_c - pbar)^2 r(m (1 - p_c)) / S^2.
        r = _cluster_mean_variance(m, icc, m * (1 - pb))
        snt_slope_exact = float(s2 * (g @ ((pb - pbar) ** 2 * r)) / (n_clusters * var_p**2))

    return SaturationVariances(
        C=C,
        m=m,
        icc=icc,
        psi=psi,
        saturations=tuple(float(x) for x in p),
        shares=tuple(float(x) for x in f),
        sigma=sigma,
        itt=itt,
        snt=snt,
        tce=tce,
        dir=direct,
        itt_pooled=itt_pooled,
        snt_pooled=snt_pooled,
        snt_slope=snt_slope,
        snt_slope_exact=snt_slope_exact,
    )


def _single_contrast_variance(C: float, m: float, icc: float, psi: float, p: float, f: float, contrast: str) -> float:
    """Variance over sigma^2 of one saturation-specific contrast (validated inputs)."""
    control = _cluster_mean_variance(m, icc, m) / psi
    if contrast == "itt":
        return (_cluster_mean_variance(m, icc, m * p) / f + control) / C
    if contrast == "tce":
        return _cluster_mean_variance(m, icc, m) * (1 / f + 1 / psi) / C
    if p >= 1:
        raise DesignCalcError(f"`contrast` {contrast!r} needs untreated units, so `saturation` must be < 1; got {p!r}.")
    if contrast == "snt":
        return (_cluster_mean_variance(m, icc, m * (1 - p)) / f + control) / C
    return (1 - icc) * (1 / p + 1 / (1 - p)) / (C * f * m)  # "dir"


# --- MDE and power ----------------------------------------------------------------


def minimum_detectable_effect(
    variance: float,
    alpha: float = 0.05,
    power: float = 0.8,
    alternative: str = "two-sided",
    df: float | None = None,
) -> float:
    """MDE = (q_{1-alpha/2} + q_{power}) sqrt(variance) (one-sided: q_{1-alpha}).

    Parameters
    ----------
    variance
        Variance of the estimator (> 0).
    alpha
        Test level in (0, 1).
    power
        Target power in (0, 1).
    alternative
        "two-sided", "greater" or "less" (the last two are one-sided).
    df
        Degrees of freedom of a t reference distribution; None for the normal.

    Returns
    -------
    float

    Raises
    ------
    DesignCalcError
        If an argument is outside its range.

    References
    ----------
    Bloom (1995), Evaluation Review 19(5):547-556 (multiplier 2.8016 at
    alpha = .05 two-sided, power .8).

    Examples
    --------
    >>> round(minimum_detectable_effect(1.0), 4)
    2.8016
    """
    variance = _check_positive("variance", variance)
    alpha = _check_open_unit("alpha", alpha)
    power = _check_open_unit("power", power)
    alternative = _check_alternative(alternative)
    if df is not None:
        df = _check_positive("df", df)
    return mde_multiplier(alpha, power, alternative, df) * math.sqrt(variance)


def _normal_power(effect: float, se: float, alpha: float, alternative: str) -> float:
    z = critical_value(alpha, alternative)
    ratio = effect / se
    if alternative == "two-sided":
        return float(sp.stats.norm.cdf(ratio - z) + sp.stats.norm.cdf(-ratio - z))
    if alternative == "greater":
        return float(sp.stats.norm.cdf(ratio - z))
    return float(sp.stats.norm.cdf(-ratio - z))


# --- optimal allocation (METHODS.md §5.3) ------------------------------------------


def optimal_pure_control_share(a: float, b: float) -> float:
    """Square-root rule psi* = sqrt(b) / (sqrt(a) + sqrt(b)) minimising a/f + b/psi with f + psi = 1.

    Parameters
    ----------
    a
        Coefficient of 1/f (the treated side), > 0.
    b
        Coefficient of 1/psi (the pure-control side), > 0.

    Returns
    -------
    float
        The optimal pure-control share.

    Raises
    ------
    DesignCalcError
        If a or b is not positive.

    Notes
    -----
    d/dpsi [a/(1 - psi) + b/psi] = 0 gives a psi^2 = b (1 - psi)^2.

    References
    ----------
    The square-root (Neyman) allocation; METHODS.md §5.3.

    Examples
    --------
    >>> optimal_pure_control_share(1.0, 1.0)
    0.5
    """
    a = _check_positive("a", a)
    b = _check_positive("b", b)
    return math.sqrt(b) / (math.sqrt(a) + math.sqrt(b))


def optimal_pure_control_share_itt(m: float, icc: float, p: float) -> float:
    """Square-root rule for the ITT at one saturation p: a = rho + (1-rho)/(m p), b = rho + (1-rho)/m.

    Parameters
    ----------
    m
        Cluster size (>= 1).
    icc
        Intracluster correlation in [0, 1).
    p
        The single saturation, in (0, 1].

    Returns
    -------
    float

    Raises
    ------
    DesignCalcError
        If an argument is outside its range.

    References
    ----------
    METHODS.md §5.3: at rho = 0 and p = 1/2, psi* = 1/(sqrt 2 + 1) ~ 0.41;
    as rho -> 1, psi* -> 1/2.

    Examples
    --------
    >>> round(optimal_pure_control_share_itt(30, 0.0, 0.5), 4)
    0.4142
    """
    m = _check_cluster_size(m)
    icc = _check_icc(icc)
    p = _check_saturation("p", p)
    return optimal_pure_control_share(
        _cluster_mean_variance(m, icc, m * p), _cluster_mean_variance(m, icc, m)
    )


def best_pure_control_share(C: float, m: float, icc: float, saturation: float, contrast: str = "itt") -> float:
    """The pure-control share minimising a single-saturation contrast's closed-form variance, found numerically.

    All treated clusters get ``saturation`` (f = 1 - psi).  This is an
    independent numerical check of the square-root rule.

    Parameters
    ----------
    C
        Number of clusters (> 0); it scales the variance only.
    m
        Cluster size (>= 1).
    icc
        Intracluster correlation in [0, 1).
    saturation
        The saturation of treated clusters, in (0, 1] (< 1 for "snt").
    contrast
        "itt", "snt" or "tce".

    Returns
    -------
    float
        The minimising psi in (0, 1).

    Raises
    ------
    DesignCalcError
        If an argument is outside its range.

    Notes
    -----
    Bounded Brent minimisation (``scipy.optimize.minimize_scalar``) of
    psi -> Var(psi) on (0, 1) with absolute tolerance 1e-10.

    Examples
    --------
    >>> round(best_pure_control_share(100, 30, 0.0, 0.5), 4)
    0.4142
    """
    C = _check_positive("C", C)
    m = _check_cluster_size(m)
    icc = _check_icc(icc)
    p = _check_saturation("saturation", saturation)
    contrast = _check_contrast(contrast, ("itt", "snt", "tce"))
    if contrast == "snt" and p >= 1:
        raise DesignCalcError(f"`saturation` must be < 1 for contrast 'snt'; got {p!r}.")

    def objective(psi: float) -> float:
        return _single_contrast_variance(C, m, icc, psi, p, 1.0 - psi, contrast)

    result = sp.optimize.minimize_scalar(
        objective, bounds=(1e-9, 1 - 1e-9), method="bounded", options={"xatol": 1e-10}
    )
    return float(result.x)


# --- clusters versus cluster size (METHODS.md §5.3) -------------------------------


def large_cluster_limit(C: float, icc: float, psi: float, share: float, sigma: float = 1.0) -> float:
    """Variance of a single-saturation ITT or TCE contrast as m -> infinity: sigma^2 rho (1/f + 1/psi) / C.

    Parameters
    ----------
    C
        Number of clusters (> 0).
    icc
        Intracluster correlation in [0, 1).
    psi
        Share of pure-control clusters, in (0, 1).
    share
        Share f of all clusters at the saturation, with f + psi <= 1.
    sigma
        Total outcome standard deviation (> 0).

    Returns
    -------
    float
        The variance floor no cluster size can beat with C clusters (0 when rho = 0).

    Raises
    ------
    DesignCalcError
        If an argument is outside its range.

    Notes
    -----
    Every within-cluster term (1 - rho)/(m p) of §5.2 vanishes as m grows,
    leaving the cluster effects: the same limit holds for SNT at p < 1.

    Examples
    --------
    >>> round(large_cluster_limit(100, 0.1, 0.5, 0.5), 6)
    0.004
    """
    C = _check_positive("C", C)
    icc = _check_icc(icc)
    psi = _check_open_unit("psi", psi)
    f = _check_open_unit("share", share)
    sigma = _check_positive("sigma", sigma)
    if f + psi > 1 + _SHARE_TOLERANCE:
        raise DesignCalcError(f"`share` + `psi` must be <= 1; got {f!r} + {psi!r}.")
    return sigma**2 * icc * (1 / f + 1 / psi) / C


def max_power_with_clusters(
    effect: float,
    C: float,
    icc: float,
    psi: float,
    f: float,
    alpha: float = 0.05,
    alternative: str = "two-sided",
    *,
    sigma: float = 1.0,
) -> float:
    """The power no cluster size can exceed with C clusters (single-saturation ITT, SNT or TCE, normal approximation).

    Parameters
    ----------
    effect
        True effect, in the units of sigma (non-zero).
    C
        Number of clusters (> 0).
    icc
        Intracluster correlation in (0, 1); with rho = 0 the bound is 1.
    psi
        Share of pure-control clusters, in (0, 1).
    f
        Share of all clusters at the saturation.
    alpha
        Test level in (0, 1).
    alternative
        "two-sided", "greater" or "less".
    sigma
        Total outcome standard deviation (> 0).

    Returns
    -------
    float
        Power at the standard error sqrt(:func:`large_cluster_limit`); the
        variance falls with m toward that limit, so this is a supremum.

    Raises
    ------
    DesignCalcError
        If an argument is outside its range.

    Notes
    -----
    METHODS.md §4.6: two-sided power Phi(tau/SE - z) + Phi(-tau/SE - z).

    Examples
    --------
    >>> round(max_power_with_clusters(0.2, 40, 0.1, 0.5, 0.5), 3)
    0.516
    """
    effect = float(effect)
    if effect == 0 or not math.isfinite(effect):
        raise DesignCalcError(f"`effect` must be a finite non-zero number; got {effect!r}.")
    alpha = _check_open_unit("alpha", alpha)
    alternative = _check_alternative(alternative)
    variance = large_cluster_limit(C, icc, psi, f, sigma)
    if variance == 0.0:
        return 1.0 if alternative == "two-sided" or (effect > 0) == (alternative == "greater") else 0.0
    return _normal_power(effect, math.sqrt(variance), alpha, alternative)


@dataclass(frozen=True)
class RequiredClusters:
    """The number of clusters a single-saturation contrast needs to reach an MDE.

    Attributes
    ----------
    clusters
        The exact solution C of MDE(C) = effect (a float).
    clusters_ceil
        Its ceiling.  Whole numbers of pure-control and treated clusters
        (C psi, C f) are the user's to round; the formulas treat them as
        continuous.
    variance_per_cluster
        C x Var (the variance at C = 1), so Var = variance_per_cluster / C.
    """

    effect: float
    m: float
    icc: float
    psi: float
    saturation: float
    share: float
    contrast: str
    alpha: float
    power: float
    sigma: float
    clusters: float
    clusters_ceil: int
    variance_per_cluster: float

    def to_dict(self) -> dict[str, object]:
        """All inputs and outputs as plain Python data."""
        return asdict(self)


def required_clusters(
    effect: float,
    m: float,
    icc: float,
    psi: float,
    saturation: float,
    share: float,
    contrast: str,
    alpha: float = 0.05,
    power: float = 0.8,
    sigma: float = 1.0,
    *,
    alternative: str = "two-sided",
) -> RequiredClusters:
    """Smallest number of clusters C at which the normal-approximation MDE of a contrast is <= effect.

    Parameters
    ----------
    effect
        Target effect (> 0), in the units of sigma.
    m
        Cluster size (>= 1).
    icc
        Intracluster correlation in [0, 1).
    psi
        Share of pure-control clusters, in (0, 1).
    saturation
        Saturation p of the contrast's clusters, in (0, 1] (< 1 for "snt", "dir").
    share
        Share f of ALL clusters at that saturation, f + psi <= 1.
    contrast
        "itt", "snt", "tce" or "dir" (the within-saturation direct contrast).
    alpha, power, alternative
        The planned test.
    sigma
        Total outcome standard deviation (> 0).

    Returns
    -------
    RequiredClusters

    Raises
    ------
    DesignCalcError
        If an argument is outside its range.

    Notes
    -----
    Every variance of §5.2 is V1 / C, so MDE(C) = M sqrt(V1 / C) and the
    solution is C = M^2 V1 / effect^2, M the normal multiplier of Bloom (1995).

    Examples
    --------
    >>> r = required_clusters(0.2, 30, 0.05, 0.5, 0.5, 0.5, "itt")
    >>> round(r.clusters, 2), r.clusters_ceil
    (76.53, 77)
    """
    effect = _check_positive("effect", effect)
    m = _check_cluster_size(m)
    icc = _check_icc(icc)
    psi = _check_open_unit("psi", psi)
    p = _check_saturation("saturation", saturation)
    f = _check_open_unit("share", share)
    if f + psi > 1 + _SHARE_TOLERANCE:
        raise DesignCalcError(f"`share` + `psi` must be <= 1; got {f!r} + {psi!r}.")
    contrast = _check_contrast(contrast, _SINGLE_CONTRASTS)
    alpha = _check_open_unit("alpha", alpha)
    power = _check_open_unit("power", power)
    alternative = _check_alternative(alternative)
    sigma = _check_positive("sigma", sigma)
    per_cluster = sigma**2 * _single_contrast_variance(1.0, m, icc, psi, p, f, contrast)
    multiplier = mde_multiplier(alpha, power, alternative)
    clusters = multiplier**2 * per_cluster / effect**2
    return RequiredClusters(
        effect=effect,
        m=m,
        icc=icc,
        psi=psi,
        saturation=p,
        share=f,
        contrast=contrast,
        alpha=alpha,
        power=power,
        sigma=sigma,
        clusters=float(clusters),
        clusters_ceil=math.ceil(clusters),
        variance_per_cluster=float(per_cluster),
    )


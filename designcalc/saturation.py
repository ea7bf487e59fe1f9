"""Two-stage randomized saturation designs on a clustered population (METHODS.md §5).

Stage 1 allocates clusters to arms: a share ``pure_control_share`` of
clusters treats nobody, and each saturation p_j gets its share f_j of the
clusters.  The counts per arm are fixed (Webster's divisor method rounding
of the shares times the number of clusters, ``arm_counts``) and which clusters get which arm is a
uniformly random permutation, drawn afresh for every assignment.  Stage 2
treats units inside each cluster: exactly k_c = floor(p m_c + 1/2) of its m_c
units (complete randomization, the default) or each unit with probability p
(``within = "bernoulli"``).  A cluster-randomized trial is the special case
of one saturation, p = 1.

Contrasts (the tests a saturation design plans), each a difference of
unit-weighted cell means, all relative to the pure-control clusters:

* ``itt@p``  treated units at saturation p           (ITT(p), family "total")
* ``snt@p``  untreated units at saturation p         (SNT(p), "spillover")
* ``tce@p``  all units at saturation p               (TCE(p), "total")
* ``dir@p``  treated minus untreated within p-clusters (the direct effect at p, "direct")
* ``itt_pooled`` / ``snt_pooled``  treated / untreated units of every treated cluster
* ``itt_slope`` / ``snt_slope``  the slope in p of the treated / untreated cluster
  means across treated clusters (an OLS line through the cluster means, "spillover")

The family decides the null a test is run under and which effect a solver
rescales (``OutcomeModel.null_for`` / ``scaled_for``): a spillover contrast
is zero when the spillover effect is, an ITT or TCE when both effects are.

Standard errors are cluster-robust: a contrast sum_a a_cell * mean_cell has
cluster contributions psi_c = sum_a a_cell * (S_cell,c - N_cell,c mean_cell) / N_cell
(S and N the cell's outcome sum and count in cluster c), and
V = sum_g G_g / (G_g - 1) * sum_{c in g} psi_c^2, one small-sample factor per
group of clusters compared (an arm, pure control; the CR2 correction for
cell means of equal clusters).  The slopes use HC2 on the cluster means.
Wald tests refer to Student t: an arm against pure control with the
Welch-Satterthwaite df of its two variance parts at their expected sizes
(``contrast_df``), ``dir@p`` with G - 1, a slope with G - 2.  Every arm
needs ``MIN_CLUSTERS_PER_ARM`` clusters: with two in an arm no such test
held its size in simulation.

Truths are exact on each simulated graph: given own treatment, a unit's
treated neighbours are hypergeometric (complete randomization: k_c - 1 or
k_c treated among the m_c - 1 others, N_i of them neighbours) or binomial
(Bernoulli within), so every cell mean's expectation is a finite sum
(as ``estimands`` does for Bernoulli assignment).  A cell's truth is the
ratio of expected sums over the random allocation (every cluster equally
likely in every arm), the estimand the unit-weighted cell mean estimates.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.stats

from designcalc.clusters import cluster_starts
from designcalc.errors import DesignCalcError
from designcalc.outcomes import OutcomeModel, spillover_shape_value

__all__ = [
    "CONTRAST_KINDS",
    "DEFAULT_CONTRASTS",
    "SaturationDesign",
    "arm_counts",
    "assign",
    "contrast_df",
    "contrast_family",
    "contrast_names",
    "contrast_truths",
    "describe_contrast",
    "estimate_contrasts",
    "is_contrast",
    "treated_counts",
]

#: What a scenario's ``[estimators] contrasts`` can list.
CONTRAST_KINDS = ("itt", "snt", "tce", "direct", "pooled", "slope")
DEFAULT_CONTRASTS = ("itt", "snt", "tce", "pooled", "slope")
WITHIN_RULES = ("complete", "bernoulli")
_VARIANCE = "cluster_robust"


@dataclass(frozen=True)
class SaturationDesign:
    """Arms of a two-stage design: pure control and saturations with their shares of all clusters."""

    pure_control_share: float
    saturations: tuple[float, ...]
    shares: tuple[float, ...]
    within: str = "complete"
    contrasts: tuple[str, ...] = DEFAULT_CONTRASTS

    def __post_init__(self) -> None:
        if not 0.0 < self.pure_control_share < 1.0:
            raise DesignCalcError(f"pure_control_share must be in (0, 1); got {self.pure_control_share}")
        if len(self.saturations) != len(self.shares) or not self.saturations:
            raise DesignCalcError("saturations and their shares must be lists of the same, non-zero length")
        if any(not 0.0 < p <= 1.0 for p in self.saturations):
            raise DesignCalcError(f"saturations must be in (0, 1]; got {list(self.saturations)}")
        if abs(self.pure_control_share + sum(self.shares) - 1.0) > 1e-9:
            raise DesignCalcError("the pure-control share and the saturations' shares must add up to 1")
        if self.within not in WITHIN_RULES:
            raise DesignCalcError(f"within must be one of {WITHIN_RULES}; got {self.within!r}")

    @property
    def mean_saturation(self) -> float:
        """The expected share of units treated: what the design point's treatment probability records."""
        return float(sum(f * p for f, p in zip(self.shares, self.saturations)))

    @property
    def is_cluster_randomized(self) -> bool:
        return self.saturations == (1.0,)

    def describe(self) -> str:
        if self.is_cluster_randomized:
            return f"cluster-randomized: {1 - self.pure_control_share:.0%} of clusters treated in full, the rest control"
        arms = ", ".join(f"{p:g} in {f:.0%}" for p, f in zip(self.saturations, self.shares))
        within = "exactly that share" if self.within == "complete" else "each unit with that probability"
        return f"randomized saturation: {self.pure_control_share:.0%} pure control; saturations {arms} of clusters; {within} treated inside a cluster"


#: Clusters every arm needs: with two, no cluster-robust test holds its size (a simulation gave 0.10-0.22 at 0.05).
MIN_CLUSTERS_PER_ARM = 3


def arm_counts(design: SaturationDesign, clusters: int) -> np.ndarray:
    """Clusters per arm (pure control first): the shares rounded by Webster's (Sainte-Lague) divisor method.

    Clusters are handed out one at a time to the arm with the largest
    share / (count + 1/2), so a study with more clusters never has fewer
    in any arm (largest-remainder rounding can take one away) and whole
    quotas (share x clusters) are met exactly.
    """
    shares = np.array((design.pure_control_share,) + design.shares)
    counts = np.zeros(len(shares), dtype=np.int64)
    for _ in range(int(clusters)):
        counts[int(np.argmax(shares / (counts + 0.5)))] += 1  # argmax: ties go to the first arm, deterministically
    return counts


def check_clusters(design: SaturationDesign, clusters: int) -> None:
    """Every arm needs ``MIN_CLUSTERS_PER_ARM`` clusters for a cluster-robust test that holds its size."""
    counts = arm_counts(design, clusters)
    if counts.min() < MIN_CLUSTERS_PER_ARM:
        labels = ["pure control"] + [f"saturation {p:g}" for p in design.saturations]
        worst = labels[int(np.argmin(counts))]
        raise DesignCalcError(
            f"{clusters} clusters give {worst} {int(counts.min())} cluster(s); every arm needs at least {MIN_CLUSTERS_PER_ARM} "
            "for a cluster-robust test that holds its size"
        )


def check_cluster_sizes(design: SaturationDesign, smallest: int, largest: int) -> None:
    """Every partial saturation must treat at least one and leave at least one unit untreated in every cluster size.

    A cluster where floor(p m + 1/2) is 0 or m has no treated (untreated)
    cell, so it drops out of that contrast and its slope; the truths assume
    every cluster takes part.
    """
    for p in design.saturations:
        if p >= 1.0:
            continue
        for m in range(int(smallest), int(largest) + 1):
            k = int(np.floor(p * m + 0.5))
            if not 1 <= k <= m - 1:
                what = "treats nobody" if k < 1 else "treats everybody"
                raise DesignCalcError(
                    f"saturation {p:g} {what} in a cluster of {m} units (floor(p m + 1/2) = {k}); "
                    f"every cluster size from {smallest} to {largest} must have treated and untreated units"
                )


def treated_counts(sizes: np.ndarray, saturation: float) -> np.ndarray:
    """k_c = floor(p m_c + 1/2): units treated in each cluster under complete randomization."""
    return np.floor(saturation * np.asarray(sizes) + 0.5).astype(np.int64)


def assign(design: SaturationDesign, sizes: np.ndarray, columns: int, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """Draw ``columns`` assignments: W (units, columns) bool and arm (clusters, columns) int (0 = pure control)."""
    sizes = np.asarray(sizes, dtype=np.int64)
    C, n = len(sizes), int(sizes.sum())
    base = np.repeat(np.arange(len(design.saturations) + 1), arm_counts(design, C))
    arms = base[np.argsort(rng.random((C, columns)), axis=0, kind="stable")]
    uniforms = rng.random((n, columns))
    p = np.concatenate([[0.0], design.saturations])[arms]  # (C, columns)
    if design.within == "bernoulli":
        return uniforms < np.repeat(p, sizes, axis=0), arms
    W = np.zeros((n, columns), dtype=bool)
    starts = cluster_starts(sizes)
    for c in range(C):
        block = uniforms[starts[c] : starts[c] + sizes[c]]
        ranks = np.argsort(np.argsort(block, axis=0, kind="stable"), axis=0, kind="stable")
        W[starts[c] : starts[c] + sizes[c]] = ranks < np.floor(p[c] * sizes[c] + 0.5)[None, :]
    return W, arms


# ---------------------------------------------------------------------------
# Which contrasts a design plans
# ---------------------------------------------------------------------------
def _label(p: float) -> str:
    return f"{p:g}"


def contrast_names(design: SaturationDesign) -> list[str]:
    """The planned contrasts' estimator names, in a stable order."""
    names = []
    partial = [p for p in design.saturations if p < 1.0]
    for p in design.saturations:
        if "itt" in design.contrasts:
            names.append(f"itt@{_label(p)}")
        if "snt" in design.contrasts and p < 1.0:
            names.append(f"snt@{_label(p)}")
        if "tce" in design.contrasts and p < 1.0:  # at p = 1 the TCE is the ITT
            names.append(f"tce@{_label(p)}")
        if "direct" in design.contrasts and p < 1.0:
            names.append(f"dir@{_label(p)}")
    if "pooled" in design.contrasts and len(design.saturations) > 1:
        names.append("itt_pooled")
        if partial:
            names.append("snt_pooled")
    # Under Bernoulli assignment within clusters a cluster's treated count is random, and the cluster means a slope
    # averages weight it unlike the unit-level expectations of the truth (an O(1/m) gap): no slopes there.
    if "slope" in design.contrasts and design.within == "complete":
        if len(design.saturations) > 1:
            names.append("itt_slope")
        if len(partial) > 1:
            names.append("snt_slope")
    return names


def is_contrast(estimator: str) -> bool:
    return "@" in estimator or estimator in ("itt_pooled", "snt_pooled", "itt_slope", "snt_slope")


def contrast_family(name: str) -> str:
    """The estimand family of a contrast (module docstring)."""
    kind = name.split("@")[0].split("_")[0]
    if name.endswith("_slope") or kind == "snt":
        return "spillover"
    if kind == "dir":
        return "direct"
    return "total"


def planned_contrast_keys(design: SaturationDesign) -> list[tuple[str, str, str]]:
    return [(contrast_family(name), name, _VARIANCE) for name in contrast_names(design)]


def _saturation_of(design: SaturationDesign, name: str) -> int:
    """Arm index (1-based) of a saturation-specific contrast."""
    p = float(name.split("@")[1])
    return 1 + min(range(len(design.saturations)), key=lambda j: abs(design.saturations[j] - p))


def contrast_df(design: SaturationDesign, clusters: int, name: str, icc: float = 0.0, cluster_size: float = 1.0) -> float:
    """Degrees of freedom of a contrast's t test (module docstring).

    A contrast of two disjoint groups of clusters (an arm against pure
    control) gets the Welch-Satterthwaite df (Satterthwaite 1946) of its
    two cluster-robust variance parts, evaluated at their expected sizes
    under the random-effects model of METHODS.md §5.2 (ICC ``icc``,
    clusters of ``cluster_size``): V_a = (rho + (1 - rho)/(m s_a)) / G_a
    with s_a the share of a cluster's units in the cell, df =
    (sum V_a)^2 / sum V_a^2 / (G_a - 1).  It lies between the smaller
    group's G_a - 1 and G - 2, and is fixed by the design, so every
    replicate uses one critical value.  The within-saturation direct
    contrast has G - 1 (one group), a slope G - 2.
    """
    counts = arm_counts(design, clusters)
    partial = [j + 1 for j, p in enumerate(design.saturations) if p < 1.0]
    if name.endswith("_slope"):
        arms = range(1, len(counts)) if name == "itt_slope" else partial
        return float(sum(counts[j] for j in arms) - 2)
    if name in ("itt_pooled", "snt_pooled"):
        arms = list(range(1, len(counts))) if name == "itt_pooled" else partial
        groups = int(sum(counts[j] for j in arms))
        mean_p = sum(counts[j] * design.saturations[j - 1] for j in arms) / groups
        share = mean_p if name == "itt_pooled" else 1.0 - mean_p
        return _welch_df([(groups, share), (int(counts[0]), 1.0)], icc, cluster_size)
    j = _saturation_of(design, name)
    if name.startswith("dir@"):
        return float(counts[j] - 1)
    p = design.saturations[j - 1]
    share = {"itt": p, "snt": 1.0 - p, "tce": 1.0}[name.split("@")[0]]
    return _welch_df([(int(counts[j]), share), (int(counts[0]), 1.0)], icc, cluster_size)


def _welch_df(groups: list[tuple[int, float]], icc: float, cluster_size: float) -> float:
    """Satterthwaite df of a sum of independent group variances V_a = (rho + (1 - rho)/(m s_a)) / G_a."""
    parts = [((icc + (1.0 - icc) / max(cluster_size * share, 1.0)) / g, g) for g, share in groups]
    total = sum(v for v, _ in parts)
    return float(total**2 / sum(v**2 / (g - 1) for v, g in parts))


def describe_contrast(name: str) -> str:
    """Plain words for a contrast's estimator name."""
    if "@" in name:
        kind, p = name.split("@")
        what = {
            "itt": "ITT({p}): treated at saturation {p} vs pure control",
            "snt": "SNT({p}): untreated at saturation {p} vs pure control",
            "tce": "TCE({p}): everyone at saturation {p} vs pure control",
            "dir": "treated vs untreated inside saturation-{p} clusters",
        }[kind]
        return what.format(p=p)
    return {
        "itt_pooled": "pooled ITT: treated in treated clusters vs pure control",
        "snt_pooled": "pooled SNT: untreated in treated clusters vs pure control",
        "itt_slope": "slope of the treated's cluster means in saturation",
        "snt_slope": "slope of the untreated's cluster means in saturation",
    }[name]


# ---------------------------------------------------------------------------
# Estimates and cluster-robust standard errors
# ---------------------------------------------------------------------------
@dataclass(frozen=True)
class _Sums:
    """Outcome sums and counts per cluster and column: treated, untreated."""

    s_treated: np.ndarray
    n_treated: np.ndarray
    s_untreated: np.ndarray
    n_untreated: np.ndarray

    def cell(self, which: str) -> tuple[np.ndarray, np.ndarray]:
        if which == "treated":
            return self.s_treated, self.n_treated
        if which == "untreated":
            return self.s_untreated, self.n_untreated
        return self.s_treated + self.s_untreated, self.n_treated + self.n_untreated


def _cluster_sums(W: np.ndarray, Y: np.ndarray, sizes: np.ndarray) -> _Sums:
    starts = cluster_starts(sizes)
    s_all = np.add.reduceat(Y, starts, axis=0)
    s_t = np.add.reduceat(W * Y, starts, axis=0)
    n_t = np.add.reduceat(W, starts, axis=0)
    n_all = np.asarray(sizes, dtype=float)[:, None]
    return _Sums(s_t, n_t, s_all - s_t, n_all - n_t)


def _contrast(terms: list[tuple[float, np.ndarray, np.ndarray]], groups: tuple[int, ...] | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Estimate and cluster-robust standard error of sum_a coef * cell mean (module docstring).

    Each term is (coefficient, S, N) with S and N (clusters, columns) already
    zero outside the cell's clusters.  ``groups`` labels the terms whose
    cells lie in one set of clusters (default: one set for all); each set
    gets its own small-sample factor G_g / (G_g - 1), which for cell means
    of equal clusters is the CR2 correction (with one factor for the pooled
    G a small arm's variance was underestimated by up to 40%).
    """
    groups = groups if groups is not None else (0,) * len(terms)
    estimate = 0.0
    psi: dict[int, object] = {}
    involved: dict[int, object] = {}
    with np.errstate(invalid="ignore", divide="ignore"):
        for (coef, S, N), g in zip(terms, groups):
            total = N.sum(axis=0)
            mean = S.sum(axis=0) / total
            estimate = estimate + coef * mean
            psi[g] = psi.get(g, 0.0) + coef * (S - N * mean) / total
            involved[g] = involved.get(g, 0.0) + (N > 0)
        variance = 0.0
        smallest = None
        for g in psi:
            G = (np.asarray(involved[g]) > 0).sum(axis=0)
            variance = variance + G / (G - 1.0) * (np.asarray(psi[g]) ** 2).sum(axis=0)
            smallest = G if smallest is None else np.minimum(smallest, G)
        empty = ~np.all([np.asarray(N).sum(axis=0) > 0 for _, _, N in terms], axis=0)
    bad = empty | (smallest < 2)
    return np.where(bad, np.nan, estimate), np.sqrt(np.where(bad, np.nan, variance))


def _slope(means: np.ndarray, p: np.ndarray, ok: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """OLS slope of cluster means on saturation with an HC2 standard error, per column.

    HC2 (MacKinnon & White 1985) divides each squared residual by 1 - h_c,
    h_c = 1/G + (p_c - pbar)^2 / Sxx, the leverage; HC1 over-rejected with
    few clusters at the extreme saturations.
    """
    B = means.shape[1]
    est, se = np.full(B, np.nan), np.full(B, np.nan)
    for b in range(B):
        m, x = means[ok[:, b], b], p[ok[:, b], b]
        G = len(m)
        if G < 3 or np.ptp(x) == 0:
            continue
        xc = x - x.mean()
        sxx = float(xc @ xc)
        beta = float(xc @ (m - m.mean())) / sxx
        resid = m - m.mean() - beta * xc
        leverage = 1.0 / G + xc**2 / sxx
        est[b] = beta
        se[b] = np.sqrt(float((xc**2) @ (resid**2 / (1.0 - leverage)))) / sxx
    return est, se


def estimate_contrasts(
    design: SaturationDesign, names: list[str], W: np.ndarray, Y: np.ndarray, sizes: np.ndarray, arms: np.ndarray
) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """Estimates and cluster-robust SEs of ``names`` for a batch: W, Y (units, columns); arms (clusters, columns)."""
    sums = _cluster_sums(np.asarray(W, dtype=float), Y, sizes)
    p_of_arm = np.concatenate([[0.0], design.saturations])
    p = p_of_arm[arms]
    control = arms == 0
    treated_arm = arms > 0
    partial_arm = treated_arm & (p < 1.0)

    def cell(which: str, mask: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        S, N = sums.cell(which)
        return np.where(mask, S, 0.0), np.where(mask, N, 0.0)

    out: dict[str, tuple[np.ndarray, np.ndarray]] = {}
    for name in names:
        if name.endswith("_slope"):
            S, N = sums.cell("treated" if name == "itt_slope" else "untreated")
            ok = (partial_arm if name == "snt_slope" else treated_arm) & (N > 0)
            with np.errstate(invalid="ignore", divide="ignore"):
                out[name] = _slope(S / N, p, ok)
            continue
        if name in ("itt_pooled", "snt_pooled"):
            mask = treated_arm if name == "itt_pooled" else partial_arm
            which = "treated" if name == "itt_pooled" else "untreated"
            out[name] = _contrast([(1.0, *cell(which, mask)), (-1.0, *cell("all", control))], (0, 1))
            continue
        kind = name.split("@")[0]
        here = arms == _saturation_of(design, name)
        if kind == "dir":
            out[name] = _contrast([(1.0, *cell("treated", here)), (-1.0, *cell("untreated", here))])
        else:
            which = {"itt": "treated", "snt": "untreated", "tce": "all"}[kind]
            out[name] = _contrast([(1.0, *cell(which, here)), (-1.0, *cell("all", control))], (0, 1))
    return out


# ---------------------------------------------------------------------------
# Exact truths on one graph
# ---------------------------------------------------------------------------
def _exposure_expectation(
    design: SaturationDesign, degrees: np.ndarray, sizes: np.ndarray, p: float, treated: bool, g
) -> np.ndarray:
    """E[g(units, X_i) | W_i = w] per unit with its cluster at saturation p; NaN where w is impossible there.

    ``g(idx, x)`` evaluates (len(idx), K) values at exposures ``x`` (len(idx), K).
    Given own treatment a unit's treated neighbours M are hypergeometric
    (complete: k - 1 or k treated among the m - 1 others, N_i drawn) or
    binomial (Bernoulli within); X = M / N_i, and 0 for isolates.
    """
    sizes = np.asarray(sizes, dtype=np.int64)
    out = np.full(len(degrees), np.nan)
    k_all = treated_counts(sizes, p)
    cluster_of = np.repeat(np.arange(len(sizes)), sizes)
    if design.within == "bernoulli":
        possible = np.full(len(sizes), (p > 0) if treated else (p < 1))
        group = np.zeros(len(sizes), dtype=np.int64)
    else:
        possible = (k_all >= 1) if treated else (k_all <= sizes - 1)
        group = sizes * (int(sizes.max()) + 2) + k_all  # one hypergeometric per (size, treated count)
    unit_group = np.where(possible[cluster_of], group[cluster_of], -1)
    for key in np.unique(unit_group[unit_group >= 0]):
        idx = np.flatnonzero(unit_group == key)
        d = degrees[idx]
        top = int(d.max())
        x = np.arange(top + 1)
        if design.within == "bernoulli":
            pmf = scipy.stats.binom.pmf(x[None, :], d[:, None], p)
        else:
            c = int(np.flatnonzero(group == key)[0])
            others_treated = k_all[c] - 1 if treated else k_all[c]
            pmf = scipy.stats.hypergeom.pmf(x[None, :], sizes[c] - 1, others_treated, d[:, None])
        # Exposure x / N_i (0 for isolates); entries beyond N_i have pmf 0 and are clipped to exposure 1.
        exposure = np.minimum(x[None, :] / np.maximum(d, 1)[:, None], 1.0)
        out[idx] = np.sum(g(idx, exposure) * pmf, axis=1)
    return out


def _unit_means(
    model: OutcomeModel, design: SaturationDesign, degrees: np.ndarray, theta: np.ndarray, sizes: np.ndarray, p: float, treated: bool,
    cache: dict | None = None,
) -> np.ndarray:
    """E[f_i(w, X_i) | W_i = w] per unit with its cluster at saturation p (NaN where w is impossible).

    A continuous outcome is linear in s(X), so only E[s(X)] is computed (and
    kept in ``cache`` for the next model on the same graph); other outcomes
    take the expectation of f itself.
    """
    w = 1.0 if treated else 0.0
    if model.kind == "continuous":
        key = (model.spillover_shape, float(model.saturation_rate), float(model.threshold), p, treated)
        if cache is None or key not in cache:
            def shape(idx: np.ndarray, x: np.ndarray) -> np.ndarray:
                return spillover_shape_value(model.spillover_shape, x, rate=model.saturation_rate, threshold=model.threshold)

            value = _exposure_expectation(design, degrees, sizes, p, treated, shape)
            if cache is not None:
                cache[key] = value
        else:
            value = cache[key]
        return (model.baseline + theta + model.direct_effect * w) + (model.spillover_effect + model.interaction * w) * value

    def f(idx: np.ndarray, x: np.ndarray) -> np.ndarray:
        return model.mean_outcome(theta[idx][:, None], np.full(x.shape, w), x)

    return _exposure_expectation(design, degrees, sizes, p, treated, f)



def contrast_truths(
    model: OutcomeModel, design: SaturationDesign, names: list[str], degrees: np.ndarray, theta: np.ndarray, sizes: np.ndarray,
    clusters_per_arm: np.ndarray, cache: dict | None = None,
) -> dict[str, float]:
    """Exact expectation of every contrast in ``names`` on one graph (module docstring).

    ``cache`` (a dict kept with the graph) saves the exposure expectations
    between outcome models that share a spillover shape.
    """
    sizes = np.asarray(sizes, dtype=np.int64)
    m_of_unit = np.repeat(sizes, sizes).astype(float)
    control_mean = float(np.mean(model.mean_outcome(theta, np.zeros_like(theta), np.zeros_like(theta))))
    cluster_of = np.repeat(np.arange(len(sizes)), sizes)
    cells: dict[float, dict[str, float]] = {}
    for p in design.saturations:
        treated = _unit_means(model, design, degrees, theta, sizes, p, True, cache)
        untreated = _unit_means(model, design, degrees, theta, sizes, p, False, cache)
        share = (p * np.ones_like(m_of_unit)) if design.within == "bernoulli" else np.repeat(treated_counts(sizes, p), sizes) / m_of_unit
        t_sum = float(np.nansum(share * treated))
        u_sum = float(np.nansum((1 - share) * untreated))
        # Cluster means of untreated (treated) units, clusters weighted equally, for the slopes.
        per_cluster_u = np.bincount(cluster_of, np.nan_to_num(untreated), minlength=len(sizes)) / sizes
        per_cluster_t = np.bincount(cluster_of, np.nan_to_num(treated), minlength=len(sizes)) / sizes
        cells[p] = {
            "t_sum": t_sum, "t_count": float(share.sum()),
            "u_sum": u_sum, "u_count": float((1 - share).sum()),
            "u_cluster": float(np.mean(per_cluster_u)) if p < 1 else float("nan"),
            "t_cluster": float(np.mean(per_cluster_t)),
        }
    out: dict[str, float] = {}
    counts = dict(zip(design.saturations, clusters_per_arm[1:]))
    for name in names:
        if name in ("itt_pooled", "snt_pooled"):
            a, c = ("t_sum", "t_count") if name == "itt_pooled" else ("u_sum", "u_count")
            ps = [p for p in design.saturations if name == "itt_pooled" or p < 1]
            out[name] = sum(counts[p] * cells[p][a] for p in ps) / sum(counts[p] * cells[p][c] for p in ps) - control_mean
        elif name.endswith("_slope"):
            field = "t_cluster" if name == "itt_slope" else "u_cluster"
            ps = np.array([p for p in design.saturations if name == "itt_slope" or p < 1])
            weights = np.array([counts[p] for p in ps], dtype=float)
            values = np.array([cells[p][field] for p in ps])
            centred = ps - np.average(ps, weights=weights)
            out[name] = float(np.sum(weights * centred * values) / np.sum(weights * centred**2))
        else:
            kind = name.split("@")[0]
            c = cells[design.saturations[_saturation_of(design, name) - 1]]
            itt = c["t_sum"] / c["t_count"] if c["t_count"] > 0 else float("nan")
            snt = c["u_sum"] / c["u_count"] if c["u_count"] > 0 else float("nan")
            tce = (c["t_sum"] + c["u_sum"]) / (c["t_count"] + c["u_count"])
            out[name] = {"itt": itt - control_mean, "snt": snt - control_mean, "tce": tce - control_mean, "dir": itt - snt}[kind]
    return out

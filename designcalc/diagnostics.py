"""What a scenario implies before any power is simulated (``designcalc check``).

For each planned size: rho_n, the target and the expected (clipped) mean
degree, the expected share of isolates, the largest eigenvalues of the
expected adjacency, the exact estimands on one simulated network, and the
sparsity regime of METHODS.md §3.3a with plain-words warnings where the
spillover estimators are known to struggle.

For a clustered population the sizes are cluster sizes (the smallest, the
mean and the largest a cluster can have: each cluster's density follows the
rule at its own size), and ``cluster_notes`` adds the design effect, the
exact contrasts of a two-stage design on one simulated population and the
closed-form allocation advice of METHODS.md §5.3 (square-root rule).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from designcalc.density import DensityAtSize, density_at_size
from designcalc.edge_models import BlockModel, EdgeModel, kernel_quadrature
from designcalc.estimands import Estimands, exact_estimands
from designcalc.networks import sample_network
from designcalc.scenario import Scenario
from designcalc.surveyed import SurveyedNetwork

__all__ = ["ScenarioCheck", "SizeCheck", "check_scenario", "expected_share_isolated", "sparsity_regime"]


@dataclass(frozen=True)
class SizeCheck:
    """What the scenario implies at one network size."""

    density: DensityAtSize
    expected_share_isolated: float
    leading_eigenvalues: tuple[float, ...]
    estimands: tuple[Estimands, ...]
    realised_mean_degree: float
    warnings: tuple[str, ...]


@dataclass(frozen=True)
class ScenarioCheck:
    """The result of ``check_scenario``."""

    scenario: Scenario
    regime: str
    regime_explanation: str
    sizes: tuple[SizeCheck, ...]
    cluster_notes: tuple[str, ...] = ()

    @property
    def warnings(self) -> tuple[str, ...]:
        return tuple(w for s in self.sizes for w in s.warnings)

    @property
    def covariate_note(self) -> str:
        """What the baseline covariates state and the classical gain they imply ("" without covariates)."""
        loadings = self.scenario.covariates
        if loadings is None:
            return ""
        factor = (1.0 - loadings.joint_r_squared) ** 0.5
        return (
            f"{loadings.describe()}. Without interference, adjusting for them shrinks the direct-effect MDE "
            f"by sqrt(1 - R²) = {factor:.3f} (Bloom 1995); the simulation shows what they buy here, "
            "for the spillover estimators too"
        )


def expected_share_isolated(model: EdgeModel, rho: float, n_units: int) -> float:
    """P(a unit has no neighbour) = E_u[(1 - integral of min(1, rho g(u, v)) dv)^(n-1)].

    Exact for block models (iid block labels); quadrature for kernels; the
    observed share for a surveyed network.
    """
    if isinstance(model, SurveyedNetwork):
        return model.share_isolated()
    if isinstance(model, BlockModel):
        s = np.asarray(model.shares)
        p = np.minimum(1.0, rho * model.normalised_matrix())
        return float(s @ (1.0 - p @ s) ** (n_units - 1))
    nodes, weights = kernel_quadrature()
    p = np.minimum(1.0, rho * model.kernel(nodes[:, None], nodes[None, :]))
    return float(weights @ (1.0 - p @ weights) ** (n_units - 1))


def sparsity_regime(growth_exponent: float) -> tuple[str, str]:
    """The regime of METHODS.md §3.3a implied by mean degree ~ n^gamma."""
    g = growth_exponent
    if g == 0:
        return (
            "bounded mean degree",
            "Mean degree stays fixed as n grows (village-like networks). The direct-effect estimators are "
            "sqrt(n)-consistent with finite-degree variance terms; the uncentred HT spillover estimator has "
            "variance proportional to mean degree^2 x outcome level^2 / n, so centre it; PC-balancing has "
            "variance of order mean degree / n and a bias of order k x mean degree / n.",
        )
    if g < 0.5:
        return (
            "slowly growing degree (mean degree = o(sqrt n))",
            "Degrees grow, but slower than sqrt(n): all the spillover estimators are consistent.",
        )
    if g == 0.5:
        return (
            "boundary (mean degree ~ sqrt n)",
            "Mean degree grows like sqrt(n): the uncentred HT spillover estimator's variance no longer shrinks; "
            "prefer PC-balancing or centred HT.",
        )
    if g < 1:
        return (
            "dense-growing (n rho^2 -> infinity, rho -> 0)",
            "Mean degree grows faster than sqrt(n): the uncentred HT spillover estimator is inconsistent; "
            "PC-balancing stays consistent, at rate about sqrt(rho_n).",
        )
    return (
        "fixed density",
        "Density stays fixed: no spillover estimator here becomes precise as n grows (plain PC-balancing is "
        "biased by O(rho), the corrected variant is unbiased but its variance does not shrink). A required "
        "sample size for the spillover effect may not exist.",
    )


def check_scenario(scenario: Scenario) -> ScenarioCheck:
    """Compute what ``scenario`` implies at every planned size (no power simulation)."""
    model, rule = scenario.network, scenario.density
    regime, explanation = sparsity_regime(rule.growth_exponent)
    if isinstance(model, SurveyedNetwork):
        regime, explanation = (
            "surveyed network, held fixed",
            "The network is the surveyed one at its own size; only assignments, latent types and noise are random. "
            "How the estimators behave as studies grow does not apply; to plan other sizes, fit an edge model (designcalc fit).",
        )
    population = scenario.population
    if population.clustered:
        cs = population.cluster_sizes
        planned = sorted({cs.smallest, int(round(cs.nominal)), cs.largest})
    else:
        planned = list(population.units)
    sizes = []
    for n in planned:
        density = density_at_size(model, rule, n)
        warnings = []
        if density.clipped:
            warnings.append(
                f"n = {n}: rho_n x g exceeds 1 (max {density.max_edge_probability:.3g}); edge probabilities are "
                f"clipped and the realised mean degree falls {density.shortfall:.1%} short of the target "
                f"{density.target_mean_degree:.4g}"
            )
        if not sizes:
            from designcalc.measure import measurement_warnings  # lazy: measure imports the power engine

            warnings.extend(measurement_warnings(scenario))  # once, not per size
        isolated = expected_share_isolated(model, density.rho, n)
        if isolated > 0.05:
            warnings.append(f"n = {n}: about {isolated:.1%} of units will have no contacts; they add nothing to the spillover effect")
        d = density.expected_mean_degree
        if d**2 / n > 1:
            warnings.append(
                f"n = {n}: mean degree^2 / n = {d**2 / n:.2f} > 1: the uncentred HT spillover estimator is very noisy; "
                "plan PC-balancing or centred HT"
            )
        if d < np.log(n):
            warnings.append(
                f"n = {n}: mean degree {d:.3g} is below log(n) = {np.log(n):.3g}: adjacency eigenvectors are unstable "
                "and PC-balancing may not remove community structure"
            )
        eig = model.expected_adjacency_eigenvalues(n, density.rho)
        # One simulated network gives the exact estimands at each design probability.
        seq = np.random.SeedSequence(scenario.simulation.seed, spawn_key=(2, n))
        t_seq, g_seq = seq.spawn(2)
        net = sample_network(model, rule, n, types_rng=np.random.default_rng(t_seq), graph_rng=np.random.default_rng(g_seq))
        theta = scenario.outcome.type_values(net.types, net.blocks)
        estimands = tuple(
            exact_estimands(net.degrees, theta, scenario.outcome, p) for p in scenario.design.treatment_probabilities
        )
        sizes.append(
            SizeCheck(
                density=density,
                expected_share_isolated=isolated,
                leading_eigenvalues=tuple(float(x) for x in eig[:6]),
                estimands=estimands,
                realised_mean_degree=float(net.degrees.mean()),
                warnings=tuple(warnings),
            )
        )
    notes = _cluster_notes(scenario) if population.clustered else ()
    return ScenarioCheck(scenario, regime, explanation, tuple(sizes), notes)


def _cluster_notes(scenario: Scenario) -> tuple[str, ...]:
    """Plain-words facts of a clustered design (module docstring)."""
    from designcalc import cluster_formulas
    from designcalc.engine import clustered_point, contrast_truths, sample_point_network
    from designcalc.saturation import arm_counts, contrast_names, describe_contrast

    population, design = scenario.population, scenario.design
    m = population.cluster_sizes.nominal
    icc = scenario.outcome.cluster_icc
    notes = [f"population: {', '.join(str(c) for c in population.clusters)} clusters, {population.cluster_sizes.describe()}; no ties between clusters"]
    notes.append(
        f"design effect of a cluster-level comparison at the mean cluster size {m:.4g} and ICC {icc:g}: "
        f"1 + (m - 1) ICC = {cluster_formulas.design_effect(m, icc):.3g} (Kish 1965)"
    )
    saturation = design.saturation
    if saturation is None:
        notes.append("assignment: Bernoulli within every cluster; the network estimators run on the union of the clusters' networks")
        return tuple(notes)
    notes.append(f"assignment: {saturation.describe()}")
    C = population.clusters[0]
    counts = arm_counts(saturation, C)
    labels = ["pure control"] + [f"saturation {p:g}" for p in saturation.saturations]
    notes.append(f"clusters per arm at {C} clusters: " + ", ".join(f"{label} {int(c)}" for label, c in zip(labels, counts)))
    point = clustered_point(scenario, C, design.treatment_probabilities[0])
    net = sample_point_network(scenario, point, 0)
    theta = scenario.outcome.type_values(net.types, net.blocks)
    truths = contrast_truths(scenario, scenario.outcome, net.degrees, theta, net.cluster_sizes)
    for name in contrast_names(saturation):
        notes.append(f"exact {name} on the first simulated population: {truths[name]:.4g} ({describe_contrast(name)})")
    for p in saturation.saturations:
        best = cluster_formulas.optimal_pure_control_share_itt(m, icc, p)
        notes.append(
            f"square-root rule (METHODS.md §5.3): with only ITT({p:g}) planned, the pure-control share minimising its variance "
            f"is {best:.2f} (this design: {saturation.pure_control_share:g})"
        )
    return tuple(notes)

"""``designcalc check SCENARIO``: what a scenario implies, before any simulation."""

from __future__ import annotations

import typer
from rich.table import Table

from designcalc.cli.output import (
    FiguresDir,
    ScenarioFile,
    check_figures_dir,
    write_figures,
)
from designcalc.diagnostics import check_scenario
from designcalc.scenario import Scenario, load_scenario


def register(app: typer.Typer) -> None:
    @app.command("check")
    def check(scenario: ScenarioFile, figures: FiguresDir = None) -> None:
        """Validate a scenario and show the density, isolates, spectrum, estimands and regime it implies."""
        from designcalc.cli.main import stdout_console

        console = stdout_console()
        check_figures_dir(figures)
        result = check_scenario(load_scenario(scenario))
        write_figures(figures, lambda: _network_figure(result.scenario))
        s = result.scenario
        console.print(f"[bold]{s.name}[/]  ({s.source}, sha256 {s.sha256[:12]}...)")
        density = "" if s.network.kind == "surveyed" else f"; {s.density.describe()}"  # a surveyed network has no rule
        console.print(f"network: {s.network.describe()}{density}")
        console.print(f"outcome: {s.outcome.describe()}")
        if result.covariate_note:
            console.print(f"covariates: {result.covariate_note}", soft_wrap=True)
        console.print(f"regime: [bold]{result.regime}[/]. {result.regime_explanation}", soft_wrap=True)
        for note in result.cluster_notes:
            console.print(note, soft_wrap=True)
        size_word = "units per cluster" if s.population.clustered else "units"
        title = "What the density rule implies" + (" in one cluster (smallest, mean, largest size)" if s.population.clustered else "")
        table = Table(title=title, title_justify="left")
        for col in (size_word, "rho_n", "mean degree (target)", "mean degree (expected)", "one draw", "isolates", "clipped", "leading eigenvalues of E[A]"):
            table.add_column(col, justify="right")
        for size in result.sizes:
            d = size.density
            table.add_row(
                str(d.units), f"{d.rho:.3g}", f"{d.target_mean_degree:.3g}", f"{d.expected_mean_degree:.3g}",
                f"{size.realised_mean_degree:.3g}", f"{size.expected_share_isolated:.1%}",
                f"{d.shortfall:.1%} short" if d.clipped else "no",
                ", ".join(f"{x:.3g}" for x in size.leading_eigenvalues[:4]),
            )
        console.print(table)
        est = Table(title="Exact estimands on one simulated network" + (" of one cluster's size" if s.population.clustered else ""), title_justify="left")
        for col in (size_word, "treatment probability", "direct", "spillover", "total", "global (all vs none)"):
            est.add_column(col, justify="right")
        for size in result.sizes:
            for e in size.estimands:
                est.add_row(str(size.density.units), f"{e.treatment_probability:g}", f"{e.direct:.4g}", f"{e.spillover:.4g}", f"{e.total:.4g}", f"{e.global_effect:.4g}")
        console.print(est)
        for w in result.warnings:
            console.print(f"[yellow]warning:[/] {w}", soft_wrap=True)
        if not result.warnings:
            console.print("no warnings")


def _network_figure(scenario: Scenario) -> dict[str, object]:
    """One network the simulation would use at the smallest planned size: "does this look like my villages?"."""
    from designcalc.engine import DesignPoint, clustered_point, example_network
    from designcalc.figures import network_figure

    if scenario.population.clustered:
        point = clustered_point(scenario, scenario.population.clusters[0], scenario.design.treatment_probabilities[0])
    else:
        point = DesignPoint(scenario.population.units[0], scenario.design.treatment_probabilities[0])
    net, treated = example_network(scenario, point)
    mean_degree = net.adjacency.nnz / max(point.units, 1)
    return {
        "network": network_figure(
            net.adjacency, treated=treated, groups=net.blocks, types=net.types, seed=scenario.simulation.seed % 2**32,
            title=f"{scenario.name}: one simulated network, mean degree {mean_degree:.1f}, treatment probability {point.treatment_probability:g}",
        )
    }

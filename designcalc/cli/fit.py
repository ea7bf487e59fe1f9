"""``designcalc fit EDGES.csv``: fit the block model to an observed network and write a scenario fragment."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Annotated

import typer
from rich.console import Console

from designcalc.cli.output import (
    FiguresDir,
    OutputFormat,
    check_figures_dir,
    fmt,
    graphs_option,
    new_table,
    write_figures,
)
from designcalc.atomic import atomic_file
from designcalc.edgelist import read_edge_list
from designcalc.errors import DesignCalcError
from designcalc.fit import BLOCK_CAP, DEFAULT_SEED, NetworkFit, fit_network

# This command prints tables or JSON; a CSV of a fit has no single row shape.
_FORMATS = ("table", "json")


def check_out_path(out: Path | None, force: bool, edges: Path) -> None:
    """``--out`` must be a new file in an existing folder (or an existing file with ``--force``), never the edge list."""
    if out is None:
        return
    if out.exists() and out.is_dir():
        raise DesignCalcError(f"--out {out}: is a folder; give a file name such as network.toml")
    if not out.absolute().parent.is_dir():
        raise DesignCalcError(f"--out {out}: the folder {out.absolute().parent} does not exist")
    if edges.exists() and out.exists() and out.resolve() == edges.resolve():
        raise DesignCalcError(f"--out {out}: is the edge-list file itself; give another name")
    if out.exists() and not force:
        raise DesignCalcError(f"--out {out}: the file exists; give --force to replace it, or another name")


def render_table(result: NetworkFit, console: Console, out: Path | None) -> None:
    fit, check = result.fit, result.check
    s = result.edges.summary
    console.print(
        f"[bold]Fit: {s.source}[/]  {fit.n_units} nodes, {fit.n_ties} ties, mean degree {fit.observed_mean_degree:.3f}"
        + (f", weights in column '{s.header[2]}' (not used by the fit)" if s.weighted and s.header else
           (", weights (not used by the fit)" if s.weighted else "")),
        soft_wrap=True,
    )
    rule = (
        f"Bethe-Hessian rule (r = {fit.bethe_hessian_r:.3f})" if fit.block_rule == "bethe_hessian"
        else f"--blocks (the Bethe-Hessian rule suggests {fit.bethe_hessian_blocks})"
    )
    console.print(
        f"stochastic block model, K = {fit.n_blocks} from the {rule}; regularised spectral clustering "
        f"(Qin & Rohe 2013, tau = mean degree = {fit.regularisation:.3f}), k-means seed {fit.seed}",
        soft_wrap=True,
    )
    if fit.bethe_hessian_eigenvalues:
        console.print(
            "smallest Bethe-Hessian eigenvalues (one negative per community): "
            + ", ".join(f"{v:.3g}" for v in fit.bethe_hessian_eigenvalues),
            soft_wrap=True,
        )
    blocks = new_table(
        "Fitted blocks: tie density within and between blocks (ties / pairs)",
        ("block", "nodes", "share") + tuple(str(k) for k in range(fit.n_blocks)),
        left=("block",),
    )
    for k in range(fit.n_blocks):
        blocks.add_row(
            str(k), str(fit.block_sizes[k]), f"{fit.shares[k]:.3f}", *(f"{p:.4g}" for p in fit.edge_densities[k])
        )
    console.print(blocks)
    table = new_table(
        f"Goodness of fit: observed vs {check.n_graphs} networks simulated from the fit (seed {check.seed})",
        ("statistic", "observed", "simulated mean", "simulated SD", "(obs - mean) / SD"),
        left=("statistic",),
    )
    for c in check.checks:
        table.add_row(c.label, fmt(c.observed, 4), fmt(c.simulated_mean, 4), fmt(c.simulated_sd, 4), fmt(c.standardised_difference, 2))
    console.print(table)
    console.print(
        f"degree distribution: two-sample Kolmogorov-Smirnov D = {check.degree_ks_statistic:.3f}, "
        f"p = {check.degree_ks_pvalue:.3g} (observed degrees vs the simulated networks' degrees, pooled)",
        soft_wrap=True,
    )
    if out is None:
        console.print(
            "\nScenario fragment (replace a scenario's [network] tables with it; --out writes it to a file):", markup=False
        )
        console.print(result.fragment, markup=False, highlight=False, soft_wrap=True, end="")
    else:
        console.print(f"wrote the scenario fragment to {out}")
    for w in result.warnings:
        console.print(f"warning: {w}", soft_wrap=True, markup=False)
    for c in result.cautions:
        console.print(f"caution: {c}", soft_wrap=True, markup=False)


def register(app: typer.Typer) -> None:
    @app.command("fit")
    def fit(
        edges: Annotated[Path, typer.Argument(help="Edge list (CSV): two integer node-id columns and an optional weight column; a header line is detected.")],
        blocks: Annotated[int | None, typer.Option("--blocks", "-k", min=1, max=BLOCK_CAP, help="Number of blocks K, overriding the Bethe-Hessian rule.")] = None,
        out: Annotated[Path | None, typer.Option("--out", "-o", help="Write the scenario fragment ([network] tables) to this TOML file.")] = None,
        force: Annotated[bool, typer.Option("--force", help="Replace the --out file if it exists.")] = False,
        seed: Annotated[int, typer.Option(min=0, help="Root seed of the k-means starts and of the simulated networks.")] = DEFAULT_SEED,
        graphs: Annotated[int, graphs_option("Networks simulated from the fit for the goodness-of-fit check.")] = 20,
        output_format: OutputFormat = "table",
        figures: FiguresDir = None,
    ) -> None:
        """Fit a stochastic block model to an observed network, check it by simulation, and write a scenario fragment."""
        from designcalc.cli.main import stdout_console

        # Every option is checked before the file is read or anything is fitted.
        if output_format not in _FORMATS:
            raise DesignCalcError(f"--format must be one of {', '.join(_FORMATS)}; got {output_format!r}")
        check_out_path(out, force, edges)
        check_figures_dir(figures)
        result = fit_network(read_edge_list(edges), n_blocks=blocks, graphs=graphs, seed=seed)
        if out is not None:
            with atomic_file(out, encoding="utf-8") as handle:  # never half a fragment
                handle.write(result.fragment)
        write_figures(figures, lambda: _figures(result))
        if output_format == "json":
            data = result.to_dict()
            data["fragment_file"] = str(out) if out is not None else None
            print(json.dumps(data, indent=2, allow_nan=True))
        else:
            render_table(result, stdout_console(), out)


def _figures(result: NetworkFit) -> dict[str, object]:
    from designcalc.figures import fit_check_figure

    name = Path(result.edges.summary.source).stem
    return {
        "fit_check": fit_check_figure(
            result.check, title=f"{name}: observed network vs {result.check.n_graphs} simulated from its {result.fit.n_blocks}-block fit"
        )
    }

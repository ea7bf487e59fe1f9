"""``designcalc compare SCENARIO``: treatment probabilities (and estimators) side by side by SE, MDE and size.

With ``--design OTHER.toml`` (repeatable) it puts whole designs side by side
instead: the scenario's and the others', at one total number of units
(``designcalc.design_compare``).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from functools import partial
from pathlib import Path
from typing import Annotated

import typer
from rich.console import Console

from designcalc.cli.output import (
    Assignments,
    Cluster,
    Workers,
    FiguresDir,
    OutputFormat,
    ScenarioFile,
    Seed,
    Units,
    check_figures_dir,
    emit,
    flag_references,
    fmt,
    graphs_option,
    interval,
    load_checked,
    new_table,
    partial_mark,
    planned_test_phrase,
    plus_minus,
    print_flag_notes,
    print_footer,
    records_csv,
    simulate_with_progress,
    write_figures,
)
from designcalc.cli.running import NoStore, StorePath, execution
from designcalc.compare import (
    CompareResult,
    CompareRow,
    Criterion,
    TestSpec,
    compare_treatment_probabilities,
    parse_test_spec,
)
from designcalc.design_compare import DesignComparison, DesignRow, compare_designs
from designcalc.errors import DesignCalcError
from designcalc.scenario import Scenario, load_scenario

_CSV_FIELDS = (
    "units", "treatment_probability", "estimand", "estimator", "variance_estimator", "standard_error",
    "standard_error_mc_se", "mean_estimated_se", "mde", "mde_low", "mde_high", "mde_sd_units", "size", "size_mc_se",
    "method", "best", "tied_with_best", "chosen_by_criterion", "flags",
)

_SPEC_FORM = "ESTIMAND[:ESTIMATOR[:VARIANCE]] with ESTIMAND one of direct, spillover, total (e.g. spillover or direct:hajek:neyman)"


def parse_cap(text: str) -> tuple[TestSpec, float]:
    """``SPEC=VALUE``: a test and the largest MDE allowed for it, in outcome units."""
    allowed = f"SPEC=VALUE with SPEC {_SPEC_FORM} and VALUE a positive number in outcome units (e.g. direct=0.5)"
    spec_text, sep, value_text = text.rpartition("=")
    if not sep or not spec_text.strip():
        raise DesignCalcError(f"--cap: {text!r} is not {allowed}")
    spec = parse_test_spec(spec_text.strip(), option="--cap")
    try:
        value = float(value_text)
    except ValueError:
        raise DesignCalcError(f"--cap: {value_text.strip()!r} in {text!r} is not a number; the form is {allowed}") from None
    if not (math.isfinite(value) and value > 0):
        raise DesignCalcError(f"--cap: the value in {text!r} must be a positive number in outcome units; the form is {allowed}")
    return spec, value


def build_criterion(scenario: Scenario, units: Sequence[int], objective: str | None, caps: Sequence[str]) -> Criterion | None:
    """The joint criterion of ``--objective`` and ``--cap``, checked against the planned tests before any simulation."""
    if objective is None:
        if caps:
            raise DesignCalcError("--cap needs --objective: name the test whose MDE is minimised subject to the caps, as " + _SPEC_FORM)
        return None
    criterion = Criterion(parse_test_spec(objective, option="--objective"), tuple(parse_cap(c) for c in caps))
    for option, spec in [("--objective", criterion.objective)] + [("--cap", spec) for spec, _ in criterion.caps]:
        for n in units:
            try:
                spec.resolve(scenario, n)
            except DesignCalcError as exc:
                raise DesignCalcError(f"{option}: {exc} (at {n} units)") from None
    return criterion


def _chosen(result: CompareResult) -> dict[int, float]:
    return {c.units: c.treatment_probability for c in result.choices if c.treatment_probability is not None}


def _mark(row: CompareRow) -> str:
    return "best" if row.best else "tied" if row.tied_with_best else ""


def resolved_tests(scenario: Scenario, units: Sequence[int], criterion: Criterion | None) -> list[str]:
    """What each test named in the criterion stands for, e.g. "spillover = spillover:pc_balancing_corrected:plug_in"."""
    if criterion is None:
        return []
    out = []
    for spec in [criterion.objective] + [spec for spec, _ in criterion.caps]:
        keys = sorted({":".join(spec.resolve(scenario, n)) for n in units})
        line = f"{spec.text} = {' or '.join(keys)}"
        if line not in out:
            out.append(line)
    return out


def render_table(result: CompareResult, console: Console, *, scenario: Scenario, verify: bool, resolved: Sequence[str] = ()) -> None:
    console.print(f"[bold]Treatment probabilities compared: {result.scenario_name}[/]{partial_mark(result)}", soft_wrap=True)
    flag_cells, flag_notes = flag_references([row.flags for row in result.rows])
    cell_of = {id(row): cell for row, cell in zip(result.rows, flag_cells)}
    blocks: dict[tuple[int, str], list[CompareRow]] = {}
    for row in result.rows:
        blocks.setdefault((row.units, row.estimand), []).append(row)
    for (units, estimand), rows in sorted(blocks.items(), key=lambda item: (item[0][0], ("direct", "spillover", "total").index(item[0][1]))):
        columns = ["estimator", "variance", "pi", "SE ± MC se", "MDE [95% MC]", "MDE (SD units)", "size ± MC se"]
        columns += (["method"] if verify else []) + ["mark", "flags"]
        table = new_table(f"n = {units:,}: {estimand} effect", columns, left=("estimator", "variance", "method", "mark", "flags"))
        tests: dict[tuple[str, str], list[CompareRow]] = {}
        for row in rows:
            tests.setdefault((row.estimator, row.variance_estimator), []).append(row)
        for i, members in enumerate(tests.values()):
            if i:
                table.add_section()
            for row in sorted(members, key=lambda r: r.treatment_probability):
                cells = [
                    row.estimator, row.variance_estimator, f"{row.treatment_probability:g}",
                    plus_minus(row.standard_error, row.standard_error_mc_se), interval(row.mde, row.mde_low, row.mde_high),
                    fmt(row.mde_sd_units), plus_minus(row.size, row.size_mc_se),
                ]
                cells += ([row.method] if verify else []) + [_mark(row), cell_of[id(row)]]
                table.add_row(*cells)
        console.print(table)
    print_flag_notes(flag_notes, console)
    kind = "verified by simulation (as in designcalc mde)" if verify else (
        "the formula MDE, (critical value + power quantile) x SE, not verified by simulation (add --verify)"
    )
    console.print(
        f"MDE: the true effect at which the planned test has {planned_test_phrase(scenario.design)}; here {kind}. "
        "SE: the estimator's Monte Carlo SD when the tested effect is zero; size: the test's rejection rate there. "
        "best: the smallest MDE of that test at that size; tied: an MDE within two combined Monte Carlo SEs of the best. "
        "Every probability is simulated on the same networks.",
        soft_wrap=True,
    )
    if result.choices:
        # The criterion can be longer than the table is wide: print it as a line, not as a wrapped title.
        console.print(f"Joint criterion: {result.choices[0].criterion}", soft_wrap=True)
        choices = new_table(None, ("n", "chosen pi", "objective MDE", "note"), left=("note",))
        for c in result.choices:
            choices.add_row(
                f"{c.units:,}", "none" if c.treatment_probability is None else f"{c.treatment_probability:g}",
                "-" if not math.isfinite(c.objective_mde) else f"{c.objective_mde:.4g}", c.note,
            )
        console.print(choices)
        if resolved:
            console.print("tests in the criterion: " + "; ".join(resolved) + " (the first planned estimator and variance that match)", soft_wrap=True)
    p = result.provenance
    print_footer(
        result, console,
        f"{p['replicates_per_design_point']} replicates per probability and size ({p['graphs_per_design_point']} graphs x "
        f"{p['assignments_per_graph']} assignments){' to start with' if verify else ''}",
    )


def render_csv(result: CompareResult) -> str:
    chosen = _chosen(result)

    def chosen_cell(r: CompareRow) -> dict[str, object]:
        # The design a criterion picks is a probability at a size, so every test at it is marked.
        return {"chosen_by_criterion": "" if not result.choices else chosen.get(r.units) == r.treatment_probability}

    return records_csv(result.rows, _CSV_FIELDS, extra=chosen_cell)


_DESIGN_CSV_FIELDS = (
    "design", "scenario_file", "population", "assignment", "units", "clusters", "treatment_probability", "estimand",
    "estimator", "variance_estimator", "estimates", "standard_error", "standard_error_mc_se", "mde", "mde_low", "mde_high",
    "mde_sd_units", "size", "size_mc_se", "best_in_design", "best_design", "tied_with_best", "flags",
)


def _design_mark(row: DesignRow) -> str:
    if row.best_design:
        return "best design"
    if row.tied_with_best:
        return "tied"
    return "design's best" if row.best_in_design else ""


def render_designs(result: DesignComparison, console: Console) -> None:
    console.print(f"[bold]Designs compared at about {result.units:,} units[/]{partial_mark(result)}", soft_wrap=True)
    designs = new_table(None, ("design", "file", "population", "assignment"), left=("design", "file", "population", "assignment"))
    for name, file, population, assignment in dict.fromkeys((r.design, r.scenario_file, r.population, r.assignment) for r in result.rows):
        designs.add_row(name, file, population, assignment)
    console.print(designs)
    flag_cells, flag_notes = flag_references([row.flags for row in result.rows])
    cell_of = {id(row): cell for row, cell in zip(result.rows, flag_cells)}
    for family in ("direct", "spillover", "total"):
        rows = [r for r in result.rows if r.estimand == family]
        if not rows:
            continue
        table = new_table(
            f"{family} effect", ("design", "pi", "test", "variance", "estimates", "SE ± MC se", "MDE [95% MC]", "MDE (SD units)", "size ± MC se", "mark", "flags"),
            left=("design", "pi", "test", "variance", "estimates", "mark", "flags"),
        )
        last = None
        for r in rows:
            if last is not None and (r.design, r.treatment_probability) != last:
                table.add_section()
            last = (r.design, r.treatment_probability)
            table.add_row(
                r.design, "arms" if r.assignment.startswith(("randomized saturation", "cluster-randomized")) else f"{r.treatment_probability:g}", r.estimator, r.variance_estimator, r.estimates, plus_minus(r.standard_error, r.standard_error_mc_se),
                interval(r.mde, r.mde_low, r.mde_high), fmt(r.mde_sd_units), plus_minus(r.size, r.size_mc_se), _design_mark(r), cell_of[id(r)],
            )
        console.print(table)
    print_flag_notes(flag_notes, console)
    console.print(
        "MDE: the formula MDE, (critical value + power quantile) x SE, of each planned test at its design's own level and power; "
        "SE: the estimator's Monte Carlo SD when the tested effect is zero; size: the test's rejection rate there. "
        "design's best: the smallest MDE among a design's tests of that estimand; best design: the smallest of those; "
        "tied: within two combined Monte Carlo SEs of it. pi: a Bernoulli design's treatment probability ('arms': a clustered "
        "design's, listed above). The estimands differ between designs (the estimates column says "
        "what each test estimates): a clustered design's spillover on the untreated at a saturation is not a network's "
        "average spillover at a treatment probability, so weigh which one the study needs, not only the MDE.",
        soft_wrap=True,
    )
    for w in result.warnings:
        console.print(f"warning: {w}", soft_wrap=True)
    for c in result.cautions:
        console.print(f"caution: {c}", soft_wrap=True)


def _compare_designs_command(
    loaded: Scenario, designs: Sequence[Path], *, units: Sequence[int] | None, graphs: int | None, assignments: int | None,
    seed: int | None, output_format: str, workers: int | None, cluster: str | None, store: Path | None, no_store: bool,
) -> None:
    others = [load_scenario(path) for path in designs]
    if units is not None and len(units) > 1:
        raise DesignCalcError("--units: a design comparison puts every design at one total size; give --units once")
    with execution(loaded, workers, cluster, store, no_store) as where:
        solve = partial(
            compare_designs, [loaded, *others], units=units[0] if units else None, graphs=graphs, assignments_per_graph=assignments,
            seed=seed, workers=where.workers, cluster=where.cluster, store=where.store,
        )
        result = simulate_with_progress(solve, known_total=False)
    emit(result, output_format, table=render_designs, csv_text=lambda r: records_csv(r.rows, _DESIGN_CSV_FIELDS))


def register(app: typer.Typer) -> None:
    @app.command("compare")
    def compare(
        scenario: ScenarioFile,
        probabilities: Annotated[list[float] | None, typer.Option("--probabilities", "-p", help="Treatment probabilities in (0, 1) to compare; repeat for several (default 0.1, 0.2, ..., 0.9 and the scenario's).")] = None,
        units: Units = None,
        graphs: Annotated[int | None, graphs_option("Graphs per design point.")] = None,
        assignments: Assignments = None,
        seed: Seed = None,
        verify: Annotated[bool, typer.Option("--verify/--no-verify", help="Verify every MDE by simulation, as designcalc mde does (slower); default: the formula MDE.")] = False,
        precision: Annotated[float | None, typer.Option(help="With --verify: target half-width of each MDE's 95% Monte Carlo interval relative to the MDE, in (0, 0.5]; overrides simulation.relative_precision.")] = None,
        max_graphs: Annotated[int | None, graphs_option("With --verify: most graphs per design point spent on precision; overrides simulation.max_graphs.")] = None,
        design: Annotated[list[Path] | None, typer.Option("--design", help="Another scenario whose design (population, assignment, tests) to put beside this one's at the same total number of units; repeat for several.")] = None,
        objective: Annotated[str | None, typer.Option(help="Pick one probability per size: the smallest MDE of this test, ESTIMAND[:ESTIMATOR[:VARIANCE]].")] = None,
        cap: Annotated[list[str] | None, typer.Option(help="With --objective: only probabilities where MDE(SPEC) <= VALUE (outcome units), as SPEC=VALUE; repeat for several.")] = None,
        output_format: OutputFormat = "table",
        figures: FiguresDir = None,
        workers: Workers = None,
        cluster: Cluster = None,
        store: StorePath = None,
        no_store: NoStore = False,
    ) -> None:
        """Compare treatment probabilities by SE, MDE and test size for every planned test, and pick one by a joint criterion.

        With --design: compare whole designs (one network against clustered and saturation designs) at one total size.
        """
        loaded = load_checked(
            scenario, output_format, probabilities, probability_option="--probabilities", precision=precision,
            max_graphs=max_graphs, graphs=graphs,
        )
        if design:
            for name, given in (("--probabilities", probabilities), ("--objective", objective), ("--cap", cap), ("--verify", verify), ("--figures", figures)):
                if given:
                    raise DesignCalcError(f"{name} applies to comparing treatment probabilities; with --design the designs themselves are compared")
            _compare_designs_command(
                loaded, design, units=units, graphs=graphs, assignments=assignments, seed=seed, output_format=output_format,
                workers=workers, cluster=cluster, store=store, no_store=no_store,
            )
            return
        if loaded.design.saturation is not None:
            raise DesignCalcError(
                f"{loaded.source} assigns by clusters, so it has no treatment probability to vary; "
                "put it beside other designs with --design OTHER.toml"
            )
        sizes = units or loaded.population.units
        criterion = build_criterion(loaded, sizes, objective, cap or ())

        def table(res: CompareResult, console: Console) -> None:
            render_table(res, console, scenario=loaded, verify=verify, resolved=resolved_tests(loaded, sizes, criterion))

        check_figures_dir(figures)
        with execution(loaded, workers, cluster, store, no_store) as where:
            solve = partial(
                compare_treatment_probabilities, loaded, probabilities=probabilities, units=units, criterion=criterion,
                verify=verify, graphs=graphs, assignments_per_graph=assignments, seed=seed, relative_precision=precision,
                max_graphs=max_graphs, workers=where.workers, cluster=where.cluster, store=where.store,
            )
            result = simulate_with_progress(solve, known_total=False)
        write_figures(figures, lambda: _figures(result))
        emit(result, output_format, table=table, csv_text=render_csv)


def _figures(result: CompareResult) -> dict[str, object]:
    from designcalc.figures import mde_probability_figure

    sizes = sorted({r.units for r in result.rows})
    return {
        f"mde_by_probability_{n}": mde_probability_figure(result.rows, units=n, title=f"{result.scenario_name}: MDE against treatment probability")
        for n in sizes
    }

"""Scale and memory: compact graphs, the memory estimate, the out-of-memory error, single precision."""

from __future__ import annotations

import os
import subprocess
import sys
import tracemalloc
from pathlib import Path

import numpy as np
import pytest

from designcalc import parse_scenario
from designcalc.engine import DesignPoint, _footprint, _prepare, simulate_graph
from designcalc.errors import DesignCalcError
from designcalc.estimators import (
    LARGE_GRAPH_UNITS,
    estimate_spillover_pc,
    estimate_spillover_pc_corrected,
    prepare_graph,
    treated_neighbour_counts,
    treated_neighbour_fraction,
)
from designcalc.graphs import sample_block_graph
from designcalc.memory import available_memory_bytes, check_memory, estimate_graph_memory

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "scenarios" / "lake_orrin_savings.toml"


def _demo_at(units: int, *, assignments: int, mean_degree: float = 20, growth: float = 0.0, reference: int = 1200) -> str:
    """The demo scenario (every estimator, one covariate) at one size and mean degree."""
    text = DEMO.read_text()
    text = text.replace("units = [600, 1200, 2400]", f"units = [{units}]")
    text = text.replace("mean_degree = 10 ", f"mean_degree = {mean_degree} ")
    text = text.replace("reference_units = 1200", f"reference_units = {reference}")
    text = text.replace("growth_exponent = 0.0 ", f"growth_exponent = {growth} ")
    text = text.replace("graphs = 40", "graphs = 1")
    return text.replace("assignments_per_graph = 25", f"assignments_per_graph = {assignments}")


def _three_block_graph(n: int, seed: int):
    """The demo's three-block model at mean degree 20, drawn directly."""
    sizes = [n // 2, 3 * n // 10, n - n // 2 - 3 * n // 10]
    shares = np.array([0.5, 0.3, 0.2])
    affinity = np.array([[8.0, 1.0, 0.5], [1.0, 10.0, 1.0], [0.5, 1.0, 14.0]])
    affinity /= shares @ affinity @ shares
    return sample_block_graph(sizes, np.minimum(1.0, 20 / (n - 1) * affinity), rng=np.random.default_rng(seed)), sizes


def test_a_large_sparse_graph_is_stored_in_int32_csr_and_its_preparation_is_linear_in_n_k() -> None:
    """At 10^5 units: int32 CSR indices, no n x n array, every prepared array O(n k + edges)."""
    scenario = parse_scenario(_demo_at(100_000, assignments=2), source="scale.toml")
    prepared = _prepare(scenario, DesignPoint(100_000, 0.5), 0)
    adjacency = prepared.net.adjacency
    assert adjacency.indices.dtype == np.int32 and adjacency.indptr.dtype == np.int32
    assert np.shares_memory(prepared.prep.adjacency_single.indices, adjacency.indices)  # float32 copy shares them
    assert prepared.W_all.dtype == bool
    n, nnz, q = 100_000, adjacency.nnz, prepared.prep.basis.shape[1]
    assert prepared.prep.eigen_method == "eigsh_single" and q <= 12
    assert prepared.prep.two_hop_matrix is None and prepared.prep.two_hop_clipped_factor is None
    for name in prepared.prep.__dataclass_fields__:
        value = getattr(prepared.prep, name)
        if isinstance(value, np.ndarray):
            assert value.size <= n * q, name  # nothing quadratic in n
    # Adjacency (int32 index, float64 and float32 entries per stored edge), two
    # (n, q) float64 bases, a few per-unit vectors, and the assignment block:
    # bool treatments, float64 noise and the covariate per unit and assignment.
    bound = 16 * nnz + 8 * n * (2 * q + 6) + n * 2 * (1 + 8 + 8 * scenario.n_covariates)
    assert _footprint(prepared) <= 1.1 * bound


def test_the_memory_estimate_is_within_a_factor_of_what_numpy_allocates() -> None:
    """tracemalloc's peak over one simulated graph lies within [0.8, 2] x the estimate's peak."""
    units = 20_000
    scenario = parse_scenario(_demo_at(units, assignments=8), source="scale.toml")
    estimate = estimate_graph_memory(scenario, units)
    tracemalloc.start()
    try:
        simulate_graph(scenario, DesignPoint(units, 0.5), 0)
        _, measured = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    # The estimate is meant to err on the safe side but not by so much that it
    # refuses scenarios that fit: measured 1.2-1.3x on the demo model.
    assert 0.8 * measured <= estimate.peak_bytes <= 2.0 * measured, (estimate.phases, measured)


def test_the_estimate_grows_with_edges_assignments_and_covariates() -> None:
    """Doubling units, assignments or mean degree raises the estimate; a sparse rule stays near linear."""
    small = parse_scenario(_demo_at(100_000, assignments=4), source="a.toml")
    more_assignments = parse_scenario(_demo_at(100_000, assignments=8), source="a.toml")
    denser = parse_scenario(_demo_at(100_000, assignments=4, mean_degree=40), source="a.toml")
    base = estimate_graph_memory(small, 100_000).peak_bytes
    assert estimate_graph_memory(more_assignments, 100_000).peak_bytes > base
    assert estimate_graph_memory(denser, 100_000).peak_bytes > base
    assert 1.9 < estimate_graph_memory(small, 200_000).peak_bytes / base < 2.1


def test_an_impossible_scenario_is_refused_before_sampling_with_the_estimate() -> None:
    """10^6 units under a fixed-density rule (about 10^10 edges) raise DesignCalcError naming keys and bytes."""
    text = _demo_at(1_000_000, assignments=1, growth=1.0, reference=1000)
    scenario = parse_scenario(text, source="dense.toml")
    estimate = estimate_graph_memory(scenario, 1_000_000)
    # Mean degree 20 * 10^6 / 10^3 = 2 x 10^4, so n d / 2 = 10^10 edges (exact for a block model).
    assert estimate.expected_edges == pytest.approx(1e10, rel=1e-3)
    with pytest.raises(DesignCalcError, match=r"dense\.toml: population\.units = 1000000: .* GB .* 8\.59 GB are available.*growth_exponent = 1"):
        check_memory(scenario, 1_000_000, available=8 * 2**30)
    with pytest.raises(DesignCalcError, match="network.density"):
        simulate_graph(scenario, DesignPoint(1_000_000, 0.5), 0)  # the engine checks before drawing


def test_the_check_passes_what_fits_and_reads_the_operating_system() -> None:
    """A demo-sized graph passes; the available memory is read (MemAvailable on Linux) as a positive number."""
    scenario = parse_scenario(_demo_at(1200, assignments=25), source="demo.toml")
    assert check_memory(scenario, 1200).peak_bytes < 100e6
    available = available_memory_bytes()
    assert available is None or available > 0


def test_too_many_assignments_name_the_assignment_key() -> None:
    """When the assignment block dominates, the message points at simulation.assignments_per_graph."""
    scenario = parse_scenario(_demo_at(100_000, assignments=5000), source="wide.toml")
    with pytest.raises(DesignCalcError, match="simulation.assignments_per_graph = 5000"):
        check_memory(scenario, 100_000, available=4 * 2**30)


def test_the_command_line_exits_2_with_the_memory_message_and_no_traceback(tmp_path: Path) -> None:
    """`designcalc power` on the impossible scenario prints one error line on stderr and exits 2."""
    path = tmp_path / "dense.toml"
    path.write_text(_demo_at(1_000_000, assignments=1, growth=1.0, reference=1000))
    done = subprocess.run(
        [sys.executable, "-m", "designcalc", "power", str(path), "--workers", "1"],
        capture_output=True, text=True, timeout=120, env={**os.environ, "NO_COLOR": "1"},
    )
    assert done.returncode == 2, done.stderr
    assert "Traceback" not in done.stderr
    assert "population.units = 1000000" in done.stderr and "available" in done.stderr


def test_treated_neighbour_counts_through_float32_equal_the_float64_product_exactly() -> None:
    """A @ W for 0/1 W is an integer count: the float32 product equals the float64 one bit for bit."""
    adjacency, _ = _three_block_graph(5000, seed=3)
    prep = prepare_graph(adjacency, n_eigenvectors=2)
    W = (np.random.default_rng(4).random((5000, 7)) < 0.3).astype(float)
    assert np.array_equal(treated_neighbour_counts(prep, W), adjacency @ W)
    assert np.array_equal(treated_neighbour_counts(prep, W.astype(bool)), adjacency @ W)
    with pytest.raises(DesignCalcError, match="only 0 and 1"):
        treated_neighbour_fraction(prep, W * 0.5)


def test_single_precision_lanczos_gives_the_same_signal_basis_and_estimates_within_a_tenth_of_an_se() -> None:
    """Single vs double precision eigsh on a 20,000-unit three-block graph: same k, same signal subspace, same estimates."""
    n = 20_000
    adjacency, sizes = _three_block_graph(n, seed=7)
    double = prepare_graph(adjacency, n_eigenvectors=None, single_precision=False)
    single = prepare_graph(adjacency, n_eigenvectors=None, single_precision=True)
    assert (double.eigen_method, single.eigen_method) == ("eigsh", "eigsh_single")
    assert double.n_eigenvectors == single.n_eigenvectors
    # The constant and the three block eigenvectors (eigengap ~5 above the
    # noise edge ~9.5) agree to float32 rounding amplified by 1/gap; the
    # vectors at the noise edge are mixtures of near-equal eigenvalues in
    # either precision and need not agree (any basis from the graph alone
    # keeps the corrected estimator unbiased, METHODS §3.3).
    cosines = np.linalg.svd(double.basis[:, :4].T @ single.basis[:, :4], compute_uv=False)
    assert np.sqrt(1.0 - cosines.min() ** 2) < 1e-4
    rng = np.random.default_rng(8)
    blocks = np.repeat([0, 1, 2], sizes)
    W = (rng.random((n, 8)) < 0.5).astype(float)
    X = treated_neighbour_fraction(double, W)
    Y = 20 + np.array([0.0, 2.0, -1.5])[blocks][:, None] + 1.2 * W + X + 4 * rng.standard_normal((n, 8))
    for estimator in (estimate_spillover_pc, estimate_spillover_pc_corrected):
        a = estimator(double, W, Y, treatment_probability=0.5)
        b = estimator(single, W, Y, treatment_probability=0.5)
        # Harmless means far inside the Monte Carlo noise of one replicate: the
        # estimates move by under a tenth of their standard error (measured
        # 0.03) and the SEs by under 0.1% (measured 1e-4).
        assert np.max(np.abs(a.estimate - b.estimate) / a.standard_error) < 0.1, estimator.__name__
        assert np.max(np.abs(b.standard_error / a.standard_error - 1.0)) < 1e-3, estimator.__name__


def test_graphs_from_the_large_size_on_use_single_precision_by_default() -> None:
    """prepare_graph switches to single-precision Lanczos at LARGE_GRAPH_UNITS units and not below."""
    adjacency, _ = _three_block_graph(LARGE_GRAPH_UNITS, seed=9)
    assert prepare_graph(adjacency, n_eigenvectors=3).eigen_method == "eigsh_single"
    smaller, _ = _three_block_graph(LARGE_GRAPH_UNITS - 1, seed=9)
    assert prepare_graph(smaller, n_eigenvectors=3).eigen_method == "eigsh"


def test_large_networks_use_fewer_columns_per_batch_and_the_same_numbers(monkeypatch):
    """At 10^6 units a batch holds 4 columns, not 16; forcing one column per batch changes no number."""
    from designcalc import load_scenario
    from designcalc.engine import DesignPoint, columns_per_batch, simulate_graph

    assert columns_per_batch(1_000_000, 16) == 4 and columns_per_batch(10_000, 16) == 16 and columns_per_batch(10**8, 16) == 1
    s = load_scenario(Path(__file__).parents[1] / "scenarios" / "lake_orrin_savings.toml")
    point = DesignPoint(600, 0.5)
    wide = simulate_graph(s, point, 0)
    monkeypatch.setattr("designcalc.engine.BATCH_CELLS", 600)  # one column per batch at 600 units
    narrow = simulate_graph(s, point, 0)
    for label, run in wide.runs.items():
        for key, values in run.estimates.items():
            assert (values == narrow.runs[label].estimates[key]).all(), key
            assert (run.standard_errors[key] == narrow.runs[label].standard_errors[key]).all(), key


def test_a_pool_that_would_not_fit_stops_before_starting_and_names_the_workers():
    """Two graphs at a time need twice the memory: refused in the parent, the message names --workers."""
    from designcalc import load_scenario
    from designcalc.errors import DesignCalcError
    from designcalc.memory import check_memory, estimate_graph_memory

    s = load_scenario(Path(__file__).parents[1] / "scenarios" / "lake_orrin_savings.toml")
    need = estimate_graph_memory(s, 2400).peak_bytes
    check_memory(s, 2400, available=4 * need, workers=2)  # fits: two graphs, half the memory
    with pytest.raises(DesignCalcError, match=r"available to 2 worker processes.*fewer workers \(--workers\)"):
        check_memory(s, 2400, available=int(2.0 * need), workers=2)
    check_memory(s, 2400, available=int(2.0 * need), workers=1)  # one at a time fits (90% of it usable)

"""Time designcalc's block-model sampler against networkx on a 30,000-node graph.

A plain script, not a test: ``python benchmarks/bench_sampler.py``.

The graph has three blocks with shares .5/.3/.2 (15,000, 9,000 and 6,000
nodes), assortative probabilities proportional to 5 within and 1 between
blocks, scaled so that the expected mean degree is exactly 20. designcalc's
time is the best of several repeats; networkx's ``stochastic_block_model``
(default options: ``sparse=True``) is run twice, which is enough for a
seconds-long call. Takes about a minute on two cores, almost all of it in
networkx (~30 s per call).
"""

from __future__ import annotations

import time

import networkx as nx
import numpy as np

from designcalc.graphs import sample_block_graph

N_NODES = 30_000
SHARES = (0.5, 0.3, 0.2)
AFFINITY = np.array([[5.0, 1.0, 1.0], [1.0, 5.0, 1.0], [1.0, 1.0, 5.0]])
MEAN_DEGREE = 20.0
DESIGNCALC_REPEATS = 7
NETWORKX_REPEATS = 2


def block_probabilities() -> tuple[list[int], np.ndarray]:
    """Block sizes and probabilities c * AFFINITY giving the exact expected mean degree."""
    sizes = [round(share * N_NODES) for share in SHARES]
    s = np.array(sizes, dtype=float)
    # Expected degree sum: sum_k n_k (n_k - 1) B_kk + sum_{k != l} n_k n_l B_kl, times c.
    pair_weight = np.outer(s, s) - np.diag(s)
    scale = MEAN_DEGREE * N_NODES / float((pair_weight * AFFINITY).sum())
    return sizes, scale * AFFINITY


def main() -> None:
    sizes, probabilities = block_probabilities()
    print(f"n = {N_NODES:,}, blocks {sizes}, expected mean degree {MEAN_DEGREE:g}")
    print("probabilities:\n" + np.array2string(probabilities, precision=6))
    expected_edges = MEAN_DEGREE * N_NODES / 2

    rng = np.random.default_rng(20240601)
    sample_block_graph(sizes, probabilities, rng=rng)  # warm-up: imports, caches
    ours_times, ours_edges = [], []
    for _ in range(DESIGNCALC_REPEATS):
        start = time.perf_counter()
        adjacency = sample_block_graph(sizes, probabilities, rng=rng)
        ours_times.append(time.perf_counter() - start)
        ours_edges.append(adjacency.nnz // 2)

    nx_times, nx_edges = [], []
    for seed in range(NETWORKX_REPEATS):
        start = time.perf_counter()
        graph = nx.stochastic_block_model(sizes, probabilities.tolist(), seed=seed)
        nx_times.append(time.perf_counter() - start)
        nx_edges.append(graph.number_of_edges())
        del graph

    ours_best, nx_best = min(ours_times), min(nx_times)
    print()
    print(f"{'':32}{'designcalc':>14}{'networkx':>14}")
    print(f"{'best time (s)':32}{ours_best:>14.4f}{nx_best:>14.3f}")
    print(
        f"{'median time (s)':32}{np.median(ours_times):>14.4f}{np.median(nx_times):>14.3f}"
    )
    print(f"{'repeats':32}{DESIGNCALC_REPEATS:>14d}{NETWORKX_REPEATS:>14d}")
    print(
        f"{'edges (first two repeats)':32}{' '.join(map(str, ours_edges[:2])):>14}{' '.join(map(str, nx_edges)):>14}"
    )
    print(f"{'expected edges':32}{expected_edges:>14,.0f}{expected_edges:>14,.0f}")
    print(f"{'speed-up (networkx / designcalc)':32}{nx_best / ours_best:>14.1f}")
    # The edge count is binomial-like: sd ~ sqrt(expected), so all counts should sit within ~4 sd.
    sd = np.sqrt(expected_edges)
    print(
        f"edge counts within 4 sd ({4 * sd:.0f}) of expectation: {all(abs(e - expected_edges) <= 4 * sd for e in ours_edges + nx_edges)}"
    )


if __name__ == "__main__":
    main()

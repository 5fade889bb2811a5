"""cluster_nodes at scale: time and adjusted Rand index against the symmetrized (charge 0) baseline.

Graph: directed_block_model with B = 4 equal blocks around a directed cycle (block b sends to
block b + 1 with probability `flow`), the same edge density inside and between blocks, so the
symmetrized graph carries no block signal. Timed (median over repeats, seeded graph built
outside the timed body): cluster_nodes with charge 1 / B against charge 0 (ordinary
normalized spectral clustering of A_s), in the same process, interleaved; the magnetic
clustering with one eigenvector (num_vectors=1), which for a cycle of blocks carries the whole
signal; and the default (4 vectors) with the eigensolver set up as before this round (Lanczos
to a 1e-4 residual, no Chebyshev polish), the baseline of the current setup (Lanczos to 1 %,
then a degree-6 Chebyshev filter on the block). Mean undirected degree about 40, flow 0.95: the block signal (eigenvalue of L(1/4) near
0.5) sits clearly below the edge of the bulk of the spectrum (about 1 - 2 / sqrt(40)); at mean
degree 10 it sits inside the bulk and no spectral method finds it.

Usage: .venv/bin/python bench/clustering.py [--quick]
"""

from __future__ import annotations

import sys
import time

import numpy as np
import torch

from _common import interleaved_times, machine_info, print_table, write_results

import phasorgraph as pg
from phasorgraph import clustering
from phasorgraph.data import directed_block_model


def main() -> None:
    quick = "--quick" in sys.argv
    torch.set_num_threads(1)
    sizes = [10_000] if quick else [10_000, 100_000]
    blocks, degree, flow_strength = 4, 40.0, 0.95
    rows = []
    # load the native kernels once (numba's cache) outside every timed body
    warm, _ = directed_block_model([100] * blocks, 0.1, np.full((blocks, blocks), 0.5), seed=1)
    for q in (0.0, 1 / blocks):
        pg.cluster_nodes(warm, blocks, charge=q, seed=0)
    for n in sizes:
        per = n // blocks
        density = degree / n  # expected undirected degree about `degree`
        flow = np.full((blocks, blocks), 0.5)
        for b in range(blocks):
            flow[b, (b + 1) % blocks], flow[(b + 1) % blocks, b] = flow_strength, 1 - flow_strength
        t0 = time.perf_counter()
        g, y = directed_block_model([per] * blocks, density, flow, seed=0)
        build = time.perf_counter() - t0
        results = {}

        earlier = "magnetic, 4 vectors, earlier eigensolver setup"
        variants = {"magnetic, 4 vectors": (1 / blocks, None), "magnetic, 1 vector": (1 / blocks, 1),
                    "symmetrized, 4 vectors": (0.0, None), earlier: (1 / blocks, None)}

        def run(name):
            q, m = variants[name]
            setup = (clustering._LANCZOS_TOL, clustering._FILTER_DEGREE)
            if name == earlier:  # the setup before: Lanczos to a 1e-4 residual, no polish
                clustering._LANCZOS_TOL, clustering._FILTER_DEGREE = 1e-4, 0
            try:
                results[name] = pg.cluster_nodes(g, blocks, charge=q, num_vectors=m, seed=0)
            finally:
                clustering._LANCZOS_TOL, clustering._FILTER_DEGREE = setup

        times = interleaved_times({name: (lambda name=name: run(name)) for name in variants},
                                  repeats=1 if n >= 100_000 else 3, warmup=0)
        for name, (q, m) in variants.items():
            t = times[name]
            rows.append({"nodes": g.num_nodes, "edges": g.num_edges, "variant": name, "charge": q,
                         "seconds": t["median"], "vs symmetrized": t["median"] / times["symmetrized, 4 vectors"]["median"],
                         "vs earlier setup": t["median"] / times[earlier]["median"],
                         "ARI": pg.adjusted_rand_index(results[name], y), "graph build s": build})
    table = print_table(rows, ["nodes", "edges", "variant", "charge", "seconds", "vs symmetrized", "vs earlier setup",
                               "ARI", "graph build s"],
                        title="cluster_nodes: 4 blocks around a directed cycle, equal densities")
    write_results("clustering", {"rows": rows, "table": table, "machine": machine_info()}, argv=sys.argv)


if __name__ == "__main__":
    main()

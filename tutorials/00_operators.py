"""Build every operator on a generated directed graph and print what was found.

Usage: python tutorials/00_operators.py [--nodes N] [--seed S]
"""

import argparse
import time

import numpy as np
import torch

import phasorgraph as pg
from phasorgraph import spectral


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--nodes", type=int, default=20000)
    parser.add_argument("--seed", type=int, default=0)
    args = parser.parse_args()
    rng = np.random.default_rng(args.seed)
    n = args.nodes
    # a generated one-way-heavy graph: each node ships to 5 random later-indexed or any nodes
    src = np.repeat(np.arange(n), 5)
    dst = rng.integers(0, n, size=src.size)
    graph = pg.DirectedGraph.from_edges(src, dst, weight=rng.uniform(0.1, 1.0, src.size), num_nodes=n)
    print(f"generated {graph}")
    builders = {
        "combinatorial_laplacian": pg.combinatorial_laplacian,
        "normalized_laplacian": pg.normalized_laplacian,
        "random_walk_laplacian": pg.random_walk_laplacian,
        "renormalized_adjacency": pg.renormalized_adjacency,
        "magnetic_adjacency(q=0.25)": pg.magnetic_adjacency,
        "magnetic_laplacian(q=0.25)": pg.magnetic_laplacian,
        "diffusion": pg.diffusion,
        "diffusion(q=0.1)": lambda g: pg.diffusion(g, charge=0.1),
        "random_walk": pg.random_walk,
        "pagerank_laplacian": pg.pagerank_laplacian,
    }
    print(f"{'operator':30s} {'nnz':>9s} {'dtype':>15s} {'hermitian':>9s} {'max eig':>8s} {'build s':>8s}")
    for name, build in builders.items():
        t0 = time.perf_counter()
        op = build(graph)
        dt = time.perf_counter() - t0
        max_eig = spectral.largest_eigenvalue(op) if op.hermitian else float("nan")
        print(f"{name:30s} {op.nnz:9d} {str(op.dtype):>15s} {str(op.hermitian):>9s} {max_eig:8.4f} {dt:8.3f}")


if __name__ == "__main__":
    torch.manual_seed(0)
    main()

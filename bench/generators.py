"""Benchmark: generated graphs and link splits at scale (directed_block_model, split_link_presence).

Grid: graph size (N nodes, about E edges), 4 equal blocks, uniform density chosen so that the
expected edge count is E, flow 0.8 between blocks. For each size it times the whole
``directed_block_model`` call, the edge sampling alone (without building the DirectedGraph,
whose canonical sort is graph.py's cost) and ``split_link_presence`` (10 % / 10 %).
Baselines a user might write instead, at small N only: networkx's
``stochastic_block_model(directed=True, sparse=True)`` and a dense numpy Bernoulli matrix
(rng.random((N, N)) < p); both are reported as ratios to our call at the same N and density.

Run: .venv/bin/python bench/generators.py [--quick] [--threads 2]   (full run: about a minute
when idle). On a shared, loaded 2-core box torch's multi-threaded sort (inside DirectedGraph)
slows down sharply; ``--threads 1`` then gives steadier figures.
"""

from __future__ import annotations

import argparse
import sys

import networkx as nx
import numpy as np
import torch

from _common import print_table, time_stats, write_results

from phasorgraph.data import directed_block_model, split_link_presence
from phasorgraph.data._pairs import num_pairs
from phasorgraph.data.generators import _block_edges

FLOW = np.array([[0.5, 0.8, 0.8, 0.8], [0.2, 0.5, 0.8, 0.8], [0.2, 0.2, 0.5, 0.8], [0.2, 0.2, 0.2, 0.5]])


def setting(n: int, e: int):
    sizes = [n // 4] * 3 + [n - 3 * (n // 4)]
    return sizes, e / num_pairs(n)


def scale_rows(grid, repeats):
    rows = []
    for n, e in grid:
        sizes, p = setting(n, e)
        full = time_stats(lambda: directed_block_model(sizes, p, FLOW, seed=0), repeats=repeats, warmup=0)
        prob = np.full((4, 4), p)
        sample = time_stats(lambda: _block_edges(np.random.default_rng(0), np.array(sizes), prob, FLOW),
                            repeats=repeats, warmup=0)
        g, _ = directed_block_model(sizes, p, FLOW, seed=0)
        split = time_stats(lambda: split_link_presence(g, 0.1, 0.1, seed=0), repeats=max(1, repeats - 1), warmup=0)
        rows.append({
            "nodes": n, "edges": g.num_edges,
            "block_model_s": full["median"], "sampling_only_s": sample["median"],
            "million_edges_per_s": g.num_edges / full["median"] / 1e6,
            "split_links_s": split["median"], "repeats": full["repeats"],
        })
    return rows


def baseline_rows(grid, repeats):
    rows = []
    for n, e in grid:
        sizes, p = setting(n, e)
        ours = time_stats(lambda: directed_block_model(sizes, p, FLOW, seed=0), repeats=repeats, warmup=1)
        probs = np.full((4, 4), p).tolist()
        nxt = time_stats(lambda: nx.stochastic_block_model(sizes, probs, seed=0, directed=True, sparse=True),
                         repeats=repeats, warmup=0, max_seconds=20)
        rng = np.random.default_rng(0)
        dense = time_stats(lambda: np.nonzero(np.triu(rng.random((n, n)) < p, 1)), repeats=repeats, warmup=0)
        rows.append({
            "nodes": n, "density": p, "ours_s": ours["median"],
            "networkx_sbm_s": nxt["median"], "networkx_over_ours": nxt["median"] / ours["median"],
            "dense_numpy_s": dense["median"], "dense_over_ours": dense["median"] / ours["median"],
        })
    return rows


def dense_block_rows(repeats):
    """Dense blocks go through the complement: exact, O(pairs) memory <= O(2 E)."""
    rows = []
    for n, p in [(2000, 0.9), (2000, 0.5)]:
        t = time_stats(lambda: directed_block_model([n], p, [[0.5]], seed=0), repeats=repeats, warmup=0)
        g, _ = directed_block_model([n], p, [[0.5]], seed=0)
        rows.append({"nodes": n, "density": p, "edges": g.num_edges, "seconds": t["median"],
                     "million_edges_per_s": g.num_edges / t["median"] / 1e6})
    return rows


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="small grid, a few seconds")
    parser.add_argument("--threads", type=int, default=2, help="torch threads (default 2)")
    args = parser.parse_args(argv)
    torch.set_num_threads(args.threads)
    if args.quick:
        grid, base, repeats = [(10_000, 100_000), (100_000, 1_000_000)], [(1_000, 5_000)], 2
    else:
        grid, base, repeats = [(100_000, 1_000_000), (1_000_000, 10_000_000)], [(1_000, 5_000), (3_000, 45_000)], 3
    scale = scale_rows(grid, repeats)
    print_table(scale, title="directed_block_model and split_link_presence at scale (median seconds)")
    baselines = baseline_rows(base, 5)
    print_table(baselines, title="Baselines at small N (ratios > 1: ours is faster)")
    dense = dense_block_rows(repeats)
    print_table(dense, title="Dense blocks (complement sampling)")
    write_results("generators", {"quick": args.quick, "scale": scale, "baselines": baselines, "dense_blocks": dense},
                  argv=sys.argv)


if __name__ == "__main__":
    main()

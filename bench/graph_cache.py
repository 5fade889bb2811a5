"""Memory kept alive when one process sees many graphs: operators kept with the graph vs a layer cache.

A long-running process (a service scoring a new snapshot of a payment or freight network every
hour, say) calls the same layers on graph after graph and drops each graph when done. Operators
built for a graph are kept with the graph (``graph.operator``), so they go when the graph goes.
The baseline is the earlier design, where each layer kept the last few graphs in its own
operator cache: it is imitated here by holding a reference to each graph, as such a cache did.

Measured: the resident memory of this process (``/proc/self/statm``) after S snapshots of a
generated directed graph of E edges each went through a fixed-charge MagneticFilter, a learned
one and a RenormalizedFilter, relative to the memory after one warm-up snapshot (kernels
compiled, allocator warmed). Both runs share the process; the ratio compares them.

Usage: ``.venv/bin/python bench/graph_cache.py [--snapshots 12] [--edges 200000]``
"""

from __future__ import annotations

import argparse
import gc
import os
import sys

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))

import torch  # noqa: E402

from _common import print_table, write_results  # noqa: E402
from phasorgraph.data import random_out_graph  # noqa: E402
from phasorgraph.nn import LearnedCharge, MagneticFilter, RenormalizedFilter  # noqa: E402


def resident_bytes() -> int:
    with open("/proc/self/statm") as fh:
        return int(fh.read().split()[1]) * os.sysconf("SC_PAGE_SIZE")


def run(snapshots: int, edges: int, keep_graphs: bool) -> list:
    torch.manual_seed(0)
    layers = [MagneticFilter(8, 8, order=2, charge=0.25), MagneticFilter(8, 8, order=2, charge=LearnedCharge(start=0.05)),
              RenormalizedFilter(8, 8)]
    kept = []                               # the baseline: what a per-layer cache of graphs holds
    nodes = max(edges // 8, 1)
    warm = random_out_graph(nodes, 8, seed=10_000)  # kernels compiled, allocator warmed, before the clock
    with torch.no_grad():
        for layer in layers:
            layer(torch.randn(warm.num_nodes, 8), warm)
    del warm
    gc.collect()
    start = resident_bytes()
    grown = []
    for s in range(snapshots):
        graph = random_out_graph(nodes, 8, seed=s)
        x = torch.randn(graph.num_nodes, 8)
        with torch.no_grad():
            for layer in layers:
                layer(x, graph)
        if keep_graphs:
            kept.append(graph)
        del graph, x
        gc.collect()
        grown.append(resident_bytes() - start)
    return grown


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--snapshots", type=int, default=12)
    parser.add_argument("--edges", type=int, default=200_000)
    parser.add_argument("--quick", action="store_true", help="3 snapshots of 5000 edges (a few seconds)")
    args = parser.parse_args(argv)
    if args.quick:
        args.snapshots, args.edges = 3, 5_000
    torch.set_num_threads(1)
    ours = run(args.snapshots, args.edges, keep_graphs=False)
    baseline = run(args.snapshots, args.edges, keep_graphs=True)
    rows = [{"snapshot": s + 1, "kept with graph MB": ours[s] / 2**20, "graphs held MB": baseline[s] / 2**20}
            for s in range(args.snapshots)]
    final = {"kept with graph MB": ours[-1] / 2**20, "graphs held MB": baseline[-1] / 2**20,
             "ratio": (ours[-1] / baseline[-1]) if baseline[-1] > 0 else None}
    print_table(rows, ["snapshot", "kept with graph MB", "graphs held MB"],
                title=f"resident memory growth over {args.snapshots} snapshots of {args.edges} edges")
    print(f"after the last snapshot: {final['kept with graph MB']:.1f} MB against {final['graphs held MB']:.1f} MB"
          f" when the graphs are held (ratio {final['ratio']:.3f})" if final["ratio"] is not None else "")
    write_results("graph_cache_quick" if args.quick else "graph_cache", {"snapshots": args.snapshots, "edges": args.edges, "rows": rows, "final": final},
                  argv=sys.argv)


if __name__ == "__main__":
    main()

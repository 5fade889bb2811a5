"""Benchmark of node order: sparse products on a shuffled graph, before and after locality_order().

The graph is a generated road-like freight network with locality to recover: the nodes of a
side x side grid (depots) joined to their right and lower neighbours by one-way links of random
direction, plus a few shortcuts to a node at most 3 rows away. In the natural (row by row) order
its operators are banded. The node ids are then shuffled by a seeded random permutation, which
scatters every row's non-zeros over the whole matrix, and DirectedGraph.locality_order() (reverse
Cuthill-McKee, scipy.sparse.csgraph) is asked to undo the damage.

For each order (natural, shuffled, RCM of the shuffled graph) it builds the normalized magnetic
Laplacian (q = 0.25, complex64) and times, round-robin, medians over repeats: the forward of
hermitian_matmul with F = 64 complex features, and its forward + backward. It reports the
matrix bandwidth max |u - v| over the non-zeros and the speed-up of RCM over the shuffle.

Usage: ``python bench/locality.py [--quick] [--repeats 5]``; writes bench/results/locality.json
(``--quick``: locality_quick.json).
"""

from __future__ import annotations

import argparse
import os
import sys
import time

import torch

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from _common import interleaved_times, print_table, write_results  # noqa: E402

from phasorgraph import operators  # noqa: E402
from phasorgraph.graph import DirectedGraph  # noqa: E402
from phasorgraph.sparse import hermitian_matmul  # noqa: E402

F = 64
DTYPE = torch.complex64


def grid_network(side: int, shortcuts: float = 0.5, seed: int = 0) -> DirectedGraph:
    """side x side grid, one-way links of random direction, plus local shortcuts (vectorized)."""
    g = torch.Generator().manual_seed(seed)
    n = side * side
    ids = torch.arange(n).reshape(side, side)
    right = torch.stack([ids[:, :-1].reshape(-1), ids[:, 1:].reshape(-1)])
    down = torch.stack([ids[:-1, :].reshape(-1), ids[1:, :].reshape(-1)])
    edges = torch.cat([right, down], dim=1)
    k = int(shortcuts * n)
    src = torch.randint(0, n, (k,), generator=g)
    r, c = src // side, src % side
    r2 = (r + torch.randint(-3, 4, (k,), generator=g)).clamp(0, side - 1)
    c2 = (c + torch.randint(-3, 4, (k,), generator=g)).clamp(0, side - 1)
    dst = r2 * side + c2
    keep = dst != src
    edges = torch.cat([edges, torch.stack([src[keep], dst[keep]])], dim=1)
    flip = torch.rand(edges.shape[1], generator=g) < 0.5
    s = torch.where(flip, edges[1], edges[0])
    t = torch.where(flip, edges[0], edges[1])
    w = 0.5 + 0.5 * torch.rand(edges.shape[1], generator=g, dtype=torch.float64)
    return DirectedGraph(s, t, w, num_nodes=n)


def matrix_bandwidth(op) -> int:
    m = op.matrix
    rows = torch.repeat_interleave(torch.arange(op.num_rows), m.crow_indices().diff())
    return int((rows - m.col_indices()).abs().max()) if op.nnz else 0


def bench_side(side: int, repeats: int) -> list:
    natural = grid_network(side)
    n = natural.num_nodes
    shuffle = torch.randperm(n, generator=torch.Generator().manual_seed(1))
    shuffled = natural.permute(shuffle)
    t0 = time.perf_counter()
    ordered, perm = shuffled.locality_order()
    rcm_seconds = time.perf_counter() - t0
    graphs = {"natural": natural, "shuffled": shuffled, "rcm": ordered}
    ops = {k: operators.magnetic_laplacian(g, 0.25, dtype=DTYPE) for k, g in graphs.items()}
    gen = torch.Generator().manual_seed(2)
    x = torch.randn(n, F, dtype=DTYPE, generator=gen)
    grad = torch.randn(n, F, dtype=DTYPE, generator=gen)
    # the same features in each order: node perm[i] of the shuffled graph is node i of rcm
    xs = {"natural": x, "shuffled": x[shuffle], "rcm": x[shuffle][perm]}
    with torch.no_grad():
        y_sh = hermitian_matmul(ops["shuffled"], xs["shuffled"])
        y_rcm = hermitian_matmul(ops["rcm"], xs["rcm"])
        err = float((y_sh[perm] - y_rcm).abs().max())
    leaf = {k: v.clone().requires_grad_() for k, v in xs.items()}

    def fwd_bwd(k):
        def run():
            leaf[k].grad = None
            hermitian_matmul(ops[k], leaf[k]).backward(grad)
        return run

    with torch.no_grad():
        fwd = interleaved_times({k: (lambda k=k: hermitian_matmul(ops[k], xs[k])) for k in ops},
                                repeats=repeats, warmup=1)
    fb = interleaved_times({k: fwd_bwd(k) for k in ops}, repeats=repeats, warmup=1)
    rows = []
    for k in ops:
        rows.append({"side": side, "N": n, "nnz": ops[k].nnz, "order": k, "bandwidth": matrix_bandwidth(ops[k]),
                     "fwd_s": fwd[k]["median"], "fwd_bwd_s": fb[k]["median"], "repeats": fwd[k]["repeats"]})
    for r in rows:
        r["fwd_speedup_vs_shuffled"] = fwd["shuffled"]["median"] / r["fwd_s"]
        r["fwd_bwd_speedup_vs_shuffled"] = fb["shuffled"]["median"] / r["fwd_bwd_s"]
        r["rcm_seconds"] = rcm_seconds if r["order"] == "rcm" else None
        r["max_abs_diff_vs_shuffled"] = err if r["order"] == "rcm" else None
    return rows


def main(argv=None):
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--quick", action="store_true", help="one small grid, a few seconds")
    p.add_argument("--repeats", type=int, default=5, help="timed repeats (default 5)")
    args = p.parse_args(argv)
    torch.set_num_threads(2)
    start = time.perf_counter()
    sides = [60] if args.quick else [200, 500]
    rows = []
    for side in sides:
        rows.extend(bench_side(side, 2 if args.quick else args.repeats))
        print(f"side {side} done ({time.perf_counter() - start:.0f}s)", flush=True)
    print_table(rows, ["side", "N", "nnz", "order", "bandwidth", "fwd_s", "fwd_bwd_s", "fwd_speedup_vs_shuffled",
                       "fwd_bwd_speedup_vs_shuffled", "rcm_seconds", "max_abs_diff_vs_shuffled"],
                title="hermitian_matmul on a grid network, complex64, F = 64 (seconds, medians)")
    write_results("locality_quick" if args.quick else "locality",
                  {"settings": {"F": F, "dtype": str(DTYPE), "sides": sides,
                                "graph": "side x side grid, random one-way links, local shortcuts; ids shuffled",
                                "operator": "normalized magnetic Laplacian, q = 0.25"},
                   "rows": rows, "wall_s": time.perf_counter() - start}, argv=sys.argv)


if __name__ == "__main__":
    main()

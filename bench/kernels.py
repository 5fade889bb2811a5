"""Benchmark of the sparse products: hermitian_matmul against what a user would write instead.

For random directed graphs with E edges and N = E / 10 nodes (uniform endpoints, so no memory
locality), F = 64 complex64 features, and the normalized magnetic Laplacian at q = 0.25 (nnz
about 2E + N), it times in one process, round-robin (so load from other jobs hits every
variant alike), medians over repeats:

* ``ours``: phasorgraph.sparse.hermitian_matmul (forward op @ x, backward op @ g);
* ``builtin``: torch's own sparse CSR autograd, torch.sparse.mm(matrix, x) with
  x.requires_grad (its backward transposes the CSR matrix on every call);
* ``gather``: a gather-scatter product, index_select + multiply + index_add_, with autograd
  (skipped when its (nnz, F) temporary would pass ~2.5 GB);
* ``dense``: a dense complex (N, N) @ (N, F) matmul with autograd, for N <= 4096.

It also reports the log-log slope of time against E (from 1e5 edges up), an effective bandwidth
(compulsory bytes: the operator's values and indices, x read once, y written once; and the
gathered bytes nnz * F * 8 of the row gathers) beside a copy bandwidth measured in the same run,
and the cost of the charge gradient: learned_charge.magnetic_matmul forward+backward (x and q
gradients) against a plain hermitian_matmul forward+backward on the same graph.

Usage: ``python bench/kernels.py [--quick] [--max-edges 1e7] [--repeats 3]``; writes
bench/results/kernels.json (``--quick`` writes kernels_quick.json unless --out is given).
"""

from __future__ import annotations

import argparse
import gc
import math
import os
import sys
import time

import numpy as np
import torch

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from _common import copy_bandwidth, print_table, write_results  # noqa: E402

from phasorgraph import learned_charge, operators  # noqa: E402
from phasorgraph.graph import DirectedGraph  # noqa: E402
from phasorgraph.sparse import hermitian_matmul  # noqa: E402

F = 64
DTYPE = torch.complex64
GATHER_LIMIT_BYTES = 2.5e9
DENSE_LIMIT_N = 4096


def random_graph(num_edges: int, seed: int = 0) -> DirectedGraph:
    """E uniform random directed edges on N = E / 10 nodes (duplicates summed by DirectedGraph)."""
    n = max(2, num_edges // 10)
    g = torch.Generator().manual_seed(seed)
    s = torch.randint(0, n, (num_edges,), generator=g)
    t = torch.randint(0, n, (num_edges,), generator=g)
    return DirectedGraph(s, t, num_nodes=n)


def fwd_bwd_times(cases: dict, grad: torch.Tensor, repeats: int, warmup: int = 1,
                  max_seconds: float | None = None) -> dict:
    """Round-robin timing of forward and backward separately for each case.

    Each case is ``(forward, inputs)``: ``forward()`` returns y with a graph back to
    ``inputs`` (tensors whose .grad is cleared, untimed, before every run).
    Returns ``{name: {"forward": median, "backward": median, "total": median}}``.
    """
    def once(forward, inputs):
        for t in inputs:
            t.grad = None
        t0 = time.perf_counter()
        y = forward()
        t1 = time.perf_counter()
        y.backward(grad)
        t2 = time.perf_counter()
        return t1 - t0, t2 - t1

    for _ in range(warmup):
        for forward, inputs in cases.values():
            once(forward, inputs)
    rec = {name: ([], []) for name in cases}
    spent = 0.0
    gc.disable()
    try:
        for _ in range(max(1, repeats)):
            for name, (forward, inputs) in cases.items():
                f, b = once(forward, inputs)
                rec[name][0].append(f)
                rec[name][1].append(b)
                spent += f + b
            if max_seconds is not None and spent > max_seconds:
                break
    finally:
        gc.enable()
    out = {}
    for name, (fs, bs) in rec.items():
        out[name] = {"forward": float(np.median(fs)), "backward": float(np.median(bs)),
                     "total": float(np.median(np.add(fs, bs))), "repeats": len(fs)}
    return out


def gather_scatter_factory(op, x):
    """A user's gather-scatter product y[r] += v * x[c] (index_select + index_add_)."""
    m = op.matrix
    crow, col, val = m.crow_indices(), m.col_indices(), m.values().detach()
    rows = torch.repeat_interleave(torch.arange(op.num_rows), crow.diff())

    def forward():
        msg = x.index_select(0, col) * val[:, None]
        return torch.zeros(x.shape, dtype=msg.dtype).index_add_(0, rows, msg)

    return forward


def plan(num_edges: int, repeats: int) -> dict:
    """What runs at each size so the full grid fits its time budget on 2 shared cores."""
    if num_edges >= 5_000_000:
        return {"repeats": 1, "warmup": 0, "builtin": False, "gather": False}
    if num_edges >= 1_000_000:
        return {"repeats": min(repeats, 2), "warmup": 0, "builtin": True, "gather": num_edges == 2_000_000}
    return {"repeats": repeats, "warmup": 1, "builtin": True, "gather": True}


def bench_size(num_edges: int, repeats: int, quick: bool) -> dict:
    t0 = time.perf_counter()
    graph = random_graph(num_edges)
    op = operators.magnetic_laplacian(graph, 0.25, dtype=DTYPE)
    build = time.perf_counter() - t0
    n, nnz = op.num_rows, op.nnz
    g = torch.Generator().manual_seed(1)
    x = torch.randn(n, F, dtype=DTYPE, generator=g)
    grad = torch.randn(n, F, dtype=DTYPE, generator=g)
    m = op.matrix

    how = plan(num_edges, repeats)
    xo = x.clone().requires_grad_()
    cases = {"ours": (lambda: hermitian_matmul(op, xo), [xo])}
    if how["builtin"]:
        xb = x.clone().requires_grad_()
        cases["builtin"] = (lambda: torch.sparse.mm(m, xb), [xb])
    gather_bytes = nnz * F * x.element_size()
    slow = {}
    if how["gather"] and gather_bytes <= GATHER_LIMIT_BYTES:
        xg = x.clone().requires_grad_()
        # the slowest variant: timed round-robin with the others at small sizes, once at large
        (slow if num_edges >= 1_000_000 else cases)["gather"] = (gather_scatter_factory(op, xg), [xg])
    if n <= DENSE_LIMIT_N:
        dense = op.to_dense()
        xd = x.clone().requires_grad_()
        cases["dense"] = (lambda: dense @ xd, [xd])
    res = fwd_bwd_times(cases, grad, repeats=how["repeats"], warmup=how["warmup"],
                        max_seconds=None if quick else 60.0)
    if slow:
        res.update(fwd_bwd_times(slow, grad, repeats=1, warmup=0))
        cases.update(slow)
    # correctness of every variant against ours (same product)
    with torch.no_grad():
        ref = hermitian_matmul(op, x)
        errs = {name: float((fwd() - ref).abs().max() / ref.abs().max()) for name, (fwd, _) in cases.items()}
    op_bytes = nnz * (x.element_size() + 8) + (n + 1) * 8
    compulsory = op_bytes + 2 * n * F * x.element_size()
    row = {"E": num_edges, "N": n, "nnz": nnz, "build_s": build}
    for name, r in res.items():
        row[f"{name}_fwd_s"] = r["forward"]
        row[f"{name}_bwd_s"] = r["backward"]
        row[f"{name}_total_s"] = r["total"]
        row[f"{name}_rel_err"] = errs[name]
    row["repeats"] = res["ours"]["repeats"]
    row["bytes_compulsory"] = compulsory
    row["bytes_gathered"] = gather_bytes + op_bytes + n * F * x.element_size()
    row["ours_fwd_GBps_compulsory"] = compulsory / row["ours_fwd_s"] / 1e9
    row["ours_fwd_GBps_gathered"] = row["bytes_gathered"] / row["ours_fwd_s"] / 1e9
    if "builtin" in res:
        row["fwd_speedup_vs_builtin"] = row["builtin_fwd_s"] / row["ours_fwd_s"]
        row["bwd_speedup_vs_builtin"] = row["builtin_bwd_s"] / row["ours_bwd_s"]
        row["total_speedup_vs_builtin"] = row["builtin_total_s"] / row["ours_total_s"]
    if "gather" in res:
        row["total_speedup_vs_gather"] = row["gather_total_s"] / row["ours_total_s"]
    if "dense" in res:
        row["total_speedup_vs_dense"] = row["dense_total_s"] / row["ours_total_s"]
    del cases, res
    gc.collect()
    return row, graph


def bench_charge(graph: DirectedGraph, repeats: int) -> dict:
    """magnetic_matmul forward+backward (q and x grads) against hermitian_matmul fwd+bwd."""
    n = graph.num_nodes
    g = torch.Generator().manual_seed(2)
    x = torch.randn(n, F, dtype=DTYPE, generator=g)
    grad = torch.randn(n, F, dtype=DTYPE, generator=g)
    op = operators.magnetic_laplacian(graph, 0.25, dtype=DTYPE)
    q = torch.tensor(0.25, requires_grad=True)
    xm = x.clone().requires_grad_()
    xh = x.clone().requires_grad_()
    xr = x.real.contiguous().requires_grad_()
    xhr = x.real.contiguous().requires_grad_()
    cases = {
        "plain": (lambda: hermitian_matmul(op, xh), [xh]),
        "charge": (lambda: learned_charge.magnetic_matmul(graph, q, xm), [xm, q]),
        "plain_real_x": (lambda: hermitian_matmul(op, xhr), [xhr]),
        "charge_real_x": (lambda: learned_charge.magnetic_matmul(graph, q, xr), [xr, q]),
    }
    big = graph.num_edges >= 1_000_000
    res = fwd_bwd_times(cases, grad, repeats=min(repeats, 2) if big else repeats, warmup=0 if big else 1,
                        max_seconds=60.0)
    with torch.no_grad():
        err = float((learned_charge.magnetic_matmul(graph, q, x) - hermitian_matmul(op, x)).abs().max())
    out = {"E": graph.num_edges, "N": n, "nnz": op.nnz, "max_abs_diff": err}
    for name, r in res.items():
        out[f"{name}_fwd_s"] = r["forward"]
        out[f"{name}_bwd_s"] = r["backward"]
        out[f"{name}_total_s"] = r["total"]
    out["charge_over_plain"] = out["charge_total_s"] / out["plain_total_s"]
    out["charge_over_plain_real_x"] = out["charge_real_x_total_s"] / out["plain_real_x_total_s"]
    return out


def slope(xs, ys) -> float:
    lx, ly = np.log(np.asarray(xs, float)), np.log(np.asarray(ys, float))
    return float(np.polyfit(lx, ly, 1)[0])


def main(argv=None):
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--quick", action="store_true", help="tiny grid, a few seconds")
    p.add_argument("--max-edges", type=float, default=1e7, help="largest E in the full grid (default 1e7)")
    p.add_argument("--repeats", type=int, default=3, help="timed repeats per case (default 3)")
    p.add_argument("--threads", type=int, default=2, help="torch intra-op threads (default 2)")
    p.add_argument("--out", default=None, help="results name (default kernels, or kernels_quick with --quick)")
    args = p.parse_args(argv)
    torch.set_num_threads(args.threads)
    start = time.perf_counter()
    if args.quick:
        sizes = [10_000, 40_000]
        charge_sizes = [40_000]
        repeats = 2
    else:
        sizes = [s for s in (10_000, 40_000, 100_000, 1_000_000, 2_000_000, 10_000_000)
                 if s <= args.max_edges]
        charge_sizes = [s for s in (100_000, 1_000_000) if s <= args.max_edges]
        repeats = args.repeats
    bw = copy_bandwidth(1 << 27 if args.quick else 1 << 28)
    print(f"copy bandwidth (read + write): {bw / 1e9:.1f} GB/s; torch {torch.__version__}, "
          f"{torch.get_num_threads()} threads, load {os.getloadavg()[0]:.1f}")
    rows, charge_rows = [], []
    for e in sizes:
        row, graph = bench_size(e, repeats, args.quick)
        rows.append(row)
        print(f"E={e:.0e}: ours fwd {row['ours_fwd_s']:.4f}s bwd {row['ours_bwd_s']:.4f}s | builtin fwd "
              f"{row.get('builtin_fwd_s', float('nan')):.4f}s bwd {row.get('builtin_bwd_s', float('nan')):.4f}s "
              f"({time.perf_counter() - start:.0f}s)", flush=True)
        if e in charge_sizes:
            charge_rows.append(bench_charge(graph, repeats))
        del graph
        gc.collect()
    bw_after = copy_bandwidth(1 << 27 if args.quick else 1 << 28)

    cols = ["E", "N", "nnz", "repeats", "ours_fwd_s", "ours_bwd_s", "builtin_fwd_s", "builtin_bwd_s",
            "fwd_speedup_vs_builtin", "bwd_speedup_vs_builtin", "total_speedup_vs_builtin", "gather_total_s", "total_speedup_vs_gather",
            "dense_total_s", "total_speedup_vs_dense"]
    print_table(rows, cols, title="hermitian_matmul, complex64, F = 64 (seconds, medians)")
    print_table(rows, ["E", "ours_fwd_s", "ours_fwd_GBps_compulsory", "ours_fwd_GBps_gathered"],
                title=f"effective bandwidth of the forward (copy bandwidth {bw / 1e9:.1f} / {bw_after / 1e9:.1f} GB/s before/after)")
    if charge_rows:
        print_table(charge_rows, ["E", "N", "plain_total_s", "charge_total_s", "charge_over_plain",
                                  "plain_real_x_total_s", "charge_real_x_total_s", "charge_over_plain_real_x"],
                    title="charge gradient: magnetic_matmul fwd+bwd (q and x) over hermitian_matmul fwd+bwd")

    big = [r for r in rows if r["E"] >= 100_000]
    summary = {"copy_GBps_before": bw / 1e9, "copy_GBps_after": bw_after / 1e9}
    if len(big) >= 2:
        es = [r["E"] for r in big]
        summary["slope_range_E"] = [min(es), max(es)]
        summary["slope_ours_fwd"] = slope(es, [r["ours_fwd_s"] for r in big])
        summary["slope_ours_total"] = slope(es, [r["ours_total_s"] for r in big])
        large = [r for r in rows if r["E"] >= 1_000_000]
        if len(large) >= 2:  # past the caches: x no longer fits, every gather misses
            summary["slope_ours_fwd_from_1e6"] = slope([r["E"] for r in large], [r["ours_fwd_s"] for r in large])
            summary["slope_ours_total_from_1e6"] = slope([r["E"] for r in large], [r["ours_total_s"] for r in large])
    target = [r for r in rows if r["E"] == 2_000_000]
    if target:
        t = target[0]
        summary["target_bwd_speedup_vs_builtin_at_2e6"] = t["bwd_speedup_vs_builtin"]
        summary["target_total_speedup_vs_gather_at_2e6"] = t.get("total_speedup_vs_gather")
    if charge_rows:
        summary["charge_over_plain"] = {str(r["E"]): r["charge_over_plain"] for r in charge_rows}
    summary["wall_s"] = time.perf_counter() - start
    print("summary:", {k: (round(v, 3) if isinstance(v, float) else v) for k, v in summary.items()})
    name = args.out or ("kernels_quick" if args.quick else "kernels")
    write_results(name, {"settings": {"F": F, "dtype": str(DTYPE), "sizes": sizes, "repeats": repeats,
                                      "graph": "uniform random directed, N = E / 10",
                                      "operator": "normalized magnetic Laplacian, q = 0.25"},
                         "rows": rows, "charge": charge_rows, "summary": summary},
                  argv=sys.argv)


if __name__ == "__main__":
    main()

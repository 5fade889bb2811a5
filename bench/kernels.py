"""Sparse products: the native kernels against the torch path and a user's gather-scatter, in one process.

Operator: the normalized magnetic Laplacian at q = 0.25 (complex64, Hermitian), F = 64
complex64 features. Variants, timed round-robin (``_common.interleaved_times``, medians):

* ``native``: ``op.matmul(x)``, the numba kernel (phasorgraph._native) behind the custom op;
* ``torch``: the same call inside ``sparse.native_kernels(False)``: the package's earlier path
  (two real ``torch.sparse.mm(..., "sum")`` products of the real and imaginary parts on
  ``view_as_real`` features, combined as a + i b), kept as the reference and for other devices;
* ``gather``: what a user writes without the package: ``index_select`` of x's rows, a multiply
  by the values and ``index_add_`` into y.

Sections:

1. Locality graph: a 500 x 500 one-way grid (edges to the right and lower neighbour), ids
   shuffled by a seeded permutation and put back in order by ``DirectedGraph.locality_order()``.
   Effective bandwidth of the forward product from the compulsory bytes (values + column
   indices + row pointers, x read once, y written once) against a ``copy_`` bandwidth measured
   in the same run (read + write); also forward + backward.
2. Uniform random graph, N = 2e5, E = 2e6 (no locality: cache misses dominate).
3. Slope: forward time of the native kernel against E from 1e5 to 1e7 on banded random graphs
   (E edges on N = E / 10 nodes, each target within 50 ids of its source: locality by
   construction), and the log-log slope of a least-squares fit.
4. Start cost of the kernels in a fresh process: cold (empty numba cache: compilation) and
   warm (cache on disk), for ``import phasorgraph`` plus the first complex product.

Usage: ``python bench/kernels.py [--quick] [--threads 2] [--max-edges 1e7]``; writes
bench/results/kernels.json (kernels_<T>thread.json for other thread counts; ``--quick``: a
``_quick`` name, small sizes, a few seconds).
"""

from __future__ import annotations

import argparse
import math
import os
import subprocess
import sys
import tempfile
import time
import warnings

import numpy as np
import torch

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from _common import copy_bandwidth, interleaved_times, print_table, write_results  # noqa: E402

from phasorgraph import operators  # noqa: E402
from phasorgraph.graph import DirectedGraph  # noqa: E402
from phasorgraph.sparse import native_kernels  # noqa: E402

# the banded and random graphs sum repeated edges into weights > 1: the phase may wrap, which
# changes nothing about the cost of a product
warnings.filterwarnings("ignore", message="phase='difference' with charge")

F = 64
DTYPE = torch.complex64
CHARGE = 0.25


# ---------------------------------------------------------------------- graphs
def grid_graph(side: int, seed: int = 0) -> DirectedGraph:
    """One-way grid: u -> right neighbour and u -> lower neighbour; ids shuffled, then locality_order()."""
    idx = np.arange(side * side).reshape(side, side)
    src = np.concatenate([idx[:, :-1].ravel(), idx[:-1, :].ravel()])
    dst = np.concatenate([idx[:, 1:].ravel(), idx[1:, :].ravel()])
    perm = np.random.default_rng(seed).permutation(side * side)  # a shuffled numbering
    g = DirectedGraph(torch.from_numpy(perm[src]), torch.from_numpy(perm[dst]), num_nodes=side * side)
    ordered, _ = g.locality_order()
    return ordered


def random_graph(num_edges: int, seed: int = 0) -> DirectedGraph:
    n = max(2, num_edges // 10)
    gen = torch.Generator().manual_seed(seed)
    return DirectedGraph(torch.randint(0, n, (num_edges,), generator=gen),
                         torch.randint(0, n, (num_edges,), generator=gen), num_nodes=n)


def banded_graph(num_edges: int, width: int = 50, seed: int = 0) -> DirectedGraph:
    """E edges on N = E / 10 nodes, each target within ``width`` ids of its source."""
    n = max(2 * width + 2, num_edges // 10)
    rng = np.random.default_rng(seed)
    src = rng.integers(0, n, num_edges)
    dst = np.clip(src + rng.integers(-width, width + 1, num_edges), 0, n - 1)
    return DirectedGraph(torch.from_numpy(src), torch.from_numpy(dst), num_nodes=n)


# ---------------------------------------------------------------------- variants
def gather_scatter(op):
    """A user's product y[r] += v * x[c] with index_select + index_add_ (autograd-able)."""
    m = op.matrix
    crow, col, val = m.crow_indices(), m.col_indices(), m.values().detach()
    rows = torch.repeat_interleave(torch.arange(op.num_rows), crow.diff())

    def product(x):
        msg = x.index_select(0, col) * val[:, None]
        return torch.zeros(x.shape, dtype=msg.dtype).index_add_(0, rows, msg)

    return product


def native(op):
    def product(x):
        with native_kernels(True):
            return op.matmul(x)
    return product


def torch_path(op):
    def product(x):
        with native_kernels(False):
            return op.matmul(x)
    return product


def kernel_into(op, x):
    """The numba kernel alone, writing into one preallocated y: what the product costs without
    the first touch of a fresh output tensor (not a usable product: no autograd, y reused)."""
    from phasorgraph import _native

    m = op.matrix
    crow, col = m.crow_indices().numpy(), m.col_indices().numpy()
    vals = m.values().clone()
    vre, vim = vals.real.contiguous().numpy(), vals.imag.contiguous().numpy()
    xb = torch.view_as_real(x.contiguous()).reshape(x.shape[0], 2 * x.shape[1]).numpy()
    y = torch.empty_like(x)
    yb = torch.view_as_real(y).reshape(y.shape[0], 2 * y.shape[1]).numpy()
    bounds = _native.row_blocks(crow, _native.set_threads(torch.get_num_threads()))
    one, zero = np.float32(1), np.float32(0)
    ahead = _native.lookahead(crow, col, xb.shape[1] * xb.itemsize)

    def run():
        _native.csr_complex(bounds, crow, col, vre, vim, xb, yb, yb, one, zero, zero, False, ahead)
        return y

    return run


def compulsory_bytes(op, x) -> int:
    """values (complex64) + column indices (int64) + row pointers, x once, y once."""
    n, nnz = op.num_rows, op.nnz
    return nnz * (8 + 8) + (n + 1) * 8 + 2 * x.numel() * x.element_size()


def forward_backward(product, x, grad):
    def run():
        xg = x.detach().requires_grad_()
        product(xg).backward(grad)
    return run


def compare(op, x, variants, repeats, with_backward=True):
    """Forward (and forward + backward) medians of each variant, round-robin; checks agreement."""
    ref = variants["native"](x)
    errors = {}
    for name, p in variants.items():
        errors[name] = float((p(x) - ref).abs().max() / ref.abs().max())
    fwd = interleaved_times({name: (lambda p=p: p(x)) for name, p in variants.items()}, repeats=repeats, warmup=1)
    out = {name: {"forward_s": fwd[name]["median"], "max_rel_diff": errors[name]} for name in variants}
    out["native"]["ref"] = ref
    if with_backward:
        grad = torch.randn_like(x)
        both = interleaved_times({name: forward_backward(p, x, grad) for name, p in variants.items()},
                                 repeats=repeats, warmup=1)
        for name in variants:
            out[name]["fwd_bwd_s"] = both[name]["median"]
    return out


def features(n: int, seed: int = 1) -> torch.Tensor:
    g = torch.Generator().manual_seed(seed)
    return torch.complex(torch.randn(n, F, generator=g), torch.randn(n, F, generator=g))


# ---------------------------------------------------------------------- start cost
_START = (
    "import time; t0 = time.perf_counter(); import torch, phasorgraph; t1 = time.perf_counter(); "
    "from phasorgraph import DirectedGraph, operators; "
    "g = DirectedGraph.from_edges([[0, 1, 2], [1, 2, 0]]); "
    "op = operators.magnetic_laplacian(g, 0.25, dtype=torch.complex64); x = torch.ones(3, 4, dtype=torch.complex64); "
    "t2 = time.perf_counter(); op.matmul(x); t3 = time.perf_counter(); "
    "print(t1 - t0, t3 - t2)"
)


def start_cost() -> dict:
    """Seconds for import and for the first complex product, with an empty and a filled numba cache."""
    out = {}
    with tempfile.TemporaryDirectory() as cache:
        env = dict(os.environ, NUMBA_CACHE_DIR=cache)
        for label in ("cold", "warm"):
            res = subprocess.run([sys.executable, "-c", _START], env=env, capture_output=True, text=True, check=True)
            imp, first = (float(v) for v in res.stdout.split())
            out[label] = {"import_s": imp, "first_product_s": first}
    return out


# ---------------------------------------------------------------------- main
def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="small sizes, a few seconds")
    parser.add_argument("--threads", type=int, default=2, help="torch (and kernel) threads (default 2)")
    parser.add_argument("--max-edges", type=float, default=1e7, help="largest E of the slope (default 1e7)")
    parser.add_argument("--repeats", type=int, default=5)
    args = parser.parse_args(argv)
    torch.set_num_threads(args.threads)
    quick = args.quick
    repeats = 2 if quick else args.repeats
    t_start = time.perf_counter()
    load_before = os.getloadavg()[0]
    bw_before = copy_bandwidth(1 << 24 if quick else 1 << 28)

    # 1. locality graph
    side = 40 if quick else 500
    g = grid_graph(side)
    op = operators.magnetic_laplacian(g, CHARGE, dtype=DTYPE)
    x = features(op.num_rows)
    variants = {"native": native(op), "torch": torch_path(op), "gather": gather_scatter(op)}
    res = compare(op, x, variants, repeats)
    bw_after = copy_bandwidth(1 << 24 if quick else 1 << 28)
    copy_bw = max(bw_before, bw_after)
    nbytes = compulsory_bytes(op, x)
    grid_rows = []
    for name, r in res.items():
        gbs = nbytes / r["forward_s"] / 1e9
        grid_rows.append({"graph": f"grid {side}x{side} (locality order)", "N": op.num_rows, "nnz": op.nnz,
                          "variant": name, "forward_s": r["forward_s"], "fwd_bwd_s": r["fwd_bwd_s"],
                          "GB_per_s": gbs, "fraction_of_copy": gbs * 1e9 / copy_bw,
                          "native_speedup_fwd": r["forward_s"] / res["native"]["forward_s"],
                          "native_speedup_fwd_bwd": r["fwd_bwd_s"] / res["native"]["fwd_bwd_s"],
                          "max_rel_diff": r["max_rel_diff"]})
    # the kernel alone into a preallocated y, timed round-robin against the full product
    into = kernel_into(op, x)
    assert float((into() - res["native"]["ref"]).abs().max()) == 0.0
    alone = interleaved_times({"native": lambda: variants["native"](x), "into": into}, repeats=repeats, warmup=1)
    gbs = nbytes / alone["into"]["median"] / 1e9
    grid_rows.append({"graph": f"grid {side}x{side} (locality order)", "N": op.num_rows, "nnz": op.nnz,
                      "variant": "kernel into preallocated y", "forward_s": alone["into"]["median"],
                      "fwd_bwd_s": float("nan"), "GB_per_s": gbs, "fraction_of_copy": gbs * 1e9 / copy_bw,
                      "native_speedup_fwd": alone["into"]["median"] / alone["native"]["median"],
                      "native_speedup_fwd_bwd": float("nan"), "max_rel_diff": 0.0})
    print_table(grid_rows, title=f"Locality graph, complex64 F={F}, copy bandwidth {copy_bw / 1e9:.1f} GB/s, "
                                 f"THP_MEM_ALLOC_ENABLE={os.environ.get('THP_MEM_ALLOC_ENABLE')}")
    del op, x, variants, g

    # 2. uniform random graph
    e_rand = 20_000 if quick else 2_000_000
    g = random_graph(e_rand)
    op = operators.magnetic_laplacian(g, CHARGE, dtype=DTYPE)
    x = features(op.num_rows)
    variants = {"native": native(op), "torch": torch_path(op), "gather": gather_scatter(op)}
    res = compare(op, x, variants, max(2, repeats - 2))
    rand_rows = []
    for name, r in res.items():
        rand_rows.append({"graph": f"uniform random E={e_rand:.0e}", "N": op.num_rows, "nnz": op.nnz,
                          "variant": name, "forward_s": r["forward_s"], "fwd_bwd_s": r["fwd_bwd_s"],
                          "GB_per_s": compulsory_bytes(op, x) / r["forward_s"] / 1e9,
                          "native_speedup_fwd": r["forward_s"] / res["native"]["forward_s"],
                          "native_speedup_fwd_bwd": r["fwd_bwd_s"] / res["native"]["fwd_bwd_s"],
                          "max_rel_diff": r["max_rel_diff"]})
    print_table(rand_rows, title="Uniform random graph")
    del op, x, variants, g

    # 3. slope on banded (locality-ordered) graphs
    sizes = [20_000, 60_000] if quick else [e for e in (100_000, 300_000, 1_000_000, 3_000_000, 10_000_000)
                                           if e <= args.max_edges]
    slope_rows = []
    for e in sizes:
        g = banded_graph(e)
        op = operators.magnetic_laplacian(g, CHARGE, dtype=DTYPE)
        x = features(op.num_rows)
        p = native(op)
        t = interleaved_times({"native": lambda: p(x)}, repeats=repeats if e < 3_000_000 else 3, warmup=1)["native"]
        slope_rows.append({"edges": e, "N": op.num_rows, "nnz": op.nnz, "native_forward_s": t["median"],
                           "GB_per_s": compulsory_bytes(op, x) / t["median"] / 1e9})
        del g, op, x, p
    le, lt = np.log([r["edges"] for r in slope_rows]), np.log([r["native_forward_s"] for r in slope_rows])
    slope = float(np.polyfit(le, lt, 1)[0])
    print_table(slope_rows, title=f"Banded graphs (width 50), native forward: log-log slope {slope:.3f}")

    # 4. start cost (two fresh processes; not in --quick)
    start = {} if quick else start_cost()
    if start:
        print_table([{"cache": k, **v} for k, v in start.items()], title="Fresh process: import and first complex product")

    grid_native = next(r for r in grid_rows if r["variant"] == "native")
    grid_torch = next(r for r in grid_rows if r["variant"] == "torch")
    rand_torch = next(r for r in rand_rows if r["variant"] == "torch")
    targets = {
        "grid_fraction_of_copy": grid_native["fraction_of_copy"],
        "grid_speedup_vs_torch_path_fwd": grid_torch["native_speedup_fwd"],
        "random_speedup_vs_torch_path_fwd": rand_torch["native_speedup_fwd"],
        "slope_1e5_1e7": slope,
    }
    print("targets:", {k: round(v, 3) for k, v in targets.items()})
    name = "kernels" if args.threads == 2 else f"kernels_{args.threads}thread"
    write_results(name + "_quick" if quick else name, {
        "description": __doc__.splitlines()[0], "features": F, "dtype": str(DTYPE), "threads": args.threads,
        "copy_bandwidth_bytes_per_s": copy_bw, "copy_bandwidth_before_after": [bw_before, bw_after],
        "load_average_1m_before_after": [load_before, os.getloadavg()[0]],
        "THP_MEM_ALLOC_ENABLE": os.environ.get("THP_MEM_ALLOC_ENABLE"),
        "locality": grid_rows, "random": rand_rows, "slope_rows": slope_rows, "slope": slope,
        "start_cost": start, "targets": targets, "seconds_total": time.perf_counter() - t_start,
    }, argv=sys.argv)


if __name__ == "__main__":
    main()

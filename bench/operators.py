"""Build time and peak memory of the normalized magnetic Laplacian, as a ratio to scipy.

For E random directed edges on N = E / 10 nodes (seeded; weights uniform in (0, 1], the regime
of ``phase="difference"``), one process times

* ``ours``: ``magnetic_laplacian(graph, 0.25)`` on a graph whose operator cache was cleared, so
  the symmetrization (the union pattern of A and A^T), the phases and the CSR assembly are
  all in the timed body (default dtype complex64);
* ``ours c128``: the same in complex128;
* ``ours, cached pattern``: a second charge on the same graph (the union pattern is cached);
* ``scipy``: ``scipy.sparse.csgraph.laplacian(As, normed=True)`` on the already symmetrized
  float64 CSR matrix ``As = (A + A^T) / 2`` (built outside the timed body);
* ``scipy + symmetrize``: ``laplacian(((A + A.T) * 0.5).tocsr(), normed=True)``, what a user
  would write starting from A, like ours does.

Each ratio is a median time over the median of ``scipy``, all timed round-robin in the same
process (``_common.interleaved_times``), so load from other processes hits every variant
alike. Setup (graph, scipy matrices) is seeded and outside the timed bodies.

Peak memory: the growth of the process's peak resident set size during one call, read from
Linux ``/proc/self/status`` (VmHWM) after resetting the peak through ``/proc/self/clear_refs``
and returning freed heap to the system (``malloc_trim``). Resident-set accounting sees numpy,
scipy and torch allocations alike; ``tracemalloc`` would miss torch's, so it is not used. The
figure includes the result itself. Where /proc is unavailable the memory columns are empty.

Usage::

    .venv/bin/python bench/operators.py           # E = 1e5, 1e6, 1e7 (2-4 minutes)
    .venv/bin/python bench/operators.py --quick   # E = 1e4, 1e5 (a few seconds)
"""

from __future__ import annotations

import argparse
import ctypes
import gc
import os
import re
import sys

import numpy as np
import torch
from scipy.sparse.csgraph import laplacian

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from _common import interleaved_times, print_table, write_results  # noqa: E402

from phasorgraph import DirectedGraph, magnetic_laplacian  # noqa: E402


def _status_kib(field: str):
    try:
        with open("/proc/self/status") as fh:
            m = re.search(rf"^{field}:\s+(\d+) kB", fh.read(), re.MULTILINE)
        return int(m.group(1)) if m else None
    except OSError:
        return None


def _trim():
    gc.collect()
    try:
        ctypes.CDLL("libc.so.6").malloc_trim(0)
    except (OSError, AttributeError):
        pass


def peak_extra_mib(fn):
    """Growth of the peak resident set size (MiB) while ``fn()`` runs, or None without /proc."""
    _trim()
    before = _status_kib("VmRSS")
    try:
        with open("/proc/self/clear_refs", "w") as fh:
            fh.write("5")  # reset VmHWM to the current RSS (Linux >= 4.0)
    except OSError:
        return None
    out = fn()
    peak = _status_kib("VmHWM")
    del out
    _trim()
    if before is None or peak is None:
        return None
    return (peak - before) / 1024.0


def case(num_edges: int, repeats: int, warmup: int = 1, complex128: bool = True, seed: int = 0):
    n = max(1, num_edges // 10)
    rng = np.random.default_rng(seed)
    src = rng.integers(0, n, num_edges)
    dst = rng.integers(0, n, num_edges)
    w = 1.0 - rng.random(num_edges)  # uniform in (0, 1]
    build = interleaved_times({"graph": lambda: DirectedGraph(src, dst, w, n)}, repeats=1, warmup=0)
    g = DirectedGraph(src, dst, w, n)
    A = g.to_scipy("csr")
    As = ((A + A.T) * 0.5).tocsr()

    def ours():
        g._cache.clear()
        return magnetic_laplacian(g, 0.25)

    def ours128():
        g._cache.clear()
        return magnetic_laplacian(g, 0.25, dtype=torch.complex128)

    def ours_cached():
        return magnetic_laplacian(g, 0.1)

    def scipy_only():
        return laplacian(As, normed=True)

    def scipy_sym():
        return laplacian(((A + A.T) * 0.5).tocsr(), normed=True)

    fns = {"ours": ours, "ours c128": ours128, "ours, cached pattern": ours_cached,
           "scipy": scipy_only, "scipy + symmetrize": scipy_sym}
    if not complex128:
        del fns["ours c128"]
    memory = {}
    for name in fns:
        if name != "ours, cached pattern":
            memory[name] = peak_extra_mib(fns[name])
    magnetic_laplacian(g, 0.1)  # fill the cache used by "ours, cached pattern"
    times = interleaved_times(fns, repeats=repeats, warmup=warmup)
    op = ours()
    base = times["scipy"]["median"]
    rows = []
    for name in fns:
        mem = memory.get(name)
        rows.append({
            "edges": num_edges, "nodes": n, "variant": name,
            "seconds": times[name]["median"], "ratio_to_scipy": times[name]["median"] / base,
            "peak_MiB": mem,
            "memory_ratio": None if (mem is None or not memory["scipy"]) else mem / memory["scipy"],
            "repeats": times[name]["repeats"],
        })
    info = {"edges": num_edges, "nodes": n, "graph_build_seconds": build["graph"]["median"],
            "operator_nnz": op.nnz, "scipy_input_nnz": int(As.nnz)}
    return rows, info


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="small grid (a few seconds)")
    parser.add_argument("--threads", type=int, default=2, help="torch intra-op threads (default 2)")
    args = parser.parse_args(argv)
    torch.set_num_threads(args.threads)
    # (edges, repeats, warmup, with complex128): fewer repeats, no warm-up run and no
    # complex128 variant at 1e7 edges keep the full run under 5 minutes on 2 shared cores
    grid = ([(10_000, 5, 1, True), (100_000, 5, 1, True)] if args.quick else
            [(100_000, 7, 1, True), (1_000_000, 5, 1, True), (10_000_000, 3, 0, False)])
    case(1_000, 1)  # first calls load modules and caches; keep that out of every measurement
    rows, infos = [], []
    for num_edges, repeats, warmup, c128 in grid:
        r, info = case(num_edges, repeats, warmup, c128)
        rows += r
        infos.append(info)
        print_table(r, ["edges", "nodes", "variant", "seconds", "ratio_to_scipy", "peak_MiB", "memory_ratio", "repeats"],
                    title=f"E = {num_edges:.0e}: normalized magnetic Laplacian build vs scipy laplacian(normed=True)")
    print_table(infos, ["edges", "nodes", "graph_build_seconds", "operator_nnz", "scipy_input_nnz"],
                title="DirectedGraph construction from raw edges (not in the ratios)")
    write_results("operators", {"quick": args.quick, "threads": args.threads, "rows": rows, "graphs": infos},
                  argv=sys.argv)


if __name__ == "__main__":
    main()

"""MagneticFilter forward + backward: time and peak memory against a user-written layer.

For each size (E directed edges on N = E / 10 nodes, uniform random endpoints, unit weights)
this script times one forward + backward of ``MagneticFilter(64, 64, order=3)`` on complex64
features that require grad, with a fixed charge (operator cached per graph, as in training)
and with a learned charge (operator values rebuilt from q on every forward), against the
same layer written the way a user would without this package, in the same process:

* N <= 4096: dense. The (N, N) complex Laplacian as a dense tensor (rebuilt from q with
  torch ops when the charge is learned) and dense matmuls; autograd does the rest.
* N > 4096: gather-scatter. ``out.index_add_(0, rows, vals[:, None] * t.index_select(0, cols))``
  on the non-zeros; autograd does the rest.

Both compute the same Chebyshev recursion T_k = 2 L~ T_(k-1) - T_(k-2), L~ = L(q) - I (the
normalized magnetic Laplacian has spectrum in [0, 2]); the script checks the two outputs agree.

Peak memory: the high-water mark of the resident set during one forward + backward, reset
before the call through /proc/self/clear_refs (Linux), minus the resident set just before it
(graph, features, upstream gradient and, for the fixed charge, the cached operator already
resident: the cached operator's bytes are added back). glibc is told to serve blocks above
256 KiB with mmap (MALLOC_MMAP_THRESHOLD_, set by re-executing the script), so freed
temporaries leave the resident set and the high-water mark is that of live memory. It is
compared with the model ``operator bytes + (order + 2) feature blocks`` (K new Chebyshev
terms, the output and the input gradient; one block = N x 64 complex64), target within 1.5x.

Usage: .venv/bin/python bench/layers.py [--quick] [--max-edges E]
"""

from __future__ import annotations

import argparse
import gc
import math
import os
import sys
import time

_MMAP = "262144"
if os.environ.get("MALLOC_MMAP_THRESHOLD_") != _MMAP and sys.platform.startswith("linux"):
    env = dict(os.environ, MALLOC_MMAP_THRESHOLD_=_MMAP)
    os.execve(sys.executable, [sys.executable] + sys.argv, env)

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))

import torch  # noqa: E402

from _common import print_table, write_results  # noqa: E402
from phasorgraph import DirectedGraph, magnetic_laplacian  # noqa: E402
from phasorgraph.nn import LearnedCharge, MagneticFilter  # noqa: E402
from phasorgraph.sparse import native_kernels  # noqa: E402

CHANNELS = 64
ORDER = 3
CHARGE = 0.25
DENSE_LIMIT = 4096
#: skip a user-written baseline whose autograd temporaries would exceed this (shared machine)
BASELINE_BYTES_LIMIT = 10 * 2**30
#: stop repeating a timing once its runs have used this many seconds
MAX_SECONDS = 4.0


# ---------------------------------------------------------------------- memory probes (Linux)
def _status_kib(field: str) -> int:
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith(field + ":"):
                return int(line.split()[1])
    return 0


def _reset_peak() -> int | None:
    """Reset the resident high-water mark; return the resident KiB now (None if unsupported)."""
    try:
        with open("/proc/self/clear_refs", "w") as fh:
            fh.write("5")
        return _status_kib("VmRSS")
    except OSError:
        return None


def timed_with_peak(fn, repeats: int, max_seconds: float, warmup: int = 0) -> dict:
    """Median seconds of ``fn()`` (``warmup`` untimed runs, then up to ``repeats`` runs or until
    ``max_seconds`` is spent) and the largest high-water resident bytes above the resident set
    just before a run. GC is collected before and paused during each run."""
    for _ in range(warmup):
        fn()
    times, peaks = [], []
    for _ in range(max(1, repeats)):
        gc.collect()
        gc.disable()
        try:
            before = _reset_peak()
            t0 = time.perf_counter()
            fn()
            times.append(time.perf_counter() - t0)
            if before is not None:
                peaks.append((_status_kib("VmHWM") - before) * 1024.0)
        finally:
            gc.enable()
        if sum(times) >= max_seconds:
            break
    times.sort()
    return {"median": times[len(times) // 2], "repeats": len(times), "peak": max(peaks) if peaks else None}


# ---------------------------------------------------------------------- the user's version
def user_pattern(graph: DirectedGraph):
    """rows, cols, |value| and A - A^T on the non-zeros of -D^-1/2 H D^-1/2, with plain torch."""
    n = graph.num_nodes
    s, t, w = graph.source, graph.target, graph.weight
    idx = torch.stack([torch.cat([s, t]), torch.cat([t, s])])
    sym = torch.sparse_coo_tensor(idx, torch.cat([w, w]) / 2, (n, n), check_invariants=True).coalesce()
    anti = torch.sparse_coo_tensor(idx, torch.cat([w, -w]), (n, n), check_invariants=True).coalesce()
    rows, cols = sym.indices()
    deg = torch.zeros(n, dtype=torch.float64).index_add_(0, rows, sym.values())
    inv = torch.where(deg > 0, deg.clamp_min(1e-300).rsqrt(), torch.zeros_like(deg))
    mag = (sym.values() * inv[rows] * inv[cols]).float()
    return rows, cols, mag, anti.values().float()


def user_values(mag, anti, q):
    """Values of L~ = L(q) - I = -D^-1/2 H(q) D^-1/2 on the pattern (differentiable in q)."""
    return -torch.polar(mag, 2 * math.pi * q * anti)


def user_chebyshev(x, prop, weight, bias):
    """sum_k T_k W_k + b with T_k from ``prop`` (t -> L~ t); real W on complex T."""
    def mix(t, w):
        return torch.complex(t.real @ w, t.imag @ w)
    out = mix(x, weight[0])
    prev, cur = x, prop(x)
    out = out + mix(cur, weight[1])
    for k in range(2, weight.shape[0]):
        prev, cur = cur, 2 * prop(cur) - prev
        out = out + mix(cur, weight[k])
    return out + bias


def user_layer(kind: str, graph: DirectedGraph, learned: bool, layer: MagneticFilter):
    """A closure computing the layer the user's way; shares the package layer's parameters."""
    rows, cols, mag, anti = user_pattern(graph)
    n = graph.num_nodes
    if learned:
        logit = layer.charge_logit

        def charge():
            return 0.5 * torch.sigmoid(logit[0])
    else:
        def charge():
            return torch.tensor(CHARGE)
    fixed_vals = None if learned else user_values(mag, anti, charge())
    fixed_dense = None
    if kind == "dense" and not learned:
        fixed_dense = torch.zeros(n, n, dtype=torch.complex64)
        fixed_dense[rows, cols] = fixed_vals

    def run(x):
        vals = fixed_vals if fixed_vals is not None else user_values(mag, anti, charge())
        if kind == "dense":
            if fixed_dense is not None:
                dense = fixed_dense
            else:
                dense = torch.zeros(n, n, dtype=torch.complex64).index_put((rows, cols), vals)

            def prop(t):
                return dense @ t
        else:
            def prop(t):
                return torch.zeros_like(t).index_add_(0, rows, vals[:, None] * t.index_select(0, cols))
        return user_chebyshev(x, prop, layer.weight, layer.bias)

    return run


# ---------------------------------------------------------------------- one size
def _available_bytes():
    """MemAvailable from /proc/meminfo (Linux), or None."""
    try:
        with open("/proc/meminfo") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except OSError:
        pass
    return None


def random_graph(num_edges: int, seed: int) -> DirectedGraph:
    n = max(2, num_edges // 10)
    gen = torch.Generator().manual_seed(seed)
    src = torch.randint(0, n, (num_edges,), generator=gen)
    dst = torch.randint(0, n, (num_edges,), generator=gen)
    return DirectedGraph(src, dst, None, n)


def operator_bytes(nnz: int, n: int) -> int:
    """complex64 values + int64 column indices + int64 row pointers."""
    return nnz * (8 + 8) + (n + 1) * 8


def measure(num_edges: int, repeats: int, seed: int = 0, with_baseline: bool = True) -> tuple:
    """Rows for the fixed and the learned charge, and the seconds spent on (package, baseline)."""
    graph = random_graph(num_edges, seed)
    n = graph.num_nodes
    gen = torch.Generator().manual_seed(seed + 1)
    x = torch.complex(torch.randn(n, CHANNELS, generator=gen), torch.randn(n, CHANNELS, generator=gen))
    x.requires_grad_(True)
    grad_out = torch.complex(torch.randn(n, CHANNELS, generator=gen), torch.randn(n, CHANNELS, generator=gen))
    block = n * CHANNELS * 8
    rows = []
    spent = {"package": 0.0, "baseline": 0.0}
    pattern_nnz = user_pattern(graph)[0].numel()
    available = _available_bytes()
    for learned in (False, True):
        torch.manual_seed(seed)
        start = 0.02 if learned else CHARGE
        layer = MagneticFilter(CHANNELS, CHANNELS, ORDER, charge=LearnedCharge(start=start) if learned else start)
        if learned:
            with torch.no_grad():
                layer.charge_logit.fill_(math.log(2 * CHARGE / (1 - 2 * CHARGE)))   # q = 0.25

        def package_step():
            x.grad = None
            layer.zero_grad(set_to_none=True)
            torch.autograd.backward(layer(x, graph), grad_out)

        clock = time.perf_counter()
        package_step()                                     # warm-up; builds and caches the operator
        op = None
        if not learned:
            op = graph.operator(magnetic_laplacian, charge=CHARGE, normalized=True, phase="difference",
                                dtype=torch.complex64, device=x.device)     # the one the layer built
            nnz = op.nnz
        else:
            nnz = pattern_nnz                                   # the values magnetic_matmul builds
        op_bytes = operator_bytes(nnz, n)
        t_pkg = timed_with_peak(package_step, repeats, MAX_SECONDS)
        mem_pkg = t_pkg["peak"]
        with native_kernels(False):                       # the same layer on the torch path
            package_step()
            t_torch = timed_with_peak(package_step, max(1, repeats - 1), MAX_SECONDS)
        if mem_pkg is not None and op is not None:
            mem_pkg += op_bytes                                # the cached operator is resident
        model = op_bytes + (ORDER + 2) * block
        spent["package"] += time.perf_counter() - clock
        clock = time.perf_counter()

        kind = "dense" if n <= DENSE_LIMIT else "gather_scatter"
        temp = (ORDER + 1) * nnz * CHANNELS * 8 if kind == "gather_scatter" else 2 * n * n * 8
        t_user = mem_user = None
        if kind == "gather_scatter" and not with_baseline:
            kind = "skipped (time budget)"
        elif temp > BASELINE_BYTES_LIMIT or (available is not None and 1.5 * temp > available):
            kind = "skipped (memory)"
        else:
            user = user_layer(kind, graph, learned, layer)

            def user_step():
                x.grad = None
                layer.zero_grad(set_to_none=True)
                torch.autograd.backward(user(x), grad_out)

            with torch.no_grad():
                ref = layer(x, graph)
                diff = (user(x) - ref).abs().max().item()
                if diff > 1e-4 * max(ref.abs().max().item(), 1.0):
                    raise SystemExit(f"user-written layer disagrees with MagneticFilter: max diff {diff}")
                del ref
            user_step()                                    # warm-up
            timing = timed_with_peak(user_step, repeats, MAX_SECONDS)
            t_user, mem_user = timing["median"], timing["peak"]
            del user
        spent["baseline"] += time.perf_counter() - clock
        rows.append({
            "edges": graph.num_edges, "nodes": n, "nnz": nnz,
            "charge": "learned" if learned else "fixed",
            "package_s": t_pkg["median"], "torch_path_s": t_torch["median"],
            "speedup_vs_torch_path": t_torch["median"] / t_pkg["median"],
            "baseline": kind, "baseline_s": t_user,
            "speedup": None if t_user is None else t_user / t_pkg["median"],
            "package_peak_MiB": None if mem_pkg is None else mem_pkg / 2**20,
            "model_MiB": model / 2**20,
            "peak_over_model": None if mem_pkg is None else mem_pkg / model,
            "baseline_peak_MiB": None if mem_user is None else mem_user / 2**20,
            "memory_ratio": None if (mem_user is None or not mem_pkg) else mem_user / mem_pkg,
            "repeats": t_pkg["repeats"],
        })
        del layer, op
        gc.collect()
    return rows, spent


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="one small size (a few seconds)")
    parser.add_argument("--max-edges", type=float, default=2e6, help="largest edge count to try (default 2e6)")
    parser.add_argument("--budget", type=float, default=600.0,
                        help="seconds for the whole run; a size predicted to overrun it is skipped (default 600)")
    parser.add_argument("--threads", type=int, default=2, help="torch intra-op threads (default 2)")
    parser.add_argument("--edges", type=float, nargs="*", help="edge counts to run instead of the default grid")
    args = parser.parse_args(argv)
    torch.set_num_threads(args.threads)
    if args.quick:
        sizes, repeats = [5_000], 2
    else:
        sizes = [e for e in (20_000, 200_000, 2_000_000) if e <= args.max_edges]
        if args.edges:
            sizes = [int(e) for e in args.edges]
        repeats = 3
    rows, skipped = [], []
    t0 = time.perf_counter()
    last = None                      # (edges, package seconds, baseline seconds) of the last size
    for e in sizes:
        elapsed = time.perf_counter() - t0
        with_baseline = True
        if last is not None and not args.quick:
            grow = e / last[0]
            package_pred, baseline_pred = last[1] * grow, last[2] * grow
            if elapsed + package_pred + baseline_pred > args.budget:
                with_baseline = False
            if elapsed + package_pred > args.budget:
                skipped = [s for s in sizes if s >= e]
                print(f"  stopping before {e:,d} edges: predicted {package_pred:.0f} s would overrun the "
                      f"{args.budget:.0f} s budget ({elapsed:.0f} s used)", flush=True)
                break
        start = time.perf_counter()
        new_rows, spent = measure(e, repeats, with_baseline=with_baseline)
        rows.extend(new_rows)
        total = time.perf_counter() - start                  # setup included
        baseline_s = spent["baseline"] if with_baseline else (last[2] * e / last[0] if last else 0.0)
        last = (e, total - spent["baseline"], baseline_s)
        print(f"  {e:>10,d} edges done at {time.perf_counter() - t0:.0f} s"
              f"{'' if with_baseline else ' (baseline skipped: time budget)'}", flush=True)
    for r in rows:
        if r["charge"] == "learned":
            fixed = next(f for f in rows if f["edges"] == r["edges"] and f["charge"] == "fixed")
            r["learned_over_fixed"] = r["package_s"] / fixed["package_s"]
    columns = ["edges", "nodes", "charge", "package_s", "torch_path_s", "speedup_vs_torch_path", "learned_over_fixed",
               "baseline", "baseline_s", "speedup",
               "package_peak_MiB", "model_MiB", "peak_over_model", "baseline_peak_MiB", "memory_ratio"]
    print_table(rows, columns, title=f"MagneticFilter({CHANNELS}, {CHANNELS}, order={ORDER}) forward + backward, "
                                     f"complex64, {args.threads} threads")
    if skipped:
        print(f"not run (time budget): {', '.join(f'{s:,d}' for s in skipped)} edges")
    write_results("layers", {
        "description": "MagneticFilter forward+backward vs the same layer written with dense matrices "
                       "(N <= 4096) or gather-scatter (index_select + index_add_); peak memory vs "
                       "operator bytes + (order + 2) feature blocks",
        "load_average_1m_end": os.getloadavg()[0],
        "quick": args.quick, "channels": CHANNELS, "order": ORDER, "threads": args.threads,
        "baseline_bytes_limit": BASELINE_BYTES_LIMIT, "skipped_edges": skipped,
        "seconds_total": time.perf_counter() - t0, "rows": rows,
    }, argv=sys.argv)


if __name__ == "__main__":
    main()

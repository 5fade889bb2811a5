"""Cost of diffusion wavelets and scattering, in units of sparse products of the same width.

For each graph (N = E / 10 nodes, E random one-way edges, symmetric lazy diffusion T, float32,
F feature columns, J scales) it times, in one process:

* ``chain W``: the bare 2^J repeated products ``y = T @ y`` of one (N, W) block (the
  Hermitian kernel), for the widths the layers use: F, (J + 1) F and J (J + 1) F / 2;
* ``wavelets``: DiffusionWavelets(J) forward, 2^J products of width F;
* ``order1`` / ``order2``: DiffusionScattering forward (with the low-pass, the default), and
  ``order1_nolow`` / ``order2_nolow`` (``lowpass=False``);
* ``order2_loop``: order 2 written the naive way, one wavelet pass per first-order path
  (J + 1 chains of width F instead of one chain of width (J + 1) F);
* ``order1_fwd_bwd``: forward + backward of order 1;
* ``dense_order1``: the same order-1 computation with a dense (N, N) T (torch.mm), N <= 4096.

All cases of a graph are timed in interleaved rounds (one run of each per round), and each
case keeps its fastest round: on the shared 2-core machine other jobs inflate single runs many
times over, so the minimum is the robust estimate of the intrinsic cost; medians are kept too.
``x_2^J`` is time / (chain F), the issue's unit: 2^J products of the input's width (target for
the wavelet pass: <= 1.3). ``x_inherent`` is time / (the chains the algorithm must run, each
timed at its own width), i.e. the overhead beyond the sparse products themselves.

Run from the repository root: ``.venv/bin/python bench/scattering.py [--quick] [--threads 1]``.
The full run keeps to a time budget (``--budget`` seconds, default 240) and says where it
stopped; graphs above 1e6 edges run the main cases only, one timed round.
"""

from __future__ import annotations

import argparse
import os
import statistics
import sys
import time

import numpy as np
import torch

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from _common import print_table, write_results  # noqa: E402

from phasorgraph import DirectedGraph, operators  # noqa: E402
from phasorgraph.nn import DiffusionScattering, DiffusionWavelets  # noqa: E402
from phasorgraph.nn._diffusion import diffusion_powers as _diffusion_powers, dyadic_bands as _dyadic_bands  # noqa: E402

DENSE_LIMIT = 4096


def build(num_edges: int, seed: int = 0):
    rng = np.random.default_rng(seed)
    n = max(2, num_edges // 10)
    src = rng.integers(0, n, num_edges)
    dst = rng.integers(0, n, num_edges)
    graph = DirectedGraph.from_edges(src, dst, weight=rng.uniform(0.5, 1.5, num_edges), num_nodes=n)
    return graph, operators.diffusion(graph, dtype=torch.float32)


def order2_loop(T, x, J):
    """Order 2 with one wavelet pass per first-order path (the baseline the stacking avoids)."""
    n, F = x.shape
    first = _dyadic_bands(T, None, x, J)
    u1 = first[:, :-1].abs()
    blocks = [first[:, -1:]]
    lows, seconds = [], []
    for j1 in range(J + 1):
        b = _dyadic_bands(T, None, u1[:, j1], J)
        lows.append(b[:, -1])
        seconds += [b[:, j2].abs() for j2 in range(j1 + 1, J + 1)]
    blocks.append(torch.stack(lows, 1))
    for u in seconds:
        (low,) = _diffusion_powers(T, None, u, [2 ** J])
        blocks.append(low.unsqueeze(1))
    return torch.cat(blocks, 1)


REDUCED = ("wavelets", "order1", "order1_nolow", "order2", "order2_nolow")


def run_case(num_edges, F, J, repeats, with_dense, reduced=False):
    t0 = time.perf_counter()
    graph, T = build(num_edges)
    setup = time.perf_counter() - t0
    n = graph.num_nodes
    gen = torch.Generator().manual_seed(1)
    x = torch.randn(n, F, generator=gen)
    steps = 2 ** J
    widths = {"F": F, "(J+1)F": (J + 1) * F, "J(J+1)F/2": J * (J + 1) // 2 * F}
    blocks = {key: torch.randn(n, w, generator=gen) for key, w in widths.items()}

    def chain(xw):
        # the bare products: 2^J repeated T @ y of one width, nothing else
        y = xw
        for _ in range(steps):
            y = T @ y
        return y

    # name -> (function, grad enabled); every case is timed in the same interleaved rounds
    # (one run of each case per round) so that load from other jobs hits all cases alike
    cases = {f"chain {key}": ((lambda xw: lambda: chain(xw))(xw), False) for key, xw in blocks.items()}
    layers = {
        "wavelets": lambda: DiffusionWavelets(J)(x, T),
        "order1": lambda: DiffusionScattering(F, J, order=1)(x, T),
        "order1_nolow": lambda: DiffusionScattering(F, J, order=1, lowpass=False)(x, T),
        "order2": lambda: DiffusionScattering(F, J, order=2)(x, T),
        "order2_nolow": lambda: DiffusionScattering(F, J, order=2, lowpass=False)(x, T),
        "order2_loop": lambda: order2_loop(T, x, J),
    }
    for name, fn in layers.items():
        if not reduced or name in REDUCED:
            cases[name] = (fn, False)
    if not reduced:
        xg = x.clone().requires_grad_(True)
        layer = DiffusionScattering(F, J, order=1)

        def fwd_bwd():
            layer(xg, T).sum().backward()

        cases["order1_fwd_bwd"] = (fwd_bwd, True)
    if with_dense and n <= DENSE_LIMIT:
        D = T.to_dense()

        def dense_order1():
            ys, y, k = [x], x, 0
            for j in range(J + 1):
                while k < 2 ** j:
                    y = D @ y
                    k += 1
                ys.append(y)
            u1 = torch.stack([ys[i] - ys[i + 1] for i in range(J + 1)], 1).abs().reshape(n, -1)
            for _ in range(steps):
                u1 = D @ u1
            return torch.cat([ys[-1], u1], 1)

        cases["dense_order1"] = (dense_order1, False)
    times = {name: [] for name in cases}
    for rnd in range(repeats + 1):  # round 0 is the warm-up
        for name, (fn, grad) in cases.items():
            with torch.set_grad_enabled(grad):
                t1 = time.perf_counter()
                fn()
                dt = time.perf_counter() - t1
            if rnd:
                times[name].append(dt)
    best = {name: min(v) for name, v in times.items()}
    unit = best["chain F"]
    cF, c1, c2 = best["chain F"], best["chain (J+1)F"], best["chain J(J+1)F/2"]
    inherent = {
        "chain F": cF, "chain (J+1)F": c1, "chain J(J+1)F/2": c2,
        "wavelets": cF,
        "order1": cF + c1,
        "order1_nolow": cF,
        "order2": cF + c1 + c2,
        "order2_nolow": cF + c1,  # second pass has width J F, bounded by (J + 1) F
        "order2_loop": cF + (J + 1) * cF + (J * (J + 1) // 2) * cF,
        "order1_fwd_bwd": 2 * (cF + c1),  # a Hermitian backward repeats the forward products
        "dense_order1": cF + c1,
    }
    rows = [{"E": num_edges, "N": n, "case": name, "best_s": best[name],
             "median_s": statistics.median(times[name]), "x_2^J": best[name] / unit,
             "x_inherent": best[name] / inherent[name]} for name in cases]
    info = {"E": num_edges, "N": n, "nnz": T.nnz, "setup_seconds": setup, "F": F, "J": J,
            "rounds": repeats}
    return rows, info


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--quick", action="store_true", help="one small graph (N = 4096), a few seconds")
    parser.add_argument("--features", type=int, default=8)
    parser.add_argument("--scales", type=int, default=3)
    parser.add_argument("--threads", type=int, default=2)
    parser.add_argument("--budget", type=float, default=240.0, help="seconds; larger graphs are skipped past it")
    args = parser.parse_args(argv)
    torch.set_num_threads(args.threads)
    if args.quick:
        grid, repeats = [4096 * 10], 5
    else:
        grid, repeats = [4096 * 10, 100_000, 1_000_000, 10_000_000], 7
    start = time.perf_counter()
    rows, infos, stopped = [], [], None
    for i, num_edges in enumerate(grid):
        elapsed = time.perf_counter() - start
        # a 10x larger graph costs about 10x the last one: skip it when that would pass the budget
        # sizes above 1e6 edges run the main cases only, one timed round after the warm-up
        big = num_edges > 1_000_000
        reps = repeats if num_edges <= 100_000 else (3 if not big else 1)
        if not args.quick and infos:
            # a 10x larger graph costs about 10x per round; skip it if that would pass the budget
            estimate = 10 * infos[-1]["round_seconds"] * (reps + 1) * (0.7 if big else 1.0)
            if elapsed + estimate > args.budget:
                stopped = (f"stopped before E = {num_edges}: {elapsed:.0f} s spent, that size needs about "
                           f"{estimate:.0f} s more, past the {args.budget:.0f} s budget")
                break
        t0 = time.perf_counter()
        r, info = run_case(num_edges, args.features, args.scales, reps, with_dense=True, reduced=big)
        info["case_seconds"] = time.perf_counter() - t0
        info["round_seconds"] = info["case_seconds"] / (reps + 1)
        info["cases"] = "main cases only" if big else "all cases"
        rows += r
        infos.append(info)
    print_table(rows, ["E", "N", "case", "best_s", "median_s", "x_2^J", "x_inherent"],
                title=f"Scattering cost (F = {args.features}, J = {args.scales}, float32, torch threads {args.threads})")
    for info in infos:
        print(f"E = {info['E']}: nnz(T) = {info['nnz']}, setup {info['setup_seconds']:.2f} s, "
              f"{info['rounds']} timed rounds ({info['cases']})")
    if stopped:
        print(stopped)
    write_results("scattering", {"quick": args.quick, "features": args.features, "scales": args.scales,
                                 "threads": args.threads, "timing": "best of repeats (min); median kept",
                                 "graphs": infos, "rows": rows, "stopped": stopped,
                                 "total_seconds": time.perf_counter() - start}, argv=sys.argv)


if __name__ == "__main__":
    main()

"""MagneticFilter forward + backward: fixed charge, learned charge and a gather-scatter layer, interleaved.

bench/layers.py times each variant in its own block (one repeat once a step takes seconds), so a
burst of load from another process can land on one variant only. This script runs the three
steps round-robin (fixed, learned, gather-scatter, fixed, ...) for ``--repeats`` rounds in one
process and reports, per variant, the fastest and the median step, and the ratios
gather-scatter / fixed and learned / fixed by both. Layer: ``MagneticFilter(64, 64,
order=3)`` on complex64 features, upstream gradient given; graph: E uniform random directed
edges on N = E / 10 nodes (bench/layers.py's graphs); the gather-scatter layer is
bench/layers.py's ``user_layer`` (``index_select`` + ``index_add_``, autograd for the backward),
sharing the fixed layer's parameters, and its output is checked against the layer's.

Usage: ``python bench/layer_ratios.py [--quick] [--edges 2e6] [--repeats 3] [--threads 2]``;
writes bench/results/layer_ratios.json.
"""

from __future__ import annotations

import argparse
import os
import sys
import time

import numpy as np
import torch

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from _common import print_table, write_results  # noqa: E402
from layers import random_graph, user_layer  # noqa: E402

from phasorgraph.nn import LearnedCharge, MagneticFilter  # noqa: E402


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="E = 2e4, 2 rounds (seconds)")
    parser.add_argument("--edges", type=float, default=2e6)
    parser.add_argument("--repeats", type=int, default=3, help="rounds of the three steps (default 3)")
    parser.add_argument("--threads", type=int, default=2)
    args = parser.parse_args(argv)
    torch.set_num_threads(args.threads)
    edges = 20_000 if args.quick else int(args.edges)
    rounds = 2 if args.quick else args.repeats
    load_before = os.getloadavg()[0]
    graph = random_graph(edges, 0)
    n = graph.num_nodes
    gen = torch.Generator().manual_seed(1)
    x = torch.complex(torch.randn(n, 64, generator=gen), torch.randn(n, 64, generator=gen))
    grad = torch.complex(torch.randn(n, 64, generator=gen), torch.randn(n, 64, generator=gen))
    fixed = MagneticFilter(64, 64, order=3, charge=0.25)
    learned = MagneticFilter(64, 64, order=3, charge=LearnedCharge(start=0.25))
    gather = user_layer("gather", graph, False, fixed)
    with torch.no_grad():
        ref = fixed(x, graph)
        diff = float((ref - gather(x)).abs().max() / ref.abs().max())
    if diff > 1e-4:
        raise SystemExit(f"the gather-scatter layer disagrees with MagneticFilter: {diff:.3g}")

    def step(layer):
        def run():
            xx = x.detach().requires_grad_()
            layer(xx).backward(grad)
        return run

    steps = {"fixed": step(lambda t: fixed(t, graph)), "learned": step(lambda t: learned(t, graph)),
             "gather_scatter": step(gather)}
    for run in steps.values():  # warm-up: operators built and cached, kernels loaded
        run()
    times = {name: [] for name in steps}
    for _ in range(rounds):
        for name, run in steps.items():
            t0 = time.perf_counter()
            run()
            times[name].append(time.perf_counter() - t0)
    rows = [{"variant": name, "fastest_s": min(v), "median_s": float(np.median(v)), "runs_s": [round(t, 3) for t in v]}
            for name, v in times.items()]
    best = {r["variant"]: r["fastest_s"] for r in rows}
    med = {r["variant"]: r["median_s"] for r in rows}
    ratios = {
        "gather_over_fixed_fastest": best["gather_scatter"] / best["fixed"],
        "gather_over_fixed_median": med["gather_scatter"] / med["fixed"],
        "learned_over_fixed_fastest": best["learned"] / best["fixed"],
        "learned_over_fixed_median": med["learned"] / med["fixed"],
    }
    print_table(rows, title=f"MagneticFilter(64, 64, order=3) fwd+bwd, E={edges:.0e}, N={n}, {rounds} rounds")
    print({k: round(v, 3) for k, v in ratios.items()})
    write_results("layer_ratios", {"edges": edges, "nodes": n, "rounds": rounds, "threads": args.threads,
                                   "max_rel_diff_gather": diff, "load_before": load_before,
                                   "load_after": os.getloadavg()[0], "rows": rows, "ratios": ratios},
                  argv=sys.argv)


if __name__ == "__main__":
    main()

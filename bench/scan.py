"""How long does the charge scan take on a large graph, against one training step of a MagneticFilter?

Setup (seeded, outside the timed bodies): a directed block model of N nodes in 4 blocks with
about E edges (a mild flow between blocks), F = 4 random features, labels known for 10 % of
the nodes. Timed, in one process:

* ``features``: the Chebyshev terms of one charge (operator build + ``order`` = 4 products);
* ``scan, no permutations``: :func:`phasorgraph.scan_charges` with the default 7 charges,
  5 folds x 2 repeats, ``permutations=0`` (the interval, no p-value);
* ``scan, 2 permutations``: the same with ``permutations=2``; the difference to the previous
  row, halved, is the cost of one permutation (one scan of the charges q > 0 on a randomly
  oriented copy). A verdict needs 19 permutations when direction helps (fewer when it does
  not: the test stops once 3 copies match the observed gain); the table gives that cost as
  an estimate, ``no permutations + 19 x one permutation``, not as a run;
* baseline ``train step``: one forward + backward of ``MagneticFilter(F + 1, 16, order=4)`` at a
  fixed charge on the same graph (operator already built), the unit a user pays for each
  epoch of each model trained to compare charges by hand.

Wall seconds are medians (train step, features: 3 runs) or single runs (the scans); CPU seconds
(this process, ``time.process_time``) show what the work costs when the machine is shared.

Usage: .venv/bin/python bench/scan.py [--quick] [--threads T]
"""

from __future__ import annotations

import argparse
import os
import sys
import time

import numpy as np
import torch

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from _common import machine_info, print_table, write_results  # noqa: E402

import phasorgraph as pg  # noqa: E402
from phasorgraph.data import directed_block_model  # noqa: E402
from phasorgraph.scan import charges as scan_impl  # noqa: E402


CPU = {}


def _once(fn, key=None):
    """Wall seconds of one call (and its CPU seconds, this process, kept under ``key``)."""
    c0, t0 = time.process_time(), time.perf_counter()
    out = fn()
    wall = time.perf_counter() - t0
    if key is not None:
        CPU[key] = time.process_time() - c0
    return wall, out


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="N = 1e4, E = 1e5")
    parser.add_argument("--threads", type=int, default=2)
    args = parser.parse_args(argv)
    torch.set_num_threads(args.threads)
    n, e = (10_000, 100_000) if args.quick else (100_000, 1_000_000)
    blocks = 4
    density = e / (n * (n - 1) / 2)
    flow = np.full((blocks, blocks), 0.5)
    flow[np.triu_indices(blocks, 1)] = 0.6
    flow[np.tril_indices(blocks, -1)] = 0.4
    graph, labels = directed_block_model([n // blocks] * blocks, density, flow, seed=0)
    rng = np.random.default_rng(0)
    y = labels.clone()
    y[torch.from_numpy(rng.random(n) >= 0.1)] = -1
    x = torch.randn(n, 4)
    load_before = os.getloadavg()[0]
    print(f"graph: {graph.num_nodes} nodes, {graph.num_edges} edges; {int((y >= 0).sum())} labelled; "
          f"{args.threads} thread(s); load average {load_before:.1f}")

    layer = pg.nn.MagneticFilter(5, 16, order=4, charge=0.1)
    xs = torch.cat([torch.ones(n, 1), x], dim=1)
    layer(xs, graph)  # builds and keeps the operator

    def step():
        layer.zero_grad()
        layer(xs, graph).abs().sum().backward()

    step()
    t_step = float(np.median([_once(step, "step")[0] for _ in range(3)]))
    t_feat = float(np.median([_once(lambda: scan_impl._terms(graph, xs, 0.1, 4, "difference", torch.complex64),
                                    "features")[0] for _ in range(3)]))
    t_scan0, r0 = _once(lambda: pg.scan_charges(graph, x, y, permutations=0, seed=0, progress=True), "scan0")
    t_scan2, r = _once(lambda: pg.scan_charges(graph, x, y, permutations=2, seed=0, progress=True), "scan2")
    per_permutation = max(t_scan2 - t_scan0, 0.0) / 2
    estimate = t_scan0 + 19 * per_permutation
    load_after = os.getloadavg()[0]
    rows = [
        {"case": "train step (baseline)", "seconds": t_step, "x baseline": 1.0, "cpu seconds (last run)": CPU["step"]},
        {"case": "features, one charge", "seconds": t_feat, "x baseline": t_feat / t_step,
         "cpu seconds (last run)": CPU["features"]},
        {"case": "scan, no permutations", "seconds": t_scan0, "x baseline": t_scan0 / t_step,
         "cpu seconds (last run)": CPU["scan0"]},
        {"case": "scan, 2 permutations", "seconds": t_scan2, "x baseline": t_scan2 / t_step,
         "cpu seconds (last run)": CPU["scan2"]},
        {"case": "one permutation (difference / 2)", "seconds": per_permutation, "x baseline": per_permutation / t_step},
        {"case": "19 permutations (estimate, not run)", "seconds": estimate, "x baseline": estimate / t_step},
    ]
    print_table(rows, ["case", "seconds", "x baseline", "cpu seconds (last run)"])
    print(f"interval and gain: {r0.verdict}")
    print(f"load average {load_before:.1f} before, {load_after:.1f} after")
    write_results("scan", {"nodes": n, "edges": graph.num_edges, "labelled": int((y >= 0).sum()), "threads": args.threads,
                           "load_average": [load_before, load_after], "rows": rows,
                           "verdict_without_permutations": r0.verdict,
                           "machine": machine_info()}, argv=sys.argv)


if __name__ == "__main__":
    main()

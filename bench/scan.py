"""How long does the full charge-scan verdict take on a large graph, against one training step of a MagneticFilter?

Setup (seeded, outside the timed bodies): a directed block model of N nodes in 4 blocks with
about E edges (a mild flow between blocks, so direction helps and the permutation test runs all
its copies), F = 4 random features, labels known for 10 % of the nodes. Timed, in one process:

* baseline ``train step``: one forward + backward of ``MagneticFilter(F + 1, 16, order=4)`` at a
  fixed charge on the same graph (operator already built), the unit a user pays for each epoch
  of each model trained to compare charges by hand (median of 3);
* ``full verdict``: :func:`phasorgraph.scan_charges` with every default (7 charges, order 4,
  5 folds x 2 repeats, 19 direction permutations): the interval and the permutation p-value,
  run end to end once, on a fresh copy of the graph (nothing cached from the baseline);
* ``interval only``: the same with ``permutations=0``.

Stages of the full verdict are measured inside that one run by wrapping the scan's internal
steps with timers (wall and CPU seconds; CPU is ``time.process_time`` of this process, all
threads): setup (checks, folds, the graph's structure and node pairs, the row sets of the
restricted Chebyshev terms), the magnetic values of each charge (once per charge), the
orientation signs of each permuted copy, the Chebyshev products, the standardized designs and
the model fits, split between the observed graph and the permuted copies.

Usage: .venv/bin/python bench/scan.py [--quick] [--threads T]; writes bench/results/scan.json
(scan_<T>thread.json for other thread counts; ``--quick``: N = 1e4, E = 1e5, *_quick.json).
"""

from __future__ import annotations

import argparse
import os
import sys
import time
from collections import defaultdict

import numpy as np
import torch

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from _common import machine_info, print_table, write_results  # noqa: E402

import phasorgraph as pg  # noqa: E402
from phasorgraph.data import directed_block_model  # noqa: E402
from phasorgraph.scan import charges as scan_impl  # noqa: E402


def _clock():
    return time.perf_counter(), time.process_time()


class _Stages:
    """Wall and CPU seconds spent in wrapped functions, by label (inner labels are subtracted later)."""

    def __init__(self):
        self.wall = defaultdict(float)
        self.cpu = defaultdict(float)
        self.calls = defaultdict(int)
        self._undo = []

    def wrap(self, owner, name, label_of):
        original = getattr(owner, name)

        def timed(*args, **kwargs):
            label = label_of(*args, **kwargs)
            w0, c0 = _clock()
            try:
                return original(*args, **kwargs)
            finally:
                w1, c1 = _clock()
                self.wall[label] += w1 - w0
                self.cpu[label] += c1 - c0
                self.calls[label] += 1

        setattr(owner, name, timed)
        self._undo.append((owner, name, original))

    def restore(self):
        for owner, name, original in reversed(self._undo):
            setattr(owner, name, original)
        self._undo.clear()


def _timed_verdict(graph, x, y):
    """One end-to-end scan_charges run with default settings; returns (result, total wall, total cpu, stages)."""
    stages = _Stages()
    fits = {"done": 0}

    def fit_label(*_args, **_kwargs):
        fits["done"] += 1
        return "fits, observed" if fits["done"] == 1 else "fits, permuted"

    F = scan_impl._ChebyshevFeatures
    stages.wrap(F, "__init__", lambda *a, **k: "setup: feature plan (pattern check, restricted rows)")
    stages.wrap(F, "values", lambda *a, **k: "magnetic values (once per charge)")
    stages.wrap(F, "terms", lambda self, q, orientation=None: "features, observed" if orientation is None
                else "features, permuted")
    stages.wrap(F, "orientation", lambda *a, **k: "orientation signs")
    stages.wrap(scan_impl, "orientation_signs", lambda *a, **k: "orientation signs")
    stages.wrap(scan_impl, "_pair_flips", lambda *a, **k: "orientation signs")
    stages.wrap(scan_impl, "node_pairs", lambda *a, **k: "setup: node pairs")
    stages.wrap(scan_impl, "_node_design", lambda *a, **k: "designs (standardized)")
    stages.wrap(scan_impl._FoldModels, "scores", fit_label)
    try:
        w0, c0 = _clock()
        result = pg.scan_charges(graph, x, y, seed=0, progress=False)
        w1, c1 = _clock()
    finally:
        stages.restore()
    wall, cpu = dict(stages.wall), dict(stages.cpu)
    # values() runs inside terms(), on each charge's first use, which is the observed graph's:
    # the observed features are reported without it
    for d in (wall, cpu):
        d["features, observed"] -= d.get("magnetic values (once per charge)", 0.0)
    return result, w1 - w0, c1 - c0, wall, cpu


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
    x = torch.randn(n, 4, generator=torch.Generator().manual_seed(0))
    load_before = os.getloadavg()[0]
    print(f"graph: {graph.num_nodes} nodes, {graph.num_edges} edges; {int((y >= 0).sum())} labelled; "
          f"{args.threads} thread(s); load average {load_before:.2f}")

    # warm-up on a small graph: numba loads its cached kernels once per process (not timed)
    small, small_y = directed_block_model([50, 50], 0.1, [[0.5, 0.9], [0.1, 0.5]], seed=1)
    pg.scan_charges(small, torch.ones(100, 1), small_y, charges=[0, 0.25], permutations=2, seed=0, progress=False)

    layer = pg.nn.MagneticFilter(5, 16, order=4, charge=0.1)
    xs = torch.cat([torch.ones(n, 1), x], dim=1)
    layer(xs, graph)  # builds and keeps the operator

    def step():
        layer.zero_grad()
        layer(xs, graph).abs().sum().backward()

    step()
    steps = []
    for _ in range(3):
        w0, c0 = _clock()
        step()
        w1, c1 = _clock()
        steps.append((w1 - w0, c1 - c0))
    t_step, c_step = (float(np.median([s[i] for s in steps])) for i in (0, 1))

    def fresh():
        return pg.DirectedGraph(graph.source, graph.target, graph.weight, graph.num_nodes)

    w0, c0 = _clock()
    r0 = pg.scan_charges(fresh(), x, y, permutations=0, seed=0, progress=False)
    w1, c1 = _clock()
    t_interval, c_interval = w1 - w0, c1 - c0
    result, t_full, c_full, wall, cpu = _timed_verdict(fresh(), x, y)
    load_after = os.getloadavg()[0]
    copies = result.permutations
    rows = [{"case": "train step (baseline)", "wall s": t_step, "cpu s": c_step, "x train step": 1.0},
            {"case": "interval only (permutations=0)", "wall s": t_interval, "cpu s": c_interval,
             "x train step": t_interval / t_step},
            {"case": f"full verdict (interval + {copies} permutations)", "wall s": t_full, "cpu s": c_full,
             "x train step": t_full / t_step}]
    order = ["setup: node pairs", "setup: feature plan (pattern check, restricted rows)", "magnetic values (once per charge)", "features, observed",
             "fits, observed", "orientation signs", "features, permuted", "designs (standardized)", "fits, permuted"]
    accounted_w = sum(wall.get(k, 0.0) for k in order)
    accounted_c = sum(cpu.get(k, 0.0) for k in order)
    for key in order:
        if key in wall:
            rows.append({"case": f"  {key}", "wall s": wall[key], "cpu s": cpu[key], "x train step": wall[key] / t_step})
    rows.append({"case": "  rest (checks, folds, structure, Python)", "wall s": t_full - accounted_w,
                 "cpu s": c_full - accounted_c, "x train step": (t_full - accounted_w) / t_step})
    per_copy_w = sum(wall.get(k, 0.0) for k in ("orientation signs", "features, permuted", "fits, permuted")) / max(copies, 1)
    per_copy_c = sum(cpu.get(k, 0.0) for k in ("orientation signs", "features, permuted", "fits, permuted")) / max(copies, 1)
    rows.append({"case": "one permuted copy (signs + features + fits, mean)", "wall s": per_copy_w, "cpu s": per_copy_c,
                 "x train step": per_copy_w / t_step})
    print_table(rows, ["case", "wall s", "cpu s", "x train step"])
    print(f"verdict: {result.verdict}")
    print(f"load average {load_before:.2f} before, {load_after:.2f} after")
    write_results("scan" if args.threads == 2 else f"scan_{args.threads}thread", {"nodes": n, "edges": graph.num_edges, "labelled": int((y >= 0).sum()), "threads": args.threads,
                           "load_average": [load_before, load_after], "rows": rows, "verdict": result.verdict,
                           "interval_only_verdict": r0.verdict, "permutations": copies,
                           "machine": machine_info()}, argv=sys.argv)


if __name__ == "__main__":
    main()

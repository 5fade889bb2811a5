"""Measurement: heavy-tailed weights and the magnetic phase (accuracy, not speed).

Question: with amounts spanning six orders of magnitude (payments, volumes), which weights and
which phase let a MagneticFilter see direction? This is the measurement behind the README's
advice on large weights.

Setup: the generated freight network of the tutorials (tutorials/freight.py, seeded; 800
depots, tiers from lane direction) with heavy-tailed amounts: each link (both directions of a
lane, so the return share of a lane is kept) gets its volume multiplied by 10 ** U(0, 4), so
amounts run from about 1 to about 1e6, as in a payments table. The edges go in as a table with
string ids ("depot_00042") through ``DirectedGraph.from_table``. Model: two
``MagneticFilter(order 2, charge 0.25)`` layers with modReLU, ``ComplexToReal("cartesian")``
and a linear head; full-batch Adam, 100 epochs, tiers known for 10 % of the depots, test
accuracy at the best validation epoch, mean +- std over 3 runs (different splits and
initializations). Chance is 0.25.

Variants (weights given to the package, phase):

* raw amounts, "difference" (the default phase);
* amounts / max, "difference";
* raw amounts, "sign";
* log1p of amounts, "difference";
* log1p of amounts / max, "difference";
* rank of amounts (``weight_transform="rank"``), "difference";
* raw amounts, "relative";
* log1p of amounts, "relative";
* rank of amounts, "relative";
* log1p of amounts, q = 0 (direction off).

Usage: .venv/bin/python bench/phase_weights.py [--quick]
Writes bench/results/phase_weights.json.
"""

from __future__ import annotations

import os
import sys
import time
import warnings

import numpy as np
import torch

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.append(os.path.join(HERE, "..", "tutorials"))  # after bench/, whose _common.py must win

import freight  # noqa: E402  (the tutorials' generated scenario)
import _common as B  # noqa: E402  (bench helpers: this folder is first on sys.path)

import phasorgraph as pg  # noqa: E402
from phasorgraph.errors import PhaseWrapWarning  # noqa: E402

HIDDEN, ORDER, CHARGE = 24, 2, 0.25


class Magnetic(torch.nn.Module):
    def __init__(self, fin, classes, charge, phase):
        super().__init__()
        self.conv1 = pg.nn.MagneticFilter(fin, HIDDEN, ORDER, charge=charge, phase=phase)
        self.act1 = pg.nn.ModReLU(HIDDEN)
        self.conv2 = pg.nn.MagneticFilter(HIDDEN, HIDDEN, ORDER, charge=charge, phase=phase)
        self.act2 = pg.nn.ModReLU(HIDDEN)
        self.to_real = pg.nn.ComplexToReal("cartesian")
        self.head = torch.nn.Linear(2 * HIDDEN, classes)

    def forward(self, x, graph):
        z = self.act1(self.conv1(x, graph))
        z = self.act2(self.conv2(z, graph))
        return self.head(self.to_real(z))


def heavy_table(net, seed):
    """Edge table (dict of columns) with string ids and amounts from ~1 to ~1e6."""
    g = net.graph
    s, t, w = g.source.numpy(), g.target.numpy(), g.weight.numpy()
    n = g.num_nodes
    link = np.minimum(s, t) * n + np.maximum(s, t)  # one key per unordered link
    _, which = np.unique(link, return_inverse=True)
    factor = 10.0 ** np.random.default_rng(seed).uniform(0, 4, size=which.max() + 1)
    names = np.char.add("depot_", np.char.zfill(np.arange(n).astype(str), 5))
    return {"from": names[s], "to": names[t], "amount": w * factor[which]}, names


def variants(table, names):
    build = lambda **kw: pg.DirectedGraph.from_table(table, "from", "to", "amount", nodes=names, **kw)  # noqa: E731
    raw = build()
    logged = build(weight_transform="log1p")
    scaled = lambda g: pg.DirectedGraph(g.source, g.target, g.weight / g.weight.max(), g.num_nodes)  # noqa: E731
    return [
        ("raw amounts", "difference", CHARGE, raw),
        ("amounts / max", "difference", CHARGE, scaled(raw)),
        ("raw amounts", "sign", CHARGE, raw),
        ("log1p(amounts)", "difference", CHARGE, logged),
        ("log1p(amounts) / max", "difference", CHARGE, scaled(logged)),
        ('rank (weight_transform="rank")', "difference", CHARGE, build(weight_transform="rank")),
        ("raw amounts", "relative", CHARGE, raw),
        ("log1p(amounts)", "relative", CHARGE, logged),
        ('rank (weight_transform="rank")', "relative", CHARGE, build(weight_transform="rank")),
        ("log1p(amounts)", "any (q = 0)", 0.0, logged),
    ]


def main(argv=None):
    argv = sys.argv[1:] if argv is None else argv
    quick = "--quick" in argv
    depots, epochs, runs = (300, 30, 2) if quick else (800, 100, 3)
    torch.set_num_threads(1)
    t0 = time.perf_counter()
    net = freight.freight_network(depots, seed=0)
    table, names = heavy_table(net, seed=0)
    amounts = table["amount"]
    print(f"freight network: {depots} depots, {amounts.size} lanes; amounts {amounts.min():.3g} .. "
          f"{amounts.max():.3g} (median {np.median(amounts):.3g})")
    x = torch.cat([net.features, torch.ones(depots, 1)], dim=1)
    labels = net.tier
    rows = []
    for weights, phase, q, graph in variants(table, names):
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always", PhaseWrapWarning)
            pg.operators.magnetic_laplacian(pg.DirectedGraph(graph.source, graph.target, graph.weight, graph.num_nodes),
                                            q, phase=phase if phase != "any (q = 0)" else "difference")
        wrapped = any(issubclass(c.category, PhaseWrapWarning) for c in caught)
        accs = []
        for run in range(runs):
            split = pg.data.split_nodes(labels, train=0.1, val=0.1, seed=run)
            torch.manual_seed(run)
            model = Magnetic(x.shape[1], 4, q, "difference" if phase == "any (q = 0)" else phase)
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", PhaseWrapWarning)
                res = _train(model, x, graph, labels, split, epochs)
            accs.append(res)
        anti = _max_net_flow(graph)
        rows.append({"weights": weights, "phase": phase, "q": q, "max |A - A^T|": anti,
                     "wrap warning": "yes" if wrapped else "no",
                     "test acc mean": float(np.mean(accs)), "test acc std": float(np.std(accs)),
                     "runs": runs})
        print(f"  {weights:32s} {phase:12s} q={q:<5} acc {np.mean(accs):.3f} +- {np.std(accs):.3f}"
              f"  (max |A - A^T| {anti:.3g}, warning: {'yes' if wrapped else 'no'})", flush=True)
    B.print_table(rows, ["weights", "phase", "q", "max |A - A^T|", "wrap warning", "test acc mean", "test acc std"],
                  title=f"Tier classification with heavy-tailed amounts ({depots} depots, {epochs} epochs, "
                        f"{runs} runs; chance 0.25)")
    print(f"total {time.perf_counter() - t0:.0f} s")
    if not quick:
        B.write_results("phase_weights", {"depots": depots, "epochs": epochs, "runs": runs, "rows": rows},
                        argv=sys.argv)


def _max_net_flow(graph):
    A = graph.to_scipy("csr")
    d = (A - A.T).tocsr()
    return float(abs(d).max()) if d.nnz else 0.0


def _train(model, x, graph, labels, split, epochs):
    opt = torch.optim.Adam(model.parameters(), lr=0.01, weight_decay=5e-4)
    best_val, best_test = -1.0, 0.0
    for epoch in range(1, epochs + 1):
        model.train()
        opt.zero_grad()
        loss = torch.nn.functional.cross_entropy(model(x, graph)[split.train], labels[split.train])
        loss.backward()
        opt.step()
        if epoch % 10 == 0 or epoch == epochs:
            model.eval()
            with torch.no_grad():
                pred = model(x, graph).argmax(1)
            val = float((pred[split.val] == labels[split.val]).float().mean())
            if val > best_val:
                best_val, best_test = val, float((pred[split.test] == labels[split.test]).float().mean())
    return best_test


if __name__ == "__main__":
    main()

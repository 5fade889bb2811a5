"""Does direction help? Scan the charge first, train at the charge it suggests, then look at the filters.

Task. The freight network of tutorial 01 (generated, invented; see tutorials/freight.py): depots
in four tiers, lanes weighted by monthly volume, the tier known for 10 % of the depots (20 % in the small ``--quick`` network). Before
building a model, ask the data whether the *direction* of the lanes carries the signal.

1. Scan. ``phasorgraph.scan_charges`` builds fixed (untrained) magnetic Chebyshev features at
   each charge q from 0 (direction ignored) to 0.25, fits a small regularized logistic model on
   the same cross-validation folds for every charge, and compares each charge with q = 0. The
   gain comes with a 95 % interval (Nadeau-Bengio corrected t) and a direction-permutation
   p-value (the same scan on copies of the network whose lanes point either way at random).
   It uses only the known labels and takes seconds.
2. Train. A two-layer MagneticFilter model whose charges are learned, starting at the charge the
   scan suggests, against the same model at q = 0 (a symmetric filter: the direction thrown
   away).
3. Look. ``phasorgraph.filter_response`` evaluates each trained polynomial filter over the
   spectrum [0, 2] of the magnetic Laplacian: which frequencies each layer passes (low = smooth
   over the lanes, high = changing between neighbouring depots). ``plot_filter_response``
   draws them.

Phase. As in tutorial 01 the magnetic phase is ``"sign"`` (2 pi q sign(A - A^T)): the volumes
are tens of pallets, and the ``"difference"`` phase would wrap around the circle.

Cautions. The same scan applied to relations between people (payments, messages, contracts)
tells you whether *who initiates* predicts an attribute; such models can infer sensitive
attributes and encode bias. Obtain consent, follow applicable privacy law and ethics review.
A scan on generated data says nothing about a real network; run it on your own.

Usage: python tutorials/06_does_direction_help.py [--quick] [--seed S] [--no-plot]
"""

from __future__ import annotations

import time

import torch
from torch import nn

import phasorgraph as pg
from phasorgraph import data

import _common as C
import freight

HIDDEN = 16
ORDER = 2
PHASE = "sign"


class Magnetic(nn.Module):
    """Two MagneticFilters, modReLU, then real and imaginary parts and a linear head."""

    def __init__(self, fin, classes, *, charge, learned):
        super().__init__()
        q = pg.nn.LearnedCharge(start=charge) if learned else charge  # each layer learns its own
        self.conv1 = pg.nn.MagneticFilter(fin, HIDDEN, ORDER, charge=q, phase=PHASE)
        self.act1 = pg.nn.ModReLU(HIDDEN)
        self.conv2 = pg.nn.MagneticFilter(HIDDEN, HIDDEN, ORDER, charge=q, phase=PHASE)
        self.act2 = pg.nn.ModReLU(HIDDEN)
        self.head = nn.Sequential(pg.nn.ComplexToReal("cartesian"), nn.Linear(2 * HIDDEN, classes))

    def forward(self, x, graph):
        z = self.act1(self.conv1(x, graph))
        return self.head(self.act2(self.conv2(z, graph)))


def main(argv=None) -> None:
    args = C.parse_args(__doc__, argv)
    C.banner("06 does direction help: scan the charge, train, look at the filters", args)
    t_start = time.perf_counter()
    # quick: a small network, so a fifth of the tiers is known (10 % of 300 depots is too few to decide)
    depots, known_share, epochs, runs = (300, 0.2, 30, 1) if args.quick else (1000, 0.1, 100, 3)
    charges = [0.0, 0.05, 0.15, 0.25] if args.quick else None  # None: the default grid 0 .. 0.25
    net = freight.freight_network(depots, seed=args.seed)
    print("network:", net.describe())
    graph, tiers = net.graph, net.tier
    x = torch.cat([net.features, torch.ones(graph.num_nodes, 1)], dim=1)
    split = data.split_nodes(tiers, train=known_share, val=0.1, seed=args.seed)
    known = torch.full_like(tiers, -1)
    known[split.train] = tiers[split.train]  # the scan sees only the labels a model would train on

    # 1. scan ---------------------------------------------------------------------------------
    print(f"\n-- 1. scan: {len(split.train)} known tiers, features {', '.join(freight.FEATURE_NAMES)}")
    t0 = time.perf_counter()
    scan = pg.scan_charges(graph, net.features, known, charges=charges, phase=PHASE, seed=args.seed)
    print(scan)
    print(f"(scan took {time.perf_counter() - t0:.1f} s)")
    start = scan.suggested_charge

    # 2. train --------------------------------------------------------------------------------
    print(f"\n-- 2. train: learned charges from the suggested start q = {start:g}, against q = 0")
    models = {f"Magnetic, learned from q = {start:g}": dict(charge=start, learned=True),
              "Magnetic, q = 0 (symmetric)": dict(charge=0.0, learned=False)}
    results, trained = {}, {}
    for name, kw in models.items():
        accs, learned_q = [], []
        for run in range(runs):
            seed = args.seed + run
            run_split = data.split_nodes(tiers, train=known_share, val=0.1, seed=seed) if run else split
            torch.manual_seed(seed)
            model = Magnetic(x.shape[1], 4, **kw)
            res = C.train_classifier(model, lambda: model(x, graph), tiers, run_split.train, run_split.val,
                                     run_split.test, epochs=epochs, eval_every=10,
                                     log_every=(epochs // 3 if run == 0 else 0), name=name)
            accs.append(res["test"])
            learned_q.append([float(model.conv1.charge.detach()), float(model.conv2.charge.detach())])
            if run == 0:
                trained[name] = model
        q_text = " / ".join(f"{sum(q[i] for q in learned_q) / runs:.3f}" for i in range(2))
        results[name] = (C.mean_std(accs), q_text)
    C.print_table(f"Tier classification, test accuracy over {runs} run(s) ({graph.num_nodes} depots, "
                  f"{epochs} epochs; chance 0.25)", ["model", "test accuracy", "charge q (layer 1 / 2)"],
                  [(n, a, q) for n, (a, q) in results.items()])
    print(f"\nscan verdict: {scan.verdict}")

    # 3. look ---------------------------------------------------------------------------------
    best = trained[next(iter(models))]
    print("\n-- 3. filter responses of the learned model: norm of the gain matrix over the spectrum")
    rows = []
    for label, layer in (("layer 1", best.conv1), ("layer 2", best.conv2)):
        r = pg.filter_response(layer, points=5)
        rows.append([label, f"{float(r.charges[0]):.3f}"] + [f"{v:.2f}" for v in r.norm[0].tolist()])
    C.print_table("gain norm at eigenvalue lambda of L(q) (0 = smooth over the lanes, 2 = alternating)",
                  ["layer", "charge q"] + [f"lambda = {v:g}" for v in (0, 0.5, 1, 1.5, 2)], rows)
    print(f"\nmachine: {C.machine_line()}")
    print(f"total time {time.perf_counter() - t_start:.1f} s")

    plt = C.maybe_plot(args)
    if plt is not None:
        C.OUTPUT.mkdir(parents=True, exist_ok=True)
        print(f"plots written to {scan.plot(C.OUTPUT / '06_charge_scan.png')} and "
              f"{pg.plot_filter_response(best.conv1, C.OUTPUT / '06_filter_response.png')}")


if __name__ == "__main__":
    main()

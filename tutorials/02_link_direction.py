"""Lanes of a generated freight network: which way does an unseen lane run, and does it exist?

Task. Hold out 10 % (validation) and 20 % (test) of the lanes of the generated freight network
(tutorials/freight.py) with ``phasorgraph.data.split_link_orientation`` and
``split_link_presence``; the held-out lanes are removed from ``train_graph`` in both
directions, so no operator the model sees contains them.

* which way (``split_link_orientation``): for a held-out one-way lane {u, v}, is it u -> v or
  v -> u? (Pairs (u, v) of the true direction have label 1, their reverses label 0; lanes
  with traffic both ways are not part of this question.)
* is there a lane (``split_link_presence``): is there a lane between u and v at all (either
  way)? Negatives are depot pairs with no lane, as many as the positives.

Model. Node embeddings z (complex, N x 24) from two MagneticFilter layers (order 2, modReLU)
on ``train_graph`` with the features of tutorial 01, and a pair scorer: an MLP on
[Re z_u, Im z_u, Re z_v, Im z_v, Re(z_u conj z_v), Im(z_u conj z_v)]. The last block flips
sign when u and v swap, so the scorer can read direction from phase differences. We compare
charge q = 0 (the magnetic Laplacian is then the normalized Laplacian of the symmetrized
graph: no direction in the operator) against a charge learned from 0.05. Both use
``phase="sign"`` (see tutorial 01 for why, with volumes as weights).

Results: test accuracy (logit > 0) and test AUC (computed with the rank formula in
tutorials/_common.py, numpy only), mean +- std over 3 runs, at the epoch of the best
validation AUC.

Cautions. Link prediction on networks of people or firms (who pays, calls or supplies whom)
can reveal relations and sensitive attributes that were never disclosed and can encode bias;
obtain consent, follow applicable privacy law and ethics review. A predicted lane is a
hypothesis to check, not a decision.

Usage: python tutorials/02_link_direction.py [--quick] [--seed S]
"""

from __future__ import annotations

import time

import torch
from torch import nn
import torch.nn.functional as F

import phasorgraph as pg
from phasorgraph import data

import _common as C
import freight

HIDDEN = 24
ORDER = 2


class LaneModel(nn.Module):
    """Magnetic node encoder and an MLP pair scorer."""

    def __init__(self, fin, *, charge):
        super().__init__()
        kw = dict(charge=charge, phase="sign")
        self.conv1 = pg.nn.MagneticFilter(fin, HIDDEN, ORDER, **kw)
        self.act1 = pg.nn.ModReLU(HIDDEN)
        self.conv2 = pg.nn.MagneticFilter(HIDDEN, HIDDEN, ORDER, **kw)
        self.act2 = pg.nn.ModReLU(HIDDEN)
        self.to_real = pg.nn.ComplexToReal("cartesian")
        self.scorer = nn.Sequential(nn.Linear(6 * HIDDEN, 2 * HIDDEN), nn.ReLU(), nn.Linear(2 * HIDDEN, 1))

    def embed(self, x, graph):
        return self.act2(self.conv2(self.act1(self.conv1(x, graph)), graph))

    def score(self, z, pairs):
        zu, zv = z[pairs[0]], z[pairs[1]]
        cross = zu * zv.conj()
        feats = torch.cat([self.to_real(zu), self.to_real(zv), self.to_real(cross)], dim=1)
        return self.scorer(feats).squeeze(1)

    def charges(self):
        return [float(q) for q in torch.cat([self.conv1.charge.detach().reshape(-1),
                                               self.conv2.charge.detach().reshape(-1)])]


def train_lanes(model, x, split, *, epochs, lr=0.01, weight_decay=5e-4, eval_every=5, log_every=0, name=""):
    """Full-batch training on the train pairs with binary cross-entropy; model selection on val AUC."""
    opt = torch.optim.Adam(model.parameters(), lr=lr, weight_decay=weight_decay)
    graph = split.train_graph
    train_y = split.train.labels.to(torch.float32)
    best = {"val_auc": -1.0}
    t0 = time.perf_counter()
    for epoch in range(1, epochs + 1):
        model.train()
        opt.zero_grad()
        logits = model.score(model.embed(x, graph), split.train.pairs)
        loss = F.binary_cross_entropy_with_logits(logits, train_y)
        loss.backward()
        opt.step()
        loss = loss.detach()
        if epoch % eval_every == 0 or epoch == epochs:
            model.eval()
            with torch.no_grad():
                z = model.embed(x, graph)
                val = model.score(z, split.val.pairs)
                test = model.score(z, split.test.pairs)
            val_auc = C.auc(val.numpy(), split.val.labels.numpy())
            if val_auc > best["val_auc"]:
                best = {"val_auc": val_auc, "epoch": epoch,
                        "test_auc": C.auc(test.numpy(), split.test.labels.numpy()),
                        "test_acc": float(((test > 0).long() == split.test.labels).float().mean())}
            if log_every and (epoch % log_every == 0 or epoch == epochs):
                print(f"    {name} epoch {epoch:4d}/{epochs}  loss {float(loss):.3f}  val AUC {val_auc:.3f}  "
                      f"q {', '.join(f'{q:.3f}' for q in model.charges())}  {time.perf_counter() - t0:5.1f} s",
                      flush=True)
    best["seconds"] = time.perf_counter() - t0
    best["charges"] = model.charges()
    return best


def main(argv=None) -> None:
    args = C.parse_args(__doc__, argv)
    C.banner("02 link direction and existence on freight lanes", args)
    t_start = time.perf_counter()
    missing = C.missing_layer("MagneticFilter", "ModReLU", "ComplexToReal")
    if missing is not None:
        print(f"phasorgraph.nn.{missing} is not available: this tutorial needs it; nothing to run")
        return
    depots, epochs, runs = (300, 30, 1) if args.quick else (1200, 100, 3)
    net = freight.freight_network(depots, seed=args.seed)
    print("network:", net.describe())
    x = torch.cat([net.features, torch.ones(net.num_depots, 1)], dim=1)

    variants = {"charge 0 (no direction)": dict(charge=0.0),
                "charge learned from 0.05": dict(charge=pg.nn.LearnedCharge(start=0.05))}
    rows = []
    questions = {"which way": data.split_link_orientation, "is there a lane": data.split_link_presence}
    for question, split_lanes in questions.items():
        for name, kw in variants.items():
            print(f"\n-- {question}: {name}")
            res = []
            for run in range(runs):
                seed = args.seed + run
                split = split_lanes(net.graph, val_fraction=0.1, test_fraction=0.2, seed=seed)
                if run == 0:
                    print(f"    split: {len(split.train)} train / {len(split.val)} val / {len(split.test)} test "
                          f"pairs; train_graph has {split.train_graph.num_edges} of {net.graph.num_edges} lanes")
                torch.manual_seed(seed)
                model = LaneModel(x.shape[1], **kw)
                r = train_lanes(model, x, split, epochs=epochs, log_every=(epochs // 4 if run == 0 else 0),
                                name="run 1")
                print(f"    run {run + 1}: test AUC {r['test_auc']:.3f}, accuracy {r['test_acc']:.3f} "
                      f"(best val epoch {r['epoch']}, {r['seconds']:.1f} s)", flush=True)
                res.append(r)
            q = "0 fixed" if not isinstance(kw["charge"], pg.nn.LearnedCharge) else " / ".join(
                f"{sum(r['charges'][i] for r in res) / len(res):.3f}" for i in range(2))
            rows.append((question, name, C.mean_std([r["test_auc"] for r in res]),
                         C.mean_std([r["test_acc"] for r in res]), q, C.count_parameters(model),
                         f"{sum(r['seconds'] for r in res) / len(res):.1f}"))
    C.print_table(f"Held-out lanes, test metrics over {runs} run(s) ({net.num_depots} depots, {epochs} epochs; "
                  f"chance: AUC 0.5, accuracy 0.5)",
                  ["question", "model", "test AUC", "test accuracy", "q (layer 1 / 2)", "parameters", "train s/run"], rows,
                  left=2)
    print(f"\nmachine: {C.machine_line()}")
    print(f"total time {time.perf_counter() - t_start:.1f} s")


if __name__ == "__main__":
    main()

"""Drop-in: an existing plain PyTorch MLP on node features gains one direction-aware layer.

Task. The tier classification of tutorial 01 (generated freight network, tutorials/freight.py;
tier known for 10 % of the depots). A team already has a plain ``torch.nn`` model: an MLP on
each depot's own features (log floor area, log staff count). We add one layer from the package
in front of it, a MagneticFilter that reads the shipment lanes (``phase="sign"``, charge 0.25,
see tutorial 01), turn its complex output into real features with ComplexToReal, and leave the
rest of the model, the loss, the optimizer and the training loop as they were. The script
prints the whole change as a diff of the two classes and the test accuracy before and after
(mean +- std over 3 runs).

No framework and no data class: the graph is a ``phasorgraph.DirectedGraph`` built once from
the edge list, passed to ``forward`` next to the features.

Cautions. Adding relational information makes predictions depend on whom an entity is
connected to; on networks of people or firms that can infer sensitive attributes and carry
bias along the edges. Obtain consent, follow applicable privacy law and ethics review;
predictions are not decisions.

Usage: python tutorials/05_drop_in.py [--quick] [--seed S]
"""

from __future__ import annotations

import difflib
import inspect
import time

import torch
from torch import nn

import phasorgraph as pg
from phasorgraph import data

import _common as C
import freight


class DepotClassifier(nn.Module):
    def __init__(self, fin, hidden, classes):
        super().__init__()
        self.body = nn.Sequential(nn.Linear(fin, hidden), nn.ReLU(),
                                  nn.Linear(hidden, hidden), nn.ReLU())
        self.head = nn.Linear(hidden, classes)

    def forward(self, x):
        return self.head(self.body(x))


class DepotClassifierWithLanes(nn.Module):
    def __init__(self, fin, hidden, classes):
        super().__init__()
        self.lanes = pg.nn.MagneticFilter(fin, hidden, order=2, charge=0.25, phase="sign")
        self.to_real = pg.nn.ComplexToReal()
        self.body = nn.Sequential(nn.Linear(2 * hidden, hidden), nn.ReLU(),
                                  nn.Linear(hidden, hidden), nn.ReLU())
        self.head = nn.Linear(hidden, classes)

    def forward(self, x, graph):
        return self.head(self.body(self.to_real(self.lanes(x, graph))))


def show_change() -> None:
    before = inspect.getsource(DepotClassifier).replace("DepotClassifier(", "Model(").splitlines()
    after = inspect.getsource(DepotClassifierWithLanes).replace("DepotClassifierWithLanes(", "Model(").splitlines()
    print("The whole change (before -> after):")
    for line in difflib.unified_diff(before, after, "before.py", "after.py", lineterm="", n=8):
        print("    " + line)
    print("    # and in the training loop: model(x)  ->  model(x, graph), with")
    print("    # graph = phasorgraph.DirectedGraph.from_edges(source, target, weight=volume, num_nodes=N)")


def main(argv=None) -> None:
    args = C.parse_args(__doc__, argv)
    C.banner("05 drop-in: one package layer in front of an existing MLP", args)
    t_start = time.perf_counter()
    show_change()
    missing = C.missing_layer("MagneticFilter", "ComplexToReal")
    depots, epochs, runs = (200, 20, 1) if args.quick else (1000, 100, 3)
    net = freight.freight_network(depots, seed=args.seed)
    print("\nnetwork:", net.describe())
    graph, labels = net.graph, net.tier
    x = torch.cat([net.features, torch.ones(graph.num_nodes, 1)], dim=1)
    models = {"before: MLP on features": (DepotClassifier, lambda m: m(x))}
    if missing is None:
        models["after: + MagneticFilter"] = (DepotClassifierWithLanes, lambda m: m(x, graph))
    else:
        print(f"phasorgraph.nn.{missing} is not available: the 'after' model is left out")
    rows = []
    for name, (cls, call) in models.items():
        print(f"\n-- {name}")
        accs, secs = [], []
        for run in range(runs):
            seed = args.seed + run
            split = data.split_nodes(labels, train=0.1, val=0.1, seed=seed)
            torch.manual_seed(seed)
            model = cls(x.shape[1], 32, 4)
            res = C.train_classifier(model, lambda: call(model), labels, split.train, split.val, split.test,
                                     epochs=epochs, eval_every=10, log_every=(epochs // 4 if run == 0 else 0),
                                     name="run 1")
            accs.append(res["test"])
            secs.append(res["seconds"])
            print(f"    run {run + 1}: test acc {res['test']:.3f} ({res['seconds']:.1f} s)", flush=True)
        rows.append((name, C.mean_std(accs), C.count_parameters(model), f"{sum(secs) / len(secs):.1f}"))
    C.print_table(f"Tier classification before and after the change ({graph.num_nodes} depots, {epochs} epochs, "
                  f"{runs} run(s); chance 0.25)", ["model", "test accuracy", "parameters", "train s/run"], rows)
    print(f"\nmachine: {C.machine_line()}")
    print(f"total time {time.perf_counter() - t_start:.1f} s")


if __name__ == "__main__":
    main()

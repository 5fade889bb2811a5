"""Over-smoothing: Dirichlet energy of node features against depth, low-pass against band-pass stacks.

Task. Stack graph layers on the generated freight network (tutorials/freight.py) and watch
how much variation between neighbouring depots survives. The measure is the Dirichlet
energy E(h) = tr(h^T (D - A_s) h) = sum over lanes {u, v} of A_s[u, v] ||h_u - h_v||^2
(``spectral.dirichlet_energy`` with ``operators.combinatorial_laplacian``), relative to the
degree-weighted size of the features, sum_u d_u ||h_u||^2. The ratio lies in [0, 2], is about
1 for features unrelated to the graph, and is 0 exactly when every channel is constant on
each connected part of the network. Deep stacks of
low-pass layers drive it to 0, a known failure called over-smoothing (Li, Han and Wu 2018;
Oono and Suzuki 2020): every depot then looks like its neighbours, and the tiers can no
longer be told apart.

Weights. The lanes' volumes are divided by their mean volume. The renormalized adjacency adds
a self-loop of weight 1 to every depot; with raw volumes (tens of pallets) that self-loop is
negligible next to the lanes, and since deliveries run from one tier to the next the lane
graph is close to bipartite (tiers 0, 2 against 1, 3), so A_hat has eigenvalues near -1 and
keeps alternating components alive (try ``--raw-volumes``).

Stacks (width 16, freshly initialized, ReLU between layers, no biases, so that a constant
bias does not by itself make the features constant; mean over 3 initializations):

* lazy diffusion alone, h <- T h with T = (I + D^-1/2 A_s D^-1/2) / 2 (no weights: what
  the operator itself does);
* RenormalizedFilter layers (one A_hat product and a linear map each, Kipf & Welling 2017);
* BandMix layers: low-pass A_hat^k channels and band-pass |Psi_j h| channels mixed by
  attention (Min et al. 2020);
* band-pass scattering layers: DiffusionScattering (order 1, J = 2, no outer low-pass, learned
  mixing to 16 channels), whose paths are h itself and the wavelet moduli |Psi_j h|.

Results: a table of the ratio by depth ("dead" where ReLU has zeroed every feature) and, with matplotlib, a log-scale plot
(tutorials/output/04_oversmoothing.png). No training is involved: this is a property of the
architecture at initialization; training can slow or speed the decay. The RenormalizedFilter
stack levels off a little above 0 rather than at 0 because the vector that A_hat keeps is
proportional to sqrt(d + 1), not constant; features along it are still the same for every
depot up to its degree. A stack can also "die": once a ReLU zeroes every feature, nothing
is left to measure.

Usage: python tutorials/04_oversmoothing.py [--quick] [--seed S] [--no-plot] [--raw-volumes]
"""

from __future__ import annotations

import time

import torch
from torch import nn

import phasorgraph as pg
from phasorgraph import operators, spectral

import _common as C
import freight

WIDTH = 16


class Stack(nn.Module):
    """``depth`` layers made by ``make(fin, fout)``, ReLU between them; forward(x, graph_or_op)."""

    def __init__(self, make, fin, depth, relu=True):
        super().__init__()
        self.layers = nn.ModuleList([make(fin if i == 0 else WIDTH, WIDTH) for i in range(depth)])
        self.relu = relu

    def forward(self, x, arg, record=None):
        h = x
        for i, layer in enumerate(self.layers):
            h = layer(h, arg)
            if self.relu and i < len(self.layers) - 1:
                h = torch.relu(h)
            if record is not None:
                record(i + 1, h)
        return h


class Propagate(nn.Module):
    """h <- T h, no parameters (the first call widens the input to WIDTH by repetition)."""

    def __init__(self, fin, fout):
        super().__init__()
        self.fin = fin

    def forward(self, h, op):
        if h.shape[1] != WIDTH:
            h = h.repeat(1, WIDTH // h.shape[1] + 1)[:, :WIDTH]
        return op @ h


class ScatteringLayer(nn.Module):
    def __init__(self, fin, fout):
        super().__init__()
        self.scatter = pg.nn.DiffusionScattering(fin, scales=2, order=1, out_channels=fout, bias=False, lowpass=False)

    def forward(self, h, T):
        return self.scatter(h, T)


def main(argv=None) -> None:
    def options(parser):
        parser.add_argument("--raw-volumes", action="store_true", help="keep the raw volumes as weights")

    args = C.parse_args(__doc__, argv, options)
    C.banner("04 over-smoothing: Dirichlet energy against depth", args)
    t_start = time.perf_counter()
    depots, max_depth, inits = (200, 8, 1) if args.quick else (1000, 32, 3)
    depths = [d for d in (1, 2, 4, 8, 16, 32) if d <= max_depth]
    net = freight.freight_network(depots, seed=args.seed)
    print("network:", net.describe())
    # volumes divided by their mean: the self-loop of the renormalization trick then weighs as
    # much as a typical lane (with raw volumes it is negligible; see the note in the docstring)
    w = net.graph.weight
    graph = pg.DirectedGraph(net.graph.source, net.graph.target, w / w.mean(), net.graph.num_nodes)
    if args.raw_volumes:
        graph = net.graph
        print("raw volumes as weights")
    lap = operators.combinatorial_laplacian(graph)
    degree = torch.zeros(graph.num_nodes, dtype=torch.float64)
    degree.index_add_(0, graph.source, graph.weight / 2).index_add_(0, graph.target, graph.weight / 2)
    degree = degree.float().unsqueeze(1)  # d = row sums of A_s
    T = operators.diffusion(graph)
    x = torch.cat([net.features, torch.randn(graph.num_nodes, 1)], dim=1)  # two features and a noise column

    def ratio(h):
        norm = float((degree * h * h).sum())
        return float("nan") if norm == 0 else float(spectral.dirichlet_energy(h, lap)) / norm

    print(f"input features: E / sum d ||x||^2 = {ratio(x):.3f}")
    stacks = {
        "T^k h (diffusion, no weights)": (None, lambda f, o: Propagate(f, o), T, False),
        "RenormalizedFilter + ReLU": ("RenormalizedFilter", lambda f, o: pg.nn.RenormalizedFilter(f, o, bias=False), graph, True),
        "BandMix + ReLU": ("BandMix", lambda f, o: pg.nn.BandMix(f, o, low_pass_steps=(1, 2), scales=2, bias=False), graph, True),
        "scattering layers + ReLU": ("DiffusionScattering", lambda f, o: ScatteringLayer(f, o), T, True),
    }
    def cell(v, fmt=".2e"):
        return "dead" if v != v else format(v, fmt)  # NaN: every feature is 0 after a ReLU

    table = {}
    for name, (needs, make, arg, relu) in stacks.items():
        if needs is not None and C.missing_layer(needs) is not None:
            print(f"-- {name}: not available (phasorgraph.nn.{needs} is missing); left out")
            continue
        t0 = time.perf_counter()
        values = torch.zeros(inits, max(depths))
        for init in range(inits):
            torch.manual_seed(args.seed + init)
            model = Stack(make, x.shape[1], max(depths), relu=relu)
            with torch.no_grad():
                model(x, arg, record=lambda d, h, init=init: values[init, d - 1].fill_(ratio(h)))
        table[name] = values.nanmean(0)
        shown = ", ".join(f"{d}: {cell(float(table[name][d - 1]), '.3g')}" for d in depths)
        print(f"-- {name}: E/(d-weighted norm) by depth {shown}  ({time.perf_counter() - t0:.1f} s)", flush=True)

    rows = [(name, *[cell(float(v[d - 1])) for d in depths]) for name, v in table.items()]
    C.print_table(f"Normalized Dirichlet energy E(h) / sum d ||h||^2 after d layers ({graph.num_nodes} depots; "
                  f"input {ratio(x):.3f}; mean over {inits} initialization(s))",
                  ["stack"] + [f"d={d}" for d in depths], rows)
    print(f"\nmachine: {C.machine_line()}")
    print(f"total time {time.perf_counter() - t_start:.1f} s")

    plt = C.maybe_plot(args)
    if plt is not None and table:
        fig, ax = plt.subplots(figsize=(6.5, 4))
        for name, v in table.items():
            ax.semilogy(range(1, max(depths) + 1), v.clamp(min=1e-12).numpy(), marker="o", ms=3, label=name)
        ax.set_xlabel("depth (layers)")
        ax.set_ylabel("E(h) / sum d ||h||^2")
        ax.set_title("over-smoothing on the freight network")
        ax.legend(fontsize=8)
        path = C.save_figure(fig, "04_oversmoothing.png")
        print(f"plot written to {path}")


if __name__ == "__main__":
    main()

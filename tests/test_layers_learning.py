"""Learning test: a learned charge finds edge direction that charge 0 cannot see.

The graph (generated here, two blocks of 60 nodes): every unordered node pair is joined with
the same probability 0.15, inside and across blocks, so both blocks have the same edge
density and the same degree law. Inside a block each edge points either way with
probability 1/2; across blocks 90% of the edges point from block 0 to block 1 (the 90% is a
rule of thumb for a clearly directed flow: common practice, no source). Every node gets the
same constant feature 1.

Why charge 0 must fail: at q = 0 the layer sees only As, and with constant features its
output is a function of As alone. The law of As is the same for both blocks (swapping the
block labels leaves it unchanged), so no such function separates them better than chance
beyond sampling noise. Why q > 0 works: a cross edge u -> v gets phase exp(+i 2 pi q) seen
from u and exp(-i 2 pi q) seen from v, so Im(L(q) 1) is mostly negative on block 0 and mostly
positive on block 1 (about 0.8 sin(2 pi q) per cross edge against zero-mean noise from the
inside edges): a sign a ReLU head reads off directly. The gradient also pushes a small
charge up, because a larger phase separates the blocks more (up to q = 1/4).
"""

import numpy as np
import pytest
import torch
from torch import nn

from phasorgraph import DirectedGraph
from phasorgraph.nn import ComplexToReal, LearnedCharge, MagneticFilter


BLOCK = 60
DENSITY = 0.15
FORWARD_SHARE = 0.9
STEPS = 200


def two_block_flow_graph(block: int, density: float, forward_share: float, seed: int):
    """(DirectedGraph, labels): equal densities everywhere, cross edges mostly block 0 -> block 1."""
    rng = np.random.default_rng(seed)
    n = 2 * block
    labels = np.repeat([0, 1], block)
    iu, ju = np.triu_indices(n, k=1)              # iu < ju, so iu is in block 0 on cross pairs
    keep = rng.random(iu.size) < density
    u, v = iu[keep], ju[keep]
    cross = labels[u] != labels[v]
    forward = np.where(cross, rng.random(u.size) < forward_share, rng.random(u.size) < 0.5)
    src, dst = np.where(forward, u, v), np.where(forward, v, u)
    return DirectedGraph.from_edges(src, dst, num_nodes=n), torch.as_tensor(labels)


def train(seed: int, charge: float, learn: bool):
    graph, labels = two_block_flow_graph(BLOCK, DENSITY, FORWARD_SHARE, seed)
    torch.manual_seed(seed)
    order = torch.randperm(2 * BLOCK)
    train_idx, test_idx = order[:BLOCK], order[BLOCK:]
    filt = MagneticFilter(1, 8, order=1, charge=LearnedCharge(start=charge) if learn else charge)
    head = nn.Sequential(ComplexToReal("cartesian"), nn.ReLU(), nn.Linear(16, 2))
    opt = torch.optim.Adam(list(filt.parameters()) + list(head.parameters()), lr=0.05)
    x = torch.ones(2 * BLOCK, 1)
    for _ in range(STEPS):
        opt.zero_grad()
        loss = nn.functional.cross_entropy(head(filt(x, graph))[train_idx], labels[train_idx])
        loss.backward()
        opt.step()
    with torch.no_grad():
        pred = head(filt(x, graph)).argmax(dim=1)
    accuracy = float((pred[test_idx] == labels[test_idx]).float().mean())
    return accuracy, float(filt.charge.detach())


def test_generated_graph_has_the_intended_structure():
    graph, labels = two_block_flow_graph(BLOCK, DENSITY, FORWARD_SHARE, seed=0)
    s, t = graph.source.numpy(), graph.target.numpy()
    y = labels.numpy()
    cross = y[s] != y[t]
    share = float(np.mean(y[s[cross]] == 0))
    assert 0.85 < share < 0.95                                     # ~90% of cross edges go 0 -> 1
    inside0 = np.sum((y[s] == 0) & (y[t] == 0))
    inside1 = np.sum((y[s] == 1) & (y[t] == 1))
    pairs = BLOCK * (BLOCK - 1) / 2
    # equal densities: both blocks within 3 binomial standard deviations of DENSITY
    sd = np.sqrt(pairs * DENSITY * (1 - DENSITY))
    assert abs(inside0 - pairs * DENSITY) < 3 * sd and abs(inside1 - pairs * DENSITY) < 3 * sd


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_learned_charge_separates_blocks_that_charge_zero_cannot(seed):
    accuracy, charge = train(seed, charge=0.02, learn=True)
    assert accuracy >= 0.85, accuracy
    assert charge > 0.04, charge
    blind, _ = train(seed, charge=0.0, learn=False)
    assert blind <= 0.65, blind

"""Hypothesis strategies for directed weighted graphs, charges and features (shared by tests).

Graphs are small (at most ``max_nodes``, default 12) so dense references stay cheap. Every
strategy can produce the awkward cases on purpose:

* isolated nodes (some nodes never receive an edge, and they are scattered by a permutation);
* self-loops;
* duplicate edges (an edge's weight split over two copies, summed back by DirectedGraph);
* reciprocal edges (u -> v and v -> u, with equal or different weights).

Public names:

* ``edge_lists(...)`` -> ``(source, target, weight, num_nodes)`` as numpy arrays (raw input,
  before DirectedGraph canonicalizes it);
* ``directed_graphs(min_nodes=0, max_nodes=12, max_edges=None, unit_weights=False,
  self_loops=True)`` -> DirectedGraph; ``unit_weights=True`` keeps every (summed) weight in
  (0, 1], the regime where ``phase="difference"`` is meant to be used;
* ``charges(min_value=0.0, max_value=0.5)`` -> float charge q;
* ``features(num_nodes, width=3, complex_values=False)`` -> float64 / complex128 tensor;
* ``graphs_and_permutations(...)`` -> (DirectedGraph, perm tensor).
"""

from __future__ import annotations

import numpy as np
import pytest
import torch
from hypothesis import strategies as st

from phasorgraph import DirectedGraph

__all__ = ["edge_lists", "directed_graphs", "charges", "features", "graphs_and_permutations"]

#: positive weights: kept within four orders of magnitude so float64 tolerances stay meaningful
_WEIGHT_MIN, _WEIGHT_MAX = 1e-2, 1e2


@st.composite
def edge_lists(draw, min_nodes: int = 0, max_nodes: int = 12, max_edges: int | None = None,
               unit_weights: bool = False, self_loops: bool = True):
    """Raw ``(source, target, weight, num_nodes)`` numpy arrays with duplicates and reciprocals."""
    n = draw(st.integers(min_nodes, max_nodes))
    if n == 0:
        return (np.zeros(0, np.int64), np.zeros(0, np.int64), np.zeros(0, np.float64), 0)
    # edges only among the first `active` nodes; the rest are isolated (scattered below)
    active = draw(st.integers(1, n))
    limit = 3 * active if max_edges is None else max_edges
    node = st.integers(0, active - 1)
    pairs = draw(st.lists(st.tuples(node, node), max_size=limit))
    if not self_loops:
        pairs = [(u, v) for u, v in pairs if u != v]
    weight = (st.floats(0.05, 1.0, allow_nan=False, allow_infinity=False) if unit_weights
              else st.floats(_WEIGHT_MIN, _WEIGHT_MAX, allow_nan=False, allow_infinity=False))
    edges = [(u, v, draw(weight)) for u, v in pairs]
    # reciprocal edges: for some one-way edges add v -> u (same weight or a fresh one)
    recip = []
    for u, v, w in edges:
        if u != v and draw(st.integers(0, 3)) == 0:
            recip.append((v, u, w if draw(st.booleans()) else draw(weight)))
    edges += recip
    # duplicates: split an edge's weight over two copies (the sum is unchanged, so unit
    # weights stay in (0, 1] and DirectedGraph must add them back)
    out = []
    for u, v, w in edges:
        if draw(st.integers(0, 4)) == 0:
            f = draw(st.floats(0.1, 0.9))
            out += [(u, v, w * f), (u, v, w * (1 - f))]
        else:
            out.append((u, v, w))
    if out and draw(st.booleans()):
        order = draw(st.permutations(range(len(out))))
        out = [out[i] for i in order]
    relabel = np.asarray(draw(st.permutations(range(n))), dtype=np.int64)
    src = relabel[np.asarray([e[0] for e in out], dtype=np.int64)] if out else np.zeros(0, np.int64)
    dst = relabel[np.asarray([e[1] for e in out], dtype=np.int64)] if out else np.zeros(0, np.int64)
    w = np.asarray([e[2] for e in out], dtype=np.float64)
    return src, dst, w, n


def directed_graphs(min_nodes: int = 0, max_nodes: int = 12, max_edges: int | None = None,
                    unit_weights: bool = False, self_loops: bool = True):
    """Strategy for :class:`DirectedGraph` (see the module docstring for what it covers)."""
    return edge_lists(min_nodes, max_nodes, max_edges, unit_weights, self_loops).map(
        lambda e: DirectedGraph(e[0], e[1], e[2], e[3])
    )


def charges(min_value: float = 0.0, max_value: float = 0.5):
    """Strategy for a charge q in [min_value, max_value] (default the full range [0, 0.5])."""
    special = [v for v in (0.0, 0.25, 0.5) if min_value <= v <= max_value]
    anywhere = st.floats(min_value, max_value, allow_nan=False, allow_infinity=False)
    return st.one_of(st.sampled_from(special), anywhere) if special else anywhere


@st.composite
def features(draw, num_nodes: int, width: int = 3, complex_values: bool = False):
    """A float64 (or complex128) feature tensor (num_nodes, width), seeded by hypothesis."""
    seed = draw(st.integers(0, 2**31 - 1))
    gen = torch.Generator().manual_seed(seed)
    x = torch.randn(num_nodes, width, generator=gen, dtype=torch.float64)
    if complex_values:
        x = torch.complex(x, torch.randn(num_nodes, width, generator=gen, dtype=torch.float64))
    return x


@st.composite
def graphs_and_permutations(draw, min_nodes: int = 1, max_nodes: int = 12, unit_weights: bool = False):
    """A DirectedGraph and a permutation tensor of its nodes."""
    g = draw(directed_graphs(min_nodes=min_nodes, max_nodes=max_nodes, unit_weights=unit_weights))
    perm = torch.as_tensor(draw(st.permutations(range(g.num_nodes))), dtype=torch.int64)
    return g, perm


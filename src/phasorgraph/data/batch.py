r"""Many graphs as one block-diagonal graph, with per-graph readouts and mini-batch iteration.

Graph i's nodes become rows ``node_offsets[i] .. node_offsets[i + 1] - 1`` of the batch, so its
adjacency is the i-th diagonal block of :math:`\mathrm{blockdiag}(A_1, \dots, A_G)`. Every
operator in :mod:`phasorgraph.operators` is built from per-node degrees and per-edge values
only, so the operator of the batch graph is the block diagonal of the operators of its parts.
"""

from __future__ import annotations

import numbers
from typing import Any, Iterator, Optional, Sequence

import numpy as np
import torch

from .._checks import check_flag
from ..errors import GraphInputError, value_text
from ..graph import DirectedGraph
from .._groups import group_max, group_mean, group_sum
from ._pairs import seeded_generator

__all__ = ["GraphBatch", "iterate_batches"]

_REDUCE = {"mean": group_mean, "sum": group_sum, "max": group_max}


def _batch_names(graphs: Sequence[DirectedGraph]):
    """Node names of the batch graph: (graph position, name) pairs, or None if no graph has names.

    A graph without names contributes its node numbers as names. One pass over the nodes, only
    when some graph has names.
    """
    if all(g.node_names is None for g in graphs):
        return None
    total = sum(g.num_nodes for g in graphs)

    def pairs():
        for i, g in enumerate(graphs):
            names = range(g.num_nodes) if g.node_names is None else g.node_names.tolist()
            for name in names:
                yield (i, name)

    return np.fromiter(pairs(), dtype=object, count=total)


class GraphBatch:
    r"""Several DirectedGraphs joined as one block-diagonal graph, and per-graph readouts.

    Args:
        graphs: a sequence of DirectedGraphs (graphs with 0 nodes are allowed; they read out
            as zeros). Build with :meth:`from_graphs`.

    Attributes:
        graph (DirectedGraph): the block-diagonal graph on N = sum of the node counts.
        graph_index (Tensor): int64 (N,), the graph each node belongs to.
        num_graphs (int): G.
        num_nodes_per_graph (Tensor): int64 (G,).
        node_offsets (Tensor): int64 (G + 1,), first node of each graph, then N.

    When some of the graphs have ``node_names`` (e.g. from ``DirectedGraph.from_table``), the
    batch graph's ``node_names`` are ``(graph position, name)`` pairs (a graph without names
    contributes its node numbers), so ``batch.graph.index_of([(1, "depot_7")])`` finds a node.

    Example:
        >>> from phasorgraph.data import directed_cycle, out_star
        >>> b = GraphBatch.from_graphs([directed_cycle(3), out_star(4)])
        >>> b.graph.num_nodes, b.graph_index.tolist()
        (7, [0, 0, 0, 1, 1, 1, 1])
        >>> b.readout(torch.ones(7, 2), reduce="sum").tolist()
        [[3.0, 3.0], [4.0, 4.0]]
    """

    __slots__ = ("graph", "graph_index", "num_graphs", "num_nodes_per_graph", "node_offsets")

    def __init__(self, graphs: Sequence[DirectedGraph]):
        if isinstance(graphs, DirectedGraph) or not isinstance(graphs, Sequence):
            raise GraphInputError(
                f"graphs must be a list or tuple of DirectedGraph; got {type(graphs).__name__}"
            )
        for i, g in enumerate(graphs):
            if not isinstance(g, DirectedGraph):
                raise GraphInputError(f"graphs[{i}] must be a DirectedGraph; got {type(g).__name__}")
        sizes = torch.tensor([g.num_nodes for g in graphs], dtype=torch.int64)
        offsets = torch.zeros(len(graphs) + 1, dtype=torch.int64)
        offsets[1:] = torch.cumsum(sizes, 0)
        edges = torch.tensor([g.num_edges for g in graphs], dtype=torch.int64)
        shift = torch.repeat_interleave(offsets[:-1], edges)
        cat = lambda parts: torch.cat(parts) if parts else torch.empty(0)  # noqa: E731
        src = cat([g.source for g in graphs]).to(torch.int64) + shift
        dst = cat([g.target for g in graphs]).to(torch.int64) + shift
        weight = cat([g.weight for g in graphs]).to(torch.float64)
        self.graph = DirectedGraph(src, dst, weight, int(offsets[-1]), node_names=_batch_names(graphs))
        self.graph_index = torch.repeat_interleave(torch.arange(len(graphs)), sizes)
        self.num_graphs = len(graphs)
        self.num_nodes_per_graph = sizes
        self.node_offsets = offsets

    @classmethod
    def from_graphs(cls, graphs: Sequence[DirectedGraph]) -> "GraphBatch":
        """Join ``graphs`` (in order) into one block-diagonal batch."""
        return cls(graphs)

    def __len__(self) -> int:
        return self.num_graphs

    def __repr__(self) -> str:
        return f"GraphBatch(num_graphs={self.num_graphs}, num_nodes={self.graph.num_nodes}, num_edges={self.graph.num_edges})"

    def _check_rows(self, x: Any) -> torch.Tensor:
        n = self.graph.num_nodes
        if not isinstance(x, torch.Tensor) or x.dim() < 1 or x.shape[0] != n:
            raise GraphInputError(
                f"x must be a tensor with one row per node of the batch ({n}), shape (N, ...); "
                f"got {tuple(x.shape) if isinstance(x, torch.Tensor) else type(x).__name__}"
            )
        return x

    def readout(self, x: torch.Tensor, reduce: str = "mean") -> torch.Tensor:
        r"""Per-graph reduction of node rows: :math:`r_i = \mathrm{reduce}_{u \in G_i} x_u`.

        Vectorized per-graph reductions (``index_add`` / ``scatter_reduce``), no loop over graphs. A
        graph with 0 nodes reads out as 0 for every reduction (never NaN or -inf).

        Args:
            x: (N, ...) node features (complex allowed for "mean" and "sum").
            reduce: "mean" (default), "sum" or "max" (real x only).

        Shape:
            (N, ...) -> (G, ...).
        """
        x = self._check_rows(x)
        if not isinstance(reduce, str) or reduce not in _REDUCE:
            raise GraphInputError(f"reduce must be one of {tuple(_REDUCE)}; got {value_text(reduce)}")
        return _REDUCE[reduce](x, self.graph_index, self.num_graphs)

    def split_by_graph(self, x: torch.Tensor) -> list[torch.Tensor]:
        """Split node rows back into one tensor per graph (views, in batch order): G tensors (n_i, ...).

        Example:
            >>> from phasorgraph.data import directed_cycle
            >>> b = GraphBatch.from_graphs([directed_cycle(2), directed_cycle(3)])
            >>> [tuple(p.shape) for p in b.split_by_graph(torch.zeros(5, 4))]
            [(2, 4), (3, 4)]
        """
        x = self._check_rows(x)
        return list(torch.split(x, self.num_nodes_per_graph.tolist(), dim=0))


def iterate_batches(graphs: Sequence[DirectedGraph], targets: Optional[torch.Tensor] = None,
                    batch_size: int = 32, shuffle: bool = False,
                    seed: Any = None) -> Iterator[tuple[GraphBatch, Optional[torch.Tensor]]]:
    r"""One pass over ``graphs`` in mini-batches: yields ``(GraphBatch, targets[batch])``.

    The last batch may be smaller. With ``shuffle=True`` the order is a random permutation
    drawn from ``seed``; pass a numpy Generator (and keep it) to get a new order each epoch, or
    an int for the same order every time.

    Args:
        graphs: sequence of G DirectedGraphs.
        targets: None or a tensor (G, ...) of per-graph targets (yielded as None when None).
        batch_size: graphs per batch, >= 1 (default 32).
        shuffle: shuffle the order (default False: the given order).
        seed: None, an int or a numpy Generator (used only when shuffling).

    Example:
        >>> from phasorgraph.data import directed_cycle
        >>> gs = [directed_cycle(n) for n in range(3, 8)]
        >>> [len(b) for b, _ in iterate_batches(gs, None, batch_size=2)]
        [2, 2, 1]
    """
    if isinstance(graphs, DirectedGraph) or not isinstance(graphs, Sequence):
        raise GraphInputError(f"graphs must be a list or tuple of DirectedGraph; got {type(graphs).__name__}")
    if isinstance(batch_size, bool) or not isinstance(batch_size, numbers.Integral) or batch_size < 1:
        raise GraphInputError(f"batch_size must be an integer >= 1; got {batch_size!r}")
    if targets is not None and (not isinstance(targets, torch.Tensor) or targets.dim() < 1 or targets.shape[0] != len(graphs)):
        raise GraphInputError(
            f"targets must be None or a tensor with one row per graph ({len(graphs)}); "
            f"got {tuple(targets.shape) if isinstance(targets, torch.Tensor) else type(targets).__name__}"
        )
    for i, g in enumerate(graphs):
        if not isinstance(g, DirectedGraph):
            raise GraphInputError(f"graphs[{i}] must be a DirectedGraph; got {type(g).__name__}")
    order = seeded_generator(seed).permutation(len(graphs)) if check_flag("shuffle", shuffle) else np.arange(len(graphs))
    return _batches(graphs, targets, order, int(batch_size))


def _batches(graphs, targets, order, batch_size):
    for start in range(0, len(graphs), batch_size):  # loop over batches, not nodes
        idx = order[start:start + batch_size]
        batch = GraphBatch([graphs[i] for i in idx])
        yield batch, (None if targets is None else targets[torch.as_tensor(idx, dtype=torch.int64)])

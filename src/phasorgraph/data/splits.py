r"""Seeded, leak-free splits: stratified node splits, and link splits for two questions.

:func:`split_link_presence` asks whether two nodes are linked at all; :func:`split_link_orientation`
asks which way a link runs.

A *link* is an unordered pair {u, v} of distinct nodes joined by an edge in at least one
direction. Link splits hold out whole links: every edge of a held-out link is removed from
``train_graph`` in both directions, so no operator built from ``train_graph`` sees it.
Self-loops are never held out and stay in ``train_graph``.
"""

from __future__ import annotations

import numbers
from dataclasses import dataclass
from typing import Any

import numpy as np
import scipy.sparse as sp
import torch

from ..errors import GraphInputError, value_text
from ..graph import DirectedGraph
from ._pairs import index_from_pair, num_pairs, pair_from_index, sample_avoiding, sample_distinct, seeded_generator

__all__ = ["NodeSplit", "LinkSet", "LinkSplit", "split_nodes", "split_link_presence", "split_link_orientation"]


@dataclass(frozen=True)
class NodeSplit:
    """Disjoint sorted int64 node-index tensors ``train``, ``val``, ``test`` covering every labeled node."""

    train: torch.Tensor
    val: torch.Tensor
    test: torch.Tensor


@dataclass(frozen=True)
class LinkSet:
    """Node pairs to score: ``pairs`` (2, K) int64 as (source row, target row), ``labels`` (K,) int64 in {0, 1}."""

    pairs: torch.Tensor
    labels: torch.Tensor

    def __len__(self) -> int:
        return int(self.labels.numel())


@dataclass(frozen=True)
class LinkSplit:
    """``train_graph`` (held-out links removed in both directions) and the ``train``, ``val``, ``test`` LinkSets."""

    train_graph: DirectedGraph
    train: LinkSet
    val: LinkSet
    test: LinkSet


def _fraction(name: str, value: Any) -> float:
    if isinstance(value, bool) or not isinstance(value, numbers.Real) or not (0.0 <= float(value) < 1.0):
        raise GraphInputError(f"{name} must be a fraction in [0, 1); got {value!r}")
    return float(value)


def _fractions(first: str, a: Any, second: str, b: Any, *, allow_one: bool) -> tuple[float, float]:
    fa, fb = _fraction(first, a), _fraction(second, b)
    if fa + fb > 1.0 or (not allow_one and fa + fb >= 1.0):
        bound = "at most 1" if allow_one else "below 1 (the training split must keep something)"
        raise GraphInputError(f"{first} + {second} must be {bound}; got {fa} + {fb} = {fa + fb}")
    return fa, fb


# ---------------------------------------------------------------------- nodes
def split_nodes(labels: Any, train: float = 0.6, val: float = 0.2, seed: Any = None, *,
                labeled: Any = None) -> NodeSplit:
    r"""Stratified random node split: within each class the same fractions go to train and val.

    For a class with :math:`n_c` nodes, ``round(train * n_c)`` random nodes of that class go to
    train, ``round(val * n_c)`` (capped at what is left) to val, and the rest to test; so test
    gets about ``1 - train - val`` of every class. Classes are the distinct values of
    ``labels`` (integers >= 0). Unlabeled nodes, marked by the label -1 or by ``labeled`` False,
    are in no split (as from :func:`phasorgraph.tables.node_labels`).

    Args:
        labels: (N,) integer class of each node (tensor, array or list); -1 for no label.
        train: fraction for training, in [0, 1) (default 0.6).
        val: fraction for validation, in [0, 1) (default 0.2); ``train + val <= 1``.
        seed: None, an int or a numpy Generator.
        labeled: keyword-only; None (default) or a boolean mask (N,): only nodes where it is
            True (and whose label is not -1) are split.

    Returns:
        NodeSplit with sorted int64 tensors ``train``, ``val``, ``test``; together they hold
        every labeled node exactly once.

    Example:
        >>> s = split_nodes([0, 0, 0, 0, 1, 1, 1, 1, -1], train=0.5, val=0.25, seed=0)
        >>> len(s.train), len(s.val), len(s.test), 8 in torch.cat([s.train, s.val, s.test])
        (4, 2, 2, False)
    """
    if isinstance(labels, torch.Tensor) and labels.device.type == "meta":
        raise GraphInputError("labels is on the meta device, which holds shapes but no values; pass labels with values")
    try:
        y = labels.detach().cpu().numpy() if isinstance(labels, torch.Tensor) else np.asarray(labels)
    except (ValueError, TypeError) as exc:
        raise GraphInputError(f"labels must be a 1-D array of integer classes; got {value_text(labels)}") from exc
    if y.ndim != 1 or (y.size and y.dtype.kind not in "iu"):
        raise GraphInputError(f"labels must be a 1-D array of integer classes; got shape {y.shape}, dtype {y.dtype}")
    if y.size and int(y.min()) < -1:
        k = int(np.argmin(y))
        raise GraphInputError(
            f"labels must be classes >= 0, or -1 for an unlabeled node; got {int(y[k])} at position {k}"
        )
    keep = y != -1
    if labeled is not None:
        mask = labeled.detach().cpu().numpy() if isinstance(labeled, torch.Tensor) else np.asarray(labeled)
        if mask.dtype != np.bool_ or mask.shape != y.shape:
            raise GraphInputError(
                f"labeled must be None or a boolean mask with one entry per label, shape {y.shape}; "
                f"got shape {mask.shape}, dtype {mask.dtype}"
            )
        keep &= mask
    fr_train, fr_val = _fractions("train", train, "val", val, allow_one=True)
    rng = seeded_generator(seed)
    nodes = np.flatnonzero(keep)  # the labeled nodes; positions below index into it
    y = y[nodes]
    n = y.size
    _, cls = np.unique(y, return_inverse=True)
    cls = cls.reshape(-1)
    order = rng.permutation(n)
    order = order[np.argsort(cls[order], kind="stable")]  # random order within each class
    counts = np.bincount(cls, minlength=int(cls.max()) + 1 if n else 0)
    starts = np.concatenate([[0], np.cumsum(counts)[:-1]]) if n else np.empty(0, dtype=np.int64)
    c_sorted = cls[order]
    rank = np.arange(n) - starts[c_sorted]
    n_train = np.rint(fr_train * counts).astype(np.int64)
    n_val = np.minimum(np.rint(fr_val * counts).astype(np.int64), counts - n_train)
    in_train = rank < n_train[c_sorted]
    in_val = ~in_train & (rank < (n_train + n_val)[c_sorted])
    part = lambda mask: torch.as_tensor(np.sort(nodes[order[mask]]).astype(np.int64))  # noqa: E731
    return NodeSplit(part(in_train), part(in_val), part(~in_train & ~in_val))


# ---------------------------------------------------------------------- links
def _link_set(pos_src, pos_dst, neg_src, neg_dst) -> LinkSet:
    pairs = np.stack([np.concatenate([pos_src, neg_src]), np.concatenate([pos_dst, neg_dst])]).astype(np.int64, copy=False)
    labels = np.concatenate([np.ones(pos_src.size, np.int64), np.zeros(neg_src.size, np.int64)])
    return LinkSet(torch.as_tensor(pairs), torch.as_tensor(labels))


def _three_way(rng, items: np.ndarray, first: int, second: int):
    """A uniformly random split of ``items`` into parts of sizes first, second and the rest.

    The rest keeps the order of ``items`` (sequential memory access on large arrays).
    """
    picked = sample_distinct(rng, items.size, first + second)
    picked = picked[rng.permutation(picked.size)]
    rest = np.ones(items.size, dtype=bool)
    rest[picked] = False
    return items[picked[:first]], items[picked[first:]], items[rest]


def _reverse_edges(src: np.ndarray, dst: np.ndarray, n: int) -> np.ndarray:
    """For each canonical edge u -> v, the index of the edge v -> u, or -1 if there is none.

    The canonical edges (sorted by source, then target) are exactly the CSR order of A, so A is
    built without sorting, with value ``index + 1``; A^T (a counting sort in scipy) carries the
    index of each reverse edge, and the elementwise products with the other's pattern (sorted
    merges) align both on the edges that have a reverse. O(N + E), no random-access search.
    """
    e = src.size
    rev = np.full(e, -1, dtype=np.int64)
    if e == 0:
        return rev
    indptr = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(np.bincount(src, minlength=n), out=indptr[1:])
    a = sp.csr_matrix((np.arange(1, e + 1, dtype=np.float64), dst, indptr), shape=(n, n))
    at = a.T.tocsr()
    pattern_a, pattern_at = a.copy(), at.copy()
    pattern_a.data[:] = 1.0
    pattern_at.data[:] = 1.0
    own = a.multiply(pattern_at).tocsr()  # index + 1 of each edge that has a reverse
    other = at.multiply(pattern_a).tocsr()  # index + 1 of that reverse, same positions
    rev[own.data.astype(np.int64) - 1] = other.data.astype(np.int64) - 1
    return rev


def _check_split_sizes(one_way_only: bool, eligible: int, reciprocal: int, *parts) -> None:
    """Refuse a link split that would come out empty where the caller asked for something."""
    if eligible == 0:
        if one_way_only:
            raise GraphInputError(
                f"graph has no one-way link, so split_link_orientation has nothing to split: "
                f"{reciprocal} reciprocal links (excluded from it) and no other link between distinct nodes"
            )
        raise GraphInputError("graph has no link between distinct nodes, so there is nothing to split")
    for name, fraction, count in parts:
        if fraction > 0 and count == 0:
            raise GraphInputError(
                f"{name} = {fraction} of the {eligible} eligible links rounds to 0 links; raise {name} to "
                f"at least {0.5 / eligible:.3g} (one link) or pass 0 for an empty split"
            )
    held = sum(count for _, _, count in parts)
    if held >= eligible:
        raise GraphInputError(
            f"val_fraction and test_fraction take all {eligible} eligible links after rounding, leaving none "
            f"for training; lower them"
        )


def split_link_presence(graph: DirectedGraph, val_fraction: float = 0.1, test_fraction: float = 0.1,
                        seed: Any = None) -> LinkSplit:
    r"""Leak-free link split for the question "is there a link between u and v, either way?".

    Every link is eligible (an unordered pair of distinct nodes with an edge in at least one
    direction). Of the L links a uniformly random ``round(val_fraction * L)`` go to val,
    another ``round(test_fraction * L)`` to test and the rest to train (in graph edge order;
    shuffle the training pairs before mini-batching). ``train_graph`` is ``graph`` without
    every edge of the val and test links, in both directions (weights of the kept edges
    unchanged, same ``num_nodes`` and ``node_names``); self-loops always stay.

    Each split holds one positive pair (label 1) per link, oriented as an edge of the graph
    (u, v) with u -> v present (for a reciprocal link, the lower id first), followed by as many
    negative pairs (label 0): pairs of distinct nodes with no edge in either direction in the
    *full* graph, drawn uniformly without repetition across all splits and oriented at random.
    The train split's positives are the links kept in ``train_graph``.

    Args:
        graph: the full DirectedGraph.
        val_fraction: fraction of links for validation (default 0.1).
        test_fraction: fraction of links for testing (default 0.1); the two sum below 1.
        seed: None, an int or a numpy Generator.

    Returns:
        LinkSplit with ``train_graph`` and LinkSets ``train``, ``val``, ``test``, each
        ``pairs`` (2, K) int64 and ``labels`` (K,) int64.

    Raises:
        GraphInputError: instead of returning an empty split, when the graph has no link, when
            a positive fraction rounds to 0 links, or when rounding leaves no training link;
            when the graph has fewer non-adjacent pairs than the negatives asked for.

    Notes:
        Negatives are drawn exactly and vectorized: unordered pairs are numbered by an integer
        bijection and negatives are uniform ranks in the complement of the links.

    Example:
        >>> from phasorgraph.data import random_out_graph
        >>> s = split_link_presence(random_out_graph(30, 2, seed=0), 0.1, 0.1, seed=0)
        >>> int(s.val.labels.sum()) * 2 == len(s.val)
        True
    """
    return _split_links(graph, False, val_fraction, test_fraction, seed)


def split_link_orientation(graph: DirectedGraph, val_fraction: float = 0.1, test_fraction: float = 0.1,
                           seed: Any = None) -> LinkSplit:
    r"""Leak-free link split for the question "which way does the link between u and v run?".

    Only one-way links are eligible: **reciprocal links (u -> v and v -> u both present) are
    left out of the question** and stay in ``train_graph``. Of the L one-way links a uniformly
    random ``round(val_fraction * L)`` go to val, another ``round(test_fraction * L)`` to test
    and the rest to train; ``train_graph`` is ``graph`` without the val and test links (same
    ``num_nodes`` and ``node_names``; self-loops stay). For each one-way edge u -> v of a split
    the pair (u, v) has label 1 and the pair (v, u) label 0 (positives first, then their
    reverses).

    Args:
        graph: the full DirectedGraph.
        val_fraction: fraction of one-way links for validation (default 0.1).
        test_fraction: fraction of one-way links for testing (default 0.1); the two sum below 1.
        seed: None, an int or a numpy Generator.

    Returns:
        LinkSplit with ``train_graph`` and LinkSets ``train``, ``val``, ``test``.

    Raises:
        GraphInputError: instead of returning an empty split, when the graph has no one-way
            link (all links reciprocal), when a positive fraction rounds to 0 links, or when
            rounding leaves no training link.

    Example:
        >>> from phasorgraph.data import random_out_graph
        >>> s = split_link_orientation(random_out_graph(30, 2, seed=0), 0.1, 0.1, seed=0)
        >>> int(s.val.labels.sum()) * 2 == len(s.val)
        True
    """
    return _split_links(graph, True, val_fraction, test_fraction, seed)


def _split_links(graph: DirectedGraph, one_way_only: bool, val_fraction: float, test_fraction: float,
                 seed: Any) -> LinkSplit:
    """The two link splits; ``one_way_only`` selects the orientation question."""
    if not isinstance(graph, DirectedGraph):
        raise GraphInputError(f"graph must be a DirectedGraph; got {type(graph).__name__}")
    fr_val, fr_test = _fractions("val_fraction", val_fraction, "test_fraction", test_fraction, allow_one=False)
    rng = seeded_generator(seed)
    n = graph.num_nodes
    src, dst = graph.source.numpy(), graph.target.numpy()
    off = src != dst
    rev = _reverse_edges(src, dst, n)
    has_rev = off & (rev >= 0)
    # one representative edge per link: the edge itself for a one-way link, the low -> high
    # edge of a reciprocal link
    link_edges = np.flatnonzero(off & ((src < dst) | ~has_rev))
    reciprocal = has_rev[link_edges]
    link_src, link_dst = src[link_edges], dst[link_edges]
    eligible = np.flatnonzero(~reciprocal) if one_way_only else np.arange(link_edges.size)
    n_val = int(round(fr_val * eligible.size))
    n_test = int(round(fr_test * eligible.size))
    _check_split_sizes(one_way_only, eligible.size, int(reciprocal.sum()), ("val_fraction", fr_val, n_val),
                       ("test_fraction", fr_test, n_test))
    val_ids, test_ids, train_ids = _three_way(rng, eligible, n_val, n_test)

    held = np.concatenate([val_ids, test_ids])
    keep = np.ones(src.size, dtype=bool)
    keep[link_edges[held]] = False
    keep[rev[link_edges[held[reciprocal[held]]]]] = False  # the other direction of reciprocal links
    train_graph = graph.subgraph_edges(torch.as_tensor(keep))

    if one_way_only:
        def sets(ids):
            s, d = link_src[ids], link_dst[ids]
            return _link_set(s, d, d, s)
        return LinkSplit(train_graph, sets(train_ids), sets(val_ids), sets(test_ids))

    sizes = [train_ids.size, val_ids.size, test_ids.size]
    total = sum(sizes)
    if total:
        taken = np.sort(index_from_pair(link_src, link_dst, n))
        free = num_pairs(n) - taken.size
        if total > free:
            raise GraphInputError(
                f"graph has only {free} non-adjacent node pairs but split_link_presence needs {total} "
                f"negatives (one per link); the graph is too dense for balanced negatives"
            )
        neg_val, neg_test, neg_train = _three_way(rng, sample_avoiding(rng, num_pairs(n), total, taken),
                                                  sizes[1], sizes[2])
        neg = np.concatenate([neg_train, neg_val, neg_test])
        nlo, nhi = pair_from_index(neg, n)
        flip = rng.random(neg.size) < 0.5
        neg_src, neg_dst = np.where(flip, nhi, nlo), np.where(flip, nlo, nhi)
    else:
        neg_src = neg_dst = np.empty(0, dtype=np.int64)
    bounds = np.cumsum([0] + sizes)
    out = []
    for ids, a, b in zip((train_ids, val_ids, test_ids), bounds[:-1], bounds[1:]):
        out.append(_link_set(link_src[ids], link_dst[ids], neg_src[a:b], neg_dst[a:b]))
    return LinkSplit(train_graph, *out)

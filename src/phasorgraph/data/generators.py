r"""Generated directed graphs: a directed block model and small named families.

Everything here is seeded through a :class:`numpy.random.Generator` (``seed`` may be None, an
int, or a Generator) and vectorized: edge counts are drawn per block pair from the binomial
law, then that many distinct node pairs are drawn at once; nothing allocates an N x N array
or loops over nodes or edges in Python.

Distinct node pairs are drawn exactly and uniformly by :mod:`phasorgraph.data._pairs` (shared
with the link splits).
"""

from __future__ import annotations

import math
import numbers
from typing import Any, Sequence

import numpy as np
import torch

from .._limits import check_node_count, physical_memory
from ..errors import GraphInputError, value_text
from ..graph import DirectedGraph
from ._pairs import index_from_pair, num_pairs, pair_from_index, seeded_generator, sample_avoiding, sample_distinct

__all__ = [
    "directed_block_model",
    "directed_cycle",
    "out_star",
    "in_star",
    "random_out_graph",
    "layered_flow_graph",
]

_TOL = 1e-9


# ---------------------------------------------------------------------- validation helpers

def _count(name: str, value: Any, minimum: int = 0) -> int:
    if isinstance(value, bool) or not isinstance(value, numbers.Integral) or int(value) < minimum:
        raise GraphInputError(f"{name} must be an integer >= {minimum}; got {value_text(value)}")
    return int(value)


def _node_count(name: str, value: Any, minimum: int = 1) -> int:
    """A node count n >= minimum whose per-node arrays fit in memory."""
    return check_node_count(_count(name, value, minimum), what="this generator", name=name)


def _probability(name: str, value: Any) -> float:
    if isinstance(value, bool) or not isinstance(value, numbers.Real) or not (0.0 <= float(value) <= 1.0):
        raise GraphInputError(f"{name} must be a probability in [0, 1]; got {value!r}")
    return float(value)


def _sizes(name: str, sizes: Any) -> np.ndarray:
    if isinstance(sizes, torch.Tensor):
        if sizes.device.type == "meta":
            raise GraphInputError(f"{name} is on the meta device, which holds shapes but no values")
        sizes = sizes.detach().cpu().numpy()
    try:
        arr = np.asarray(sizes)
    except (ValueError, TypeError) as exc:
        raise GraphInputError(
            f"{name} must be a 1-D sequence of non-negative integers; got {value_text(sizes)}") from exc
    if arr.ndim != 1 or arr.size == 0:
        raise GraphInputError(f"{name} must be a non-empty 1-D sequence of non-negative integers; got shape {arr.shape}")
    if arr.dtype.kind not in "iu" or (arr < 0).any():
        raise GraphInputError(f"{name} must hold non-negative integers; got {value_text(arr.tolist())}")
    if arr.dtype.kind == "u" and (arr >= 2 ** 62).any():
        raise GraphInputError(f"{name} must hold sizes below 2**62; got {value_text(arr.tolist())}")
    arr = arr.astype(np.int64)
    total = sum(int(v) for v in arr)  # Python ints: no overflow
    if total >= 2 ** 31:
        raise GraphInputError(
            f"{name} adds up to {total} nodes; the generators accept fewer than 2**31 nodes in all"
        )
    check_node_count(total, what="this generator", name=name)
    return arr


def _block_matrix(name: str, value: Any, blocks: int) -> np.ndarray:
    accepted = f"a probability or a ({blocks}, {blocks}) matrix of probabilities, one entry per block pair"
    if isinstance(value, torch.Tensor):
        if value.device.type == "meta" or value.is_complex() or value.layout != torch.strided:
            raise GraphInputError(f"{name} must be {accepted}; got a tensor of dtype {value.dtype} on {value.device}")
        value = value.detach().cpu().numpy()
    try:
        arr = np.asarray(value)
    except (ValueError, TypeError) as exc:  # ragged rows
        raise GraphInputError(
            f"{name} must be {accepted}; got {value_text(value)} (rows of different lengths?)"
        ) from exc
    if arr.dtype.kind not in "iufb":  # text, None, complex, objects: never cast silently
        raise GraphInputError(f"{name} must be {accepted} (real numbers); got {value_text(value)}")
    arr = arr.astype(np.float64)
    if arr.ndim == 0:
        arr = np.full((blocks, blocks), float(arr))
    if arr.shape != (blocks, blocks):
        raise GraphInputError(f"{name} must be a scalar or a ({blocks}, {blocks}) matrix, one entry per block pair; got shape {arr.shape}")
    if not np.all(np.isfinite(arr)):
        a, b = np.argwhere(~np.isfinite(arr))[0]
        raise GraphInputError(f"{name}[{a}, {b}] must be finite; got {arr[a, b]}")
    bad = np.argwhere((arr < 0) | (arr > 1))
    if bad.size:
        a, b = bad[0]
        raise GraphInputError(f"{name}[{a}, {b}] must be a probability in [0, 1]; got {arr[a, b]}")
    return arr


def _check_density(density: Any, blocks: int) -> np.ndarray:
    p = _block_matrix("density", density, blocks)
    bad = np.argwhere(np.abs(p - p.T) > _TOL)
    if bad.size:
        a, b = bad[0]
        raise GraphInputError(
            f"density must be symmetric (it is the probability of an edge between an unordered pair of "
            f"nodes); got density[{a}, {b}] = {p[a, b]} but density[{b}, {a}] = {p[b, a]}"
        )
    return p


def _check_flow(flow: Any, blocks: int) -> np.ndarray:
    f = _block_matrix("flow", flow, blocks)
    for a in range(blocks):  # loop over blocks, not nodes
        if abs(f[a, a] - 0.5) > _TOL:
            raise GraphInputError(
                f"flow[{a}, {a}] must be 0.5 (an edge inside a block points either way with equal "
                f"probability); got {f[a, a]}"
            )
    total = f + f.T
    bad = np.argwhere(np.abs(total - 1.0) > _TOL)
    if bad.size:
        a, b = bad[0]
        raise GraphInputError(
            f"flow[{a}, {b}] + flow[{b}, {a}] must equal 1 (an edge between blocks {a} and {b} points one "
            f"way or the other); got {f[a, b]} + {f[b, a]} = {total[a, b]}"
        )
    return f


def _block_edges(rng, sizes: np.ndarray, prob: np.ndarray, direction: np.ndarray):
    """Oriented edges (source, target) of the block model, written once into preallocated arrays."""
    offsets = np.concatenate([[0], np.cumsum(sizes)])
    a_ids, b_ids = np.triu_indices(sizes.size)  # block pairs a <= b
    na, nb = sizes[a_ids], sizes[b_ids]
    trials = np.where(a_ids == b_ids, na * (na - 1) // 2, na * nb)
    counts = rng.binomial(trials, prob[a_ids, b_ids])  # edge count of every block pair at once
    total = int(counts.sum())
    if 64 * total > physical_memory():  # source, target, pair indices, DirectedGraph copies
        raise GraphInputError(
            f"density draws {total} edges, more than this machine's memory can hold "
            f"({physical_memory() / 2 ** 30:.3g} GiB); lower density or the block sizes"
        )
    src = np.empty(total, dtype=np.int64)
    dst = np.empty(total, dtype=np.int64)
    pos = 0
    for a, b, m, k in zip(a_ids.tolist(), b_ids.tolist(), trials.tolist(), counts.tolist()):
        if k == 0:  # loop over block pairs only; all edge work is vectorized
            continue
        idx = sample_distinct(rng, m, k)
        if a == b:
            lo, hi = pair_from_index(idx, int(sizes[a]))
            lo += offsets[a]
            hi += offsets[a]
        else:
            lo, hi = np.divmod(idx, int(sizes[b]))
            lo += offsets[a]
            hi += offsets[b]
        forward = rng.random(k) < direction[a, b]
        np.copyto(src[pos:pos + k], np.where(forward, lo, hi))
        np.copyto(dst[pos:pos + k], np.where(forward, hi, lo))
        pos += k
    return src, dst


# ---------------------------------------------------------------------- block model
def directed_block_model(sizes: Sequence[int], density: Any, flow: Any, noise: float = 0.0,
                         seed: Any = None) -> tuple[DirectedGraph, torch.Tensor]:
    r"""Directed stochastic block model: density picks the edges, flow picks their direction.

    Nodes are numbered block by block (block 0 first). Each unordered pair of distinct nodes
    u in block a, v in block b is joined with probability ``density[a, b]``, independently;
    the edge then points a -> b with probability ``flow[a, b]`` and b -> a otherwise. So the
    number of edges between blocks a != b is Binomial(n_a n_b, density[a, b]) and inside block
    a Binomial(n_a (n_a - 1) / 2, density[a, a]). Then ``round(noise * E)`` extra edges (E the
    block-model edge count) join node pairs chosen uniformly among the pairs not yet joined,
    each pointing either way with probability 1/2. The result has no self-loops and no
    reciprocal edges; every weight is 1.

    Args:
        sizes: block sizes (n_1, ..., n_B), non-negative integers.
        density: a probability, or a symmetric (B, B) matrix of probabilities.
        flow: (B, B) matrix with ``flow[a, b] + flow[b, a] = 1`` off the diagonal and 0.5 on
            it (checked to 1e-9).
        noise: non-negative fraction of extra uniformly random edges (default 0).
        seed: None, an int or a numpy Generator (default None: fresh entropy).

    Returns:
        (graph, labels): a DirectedGraph on N = sum(sizes) nodes and the int64 block label of
        each node, shape (N,).

    Notes:
        Edge counts are drawn from the binomial law per block pair, then that many distinct
        pairs are drawn exactly (uniform over subsets of that size); dense blocks (more than
        half of the pairs present) are drawn through their complement. Time and memory are
        O(N + E) plus O(number of block pairs); there is no N x N array.

    Example:
        >>> g, y = directed_block_model([50, 50], 0.1, [[0.5, 0.9], [0.1, 0.5]], seed=0)
        >>> g.num_nodes, y.bincount().tolist()
        (100, [50, 50])
    """
    sizes_arr = _sizes("sizes", sizes)
    blocks = sizes_arr.size
    prob = _check_density(density, blocks)
    direction = _check_flow(flow, blocks)
    if isinstance(noise, bool) or not isinstance(noise, numbers.Real) or not math.isfinite(noise) or noise < 0:
        raise GraphInputError(f"noise must be a finite fraction >= 0 of the edge count; got {noise!r}")
    rng = seeded_generator(seed)
    n = int(sizes_arr.sum())
    src, dst = _block_edges(rng, sizes_arr, prob, direction)
    extra = int(round(float(noise) * src.size))
    if extra:
        free = num_pairs(n) - src.size
        if extra > free:
            raise GraphInputError(
                f"noise asks for {extra} extra edges but only {free} node pairs are not yet joined; "
                f"lower noise (accepted: noise * edges <= free pairs)"
            )
        taken = np.sort(index_from_pair(src, dst, n))
        nlo, nhi = pair_from_index(sample_avoiding(rng, num_pairs(n), extra, taken), n)
        flip = rng.random(extra) < 0.5
        src = np.concatenate([src, np.where(flip, nhi, nlo)])
        dst = np.concatenate([dst, np.where(flip, nlo, nhi)])
    labels = torch.as_tensor(np.repeat(np.arange(blocks, dtype=np.int64), sizes_arr))
    return DirectedGraph(torch.as_tensor(src), torch.as_tensor(dst), None, n), labels


# ---------------------------------------------------------------------- small families
def directed_cycle(n: int) -> DirectedGraph:
    r"""The directed cycle :math:`0 \to 1 \to \dots \to n - 1 \to 0`.

    For n >= 3 its normalized magnetic Laplacian has the closed-form spectrum
    :math:`1 - \cos(2\pi (k / n + q))`, k = 0..n-1. n = 1 is a self-loop and n = 2 a
    reciprocal pair.

    Args:
        n: number of nodes, >= 1.

    Example:
        >>> directed_cycle(4).target.tolist()
        [1, 2, 3, 0]
    """
    n = _node_count("n", n, 1)
    src = torch.arange(n)
    return DirectedGraph(src, (src + 1) % n, None, n)


def out_star(n: int) -> DirectedGraph:
    r"""A hub sending to every leaf: edges :math:`0 \to v` for v = 1..n-1 (n nodes in all).

    Example:
        >>> out_star(4).target.tolist()
        [1, 2, 3]
    """
    n = _node_count("n", n, 1)
    leaves = torch.arange(1, n)
    return DirectedGraph(torch.zeros_like(leaves), leaves, None, n)


def in_star(n: int) -> DirectedGraph:
    r"""Every leaf sending to the hub: edges :math:`v \to 0` for v = 1..n-1 (the reverse of :func:`out_star`).

    Example:
        >>> in_star(4).source.tolist()
        [1, 2, 3]
    """
    return out_star(n).reverse()


def random_out_graph(n: int, k: int, seed: Any = None) -> DirectedGraph:
    r"""Each node sends k edges to k distinct other nodes chosen uniformly (no self-loops).

    Every node has out-degree exactly k; in-degrees vary. The k targets of each node are a
    uniform k-subset of the other n - 1 nodes, drawn for all nodes at once with Floyd's
    algorithm (R. W. Floyd, "A sample of brilliance", CACM 1987): k vectorized steps, O(n k^2)
    work, no N x N array.

    Args:
        n: number of nodes, >= 1.
        k: out-degree, 0 <= k <= n - 1.
        seed: None, an int or a numpy Generator.

    Example:
        >>> g = random_out_graph(10, 3, seed=0)
        >>> torch.bincount(g.source, minlength=10).tolist() == [3] * 10
        True
    """
    n = _node_count("n", n, 1)
    k = _count("k", k, 0)
    if k > n - 1:
        raise GraphInputError(f"k must be at most n - 1 = {n - 1} (targets are distinct other nodes); got k = {k}")
    if 64 * n * k > physical_memory():
        raise GraphInputError(
            f"n * k = {n * k} edges is more than this machine's memory can hold "
            f"({physical_memory() / 2 ** 30:.3g} GiB); lower n or k"
        )
    rng = seeded_generator(seed)
    others = n - 1
    chosen = np.empty((n, k), dtype=np.int64)
    for step, j in enumerate(range(others - k, others)):  # Floyd: k steps, vectorized over nodes
        t = rng.integers(0, j + 1, size=n)
        seen = (chosen[:, :step] == t[:, None]).any(axis=1)
        chosen[:, step] = np.where(seen, j, t)
    src = np.repeat(np.arange(n, dtype=np.int64), k)
    offset = chosen.reshape(-1)
    dst = offset + (offset >= src)  # skip the node itself
    return DirectedGraph(torch.as_tensor(src), torch.as_tensor(dst), None, n)


def layered_flow_graph(layer_sizes: Sequence[int], forward_prob: float, back_prob: float = 0.0,
                       seed: Any = None) -> tuple[DirectedGraph, torch.Tensor]:
    r"""Nodes in ordered layers; edges mostly run forward from one layer to the next.

    For consecutive layers l and l + 1, each pair (u in layer l, v in layer l + 1) gets the
    edge u -> v with probability ``forward_prob`` and, independently, the edge v -> u with
    probability ``back_prob``. No edges inside a layer or between non-adjacent layers.
    (Think of depots feeding regional hubs feeding stores in a freight network.)

    Args:
        layer_sizes: nodes per layer, in order; non-negative integers.
        forward_prob: probability of each forward edge.
        back_prob: probability of each backward edge (default 0).
        seed: None, an int or a numpy Generator.

    Returns:
        (graph, layer): the graph and the int64 layer index of each node, shape (N,).

    Example:
        >>> g, layer = layered_flow_graph([3, 4, 2], 1.0, 0.0, seed=0)
        >>> g.num_edges, bool((layer[g.target] == layer[g.source] + 1).all())
        (20, True)
    """
    sizes = _sizes("layer_sizes", layer_sizes)
    p_fwd = _probability("forward_prob", forward_prob)
    p_back = _probability("back_prob", back_prob)
    rng = seeded_generator(seed)
    offsets = np.concatenate([[0], np.cumsum(sizes)])
    srcs, dsts = [], []
    for layer in range(sizes.size - 1):  # loop over layers only
        na, nb = int(sizes[layer]), int(sizes[layer + 1])
        m = na * nb
        for p, forward in ((p_fwd, True), (p_back, False)):
            idx = sample_distinct(rng, m, int(rng.binomial(m, p)) if m else 0)
            u, v = idx // max(nb, 1) + offsets[layer], idx % max(nb, 1) + offsets[layer + 1]
            srcs.append(u if forward else v); dsts.append(v if forward else u)
    src = np.concatenate(srcs) if srcs else np.empty(0, dtype=np.int64)
    dst = np.concatenate(dsts) if dsts else np.empty(0, dtype=np.int64)
    labels = torch.as_tensor(np.repeat(np.arange(sizes.size, dtype=np.int64), sizes))
    return DirectedGraph(torch.as_tensor(src), torch.as_tensor(dst), None, int(sizes.sum())), labels

r"""Flow-aware node clustering: spectral clustering on the normalized magnetic Laplacian.

Blocks of nodes that differ only in which way their edges run (block a mostly sends to block
b, which mostly sends to c) have the same symmetrized graph as a graph without blocks, so
spectral clustering of :math:`A_s` cannot find them. The phases of the magnetic Laplacian
:math:`L(q) = I - D^{-1/2} H(q) D^{-1/2}` carry the direction; its eigenvectors of the
smallest eigenvalues place nodes with the same flow pattern at the same phase.

:func:`adjusted_rand_index` compares two partitions (Hubert & Arabie 1985).
"""

from __future__ import annotations

import math
import numbers
from typing import Any, Optional

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla
import torch
from scipy.cluster.vq import kmeans2

from . import operators
from .errors import GraphInputError
from .graph import DirectedGraph

__all__ = ["cluster_nodes", "adjusted_rand_index"]

# below this many nodes the eigenvectors come from a dense eigh (small-graph path)
_DENSE_BELOW = 300
# k-means restarts; the partition of least within-cluster sum of squares is kept
_RESTARTS = 8
# ARPACK's tolerance for the Lanczos run: residual ||L u - theta u|| <= tol |2 - theta| (1 %)
_LANCZOS_TOL = 1e-2
# degree of the Chebyshev filter that polishes the Lanczos vectors afterwards
_FILTER_DEGREE = 6


def _check_num_clusters(num_clusters: Any, n: int) -> int:
    if isinstance(num_clusters, bool) or not isinstance(num_clusters, numbers.Integral) or not 1 <= num_clusters <= max(n, 1):
        raise GraphInputError(f"num_clusters must be an integer in [1, num_nodes = {n}]; got {num_clusters!r}")
    if n == 0:
        raise GraphInputError("graph has no nodes: there is nothing to cluster (accepted: num_nodes >= 1)")
    return int(num_clusters)


def _check_seed(seed: Any) -> np.random.Generator:
    if seed is None or isinstance(seed, np.random.Generator):
        return np.random.default_rng(seed)
    if isinstance(seed, bool) or not isinstance(seed, numbers.Integral) or seed < 0:
        raise GraphInputError(f"seed must be None, an integer >= 0 or a numpy Generator; got {seed!r}")
    return np.random.default_rng(int(seed))


def _to_scipy(op) -> sp.csr_matrix:
    m = op.matrix
    return sp.csr_matrix((m.values().numpy(), m.col_indices().numpy(), m.crow_indices().numpy()), shape=tuple(m.shape))


def _smallest_eigenvectors(lap, k: int, rng: np.random.Generator) -> np.ndarray:
    r"""Eigenvectors (N, k) of the k smallest eigenvalues of a normalized Laplacian L (a
    Hermitian :class:`~phasorgraph.SparseOperator` with spectrum in [0, 2]), as a basis of the
    span they make (k-means on the rows of U only sees the span: a unitary mix of the columns
    keeps every distance between rows).

    1. Lanczos (``scipy.sparse.linalg.eigsh``) on :math:`2I - L` for the k + 1 largest (the
       largest-magnitude end of a spectrum converges much faster than the smallest-algebraic
       end), to a 1 % residual: eigenvectors inside the dense bulk of a sparse graph's spectrum
       converge slowly at tighter tolerances, and there any vector of the bulk is as good as
       another (bench/clustering.py: 35 products instead of 250 at 1e5 nodes).
    2. Polish: a Chebyshev filter of degree 6 on the block of k + 1 vectors (native fused
       products), :math:`T_6((L - e) / c)` with :math:`[e - c, e + c] = [\theta_{k+1}, 2]`, the
       spectrum above the extra (guard) Ritz value: it leaves that part at most at 1 and
       multiplies an eigenvector at :math:`\lambda < \theta_{k+1}` by
       :math:`\cosh(6\, \mathrm{arccosh}((e - \lambda) / c))`, so a wanted eigenvector
       separated from the rest of the spectrum comes out orders of magnitude more accurate
       (about 80 times at :math:`\lambda` = 0.33 below a bulk from 0.59), then Rayleigh-Ritz
       on the filtered block (Zhou & Saad, Chebyshev-filtered subspace iteration, 2007).
    """
    n = lap.num_rows
    if n < _DENSE_BELOW or k + 1 >= n - 1:
        _, vecs = np.linalg.eigh(lap.to_dense().numpy())  # ascending eigenvalues; small graphs only
        return vecs[:, :k]
    mat = _to_scipy(lap)
    shifted = (sp.identity(n, dtype=mat.dtype, format="csr") * 2.0 - mat).tocsr()
    v0 = rng.standard_normal(n)
    if lap.is_complex:
        v0 = v0 + 1j * rng.standard_normal(n)
    p = k + 1
    vals, vecs = spla.eigsh(shifted, k=p, which="LA", v0=v0, ncv=min(n, max(2 * p + 1, 20)), tol=_LANCZOS_TOL)
    theta = 2.0 - vals
    order = np.argsort(theta)
    theta, block = theta[order], torch.from_numpy(np.ascontiguousarray(vecs[:, order]))
    low, high = float(theta[-1]), 2.0
    if _FILTER_DEGREE > 0 and high - low > 1e-8:
        e, c = (high + low) / 2, (high - low) / 2
        prev, cur = block, lap.matmul_add(block, alpha=1 / c, shift=-e / c)   # T0, T1 of (L - e) / c
        for _ in range(_FILTER_DEGREE - 1):
            prev, cur = cur, lap.matmul_add(cur, prev, alpha=2 / c, shift=-2 * e / c, beta=-1.0)
        block = torch.linalg.qr(cur).Q
    rayleigh = block.conj().T @ lap.matmul(block)
    w, v = torch.linalg.eigh((rayleigh + rayleigh.conj().T) / 2)
    return (block @ v[:, :k]).numpy()


def _embedding(vecs: np.ndarray) -> np.ndarray:
    """Rows [Re U, Im U], each scaled to unit length (rows of zeros stay zero)."""
    emb = np.concatenate([vecs.real, vecs.imag], axis=1) if np.iscomplexobj(vecs) else np.array(vecs, dtype=np.float64)
    norm = np.linalg.norm(emb, axis=1, keepdims=True)
    np.divide(emb, norm, out=emb, where=norm > 0)
    return emb


def _kmeans(emb: np.ndarray, k: int, rng: np.random.Generator) -> np.ndarray:
    best, best_cost = None, math.inf
    for _ in range(_RESTARTS):
        centers, labels = kmeans2(emb, k, minit="++", seed=rng)
        cost = float(((emb - centers[labels]) ** 2).sum())
        if cost < best_cost:
            best, best_cost = labels, cost
    return best


def cluster_nodes(graph: DirectedGraph, num_clusters: int, *, charge: float = 0.25, phase: str = "difference",
                  num_vectors: Optional[int] = None, seed: Optional[int] = None) -> torch.Tensor:
    r"""Cluster nodes by their flow pattern: spectral clustering on the magnetic Laplacian.

    1. :math:`L(q) = I - D^{-1/2} H(q) D^{-1/2}` (:func:`~phasorgraph.operators.magnetic_laplacian`),
       Hermitian with spectrum in [0, 2];
    2. :math:`U \in \mathbb{C}^{N \times m}`, the eigenvectors of its m smallest eigenvalues
       (m = ``num_vectors``, default ``num_clusters``; ``scipy.sparse.linalg.eigsh`` on
       :math:`2I - L(q)`, complex Hermitian Lanczos, to a 1 % residual, then a Chebyshev filter
       on the block that makes eigenvectors separated from the rest of the spectrum accurate;
       a dense ``numpy.linalg.eigh`` below 300 nodes);
    3. node v's row :math:`[\mathrm{Re}\, U_v, \mathrm{Im}\, U_v] \in \mathbb{R}^{2k}`, scaled
       to unit length (as in the normalized spectral clustering of Ng, Jordan & Weiss 2001);
    4. k-means with k = ``num_clusters`` on these rows (``scipy.cluster.vq.kmeans2``, k-means++ starts, the best of 8
       restarts by within-cluster sum of squares).

    Each eigenvector is fixed only up to a unit complex factor; that rotates each
    (Re, Im) pair of columns, which leaves distances between rows, and so the clusters, unchanged.
    With ``charge=0`` this is ordinary normalized spectral clustering of the symmetrized graph.

    Args:
        graph: a DirectedGraph with non-negative weights.
        num_clusters: k, an integer in [1, N].
        charge: q in [0, 0.5] (default 0.25: a one-way edge turns the phase by a quarter turn).
            Blocks around a directed cycle of m blocks line up best with q near 1/m.
        phase: "difference" (default) or "sign", as in :func:`~phasorgraph.operators.magnetic_adjacency`;
            use "sign" for weights that are volumes or counts.
        num_vectors: m, the number of eigenvectors (default None: ``num_clusters``). One
            complex eigenvector already places B blocks around a directed cycle at B phases
            when q = 1/B; asking for fewer vectors is faster on large sparse graphs, where
            the eigenvectors beyond the informative ones lie in the dense bulk of the spectrum
            (bench/clustering.py measures both: 3.1 s against 8.0 s at 1e5 nodes).
        seed: None (fresh entropy), an integer or a numpy Generator: the Lanczos start vector
            and the k-means starts.

    Returns:
        (N,) int64 tensor of cluster ids in [0, k). Isolated nodes have an all-zero row and
        land in whichever cluster centre is nearest the origin.

    Notes:
        Time O(iterations x (nnz + N k)) and memory O(nnz + N k): no N x N matrix except the
        dense path under 300 nodes. Clustering people by whom they send to or receive from can
        single out groups; the caution of the README applies.

    References:
        M. Fanuel, C. M. Alaiz, J. A. K. Suykens, Magnetic eigenmaps for community detection
        in directed networks, Phys. Rev. E 2017; A. Y. Ng, M. I. Jordan, Y. Weiss, NeurIPS 2001.

    Example:
        >>> from phasorgraph.data import directed_block_model
        >>> flow = [[0.5, 1.0, 0.0], [0.0, 0.5, 1.0], [1.0, 0.0, 0.5]]
        >>> g, y = directed_block_model([40, 40, 40], 0.2, flow, seed=0)
        >>> labels = cluster_nodes(g, 3, charge=1 / 3, seed=0)
        >>> adjusted_rand_index(labels, y) > 0.9
        True
    """
    graph = operators.check_graph(graph, "cluster_nodes")
    n = graph.num_nodes
    k = _check_num_clusters(num_clusters, n)
    rng = _check_seed(seed)
    m = k if num_vectors is None else num_vectors
    if isinstance(m, bool) or not isinstance(m, numbers.Integral) or not 1 <= m <= n:
        raise GraphInputError(f"num_vectors must be None or an integer in [1, num_nodes = {n}]; got {num_vectors!r}")
    lap = operators.magnetic_laplacian(graph, charge, phase=phase, dtype=torch.complex128)
    if k == 1:
        return torch.zeros(n, dtype=torch.int64)
    if operators._check_charge(charge) == 0.0:
        # q = 0: L(0) is the normalized Laplacian of A_s, a real symmetric eigenproblem
        lap = operators.normalized_laplacian(graph, dtype=torch.float64)
    emb = _embedding(_smallest_eigenvectors(lap, int(m), rng))
    return torch.as_tensor(_kmeans(emb, k, rng).astype(np.int64))


def _check_partition(name: str, labels: Any) -> np.ndarray:
    try:
        arr = labels.detach().cpu().numpy() if isinstance(labels, torch.Tensor) else np.asarray(labels)
    except (TypeError, ValueError) as exc:
        raise GraphInputError(f"{name} must be a 1-D array of integer cluster ids; got {type(labels).__name__}") from exc
    if arr.ndim != 1 or (arr.size and arr.dtype.kind not in "iu"):
        raise GraphInputError(f"{name} must be a 1-D array of integer cluster ids; got shape {arr.shape} "
                              f"and dtype {arr.dtype}")
    return arr


def _pairs(counts: np.ndarray) -> float:
    c = counts.astype(np.float64)
    return float((c * (c - 1) / 2).sum())


def adjusted_rand_index(labels_a: Any, labels_b: Any) -> float:
    r"""Adjusted Rand index of two partitions of the same items (Hubert & Arabie 1985).

    With :math:`n_{ij}` the contingency table (items in cluster i of a and cluster j of b),
    :math:`a_i, b_j` its row and column sums, n items and :math:`\binom{m}{2} = m(m-1)/2`:

    .. math::
        \mathrm{ARI} = \frac{\sum_{ij} \binom{n_{ij}}{2} - E}{\tfrac12 \left[\sum_i \binom{a_i}{2}
        + \sum_j \binom{b_j}{2}\right] - E}, \qquad
        E = \frac{\sum_i \binom{a_i}{2} \sum_j \binom{b_j}{2}}{\binom{n}{2}}.

    1 for identical partitions (up to renaming), about 0 for independent ones, negative
    below chance. When the denominator is 0 (both partitions are one cluster, or both all
    singletons, so they are identical) the index is 1.

    Args:
        labels_a, labels_b: 1-D integer arrays or tensors of equal length (any integer ids).

    Returns:
        float.

    References:
        L. Hubert and P. Arabie, Comparing partitions, Journal of Classification 2 (1985) 193-218.

    Example:
        >>> round(adjusted_rand_index([0, 0, 1, 1], [0, 0, 1, 2]), 4)  # (1 - 1/3) / (3/2 - 1/3) = 4/7
        0.5714
    """
    a = _check_partition("labels_a", labels_a)
    b = _check_partition("labels_b", labels_b)
    if a.size != b.size:
        raise GraphInputError(f"labels_a and labels_b must have the same length; got {a.size} and {b.size}")
    n = a.size
    if n < 2:
        return 1.0
    _, ai = np.unique(a, return_inverse=True)
    _, bj = np.unique(b, return_inverse=True)
    ai, bj = ai.ravel(), bj.ravel()
    nb = int(bj.max()) + 1
    _, table = np.unique(ai.astype(np.int64) * nb + bj, return_counts=True)  # non-empty cells only
    index = _pairs(table)
    row, col = _pairs(np.bincount(ai)), _pairs(np.bincount(bj))
    expected = row * col / (n * (n - 1) / 2)
    top = (row + col) / 2
    if top == expected:
        return 1.0
    return float((index - expected) / (top - expected))

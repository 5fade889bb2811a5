r"""Pure functions DirectedGraph -> SparseOperator: every operator construction.

Conventions (A[u, v] = w for an edge u -> v):

* symmetrized adjacency :math:`A_s = (A + A^T) / 2`, degrees :math:`d = A_s \mathbf{1}`;
* every :math:`D^{-1/2}` or :math:`D^{-1}` of a zero degree is taken as 0, so isolated nodes
  never produce NaN or inf (one rule: :func:`phasorgraph.graph.inverse_power`);
* the magnetic phase :math:`\Theta = 2\pi q (A - A^T)` (``phase="difference"``),
  :math:`2\pi q\, \mathrm{sign}(A - A^T)` (``phase="sign"``) or
  :math:`2\pi q\, (A - A^T) / (A + A^T)` entrywise on the non-zeros of :math:`A + A^T`
  (``phase="relative"``, the net-flow fraction: free of the weights' units).

Every function validates its arguments once, then reads the graph's frozen
:attr:`~phasorgraph.DirectedGraph.structure` (pattern, :math:`A_s`, :math:`A - A^T`, degrees and
their inverse roots, :math:`D^{-1/2} A_s D^{-1/2}`, all computed once per graph), works
vectorized over the non-zeros (no Python loop over edges), computes in float64 and returns a
CSR :class:`SparseOperator` of the requested dtype (one exception: complex64 magnetic values
take cos / sin in float32 after forming and reducing the angle in float64,
:func:`magnetic_phasors`, an error at complex64 precision). Memory is O(N + nnz) except
:func:`proximity_operators`, whose second-order matrices have the non-zeros of :math:`A A^T`.
The learned-charge product lives in :mod:`phasorgraph.learned_charge`.
"""

from __future__ import annotations

import math
import numbers
import warnings
from typing import NamedTuple, Optional

import numpy as np
import scipy.sparse as sp
import torch

from ._limits import check_node_count
from ._checks import check_choice, check_flag
from .errors import GraphInputError, PhaseWrapWarning, value_text
from .graph import DirectedGraph, inverse_power
from .sparse import SparseOperator, csr_matrix

__all__ = [
    "combinatorial_laplacian",
    "normalized_laplacian",
    "random_walk_laplacian",
    "renormalized_adjacency",
    "magnetic_adjacency",
    "magnetic_laplacian",
    "diffusion",
    "random_walk",
    "pagerank_laplacian",
    "proximity_operators",
    "ProximityOperators",
]

_PHASES = ("difference", "sign", "relative")
_REAL = (torch.float32, torch.float64)
_COMPLEX = (torch.complex64, torch.complex128)
_TO_COMPLEX = {torch.float32: torch.complex64, torch.float64: torch.complex128}
_REAL_OF_COMPLEX = {torch.complex64: torch.float32, torch.complex128: torch.float64}


# ---------------------------------------------------------------------- validation
def _min_weight(graph: DirectedGraph) -> float:
    return float(graph.weight.numpy().min()) if graph.num_edges else 0.0


def check_graph(graph, what: str = "this operator") -> DirectedGraph:
    """A DirectedGraph with non-negative weights (every construction here needs them)."""
    if not isinstance(graph, DirectedGraph):
        raise GraphInputError(
            f"graph must be a DirectedGraph (build one with DirectedGraph.from_edges, from_scipy or "
            f"from_networkx); got {type(graph).__name__}"
        )
    check_node_count(graph.num_nodes, what=what)
    if graph.cached(_min_weight) < 0:  # weights are immutable: checked once per graph
        k = int(torch.argmin(graph.weight))
        raise GraphInputError(
            f"graph has negative weight {float(graph.weight[k])} on edge {int(graph.source[k])} -> "
            f"{int(graph.target[k])}; these operators need non-negative weights"
        )
    return graph


def _check_charge(charge) -> float:
    if isinstance(charge, torch.Tensor):
        # the charge-tensor rule (the same in MagneticFilter): a tensor that requires grad is
        # refused, never detached in silence; learning goes through magnetic_product / LearnedCharge
        if charge.requires_grad or charge.numel() != 1 or charge.is_complex() or charge.device.type == "meta":
            raise GraphInputError(
                f"charge must be one real number in [0, 0.5] for a fixed operator; got a tensor of "
                f"shape {tuple(charge.shape)}, dtype {charge.dtype}, requires_grad={charge.requires_grad}"
                f"{' on the meta device' if charge.device.type == 'meta' else ''} (for a learned charge use "
                f"magnetic_product / magnetic_matmul with the tensor, or MagneticFilter(charge=LearnedCharge(start=...)))"
            )
        charge = float(charge)
    if isinstance(charge, bool) or not isinstance(charge, numbers.Real):
        text = repr(charge) if len(repr(charge)) <= 40 else repr(charge)[:37] + "..."
        raise GraphInputError(
            f"charge must be a real number in [0, 0.5]; got {type(charge).__name__} {text} "
            f"(for a learned charge use magnetic_matmul with a tensor)"
        )
    q = float(charge)
    if not (0.0 <= q <= 0.5):
        raise GraphInputError(f"charge must lie in [0, 0.5]; got {q}")
    return q


def check_phase(phase: str) -> str:
    return check_choice("phase", phase, _PHASES)


def _real_dtype(dtype) -> torch.dtype:
    dtype = torch.float32 if dtype is None else dtype
    if not isinstance(dtype, torch.dtype) or dtype not in _REAL:
        raise GraphInputError(
            f"dtype must be torch.float32 or torch.float64 for this real operator; got {value_text(dtype)}"
        )
    return dtype


def _complex_dtype(dtype) -> torch.dtype:
    dtype = torch.complex64 if dtype is None else dtype
    dtype = _TO_COMPLEX.get(dtype, dtype) if isinstance(dtype, torch.dtype) else dtype
    if not isinstance(dtype, torch.dtype) or dtype not in _COMPLEX:
        raise GraphInputError(
            f"dtype must be torch.complex64 or torch.complex128 (or float32/float64 for that "
            f"precision) for a magnetic operator; got {value_text(dtype)}"
        )
    return dtype


# ---------------------------------------------------------------------- shared pieces
def _finite_structure(graph: DirectedGraph):
    st = graph.structure
    degree = st.degree.numpy()
    if not np.all(np.isfinite(degree)):
        k = int(np.flatnonzero(~np.isfinite(degree))[0])
        raise GraphInputError(
            f"graph: the degree of node {k} (sum of its symmetrized edge weights) is {degree[k]}, "
            f"beyond the float64 range; rescale the weights"
        )
    return st


def _structure(graph: DirectedGraph):
    """The graph's frozen structure, its degrees checked finite (once per graph)."""
    return graph.cached(_finite_structure)


def _check_degree_range(degree: torch.Tensor, dtype: torch.dtype, what: str) -> float:
    """Largest degree, refused if an unnormalized operator of ``dtype`` would hold inf."""
    dmax = float(degree.max()) if degree.numel() else 0.0
    real = torch.float32 if dtype in (torch.float32, torch.complex64) else torch.float64
    if 2 * dmax > torch.finfo(real).max:
        raise GraphInputError(
            f"graph has a node of degree {dmax}, so {what} would hold values beyond the {real} range "
            f"(about {torch.finfo(real).max:.3g}); pass dtype=torch.float64 (complex128) or rescale the weights"
        )
    return dmax


def _assemble(crow: torch.Tensor, cols: torch.Tensor, vals: torch.Tensor, dtype,
              diag: Optional[torch.Tensor] = None) -> torch.Tensor:
    """CSR (n, n) with ``vals`` on a canonical CSR pattern, plus an optional diagonal.

    The pattern ``(crow, cols)`` is canonical (columns strictly increasing within each row) and
    comes with its row pointer from its one owner: the graph's frozen structure
    (``GraphStructure.crow``, built once per graph) or a canonical scipy matrix (``indptr``).
    Without a diagonal the operator shares that row pointer and those columns. The diagonal is
    added by one canonical merge in scipy (``csr + diags``, a single O(nnz + n) pass in compiled
    code; an entry that sums to exactly 0 there, such as the diagonal of a node whose only edge
    is a self-loop, is left out).
    """
    n = crow.numel() - 1
    if diag is None:
        return csr_matrix(crow, cols, vals.to(dtype), (n, n))
    M = sp.csr_matrix((vals.numpy(), cols.numpy(), crow.numpy()), shape=(n, n))
    real = torch.float32 if vals.dtype in (torch.float32, torch.complex64) else torch.float64
    M = M + sp.diags(diag.to(real).numpy(), format="csr")  # same precision: no upcast
    return csr_matrix(torch.from_numpy(M.indptr.astype(np.int64)), torch.from_numpy(M.indices.astype(np.int64)),
                      torch.from_numpy(M.data).to(dtype), (n, n))


def _canonical_parts(M: sp.spmatrix) -> tuple:
    """(crow, cols, vals, rows) torch tensors of a scipy matrix in canonical CSR form."""
    M = sp.csr_matrix(M)
    M.sum_duplicates()  # sorted columns, no repeats (scipy's canonical format)
    crow = torch.from_numpy(M.indptr.astype(np.int64))
    rows = torch.from_numpy(np.repeat(np.arange(M.shape[0], dtype=np.int64), np.diff(M.indptr)))
    return crow, torch.from_numpy(M.indices.astype(np.int64)), torch.from_numpy(M.data.astype(np.float64)), rows


def phase_base(structure, phase: str) -> torch.Tensor:
    r"""The angle per unit charge on the structure's non-zeros, float64: :math:`\Theta / q`.

    :math:`2\pi (A - A^T)` for ``phase="difference"``, :math:`2\pi\,\mathrm{sign}(A - A^T)` for
    ``phase="sign"``, :math:`2\pi (A - A^T) / (A + A^T)` for ``phase="relative"`` (with
    :math:`A + A^T = 2 A_s`; in [-1, 1] times :math:`2\pi` for non-negative weights, 0 where
    :math:`A_s` is 0).
    """
    anti = structure.antisymmetric
    if phase == "difference":
        base = anti
    elif phase == "sign":
        base = torch.sign(anti)
    else:
        sym = structure.symmetric
        base = torch.zeros_like(anti)
        pos = sym > 0
        base[pos] = anti[pos] / (2 * sym[pos])
    return base * (2 * math.pi)


def _max_net_flow(graph: DirectedGraph) -> float:
    anti = graph.structure.antisymmetric
    return float(anti.abs().max()) if anti.numel() else 0.0


def _wrap_notice(graph: DirectedGraph) -> dict:
    return {"warned": False}


def warn_if_wrapped(graph: DirectedGraph, q: float, phase: str) -> None:
    r"""Warn (PhaseWrapWarning) when phase="difference" turns some edge pair past pi.

    Rule: :math:`2\pi q \max |A - A^T| > \pi`, i.e. :math:`q \max|A - A^T| > 1/2`. Unit
    weights never trigger it for q in [0, 0.5]. Once per graph (a learned charge changes every
    step).
    """
    if phase != "difference" or q <= 0:
        return
    largest = graph.cached(_max_net_flow)
    notice = graph.cached(_wrap_notice)
    if q * largest > 0.5 and not notice["warned"]:
        notice["warned"] = True
        warnings.warn(
            f"phase='difference' with charge {q:g} wraps: the largest net flow |A[u, v] - A[v, u]| is "
            f"{largest:.4g}, above 1 / (2 q) = {1 / (2 * q):.4g}, so its phase passes pi (a flow u -> v "
            f"then looks like one v -> u, and flows that differ by 1 / q = {1 / q:.4g} look alike). Use "
            f"phase='relative' (the net-flow fraction (A - A^T) / (A + A^T), free of units), or "
            f"compress the weights so that q * max |A - A^T| <= 1/2 (e.g. DirectedGraph.from_table(..., "
            f"weight_transform='rank'), or log1p with a charge below {1 / (2 * math.log1p(largest)):.3g}). "
            f"Dividing by the largest weight does not help heavy-tailed weights: most phases become ~0.",
            PhaseWrapWarning, stacklevel=3,
        )


def magnetic_phasors(magnitude: torch.Tensor, base: torch.Tensor, charge) -> tuple:
    r"""``(magnitude cos(q base), magnitude sin(q base))``: the magnetic non-zeros, fixed or learned.

    The one formula for both: the angle :math:`q \cdot \mathrm{base}` is formed in float64 and
    reduced to [-pi, pi] there; cos and sin then run in the precision of ``magnitude`` (float32
    or float64), so complex64 values keep complex64 accuracy (about 1e-7 relative) even for
    large angles. ``charge`` is a float or a 0-dim tensor (possibly requiring grad: the gradient
    flows through the angle; the reduction subtracts a constant multiple of 2 pi). Returns the
    real and imaginary parts as two real tensors (what the sparse kernels read).
    """
    q = charge.to(dtype=torch.float64) if isinstance(charge, torch.Tensor) else float(charge)
    angle = base * q
    turns = torch.round(angle.detach() * (1 / (2 * math.pi)))
    angle = (angle - turns * (2 * math.pi)).to(magnitude.dtype)
    return magnitude * torch.cos(angle), magnitude * torch.sin(angle)


def _magnetic_values(st, magnitude: torch.Tensor, q: float, phase: str, dtype: torch.dtype) -> torch.Tensor:
    """``magnitude * exp(i Theta(q))`` on the structure's non-zeros as a complex tensor of ``dtype``."""
    re, im = magnetic_phasors(magnitude.to(_REAL_OF_COMPLEX[dtype]), phase_base(st, phase), q)
    return torch.complex(re, im)


def normalized_magnetic_values(graph: DirectedGraph, charge: float, *, phase: str = "difference",
                               dtype: torch.dtype = torch.float32) -> tuple:
    r"""The non-zeros of :math:`D^{-1/2} H(q) D^{-1/2}` on the structure's pattern, as ``(re, im)``.

    The values of :func:`magnetic_laplacian` (normalized) without the identity and the sign:
    :math:`L(q) - I = -D^{-1/2} H(q) D^{-1/2}`, so
    ``PatternOperator(st.crow, st.cols, re, im, hermitian=True, scale=-1.0)`` with
    ``st = graph.structure`` is :math:`L(q) - I` (self-loops included, no CSR assembly). Same
    checks, same phase-wrap warning and the same arithmetic (:func:`magnetic_phasors`) as the
    operator.

    Args:
        graph: a DirectedGraph with non-negative weights.
        charge: q in [0, 0.5].
        phase: "difference" (default), "sign" or "relative".
        dtype: torch.float32 (default) or torch.float64, the precision of the two arrays.

    Returns:
        ``(re, im)``, two (nnz,) real tensors in the order of ``graph.structure.cols``.

    Example:
        >>> g = DirectedGraph.from_edges([[0], [1]])
        >>> re, im = normalized_magnetic_values(g, 0.25)
        >>> [round(v, 6) for v in im.tolist()]
        [1.0, -1.0]
    """
    graph = check_graph(graph, "normalized_magnetic_values")
    q = _check_charge(charge)
    phase = check_phase(phase)
    dtype = _real_dtype(dtype)
    warn_if_wrapped(graph, q, phase)
    st = _structure(graph)
    return magnetic_phasors(st.normalized.to(dtype), phase_base(st, phase), q)


def _node_pairs(graph: DirectedGraph) -> tuple:
    st = graph.structure
    rows, cols = st.rows.numpy(), st.cols.numpy()
    # the pattern is symmetric and sorted by (row, col): its upper entries (row <= col) come in
    # pair order, and its lower entries (row > col) sorted by (col, row) are the mirrors of the
    # strictly upper ones in that order
    upper = rows <= cols
    pair = np.empty(rows.size, dtype=np.int64)
    pair[upper] = np.arange(int(upper.sum()))
    strict = pair[upper][rows[upper] < cols[upper]]
    lower = np.flatnonzero(~upper)
    pair[lower[np.argsort(cols[lower] * np.int64(max(graph.num_nodes, 1)) + rows[lower], kind="stable")]] = strict
    return torch.from_numpy(pair), int(upper.sum())


def node_pairs(graph: DirectedGraph) -> tuple:
    r"""The unordered node pair of every non-zero of ``graph.structure``: ``(pair, count)``.

    ``pair`` (nnz,) int64 numbers the linked pairs :math:`\{u, v\}` (a self-loop is a pair of
    its own) 0 .. count - 1 in increasing :math:`(\min(u, v), \max(u, v))`, the order of
    ``numpy.unique`` over ``min * N + max`` of the edges; a non-zero (u, v) and its mirror
    (v, u) share their number. Kept with the graph.

    Example:
        >>> g = DirectedGraph.from_edges([[0, 1, 2], [1, 0, 1]])
        >>> pair, count = node_pairs(g)
        >>> pair.tolist(), count
        ([0, 0, 1, 1], 2)
    """
    return check_graph(graph, "node_pairs").cached(_node_pairs)


def orientation_signs(graph: DirectedGraph, flip, *, dtype: torch.dtype = torch.float32) -> torch.Tensor:
    r"""Per non-zero of ``graph.structure``, the sign of :math:`A - A^T` once the pairs in ``flip`` are reversed.

    Reversing the pair :math:`\{u, v\}` (an edge u -> v of weight a and v -> u of weight b
    become v -> u of weight a and u -> v of weight b) keeps :math:`A_s`, hence the pattern and
    the degrees, and negates :math:`A - A^T` on (u, v) and (v, u). Every phase base
    (:func:`phase_base`: difference, sign and relative) is odd in :math:`A - A^T`, so the
    reoriented graph has :math:`\Theta' = s\,\Theta` and
    :math:`H'(q) = A_s (\cos\Theta + i\, s \sin\Theta)`: the values of
    :func:`normalized_magnetic_values` with the imaginary part multiplied by s. No new graph,
    validation, sort or trigonometry.

    Args:
        graph: a DirectedGraph with non-negative weights.
        flip: (count,) booleans, one per pair of :func:`node_pairs` (True: reversed).
        dtype: float dtype of the result (default torch.float32).

    Returns:
        (nnz,) tensor of +1 and -1.

    Example:
        >>> g = DirectedGraph.from_edges([[0, 1], [1, 2]])
        >>> orientation_signs(g, [True, False]).tolist()
        [-1.0, -1.0, 1.0, 1.0]
    """
    pair, count = node_pairs(graph)
    f = torch.as_tensor(np.asarray(flip))
    if f.dtype != torch.bool or f.shape != (count,):
        raise GraphInputError(f"flip must be {count} booleans, one per linked node pair of the graph; got "
                              f"dtype {f.dtype}, shape {tuple(f.shape)}")
    return (1.0 - 2.0 * f.to(dtype)).index_select(0, pair)


# ---------------------------------------------------------------------- real operators
def combinatorial_laplacian(graph: DirectedGraph, *, dtype: Optional[torch.dtype] = None) -> SparseOperator:
    r"""Combinatorial Laplacian of the symmetrized graph, :math:`L = D - A_s`.

    Real symmetric, positive semidefinite, spectrum in :math:`[0, 2 d_{max}]` (Gershgorin).

    Args:
        graph: a DirectedGraph with non-negative weights.
        dtype: torch.float32 (default) or torch.float64.

    Returns:
        SparseOperator (N, N), ``hermitian=True``, ``kind="combinatorial_laplacian"``.

    Example:
        >>> g = DirectedGraph.from_edges([[0], [1]])
        >>> combinatorial_laplacian(g).to_dense().tolist()
        [[0.5, -0.5], [-0.5, 0.5]]
    """
    graph = check_graph(graph, "combinatorial_laplacian")
    dtype = _real_dtype(dtype)
    st = _structure(graph)
    n = graph.num_nodes
    dmax = _check_degree_range(st.degree, dtype, "combinatorial_laplacian")
    m = _assemble(st.crow, st.cols, -st.symmetric, dtype, diag=st.degree)
    return SparseOperator(m, hermitian=True, spectrum=(0.0, 2 * dmax), kind="combinatorial_laplacian")


def normalized_laplacian(graph: DirectedGraph, *, dtype: Optional[torch.dtype] = None) -> SparseOperator:
    r"""Normalized Laplacian of the symmetrized graph, :math:`I - D^{-1/2} A_s D^{-1/2}`.

    Spectrum in [0, 2]. An isolated node gets diagonal 1 (its :math:`D^{-1/2}` is 0), so the
    operator stays NaN-free. Other libraries differ there: ``scipy.sparse.csgraph.laplacian(
    normed=True)`` and networkx's ``normalized_laplacian_matrix`` put 0 on that diagonal, and
    scipy also leaves self-loops out of the degrees (we and networkx count them); elsewhere the
    three agree (checked in tests/test_operators.py).

    Args:
        graph: a DirectedGraph with non-negative weights.
        dtype: torch.float32 (default) or torch.float64.

    Example:
        >>> g = DirectedGraph.from_edges([[0], [1]])
        >>> normalized_laplacian(g).to_dense().tolist()
        [[1.0, -1.0], [-1.0, 1.0]]
    """
    graph = check_graph(graph, "normalized_laplacian")
    dtype = _real_dtype(dtype)
    st = _structure(graph)
    n = graph.num_nodes
    m = _assemble(st.crow, st.cols, -st.normalized, dtype, diag=torch.ones(n, dtype=torch.float64))
    return SparseOperator(m, hermitian=True, spectrum=(0.0, 2.0), kind="normalized_laplacian")


def _similarity_scale(structure, power: float) -> torch.Tensor:
    """d^power (power +-1/2) on nodes of positive degree, 1 on isolated nodes (they are decoupled)."""
    d = structure.degree
    root = structure.inv_sqrt_degree if power < 0 else d.sqrt()
    return torch.where(d > 0, root, torch.ones_like(d))


def random_walk_laplacian(graph: DirectedGraph, *, dtype: Optional[torch.dtype] = None) -> SparseOperator:
    r"""Random-walk Laplacian of the symmetrized graph, :math:`I - D^{-1} A_s`.

    Not symmetric; similar to the normalized Laplacian,
    :math:`I - D^{-1} A_s = D^{-1/2} (I - D^{-1/2} A_s D^{-1/2}) D^{1/2}`, which is kept in
    ``similar``. Real spectrum in [0, 2].

    Example:
        >>> g = DirectedGraph.from_edges([[0, 1], [1, 2]])
        >>> random_walk_laplacian(g).to_dense()[1].tolist()
        [-0.5, 1.0, -0.5]
    """
    graph = check_graph(graph, "random_walk_laplacian")
    dtype = _real_dtype(dtype)
    st = _structure(graph)
    n = graph.num_nodes
    m = _assemble(st.crow, st.cols, -st.symmetric * st.inv_degree[st.rows], dtype,
                  diag=torch.ones(n, dtype=torch.float64))
    base = normalized_laplacian(graph, dtype=dtype)
    scale = _similarity_scale(st, -0.5).to(dtype)
    return SparseOperator(m, hermitian=False, spectrum=(0.0, 2.0), kind="random_walk_laplacian",
                          similar=(base, scale))


def renormalized_adjacency(graph: DirectedGraph, *, dtype: Optional[torch.dtype] = None) -> SparseOperator:
    r"""Renormalized adjacency (Kipf & Welling 2017), :math:`\tilde D^{-1/2} (A_s + I) \tilde D^{-1/2}`.

    :math:`\tilde D` holds the degrees of :math:`A_s + I` (always >= 1). Real symmetric,
    spectrum in (-1, 1].

    References:
        T. N. Kipf and M. Welling, ICLR 2017.

    Example:
        >>> g = DirectedGraph.from_edges([[0], [1]], num_nodes=3)
        >>> renormalized_adjacency(g).to_dense()[2].tolist()
        [0.0, 0.0, 1.0]
    """
    graph = check_graph(graph, "renormalized_adjacency")
    dtype = _real_dtype(dtype)
    st = _structure(graph)
    s = (st.degree + 1).rsqrt()  # degrees of As + I are >= 1: no zero-degree case
    m = _assemble(st.crow, st.cols, st.symmetric * s[st.rows] * s[st.cols], dtype, diag=s * s)
    return SparseOperator(m, hermitian=True, spectrum=(-1.0, 1.0), kind="renormalized_adjacency")


# ---------------------------------------------------------------------- magnetic operators
def magnetic_adjacency(graph: DirectedGraph, charge: float = 0.25, *, phase: str = "difference",
                       dtype: Optional[torch.dtype] = None) -> SparseOperator:
    r"""Magnetic (Hermitian) adjacency :math:`H(q) = A_s \odot \exp(i \Theta)`.

    :math:`\Theta = 2\pi q (A - A^T)` for ``phase="difference"``,
    :math:`2\pi q\,\mathrm{sign}(A - A^T)` for ``phase="sign"``, or
    :math:`\Theta_{uv} = 2\pi q (A_{uv} - A_{vu}) / (A_{uv} + A_{vu})` for
    ``phase="relative"`` (the net-flow fraction, in :math:`[-2\pi q, 2\pi q]` whatever the
    units; unchanged when every weight is multiplied by the same factor). For a one-way unit
    edge u -> v, :math:`H[u, v] = \tfrac12 e^{+i 2\pi q}` and
    :math:`H[v, u] = \overline{H[u, v]}` under all three phases. Reciprocal edges of equal
    weight carry no phase; q = 0 gives :math:`A_s`; reversing every edge conjugates H.

    The "difference" phase suits weights in [0, 1]. Once some net flow
    :math:`|A_{uv} - A_{vu}|` exceeds :math:`1/(2q)` its phase passes :math:`\pi` and a
    :class:`~phasorgraph.errors.PhaseWrapWarning` is issued (once per graph): use
    ``phase="relative"`` for amounts, volumes and counts (see the README's advice on large
    weights, measured on the freight network).

    Args:
        graph: a DirectedGraph with non-negative weights.
        charge: q in [0, 0.5] (default 0.25, where one-way edges are purely imaginary).
        phase: "difference" (default), "sign" or "relative".
        dtype: complex64 (default) or complex128 (float32/float64 select that precision).

    Returns:
        SparseOperator, complex Hermitian, spectrum in :math:`[-d_{max}, d_{max}]`.

    References:
        M. A. Shubin, Comm. Math. Phys. 1994; X. Zhang et al., NeurIPS 2021.

    Example:
        >>> g = DirectedGraph.from_edges([[0], [1]])
        >>> h = magnetic_adjacency(g, 0.25).to_dense()
        >>> round(h[0, 1].imag.item(), 3), round(h[1, 0].imag.item(), 3)
        (0.5, -0.5)
    """
    graph = check_graph(graph, "magnetic_adjacency")
    q = _check_charge(charge)
    phase = check_phase(phase)
    warn_if_wrapped(graph, q, phase)
    dtype = _complex_dtype(dtype)
    st = _structure(graph)
    n = graph.num_nodes
    dmax = _check_degree_range(st.degree, dtype, "magnetic_adjacency")
    m = _assemble(st.crow, st.cols, _magnetic_values(st, st.symmetric, q, phase, dtype), dtype)
    return SparseOperator(m, hermitian=True, spectrum=(-dmax, dmax), kind="magnetic_adjacency")


def magnetic_laplacian(graph: DirectedGraph, charge: float = 0.25, normalized: bool = True,
                       phase: str = "difference", *, dtype: Optional[torch.dtype] = None) -> SparseOperator:
    r"""Magnetic Laplacian: :math:`I - D^{-1/2} H(q) D^{-1/2}` (normalized) or :math:`D - H(q)`.

    Hermitian and positive semidefinite; the normalized one has spectrum in [0, 2]. At q = 0
    it is the (normalized or combinatorial) Laplacian of :math:`A_s`; reversing every edge
    conjugates it. Isolated nodes: :math:`D^{-1/2} = 0`, so their diagonal is 1 (normalized).
    See :func:`magnetic_adjacency` for H(q), the phase options and the weight-scale caveat.

    Args:
        graph: a DirectedGraph with non-negative weights.
        charge: q in [0, 0.5] (default 0.25).
        normalized: True (default) for the normalized form.
        phase: "difference" (default), "sign" or "relative".
        dtype: complex64 (default) or complex128.

    Example:
        >>> g = DirectedGraph.from_edges([[0, 1, 2], [1, 2, 0]])
        >>> op = magnetic_laplacian(g, 0.25)
        >>> op.hermitian, op.spectrum
        (True, (0.0, 2.0))
    """
    graph = check_graph(graph, "magnetic_laplacian")
    q = _check_charge(charge)
    phase = check_phase(phase)
    warn_if_wrapped(graph, q, phase)
    dtype = _complex_dtype(dtype)
    normalized = check_flag("normalized", normalized)
    n = graph.num_nodes
    st = _structure(graph)
    if normalized:
        # the values of D^-1/2 H(q) D^-1/2, by the same arithmetic as a learned charge
        vals = _magnetic_values(st, st.normalized, q, phase, dtype)
        m = _assemble(st.crow, st.cols, vals.neg_(), dtype, diag=torch.ones(n, dtype=torch.float64))
        spectrum = (0.0, 2.0)
    else:
        dmax = _check_degree_range(st.degree, dtype, "magnetic_laplacian(normalized=False)")
        vals = _magnetic_values(st, st.symmetric, q, phase, dtype)
        m = _assemble(st.crow, st.cols, vals.neg_(), dtype, diag=st.degree)
        spectrum = (0.0, 2 * dmax)
    return SparseOperator(m, hermitian=True, spectrum=spectrum,
                          kind="magnetic_laplacian" if normalized else "magnetic_laplacian_unnormalized")


def diffusion(graph: DirectedGraph, charge: Optional[float] = None, *, phase: str = "difference",
              dtype: Optional[torch.dtype] = None) -> SparseOperator:
    r"""Symmetric lazy diffusion :math:`T = (I + D^{-1/2} A_s D^{-1/2}) / 2`, or its magnetic form.

    With ``charge=q`` it is :math:`T(q) = I - L_{norm}(q) / 2 = (I + D^{-1/2} H(q) D^{-1/2}) / 2`.
    Both are Hermitian with spectrum in [0, 1]; :math:`T = D^{-1/2} P D^{1/2}` with P the lazy
    random walk. Isolated nodes get :math:`T[u, u] = 1/2`.

    Args:
        graph: a DirectedGraph with non-negative weights.
        charge: None (default, real T) or q in [0, 0.5] (complex T(q)).
        phase: "difference" (default), "sign" or "relative" (magnetic only).
        dtype: float32/float64 for real T (default float32); complex64/complex128 for T(q).

    References:
        R. R. Coifman and M. Maggioni, Applied and Computational Harmonic Analysis 2006.

    Example:
        >>> g = DirectedGraph.from_edges([[0], [1]])
        >>> diffusion(g).to_dense().tolist()
        [[0.5, 0.5], [0.5, 0.5]]
    """
    graph = check_graph(graph, "diffusion")
    phase = check_phase(phase)  # checked even when charge is None: a typo is never ignored
    n = graph.num_nodes
    half = torch.full((n,), 0.5, dtype=torch.float64)
    st = _structure(graph)
    if charge is None:
        dtype = _real_dtype(dtype)
        m = _assemble(st.crow, st.cols, st.normalized / 2, dtype, diag=half)
        return SparseOperator(m, hermitian=True, spectrum=(0.0, 1.0), kind="diffusion")
    q = _check_charge(charge)
    warn_if_wrapped(graph, q, phase)
    dtype = _complex_dtype(dtype)
    vals = _magnetic_values(st, st.normalized, q, phase, dtype)
    m = _assemble(st.crow, st.cols, vals.div_(2), dtype, diag=half)
    return SparseOperator(m, hermitian=True, spectrum=(0.0, 1.0), kind="magnetic_diffusion")


def random_walk(graph: DirectedGraph, lazy: bool = True, *, dtype: Optional[torch.dtype] = None) -> SparseOperator:
    r"""Random walk on the symmetrized graph: :math:`P = (I + A_s D^{-1}) / 2` (lazy) or :math:`A_s D^{-1}`.

    Column-stochastic on nodes of positive degree (column u spreads the mass at u over its
    neighbours). Not symmetric; :math:`P = D^{1/2} T D^{-1/2}` with T the symmetric
    diffusion (normalized adjacency when not lazy), kept in ``similar`` so powers can use the
    Hermitian kernel. Isolated nodes: column zero (not lazy) or 1/2 on the diagonal (lazy).

    Args:
        graph: a DirectedGraph with non-negative weights.
        lazy: True (default) for the lazy walk, spectrum [0, 1]; False gives [-1, 1].
        dtype: torch.float32 (default) or torch.float64.

    Example:
        >>> g = DirectedGraph.from_edges([[0, 1], [1, 2]])
        >>> random_walk(g).to_dense().sum(0).tolist()
        [1.0, 1.0, 1.0]
    """
    graph = check_graph(graph, "random_walk")
    dtype = _real_dtype(dtype)
    lazy = check_flag("lazy", lazy)
    st = _structure(graph)
    n = graph.num_nodes
    vals = st.symmetric * st.inv_degree[st.cols]
    scale = _similarity_scale(st, 0.5).to(dtype)
    if lazy:
        m = _assemble(st.crow, st.cols, vals / 2, dtype, diag=torch.full((n,), 0.5, dtype=torch.float64))
        base = diffusion(graph, dtype=dtype)
        return SparseOperator(m, hermitian=False, spectrum=(0.0, 1.0), kind="lazy_random_walk", similar=(base, scale))
    m = _assemble(st.crow, st.cols, vals, dtype)
    base = SparseOperator(_assemble(st.crow, st.cols, st.normalized, dtype), hermitian=True, spectrum=(-1.0, 1.0),
                          kind="normalized_adjacency")
    return SparseOperator(m, hermitian=False, spectrum=(-1.0, 1.0), kind="random_walk", similar=(base, scale))


# ---------------------------------------------------------------------- directed Laplacians
def _stationary(P_t: sp.csr_matrix, c: np.ndarray, tol: float, max_iter: int) -> np.ndarray:
    """Stationary pi of P = P_sparse + c 1^T by power iteration on pi <- P^T pi."""
    n = P_t.shape[0]
    pi = np.full(n, 1.0 / n)
    for _ in range(max_iter):
        new = P_t @ pi + c @ pi
        new /= new.sum()
        if np.abs(new - pi).sum() < tol:
            return new
        pi = new
    raise GraphInputError(
        f"stationary distribution did not converge to tol={tol} in max_iter={max_iter} iterations; "
        f"raise teleport, tol or max_iter"
    )


def pagerank_laplacian(graph: DirectedGraph, teleport: float = 0.05, *, dtype: Optional[torch.dtype] = None,
                       tol: float = 1e-13, max_iter: int = 100000) -> SparseOperator:
    r"""Chung's directed Laplacian of the PageRank walk with teleport probability t.

    :math:`L = I - (\Pi^{1/2} P \Pi^{-1/2} + \Pi^{-1/2} P^T \Pi^{1/2}) / 2` with
    :math:`P = (1 - t) D_{out}^{-1} A + t\,\mathbf{1}\mathbf{1}^T / n` (rows of nodes without
    out-edges uniform, 1/n) and :math:`\Pi` the diagonal of its stationary distribution. This is
    networkx's ``directed_laplacian_matrix(G, walk_type="pagerank", alpha=1 - t)``.

    The teleport makes the matrix dense; it is kept as a sparse part plus a rank-2 term in
    ``low_rank``, so memory stays O(N + nnz). Real symmetric, spectrum in [0, 2].

    Args:
        graph: a DirectedGraph with non-negative weights and at least one node.
        teleport: t in (0, 1) (default 0.05).
        dtype: torch.float32 (default) or torch.float64.
        tol, max_iter: power-iteration stopping rule (L1 change) for the stationary vector.

    References:
        F. Chung, Annals of Combinatorics 9 (2005).

    Example:
        >>> g = DirectedGraph.from_edges([[0, 1, 2], [1, 2, 0]])
        >>> op = pagerank_laplacian(g)
        >>> round(float(op.to_dense().sum()), 6)
        0.0
    """
    graph = check_graph(graph, "pagerank_laplacian")
    dtype = _real_dtype(dtype)
    if isinstance(teleport, bool) or not isinstance(teleport, numbers.Real) or not (0.0 < float(teleport) < 1.0):
        raise GraphInputError(f"teleport must be a probability in (0, 1); got {teleport!r}")
    t = float(teleport)
    if isinstance(tol, bool) or not isinstance(tol, numbers.Real) or not (0.0 < float(tol) < math.inf):
        raise GraphInputError(f"tol must be a finite number > 0 (an L1 change of the stationary vector); got {tol!r}")
    if isinstance(max_iter, bool) or not isinstance(max_iter, numbers.Integral) or int(max_iter) < 1:
        raise GraphInputError(f"max_iter must be an integer >= 1; got {max_iter!r}")
    tol, max_iter = float(tol), int(max_iter)
    n = graph.num_nodes
    if n == 0:
        raise GraphInputError("graph must have at least one node for pagerank_laplacian; got num_nodes = 0")
    A = graph.to_scipy("csr").astype(np.float64)
    out_deg = np.asarray(A.sum(axis=1)).ravel()
    dangling = out_deg == 0
    inv_out = inverse_power(out_deg)
    P_sparse = sp.diags((1 - t) * inv_out) @ A
    c = np.where(dangling, 1.0 / n, t / n)
    pi = _stationary(P_sparse.T.tocsr(), c, tol, max_iter)
    sq = np.sqrt(pi)
    S = sp.diags(sq) @ P_sparse @ sp.diags(1.0 / sq)
    crow, cols, vals, _ = _canonical_parts((S + S.T) * 0.5)
    m = _assemble(crow, cols, -vals, dtype, diag=torch.ones(n, dtype=torch.float64))
    a = torch.as_tensor(sq * c)
    b = torch.as_tensor(1.0 / sq)
    U = torch.stack([a, b], dim=1)
    V = -0.5 * torch.stack([b, a], dim=1)
    return SparseOperator(m, hermitian=True, spectrum=(0.0, 2.0), kind="pagerank_laplacian",
                          low_rank=(U.to(dtype), V.to(dtype)))


class ProximityOperators(NamedTuple):
    """First- and second-order proximity operators; each a renormalized real symmetric operator."""

    first: SparseOperator
    second_out: SparseOperator
    second_in: SparseOperator


def _renormalize_scipy(W: sp.spmatrix, dtype, kind: str) -> SparseOperator:
    crow, cols, vals, rows = _canonical_parts(W)
    degree = torch.zeros(W.shape[0], dtype=torch.float64).index_add_(0, rows, vals)
    s = (degree + 1).rsqrt()
    m = _assemble(crow, cols, vals * s[rows] * s[cols], dtype, diag=s * s)
    return SparseOperator(m, hermitian=True, spectrum=(-1.0, 1.0), kind=kind)


def proximity_operators(graph: DirectedGraph, *, dtype: Optional[torch.dtype] = None) -> ProximityOperators:
    r"""First- and second-order proximity operators of a directed graph (after Tong et al. 2020).

    * first: :math:`A_s = (A + A^T)/2`;
    * second_out: :math:`A D_{in}^{-1} A^T` (u and v share the out-neighbour k, weighted by
      1 / in-degree of k), diagonal removed;
    * second_in: :math:`A^T D_{out}^{-1} A` (u and v share the in-neighbour k), diagonal removed.

    Each is returned renormalized, :math:`\tilde D^{-1/2} (W + I) \tilde D^{-1/2}`, so it is real
    symmetric with spectrum in (-1, 1]. The normalization of the second-order terms follows the
    paper as recalled from memory; it is documented here so it can be checked.

    Notes:
        The second-order matrices have the non-zeros of :math:`A A^T` and :math:`A^T A`, which
        can be far more than the edges on graphs with hubs.

    References:
        Z. Tong, Y. Liang, C. Sun, D. S. Rosenblum, A. Lim, NeurIPS 2020.

    Example:
        >>> g = DirectedGraph.from_edges([[0, 1], [2, 2]])
        >>> ops = proximity_operators(g)
        >>> ops.second_out.to_dense()[0, 1].item() > 0
        True
    """
    graph = check_graph(graph, "proximity_operators")
    dtype = _real_dtype(dtype)
    A = graph.to_scipy("csr").astype(np.float64)
    in_deg = np.asarray(A.sum(axis=0)).ravel()
    out_deg = np.asarray(A.sum(axis=1)).ravel()
    inv_in = inverse_power(in_deg)
    inv_out = inverse_power(out_deg)
    sym = (A + A.T) * 0.5
    second_out = (A @ sp.diags(inv_in) @ A.T).tolil()
    second_out.setdiag(0)
    second_in = (A.T @ sp.diags(inv_out) @ A).tolil()
    second_in.setdiag(0)
    return ProximityOperators(
        _renormalize_scipy(sym, dtype, "proximity_first"),
        _renormalize_scipy(sp.csr_matrix(second_out), dtype, "proximity_second_out"),
        _renormalize_scipy(sp.csr_matrix(second_in), dtype, "proximity_second_in"),
    )

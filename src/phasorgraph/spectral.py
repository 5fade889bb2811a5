r"""Spectral tools: largest eigenvalue, Fourier basis, frame bounds, Dirichlet energy.

:func:`fourier_basis` and :func:`frame_bounds` are small-graph utilities: they build dense
N x N matrices and refuse graphs above ``max_nodes``.
"""

from __future__ import annotations

from typing import Callable, Sequence

import numpy as np
import scipy.sparse.linalg as spla
import torch

from ._checks import check_flag, check_int, check_positive_number
from .errors import GraphInputError
from .sparse import SparseOperator

__all__ = ["largest_eigenvalue", "fourier_basis", "frame_bounds", "dirichlet_energy", "DENSE_NODE_LIMIT"]

#: the largest graph the dense small-graph utilities accept by default
DENSE_NODE_LIMIT = 4096


def _check_operator(op) -> SparseOperator:
    if not isinstance(op, SparseOperator):
        raise GraphInputError(f"op must be a SparseOperator; got {type(op).__name__}")
    return op


def _scipy_linear_operator(op: SparseOperator) -> spla.LinearOperator:
    n = op.num_rows
    dtype = np.complex128 if op.is_complex else np.float64
    op64 = op.to(torch.complex128 if op.is_complex else torch.float64, device="cpu")

    def mv(v):
        t = torch.as_tensor(np.asarray(v).reshape(n, -1).astype(dtype, copy=False))
        return op64.matmul(t).numpy()

    return spla.LinearOperator((n, n), matvec=mv, matmat=mv, dtype=dtype)


def _start_vector(n: int, is_complex: bool, seed: int = 0) -> np.ndarray:
    """A seeded random start vector: never orthogonal to the top eigenvector by construction.

    (A constant start vector is an eigenvector of every Laplacian of a regular graph, and
    orthogonal to the top eigenvector of an even cycle: Lanczos then misses the top.)
    """
    rng = np.random.default_rng(seed)
    v = rng.standard_normal(n)
    if is_complex:
        v = v + 1j * rng.standard_normal(n)
    return v


def _power_iteration(op: SparseOperator, iterations: int = 300, seed: int = 0, shift: float = 0.0) -> float:
    """Largest modulus eigenvalue of ``op - shift I`` plus ``shift`` (norm ratio of iterates)."""
    n = op.num_rows
    dtype = torch.complex128 if op.is_complex else torch.float64
    op64 = op.to(dtype, device="cpu")
    v = torch.as_tensor(_start_vector(n, op.is_complex, seed)).reshape(n, 1).to(dtype)
    v = v / v.norm()
    lam = 0.0
    for _ in range(iterations):
        w = op64.matmul_add(v, v, beta=-shift)
        norm = float(w.norm())
        if norm == 0.0:
            return shift
        lam = norm
        v = w / norm
    return lam + shift


def largest_eigenvalue(op: SparseOperator, *, tol: float = 1e-8, refresh: bool = False,
                       remember: bool = True) -> float:
    r"""The largest eigenvalue of a Hermitian operator (largest modulus otherwise), cached on ``op``.

    Hermitian operators with at most 64 rows use dense ``numpy.linalg.eigvalsh``; larger ones
    use Lanczos (``scipy.sparse.linalg.eigsh``, ``which="LA"``, from a seeded random start
    vector). A non-Hermitian operator that knows a Hermitian ``similar`` base (random walks,
    the random-walk Laplacian) has the same eigenvalues as that base, which is used instead.
    Otherwise, or if Lanczos does not converge, power iteration estimates the largest
    eigenvalue (shifted by the lower end of a known ``spectrum`` when Hermitian, so a large
    negative eigenvalue cannot win) or, for a general operator, the spectral radius.
    The value is stored in ``op.max_eigenvalue`` and returned from there on later calls
    (``remember=False`` leaves ``op`` unchanged: layers compute it that way and keep it in their
    shared weak cache, so a forward pass never changes an operator).

    Args:
        op: a SparseOperator.
        tol: Lanczos tolerance.
        refresh: recompute even if ``op.max_eigenvalue`` is set.
        remember: store the value in ``op.max_eigenvalue`` (default True).

    Example:
        >>> from phasorgraph import DirectedGraph, normalized_laplacian
        >>> g = DirectedGraph.from_edges([[0], [1]])
        >>> round(largest_eigenvalue(normalized_laplacian(g)), 6)
        2.0
    """
    op = _check_operator(op)
    tol = check_positive_number("tol", tol)
    refresh = check_flag("refresh", refresh)
    remember = check_flag("remember", remember)
    if op.max_eigenvalue is not None and not refresh:
        return op.max_eigenvalue
    if op.num_rows != op.num_nodes:
        # an operator holding some rows of a larger one (a shard of a distributed graph): only
        # it can run the collective computation, on every rank at once
        collective = getattr(op, "collective_max_eigenvalue", None)
        if collective is None:
            raise GraphInputError(f"op holds {op.num_rows} of the {op.num_nodes} rows of its operator and "
                                  f"offers no collective_max_eigenvalue(); pass max_eigenvalue explicitly")
        value = float(collective(tol=tol))
        if remember:
            op.max_eigenvalue = value
        return value
    n = op.num_rows
    if n == 0:
        if remember:
            op.max_eigenvalue = 0.0
        return 0.0
    value = None
    if not op.hermitian and op.similar is not None:
        # op = diag(s) base diag(1/s): same eigenvalues as the Hermitian base
        value = largest_eigenvalue(op.similar[0], tol=tol, refresh=refresh, remember=remember)
    elif op.hermitian:
        if n <= 64:
            dense = op.to(torch.complex128 if op.is_complex else torch.float64, device="cpu").to_dense().numpy()
            value = float(np.linalg.eigvalsh(dense)[-1])
        else:
            try:
                vals = spla.eigsh(_scipy_linear_operator(op), k=1, which="LA", tol=tol,
                                  return_eigenvectors=False, maxiter=max(1000, 20 * n),
                                  v0=_start_vector(n, op.is_complex))
                value = float(np.real(vals[0]))
            except (spla.ArpackNoConvergence, spla.ArpackError):
                value = None
    if value is None:
        shift = op.spectrum[0] if (op.hermitian and op.spectrum is not None) else 0.0
        value = _power_iteration(op, shift=shift)
    if remember:
        op.max_eigenvalue = value
    return value


def _dense(op: SparseOperator, max_nodes: int, name: str = "op") -> np.ndarray:
    max_nodes = check_int("max_nodes", max_nodes)
    if op.num_rows != op.num_nodes:
        raise GraphInputError(
            f"{name} holds {op.num_rows} of the {op.num_nodes} rows of its operator (a shard of a distributed "
            f"graph); this small-graph utility needs the whole operator on one process"
        )
    if op.num_rows > max_nodes:
        raise GraphInputError(
            f"{name} has {op.num_rows} nodes but this small-graph utility builds a dense N x N "
            f"matrix and accepts at most max_nodes = {max_nodes}; use largest_eigenvalue or a "
            f"Chebyshev filter on large graphs"
        )
    dtype = torch.complex128 if op.is_complex else torch.float64
    return op.to(dtype, device="cpu").to_dense().numpy()


def fourier_basis(op: SparseOperator, *, max_nodes: int = DENSE_NODE_LIMIT):
    r"""Eigenvalues (ascending) and orthonormal eigenvectors of a Hermitian operator (dense eigh).

    Small graphs only: the basis is a dense N x N matrix. Graphs above ``max_nodes`` are
    refused with a clear error.

    Returns:
        (eigenvalues (N,) float64 tensor, eigenvectors (N, N) float64 or complex128 tensor);
        ``op = U diag(lam) U^H``.

    Example:
        >>> from phasorgraph import DirectedGraph, normalized_laplacian
        >>> lam, U = fourier_basis(normalized_laplacian(DirectedGraph.from_edges([[0], [1]])))
        >>> [round(v, 6) for v in lam.tolist()]
        [0.0, 2.0]
    """
    op = _check_operator(op)
    if not op.hermitian:
        raise GraphInputError(f"op must be Hermitian for fourier_basis; got kind {op.kind!r}")
    lam, U = np.linalg.eigh(_dense(op, max_nodes))
    return torch.as_tensor(lam), torch.as_tensor(U)


def frame_bounds(bank: Sequence | Callable, op: SparseOperator | None = None, *,
                 max_nodes: int = DENSE_NODE_LIMIT, weight: torch.Tensor | None = None):
    r"""Tight frame bounds (A, B) of a filter bank: :math:`A\|x\|^2 \le \sum_j \|F_j x\|^2 \le B\|x\|^2`.

    Args:
        bank: a sequence of dense (N, N) matrices / SparseOperators F_j, or a callable that maps
            a dense (N, N) identity to a tensor (N, J, N) of the bank applied to it (the output
            of a wavelet layer applied to the identity, say).
        op: unused unless ``bank`` is a callable, when its size fixes N.
        weight: optional (N,) positive vector w: bounds in the norm :math:`\|w \odot x\|`, i.e. of
            :math:`\sum_j F_j^H F_j` relative to :math:`W^2`: eigenvalues of
            :math:`W^{-1} (\sum_j F_j^H F_j) W^{-1}`.

    Returns:
        (A, B) floats: the smallest and largest eigenvalue of :math:`\sum_j F_j^H F_j`.

    Small graphs only (dense).
    """
    max_nodes = check_int("max_nodes", max_nodes)
    if callable(bank) and not isinstance(bank, (list, tuple)):
        if op is None:
            raise GraphInputError("op is needed to size the identity when bank is a callable")
        n = op.num_rows
        if n > max_nodes:
            raise GraphInputError(f"op has {n} nodes; frame_bounds accepts at most max_nodes = {max_nodes}")
        dtype = torch.complex128 if op.is_complex else torch.float64
        eye = torch.eye(n, dtype=dtype)
        out = bank(eye)  # (N, J, N): column i is the bank applied to e_i
        mats = [out[:, j, :].detach().numpy() for j in range(out.shape[1])]
    else:
        if not isinstance(bank, (list, tuple)):
            raise GraphInputError(
                f"bank must be a list or tuple of (N, N) matrices / SparseOperators, or a callable; "
                f"got {type(bank).__name__}"
            )
        mats = []
        for j, F in enumerate(bank):
            if isinstance(F, SparseOperator):
                mats.append(_dense(F, max_nodes, "bank entry"))
                continue
            if isinstance(F, torch.Tensor):
                if F.device.type == "meta" or F.layout != torch.strided:
                    raise GraphInputError(f"bank[{j}] must be a dense matrix with values; got a tensor on "
                                          f"{F.device} with layout {F.layout}")
                F = F.detach().cpu().resolve_conj().numpy()
            try:
                F = np.asarray(F)
            except (ValueError, TypeError):
                F = np.asarray(None, dtype=object)
            if F.dtype.kind not in "iufc" or F.ndim != 2 or F.shape[0] != F.shape[1]:
                raise GraphInputError(
                    f"bank[{j}] must be a square (N, N) matrix of numbers or a SparseOperator; got "
                    f"shape {F.shape}, dtype {F.dtype}"
                )
            if mats and F.shape != mats[0].shape:
                raise GraphInputError(f"bank[{j}] has shape {F.shape} but bank[0] has {mats[0].shape}")
            mats.append(F)
    if not mats:
        raise GraphInputError("bank must hold at least one filter")
    n = mats[0].shape[0]
    gram = sum(F.conj().T @ F for F in mats)
    if weight is not None:
        if isinstance(weight, torch.Tensor):
            if weight.device.type == "meta" or weight.is_complex():
                raise GraphInputError(f"weight must be a positive real vector with values; got a tensor of "
                                      f"dtype {weight.dtype} on {weight.device}")
            weight = weight.detach().cpu().numpy()
        try:
            w = np.asarray(weight)
        except (ValueError, TypeError):
            w = np.asarray(None, dtype=object)
        if w.dtype.kind not in "iuf":
            raise GraphInputError(f"weight must be a positive real vector of shape ({n},); got "
                                  f"{str(weight)[:60]} (dtype {w.dtype})")
        w = w.astype(np.float64)
        if w.shape != (n,) or np.any(w <= 0):
            raise GraphInputError(
                f"weight must be a positive vector of shape ({n},); got shape {w.shape}"
                f"{'' if w.shape != (n,) else f' with smallest entry {w.min()}'}"
            )
        gram = gram / w[:, None] / w[None, :]
    lam = np.linalg.eigvalsh((gram + gram.conj().T) / 2)
    return float(lam[0]), float(lam[-1])


def dirichlet_energy(x: torch.Tensor, op: SparseOperator) -> torch.Tensor:
    r"""Dirichlet energy :math:`E(x) = \mathrm{Re}\,\mathrm{tr}(x^H L x)` of features x under a Laplacian L.

    With the normalized Laplacian this is
    :math:`\tfrac12 \sum_{u,v} A_s[u,v] \, \| x_u/\sqrt{d_u} - x_v/\sqrt{d_v} \|^2 + \sum_{d_u = 0} \|x_u\|^2`
    (an isolated node keeps its diagonal 1, so it adds its own squared norm); with the
    normalized magnetic Laplacian the difference becomes
    :math:`x_u/\sqrt{d_u} - e^{i\Theta_{uv}} x_v/\sqrt{d_v}`. On the nodes with edges it falls to 0
    as repeated low-pass filtering makes features constant on each component (over-smoothing).
    An empty graph (N = 0) has energy 0.

    Args:
        x: (N, F) or (N,) real or complex features.
        op: a Hermitian positive semidefinite SparseOperator (a Laplacian).

    Returns:
        0-dim real tensor, differentiable in x.

    Example:
        >>> import torch
        >>> from phasorgraph import DirectedGraph, normalized_laplacian
        >>> op = normalized_laplacian(DirectedGraph.from_edges([[0], [1]]))
        >>> float(dirichlet_energy(torch.tensor([[1.0], [-1.0]]), op))
        4.0
    """
    op = _check_operator(op)
    if not op.hermitian:
        raise GraphInputError(f"op must be a Hermitian Laplacian for dirichlet_energy; got kind {op.kind!r}")
    if op.num_rows == 0 and isinstance(x, torch.Tensor) and x.dim() >= 1 and x.shape[0] == 0:
        return (x.real if x.is_complex() else x).sum()  # empty graph: 0, still differentiable
    Lx = op.matmul(x)
    prod = x.conj() * Lx if x.is_complex() or Lx.is_complex() else x * Lx
    total = prod.sum()
    return total.real if total.is_complex() else total

r"""SparseOperator (a CSR matrix and what is known about it) and every sparse product.

This module is plain sparse linear algebra: it knows nothing about graphs.

Products (all differentiable, all with a fused epilogue):

* :meth:`SparseOperator.matmul` (``op @ x``) and :meth:`SparseOperator.matmul_add`
  (``alpha * op @ x + shift * x + beta * z`` in one pass over memory);
* :func:`hermitian_matmul` / :func:`general_matmul`: ``op @ x`` with the Hermitian check or
  the adjoint backward made explicit;
* :class:`PatternOperator`: ``identity * I + scale * A(values)`` on a fixed CSR pattern whose
  values are tensors (differentiable, e.g. built from a learned charge);
* :func:`values_matmul`: ``A(values) @ x`` from raw CSR parts, differentiable in the values.

Every product is one of three ``torch.library`` custom ops (``phasorgraph::csr_matmul``,
``phasorgraph::csr_matmul_real``, ``phasorgraph::csr_value_grad``) with fake implementations and
autograd formulas, so ``torch.compile`` sees one opaque node per product. On CPU the ops run
the native kernels of :mod:`phasorgraph._native` (numba, threads following
``torch.get_num_threads()``); on other devices, or inside ``native_kernels(False)``, they run
the pure-torch reference (``torch.sparse.mm``), which the tests compare with the native one.

Backward formulas: ``d/dx = conj(alpha) A^H g + shift g`` (``A^H = A`` for Hermitian operators,
no transpose built; otherwise the transposed pattern is built once when the operator is made),
``d/dz = beta g``, and the value gradient on the fixed pattern
:math:`\partial L / \partial v_k = \alpha \sum_f g[r_k, f]\, \overline{x[c_k, f]}`, fused per row
with no (nnz x F) temporary.

A CSR structure is validated once where it enters the package (:class:`SparseOperator`,
:class:`PatternOperator`, :func:`values_matmul`): int32/int64 indices, ``crow`` of length N + 1
from 0 to nnz and never decreasing, columns in range and sorted within each row. A malformed
one raises :class:`~phasorgraph.errors.GraphInputError` naming the argument, so no kernel ever
reads outside its arrays.
"""

from __future__ import annotations

import contextlib
import math
import numbers
import warnings
from typing import Optional, Sequence

import numpy as np
import torch
from torch import Tensor

from ._checks import check_flag
from .errors import GraphInputError, value_text

__all__ = [
    "SparseOperator",
    "PatternOperator",
    "csr_matrix",
    "check_csr",
    "hermitian_matmul",
    "general_matmul",
    "values_matmul",
    "native_kernels",
]

_REAL_OF = {torch.complex64: torch.float32, torch.complex128: torch.float64}
_COMPLEX_OF = {torch.float32: torch.complex64, torch.float64: torch.complex128}
_SUPPORTED = (torch.float32, torch.float64, torch.complex64, torch.complex128)
_INDEX = (torch.int32, torch.int64)


def csr_matrix(crow: torch.Tensor, col: torch.Tensor, values: torch.Tensor, size: Sequence[int]) -> torch.Tensor:
    """A torch sparse CSR tensor from its parts, without the beta-state warning (not validated)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)
        return torch.sparse_csr_tensor(crow, col, values, tuple(size), check_invariants=False)


def _real_precision(dtype: torch.dtype) -> torch.dtype:
    return _REAL_OF.get(dtype, dtype)


# ---------------------------------------------------------------------- CSR validation
def check_csr(crow, col, num_rows: int, num_cols: int, *, name: str = "matrix") -> tuple:
    r"""Validate a CSR structure once; return ``(crow, col)`` as contiguous int64 tensors.

    Checks: 1-D int32/int64 tensors on one device (not ``meta``), ``crow`` of length
    ``num_rows + 1`` with ``crow[0] = 0``, never decreasing, ``crow[-1] = col.numel()``; every
    column in ``[0, num_cols)``; columns non-decreasing within each row (repeats are allowed
    and summed by the products). O(nnz) vectorized work.

    Args:
        crow, col: the row pointer (N + 1,) and column indices (nnz,).
        num_rows, num_cols: the matrix shape.
        name: the argument named in error messages (default "matrix").

    Raises:
        GraphInputError: naming ``name`` and the first offending entry.

    Example:
        >>> import torch
        >>> crow, col = check_csr(torch.tensor([0, 1, 2]), torch.tensor([1, 0]), 2, 2)
        >>> crow.dtype
        torch.int64
    """
    for part, t in (("row pointer (crow)", crow), ("column indices (col)", col)):
        if not isinstance(t, torch.Tensor) or t.dim() != 1 or t.dtype not in _INDEX:
            raise GraphInputError(
                f"{name} {part} must be a 1-D int32 or int64 tensor; got "
                f"{getattr(t, 'dtype', type(t).__name__)} with shape {tuple(getattr(t, 'shape', ()))}"
            )
        if t.device.type == "meta":
            raise GraphInputError(f"{name} {part} is on the meta device (no data to check); pass real indices")
    if crow.device != col.device:
        raise GraphInputError(f"{name} has its row pointer on {crow.device} but its columns on {col.device}")
    if crow.numel() != num_rows + 1:
        raise GraphInputError(
            f"{name} row pointer (crow) must have num_rows + 1 = {num_rows + 1} entries; got {crow.numel()}"
        )
    crow = crow.to(torch.int64).contiguous()
    col = col.to(torch.int64).contiguous()
    nnz = col.numel()
    first, last = int(crow[0]), int(crow[-1])
    if first != 0 or last != nnz:
        raise GraphInputError(
            f"{name} row pointer (crow) must run from 0 to nnz = {nnz}; got crow[0] = {first}, crow[-1] = {last}"
        )
    if num_rows:
        steps = crow[1:] - crow[:-1]
        if bool((steps < 0).any()):
            r = int(torch.nonzero(steps < 0)[0, 0])
            raise GraphInputError(
                f"{name} row pointer (crow) must never decrease; got crow[{r}] = {int(crow[r])} > "
                f"crow[{r + 1}] = {int(crow[r + 1])}"
            )
    if nnz:
        outside = (col < 0) | (col >= num_cols)
        if bool(outside.any()):
            k = int(torch.nonzero(outside)[0, 0])
            raise GraphInputError(
                f"{name} column index {int(col[k])} at position {k} is outside [0, {num_cols}) "
                f"(num_cols = {num_cols})"
            )
        if nnz > 1:
            starts = torch.zeros(nnz, dtype=torch.bool, device=col.device)
            heads = crow[:-1]
            starts[heads[heads < nnz]] = True
            down = (col[1:] < col[:-1]) & ~starts[1:]
            if bool(down.any()):
                k = int(torch.nonzero(down)[0, 0]) + 1
                r = int(torch.searchsorted(crow, torch.tensor(k, device=crow.device), right=True)) - 1
                raise GraphInputError(
                    f"{name} columns must be sorted within each row; row {r} has column {int(col[k - 1])} "
                    f"before {int(col[k])} (sort each row, e.g. build it with Tensor.to_sparse_csr())"
                )
    return crow, col


def _row_indices(crow: Tensor) -> Tensor:
    """(nnz,) the row of each stored entry of a CSR pattern (``crow`` (N + 1,))."""
    n = crow.numel() - 1
    return torch.repeat_interleave(torch.arange(n, device=crow.device, dtype=crow.dtype), crow.diff())


def _transpose_pattern(crow: Tensor, col: Tensor, num_cols: int) -> tuple:
    """(t_crow, t_col, perm): the CSR pattern of A^T with ``t_values = values[perm]``.

    A counting sort in the native module on CPU (O(nnz + N)); a stable argsort elsewhere.
    """
    if crow.device.type == "cpu":
        native = _load_native()
        if native is not None:
            t_crow, t_col, perm = native.transpose_pattern(crow.numpy(), col.numpy(), int(num_cols))
            return torch.from_numpy(t_crow), torch.from_numpy(t_col), torch.from_numpy(perm)
    n = crow.numel() - 1
    rows = _row_indices(crow)
    perm = torch.argsort(col * max(n, 1) + rows)
    t_crow = torch.zeros(num_cols + 1, dtype=torch.int64, device=crow.device)
    t_crow[1:] = torch.cumsum(torch.bincount(col, minlength=num_cols), 0)
    return t_crow, rows[perm].contiguous(), perm


def _split_values(values: Tensor) -> tuple:
    """(re, im) real arrays of complex values (differentiable), or (values, None) when real."""
    base = values._base
    if base is not None and base.layout != torch.strided:
        values = values.clone()  # the values() of a sparse tensor cannot be viewed as real
    if values.is_complex():
        parts = torch.view_as_real(_plain(values))
        return parts[:, 0], parts[:, 1]
    return values, None


def _check_scalar(name: str, value) -> float:
    # (comparisons rather than math.isfinite, which torch.compile cannot trace on constants)
    if isinstance(value, bool) or not isinstance(value, numbers.Real) or not -math.inf < float(value) < math.inf:
        raise GraphInputError(f"{name} must be a finite real number; got {value!r}")
    return float(value)


def _check_spectrum(spectrum) -> Optional[tuple]:
    """None, or a pair (low, high) of finite numbers with low <= high (never read from text)."""
    if spectrum is None:
        return None
    ok = isinstance(spectrum, (tuple, list)) and len(spectrum) == 2 and all(
        isinstance(v, numbers.Real) and not isinstance(v, bool) and math.isfinite(float(v)) for v in spectrum)
    if not ok or float(spectrum[0]) > float(spectrum[1]):
        raise GraphInputError(
            f"spectrum must be None or a pair (low, high) of finite numbers with low <= high holding every "
            f"eigenvalue; got {value_text(spectrum)}"
        )
    return float(spectrum[0]), float(spectrum[1])


def _check_device(device) -> torch.device:
    """``torch.device(device)`` for an available device, else GraphInputError naming it."""
    try:
        parsed = torch.device(device)
        torch.empty(0, device=parsed)  # raises if that device is not available here
    except (RuntimeError, TypeError, AssertionError, ValueError) as exc:
        raise GraphInputError(f"device {value_text(device)} is not a device available here ({exc})") from None
    return parsed


class SparseOperator:
    r"""A square sparse linear operator: a torch CSR matrix and what is known about it.

    The operator is ``matrix + U @ V^H`` where the optional low-rank part ``(U, V)`` (N, r)
    carries dense rank-r terms (the teleport of a PageRank walk, say) without ever forming an
    N x N tensor.

    The CSR structure is validated once, here (see :func:`check_csr`). The operator then keeps
    its product-ready parts: int64 indices, the values as real arrays (a complex matrix as its
    real and imaginary parts) and, when not Hermitian, the transposed pattern for the backward
    (built now, O(nnz) memory; Hermitian operators need none). Treat an operator as immutable.

    Args:
        matrix: torch sparse CSR tensor (N, N), float32/float64/complex64/complex128.
        hermitian: whether the whole operator equals its conjugate transpose (the backward
            of a product is then one more forward product).
        spectrum: a known interval ``(low, high)`` holding the (real parts of the) eigenvalues,
            or None.
        kind: short text naming the construction, e.g. ``"normalized_laplacian"``.
        low_rank: optional pair ``(U, V)`` of dense (N, r) tensors of the matrix's dtype.
        similar: optional pair ``(base, scale)``: this operator equals
            ``diag(scale) @ base @ diag(1 / scale)`` with ``base`` a Hermitian
            :class:`SparseOperator`. Powers can then run on ``base`` with the Hermitian kernel.

    Attributes:
        max_eigenvalue (float or None): largest eigenvalue, filled in once by
            :func:`phasorgraph.spectral.largest_eigenvalue` and kept here.

    Example:
        >>> import torch
        >>> m = torch.eye(3).to_sparse_csr()
        >>> op = SparseOperator(m, hermitian=True, spectrum=(1.0, 1.0), kind="identity")
        >>> (op @ torch.ones(3, 2)).tolist()
        [[1.0, 1.0], [1.0, 1.0], [1.0, 1.0]]
        >>> op.matmul_add(torch.ones(3, 1), torch.ones(3, 1), alpha=2.0, beta=-1.0).tolist()
        [[1.0], [1.0], [1.0]]
    """

    def __init__(self, matrix: torch.Tensor, *, hermitian: bool, spectrum: Optional[tuple] = None,
                 kind: str = "operator", low_rank: Optional[tuple] = None,
                 similar: Optional[tuple] = None, max_eigenvalue: Optional[float] = None,
                 _checked: bool = False, _transpose: Optional[tuple] = None):
        if not isinstance(matrix, torch.Tensor) or matrix.layout != torch.sparse_csr:
            raise GraphInputError(
                f"matrix must be a torch sparse CSR tensor; got {getattr(matrix, 'layout', type(matrix).__name__)}"
            )
        if matrix.dim() != 2 or matrix.shape[0] != matrix.shape[1]:
            raise GraphInputError(f"matrix must be square (N, N); got shape {tuple(matrix.shape)}")
        if matrix.dtype not in _SUPPORTED:
            raise GraphInputError(f"matrix dtype must be one of {_SUPPORTED}; got {matrix.dtype}")
        n = int(matrix.shape[0])
        if not _checked:
            crow, col = check_csr(matrix.crow_indices(), matrix.col_indices(), n, n, name="matrix")
            if crow.data_ptr() != matrix.crow_indices().data_ptr() or col.data_ptr() != matrix.col_indices().data_ptr():
                matrix = csr_matrix(crow, col, matrix.values(), (n, n))  # int64 indices from here on
        if low_rank is not None:
            U, V = low_rank
            if U.dim() != 2 or U.shape != V.shape or U.shape[0] != n:
                raise GraphInputError(f"low_rank must be two (N, r) tensors with N = {n}; got {tuple(U.shape)} and {tuple(V.shape)}")
            low_rank = (U.to(matrix.dtype), V.to(matrix.dtype))
        self.matrix = matrix
        self.hermitian = check_flag("hermitian", hermitian)
        self.spectrum = _check_spectrum(spectrum)
        if not isinstance(kind, str):
            raise GraphInputError(f"kind must be a string naming the operator; got {value_text(kind)}")
        self.kind = kind
        if max_eigenvalue is not None and (isinstance(max_eigenvalue, bool) or not isinstance(max_eigenvalue, numbers.Real)
                                           or not math.isfinite(float(max_eigenvalue))):
            raise GraphInputError(f"max_eigenvalue must be None or a finite number; got {value_text(max_eigenvalue)}")
        self.low_rank = low_rank
        self.similar = similar
        self.max_eigenvalue = max_eigenvalue
        self._adjoint: Optional[SparseOperator] = None
        self._prepare(_transpose)

    def _prepare(self, transpose: Optional[tuple] = None) -> None:
        """The product-ready parts: int64 indices, real value arrays, the transposed pattern."""
        m = self.matrix
        self._n, self._dtype, self._device = int(m.shape[0]), m.dtype, m.device
        self._crow = m.crow_indices().to(torch.int64).contiguous()
        self._col = m.col_indices().to(torch.int64).contiguous()
        vre, vim = _split_values(m.values().detach())
        self._vre = vre.contiguous()
        self._vim = None if vim is None else vim.contiguous()
        if self.hermitian:
            transpose = (None, None, None)
        elif transpose is None:
            transpose = _transpose_pattern(self._crow, self._col, self.num_rows)
        self._t_crow, self._t_col, self._t_perm = transpose

    # ------------------------------------------------------------------ facts
    # (plain Python values kept at construction: reading them never touches the sparse matrix,
    # which torch.compile cannot trace; a subclass that sets only ``matrix`` gets them from it)
    @property
    def shape(self) -> torch.Size:
        n = self.num_rows
        return torch.Size((n, n))

    @property
    def num_rows(self) -> int:
        """Rows of the features this operator multiplies (all of them for a whole operator)."""
        n = getattr(self, "_n", None)
        return int(self.matrix.shape[0]) if n is None else n

    @property
    def num_nodes(self) -> int:
        """Nodes of the whole graph: ``num_rows`` here (an operator on a shard holds fewer rows)."""
        return self.num_rows

    @property
    def dtype(self) -> torch.dtype:
        d = getattr(self, "_dtype", None)
        return self.matrix.dtype if d is None else d

    @property
    def device(self) -> torch.device:
        d = getattr(self, "_device", None)
        return self.matrix.device if d is None else d

    @property
    def is_complex(self) -> bool:
        return self.dtype.is_complex

    @property
    def nnz(self) -> int:
        col = getattr(self, "_col", None)
        return int(self.matrix.values().numel() if col is None else col.numel())

    def __repr__(self) -> str:
        extra = f", low_rank={self.low_rank[0].shape[1]}" if self.low_rank is not None else ""
        return (f"SparseOperator(kind={self.kind!r}, shape={tuple(self.shape)}, nnz={self.nnz}, "
                f"dtype={self.dtype}, hermitian={self.hermitian}, spectrum={self.spectrum}{extra})")

    _DERIVED = ("_crow", "_col", "_vre", "_vim", "_t_crow", "_t_col", "_t_perm", "_kernel", "_n", "_dtype", "_device")

    def __getstate__(self):
        m = self.matrix
        state = dict(self.__dict__)
        state["matrix"] = (m.crow_indices(), m.col_indices(), m.values(), tuple(m.shape))
        state["_adjoint"] = None
        for key in self._DERIVED:  # rebuilt from the matrix on loading
            state.pop(key, None)
        return state

    def __setstate__(self, state):
        crow, col, val, size = state["matrix"]
        state["matrix"] = csr_matrix(crow, col, val, size)
        self.__dict__.update(state)
        self._prepare()

    # ------------------------------------------------------------------ products
    def matmul(self, x: torch.Tensor) -> torch.Tensor:
        """``op @ x`` for x of shape (N, ...), differentiable in x (see :meth:`matmul_add`)."""
        return _operator_product(self, x, None, 1.0, 0.0, 0.0)

    __matmul__ = matmul

    def matmul_add(self, x: torch.Tensor, z: Optional[torch.Tensor] = None, *, alpha: float = 1.0,
                   beta: float = 1.0, shift: float = 0.0) -> torch.Tensor:
        r"""Fused :math:`\alpha\, \mathrm{op}\, x + \mathrm{shift}\, x + \beta z` in one pass over memory.

        One term of a Chebyshev recursion on :math:`\tilde L = a\, \mathrm{op} + b I`,
        :math:`T_k = 2 \tilde L T_{k-1} - T_{k-2}`, is
        ``op.matmul_add(T_{k-1}, T_{k-2}, alpha=2 * a, shift=2 * b, beta=-1)``.
        Differentiable in x and z; the backward of x is
        :math:`\alpha\, \mathrm{op}^H g + \mathrm{shift}\, g` (one more fused product).

        Args:
            x: (N, ...) real or complex tensor of the operator's precision.
            z: optional tensor of the result's shape (N, ...) (default None: no z term).
            alpha, beta, shift: finite real numbers (defaults 1, 1, 0).

        Returns:
            (N, ...) tensor, complex if the operator, x or z is.

        Example:
            >>> import torch
            >>> op = SparseOperator(torch.tensor([[0.0, 1.0], [1.0, 0.0]]).to_sparse_csr(), hermitian=True)
            >>> op.matmul_add(torch.tensor([[1.0], [2.0]]), torch.ones(2, 1), alpha=2.0, beta=-1.0, shift=1.0).tolist()
            [[4.0], [3.0]]
        """
        return _operator_product(self, x, z, _check_scalar("alpha", alpha), _check_scalar("shift", shift),
                                 _check_scalar("beta", beta))

    def transpose_conj(self) -> "SparseOperator":
        """The conjugate transpose ``op^H``, built once from the stored transposed pattern (itself when Hermitian)."""
        if self.hermitian:
            return self
        if self._adjoint is None:
            n = self.num_rows
            vals = self.matrix.values()[self._t_perm]
            if vals.is_complex():
                vals = vals.conj().resolve_conj()
            low_rank = None if self.low_rank is None else (self.low_rank[1], self.low_rank[0])
            inverse = torch.empty_like(self._t_perm)
            inverse[self._t_perm] = torch.arange(self._t_perm.numel(), device=inverse.device)
            adj = SparseOperator(csr_matrix(self._t_crow, self._t_col, vals, (n, n)), hermitian=False,
                                 spectrum=self.spectrum, kind=self.kind + "^H", low_rank=low_rank, max_eigenvalue=self.max_eigenvalue,
                                 _checked=True, _transpose=(self._crow, self._col, inverse))
            adj._adjoint = self
            self._adjoint = adj
        return self._adjoint

    # ------------------------------------------------------------------ conversions
    def to_dense(self) -> torch.Tensor:
        """The dense (N, N) matrix. Small graphs only: this is the one N x N tensor in the class."""
        dense = self.matrix.to_dense()
        if self.low_rank is not None:
            U, V = self.low_rank
            dense = dense + U @ V.conj().T
        return dense

    def to(self, dtype: Optional[torch.dtype] = None, device=None) -> "SparseOperator":
        """A copy with another dtype and/or device. Casting complex to real is refused."""
        dtype = self.dtype if dtype is None else dtype
        if not isinstance(dtype, torch.dtype) or dtype not in _SUPPORTED:
            raise GraphInputError(f"dtype must be one of {_SUPPORTED}; got {dtype}")
        if self.is_complex and not dtype.is_complex:
            raise GraphInputError(
                f"dtype {dtype} would drop the imaginary part of a complex operator ({self.dtype}); "
                f"use {_COMPLEX_OF[dtype]} instead"
            )
        m = self.matrix
        device = m.device if device is None else _check_device(device)
        matrix = csr_matrix(m.crow_indices().to(device), m.col_indices().to(device),
                            m.values().to(device=device, dtype=dtype), m.shape)
        low_rank = None
        if self.low_rank is not None:
            low_rank = tuple(t.to(device=device, dtype=dtype) for t in self.low_rank)
        similar = None
        if self.similar is not None:
            base, scale = self.similar
            similar = (base.to(dtype, device), scale.to(device=device, dtype=_real_precision(dtype)))
        transpose = None
        if not self.hermitian:
            transpose = tuple(t.to(device) for t in (self._t_crow, self._t_col, self._t_perm))
        return SparseOperator(matrix, hermitian=self.hermitian, spectrum=self.spectrum, kind=self.kind,
                              low_rank=low_rank, similar=similar, max_eigenvalue=self.max_eigenvalue, _checked=True,
                              _transpose=transpose)


class PatternOperator:
    r"""``identity * I + scale * A`` with A a CSR matrix of fixed pattern and tensor values.

    The values may require grad (built, say, from a learned charge): every product carries
    the gradient to them through the fused value-gradient kernel
    :math:`\partial L / \partial v_k = \mathrm{scale} \sum_f g[r_k, f]\, \overline{x[c_k, f]}`
    (no (nnz x F) temporary). The pattern is validated once, here; build the object once per
    set of values (once per forward pass) and reuse it for every product.

    Args:
        crow, col: CSR row pointer (N + 1,) and sorted column indices (nnz,), int32/int64.
        values: (nnz,) real or complex tensor (real and imaginary parts are kept as two real
            arrays; ``values_im`` gives the imaginary part directly instead).
        values_im: optional (nnz,) real imaginary parts, with ``values`` then the real parts.
        hermitian: whether ``A`` is Hermitian (the caller vouches for it; the backward of x
            then uses A itself). Otherwise the transposed pattern is built here.
        identity, scale: finite real numbers (defaults 0 and 1).

    Shape:
        x: (N, ...) real or complex of the values' precision; output (N, ...), complex if the
        values or x are.

    Example:
        >>> import torch
        >>> crow, col = torch.tensor([0, 1, 2]), torch.tensor([1, 0])
        >>> v = torch.tensor([2.0, 2.0], requires_grad=True)
        >>> op = PatternOperator(crow, col, v, hermitian=True, identity=1.0, scale=-1.0)
        >>> y = op.matmul(torch.ones(2, 1)); y.tolist()
        [[-1.0], [-1.0]]
        >>> y.sum().backward(); v.grad.tolist()
        [-1.0, -1.0]
    """

    def __init__(self, crow: Tensor, col: Tensor, values: Tensor, values_im: Optional[Tensor] = None, *,
                 hermitian: bool, identity: float = 0.0, scale: float = 1.0, _checked: bool = False,
                 _transpose: Optional[tuple] = None):
        if not _checked:
            if not isinstance(crow, torch.Tensor) or crow.dim() != 1 or crow.numel() < 1:
                raise GraphInputError(f"crow must be a 1-D tensor of N + 1 >= 1 row offsets; got "
                                      f"{type(crow).__name__ if not isinstance(crow, torch.Tensor) else tuple(crow.shape)}")
            n = crow.numel() - 1
            crow, col = check_csr(crow, col, n, n, name="pattern")
            vre, vim = _check_values(values, values_im, col.numel())
        else:
            vre, vim = (values, values_im) if values_im is not None else _split_values(values)
        if vre.device != crow.device:
            raise GraphInputError(f"values are on {vre.device} but the pattern is on {crow.device}; move one of them")
        self.num_rows = crow.numel() - 1
        self.hermitian = bool(hermitian)
        self.identity = _check_scalar("identity", identity)
        self.scale = _check_scalar("scale", scale)
        self._crow, self._col, self._vre, self._vim = crow, col, vre, vim
        if self.hermitian:
            _transpose = (None, None, None)
        elif _transpose is None:
            _transpose = _transpose_pattern(crow, col, self.num_rows)
        self._t_crow, self._t_col, self._t_perm = _transpose

    @property
    def dtype(self) -> torch.dtype:
        real = self._vre.dtype
        return _COMPLEX_OF[real] if self._vim is not None else real

    @property
    def is_complex(self) -> bool:
        return self._vim is not None

    @property
    def device(self) -> torch.device:
        return self._vre.device

    def matmul(self, x: Tensor) -> Tensor:
        """``(identity I + scale A) x`` for x (N, ...)."""
        return _pattern_product(self, x, None, 1.0, 0.0, 0.0)

    __matmul__ = matmul
    __call__ = matmul

    def matmul_add(self, x: Tensor, z: Optional[Tensor] = None, *, alpha: float = 1.0, beta: float = 1.0,
                   shift: float = 0.0) -> Tensor:
        r"""Fused :math:`\alpha (\mathrm{identity}\, I + \mathrm{scale}\, A) x + \mathrm{shift}\, x + \beta z`, one pass."""
        return _pattern_product(self, x, z, _check_scalar("alpha", alpha), _check_scalar("shift", shift),
                                _check_scalar("beta", beta))

    def with_values(self, values: Tensor, values_im: Optional[Tensor] = None) -> "PatternOperator":
        """The same pattern, ``hermitian``, ``identity`` and ``scale`` with other values.

        The pattern is not validated again and a transposed pattern is reused, so many value
        sets on one pattern (one per charge, say) cost only their values. The caller vouches
        that ``hermitian`` still holds for the new values.

        Args:
            values, values_im: as for the constructor, one entry per non-zero.

        Example:
            >>> import torch
            >>> op = PatternOperator(torch.tensor([0, 1, 1]), torch.tensor([1]), torch.tensor([2.0]), hermitian=False)
            >>> op.with_values(torch.tensor([3.0])).matmul(torch.ones(2, 1)).tolist()
            [[3.0], [0.0]]
        """
        vre, vim = _check_values(values, values_im, self._col.numel())
        if vre.device != self._crow.device:
            raise GraphInputError(f"values are on {vre.device} but the pattern is on {self._crow.device}; move one of them")
        return PatternOperator(self._crow, self._col, vre, vim, hermitian=self.hermitian, identity=self.identity,
                               scale=self.scale, _checked=True, _transpose=(self._t_crow, self._t_col, self._t_perm))


def _check_values(values, values_im, nnz: int) -> tuple:
    """Values as (re, im-or-None) real arrays of one precision, one entry per column index."""
    if not isinstance(values, torch.Tensor) or values.dim() != 1 or values.numel() != nnz:
        raise GraphInputError(f"values must be 1-D with one entry per column index ({nnz}); "
                              f"got shape {tuple(getattr(values, 'shape', ()))}")
    if values.dtype not in _SUPPORTED:
        raise GraphInputError(f"values dtype must be one of {_SUPPORTED}; got {values.dtype}")
    if values_im is None:
        return _split_values(values)
    if values.is_complex() or not isinstance(values_im, torch.Tensor) or values_im.dtype != values.dtype \
            or values_im.shape != values.shape or values_im.device != values.device:
        raise GraphInputError(
            f"values_im must be a real tensor like values (shape {tuple(values.shape)}, dtype {values.dtype}); "
            f"got {getattr(values_im, 'dtype', type(values_im).__name__)} with shape "
            f"{tuple(getattr(values_im, 'shape', ()))}"
        )
    return values, values_im


# ---------------------------------------------------------------------- the pure-torch reference
#
# The path every device other than CPU takes, and the reference the tests compare the native
# kernels with. It is the package's earlier CPU path, kept as it was measured: a real CSR
# times a dense block through torch.sparse.mm(matrix, x, "sum") (torch's row-parallel
# reduction kernel on CPU), a complex matrix as two real products of its real and imaginary
# parts on view_as_real features, combined as a + i b; the value gradient by
# torch.sparse.sampled_addmm.
def _plain(x: torch.Tensor) -> torch.Tensor:
    """x without lazy conjugate/negative bits (view_as_real refuses them)."""
    if x.is_complex():
        x = x.resolve_conj()
    return x.resolve_neg()


def _real_spmm(matrix: torch.Tensor, x2d: torch.Tensor) -> torch.Tensor:
    """Real CSR (M, N) times real (N, W), with the row-parallel reduction kernel on CPU."""
    if x2d.shape[1] == 0 or matrix.shape[0] == 0 or matrix.shape[1] == 0:
        return x2d.new_zeros((matrix.shape[0], x2d.shape[1]))
    if matrix.device.type == "cpu":
        return torch.sparse.mm(matrix, x2d.contiguous(), "sum")
    return torch.sparse.mm(matrix, x2d)


def _view_real(x2d: torch.Tensor) -> torch.Tensor:
    """Complex (N, W) as real (N, 2W), interleaved (re, im) per feature."""
    return torch.view_as_real(_plain(x2d)).reshape(x2d.shape[0], 2 * x2d.shape[1])


def _view_complex(y: torch.Tensor) -> torch.Tensor:
    """Real (N, 2W) interleaved as complex (N, W)."""
    return torch.view_as_complex(y.reshape(y.shape[0], y.shape[1] // 2, 2))


def _reference_matrices(crow, col, vre, vim):
    """(real part, imaginary part or None, complex matrix or None) as torch CSR tensors."""
    n = crow.numel() - 1
    size = (n, n)
    re = csr_matrix(crow, col, vre, size)
    if vim is None:
        return re, None, None
    if crow.device.type == "cpu":
        return re, csr_matrix(crow, col, vim, size), None
    return None, None, csr_matrix(crow, col, torch.complex(vre, vim), size)


def _reference_product(crow, col, vre, vim, x2d):
    """``A @ x2d`` by torch's sparse kernels."""
    re, im, full = _reference_matrices(crow, col, vre, vim)
    if full is not None:  # not on CPU: the device's own complex kernel
        if x2d.shape[1] == 0:
            return x2d.new_zeros((full.shape[0], 0), dtype=full.dtype)
        return torch.sparse.mm(full, x2d.to(full.dtype))
    if im is None:
        if x2d.is_complex():  # one real product of width 2W; the matrix is never cast
            return _view_complex(_real_spmm(re, _view_real(x2d)))
        return _real_spmm(re, x2d)
    if not x2d.is_complex():
        return torch.complex(_real_spmm(re, x2d), _real_spmm(im, x2d))
    xr = _view_real(x2d)
    a = _view_complex(_real_spmm(re, xr))
    b = _view_complex(_real_spmm(im, xr))
    return a.add_(b, alpha=1j)  # (Re A) x + i (Im A) x


def _reference_matmul(crow, col, vre, vim, x, z, alpha, shift, beta):
    out = _reference_product(crow, col, vre, vim, x)
    if alpha != 1:
        out = out * alpha
    if shift != 0:
        out = out + shift * x
    if z is not None:
        out = out + beta * z
    return out


def _reference_matmul_real(crow, col, vre, vim, g, alpha, shift):
    """``Re(alpha A g + shift g)`` for complex g."""
    g = _plain(g)
    re, im, full = _reference_matrices(crow, col, vre, vim)
    if full is not None:
        out = torch.sparse.mm(full, g).real if g.shape[1] else g.real.new_zeros(g.shape)
    elif im is None:
        out = _real_spmm(re, g.real.contiguous())
    else:
        out = _real_spmm(re, g.real.contiguous()).sub_(_real_spmm(im, g.imag.contiguous()))
    return out * alpha + shift * g.real


def _sampled_products(grad2d: torch.Tensor, x2d: torch.Tensor, crow: torch.Tensor, cols: torch.Tensor,
                      complex_values: bool) -> torch.Tensor:
    r"""g_k = sum_f grad[r_k, f] * conj(x[c_k, f]) on the CSR pattern (crow, cols), by sampled_addmm.

    One ``torch.sparse.sampled_addmm`` call per real or complex part: (grad @ x^H) sampled on
    the pattern. Returns complex g when ``complex_values``, else its real part.
    """
    dtype = torch.promote_types(grad2d.dtype, x2d.dtype)
    if not complex_values:
        dtype = _real_precision(dtype)
    g, x = _plain(grad2d), _plain(x2d)
    if g.is_complex() and x.is_complex() and not complex_values:
        # Re(sum g conj(x)) = sum over the real views of g_re x_re + g_im x_im
        g, x = _view_real(g), _view_real(x)
    if g.is_complex() and not x.is_complex():
        gs = [g.real.contiguous(), g.imag.contiguous()]
    else:
        gs = [g.contiguous()]
    x = x.contiguous()
    nnz = cols.numel()
    if nnz == 0 or x.shape[1] == 0:
        return torch.zeros(nnz, dtype=dtype, device=x.device)
    n = crow.numel() - 1
    xh = x.conj().T.resolve_conj() if x.is_complex() else x.T  # (W, N), x^H
    outs = []
    for t in gs:
        pattern = csr_matrix(crow, cols, t.new_zeros(nnz), (n, n))
        outs.append(torch.sparse.sampled_addmm(pattern, t, xh, beta=0.0).values().detach().clone())
    out = outs[0] if len(outs) == 1 else torch.complex(outs[0], outs[1])
    return out.to(dtype)


def _reference_value_grad(crow, col, g, x, alpha, complex_values):
    out = _sampled_products(g, x, crow, col, complex_values) * alpha
    if complex_values:
        return torch.stack([out.real, out.imag]) if out.is_complex() else torch.stack([out, torch.zeros_like(out)])
    return out


# ---------------------------------------------------------------------- the native CPU path
_STATE = {"native": True, "module": None, "failed": False}


def _load_native():
    """The numba kernel module, imported on first use (None, with one warning, if it cannot load)."""
    mod = _STATE["module"]
    if mod is None and not _STATE["failed"]:
        try:
            from . import _native as mod
        except Exception as exc:  # numba missing or broken: the torch path still works
            _STATE["failed"] = True
            warnings.warn(f"phasorgraph: native CPU kernels unavailable ({exc!r}); using torch's sparse kernels",
                          RuntimeWarning, stacklevel=3)
            return None
        _STATE["module"] = mod
    return mod


def _use_native(t: Tensor):
    if not _STATE["native"] or t.device.type != "cpu":
        return None
    return _load_native()


@contextlib.contextmanager
def native_kernels(enabled: bool):
    """Context manager: run CPU products on the native kernels (True, the default) or on torch's.

    The torch path is the reference the native kernels are tested against, and the path
    every other device takes. The choice is read when a product runs (also inside compiled
    code) and is process-wide.

    Example:
        >>> import torch
        >>> op = SparseOperator(torch.eye(2).to_sparse_csr(), hermitian=True)
        >>> with native_kernels(False):
        ...     (op @ torch.ones(2, 1)).tolist()
        [[1.0], [1.0]]
    """
    before = _STATE["native"]
    _STATE["native"] = bool(enabled)
    try:
        yield
    finally:
        _STATE["native"] = before


def _np(t: Tensor) -> np.ndarray:
    """An input for a kernel: a C-contiguous array (the kernels index rows as flat blocks)."""
    return np.ascontiguousarray(t.detach().contiguous().numpy())


def _out(t: Tensor) -> np.ndarray:
    """A kernel's output array: the tensor's own memory (never a copy)."""
    a = t.numpy()
    if not a.flags.c_contiguous:  # torch.empty always gives C order; a copy would lose the result
        raise RuntimeError(f"internal error: kernel output of shape {tuple(t.shape)} is not C-contiguous")
    return a


def _real_block(t: Tensor) -> Tensor:
    """(N, W) as a contiguous real block: complex ones as their interleaved (N, 2W) view."""
    t = _plain(t).contiguous()
    if t.is_complex():
        return torch.view_as_real(t).reshape(t.shape[0], 2 * t.shape[1])
    return t


def _native_matmul(native, crow, col, vre, vim, x, z, alpha, shift, beta):
    n, w = crow.numel() - 1, x.shape[1]
    out_dtype = _COMPLEX_OF[vre.dtype] if (vim is not None or x.is_complex()) else vre.dtype
    out = torch.empty((n, w), dtype=out_dtype)
    if n == 0 or w == 0:
        return out
    scalar = np.float32 if vre.dtype == torch.float32 else np.float64
    xb, ob = _real_block(x), _real_block(out)
    zb = _real_block(z) if z is not None else ob
    args = (_np(crow), _np(col))
    xa = _np(xb)
    ahead = native.lookahead(*args, xa.shape[1] * xa.itemsize)
    with native.LOCK:
        bounds = native.row_blocks(args[0], native.set_threads(torch.get_num_threads()))
        if vim is None:
            native.csr_real(bounds, *args, _np(vre), xa, _np(zb), _out(ob),
                            scalar(alpha), scalar(shift), scalar(beta), z is not None, ahead)
        elif x.is_complex():
            native.csr_complex(bounds, *args, _np(vre), _np(vim), xa, _np(zb), _out(ob),
                               scalar(alpha), scalar(shift), scalar(beta), z is not None, ahead)
        else:
            native.csr_complex_real_x(bounds, *args, _np(vre), _np(vim), xa, _np(zb), _out(ob),
                                      scalar(alpha), scalar(shift), scalar(beta), z is not None, ahead)
    return out


def _native_matmul_real(native, crow, col, vre, vim, g, alpha, shift):
    n, w = crow.numel() - 1, g.shape[1]
    out = torch.empty((n, w), dtype=vre.dtype)
    if n == 0 or w == 0:
        return out
    scalar = np.float32 if vre.dtype == torch.float32 else np.float64
    c, cols, ga = _np(crow), _np(col), _np(_real_block(g))
    ahead = native.lookahead(c, cols, ga.shape[1] * ga.itemsize)
    with native.LOCK:
        bounds = native.row_blocks(c, native.set_threads(torch.get_num_threads()))
        native.csr_complex_real_part(bounds, c, cols, _np(vre), _np(vim), ga, _out(out),
                                     scalar(alpha), scalar(shift), ahead)
    return out


def _native_value_grad(native, crow, col, g, x, alpha, complex_values):
    nnz = col.numel()
    real = _real_precision(g.dtype)
    out = torch.zeros((2, nnz) if complex_values else (nnz,), dtype=real)
    if nnz == 0 or x.shape[1] == 0:
        return out
    scalar = np.float32 if real == torch.float32 else np.float64
    c, cols, ga, xa = _np(crow), _np(col), _np(_real_block(g)), _np(_real_block(x))
    ahead = native.lookahead(c, cols, xa.shape[1] * xa.itemsize)
    with native.LOCK:
        bounds = native.row_blocks(c, native.set_threads(torch.get_num_threads()))
        if not complex_values:
            # real values: Re(sum g conj(x)) is the plain dot product of the (interleaved) blocks
            native.value_grad_real(bounds, c, cols, ga, xa, _out(out), scalar(alpha), ahead)
        else:  # complex g; x complex or real (the kernel tells them apart by width)
            o = _out(out)
            native.value_grad_complex(bounds, c, cols, ga, xa, o[0], o[1], scalar(alpha), ahead)
    return out


# ---------------------------------------------------------------------- custom ops
@torch.library.custom_op("phasorgraph::csr_matmul", mutates_args=())
def _csr_matmul(crow: Tensor, col: Tensor, vre: Tensor, vim: Optional[Tensor], x: Tensor, z: Optional[Tensor],
                t_crow: Optional[Tensor], t_col: Optional[Tensor], t_perm: Optional[Tensor],
                alpha: float, shift: float, beta: float) -> Tensor:
    """``alpha * A x + shift * x + beta * z``; A = (crow, col, vre + i vim), x (N, W), z like the result.

    ``t_*`` is the transposed pattern for the backward (None: A is Hermitian).
    """
    native = _use_native(x)
    if native is not None:
        return _native_matmul(native, crow, col, vre, vim, x, z, alpha, shift, beta)
    return _reference_matmul(crow, col, vre, vim, x, z, alpha, shift, beta)


@_csr_matmul.register_fake
def _(crow, col, vre, vim, x, z, t_crow, t_col, t_perm, alpha, shift, beta):
    dtype = _COMPLEX_OF[vre.dtype] if (vim is not None or x.is_complex()) else vre.dtype
    return x.new_empty((crow.shape[0] - 1, x.shape[1]), dtype=dtype)


@torch.library.custom_op("phasorgraph::csr_matmul_real", mutates_args=())
def _csr_matmul_real(crow: Tensor, col: Tensor, vre: Tensor, vim: Tensor, g: Tensor, alpha: float,
                     shift: float) -> Tensor:
    """``Re(alpha * A g + shift * g)`` for complex A and complex g: the gradient of a real x."""
    native = _use_native(g)
    if native is not None:
        return _native_matmul_real(native, crow, col, vre, vim, g, alpha, shift)
    return _reference_matmul_real(crow, col, vre, vim, g, alpha, shift)


@_csr_matmul_real.register_fake
def _(crow, col, vre, vim, g, alpha, shift):
    return g.new_empty((crow.shape[0] - 1, g.shape[1]), dtype=vre.dtype)


@torch.library.custom_op("phasorgraph::csr_value_grad", mutates_args=())
def _csr_value_grad(crow: Tensor, col: Tensor, g: Tensor, x: Tensor, alpha: float, complex_values: bool) -> Tensor:
    r"""``alpha * sum_f g[r_k, f] conj(x[c_k, f])`` on the pattern: (nnz,) real part, or (2, nnz) (re, im)."""
    native = _use_native(x)
    if native is not None:
        return _native_value_grad(native, crow, col, g, x, alpha, complex_values)
    return _reference_value_grad(crow, col, g, x, alpha, complex_values)


@_csr_value_grad.register_fake
def _(crow, col, g, x, alpha, complex_values):
    real = _real_precision(g.dtype)
    shape = (2, col.shape[0]) if complex_values else (col.shape[0],)
    return g.new_empty(shape, dtype=real)


def _matmul_setup(ctx, inputs, output):
    crow, col, vre, vim, x, z, t_crow, t_col, t_perm, alpha, shift, beta = inputs
    ctx.save_for_backward(crow, col, vre, vim, x, t_crow, t_col, t_perm)
    ctx.scalars = (alpha, shift, beta)
    ctx.x_is_complex = x.is_complex()


def _matmul_backward(ctx, grad):
    crow, col, vre, vim, x, t_crow, t_col, t_perm = ctx.saved_tensors
    alpha, shift, beta = ctx.scalars
    needs = ctx.needs_input_grad
    g_vre = g_vim = g_x = g_z = None
    if needs[2] or needs[3]:
        gv = _csr_value_grad(crow, col, grad, x, alpha, vim is not None)
        if vim is None:
            g_vre = gv
        else:
            g_vre, g_vim = gv[0], gv[1]
    if needs[4]:
        if t_perm is None:  # Hermitian: A^H = A
            a_crow, a_col, a_re, a_im = crow, col, vre, vim
        else:
            a_crow, a_col, a_re = t_crow, t_col, vre[t_perm]
            a_im = None if vim is None else -vim[t_perm]
        if grad.is_complex() and not ctx.x_is_complex:
            if a_im is None:  # real A, real x: cannot give a complex grad; kept for safety
                g_x = _csr_matmul(a_crow, a_col, a_re, None, grad.real.contiguous(), None, None, None, None,
                                  alpha, shift, 0.0)
            else:
                g_x = _csr_matmul_real(a_crow, a_col, a_re, a_im, grad, alpha, shift)
        else:
            g_x = _csr_matmul(a_crow, a_col, a_re, a_im, grad, None, None, None, None, alpha, shift, 0.0)
    if needs[5]:
        g_z = grad * beta
    return None, None, g_vre, g_vim, g_x, g_z, None, None, None, None, None, None


torch.library.register_autograd("phasorgraph::csr_matmul", _matmul_backward, setup_context=_matmul_setup)


# ---------------------------------------------------------------------- product front ends
def _flat(x: torch.Tensor) -> torch.Tensor:
    """(N, ...) as (N, W); works for N = 0 and W = 0 too."""
    width = 1
    for s in x.shape[1:]:
        width *= int(s)
    return x.reshape(x.shape[0], width)


def _check_features(op, x: torch.Tensor) -> None:
    if not isinstance(x, torch.Tensor):
        raise GraphInputError(f"x must be a torch.Tensor; got {type(x).__name__}")
    if x.dim() < 1 or x.shape[0] != op.num_rows:
        raise GraphInputError(
            f"x must have num_nodes = {op.num_rows} rows (shape (N, ...)); got shape {tuple(x.shape)}"
        )
    if x.dtype not in _SUPPORTED:
        raise GraphInputError(f"x dtype must be one of {_SUPPORTED}; got {x.dtype}")
    if _real_precision(x.dtype) != _real_precision(op.dtype):
        raise GraphInputError(
            f"x has dtype {x.dtype} but the operator is {op.dtype}; use the same precision "
            f"(op.to(...) or x.to(...))"
        )
    if x.device != op.device:
        raise GraphInputError(f"x is on {x.device} but the operator is on {op.device}; move one of them")


def _check_addend(op, x: Tensor, z) -> Tensor:
    """z checked against the result of ``op @ x``: same shape, same precision and device."""
    if not isinstance(z, torch.Tensor):
        raise GraphInputError(f"z must be a torch.Tensor or None; got {type(z).__name__}")
    if tuple(z.shape) != tuple(x.shape):
        raise GraphInputError(f"z must have the result's shape {tuple(x.shape)}; got shape {tuple(z.shape)}")
    if z.dtype not in _SUPPORTED or _real_precision(z.dtype) != _real_precision(op.dtype):
        raise GraphInputError(f"z has dtype {z.dtype} but the operator is {op.dtype}; use the same precision")
    if z.device != x.device:
        raise GraphInputError(f"z is on {z.device} but x is on {x.device}; move one of them")
    return z


def _fused(crow, col, vre, vim, transpose, x, z, alpha, shift, beta) -> Tensor:
    """The custom op on (N, ...) blocks: reshapes, and casts z to the result's dtype."""
    x2d = _flat(x)
    out_complex = vim is not None or x.is_complex() or (z is not None and z.is_complex())
    if out_complex and not x.is_complex() and vim is None:
        x2d = x2d.to(_COMPLEX_OF[vre.dtype])  # only a complex z with a real operator and real x
    z2d = None
    if z is not None:
        z2d = _flat(z)
        if out_complex and not z2d.is_complex():
            z2d = z2d.to(_COMPLEX_OF[vre.dtype])
    t_crow, t_col, t_perm = transpose
    out = _csr_matmul(crow, col, vre, vim, x2d, z2d, t_crow, t_col, t_perm, alpha, shift, beta)
    return out.reshape(x.shape)


def _low_rank_term(low_rank, x2d: torch.Tensor) -> torch.Tensor:
    """``U (V^H x2d)`` for the (N, r) pair (U, V); small dense products, dtypes promoted."""
    U, V = low_rank
    dtype = torch.promote_types(U.dtype, x2d.dtype)
    U, V, x2d = U.to(dtype), V.to(dtype), x2d.to(dtype)
    return U @ (V.conj().T @ x2d)


def _operator_product(op: SparseOperator, x: Tensor, z, alpha: float, shift: float, beta: float) -> Tensor:
    _check_features(op, x)
    if z is not None:
        z = _check_addend(op, x, z)
    out = _fused(op._crow, op._col, op._vre, op._vim, (op._t_crow, op._t_col, op._t_perm), x, z, alpha, shift, beta)
    if op.low_rank is not None:
        term = _low_rank_term(op.low_rank, _flat(x)).reshape(x.shape)
        out = out + (term if alpha == 1 else alpha * term)
    return out


def _pattern_product(op: PatternOperator, x: Tensor, z, alpha: float, shift: float, beta: float) -> Tensor:
    # alpha (identity I + scale A) x + shift x + beta z = (alpha scale) A x + (alpha identity + shift) x + beta z
    _check_features(op, x)
    if z is not None:
        z = _check_addend(op, x, z)
    return _fused(op._crow, op._col, op._vre, op._vim, (op._t_crow, op._t_col, op._t_perm), x, z,
                  alpha * op.scale, alpha * op.identity + shift, beta)


def hermitian_matmul(op: SparseOperator, x: torch.Tensor) -> torch.Tensor:
    r"""``op @ x`` for a Hermitian (or real symmetric) operator, with backward ``op @ grad``.

    Because :math:`op^H = op`, the gradient :math:`\partial L / \partial x = op^H g = op\, g`
    is one more forward product: no transposed CSR matrix is ever built.

    Args:
        op: a :class:`SparseOperator` with ``hermitian=True``.
        x: (N, ...) real or complex tensor of the operator's precision. Real x with a complex
            operator gives a complex result (x is never cast to complex); complex x with a real
            operator is one real product of width 2F (the operator is never cast either).

    Returns:
        (N, ...) tensor: complex if either factor is complex.

    Notes:
        On CPU the native kernel reads each gathered feature row once and keeps a complex
        matrix as two real arrays; for real x and a complex operator the backward computes
        only :math:`\mathrm{Re}(op\, g)`. See bench/README.md for the measured speed.

    Example:
        >>> import torch
        >>> op = SparseOperator(torch.eye(2).to_sparse_csr(), hermitian=True)
        >>> hermitian_matmul(op, torch.ones(2, 3)).shape
        torch.Size([2, 3])
    """
    if not isinstance(op, SparseOperator):
        raise GraphInputError(f"op must be a SparseOperator; got {type(op).__name__}")
    if not op.hermitian:
        raise GraphInputError(f"op must be Hermitian for hermitian_matmul; got kind {op.kind!r} "
                              f"(use general_matmul or op @ x)")
    return op.matmul(x)


def general_matmul(op: SparseOperator, x: torch.Tensor) -> torch.Tensor:
    r"""``op @ x`` for any operator; backward ``op^H @ grad`` on the transposed pattern kept by ``op``.

    Args:
        op: a :class:`SparseOperator` (Hermitian or not; a low-rank part is allowed).
        x: (N, ...) real or complex tensor of the operator's precision.

    Returns:
        (N, ...) tensor: complex if either factor is complex.

    Example:
        >>> import torch
        >>> m = torch.tensor([[0.0, 1.0], [0.0, 0.0]]).to_sparse_csr()
        >>> op = SparseOperator(m, hermitian=False)
        >>> general_matmul(op, torch.tensor([[1.0], [2.0]])).tolist()
        [[2.0], [0.0]]
    """
    if not isinstance(op, SparseOperator):
        raise GraphInputError(f"op must be a SparseOperator; got {type(op).__name__}")
    return op.matmul(x)


def values_matmul(crow: torch.Tensor, col: torch.Tensor, values: torch.Tensor, x: torch.Tensor, *,
                  hermitian: bool = False) -> torch.Tensor:
    r"""``A @ x`` with ``A`` the CSR matrix ``(crow, col, values)``, differentiable in ``values`` and ``x``.

    The gradient of value k is :math:`\sum_f g[r_k, f]\, \overline{x[c_k, f]}` (its real part
    for real values), computed per row by a fused kernel with no (nnz x F) temporary. The
    gradient of x is :math:`A^H g`, taken as :math:`A g` when ``hermitian=True`` (the real part
    of it when x is real).

    Every call validates the CSR structure (O(nnz)) and, when not Hermitian, builds the
    transposed pattern; for repeated products on one pattern build a :class:`PatternOperator`
    once instead.

    Args:
        crow, col: int32/int64 CSR index tensors (N + 1,), (nnz,); columns sorted within each
            row, all in [0, N).
        values: (nnz,) real or complex tensor; may require grad.
        x: (N, ...) real or complex features of the same precision. Real x with complex values
            is multiplied without casting x to complex.
        hermitian: whether the values make A Hermitian (default False). The caller vouches
            for it; it is not checked. The row of each value and the transposed pattern come
            from the validated ``crow`` and ``col`` (:class:`PatternOperator` builds them).

    Returns:
        (N, ...) tensor, complex if values or x are.

    Example:
        >>> import torch
        >>> crow, col = torch.tensor([0, 1, 2]), torch.tensor([1, 0])
        >>> v = torch.tensor([2.0, 3.0], requires_grad=True)
        >>> values_matmul(crow, col, v, torch.ones(2, 1)).sum().backward(); v.grad.tolist()
        [1.0, 1.0]
    """
    for name, t in (("crow", crow), ("col", col)):
        if not isinstance(t, torch.Tensor) or t.dim() != 1 or t.dtype not in _INDEX:
            raise GraphInputError(f"{name} must be a 1-D int32 or int64 tensor; got "
                                  f"{getattr(t, 'dtype', type(t).__name__)} with shape {tuple(getattr(t, 'shape', ()))}")
    if crow.numel() < 1:
        raise GraphInputError("crow must hold N + 1 >= 1 row offsets; got an empty tensor")
    n = crow.numel() - 1
    vre, vim = _check_values(values, None, col.numel())
    if not isinstance(x, torch.Tensor) or x.dim() < 1 or x.shape[0] != n:
        raise GraphInputError(f"x must have N = {n} rows; got shape {tuple(getattr(x, 'shape', ()))}")
    if x.dtype not in _SUPPORTED or _real_precision(x.dtype) != _real_precision(values.dtype):
        raise GraphInputError(f"x has dtype {x.dtype} but values are {values.dtype}; use the same precision")
    crow, col = check_csr(crow, col, n, n, name="crow/col")
    op = PatternOperator(crow, col, vre, vim, hermitian=hermitian, _checked=True)
    return op.matmul(x)

r"""SparseOperator (a torch CSR matrix and what is known about it) and its products.

This module is plain sparse linear algebra: it knows nothing about graphs. The products are
custom autograd functions whose backward never asks autograd to transpose a CSR matrix:

* :func:`hermitian_matmul` - ``op @ x`` for Hermitian ``op``; backward ``op @ grad``.
* :func:`general_matmul` - ``op @ x`` for any ``op``; backward ``op^H @ grad`` with ``op^H``
  built once and cached on the operator.
* :func:`values_matmul` - ``A(values) @ x`` on a fixed CSR pattern, differentiable in the
  values (a sampled dense-dense product) and in ``x``.

A real operator applied to complex features never casts the operator to complex: the features
are viewed as real with ``torch.view_as_real`` and multiplied as one (N, 2F) real product.
"""

from __future__ import annotations

import warnings
from typing import Optional, Sequence

import torch
from torch.autograd.function import once_differentiable

from .errors import GraphInputError

__all__ = [
    "SparseOperator",
    "csr_matrix",
    "hermitian_matmul",
    "general_matmul",
    "values_matmul",
]

_REAL_OF = {torch.complex64: torch.float32, torch.complex128: torch.float64}
_COMPLEX_OF = {torch.float32: torch.complex64, torch.float64: torch.complex128}
_SUPPORTED = (torch.float32, torch.float64, torch.complex64, torch.complex128)



def csr_matrix(crow: torch.Tensor, col: torch.Tensor, values: torch.Tensor, size: Sequence[int]) -> torch.Tensor:
    """A torch sparse CSR tensor from its parts, without the beta-state warning."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)
        return torch.sparse_csr_tensor(crow, col, values, tuple(size), check_invariants=False)


def _real_precision(dtype: torch.dtype) -> torch.dtype:
    return _REAL_OF.get(dtype, dtype)


class SparseOperator:
    r"""A square sparse linear operator: a torch CSR matrix and what is known about it.

    The operator is ``matrix + U @ V^H`` where the optional low-rank part ``(U, V)`` (N, r)
    carries dense rank-r terms (the teleport of a PageRank walk, say) without ever forming an
    N x N tensor.

    Args:
        matrix: torch sparse CSR tensor (N, N), float32/float64/complex64/complex128.
        hermitian: whether the whole operator equals its conjugate transpose (enables the
            cheap-backward kernel :func:`hermitian_matmul`).
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
    """

    def __init__(self, matrix: torch.Tensor, *, hermitian: bool, spectrum: Optional[tuple] = None,
                 kind: str = "operator", low_rank: Optional[tuple] = None,
                 similar: Optional[tuple] = None, max_eigenvalue: Optional[float] = None):
        if not isinstance(matrix, torch.Tensor) or matrix.layout != torch.sparse_csr:
            raise GraphInputError(
                f"matrix must be a torch sparse CSR tensor; got {getattr(matrix, 'layout', type(matrix).__name__)}"
            )
        if matrix.dim() != 2 or matrix.shape[0] != matrix.shape[1]:
            raise GraphInputError(f"matrix must be square (N, N); got shape {tuple(matrix.shape)}")
        if matrix.dtype not in _SUPPORTED:
            raise GraphInputError(f"matrix dtype must be one of {_SUPPORTED}; got {matrix.dtype}")
        if low_rank is not None:
            U, V = low_rank
            n = matrix.shape[0]
            if U.dim() != 2 or U.shape != V.shape or U.shape[0] != n:
                raise GraphInputError(f"low_rank must be two (N, r) tensors with N = {n}; got {tuple(U.shape)} and {tuple(V.shape)}")
            low_rank = (U.to(matrix.dtype), V.to(matrix.dtype))
        self.matrix = matrix
        self.hermitian = bool(hermitian)
        self.spectrum = None if spectrum is None else (float(spectrum[0]), float(spectrum[1]))
        self.kind = kind
        self.low_rank = low_rank
        self.similar = similar
        self.max_eigenvalue = max_eigenvalue
        self._adjoint: Optional[SparseOperator] = None

    # ------------------------------------------------------------------ facts
    @property
    def shape(self) -> torch.Size:
        return self.matrix.shape

    @property
    def num_rows(self) -> int:
        """Rows of the features this operator multiplies (all of them for a whole operator)."""
        return int(self.matrix.shape[0])

    @property
    def num_nodes(self) -> int:
        """Nodes of the whole graph: ``num_rows`` here (an operator on a shard holds fewer rows)."""
        return int(self.matrix.shape[0])

    @property
    def dtype(self) -> torch.dtype:
        return self.matrix.dtype

    @property
    def device(self) -> torch.device:
        return self.matrix.device

    @property
    def is_complex(self) -> bool:
        return self.matrix.dtype.is_complex

    @property
    def nnz(self) -> int:
        return int(self.matrix.values().numel())

    def __repr__(self) -> str:
        extra = f", low_rank={self.low_rank[0].shape[1]}" if self.low_rank is not None else ""
        return (f"SparseOperator(kind={self.kind!r}, shape={tuple(self.shape)}, nnz={self.nnz}, "
                f"dtype={self.dtype}, hermitian={self.hermitian}, spectrum={self.spectrum}{extra})")

    def __getstate__(self):
        m = self.matrix
        state = dict(self.__dict__)
        state["matrix"] = (m.crow_indices(), m.col_indices(), m.values(), tuple(m.shape))
        state["_adjoint"] = None
        state.pop("_kernel", None)  # the prepared real/imaginary parts are rebuilt on first use
        return state

    def __setstate__(self, state):
        crow, col, val, size = state["matrix"]
        state["matrix"] = csr_matrix(crow, col, val, size)
        self.__dict__.update(state)

    # ------------------------------------------------------------------ products
    def matmul(self, x: torch.Tensor) -> torch.Tensor:
        """``op @ x`` for x of shape (N, ...), differentiable in x.

        Hermitian operators use :func:`hermitian_matmul`; others :func:`general_matmul`.
        """
        return hermitian_matmul(self, x) if self.hermitian else general_matmul(self, x)

    __matmul__ = matmul

    def transpose_conj(self) -> "SparseOperator":
        """The conjugate transpose ``op^H``, built once and cached (itself when Hermitian)."""
        if self.hermitian:
            return self
        if self._adjoint is None:
            t = self.matrix.to_sparse_coo().coalesce()
            idx, val = t.indices(), t.values()
            if val.is_complex():
                val = val.conj().resolve_conj()
            n = self.num_rows
            # sort by (new row, new col) = (old col, old row)
            order = torch.argsort(idx[1] * max(n, 1) + idx[0])
            rows, cols, vals = idx[1][order], idx[0][order], val[order]
            crow = torch.zeros(n + 1, dtype=torch.int64, device=rows.device)
            crow[1:] = torch.cumsum(torch.bincount(rows, minlength=n), 0)
            low_rank = None if self.low_rank is None else (self.low_rank[1], self.low_rank[0])
            spectrum = self.spectrum
            adj = SparseOperator(csr_matrix(crow, cols, vals, (n, n)), hermitian=False, spectrum=spectrum,
                                 kind=self.kind + "^H", low_rank=low_rank, max_eigenvalue=self.max_eigenvalue)
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
        if dtype not in _SUPPORTED:
            raise GraphInputError(f"dtype must be one of {_SUPPORTED}; got {dtype}")
        if self.is_complex and not dtype.is_complex:
            raise GraphInputError(
                f"dtype {dtype} would drop the imaginary part of a complex operator ({self.dtype}); "
                f"use {_COMPLEX_OF[dtype]} instead"
            )
        m = self.matrix
        device = m.device if device is None else torch.device(device)
        matrix = csr_matrix(m.crow_indices().to(device), m.col_indices().to(device),
                            m.values().to(device=device, dtype=dtype), m.shape)
        low_rank = None
        if self.low_rank is not None:
            low_rank = tuple(t.to(device=device, dtype=dtype) for t in self.low_rank)
        similar = None
        if self.similar is not None:
            base, scale = self.similar
            similar = (base.to(dtype, device), scale.to(device=device, dtype=_real_precision(dtype)))
        return SparseOperator(matrix, hermitian=self.hermitian, spectrum=self.spectrum, kind=self.kind,
                              low_rank=low_rank, similar=similar, max_eigenvalue=self.max_eigenvalue)


# ---------------------------------------------------------------------- the raw product
#
# Kernel choice (round-robin medians on the project's 2-core CPU machine, torch 2.13, at E = 1e6-2e6,
# F = 64; bench/README.md has the end-to-end figures):
# * a real CSR times a dense (N, W) block goes through torch.sparse.mm(matrix, x, "sum"), the
#   row-parallel CPU kernel torch added for reductions; it beat the plain ``matrix @ x`` by
#   about 1.3-1.7x here at F = 64 (same result to rounding).
# * torch's complex CSR product has no such kernel, and was about 1.5x slower than two real
#   products (real and imaginary parts of the values) of width 2F on view_as_real features,
#   combined as a + i b. So on CPU a complex matrix is kept as its two real parts, split once
#   per operator and cached. Other devices use torch.sparse.mm on the complex matrix directly.
# * int32 indices and feature chunking were no faster (chunking was slower), so neither is used.
def _check_features(op: SparseOperator, x: torch.Tensor) -> None:
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


def _plain(x: torch.Tensor) -> torch.Tensor:
    """x without lazy conjugate/negative bits (view_as_real refuses them)."""
    if x.is_complex():
        x = x.resolve_conj()
    return x.resolve_neg()


class _Csr:
    """A CSR matrix prepared for products; on CPU a complex one also as its two real parts.

    ``re`` and ``im`` share the index tensors of ``matrix``: the extra memory is one real array
    of nnz values each.
    """

    __slots__ = ("matrix", "re", "im")

    def __init__(self, matrix: torch.Tensor):
        self.matrix = matrix
        self.re = self.im = None
        if matrix.is_complex() and matrix.device.type == "cpu":
            crow, col = matrix.crow_indices(), matrix.col_indices()
            parts = torch.view_as_real(_plain(matrix.values().detach()))
            size = tuple(matrix.shape)
            self.re = csr_matrix(crow, col, parts[:, 0].contiguous(), size)
            self.im = csr_matrix(crow, col, parts[:, 1].contiguous(), size)


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


def _csr_product(k: _Csr, x2d: torch.Tensor) -> torch.Tensor:
    """``matrix @ x2d`` for a real or complex matrix and real or complex (N, W) x2d."""
    m = k.matrix
    if not m.is_complex():
        if x2d.is_complex():  # one real product of width 2W; the matrix is never cast
            return _view_complex(_real_spmm(m, _view_real(x2d)))
        return _real_spmm(m, x2d)
    if k.re is None:  # not on CPU: the device's own complex kernel
        if x2d.shape[1] == 0:
            return x2d.new_zeros((m.shape[0], 0), dtype=m.dtype)
        return torch.sparse.mm(m, x2d.to(m.dtype))
    if not x2d.is_complex():
        return torch.complex(_real_spmm(k.re, x2d), _real_spmm(k.im, x2d))
    xr = _view_real(x2d)
    a = _view_complex(_real_spmm(k.re, xr))
    b = _view_complex(_real_spmm(k.im, xr))
    return a.add_(b, alpha=1j)  # (Re A) x + i (Im A) x


def _csr_product_real(k: _Csr, g2d: torch.Tensor) -> torch.Tensor:
    """``Re(matrix @ g2d)`` for complex (N, W) g2d, at the cost of real products of width W."""
    m = k.matrix
    if not m.is_complex():
        return _real_spmm(m, g2d.real)
    if k.re is None:
        return _csr_product(k, g2d).real
    g = _plain(g2d)
    return _real_spmm(k.re, g.real).sub_(_real_spmm(k.im, g.imag))


def _low_rank_term(low_rank, x2d: torch.Tensor) -> torch.Tensor:
    """``U (V^H x2d)`` for the (N, r) pair (U, V); small dense products, dtypes promoted."""
    U, V = low_rank
    dtype = torch.promote_types(U.dtype, x2d.dtype)
    U, V, x2d = U.to(dtype), V.to(dtype), x2d.to(dtype)
    return U @ (V.conj().T @ x2d)


def _kernel(op: SparseOperator) -> _Csr:
    """The operator's prepared matrix, built on first use and cached on the operator."""
    k = op.__dict__.get("_kernel")
    if k is None or k.matrix is not op.matrix:
        k = _Csr(op.matrix)
        op.__dict__["_kernel"] = k
    return k


def _flat(x: torch.Tensor) -> torch.Tensor:
    """(N, ...) as (N, W); works for N = 0 and W = 0 too."""
    width = 1
    for s in x.shape[1:]:
        width *= int(s)
    return x.reshape(x.shape[0], width)


def _apply(op: SparseOperator, x: torch.Tensor) -> torch.Tensor:
    """op @ x for x (N, ...), without autograd bookkeeping; dtypes already checked."""
    x2d = _flat(x)
    out = _csr_product(_kernel(op), x2d)
    if op.low_rank is not None:
        out = out + _low_rank_term(op.low_rank, x2d)
    return out.reshape((op.num_rows,) + tuple(x.shape[1:]))


def _apply_real(op: SparseOperator, g: torch.Tensor) -> torch.Tensor:
    """Re(op @ g) for complex g (N, ...): the gradient of a real x under a complex product."""
    g2d = _flat(g)
    out = _csr_product_real(_kernel(op), g2d)
    if op.low_rank is not None:
        out = out + _low_rank_term(op.low_rank, g2d).real
    return out.reshape((op.num_rows,) + tuple(g.shape[1:]))


def _input_grad(op: SparseOperator, grad: torch.Tensor, x_is_complex: bool) -> torch.Tensor:
    """``op @ grad`` shaped for the input: its real part when x was real (PyTorch's convention)."""
    if grad.is_complex() and not x_is_complex:
        return _apply_real(op, grad)
    return _apply(op, grad)


class _HermitianMatmul(torch.autograd.Function):
    @staticmethod
    def forward(ctx, x, op):
        ctx.op = op
        ctx.x_is_complex = x.is_complex()
        return _apply(op, x)

    @staticmethod
    @once_differentiable
    def backward(ctx, grad):
        # y = op x with op^H = op, so dL/dx = op^H grad = op grad: no transpose is built.
        return _input_grad(ctx.op, grad, ctx.x_is_complex), None


class _GeneralMatmul(torch.autograd.Function):
    @staticmethod
    def forward(ctx, x, op):
        ctx.op = op
        ctx.x_is_complex = x.is_complex()
        return _apply(op, x)

    @staticmethod
    @once_differentiable
    def backward(ctx, grad):
        # dL/dx = op^H grad, with op^H built on the first backward and cached on op.
        return _input_grad(ctx.op.transpose_conj(), grad, ctx.x_is_complex), None


def hermitian_matmul(op: SparseOperator, x: torch.Tensor) -> torch.Tensor:
    r"""``op @ x`` for a Hermitian (or real symmetric) operator, with backward ``op @ grad``.

    Because :math:`op^H = op`, the gradient :math:`\partial L / \partial x = op^H g = op\, g`
    is one more forward product: no transposed CSR matrix is ever built.

    Args:
        op: a :class:`SparseOperator` with ``hermitian=True``.
        x: (N, ...) real or complex tensor of the operator's precision. Real x with a complex
            operator gives a complex result; complex x with a real operator uses one real
            product of width 2F (the operator is never cast to complex).

    Returns:
        (N, ...) tensor: complex if either factor is complex.

    Notes:
        On CPU a complex operator is multiplied as two real products (its real and imaginary
        parts, split once and cached on ``op``), which measured faster than torch's complex
        CSR product; see bench/README.md. For real x and a complex operator the backward
        needs only :math:`\mathrm{Re}(op\, g)`, computed from real products of width F.

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
    _check_features(op, x)
    return _HermitianMatmul.apply(x, op)


def general_matmul(op: SparseOperator, x: torch.Tensor) -> torch.Tensor:
    r"""``op @ x`` for any operator; backward ``op^H @ grad`` with ``op^H`` cached on ``op``.

    The conjugate transpose is built once, on the first backward, by
    :meth:`SparseOperator.transpose_conj` and reused by every later call.

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
    _check_features(op, x)
    return _GeneralMatmul.apply(x, op)


# ---------------------------------------------------------------------- values product
def _row_indices(crow: torch.Tensor) -> torch.Tensor:
    n = crow.numel() - 1
    return torch.repeat_interleave(torch.arange(n, device=crow.device, dtype=crow.dtype), crow.diff())


def _sampled_products(grad2d: torch.Tensor, x2d: torch.Tensor, crow: torch.Tensor, cols: torch.Tensor,
                      complex_values: bool) -> torch.Tensor:
    r"""g_k = sum_f grad[r_k, f] * conj(x[c_k, f]) on the CSR pattern (crow, cols).

    One ``torch.sparse.sampled_addmm`` call per real or complex part: (grad @ x^H) sampled on
    the pattern, computed per non-zero (no N x N product; extra memory O(nnz + N W), checked
    here at N = 2e5 with 1e6 non-zeros). Measured here as fast as a chunked gather loop at
    4e6 non-zeros and 2x faster at 2e5. Returns complex g when ``complex_values``, else its
    real part (the gradient of real values).
    """
    dtype = torch.promote_types(grad2d.dtype, x2d.dtype)
    if not complex_values:
        dtype = _real_precision(dtype)
    g, x = _plain(grad2d), _plain(x2d)
    if g.is_complex() and x.is_complex() and not complex_values:
        # Re(sum g conj(x)) = sum over the real views of g_re x_re + g_im x_im
        g, x = _view_real(g), _view_real(x)
    if g.is_complex() and not x.is_complex():
        # complex grad, real x (complex values on real features): real and imaginary parts
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


class _ValuesMatmul(torch.autograd.Function):
    @staticmethod
    def forward(ctx, values, x, crow, col, rows, adjoint_perm, hermitian):
        n = crow.numel() - 1
        kernel = _Csr(csr_matrix(crow, col, values.detach(), (n, n)))
        ctx.save_for_backward(values, x, crow, col, rows, adjoint_perm)
        ctx.kernel = kernel if hermitian else None
        ctx.hermitian = hermitian
        return _csr_product(kernel, _flat(x)).reshape((n,) + tuple(x.shape[1:]))

    @staticmethod
    @once_differentiable
    def backward(ctx, grad):
        values, x, crow, col, rows, adjoint_perm = ctx.saved_tensors
        n = crow.numel() - 1
        g2 = _flat(grad)
        grad_values = grad_x = None
        if ctx.needs_input_grad[0]:
            gv = _sampled_products(g2, _flat(x), crow, col, values.is_complex())
            grad_values = gv.to(values.dtype)
        if ctx.needs_input_grad[1]:
            if ctx.hermitian:
                kernel = ctx.kernel
            else:
                # A^H on the transposed pattern: values permuted and conjugated, O(nnz) per call
                vals = values.detach()[adjoint_perm]
                vals = vals.conj().resolve_conj() if vals.is_complex() else vals
                t_crow = torch.zeros(n + 1, dtype=crow.dtype, device=crow.device)
                t_crow[1:] = torch.cumsum(torch.bincount(col, minlength=n), 0)
                kernel = _Csr(csr_matrix(t_crow, rows[adjoint_perm], vals, (n, n)))
            if g2.is_complex() and not x.is_complex():
                gx = _csr_product_real(kernel, g2)
            else:
                gx = _csr_product(kernel, g2)
            grad_x = gx.reshape(x.shape)
        return grad_values, grad_x, None, None, None, None, None


def values_matmul(crow: torch.Tensor, col: torch.Tensor, values: torch.Tensor, x: torch.Tensor, *,
                  hermitian: bool = False, rows: Optional[torch.Tensor] = None,
                  adjoint_perm: Optional[torch.Tensor] = None) -> torch.Tensor:
    r"""``A @ x`` with ``A`` the CSR matrix ``(crow, col, values)``, differentiable in ``values``.

    The gradient of value k is :math:`\sum_f g[r_k, f]\, \overline{x[c_k, f]}` (a sampled
    dense-dense product, :math:`g x^H` on the pattern by ``torch.sparse.sampled_addmm``, so
    extra memory stays O(nnz + N F)); real values get its real part. The gradient of x is :math:`A^H g`, taken as :math:`A g` when
    ``hermitian=True`` (the real part of it when x is real).

    Args:
        crow, col: int64 CSR index tensors of a fixed pattern (N + 1,), (nnz,); columns sorted
            within each row.
        values: (nnz,) real or complex tensor; may require grad.
        x: (N, ...) real or complex features of the same precision. Real x with complex values
            is multiplied without casting x to complex.
        hermitian: whether the values make A Hermitian (skips building A^H in backward). The
            caller vouches for it; it is not checked.
        rows: optional (nnz,) row index of each value (computed from crow if absent; pass it
            to save the work when calling repeatedly).
        adjoint_perm: optional (nnz,) permutation taking the values to the CSR order of A^T
            (needed only when not Hermitian; computed if absent).

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
        if not isinstance(t, torch.Tensor) or t.dim() != 1 or t.dtype not in (torch.int32, torch.int64):
            raise GraphInputError(f"{name} must be a 1-D int32 or int64 tensor; got "
                                  f"{getattr(t, 'dtype', type(t).__name__)} with shape {tuple(getattr(t, 'shape', ()))}")
    if crow.numel() < 1:
        raise GraphInputError("crow must hold N + 1 >= 1 row offsets; got an empty tensor")
    n = crow.numel() - 1
    if not isinstance(values, torch.Tensor) or values.dim() != 1 or values.numel() != col.numel():
        raise GraphInputError(f"values must be 1-D with one entry per column index ({col.numel()}); "
                              f"got shape {tuple(getattr(values, 'shape', ()))}")
    if values.dtype not in _SUPPORTED:
        raise GraphInputError(f"values dtype must be one of {_SUPPORTED}; got {values.dtype}")
    if not isinstance(x, torch.Tensor) or x.dim() < 1 or x.shape[0] != n:
        raise GraphInputError(f"x must have N = {n} rows; got shape {tuple(getattr(x, 'shape', ()))}")
    if x.dtype not in _SUPPORTED or _real_precision(x.dtype) != _real_precision(values.dtype):
        raise GraphInputError(f"x has dtype {x.dtype} but values are {values.dtype}; use the same precision")
    if rows is None:
        rows = _row_indices(crow)
    if adjoint_perm is None:
        adjoint_perm = torch.argsort(col * max(n, 1) + rows) if not hermitian else rows.new_empty(0)
    return _ValuesMatmul.apply(values, x, crow, col, rows, adjoint_perm, bool(hermitian))

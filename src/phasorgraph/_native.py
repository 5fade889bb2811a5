r"""Native CPU kernels (numba) for the CSR products of :mod:`phasorgraph.sparse`.

Every kernel works on plain numpy arrays that :mod:`phasorgraph.sparse` has already checked:
a CSR pattern validated once where it entered the package (``crow`` non-decreasing from 0 to
nnz, every column in range), C-contiguous feature blocks of the right shapes and one common
real dtype. Nothing here checks again; nothing here reads outside those arrays when the
checks hold.

Complex numbers never appear as such. Complex features are their interleaved real view, an
(N, 2F) block ``(re_0, im_0, re_1, im_1, ...)``; complex matrix values are two real arrays
``(re, im)``. For a complex matrix the row loop keeps two real accumulators of width 2F,
``a = sum_k re_k x[c_k]`` and ``b = sum_k im_k x[c_k]``, so each gathered feature row is read
once and the inner loop is a contiguous multiply-add; the complex result
``(a_re - b_im, a_im + b_re)`` is formed once per row.

Each product has a fused epilogue: ``out = alpha * A x + shift * x + beta * z`` (z optional),
so one term of a Chebyshev recursion, :math:`T_k = 2 a P T_{k-1} + 2 b T_{k-1} - T_{k-2}`, is
one pass over memory.

Parallelism: ``prange`` over blocks of consecutive rows holding about equal numbers of
non-zeros (:func:`row_blocks`); the number of threads follows ``torch.get_num_threads()``.
Compiled code is cached on disk (``cache=True``): the first use in a fresh environment
compiles (seconds), later processes load the cache.
"""

from __future__ import annotations

import os
import threading

import numpy as np

# A threading layer that is safe after fork() and that we serialize with a lock (below); a
# user's own choice through the environment wins.
if "NUMBA_THREADING_LAYER" not in os.environ:
    os.environ["NUMBA_THREADING_LAYER"] = "workqueue"

import numba  # noqa: E402
from numba import njit, prange  # noqa: E402

__all__ = [
    "csr_real",
    "csr_complex",
    "csr_complex_real_x",
    "csr_complex_real_part",
    "value_grad_real",
    "value_grad_complex",
    "value_grad_complex_real_x",
    "transpose_pattern",
    "row_blocks",
    "set_threads",
    "LOCK",
]

#: the workqueue layer runs one parallel region at a time: calls from several Python threads
#: take turns through this lock
LOCK = threading.Lock()

_SPMM = dict(parallel=True, cache=True, nogil=True, fastmath={"contract"})
# reductions over features vectorize only when the sum may be reassociated (no NaN/inf
# assumptions: a NaN still propagates)
_REDUCE = dict(parallel=True, cache=True, nogil=True, fastmath={"contract", "reassoc"})


def set_threads(n: int) -> int:
    """Use ``n`` threads (clamped to numba's pool size) for the next kernels; returns the count."""
    n = max(1, min(int(n), numba.config.NUMBA_NUM_THREADS))
    if numba.get_num_threads() != n:
        numba.set_num_threads(n)
    return n


def row_blocks(crow: np.ndarray, threads: int) -> np.ndarray:
    """Block boundaries (B + 1,) over the rows, each block holding about nnz / B non-zeros.

    B is a few blocks per thread (one when single-threaded), so a skewed degree distribution
    still spreads evenly; numba hands each thread consecutive blocks.
    """
    n = crow.shape[0] - 1
    blocks = 1 if threads <= 1 else 4 * threads
    blocks = max(1, min(blocks, n))
    nnz = int(crow[-1])
    if blocks == 1 or nnz == 0:
        return np.array([0, n], dtype=np.int64) if n else np.zeros(1, dtype=np.int64)
    targets = (np.arange(1, blocks, dtype=np.int64) * nnz) // blocks
    inner = np.searchsorted(crow, targets, side="left").astype(np.int64)
    return np.concatenate(([0], inner, [n])).astype(np.int64)


# ---------------------------------------------------------------------- products
@njit(**_SPMM)
def csr_real(bounds, crow, col, val, x, z, out, alpha, shift, beta, use_z):  # pragma: no cover - compiled
    """out = alpha * A x + shift * x + beta * z; real A (val), real (N, W) x, z, out."""
    w = x.shape[1]
    for b in prange(bounds.shape[0] - 1):
        acc = np.empty(w, dtype=out.dtype)
        for i in range(bounds[b], bounds[b + 1]):
            for f in range(w):
                acc[f] = 0
            for k in range(crow[i], crow[i + 1]):
                v = alpha * val[k]
                c = col[k]
                for f in range(w):
                    acc[f] += v * x[c, f]
            if use_z:
                for f in range(w):
                    out[i, f] = acc[f] + shift * x[i, f] + beta * z[i, f]
            elif shift != 0:
                for f in range(w):
                    out[i, f] = acc[f] + shift * x[i, f]
            else:
                for f in range(w):
                    out[i, f] = acc[f]


@njit(**_SPMM)
def csr_complex(bounds, crow, col, vre, vim, x, z, out, alpha, shift, beta, use_z):  # pragma: no cover
    """Complex A = vre + i vim times complex x, all complex blocks interleaved (N, 2F)."""
    w = x.shape[1]
    h = w // 2
    for b in prange(bounds.shape[0] - 1):
        a = np.empty(w, dtype=out.dtype)
        d = np.empty(w, dtype=out.dtype)
        for i in range(bounds[b], bounds[b + 1]):
            for f in range(w):
                a[f] = 0
                d[f] = 0
            for k in range(crow[i], crow[i + 1]):
                vr = alpha * vre[k]
                vi = alpha * vim[k]
                c = col[k]
                for f in range(w):
                    xv = x[c, f]
                    a[f] += vr * xv
                    d[f] += vi * xv
            for f in range(h):
                re = a[2 * f] - d[2 * f + 1]
                im = a[2 * f + 1] + d[2 * f]
                if use_z:
                    re += shift * x[i, 2 * f] + beta * z[i, 2 * f]
                    im += shift * x[i, 2 * f + 1] + beta * z[i, 2 * f + 1]
                elif shift != 0:
                    re += shift * x[i, 2 * f]
                    im += shift * x[i, 2 * f + 1]
                out[i, 2 * f] = re
                out[i, 2 * f + 1] = im


@njit(**_SPMM)
def csr_complex_real_x(bounds, crow, col, vre, vim, x, z, out, alpha, shift, beta, use_z):  # pragma: no cover
    """Complex A times real x (N, F): out (and z) interleaved complex (N, 2F)."""
    w = x.shape[1]
    for b in prange(bounds.shape[0] - 1):
        a = np.empty(w, dtype=out.dtype)
        d = np.empty(w, dtype=out.dtype)
        for i in range(bounds[b], bounds[b + 1]):
            for f in range(w):
                a[f] = 0
                d[f] = 0
            for k in range(crow[i], crow[i + 1]):
                vr = alpha * vre[k]
                vi = alpha * vim[k]
                c = col[k]
                for f in range(w):
                    xv = x[c, f]
                    a[f] += vr * xv
                    d[f] += vi * xv
            for f in range(w):
                re = a[f] + shift * x[i, f]
                im = d[f]
                if use_z:
                    re += beta * z[i, 2 * f]
                    im += beta * z[i, 2 * f + 1]
                out[i, 2 * f] = re
                out[i, 2 * f + 1] = im


@njit(**_SPMM)
def csr_complex_real_part(bounds, crow, col, vre, vim, g, out, alpha, shift):  # pragma: no cover
    """out = Re(alpha * A g + shift * g) (N, F) for complex A and complex g interleaved (N, 2F).

    The gradient of a real x under a complex product.
    """
    w = g.shape[1]
    h = w // 2
    for b in prange(bounds.shape[0] - 1):
        a = np.empty(w, dtype=out.dtype)
        d = np.empty(w, dtype=out.dtype)
        for i in range(bounds[b], bounds[b + 1]):
            for f in range(w):
                a[f] = 0
                d[f] = 0
            for k in range(crow[i], crow[i + 1]):
                vr = alpha * vre[k]
                vi = alpha * vim[k]
                c = col[k]
                for f in range(w):
                    gv = g[c, f]
                    a[f] += vr * gv
                    d[f] += vi * gv
            for f in range(h):
                out[i, f] = a[2 * f] - d[2 * f + 1] + shift * g[i, 2 * f]


# ---------------------------------------------------------------------- value gradients
@njit(**_REDUCE)
def value_grad_real(bounds, crow, col, g, x, out, alpha):  # pragma: no cover
    """out[k] = alpha * sum_f g[r_k, f] * x[c_k, f] (real blocks; Re(g x^H) for interleaved complex)."""
    w = x.shape[1]
    for b in prange(bounds.shape[0] - 1):
        for i in range(bounds[b], bounds[b + 1]):
            for k in range(crow[i], crow[i + 1]):
                c = col[k]
                s = alpha * 0
                for f in range(w):
                    s += g[i, f] * x[c, f]
                out[k] = alpha * s


@njit(**_REDUCE)
def value_grad_complex(bounds, crow, col, g, x, out_re, out_im, alpha):  # pragma: no cover
    """alpha * sum_f g[r_k, f] conj(x[c_k, f]) for interleaved complex g, x (N, 2F)."""
    h = x.shape[1] // 2
    for b in prange(bounds.shape[0] - 1):
        for i in range(bounds[b], bounds[b + 1]):
            for k in range(crow[i], crow[i + 1]):
                c = col[k]
                sr = alpha * 0
                si = alpha * 0
                for f in range(h):
                    gr = g[i, 2 * f]
                    gi = g[i, 2 * f + 1]
                    xr = x[c, 2 * f]
                    xi = x[c, 2 * f + 1]
                    sr += gr * xr + gi * xi
                    si += gi * xr - gr * xi
                out_re[k] = alpha * sr
                out_im[k] = alpha * si


@njit(**_REDUCE)
def value_grad_complex_real_x(bounds, crow, col, g, x, out_re, out_im, alpha):  # pragma: no cover
    """alpha * sum_f g[r_k, f] x[c_k, f] for interleaved complex g (N, 2F) and real x (N, F)."""
    w = x.shape[1]
    for b in prange(bounds.shape[0] - 1):
        for i in range(bounds[b], bounds[b + 1]):
            for k in range(crow[i], crow[i + 1]):
                c = col[k]
                sr = alpha * 0
                si = alpha * 0
                for f in range(w):
                    xv = x[c, f]
                    sr += g[i, 2 * f] * xv
                    si += g[i, 2 * f + 1] * xv
                out_re[k] = alpha * sr
                out_im[k] = alpha * si


# ---------------------------------------------------------------------- transpose
@njit(cache=True, nogil=True)
def transpose_pattern(crow, col, num_cols):  # pragma: no cover
    """CSR pattern of A^T by a counting sort: (t_crow, t_col, perm) with t_values = values[perm].

    Within each row of A^T the columns (rows of A) come out increasing. O(nnz + N), serial.
    """
    n = crow.shape[0] - 1
    nnz = col.shape[0]
    t_crow = np.zeros(num_cols + 1, dtype=np.int64)
    for k in range(nnz):
        t_crow[col[k] + 1] += 1
    for j in range(num_cols):
        t_crow[j + 1] += t_crow[j]
    fill = t_crow[:-1].copy()
    t_col = np.empty(nnz, dtype=np.int64)
    perm = np.empty(nnz, dtype=np.int64)
    for i in range(n):
        for k in range(crow[i], crow[i + 1]):
            c = col[k]
            dest = fill[c]
            fill[c] = dest + 1
            t_col[dest] = i
            perm[dest] = k
    return t_crow, t_col, perm

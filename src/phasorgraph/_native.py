r"""Native CPU kernels (numba) for the CSR products of :mod:`phasorgraph.sparse`.

Every kernel works on plain numpy arrays that :mod:`phasorgraph.sparse` has already checked:
a CSR pattern validated once where it entered the package (``crow`` non-decreasing from 0 to
nnz, every column in range), C-contiguous feature blocks of the right shapes and one common
real dtype. Nothing here checks again; nothing here reads outside those arrays when the
checks hold.

Complex numbers never appear as such. Complex features are their interleaved real view, an
(N, 2F) block ``(re_0, im_0, re_1, im_1, ...)``; complex matrix values are two real arrays
``(re, im)``. For a complex matrix the row loop keeps two real accumulators,
``a = sum_k re_k x[c_k]`` and ``d = sum_k im_k x[c_k]``, so each gathered feature element is
loaded once and feeds two multiply-adds; the complex result ``(a_re - d_im, a_im + d_re)`` is
formed once per row. The accumulators live in registers, one tile of TILE = 64 columns at a
time (see "register tiles" below), and on graphs without locality the kernels prefetch the
rows they will gather a few non-zeros later (:func:`lookahead`).

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
from numba import njit, prange, types  # noqa: E402
from numba.core import cgutils  # noqa: E402
from numba.extending import intrinsic  # noqa: E402
from llvmlite import ir  # noqa: E402

__all__ = [
    "csr_real",
    "csr_complex",
    "csr_complex_real_x",
    "csr_complex_real_part",
    "value_grad_real",
    "value_grad_complex",
    "transpose_pattern",
    "row_blocks",
    "set_threads",
    "compile_all",
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


# ---------------------------------------------------------------------- register tiles
# Every product walks a row's non-zeros once per tile of TILE feature columns and keeps the
# tile's accumulators in registers: with AVX2 a tile of 64 float32 is 8 vector registers (16
# for the two accumulators of a complex matrix), so each gathered x element costs one load and
# one or two FMAs, with no load/store of an accumulator per non-zero. The accumulators are
# fixed-size stack blocks (:func:`_stack_block`) that are only ever indexed by constants after
# unrolling, which lets LLVM keep them in registers; widths that are not a multiple of TILE take
# a tile of HALF, then a heap block for the last (< HALF) columns. Offsets are unsigned
# (``np.uint64``), so no negative-index wraparound code stands in the way of vector loads.
TILE = 64
HALF = 32


@intrinsic
def _stack_block(typingctx, like, size):
    """A pointer to ``size`` (a literal int) elements of ``like``'s dtype on the function's stack."""
    if not isinstance(size, types.IntegerLiteral):
        return None
    count = size.literal_value
    dtype = like.dtype

    def codegen(context, builder, signature, args):
        return cgutils.alloca_once(builder, context.get_value_type(dtype), size=count)

    return types.CPointer(dtype)(like, size), codegen


@intrinsic
def _prefetch(typingctx, arr, index):
    """A read prefetch of ``&arr[index]`` (1-D C array) into all cache levels; no effect on results.

    A hint only: the address is computed but never dereferenced, so an index past the end is
    harmless; the kernels still keep it in range.
    """
    def codegen(context, builder, signature, args):
        ary = context.make_array(signature.args[0])(context, builder, args[0])
        byte_ptr = ir.IntType(8).as_pointer()
        fnty = ir.FunctionType(ir.VoidType(), [byte_ptr, ir.IntType(32), ir.IntType(32), ir.IntType(32)])
        fn = cgutils.get_or_insert_function(builder.module, fnty, "llvm.prefetch.p0i8")
        i32 = ir.IntType(32)
        builder.call(fn, [builder.bitcast(builder.gep(ary.data, [args[1]]), byte_ptr),
                          ir.Constant(i32, 0), ir.Constant(i32, 3), ir.Constant(i32, 1)])
        return context.get_dummy_value()

    return types.none(arr, index), codegen


#: non-zeros ahead whose x rows are prefetched on graphs without locality (see lookahead())
AHEAD = 12
#: a typical neighbour row farther than this (bytes) from its row is taken as not cached
FAR_BYTES = 1 << 20


def lookahead(crow: np.ndarray, col: np.ndarray, row_bytes: int) -> int:
    """How many non-zeros ahead the kernels prefetch gathered rows: AHEAD or 0 (off).

    Gathering x rows of a graph without locality (a uniform random graph) waits on memory for
    every non-zero; a prefetch of the row AHEAD non-zeros later keeps several of those misses
    in flight. On a locality-ordered graph the rows are already in cache and the prefetches
    only cost instructions. The test: the median distance |column - row| over about 257
    non-zeros spread over the matrix, times the bytes per row, against FAR_BYTES (about an L2
    cache). AHEAD = 12 came from trying 4 to 24 on a uniform random graph (N = 2e5, 4.2e6
    non-zeros, F = 64): about 1.2-1.4x faster there, no change on the 500 x 500 grid.
    """
    nnz = col.shape[0]
    if nnz == 0 or (crow.shape[0] - 1) * row_bytes <= FAR_BYTES:  # all of x is near every row
        return 0
    k = np.linspace(0, nnz - 1, num=min(nnz, 257)).astype(np.int64)
    rows = np.searchsorted(crow, k, side="right") - 1
    distance = float(np.median(np.abs(col[k] - rows)))
    return AHEAD if distance * row_bytes > FAR_BYTES else 0


@njit(inline="always")
def _ahead(x1, col, k, uw, ahead, nnz, lines):  # pragma: no cover - compiled
    """Prefetch every cache line (16 floats) of the x row of non-zero k + ahead (ahead > 0)."""
    kp = k + ahead
    if kp < nnz:
        base = np.uint64(col[kp]) * uw
        for line in range(lines):
            _prefetch(x1, base + np.uint64(16 * line))


@njit(inline="always")
def _acc_real(a, x1, col, val, k0, k1, uw, uf0, t, ahead, nnz, lines):  # pragma: no cover - compiled
    """a[f] = sum_k val[k] x[col[k], f0 + f] for f < t over the non-zeros k0..k1 of one row."""
    for f in range(t):
        a[f] = 0
    for k in range(k0, k1):
        if ahead > 0:
            _ahead(x1, col, k, uw, ahead, nnz, lines)
        v = val[k]
        base = np.uint64(col[k]) * uw + uf0
        for f in range(t):
            a[f] += v * x1[base + np.uint64(f)]


@njit(inline="always")
def _acc_pair(a, d, x1, col, vre, vim, k0, k1, uw, uf0, t, ahead, nnz, lines):  # pragma: no cover - compiled
    """a = sum_k vre[k] x[col[k], tile], d = sum_k vim[k] x[col[k], tile] (one load of each x)."""
    for f in range(t):
        a[f] = 0
        d[f] = 0
    for k in range(k0, k1):
        if ahead > 0:
            _ahead(x1, col, k, uw, ahead, nnz, lines)
        vr = vre[k]
        vi = vim[k]
        base = np.uint64(col[k]) * uw + uf0
        for f in range(t):
            xv = x1[base + np.uint64(f)]
            a[f] += vr * xv
            d[f] += vi * xv


@njit(inline="always")
def _put_real(a, o1, ob, t, alpha):  # pragma: no cover - compiled
    for f in range(t):
        o1[ob + np.uint64(f)] = alpha * a[f]


@njit(inline="always")
def _put_complex(a, d, o1, ob, t, alpha):  # pragma: no cover - compiled
    """Interleaved complex x: (a_re - d_im, a_im + d_re) per complex column."""
    for f in range(t // 2):
        o1[ob + np.uint64(2 * f)] = alpha * (a[2 * f] - d[2 * f + 1])
        o1[ob + np.uint64(2 * f + 1)] = alpha * (a[2 * f + 1] + d[2 * f])


@njit(inline="always")
def _put_complex_real_x(a, d, o1, ob, t, alpha):  # pragma: no cover - compiled
    """Real x: the complex result of column f is (a[f], d[f]); ob is the output offset of column 0."""
    for f in range(t):
        o1[ob + np.uint64(2 * f)] = alpha * a[f]
        o1[ob + np.uint64(2 * f + 1)] = alpha * d[f]


@njit(inline="always")
def _put_real_part(a, d, o1, ob, t, alpha):  # pragma: no cover - compiled
    """Re of the complex result: a_re - d_im per complex column (t // 2 outputs)."""
    for f in range(t // 2):
        o1[ob + np.uint64(f)] = alpha * (a[2 * f] - d[2 * f + 1])


@njit(inline="always")
def _epilogue(x1, z1, o1, ob, w, shift, beta, use_z):  # pragma: no cover - compiled
    """out_row += shift * x_row + beta * z_row (same width w), on the row just written (in L1)."""
    if use_z:
        for f in range(w):
            p = ob + np.uint64(f)
            o1[p] += shift * x1[p] + beta * z1[p]
    elif shift != 0:
        for f in range(w):
            p = ob + np.uint64(f)
            o1[p] += shift * x1[p]


@njit(inline="always")
def _tile_ends(w):  # pragma: no cover - compiled
    """Ends of the TILE-wide and of the HALF-wide tiles of a row of width w."""
    w64 = w - w % TILE
    return w64, w64 + (w - w64) // HALF * HALF


# ---------------------------------------------------------------------- products
@njit(**_SPMM)
def csr_real(bounds, crow, col, val, x, z, out, alpha, shift, beta, use_z, ahead):  # pragma: no cover - compiled
    """out = alpha * A x + shift * x + beta * z; real A (val), real (N, W) x, z, out."""
    w = x.shape[1]
    x1, z1, o1 = x.reshape(-1), z.reshape(-1), out.reshape(-1)
    uw = np.uint64(w)
    w64, w32 = _tile_ends(w)
    nnz, lines, ahead = np.uint64(col.shape[0]), (w + 15) // 16, np.uint64(ahead)
    for b in prange(bounds.shape[0] - 1):
        a = numba.carray(_stack_block(out, TILE), TILE)
        rest = np.empty(HALF, dtype=out.dtype)
        for i in range(bounds[b], bounds[b + 1]):
            k0, k1 = np.uint64(crow[i]), np.uint64(crow[i + 1])
            pre = ahead
            ob = np.uint64(i) * uw
            for f0 in range(0, w64, TILE):
                _acc_real(a, x1, col, val, k0, k1, uw, np.uint64(f0), TILE, pre, nnz, lines)
                pre = np.uint64(0)
                _put_real(a, o1, ob + np.uint64(f0), TILE, alpha)
            if w32 > w64:
                _acc_real(a, x1, col, val, k0, k1, uw, np.uint64(w64), HALF, pre, nnz, lines)
                pre = np.uint64(0)
                _put_real(a, o1, ob + np.uint64(w64), HALF, alpha)
            if w > w32:
                _acc_real(rest, x1, col, val, k0, k1, uw, np.uint64(w32), w - w32, pre, nnz, lines)
                pre = np.uint64(0)
                _put_real(rest, o1, ob + np.uint64(w32), w - w32, alpha)
            _epilogue(x1, z1, o1, ob, w, shift, beta, use_z)


@njit(**_SPMM)
def csr_complex(bounds, crow, col, vre, vim, x, z, out, alpha, shift, beta, use_z, ahead):  # pragma: no cover
    """Complex A = vre + i vim times complex x, all complex blocks interleaved (N, 2F)."""
    w = x.shape[1]
    x1, z1, o1 = x.reshape(-1), z.reshape(-1), out.reshape(-1)
    uw = np.uint64(w)
    w64, w32 = _tile_ends(w)
    nnz, lines, ahead = np.uint64(col.shape[0]), (w + 15) // 16, np.uint64(ahead)
    for b in prange(bounds.shape[0] - 1):
        a = numba.carray(_stack_block(out, TILE), TILE)
        d = numba.carray(_stack_block(out, TILE), TILE)
        ra = np.empty(HALF, dtype=out.dtype)
        rd = np.empty(HALF, dtype=out.dtype)
        for i in range(bounds[b], bounds[b + 1]):
            k0, k1 = np.uint64(crow[i]), np.uint64(crow[i + 1])
            pre = ahead
            ob = np.uint64(i) * uw
            for f0 in range(0, w64, TILE):
                _acc_pair(a, d, x1, col, vre, vim, k0, k1, uw, np.uint64(f0), TILE, pre, nnz, lines)
                pre = np.uint64(0)
                _put_complex(a, d, o1, ob + np.uint64(f0), TILE, alpha)
            if w32 > w64:
                _acc_pair(a, d, x1, col, vre, vim, k0, k1, uw, np.uint64(w64), HALF, pre, nnz, lines)
                pre = np.uint64(0)
                _put_complex(a, d, o1, ob + np.uint64(w64), HALF, alpha)
            if w > w32:
                _acc_pair(ra, rd, x1, col, vre, vim, k0, k1, uw, np.uint64(w32), w - w32, pre, nnz, lines)
                pre = np.uint64(0)
                _put_complex(ra, rd, o1, ob + np.uint64(w32), w - w32, alpha)
            _epilogue(x1, z1, o1, ob, w, shift, beta, use_z)


@njit(**_SPMM)
def csr_complex_real_x(bounds, crow, col, vre, vim, x, z, out, alpha, shift, beta, use_z, ahead):  # pragma: no cover
    """Complex A times real x (N, F): out (and z) interleaved complex (N, 2F)."""
    w = x.shape[1]
    x1, z1, o1 = x.reshape(-1), z.reshape(-1), out.reshape(-1)
    uw, uw2 = np.uint64(w), np.uint64(2 * w)
    w64, w32 = _tile_ends(w)
    nnz, lines, ahead = np.uint64(col.shape[0]), (w + 15) // 16, np.uint64(ahead)
    for b in prange(bounds.shape[0] - 1):
        a = numba.carray(_stack_block(out, TILE), TILE)
        d = numba.carray(_stack_block(out, TILE), TILE)
        ra = np.empty(HALF, dtype=out.dtype)
        rd = np.empty(HALF, dtype=out.dtype)
        for i in range(bounds[b], bounds[b + 1]):
            k0, k1 = np.uint64(crow[i]), np.uint64(crow[i + 1])
            pre = ahead
            ob = np.uint64(i) * uw2
            for f0 in range(0, w64, TILE):
                _acc_pair(a, d, x1, col, vre, vim, k0, k1, uw, np.uint64(f0), TILE, pre, nnz, lines)
                pre = np.uint64(0)
                _put_complex_real_x(a, d, o1, ob + np.uint64(2 * f0), TILE, alpha)
            if w32 > w64:
                _acc_pair(a, d, x1, col, vre, vim, k0, k1, uw, np.uint64(w64), HALF, pre, nnz, lines)
                pre = np.uint64(0)
                _put_complex_real_x(a, d, o1, ob + np.uint64(2 * w64), HALF, alpha)
            if w > w32:
                _acc_pair(ra, rd, x1, col, vre, vim, k0, k1, uw, np.uint64(w32), w - w32, pre, nnz, lines)
                pre = np.uint64(0)
                _put_complex_real_x(ra, rd, o1, ob + np.uint64(2 * w32), w - w32, alpha)
            xb = np.uint64(i) * uw
            if use_z:
                for f in range(w):
                    p = ob + np.uint64(2 * f)
                    o1[p] += shift * x1[xb + np.uint64(f)] + beta * z1[p]
                    o1[p + np.uint64(1)] += beta * z1[p + np.uint64(1)]
            elif shift != 0:
                for f in range(w):
                    o1[ob + np.uint64(2 * f)] += shift * x1[xb + np.uint64(f)]


@njit(**_SPMM)
def csr_complex_real_part(bounds, crow, col, vre, vim, g, out, alpha, shift, ahead):  # pragma: no cover
    """out = Re(alpha * A g + shift * g) (N, F) for complex A and complex g interleaved (N, 2F).

    The gradient of a real x under a complex product.
    """
    w = g.shape[1]
    g1, o1 = g.reshape(-1), out.reshape(-1)
    uw, uh = np.uint64(w), np.uint64(w // 2)
    w64, w32 = _tile_ends(w)
    nnz, lines, ahead = np.uint64(col.shape[0]), (w + 15) // 16, np.uint64(ahead)
    for b in prange(bounds.shape[0] - 1):
        a = numba.carray(_stack_block(out, TILE), TILE)
        d = numba.carray(_stack_block(out, TILE), TILE)
        ra = np.empty(HALF, dtype=out.dtype)
        rd = np.empty(HALF, dtype=out.dtype)
        for i in range(bounds[b], bounds[b + 1]):
            k0, k1 = np.uint64(crow[i]), np.uint64(crow[i + 1])
            pre = ahead
            ob = np.uint64(i) * uh
            for f0 in range(0, w64, TILE):
                _acc_pair(a, d, g1, col, vre, vim, k0, k1, uw, np.uint64(f0), TILE, pre, nnz, lines)
                pre = np.uint64(0)
                _put_real_part(a, d, o1, ob + np.uint64(f0 // 2), TILE, alpha)
            if w32 > w64:
                _acc_pair(a, d, g1, col, vre, vim, k0, k1, uw, np.uint64(w64), HALF, pre, nnz, lines)
                pre = np.uint64(0)
                _put_real_part(a, d, o1, ob + np.uint64(w64 // 2), HALF, alpha)
            if w > w32:
                _acc_pair(ra, rd, g1, col, vre, vim, k0, k1, uw, np.uint64(w32), w - w32, pre, nnz, lines)
                pre = np.uint64(0)
                _put_real_part(ra, rd, o1, ob + np.uint64(w32 // 2), w - w32, alpha)
            if shift != 0:
                gb = np.uint64(i) * uw
                for f in range(w // 2):
                    o1[ob + np.uint64(f)] += shift * g1[gb + np.uint64(2 * f)]


# ---------------------------------------------------------------------- value gradients
@njit(**_REDUCE)
def value_grad_real(bounds, crow, col, g, x, out, alpha, ahead):  # pragma: no cover
    """out[k] = alpha * sum_f g[r_k, f] * x[c_k, f] (real blocks; Re(g x^H) for interleaved complex)."""
    w = x.shape[1]
    g1, x1 = g.reshape(-1), x.reshape(-1)
    uw = np.uint64(w)
    nnz, lines, ahead = np.uint64(col.shape[0]), (w + 15) // 16, np.uint64(ahead)
    for b in prange(bounds.shape[0] - 1):
        for i in range(bounds[b], bounds[b + 1]):
            gb = np.uint64(i) * uw
            for k in range(np.uint64(crow[i]), np.uint64(crow[i + 1])):
                if ahead > 0:
                    _ahead(x1, col, k, uw, ahead, nnz, lines)
                xb = np.uint64(col[k]) * uw
                s = alpha - alpha
                for f in range(w):
                    s += g1[gb + np.uint64(f)] * x1[xb + np.uint64(f)]
                out[k] = alpha * s


@njit(**_REDUCE)
def value_grad_complex(bounds, crow, col, g, x, out_re, out_im, alpha, ahead):  # pragma: no cover
    """alpha * sum_f g[r_k, f] conj(x[c_k, f]) for interleaved complex g (N, 2F) and x either
    interleaved complex (N, 2F) or real (N, F).

    Both parts are plain dot products of the gathered row ``x[c_k]`` with two rows p and m
    built once per output row r: for complex x, ``p = g_r`` and ``m = (Im g_f, -Re g_f)`` per
    column (so Re = <p, x>, Im = <m, x> over the interleaved reals); for real x, p and m are
    the real and imaginary parts of g_r. The loop over f has no shuffles.
    """
    w = x.shape[1]
    real_x = g.shape[1] != w
    g1, x1 = g.reshape(-1), x.reshape(-1)
    uw, ug = np.uint64(w), np.uint64(g.shape[1])
    nnz, lines, ahead = np.uint64(col.shape[0]), (w + 15) // 16, np.uint64(ahead)
    for b in prange(bounds.shape[0] - 1):
        p = np.empty(w, dtype=g.dtype)
        m = np.empty(w, dtype=g.dtype)
        for i in range(bounds[b], bounds[b + 1]):
            gb = np.uint64(i) * ug
            if real_x:
                for f in range(w):
                    p[f] = g1[gb + np.uint64(2 * f)]
                    m[f] = g1[gb + np.uint64(2 * f + 1)]
            else:
                for f in range(w // 2):
                    re, im = g1[gb + np.uint64(2 * f)], g1[gb + np.uint64(2 * f + 1)]
                    p[2 * f], p[2 * f + 1] = re, im
                    m[2 * f], m[2 * f + 1] = im, -re
            for k in range(np.uint64(crow[i]), np.uint64(crow[i + 1])):
                if ahead > 0:
                    _ahead(x1, col, k, uw, ahead, nnz, lines)
                xb = np.uint64(col[k]) * uw
                sr = alpha - alpha
                si = alpha - alpha
                for f in range(w):
                    xv = x1[xb + np.uint64(f)]
                    sr += p[f] * xv
                    si += m[f] * xv
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


# ---------------------------------------------------------------------- ahead-of-use compilation
def compile_all() -> int:
    """Compile (or load from the disk cache) every kernel for float32 and float64; returns the count.

    The first product of each kind in a fresh environment otherwise compiles its kernel then
    (seconds each). ``make venv`` runs this once after installing, so tests and the first
    training step start warm; calling it again only loads the cache.
    """
    count = 0
    crow = np.array([0, 1, 2], dtype=np.int64)
    col = np.array([1, 0], dtype=np.int64)
    bounds = row_blocks(crow, 1)
    for real in (np.float32, np.float64):
        v = np.ones(2, dtype=real)
        x, xc = np.ones((2, 3), dtype=real), np.ones((2, 6), dtype=real)
        out, outc = np.empty((2, 3), dtype=real), np.empty((2, 6), dtype=real)
        one, zero = real(1), real(0)
        csr_real(bounds, crow, col, v, x, x, out, one, zero, zero, False, 0)
        csr_complex(bounds, crow, col, v, v, xc, xc, outc, one, zero, zero, False, 0)
        csr_complex_real_x(bounds, crow, col, v, v, x, outc, outc, one, zero, zero, False, 0)
        csr_complex_real_part(bounds, crow, col, v, v, xc, out, one, zero, 0)
        value_grad_real(bounds, crow, col, x, x, np.empty(2, dtype=real), one, 0)
        value_grad_complex(bounds, crow, col, xc, xc, np.empty(2, dtype=real), np.empty(2, dtype=real), one, 0)
        count += 6
    transpose_pattern(crow, col, 2)
    return count + 1

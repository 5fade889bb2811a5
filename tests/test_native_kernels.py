"""The native CPU kernels (phasorgraph._native) against the pure-torch reference and numpy.

References (named again beside each check):
* numpy.einsum on the dense matrix for the fused product alpha A x + shift x + beta z;
* the pure-torch path of phasorgraph.sparse (torch.sparse.mm and torch.sparse.sampled_addmm),
  run inside ``native_kernels(False)``, for every product and every gradient;
* torch.autograd.gradcheck (central finite differences, float64) for every custom op's
  autograd formula, through both paths;
* the closed-form value gradient sum_f g[r_k, f] conj(x[c_k, f]), evaluated with numpy.
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest
import torch
from torch.autograd import gradcheck

from phasorgraph import _native
from phasorgraph.errors import GraphInputError
from phasorgraph.sparse import PatternOperator, SparseOperator, check_csr, native_kernels, values_matmul

N = 9
REAL, COMPLEX = torch.float64, torch.complex128


def _dense(n, is_complex, *, hermitian, seed, density=0.4):
    rng = np.random.default_rng(seed)
    m = rng.standard_normal((n, n))
    if is_complex:
        m = m + 1j * rng.standard_normal((n, n))
    m = m * (rng.random((n, n)) < density)
    m[2, :] = 0  # an isolated node
    m[:, 2] = 0
    if hermitian:
        m = (m + m.conj().T) / 2
    return m


def _features(shape, is_complex, seed, dtype=torch.float64):
    g = torch.Generator().manual_seed(seed)
    x = torch.randn(shape, generator=g, dtype=torch.float64)
    if is_complex:
        x = torch.complex(x, torch.randn(shape, generator=g, dtype=torch.float64))
    return x.to(dtype if not is_complex else {torch.float64: COMPLEX, torch.float32: torch.complex64}[dtype])


def _pattern_operator(dense, *, hermitian, requires_grad, dtype=torch.float64, identity=0.0, scale=1.0):
    t = torch.as_tensor(dense).to_sparse_csr()
    values = t.values().clone()
    values = values.to({torch.float64: COMPLEX, torch.float32: torch.complex64}[dtype]) if values.is_complex() \
        else values.to(dtype)
    values.requires_grad_(requires_grad)
    op = PatternOperator(t.crow_indices(), t.col_indices(), values, hermitian=hermitian,
                         identity=identity, scale=scale)
    return op, values


CASES = list(itertools.product([False, True], [False, True], [False, True]))  # values complex, x complex, hermitian


@pytest.mark.parametrize("vc,xc,hermitian", CASES)
@pytest.mark.parametrize("with_z", [False, True])
def test_fused_product_matches_dense_and_reference(vc, xc, hermitian, with_z):
    dense = _dense(N, vc, hermitian=hermitian, seed=1)
    alpha, shift, beta = 0.7, -1.3, 2.0
    x = _features((N, 3, 2), xc, seed=2).requires_grad_()
    out_complex = vc or xc
    z = _features((N, 3, 2), out_complex, seed=3).requires_grad_() if with_z else None
    results = {}
    for native in (True, False):
        with native_kernels(native):
            op, values = _pattern_operator(dense, hermitian=hermitian, requires_grad=True)
            y = op.matmul_add(x, z, alpha=alpha, beta=beta, shift=shift)
            w = _features(y.shape, out_complex, seed=4)
            (w.conj() * y).real.sum().backward() if out_complex else (w * y).sum().backward()
            grads = [values.grad, x.grad] + ([z.grad] if with_z else [])
            results[native] = (y.detach(), [g.clone() for g in grads])
            x.grad = None
            if with_z:
                z.grad = None
    # reference: numpy.einsum of the dense matrix plus the epilogue
    want = alpha * np.einsum("uv,v...->u...", dense, x.detach().numpy()) + shift * x.detach().numpy()
    if with_z:
        want = want + beta * z.detach().numpy()
    np.testing.assert_allclose(results[True][0].numpy(), want, rtol=1e-12, atol=1e-12)
    # reference: the pure-torch path, forward and every gradient
    torch.testing.assert_close(results[True][0], results[False][0], rtol=1e-12, atol=1e-12)
    for a, b in zip(results[True][1], results[False][1]):
        torch.testing.assert_close(a, b, rtol=1e-12, atol=1e-12)


# Feature widths that reach every tile path of the kernels (_native.TILE = 64 and HALF = 32
# real columns per register tile, then a remainder): complex x has 2F real columns.
WIDTHS = [1, 17, 32, 48, 64, 97, 130]


@pytest.mark.parametrize("vc,xc", [(False, False), (False, True), (True, False), (True, True)])
@pytest.mark.parametrize("width", WIDTHS)
@pytest.mark.parametrize("dtype", [torch.float64, torch.float32])
@pytest.mark.parametrize("prefetch", [False, True])
def test_every_tile_width_matches_dense_and_reference(vc, xc, width, dtype, prefetch, monkeypatch):
    if prefetch:  # every graph counts as one without locality: the kernels prefetch AHEAD rows
        monkeypatch.setattr(_native, "FAR_BYTES", -1)
    dense = _dense(N, vc, hermitian=False, seed=21)
    alpha, shift, beta = 0.7, -1.3, 2.0
    x = _features((N, width), xc, seed=22, dtype=dtype).requires_grad_()
    out_complex = vc or xc
    z = _features((N, width), out_complex, seed=23, dtype=dtype).requires_grad_()
    tol = dict(rtol=1e-12, atol=1e-12) if dtype == torch.float64 else dict(rtol=2e-5, atol=2e-5)
    results = {}
    for native in (True, False):
        with native_kernels(native):
            op, values = _pattern_operator(dense, hermitian=False, requires_grad=True, dtype=dtype)
            y = op.matmul_add(x, z, alpha=alpha, beta=beta, shift=shift)
            w = _features(y.shape, out_complex, seed=24, dtype=dtype)
            (w.conj() * y).real.sum().backward() if out_complex else (w * y).sum().backward()
            results[native] = (y.detach(), [values.grad.clone(), x.grad.clone(), z.grad.clone()])
            x.grad = None
            z.grad = None
    # reference: numpy.einsum of the dense matrix (in float64) plus the epilogue
    xd, zd = x.detach().numpy().astype(np.complex128), z.detach().numpy().astype(np.complex128)
    want = alpha * np.einsum("uv,vf->uf", dense, xd) + shift * xd + beta * zd
    got = results[True][0].numpy()
    np.testing.assert_allclose(got, want if out_complex else want.real, **tol)
    # reference: the pure-torch path, forward and every gradient (the transposed product,
    # the real-part product of a real x's gradient and the value gradient)
    torch.testing.assert_close(results[True][0], results[False][0], **tol)
    for a, b in zip(results[True][1], results[False][1]):
        torch.testing.assert_close(a, b, **tol)


def test_compile_all_builds_every_kernel_for_both_precisions():
    # 6 kernels x (float32, float64) + the transpose; a later call only loads the disk cache
    assert _native.compile_all() == 13


def test_lookahead_prefetches_only_without_locality():
    # a banded pattern (every column within 2 of its row) keeps gathered rows in cache: no
    # prefetch; a pattern whose columns sit half the matrix away (4096 rows of 512 bytes:
    # 2 MiB, past FAR_BYTES) does
    n = 8192
    rows = np.repeat(np.arange(n), 5)
    band = np.clip(rows + np.tile(np.arange(-2, 3), n), 0, n - 1)
    far = (rows + n // 2) % n
    crow = np.arange(0, 5 * n + 1, 5, dtype=np.int64)
    assert _native.lookahead(crow, band.astype(np.int64), 512) == 0
    assert _native.lookahead(crow, far.astype(np.int64), 512) == _native.AHEAD
    assert _native.lookahead(np.zeros(1, dtype=np.int64), np.zeros(0, dtype=np.int64), 512) == 0


@pytest.mark.parametrize("vc,xc,hermitian", CASES)
@pytest.mark.parametrize("native", [True, False])
def test_custom_op_gradcheck(vc, xc, hermitian, native):
    dense = _dense(6, vc, hermitian=hermitian, seed=5)
    x = _features((6, 2), xc, seed=6).requires_grad_()
    z = _features((6, 2), vc or xc, seed=7).requires_grad_()
    t = torch.as_tensor(dense).to_sparse_csr()
    crow, col = t.crow_indices(), t.col_indices()
    values = t.values().clone().requires_grad_()

    def fn(v, a, b):
        op = PatternOperator(crow, col, v, hermitian=hermitian, identity=0.5, scale=-1.5)
        return op.matmul_add(a, b, alpha=0.8, beta=-1.0, shift=0.3)

    with native_kernels(native):
        # reference: torch.autograd.gradcheck (finite differences, float64)
        assert gradcheck(fn, (values, x, z), eps=1e-6, atol=1e-7, rtol=1e-5, fast_mode=False)


@pytest.mark.parametrize("vc,xc", [(False, False), (False, True), (True, False), (True, True)])
@pytest.mark.parametrize("hermitian", [False, True])
def test_sparse_operator_products_native_equals_reference(vc, xc, hermitian):
    dense = _dense(N, vc, hermitian=hermitian, seed=8)
    op = SparseOperator(torch.as_tensor(dense).to_sparse_csr(), hermitian=hermitian)
    x = _features((N, 4), xc, seed=9).requires_grad_()
    out = {}
    for native in (True, False):
        with native_kernels(native):
            y = op.matmul_add(x, None, alpha=2.0, shift=-1.0)
            g = _features(y.shape, vc or xc, seed=10)
            (gx,) = torch.autograd.grad(y, x, g)
            out[native] = (y.detach(), gx)
    # reference: the pure-torch path (torch.sparse.mm)
    for a, b in zip(out[True], out[False]):
        torch.testing.assert_close(a, b, rtol=1e-12, atol=1e-12)


@pytest.mark.parametrize("vc,xc", [(False, False), (False, True), (True, False), (True, True)])
def test_single_precision_native_equals_reference(vc, xc):
    dense = _dense(40, vc, hermitian=False, seed=11, density=0.2)
    x = _features((40, 16), xc, seed=12, dtype=torch.float32).requires_grad_()
    res = {}
    for native in (True, False):
        with native_kernels(native):
            op, values = _pattern_operator(dense, hermitian=False, requires_grad=True, dtype=torch.float32)
            y = op.matmul_add(x, None, alpha=1.5, shift=0.5)
            (y.abs() if y.is_complex() else y).sum().backward()
            res[native] = (y.detach(), values.grad.clone(), x.grad.clone())
            x.grad = None
    # reference: the pure-torch path; float32 rounding (common practice, no source)
    for a, b in zip(res[True], res[False]):
        torch.testing.assert_close(a, b, rtol=2e-5, atol=2e-5)


@pytest.mark.parametrize("vc,xc", [(False, False), (False, True), (True, False), (True, True)])
def test_value_gradient_closed_form(vc, xc):
    dense = _dense(N, vc, hermitian=False, seed=13)
    t = torch.as_tensor(dense).to_sparse_csr()
    crow, col = t.crow_indices(), t.col_indices()
    values = t.values().clone().requires_grad_()
    x = _features((N, 5), xc, seed=14)
    w = _features((N, 5), vc or xc, seed=15)
    y = values_matmul(crow, col, values, x)
    ((w.conj() * y).real.sum() if y.is_complex() else (w * y).sum()).backward()
    # closed form dL/dv_k = sum_f w[r_k, f] conj(x[c_k, f]) (real part for real values), numpy
    rows = np.repeat(np.arange(N), np.diff(crow.numpy()))
    g = (w.numpy()[rows] * np.conj(x.numpy()[col.numpy()])).sum(1)
    np.testing.assert_allclose(values.grad.numpy(), g if vc else g.real, rtol=1e-12, atol=1e-12)


def test_two_threads_give_the_one_thread_result():
    dense = _dense(300, True, hermitian=True, seed=16, density=0.05)
    op = SparseOperator(torch.as_tensor(dense).to(torch.complex64).to_sparse_csr(), hermitian=True)
    x = _features((300, 8), True, seed=17, dtype=torch.float32)
    one = op @ x
    torch.set_num_threads(2)  # the autouse fixture restores one thread afterwards
    two = op @ x
    # the row loop is the same per row whatever the blocks: bitwise equal
    assert torch.equal(one, two)


def test_row_blocks_cover_every_row_once():
    crow = np.array([0, 5, 5, 5, 6, 20, 21, 40, 40], dtype=np.int64)
    for threads in (1, 2, 3, 8):
        b = _native.row_blocks(crow, threads)
        assert b[0] == 0 and b[-1] == len(crow) - 1 and np.all(np.diff(b) >= 0)
    assert _native.row_blocks(np.zeros(1, dtype=np.int64), 2).tolist() == [0]


def test_transpose_pattern_matches_scipy():
    import scipy.sparse as sp

    dense = _dense(N, False, hermitian=False, seed=18)
    m = sp.csr_matrix(dense)
    t_crow, t_col, perm = _native.transpose_pattern(m.indptr.astype(np.int64), m.indices.astype(np.int64), N)
    mt = m.T.tocsr()  # reference: scipy's CSR transpose (sorted indices)
    mt.sort_indices()
    np.testing.assert_array_equal(t_crow, mt.indptr)
    np.testing.assert_array_equal(t_col, mt.indices)
    np.testing.assert_array_equal(m.data[perm], mt.data)


def test_isolated_nodes_and_empty_patterns_give_no_nan():
    op = SparseOperator(torch.zeros(5, 5, dtype=torch.complex64).to_sparse_csr(), hermitian=True)
    y = op.matmul_add(torch.ones(5, 3), torch.ones(5, 3, dtype=torch.complex64), alpha=2.0, beta=0.5, shift=1.0)
    assert torch.equal(y, torch.full((5, 3), 1.5, dtype=torch.complex64))
    empty = SparseOperator(torch.zeros(0, 0).to_sparse_csr(), hermitian=True)
    assert empty.matmul_add(torch.zeros(0, 4), torch.zeros(0, 4)).shape == (0, 4)


def test_nan_stays_in_the_rows_that_read_it():
    # a path 0 - 1 - 2, 3 - 4: a NaN at node 0 reaches rows 0 and 1 only
    dense = np.zeros((5, 5))
    for u, v in [(0, 1), (1, 2), (3, 4)]:
        dense[u, v] = dense[v, u] = 1.0
    op = SparseOperator(torch.as_tensor(dense).to_sparse_csr(), hermitian=True)
    x = torch.ones(5, 2, dtype=torch.float64)
    x[0, 1] = float("nan")
    y = op.matmul_add(x, None, shift=0.0)
    assert torch.isnan(y[1, 1]) and not torch.isnan(y[:, 0]).any() and not torch.isnan(y[2:]).any()


# ---------------------------------------------------------------------- CSR validation
def _raw_csr(crow, col, n):
    vals = torch.ones(len(col), dtype=torch.float64)
    return torch.sparse_csr_tensor(torch.tensor(crow), torch.tensor(col), vals, (n, n), check_invariants=False)


BAD = [
    ([0, 1, 2], [0, 3], "column index 3 at position 1 is outside \\[0, 2\\)"),
    ([0, 1, 2], [0, -1], "column index -1 at position 1 is outside"),
    ([0, 2, 1, 2], [0, 1], "must never decrease"),
    ([1, 1, 2], [0, 1], "must run from 0 to nnz = 2; got crow\\[0\\] = 1"),
    ([0, 1, 3], [0, 1], "must run from 0 to nnz = 2; got crow\\[0\\] = 0, crow\\[-1\\] = 3"),
    ([0, 2, 2], [1, 0], "columns must be sorted within each row; row 0 has column 1 before 0"),
]


@pytest.mark.parametrize("crow,col,message", BAD)
def test_malformed_csr_is_refused_where_it_enters(crow, col, message):
    with torch.sparse.check_sparse_tensor_invariants(enable=False):
        with pytest.raises(GraphInputError, match="matrix " + ".*" + message):
            SparseOperator(_raw_csr(crow, col, len(crow) - 1), hermitian=False)
    n = len(crow) - 1
    with pytest.raises(GraphInputError, match="crow/col .*" + message):
        values_matmul(torch.tensor(crow), torch.tensor(col), torch.ones(2, dtype=torch.float64),
                      torch.ones(n, 1, dtype=torch.float64))
    with pytest.raises(GraphInputError, match="pattern .*" + message):
        PatternOperator(torch.tensor(crow), torch.tensor(col), torch.ones(2, dtype=torch.float64), hermitian=True)


def test_check_csr_types_and_lengths():
    with pytest.raises(GraphInputError, match="matrix row pointer \\(crow\\) must be a 1-D int32 or int64 tensor; got torch.float32"):
        check_csr(torch.tensor([0.0, 1.0]), torch.tensor([0]), 1, 1)
    with pytest.raises(GraphInputError, match="must have num_rows \\+ 1 = 3 entries; got 2"):
        check_csr(torch.tensor([0, 1]), torch.tensor([0]), 2, 2)
    with pytest.raises(GraphInputError, match="meta device"):
        check_csr(torch.zeros(2, dtype=torch.int64, device="meta"), torch.zeros(1, dtype=torch.int64), 1, 1)
    crow, col = check_csr(torch.tensor([0, 1, 1], dtype=torch.int32), torch.tensor([1], dtype=torch.int32), 2, 2)
    assert crow.dtype == col.dtype == torch.int64
    # repeated columns are accepted (and summed by the products): dense reference by hand
    op = PatternOperator(torch.tensor([0, 2]), torch.tensor([0, 0]), torch.tensor([1.0, 2.0]), hermitian=True)
    assert op.matmul(torch.ones(1, 1)).item() == 3.0


def test_bad_scalars_and_addend():
    op = SparseOperator(torch.eye(3, dtype=torch.float64).to_sparse_csr(), hermitian=True)
    x = torch.ones(3, 2, dtype=torch.float64)
    with pytest.raises(GraphInputError, match="alpha must be a finite real number; got nan"):
        op.matmul_add(x, alpha=float("nan"))
    with pytest.raises(GraphInputError, match="beta must be a finite real number; got True"):
        op.matmul_add(x, x, beta=True)
    with pytest.raises(GraphInputError, match="z must have the result's shape \\(3, 2\\); got shape \\(3, 1\\)"):
        op.matmul_add(x, torch.ones(3, 1, dtype=torch.float64))
    with pytest.raises(GraphInputError, match="z has dtype torch.float32 but the operator is torch.float64"):
        op.matmul_add(x, torch.ones(3, 2))

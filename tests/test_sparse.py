"""Tests of the sparse products in phasorgraph.sparse.

References used (named again beside each check):
* numpy.matmul / numpy.einsum on the dense matrix (the product itself);
* torch.autograd.gradcheck (central finite differences, float64) for every backward;
* the closed-form gradient of a sampled dense-dense product, evaluated in numpy with an
  explicit sum over features (values_matmul's value gradient).
"""

from __future__ import annotations

import numpy as np
import pytest
import torch
from torch.autograd import gradcheck

import phasorgraph.sparse as sparse
from phasorgraph.errors import GraphInputError
from phasorgraph.sparse import SparseOperator, general_matmul, hermitian_matmul, values_matmul


N = 7
REAL, COMPLEX = torch.float64, torch.complex128
SHAPES = [(N,), (N, 3), (N, 2, 3)]


def _random_dense(n: int, dtype, *, hermitian: bool, seed: int, density: float = 0.4) -> np.ndarray:
    """A dense numpy matrix with a random pattern, an empty row and (optionally) Hermitian."""
    rng = np.random.default_rng(seed)
    m = rng.standard_normal((n, n))
    if dtype.is_complex:
        m = m + 1j * rng.standard_normal((n, n))
    m = m * (rng.random((n, n)) < density)
    m[1, :] = 0  # an empty row (an isolated node)
    m[:, 1] = 0
    if hermitian:
        m = (m + m.conj().T) / 2
    return m


def _operator(dense: np.ndarray, dtype, *, hermitian: bool, low_rank=None) -> SparseOperator:
    t = torch.as_tensor(dense).to(dtype)
    return SparseOperator(t.to_sparse_csr(), hermitian=hermitian, kind="test", low_rank=low_rank)


def _features(shape, dtype, seed: int = 1) -> torch.Tensor:
    g = torch.Generator().manual_seed(seed)
    if dtype.is_complex:
        return torch.complex(torch.randn(shape, generator=g, dtype=REAL), torch.randn(shape, generator=g, dtype=REAL))
    return torch.randn(shape, generator=g, dtype=REAL)


def _dense_product(dense: np.ndarray, x: torch.Tensor) -> np.ndarray:
    # reference: numpy.einsum of the dense matrix with x over the node axis
    return np.einsum("uv,v...->u...", dense, x.detach().numpy())


# ---------------------------------------------------------------------- forward against dense
@pytest.mark.parametrize("op_dtype", [REAL, COMPLEX])
@pytest.mark.parametrize("x_dtype", [REAL, COMPLEX])
@pytest.mark.parametrize("shape", SHAPES)
def test_hermitian_matmul_matches_dense(op_dtype, x_dtype, shape):
    dense = _random_dense(N, op_dtype, hermitian=True, seed=0)
    op = _operator(dense, op_dtype, hermitian=True)
    x = _features(shape, x_dtype)
    y = hermitian_matmul(op, x)
    assert y.shape == x.shape
    assert y.dtype == (COMPLEX if (op_dtype.is_complex or x_dtype.is_complex) else REAL)
    np.testing.assert_allclose(y.numpy(), _dense_product(dense, x), rtol=1e-12, atol=1e-12)  # numpy.einsum
    np.testing.assert_allclose((op @ x).numpy(), y.numpy(), rtol=0, atol=0)


@pytest.mark.parametrize("op_dtype", [REAL, COMPLEX])
@pytest.mark.parametrize("x_dtype", [REAL, COMPLEX])
def test_general_matmul_matches_dense(op_dtype, x_dtype):
    dense = _random_dense(N, op_dtype, hermitian=False, seed=2)
    op = _operator(dense, op_dtype, hermitian=False)
    x = _features((N, 2, 3), x_dtype)
    np.testing.assert_allclose(general_matmul(op, x).numpy(), _dense_product(dense, x), rtol=1e-12, atol=1e-12)
    # the cached adjoint is the conjugate transpose (numpy .conj().T)
    np.testing.assert_allclose(op.transpose_conj().to_dense().numpy(), dense.conj().T, rtol=0, atol=0)


@pytest.mark.parametrize("dtype", [torch.float32, torch.complex64])
def test_single_precision_matches_dense(dtype):
    dense = _random_dense(N, dtype, hermitian=True, seed=3)
    op = _operator(dense, dtype, hermitian=True)
    x = _features((N, 4), COMPLEX).to(torch.complex64)
    # reference: numpy.einsum in double precision; float32 rounding tolerance
    np.testing.assert_allclose(hermitian_matmul(op, x).numpy(), _dense_product(dense, x), rtol=1e-5, atol=1e-5)


def test_low_rank_part_matches_dense():
    rng = np.random.default_rng(4)
    dense = _random_dense(N, COMPLEX, hermitian=False, seed=4)
    U = rng.standard_normal((N, 2)) + 1j * rng.standard_normal((N, 2))
    V = rng.standard_normal((N, 2)) + 1j * rng.standard_normal((N, 2))
    op = _operator(dense, COMPLEX, hermitian=False, low_rank=(torch.as_tensor(U), torch.as_tensor(V)))
    full = dense + U @ V.conj().T  # numpy: the operator is matrix + U V^H
    for x_dtype in (REAL, COMPLEX):
        x = _features((N, 3), x_dtype)
        np.testing.assert_allclose(general_matmul(op, x).numpy(), _dense_product(full, x), rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(op.to_dense().numpy(), full, rtol=1e-14, atol=1e-14)


def test_non_contiguous_and_conjugated_features():
    dense = _random_dense(N, COMPLEX, hermitian=True, seed=5)
    op = _operator(dense, COMPLEX, hermitian=True)
    real_op = _operator(dense.real + dense.real.T, REAL, hermitian=True)
    base = _features((3, N, 4), COMPLEX)
    cases = [base.transpose(0, 1),  # (N, 3, 4), not contiguous
             base[0, :, ::2],  # strided columns
             base[1].conj(),  # lazy conjugate bit
             -base[2].imag.T.T]  # real, negative view
    for x in cases:
        for o, d in ((op, dense), (real_op, dense.real + dense.real.T)):
            y = hermitian_matmul(o, x)
            np.testing.assert_allclose(y.numpy(), _dense_product(d, x.resolve_conj()), rtol=1e-12, atol=1e-12)  # numpy.einsum


@pytest.mark.parametrize("op_dtype", [REAL, COMPLEX])
@pytest.mark.parametrize("shape", [(N, 0), (N, 3, 0)])
def test_zero_width_features(op_dtype, shape):
    op = _operator(_random_dense(N, op_dtype, hermitian=True, seed=6), op_dtype, hermitian=True)
    for x_dtype in (REAL, COMPLEX):
        x = torch.zeros(shape, dtype=x_dtype, requires_grad=True)
        y = hermitian_matmul(op, x)
        assert y.shape == shape
        y.sum().abs().backward()
        assert x.grad.shape == shape


def test_empty_operator():
    empty = torch.zeros(0, 0, dtype=COMPLEX).to_sparse_csr()
    op = SparseOperator(empty, hermitian=True)
    for shape in [(0,), (0, 3), (0, 2, 3)]:
        assert hermitian_matmul(op, torch.zeros(shape, dtype=REAL)).shape == shape
    # an operator with no non-zeros gives zeros (no NaN)
    op = SparseOperator(torch.zeros(4, 4).to_sparse_csr(), hermitian=True)
    y = hermitian_matmul(op, torch.ones(4, 2, dtype=torch.complex64))
    assert torch.equal(y, torch.zeros(4, 2, dtype=torch.complex64))


def test_real_operator_on_complex_features_is_never_cast():
    dense = _random_dense(N, REAL, hermitian=True, seed=7)
    op = _operator(dense, REAL, hermitian=True)
    x = _features((N, 3), COMPLEX).requires_grad_()
    y = hermitian_matmul(op, x)
    np.testing.assert_allclose(y.detach().numpy(), _dense_product(dense, x), rtol=1e-12, atol=1e-12)  # numpy.einsum
    y.abs().sum().backward()
    # nothing complex was made from the operator: its matrix and every cached tensor stay real
    assert op.matrix.dtype == REAL
    assert op._vim is None
    for value in op.__dict__.values():
        if isinstance(value, torch.Tensor):
            assert not value.is_complex()


# ---------------------------------------------------------------------- gradients
def _gradcheck(fn, *inputs):
    # reference: torch.autograd.gradcheck (finite differences in float64)
    assert gradcheck(fn, inputs, eps=1e-6, atol=1e-7, rtol=1e-5, fast_mode=False)


@pytest.mark.parametrize("op_dtype", [REAL, COMPLEX])
@pytest.mark.parametrize("x_dtype", [REAL, COMPLEX])
@pytest.mark.parametrize("shape", [(N,), (N, 2, 2)])
def test_hermitian_matmul_gradcheck(op_dtype, x_dtype, shape):
    op = _operator(_random_dense(N, op_dtype, hermitian=True, seed=8), op_dtype, hermitian=True)
    x = _features(shape, x_dtype).requires_grad_()
    _gradcheck(lambda t: hermitian_matmul(op, t), x)


@pytest.mark.parametrize("op_dtype", [REAL, COMPLEX])
@pytest.mark.parametrize("x_dtype", [REAL, COMPLEX])
def test_general_matmul_gradcheck(op_dtype, x_dtype):
    op = _operator(_random_dense(N, op_dtype, hermitian=False, seed=9), op_dtype, hermitian=False)
    x = _features((N, 2), x_dtype).requires_grad_()
    _gradcheck(lambda t: general_matmul(op, t), x)


@pytest.mark.parametrize("hermitian", [False, True])
def test_low_rank_gradcheck(hermitian):
    rng = np.random.default_rng(10)
    dense = _random_dense(N, COMPLEX, hermitian=hermitian, seed=10)
    U = torch.as_tensor(rng.standard_normal((N, 1)) + 1j * rng.standard_normal((N, 1)))
    V = torch.as_tensor(rng.standard_normal((N, 1)) + 1j * rng.standard_normal((N, 1)))
    # U V^H + V U^H is Hermitian: the pair ([U, V], [V, U])
    low_rank = (torch.cat([U, V], 1), torch.cat([V, U], 1)) if hermitian else (U, V)
    op = _operator(dense, COMPLEX, hermitian=hermitian, low_rank=low_rank)
    np.testing.assert_allclose(op.to_dense().numpy(), op.to_dense().numpy().conj().T if hermitian else op.to_dense().numpy())
    for x_dtype in (REAL, COMPLEX):
        x = _features((N, 2), x_dtype).requires_grad_()
        _gradcheck(lambda t: op @ t, x)


def test_transpose_is_built_once_and_reused():
    op = _operator(_random_dense(N, COMPLEX, hermitian=False, seed=11), COMPLEX, hermitian=False)
    pattern = (op._t_crow, op._t_col, op._t_perm)  # built with the operator
    x = _features((N, 2), COMPLEX).requires_grad_()
    general_matmul(op, x).abs().sum().backward()
    first = x.grad.clone()
    x.grad = None
    general_matmul(op, x).abs().sum().backward()
    # the same stored pattern served both backwards (nothing rebuilt)
    assert all(a is b for a, b in zip(pattern, (op._t_crow, op._t_col, op._t_perm)))
    torch.testing.assert_close(x.grad, first, rtol=0, atol=0)
    adjoint = op.transpose_conj()
    assert adjoint._adjoint is op and op.transpose_conj() is adjoint
    # reference: numpy .conj().T of the dense matrix; and the adjoint's own transpose is op's pattern
    np.testing.assert_allclose(adjoint.to_dense().numpy(), op.to_dense().numpy().conj().T, rtol=0, atol=0)
    assert adjoint._t_crow is op._crow and adjoint._t_col is op._col
    # the Hermitian kernel never builds one
    h = _operator(_random_dense(N, COMPLEX, hermitian=True, seed=12), COMPLEX, hermitian=True)
    assert h._t_perm is None and h.transpose_conj() is h


# ---------------------------------------------------------------------- values_matmul
def _pattern(dense: np.ndarray):
    t = torch.as_tensor(dense).to_sparse_csr()
    return t.crow_indices(), t.col_indices(), t.values()


def _values_dense(crow, col, values, n):
    m = np.zeros((n, n), dtype=values.detach().numpy().dtype)
    rows = np.repeat(np.arange(n), np.diff(crow.numpy()))
    m[rows, col.numpy()] = values.detach().numpy()
    return m


@pytest.mark.parametrize("values_dtype", [REAL, COMPLEX])
@pytest.mark.parametrize("x_dtype", [REAL, COMPLEX])
@pytest.mark.parametrize("hermitian", [False, True])
def test_values_matmul_matches_dense_and_gradcheck(values_dtype, x_dtype, hermitian):
    dense = _random_dense(N, values_dtype, hermitian=hermitian, seed=13)
    crow, col, values = _pattern(dense)
    values = values.clone().requires_grad_()
    x = _features((N, 2), x_dtype).requires_grad_()
    y = values_matmul(crow, col, values, x, hermitian=hermitian)
    np.testing.assert_allclose(y.detach().numpy(), _dense_product(dense, x), rtol=1e-12, atol=1e-12)  # numpy.einsum
    _gradcheck(lambda v, t: values_matmul(crow, col, v, t, hermitian=hermitian), values, x)


@pytest.mark.parametrize("values_dtype", [REAL, COMPLEX])
@pytest.mark.parametrize("x_dtype", [REAL, COMPLEX])
def test_values_gradient_is_a_sampled_product(values_dtype, x_dtype):
    dense = _random_dense(N, values_dtype, hermitian=False, seed=14)
    crow, col, values = _pattern(dense)
    values = values.clone().requires_grad_()
    x = _features((N, 2, 3), x_dtype)
    w = _features((N, 2, 3), COMPLEX if (values_dtype.is_complex or x_dtype.is_complex) else REAL, seed=3)
    y = values_matmul(crow, col, values, x)
    loss = (w.conj() * y).real.sum()
    loss.backward()
    # closed form: dL/dv_k = sum_f w[r_k, f] conj(x[c_k, f]) (real part for real values),
    # evaluated here with an explicit numpy sum
    rows = np.repeat(np.arange(N), np.diff(crow.numpy()))
    g = (w.numpy().reshape(N, -1)[rows] * np.conj(x.numpy().reshape(N, -1)[col.numpy()])).sum(1)
    expected = g if values_dtype.is_complex else g.real
    np.testing.assert_allclose(values.grad.numpy(), expected, rtol=1e-12, atol=1e-12)


def test_values_matmul_takes_only_what_it_uses():
    # the row of each value and the transposed pattern come from (crow, col) alone: arguments
    # that would be ignored are refused rather than accepted in silence
    import inspect

    dense = _random_dense(N, COMPLEX, hermitian=False, seed=15)
    crow, col, values = _pattern(dense)
    assert list(inspect.signature(values_matmul).parameters) == ["crow", "col", "values", "x", "hermitian"]
    rows = sparse._row_indices(crow)
    np.testing.assert_array_equal(rows.numpy(), np.repeat(np.arange(N), np.diff(crow.numpy())))  # numpy.repeat
    x = _features((N, 2), COMPLEX)
    for extra in ({"rows": rows}, {"adjoint_perm": torch.argsort(col * N + rows)}):
        with pytest.raises(TypeError, match=next(iter(extra))):
            values_matmul(crow, col, values, x, **extra)


# ---------------------------------------------------------------------- bad input
def test_bad_input_messages():
    op = _operator(_random_dense(N, REAL, hermitian=False, seed=16), REAL, hermitian=False)
    with pytest.raises(GraphInputError, match="op must be Hermitian for hermitian_matmul; got kind 'test'"):
        hermitian_matmul(op, torch.ones(N, 1, dtype=REAL))
    with pytest.raises(GraphInputError, match="op must be a SparseOperator; got Tensor"):
        hermitian_matmul(torch.eye(2), torch.ones(2, 1))
    with pytest.raises(GraphInputError, match=r"x must have num_nodes = 7 rows \(shape \(N, \.\.\.\)\); got shape \(6, 1\)"):
        general_matmul(op, torch.ones(6, 1, dtype=REAL))
    with pytest.raises(GraphInputError, match="x has dtype torch.float32 but the operator is torch.float64"):
        general_matmul(op, torch.ones(N, 1))
    with pytest.raises(GraphInputError, match="x dtype must be one of"):
        general_matmul(op, torch.ones(N, 1, dtype=torch.int64))
    with pytest.raises(GraphInputError, match="x must be a torch.Tensor; got list"):
        general_matmul(op, [1.0] * N)
    crow, col, values = _pattern(_random_dense(N, REAL, hermitian=False, seed=16))
    with pytest.raises(GraphInputError, match=r"values must be 1-D with one entry per column index \(\d+\); got shape \(2,\)"):
        values_matmul(crow, col, values[:2], torch.ones(N, 1, dtype=REAL))
    with pytest.raises(GraphInputError, match="crow must be a 1-D int32 or int64 tensor; got torch.float64"):
        values_matmul(crow.double(), col, values, torch.ones(N, 1, dtype=REAL))
    with pytest.raises(GraphInputError, match=r"x must have N = 7 rows; got shape \(3, 1\)"):
        values_matmul(crow, col, values, torch.ones(3, 1, dtype=REAL))
    with pytest.raises(GraphInputError, match="x has dtype torch.complex64 but values are torch.float64"):
        values_matmul(crow, col, values, torch.ones(N, 1, dtype=torch.complex64))


def test_pickle_round_trip_after_products():
    import copy
    import pickle

    op = _operator(_random_dense(N, COMPLEX, hermitian=False, seed=17), COMPLEX, hermitian=False)
    x = _features((N, 2), COMPLEX).requires_grad_()
    general_matmul(op, x).abs().sum().backward()  # fills the kernel and adjoint caches
    for clone in (pickle.loads(pickle.dumps(op)), copy.deepcopy(op)):
        torch.testing.assert_close(clone @ x.detach(), op @ x.detach(), rtol=0, atol=0)


@pytest.mark.parametrize("values_dtype", [REAL, COMPLEX])
@pytest.mark.parametrize("x_dtype", [REAL, COMPLEX])
def test_sampled_product_agrees_with_closed_form(values_dtype, x_dtype):
    crow, col, _ = _pattern(_random_dense(N, values_dtype, hermitian=False, seed=18))
    rows = sparse._row_indices(crow)
    x = _features((N, 4), x_dtype)
    g = _features((N, 4), COMPLEX if (values_dtype.is_complex or x_dtype.is_complex) else REAL, seed=4)
    # closed form sum_f g[r_k, f] conj(x[c_k, f]) (its real part for real values), numpy
    expected = (g.numpy()[rows.numpy()] * np.conj(x.numpy()[col.numpy()])).sum(1)
    if not values_dtype.is_complex:
        expected = expected.real
    got = sparse._sampled_products(g, x, crow, col, values_dtype.is_complex)
    assert got.is_complex() == values_dtype.is_complex
    np.testing.assert_allclose(got.numpy(), expected, rtol=1e-12, atol=1e-12)


@pytest.mark.parametrize("hermitian", [False, True])
def test_pattern_operator_with_new_values_is_a_fresh_operator(hermitian):
    # reference: numpy.einsum on the dense matrix of the new values, and torch.autograd.gradcheck
    # of the product through the reused (transposed) pattern
    first = _random_dense(N, COMPLEX, hermitian=hermitian, seed=11)
    second = _random_dense(N, COMPLEX, hermitian=hermitian, seed=12)
    second[first == 0] = 0
    second[(first != 0) & (second == 0)] = 0.5  # the same pattern
    t = torch.as_tensor(first).to_sparse_csr()
    op = sparse.PatternOperator(t.crow_indices(), t.col_indices(), t.values(), hermitian=hermitian,
                                identity=0.5, scale=-2.0)
    values = torch.as_tensor(second).to_sparse_csr().values().clone()
    new = op.with_values(values.real.contiguous(), values.imag.contiguous())
    x = torch.randn(N, 3, dtype=COMPLEX, generator=torch.Generator().manual_seed(0), requires_grad=True)
    want = 0.5 * x.detach().numpy() - 2.0 * np.einsum("uv,vf->uf", second, x.detach().numpy())
    np.testing.assert_allclose(new.matmul(x).detach().numpy(), want, rtol=1e-12, atol=1e-12)
    assert gradcheck(lambda a: new.matmul(a), (x,))
    with pytest.raises(GraphInputError, match="values must be 1-D with one entry per column index"):
        op.with_values(values[:-1])

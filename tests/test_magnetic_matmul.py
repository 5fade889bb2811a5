"""Tests of learned_charge.magnetic_matmul, the magnetic Laplacian product differentiable in the charge.

References used (named again beside each check):
* a dense numpy construction of the normalized magnetic Laplacian straight from the edge list,
  following the published formula L = I - D^-1/2 (A_s * exp(i Theta)) D^-1/2 with
  A_s = (A + A^T)/2 and Theta = 2 pi q (A - A^T) or 2 pi q sign(A - A^T) (Zhang et al.,
  NeurIPS 2021; zero degrees give D^-1/2 = 0 as in src/phasorgraph/operators.py);
* a central finite difference in the charge, computed in float64 on a 200-node generated graph;
* torch.autograd.gradcheck (finite differences in float64) in the charge and x together.
"""

from __future__ import annotations

import numpy as np
import pytest
import torch
from torch.autograd import gradcheck

import dense
from phasorgraph.data.generators import directed_block_model
from phasorgraph.errors import GraphInputError
from phasorgraph.graph import DirectedGraph
from phasorgraph import learned_charge, operators
from phasorgraph.learned_charge import magnetic_matmul
from phasorgraph.operators import magnetic_laplacian


PHASES = ["difference", "sign"]


def _small_graph() -> DirectedGraph:
    # one-way edges, a reciprocal pair of unequal weights, a self-loop, an isolated node (5)
    src = [0, 1, 2, 2, 3, 3, 4, 0]
    dst = [1, 2, 0, 3, 2, 3, 0, 4]
    w = [1.0, 0.5, 0.25, 0.8, 0.3, 0.6, 0.9, 0.4]
    return DirectedGraph.from_edges(src, dst, weight=w, num_nodes=7)


def _dense_reference(graph: DirectedGraph, q: float, phase: str) -> np.ndarray:
    # reference: the published formula evaluated densely in numpy from the raw edges (tests/dense.py)
    return dense.normalized_magnetic_laplacian(dense.dense_adjacency(graph), q, phase)


def _features(shape, complex_values: bool, seed: int = 0) -> torch.Tensor:
    g = torch.Generator().manual_seed(seed)
    x = torch.randn(shape, generator=g, dtype=torch.float64)
    if complex_values:
        x = torch.complex(x, torch.randn(shape, generator=g, dtype=torch.float64))
    return x


@pytest.mark.parametrize("phase", PHASES)
@pytest.mark.parametrize("complex_x", [False, True])
@pytest.mark.parametrize("shape", [(7,), (7, 3), (7, 2, 3)])
def test_matches_dense_formula(phase, complex_x, shape):
    g = _small_graph()
    q = 0.3
    x = _features(shape, complex_x)
    y = magnetic_matmul(g, torch.tensor(q, dtype=torch.float64), x, phase=phase)
    L = _dense_reference(g, q, phase)
    expected = np.einsum("uv,v...->u...", L, x.numpy())  # numpy dense formula
    assert y.dtype == torch.complex128 and y.shape == x.shape
    np.testing.assert_allclose(y.detach().numpy(), expected, rtol=1e-12, atol=1e-12)
    # the same operator as the fixed-charge constructor
    op = magnetic_laplacian(g, q, phase=phase, dtype=torch.complex128)
    np.testing.assert_allclose(op.to_dense().numpy(), L, rtol=1e-12, atol=1e-12)


def test_single_precision():
    g = _small_graph()
    x = _features((7, 4), True).to(torch.complex64)
    y = magnetic_matmul(g, torch.tensor(0.2), x)
    expected = _dense_reference(g, 0.2, "difference") @ x.numpy()  # numpy dense formula
    assert y.dtype == torch.complex64
    np.testing.assert_allclose(y.numpy(), expected, rtol=1e-5, atol=1e-5)


@pytest.mark.parametrize("phase", PHASES)
@pytest.mark.parametrize("complex_x", [False, True])
def test_gradcheck_charge_and_x(phase, complex_x):
    g = _small_graph()
    q = torch.tensor(0.17, dtype=torch.float64, requires_grad=True)
    x = _features((7, 2), complex_x).requires_grad_()
    # reference: torch.autograd.gradcheck, finite differences in float64
    assert gradcheck(lambda c, t: magnetic_matmul(g, c, t, phase=phase), (q, x), eps=1e-6, atol=1e-7, rtol=1e-5)


@pytest.mark.parametrize("phase", PHASES)
def test_gradcheck_repeated_products(phase):
    # two products with the same charge (as a Chebyshev recursion does), then a nonlinearity
    g = _small_graph()
    q = torch.tensor(0.4, dtype=torch.float64, requires_grad=True)
    x = _features((7, 2), True).requires_grad_()

    def fn(c, t):
        return magnetic_matmul(g, c, magnetic_matmul(g, c, t, phase=phase), phase=phase).abs()

    assert gradcheck(fn, (q, x), eps=1e-6, atol=1e-7, rtol=1e-5)  # torch.autograd.gradcheck


@pytest.mark.parametrize("phase", PHASES)
def test_charge_gradient_central_difference_200_nodes(phase):
    graph, _ = directed_block_model([100, 100], [[0.05, 0.02], [0.02, 0.05]], [[0.5, 0.9], [0.1, 0.5]], seed=3)
    assert graph.num_nodes == 200 and graph.num_edges > 500
    x = _features((200, 4), True, seed=5)
    w = _features((200, 4), True, seed=6)

    def loss(c):
        y = magnetic_matmul(graph, c, x, phase=phase)
        return (w.conj() * y).real.sum() + 0.1 * (y.abs() ** 2).sum()

    q0 = 0.13
    q = torch.tensor(q0, dtype=torch.float64, requires_grad=True)
    loss(q).backward()
    h = 1e-5
    with torch.no_grad():
        fd = (loss(torch.tensor(q0 + h, dtype=torch.float64)) - loss(torch.tensor(q0 - h, dtype=torch.float64))) / (2 * h)
    # reference: central finite difference (f(q + h) - f(q - h)) / 2h in float64; its error is
    # O(h^2) times the third derivative, far below the tolerance
    assert abs(float(fd)) > 1e-3
    np.testing.assert_allclose(float(q.grad), float(fd), rtol=1e-6)


def test_real_x_stays_real_in_gradient():
    g = _small_graph()
    q = torch.tensor(0.25, dtype=torch.float64, requires_grad=True)
    x = _features((7, 3), False).requires_grad_()
    magnetic_matmul(g, q, x).abs().sum().backward()
    assert x.grad.dtype == torch.float64 and q.grad.dtype == torch.float64


def test_empty_and_isolated():
    empty = DirectedGraph.from_edges([[], []], num_nodes=0)
    y = magnetic_matmul(empty, torch.tensor(0.1, dtype=torch.float64), torch.zeros(0, 3, dtype=torch.float64))
    assert y.shape == (0, 3)
    lonely = DirectedGraph.from_edges([[], []], num_nodes=3)
    x = _features((3, 2), True)
    y = magnetic_matmul(lonely, torch.tensor(0.1, dtype=torch.float64), x)
    torch.testing.assert_close(y, x)  # no edges: L = I (zero degrees give D^-1/2 = 0, src/phasorgraph/operators.py)


def test_bad_input_messages():
    g = _small_graph()
    x = torch.ones(7, 2, dtype=torch.float64)
    with pytest.raises(GraphInputError, match="charge must be a 0-dim real floating tensor; got float"):
        magnetic_matmul(g, 0.25, x)
    with pytest.raises(GraphInputError, match=r"charge must be a 0-dim real floating tensor; got shape \(2,\)"):
        magnetic_matmul(g, torch.tensor([0.1, 0.2], dtype=torch.float64), x)
    with pytest.raises(GraphInputError, match="charge has dtype torch.float32 but x has precision torch.float64"):
        magnetic_matmul(g, torch.tensor(0.25), x)
    with pytest.raises(GraphInputError, match=r"x must have num_nodes = 7 rows \(shape \(N, \.\.\.\)\); got shape \(6, 2\)"):
        magnetic_matmul(g, torch.tensor(0.25, dtype=torch.float64), torch.ones(6, 2, dtype=torch.float64))
    with pytest.raises(GraphInputError, match="phase must be one of"):
        magnetic_matmul(g, torch.tensor(0.25, dtype=torch.float64), x, phase="angle")


def test_magnetic_product_reuses_one_value_array_and_matches_repeated_matmul():
    # reference: two applications of magnetic_matmul (itself checked against the dense formula
    # above); the map built once must give the same result and the same charge gradient
    g = DirectedGraph.from_edges([[0, 1, 2, 3, 3], [1, 2, 0, 0, 4]], weight=[1.0, 0.5, 0.7, 0.2, 0.9])
    x = torch.randn(5, 3, dtype=torch.float64)
    q1 = torch.tensor(0.13, dtype=torch.float64, requires_grad=True)
    q2 = torch.tensor(0.13, dtype=torch.float64, requires_grad=True)
    apply = learned_charge.magnetic_product(g, q1)
    y1 = apply(apply(x))
    y2 = learned_charge.magnetic_matmul(g, q2, learned_charge.magnetic_matmul(g, q2, x))
    torch.testing.assert_close(y1, y2)
    y1.abs().sum().backward()
    y2.abs().sum().backward()
    torch.testing.assert_close(q1.grad, q2.grad)
    assert torch.autograd.gradcheck(lambda q, t: learned_charge.magnetic_product(g, q)(learned_charge.magnetic_product(g, q)(t)),
                                    (q1.detach().requires_grad_(), x.clone().requires_grad_()))

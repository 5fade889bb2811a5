"""DiffusionWavelets and ScaleSelector: telescoping, frame bounds, dense references, gradients, errors.

References used here:
* the dense reference is numpy.linalg.matrix_power on the dense operator (numpy);
* frame bounds: eigenvalues of sum_j Psi_j^H Psi_j + Phi^H Phi by numpy.linalg.eigvalsh
  (inside spectral.frame_bounds, and once directly); the bounds [1 / (J + 2), 1] follow from
  the responses 1 - l, l^(2^(j-1)) - l^(2^j), l^(2^J) on l in [0, 1] being non-negative and
  summing to 1 (sum of squares <= square of sum; Cauchy-Schwarz for the lower bound), as in
  Gama et al. 2019 and Gao et al. 2019;
* for P = S T S^-1 (S = diag(sqrt d)) the bounds hold in the norm ||D^-1/2 x|| (same sources).
"""

import numpy as np
import pytest
import torch
from hypothesis import given
from hypothesis import strategies as st

from phasorgraph import DirectedGraph, GraphInputError, operators, spectral
from phasorgraph.nn import DiffusionWavelets, ScaleSelector
import dense
from strategies import charges, directed_graphs



KINDS = ("real", "magnetic", "walk")


def _operator(graph, kind, charge=0.25):
    if kind == "real":
        return operators.diffusion(graph, dtype=torch.float64)
    if kind == "magnetic":
        return operators.diffusion(graph, charge=charge, dtype=torch.complex128)
    return operators.random_walk(graph, dtype=torch.float64)


def _dense_bands(op, scales):
    """Psi_0 .. Psi_J, Phi_J as dense numpy matrices via numpy.linalg.matrix_power (tests/dense.py)."""
    return dense.wavelet_bands(op.to_dense().numpy(), scales)


def _small_graph():
    # a freight network of 6 depots: one-way shipments, a two-way lane, a self-loop, an isolated depot
    return DirectedGraph.from_edges([[0, 1, 2, 3, 3, 4, 1], [1, 2, 0, 4, 4, 3, 1]],
                                    weight=[1.0, 0.5, 2.0, 0.3, 0.4, 0.9, 0.2], num_nodes=6)


# ---------------------------------------------------------------------- properties
@given(graph=directed_graphs(min_nodes=1, max_nodes=9, unit_weights=True), scales=st.integers(1, 5),
       kind=st.sampled_from(KINDS), charge=charges())
def test_wavelets_telescope_to_identity_and_frame_bounds(graph, scales, kind, charge):
    op = _operator(graph, kind, charge)
    layer = DiffusionWavelets(scales)
    n = graph.num_nodes
    eye = torch.eye(n, dtype=torch.complex128 if op.is_complex else torch.float64)
    bands = layer(eye, op)  # (N, J + 2, N): column i is the bank applied to e_i
    assert bands.shape == (n, scales + 2, n)
    # sum_j Psi_j + Phi_J = I (telescoping; Coifman & Maggioni 2006)
    torch.testing.assert_close(bands.sum(dim=1), eye, atol=1e-10, rtol=0)
    if kind == "walk":
        # norm ||D^-1/2 x||: w = 1 / scale (scale = sqrt(d), 1 on isolated nodes)
        w = 1.0 / op.similar[1].to(torch.float64)
        low, high = spectral.frame_bounds(lambda e: w[:, None, None] * layer(e, op), op, weight=w)
    else:
        low, high = spectral.frame_bounds(lambda e: layer(e, op), op)
    assert low >= 1.0 / (scales + 2) - 1e-9
    assert high <= 1.0 + 1e-9


def test_frame_bounds_direct_numpy_check():
    # Same bound computed here with numpy.linalg.eigvalsh on the dense Gram (reference: numpy).
    g = _small_graph()
    for kind in ("real", "magnetic"):
        op = _operator(g, kind)
        for J in (1, 3, 5):
            gram = sum(F.conj().T @ F for F in _dense_bands(op, J))
            lam = np.linalg.eigvalsh((gram + gram.conj().T) / 2)
            assert lam[0] >= 1 / (J + 2) - 1e-12 and lam[-1] <= 1 + 1e-12


# ---------------------------------------------------------------------- references
@pytest.mark.parametrize("kind", KINDS)
@pytest.mark.parametrize("scales", [1, 2, 4])
def test_wavelets_match_dense_matrix_power(kind, scales):
    # Reference: numpy.linalg.matrix_power of the dense operator (P itself for the walk).
    op = _operator(_small_graph(), kind)
    x = torch.randn(6, 3, dtype=torch.float64, generator=torch.Generator().manual_seed(1))
    got = DiffusionWavelets(scales)(x, op)
    want = np.stack([F @ x.numpy() for F in _dense_bands(op, scales)], axis=1)
    np.testing.assert_allclose(got.numpy(), want, atol=1e-12)


def test_wavelets_complex_features_on_real_operator():
    op = _operator(_small_graph(), "real")
    gen = torch.Generator().manual_seed(2)
    x = torch.complex(torch.randn(6, 2, generator=gen, dtype=torch.float64),
                      torch.randn(6, 2, generator=gen, dtype=torch.float64))
    got = DiffusionWavelets(2)(x, op)
    want = np.stack([F @ x.numpy() for F in _dense_bands(op, 2)], axis=1)
    np.testing.assert_allclose(got.numpy(), want, atol=1e-12)


def test_walk_powers_run_on_hermitian_kernel():
    # P^k x = S T^k S^-1 x: the layer must never call the general (transposing) product.
    op = _operator(_small_graph(), "walk")
    x = torch.randn(6, 2, dtype=torch.float64, requires_grad=True)
    calls = []
    import phasorgraph.sparse as sparse_module

    original = sparse_module._operator_product

    def spy(op, *args):
        calls.append(op.hermitian)
        return original(op, *args)

    sparse_module._operator_product = spy
    try:
        DiffusionWavelets(3)(x, op).sum().backward()
    finally:
        sparse_module._operator_product = original
    assert calls and all(calls)


@pytest.mark.parametrize("kind", KINDS)
def test_wavelets_permutation_equivariant(kind):
    g = _small_graph()
    perm = torch.tensor([3, 0, 5, 1, 4, 2])
    x = torch.randn(6, 2, dtype=torch.float64, generator=torch.Generator().manual_seed(3))
    layer = DiffusionWavelets(3)
    out = layer(x, _operator(g, kind))
    out_p = layer(x[perm], _operator(g.permute(perm), kind))
    torch.testing.assert_close(out_p, out[perm], atol=1e-12, rtol=0)


@pytest.mark.parametrize("kind", KINDS)
def test_wavelets_gradcheck(kind):
    op = _operator(_small_graph(), kind)
    x = torch.randn(6, 2, dtype=torch.float64, requires_grad=True)
    # complex outputs: fast_mode (a random projection of the Jacobian) keeps this cheap
    assert torch.autograd.gradcheck(lambda v: DiffusionWavelets(2)(v, op), (x,), fast_mode=op.is_complex)
    if kind == "magnetic":
        xc = torch.randn(6, 2, dtype=torch.complex128, requires_grad=True)
        assert torch.autograd.gradcheck(lambda v: DiffusionWavelets(2)(v, op), (xc,), fast_mode=True)


def test_wavelets_isolated_nodes_and_empty_graph_no_nan():
    g = DirectedGraph.from_edges([[0], [1]], num_nodes=4)
    for kind in KINDS:
        out = DiffusionWavelets(2)(torch.ones(4, 1, dtype=torch.float64), _operator(g, kind))
        assert torch.isfinite(out).all()
    empty = DirectedGraph.from_edges(np.zeros((2, 0), dtype=np.int64), num_nodes=0)
    assert DiffusionWavelets(2)(torch.zeros(0, 3, dtype=torch.float64), _operator(empty, "real")).shape == (0, 4, 3)


# ---------------------------------------------------------------------- ScaleSelector
def _dense_selector(op, selection):
    return dense.selector_bands(op.to_dense().numpy(), selection)


@pytest.mark.parametrize("kind", KINDS)
def test_scale_selector_matches_dense_reference_and_telescopes(kind):
    # Reference: numpy.linalg.matrix_power; bands B_{j-1} - B_j with B_j = sum_t F_jt T^t.
    op = _operator(_small_graph(), kind)
    layer = ScaleSelector(8, 3, dtype=torch.float64)
    with torch.no_grad():
        layer.logits.normal_(generator=torch.Generator().manual_seed(4))
    x = torch.randn(6, 2, dtype=torch.float64, generator=torch.Generator().manual_seed(5))
    got = layer(x, op)
    want = np.stack([F @ x.numpy() for F in _dense_selector(op, layer.selection.detach().numpy())], axis=1)
    np.testing.assert_allclose(got.detach().numpy(), want, atol=1e-12)
    torch.testing.assert_close(got.sum(dim=1), x.to(got.dtype), atol=1e-12, rtol=0)


def test_scale_selector_starts_near_dyadic_wavelets():
    # With max_steps = 2^J and J + 1 boundaries the start is the dyadic bank up to the softmax spill.
    layer = ScaleSelector(8, 4, dtype=torch.float64)
    assert layer.initial_steps() == [1, 2, 4, 8]
    assert float(layer.selection.detach().max(dim=1).values.min()) > 0.97
    op = _operator(_small_graph(), "real")
    x = torch.randn(6, 2, dtype=torch.float64)
    with torch.no_grad():
        diff = (layer(x, op) - DiffusionWavelets(3)(x, op)).abs().max()
    assert float(diff) < 0.1 * float(x.abs().max())


def test_scale_selector_gradcheck():
    op = _operator(_small_graph(), "magnetic")
    layer = ScaleSelector(4, 2, dtype=torch.float64)
    x = torch.randn(6, 2, dtype=torch.float64, requires_grad=True)
    logits = layer.logits.detach().clone().requires_grad_(True)

    def fn(v, w):
        return torch.func.functional_call(layer, {"logits": w}, (v, op))

    assert torch.autograd.gradcheck(fn, (x, logits))


def test_scale_selector_repr_and_state_dict():
    layer = ScaleSelector(6, 2)
    assert repr(layer) == "ScaleSelector(max_steps=6, scales=2)"
    assert set(layer.state_dict()) == {"logits"}
    assert layer.logits.shape == (2, 7)


# ---------------------------------------------------------------------- bad input
def test_refuses_laplacian():
    lap = operators.normalized_laplacian(_small_graph(), dtype=torch.float64)
    with pytest.raises(GraphInputError, match=r"op must be a diffusion operator with spectrum in \[0, 1\].*"
                                              r"normalized_laplacian.*operators\.diffusion"):
        DiffusionWavelets(2)(torch.zeros(6, 1, dtype=torch.float64), lap)
    with pytest.raises(GraphInputError, match=r"spectrum in \[0, 1\]"):
        ScaleSelector(4, 2)(torch.zeros(6, 1, dtype=torch.float64), lap)


def test_refuses_non_lazy_walk_and_non_operator():
    walk = operators.random_walk(_small_graph(), lazy=False, dtype=torch.float64)
    with pytest.raises(GraphInputError, match=r"spectrum in \[0, 1\].*random_walk"):
        DiffusionWavelets(2)(torch.zeros(6, 1, dtype=torch.float64), walk)
    with pytest.raises(GraphInputError, match="op must be a SparseOperator diffusion operator"):
        DiffusionWavelets(2)(torch.zeros(6, 1), torch.eye(6))


def test_refuses_non_hermitian_without_similar():
    op = operators.random_walk(_small_graph(), dtype=torch.float64)
    op.similar = None
    with pytest.raises(GraphInputError, match="not Hermitian.*no similar"):
        DiffusionWavelets(2)(torch.zeros(6, 1, dtype=torch.float64), op)


@pytest.mark.parametrize("bad", [0, -1, 1.5, True, "3", 2 ** 40])
def test_refuses_bad_scales(bad):
    # 2**40 scales would mean 2**(2**40) products (issue 12 harness: it never returned)
    with pytest.raises(GraphInputError, match=r"scales must be an integer in \[1, 16\] \(the largest diffusion time"):
        DiffusionWavelets(bad)
    with pytest.raises(GraphInputError, match=r"scales must be an integer in \[1, 5\] \(at most one boundary per"):
        ScaleSelector(4, bad)
    with pytest.raises(GraphInputError, match=r"max_steps must be an integer in \[1, 65536\] \(one sparse product per step\)"):
        ScaleSelector(bad, 2)


def test_refuses_wrong_feature_rows():
    op = _operator(_small_graph(), "real")
    with pytest.raises(GraphInputError, match=r"x must have num_nodes = 6 rows; got shape \(5, 2\)"):
        DiffusionWavelets(2)(torch.zeros(5, 2, dtype=torch.float64), op)
    with pytest.raises(GraphInputError, match=r"x must have shape \(N, F\) \(2-D\); got shape \(6,\)"):
        DiffusionWavelets(2)(torch.zeros(6, dtype=torch.float64), op)
    with pytest.raises(GraphInputError, match=r"x must have num_nodes = 6 rows"):
        ScaleSelector(4, 2)(torch.zeros(7, 2, dtype=torch.float64), op)

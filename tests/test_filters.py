"""ChebyshevFilter, RenormalizedFilter, SpectralMultiplier: generic spec checks, then specifics.

References: dense NumPy formulas with numpy.linalg.eigh, numpy.polynomial.chebyshev.chebval
and numpy.interp (see tests/layer_specs.py, where each source is named beside its formula).
"""

import numpy as np
import pytest
import torch

from layer_specs import (
    GENERIC_CHECKS,
    features,
    np_chebyshev_filter,
    np_normalized_magnetic_laplacian,
    reference_graph,
    specs_for,
)
from phasorgraph import (
    DirectedGraph,
    GraphInputError,
    combinatorial_laplacian,
    magnetic_laplacian,
    normalized_laplacian,
    random_walk_laplacian,
)
from phasorgraph.nn import ChebyshevFilter, RenormalizedFilter, SpectralMultiplier
from phasorgraph.nn import filters as filters_module



@pytest.mark.parametrize("check", GENERIC_CHECKS, ids=lambda f: f.__name__)
@pytest.mark.parametrize("spec", specs_for("filters"), ids=str)
def test_generic(spec, check):
    check(spec)


# ---------------------------------------------------------------------- ChebyshevFilter
def test_chebyshev_max_eigenvalue_is_computed_once_and_the_operator_is_not_changed(monkeypatch):
    calls = []
    real = filters_module.largest_eigenvalue
    monkeypatch.setattr(filters_module, "largest_eigenvalue", lambda *a, **k: calls.append(1) or real(*a, **k))
    g, A = reference_graph()
    op = combinatorial_laplacian(g, dtype=torch.float64)
    assert op.max_eigenvalue is None
    layer = ChebyshevFilter(3, 2, order=2, dtype=torch.float64)
    other = ChebyshevFilter(3, 2, order=2, dtype=torch.float64)
    x = features(7, 3, torch.float64, False)
    y = layer(x, op)
    layer(x, op), other(x, op)
    assert len(calls) == 1                  # one eigenvalue per operator, shared by the layers
    assert op.max_eigenvalue is None        # a forward pass never changes the operator
    # source: numpy.linalg.eigvalsh of D - As, and the dense Chebyshev reference at that value
    As = (A + A.T) / 2
    L = np.diag(As.sum(1)) - As
    expected = np.linalg.eigvalsh(L)[-1]
    W, b = layer.weight.detach().numpy(), layer.bias.detach().numpy()
    np.testing.assert_allclose(y.detach().numpy(), np_chebyshev_filter(L, x.numpy(), W, expected) + b, atol=1e-9)


def test_chebyshev_fixed_max_eigenvalue_skips_the_eigenvalue_and_forward_max_eigenvalue_overrides():
    g, A = reference_graph()
    op = normalized_laplacian(g, dtype=torch.float64)
    x = features(7, 3, torch.float64, False)
    layer = ChebyshevFilter(3, 2, order=3, max_eigenvalue=2.0, dtype=torch.float64)
    y2 = layer(x, op)
    assert op.max_eigenvalue is None
    W = layer.weight.detach().numpy()
    L = np_normalized_magnetic_laplacian(A, 0.0).real
    b = layer.bias.detach().numpy()
    # source: numpy.linalg.eigh + numpy.polynomial.chebyshev.chebval (layer_specs.np_chebyshev_filter)
    np.testing.assert_allclose(y2.detach().numpy(), np_chebyshev_filter(L, x.numpy(), W, 2.0) + b, atol=1e-10)
    y15 = layer(x, op, max_eigenvalue=1.5)
    np.testing.assert_allclose(y15.detach().numpy(), np_chebyshev_filter(L, x.numpy(), W, 1.5) + b, atol=1e-10)


def test_chebyshev_on_a_graph_without_edges_is_nan_free():
    g = DirectedGraph.from_edges([[], []], num_nodes=4)
    layer = ChebyshevFilter(2, 3, order=3, dtype=torch.float64)
    x = features(4, 2, torch.float64, False)
    for op in (combinatorial_laplacian(g, dtype=torch.float64), normalized_laplacian(g, dtype=torch.float64)):
        y = layer(x, op)
        assert torch.isfinite(y).all()
    empty = DirectedGraph.from_edges([[], []], num_nodes=0)
    assert layer(torch.zeros(0, 2, dtype=torch.float64), normalized_laplacian(empty, dtype=torch.float64)).shape == (0, 3)


def test_chebyshev_real_weights_act_on_real_and_imaginary_parts_alike():
    g, _ = reference_graph()
    op = normalized_laplacian(g, dtype=torch.float64)
    layer = ChebyshevFilter(3, 2, order=2, bias=False, dtype=torch.float64)
    x = features(7, 3, torch.float64, True)
    y = layer(x, op)
    torch.testing.assert_close(y.real, layer(x.real.contiguous(), op))
    torch.testing.assert_close(y.imag, layer(x.imag.contiguous(), op))


def test_chebyshev_module_dtype_casts_keep_complex_weights():
    layer = ChebyshevFilter(2, 2, order=1, complex_weights=True)
    before = torch.view_as_complex(layer.weight.detach()).to(torch.complex128)
    layer = layer.double()     # complex weights are real pairs, so .double() keeps the imaginary parts
    torch.testing.assert_close(torch.view_as_complex(layer.weight.detach()), before)


def test_chebyshev_init_distribution_bounds():
    # real: U(-s, s), s = 1/sqrt((K+1) C_in); complex parts U(-s/sqrt2, s/sqrt2) (documented init)
    torch.manual_seed(0)
    layer = ChebyshevFilter(16, 32, order=3)
    s = 1 / np.sqrt(4 * 16)
    top = float(layer.weight.detach().abs().max())
    assert 0.9 * s < top <= s
    layer = ChebyshevFilter(16, 32, order=3, complex_weights=True)
    assert float(layer.weight.detach().abs().max()) <= s / np.sqrt(2) + 1e-7
    second = torch.view_as_complex(layer.weight.detach()).abs().pow(2).mean()
    assert float(second) == pytest.approx(s * s / 3, rel=0.1)


# ---------------------------------------------------------------------- RenormalizedFilter
def test_renormalized_filter_caches_the_operator_per_graph(monkeypatch):
    calls = []
    real = filters_module.renormalized_adjacency
    monkeypatch.setattr(filters_module, "renormalized_adjacency", lambda *a, **k: calls.append(1) or real(*a, **k))
    g, _ = reference_graph()
    layer = RenormalizedFilter(3, 2)
    x = features(7, 3, torch.float32, False)
    y1 = layer(x, g)
    y2 = layer(x, g)
    assert len(calls) == 1
    torch.testing.assert_close(y1, y2)
    g2 = DirectedGraph.from_edges([[0, 1], [1, 2]])
    layer(features(3, 3, torch.float32, False), g2)
    assert len(calls) == 2


# ---------------------------------------------------------------------- SpectralMultiplier
def test_spectral_multiplier_applies_to_graphs_of_other_sizes():
    layer = SpectralMultiplier(2, 3, knots=6, dtype=torch.float64)
    # a directed path on 5 nodes: a second graph, another size
    A = np.zeros((5, 5))
    A[[0, 1, 2, 3], [1, 2, 3, 4]] = 1.0
    g = DirectedGraph.from_scipy(A)
    x = features(5, 2, torch.float64, False)
    y = layer(x, normalized_laplacian(g, dtype=torch.float64))
    L = np_normalized_magnetic_laplacian(A, 0.0).real
    lam, U = np.linalg.eigh(L)          # source: numpy.linalg.eigh
    W = layer.weight.detach().numpy()
    g_vals = np.stack([np.stack([np.interp(lam, layer.knots, W[:, i, o]) for o in range(3)], -1)
                       for i in range(2)], 1)   # source: numpy.interp
    expected = U @ np.einsum("ni,nio->no", U.T @ x.numpy(), g_vals) + layer.bias.detach().numpy()
    np.testing.assert_allclose(y.detach().numpy(), expected, atol=1e-10)
    assert layer(features(7, 2, torch.float64, False), normalized_laplacian(reference_graph()[0], dtype=torch.float64)).shape == (7, 3)


def test_spectral_multiplier_constant_knots_give_a_scaled_identity():
    # closed form: g(lambda) = c for every lambda makes U diag(c) U^H = c I
    layer = SpectralMultiplier(1, 1, knots=4, bias=False, dtype=torch.float64)
    with torch.no_grad():
        layer.weight.fill_(0.7)
    g, _ = reference_graph()
    x = features(7, 1, torch.float64, True)
    torch.testing.assert_close(layer(x, magnetic_laplacian(g, 0.1, dtype=torch.complex128)), 0.7 * x)


def test_spectral_multiplier_caches_the_basis_per_operator(monkeypatch):
    calls = []
    real = filters_module.fourier_basis
    monkeypatch.setattr(filters_module, "fourier_basis", lambda *a, **k: calls.append(1) or real(*a, **k))
    g, _ = reference_graph()
    op = normalized_laplacian(g)
    a, b = SpectralMultiplier(3, 2, knots=3), SpectralMultiplier(3, 1, knots=5)
    x = features(7, 3, torch.float32, False)
    a(x, op), a(x, op), b(x, op)
    assert len(calls) == 1
    assert not hasattr(op, "fourier_basis") and op.max_eigenvalue is None   # kept beside op, not on it


def test_spectral_multiplier_refuses_large_graphs():
    g, _ = reference_graph()
    layer = SpectralMultiplier(3, 2, knots=3, max_nodes=5)
    with pytest.raises(GraphInputError, match=r"op has 7 nodes .*max_nodes = 5"):
        layer(features(7, 3, torch.float32, False), normalized_laplacian(g))
    with pytest.raises(GraphInputError, match=r"num_nodes = 10 exceeds max_nodes = 5"):
        SpectralMultiplier(3, 2, knots="per_eigenvalue", num_nodes=10, max_nodes=5)


def test_spectral_multiplier_bad_arguments():
    g, _ = reference_graph()
    with pytest.raises(GraphInputError, match=r"num_nodes is required"):
        SpectralMultiplier(2, 2, knots="per_eigenvalue")
    with pytest.raises(GraphInputError, match=r"knots must be an int >= 2.*'free'"):
        SpectralMultiplier(2, 2, knots="free")
    with pytest.raises(GraphInputError, match=r"knots must be an integer >= 2; got 1"):
        SpectralMultiplier(2, 2, knots=1)
    with pytest.raises(GraphInputError, match=r"strictly increasing"):
        SpectralMultiplier(2, 2, knots=[0.0, 1.0, 0.5])
    with pytest.raises(GraphInputError, match=r"interval must be a finite pair with low < high"):
        SpectralMultiplier(2, 2, knots=3, interval=(2.0, 0.0))
    free = SpectralMultiplier(2, 2, knots="per_eigenvalue", num_nodes=5)
    with pytest.raises(GraphInputError, match=r"op has 7 nodes but this per-eigenvalue .*num_nodes = 5"):
        free(features(7, 2, torch.float32, False), normalized_laplacian(g))
    narrow = SpectralMultiplier(2, 2, knots=3, interval=(0.0, 1.0))
    with pytest.raises(GraphInputError, match=r"eigenvalues in \[.*\] but the knots cover interval = \(0.0, 1.0\)"):
        narrow(features(7, 2, torch.float32, False), normalized_laplacian(g))
    with pytest.raises(GraphInputError, match=r"op must be Hermitian for SpectralMultiplier"):
        SpectralMultiplier(2, 2, knots=3)(features(7, 2, torch.float32, False), random_walk_laplacian(g))


# ---------------------------------------------------------------------- bad input
def test_feature_rows_must_match_num_nodes():
    g, _ = reference_graph()
    x = features(6, 3, torch.float32, False)
    with pytest.raises(GraphInputError, match=r"x must have num_nodes = 7 rows .*got shape \(6, 3\)"):
        ChebyshevFilter(3, 2, order=1)(x, normalized_laplacian(g))
    with pytest.raises(GraphInputError, match=r"x must have num_nodes = 7 rows"):
        RenormalizedFilter(3, 2)(x, g)
    with pytest.raises(GraphInputError, match=r"x must have num_nodes = 7 rows"):
        SpectralMultiplier(3, 2, knots=3)(x, normalized_laplacian(g))


def test_feature_width_precision_and_shape_are_checked():
    g, _ = reference_graph()
    op = normalized_laplacian(g)
    layer = ChebyshevFilter(3, 2, order=1)
    with pytest.raises(GraphInputError, match=r"x must have in_channels = 3 columns"):
        layer(features(7, 4, torch.float32, False), op)
    with pytest.raises(GraphInputError, match=r"x must have shape \(N, C_in\) \(2-D\)"):
        layer(torch.ones(7), op)
    with pytest.raises(GraphInputError, match=r"x has dtype torch.float64 but the layer's parameters are torch.float32"):
        layer(features(7, 3, torch.float64, False), op)
    with pytest.raises(GraphInputError, match=r"op has dtype torch.float64 but ChebyshevFilter's parameters are torch.float32"):
        layer(features(7, 3, torch.float32, False), normalized_laplacian(g, dtype=torch.float64))
    with pytest.raises(GraphInputError, match=r"op must be a SparseOperator; got DirectedGraph"):
        layer(features(7, 3, torch.float32, False), g)


def test_complex_operator_into_real_only_layer():
    g, _ = reference_graph()
    with pytest.raises(GraphInputError, match=r"op must be real for RenormalizedFilter .*complex64"):
        RenormalizedFilter(3, 2)(features(7, 3, torch.float32, False), magnetic_laplacian(g, 0.25))


def test_non_hermitian_operator_into_chebyshev():
    g, _ = reference_graph()
    with pytest.raises(GraphInputError, match=r"op must be real symmetric or Hermitian for ChebyshevFilter"):
        ChebyshevFilter(3, 2, order=1)(features(7, 3, torch.float32, False), random_walk_laplacian(g))


def test_constructor_arguments_are_checked():
    with pytest.raises(GraphInputError, match=r"order must be an integer >= 0; got -1"):
        ChebyshevFilter(3, 2, order=-1)
    with pytest.raises(GraphInputError, match=r"order must be an integer >= 0; got 1.5"):
        ChebyshevFilter(3, 2, order=1.5)
    with pytest.raises(GraphInputError, match=r"in_channels must be an integer >= 1; got 0"):
        ChebyshevFilter(0, 2, order=1)
    with pytest.raises(GraphInputError, match=r"max_eigenvalue must be a finite number > 0"):
        ChebyshevFilter(3, 2, order=1, max_eigenvalue=0.0)
    with pytest.raises(GraphInputError, match=r"dtype must be torch.float32 or torch.float64"):
        RenormalizedFilter(3, 2, dtype=torch.int64)
    g, _ = reference_graph()
    with pytest.raises(GraphInputError, match=r"max_eigenvalue \(forward\) must be a finite number > 0"):
        ChebyshevFilter(3, 2, order=1)(features(7, 3, torch.float32, False), normalized_laplacian(g), max_eigenvalue=-2)

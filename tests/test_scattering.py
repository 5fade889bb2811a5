"""DiffusionScattering: dense reference, channel layout, mixing, gradients, equivariance, errors.

Reference: the scattering coefficients of Gama et al. 2019 / Gao et al. 2019
(Phi_J x, Phi_J |Psi_j x|, Phi_J |Psi_j2 |Psi_j1 x|| for j1 < j2), computed here with dense
numpy.linalg.matrix_power wavelets and numpy.abs, channel by channel (no stacking).
"""

import numpy as np
import pytest
import torch
from hypothesis import given
from hypothesis import strategies as st

from phasorgraph import DirectedGraph, GraphInputError, operators
from phasorgraph.nn import DiffusionScattering
import dense
from layer_specs import GENERIC_CHECKS, specs_for
from strategies import charges, directed_graphs, features



KINDS = ("real", "magnetic", "walk")


def _graph():
    # freight depots: one-way shipments, a two-way lane, a self-loop, an isolated depot
    return DirectedGraph.from_edges([[0, 1, 2, 3, 3, 4, 1, 5], [1, 2, 0, 4, 4, 3, 1, 0]],
                                    weight=[1.0, 0.5, 2.0, 0.3, 0.4, 0.9, 0.2, 0.7], num_nodes=7)


def _operator(kind):
    g = _graph()
    if kind == "real":
        return operators.diffusion(g, dtype=torch.float64)
    if kind == "magnetic":
        return operators.diffusion(g, charge=0.2, dtype=torch.complex128)
    return operators.random_walk(g, dtype=torch.float64)


def _reference(op, x, J, order, lowpass=True):
    """Dense numpy reference, (N, K, F), one feature column and one path at a time (tests/dense.py)."""
    return dense.scattering(op.to_dense().numpy(), x, J, order, lowpass)


def _x(f=3, seed=0, dtype=torch.float64):
    return torch.randn(7, f, dtype=dtype, generator=torch.Generator().manual_seed(seed))


@pytest.mark.parametrize("kind", KINDS)
@pytest.mark.parametrize("order", [1, 2])
@pytest.mark.parametrize("lowpass", [True, False])
def test_scattering_matches_dense_reference(kind, order, lowpass):
    J = 3
    op, x = _operator(kind), _x()
    layer = DiffusionScattering(3, J, order=order, lowpass=lowpass)
    got = layer(x, op)
    want = _reference(op, x.numpy(), J, order, lowpass)
    assert got.dtype == torch.float64 and not got.is_complex()
    assert got.shape == (7, layer.num_coefficients * 3)
    np.testing.assert_allclose(got.reshape(7, -1, 3).numpy(), want, atol=1e-12)
    np.testing.assert_allclose(layer.coefficients(x, op).numpy(), want, atol=1e-12)


def test_complex_features_on_magnetic_operator():
    op = _operator("magnetic")
    x = torch.complex(_x(seed=1), _x(seed=2))
    layer = DiffusionScattering(3, 2, order=2)
    got = layer(x, op)
    assert not got.is_complex()
    np.testing.assert_allclose(got.reshape(7, -1, 3).numpy(), _reference(op, x.numpy(), 2, 2), atol=1e-12)


@pytest.mark.parametrize("J", [1, 2, 4])
def test_channel_layout_and_count(J):
    one = DiffusionScattering(2, J, order=1)
    two = DiffusionScattering(2, J, order=2)
    # K = 1 + (J + 1) (+ J (J + 1) / 2): counted by hand from the definition
    assert one.num_coefficients == J + 2 and one.paths == [()] + [(j,) for j in range(J + 1)]
    assert two.num_coefficients == J + 2 + J * (J + 1) // 2
    assert two.paths[: J + 2] == one.paths
    assert all(j1 < j2 for j1, j2 in two.paths[J + 2:])
    assert two.num_outputs == two.num_coefficients * 2


def test_learned_mixing_is_a_linear_map_of_the_coefficients():
    op, x = _operator("real"), _x()
    layer = DiffusionScattering(3, 2, order=2, out_channels=5, dtype=torch.float64)
    c = layer.coefficients(x, op).reshape(7, -1)
    torch.testing.assert_close(layer(x, op), c @ layer.weight.T + layer.bias)
    assert layer.weight.shape == (5, layer.num_coefficients * 3) and layer.bias.shape == (5,)
    nobias = DiffusionScattering(3, 2, out_channels=5, bias=False)
    assert nobias.bias is None and [k for k, _ in nobias.named_parameters()] == ["weight"]
    assert DiffusionScattering(3, 2).weight is None and len(list(DiffusionScattering(3, 2).parameters())) == 0


def test_repr_and_state_dict_round_trip():
    layer = DiffusionScattering(3, 2, order=2, out_channels=4, dtype=torch.float64)
    assert repr(layer) == "DiffusionScattering(3, scales=2, order=2, out_channels=4)"
    other = DiffusionScattering(3, 2, order=2, out_channels=4, dtype=torch.float64)
    other.load_state_dict(layer.state_dict())
    op, x = _operator("walk"), _x()
    torch.testing.assert_close(other(x, op), layer(x, op))


@pytest.mark.parametrize("kind", KINDS)
def test_scattering_permutation_equivariant(kind):
    g = _graph()
    perm = torch.tensor([6, 3, 0, 5, 1, 4, 2])
    x = _x()
    layer = DiffusionScattering(3, 2, order=2)

    def op_of(graph):
        if kind == "real":
            return operators.diffusion(graph, dtype=torch.float64)
        if kind == "magnetic":
            return operators.diffusion(graph, charge=0.2, dtype=torch.complex128)
        return operators.random_walk(graph, dtype=torch.float64)

    torch.testing.assert_close(layer(x[perm], op_of(g.permute(perm))), layer(x, op_of(g))[perm], atol=1e-12, rtol=0)


@pytest.mark.parametrize("kind", ["real", "magnetic", "walk"])
def test_scattering_gradcheck(kind):
    op = _operator(kind)
    layer = DiffusionScattering(2, 2, order=2, out_channels=3, dtype=torch.float64)
    x = _x(2, seed=4).requires_grad_(True)
    params = {k: v.detach().clone().requires_grad_(True) for k, v in layer.named_parameters()}

    def fn(v, w, b):
        return torch.func.functional_call(layer, {"weight": w, "bias": b}, (v, op))

    assert torch.autograd.gradcheck(fn, (x, params["weight"], params["bias"]), fast_mode=op.is_complex)


def test_empty_graph_gives_empty_output():
    empty = DirectedGraph.from_edges(np.zeros((2, 0), dtype=np.int64), num_nodes=0)
    for op in (operators.diffusion(empty), operators.diffusion(empty, charge=0.25), operators.random_walk(empty)):
        for order in (1, 2):
            out = DiffusionScattering(2, 2, order=order, out_channels=3)(torch.zeros(0, 2), op)
            assert out.shape == (0, 3)


def test_isolated_nodes_no_nan():
    g = DirectedGraph.from_edges([[0], [1]], num_nodes=4)
    for op in (operators.diffusion(g), operators.diffusion(g, charge=0.25), operators.random_walk(g)):
        out = DiffusionScattering(2, 3, order=2)(torch.ones(4, 2), op)
        assert torch.isfinite(out).all()


@given(graph=directed_graphs(min_nodes=1, max_nodes=9, unit_weights=True), data=st.data(),
       J=st.integers(1, 4), order=st.sampled_from([1, 2]), magnetic=st.booleans(), charge=charges())
def test_scattering_is_non_expansive(graph, data, J, order, magnetic, charge):
    # ||S x - S y|| <= ||x - y||: the wavelet frame has upper bound 1 and the modulus is
    # non-expansive (S. Mallat, Group invariant scattering, CPAM 2012; the diffusion case in
    # Gama, Ribeiro & Bruna 2019). Holds for every order with our layout (j2 > j1 only).
    n = graph.num_nodes
    op = (operators.diffusion(graph, charge=charge, dtype=torch.complex128) if magnetic
          else operators.diffusion(graph, dtype=torch.float64))
    x = data.draw(features(n, 2))
    y = data.draw(features(n, 2))
    layer = DiffusionScattering(2, J, order=order)
    gap = float(((layer(x, op) - layer(y, op)) ** 2).sum())
    assert gap <= float(((x - y) ** 2).sum()) * (1 + 1e-9) + 1e-12


# ---------------------------------------------------------------------- bad input
@pytest.mark.parametrize("bad", [0, 3, 1.0, True, "2"])
def test_refuses_bad_order(bad):
    with pytest.raises(GraphInputError, match=r"order must be 1 or 2; got"):
        DiffusionScattering(3, 2, order=bad)


@pytest.mark.parametrize("bad", [0, -2, 2.5, 2 ** 40])
def test_refuses_bad_scales(bad):
    with pytest.raises(GraphInputError, match=r"scales must be an integer in \[1, 16\]"):
        DiffusionScattering(3, bad)


def test_refuses_bad_channels():
    with pytest.raises(GraphInputError, match=r"in_channels must be an integer >= 1; got 0"):
        DiffusionScattering(0, 2)
    with pytest.raises(GraphInputError, match=r"out_channels must be None or an integer >= 1; got -1"):
        DiffusionScattering(3, 2, out_channels=-1)


def test_refuses_wrong_features_and_laplacian():
    layer = DiffusionScattering(3, 2)
    op = _operator("real")
    with pytest.raises(GraphInputError, match=r"x must have num_nodes = 7 rows; got shape \(6, 3\)"):
        layer(torch.zeros(6, 3, dtype=torch.float64), op)
    with pytest.raises(GraphInputError, match=r"x must have in_channels = 3 columns; got shape \(7, 2\)"):
        layer(torch.zeros(7, 2, dtype=torch.float64), op)
    lap = operators.magnetic_laplacian(_graph(), 0.25, dtype=torch.complex128)
    with pytest.raises(GraphInputError, match=r"spectrum in \[0, 1\].*magnetic_laplacian.*operators\.diffusion"):
        layer(torch.zeros(7, 3, dtype=torch.float64), lap)


# ---------------------------------------------------------------------- module conventions, all band-pass layers
# reference forward, factory kwargs (meta device), repr, pickle / torch.save / state_dict, non-contiguous
# input, gradcheck and permutation equivariance for every band-pass layer: the generic layer table
@pytest.mark.parametrize("check", GENERIC_CHECKS, ids=lambda f: f.__name__)
@pytest.mark.parametrize("spec", specs_for("bandpass"), ids=str)
def test_generic(spec, check):
    check(spec)


def test_scale_selector_permutation_equivariant():
    from phasorgraph.nn import ScaleSelector

    g = _graph()
    perm = torch.tensor([6, 3, 0, 5, 1, 4, 2])
    layer = ScaleSelector(6, 3, dtype=torch.float64)
    x = _x()
    with torch.no_grad():
        out = layer(x, operators.random_walk(g, dtype=torch.float64))
        out_p = layer(x[perm], operators.random_walk(g.permute(perm), dtype=torch.float64))
    torch.testing.assert_close(out_p, out[perm], atol=1e-12, rtol=0)

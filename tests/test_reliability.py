"""Issue 12: no silent wrong answer in the layers, and the NaN rule.

* Integer features: every layer refuses them with the same message (one rule, no silent cast).
* ChebyshevFilter rescales on the operator's spectrum interval [a, b]: checked against a dense
  reference (numpy.linalg.eigh + numpy.polynomial.chebyshev.chebval) on indefinite operators.
* A learned charge stays strictly inside (0, 0.5) with a live gradient after huge steps.
* MomentReadout: finite standardized moments for float32 features around 1e10 and 1e-12,
  against scipy.stats.skew / scipy.stats.kurtosis in float64.
* The NaN rule: a NaN in one node's features is visible in that node's own outputs and in no
  row outside its connected component (no layer turns it into a number, none spreads it).
"""

import math

import numpy as np
import pytest
import scipy.stats
import torch
from hypothesis import given, settings
from hypothesis import strategies as st
import dense  # the one dense reference module (numpy.linalg.eigh + numpy.polynomial.chebyshev)

from phasorgraph import (
    DirectedGraph,
    GraphInputError,
    SparseOperator,
    diffusion,
    magnetic_adjacency,
    magnetic_laplacian,
    normalized_laplacian,
    random_walk,
    renormalized_adjacency,
)
from phasorgraph.nn import (
    BandMix,
    Cardioid,
    ChebyshevFilter,
    DiffusionScattering,
    DiffusionWavelets,
    LearnedCharge,
    MagneticFilter,
    ModReLU,
    MomentReadout,
    RealPartGate,
    RenormalizedFilter,
    ScaleSelector,
    SpectralMultiplier,
    SplitReLU,
    ZReLU,
)


def _two_components():
    """7 nodes: a directed 4-cycle with a chord (0..3) and a directed path 4 -> 5 -> 6."""
    return DirectedGraph.from_edges([[0, 1, 2, 3, 0, 4, 5], [1, 2, 3, 0, 2, 5, 6]], num_nodes=7)


# ---------------------------------------------------------------------- integer features: one rule
_INT_MESSAGE = r"x dtype must be float32, float64, complex64 or complex128; got torch\.int64 \(convert integer features"

_LAYERS_ON_OPERATORS = [
    ("ChebyshevFilter", lambda: ChebyshevFilter(2, 3, order=2), lambda g: normalized_laplacian(g)),
    ("SpectralMultiplier", lambda: SpectralMultiplier(2, 3, knots=3), lambda g: normalized_laplacian(g)),
    ("DiffusionWavelets on the walk", lambda: DiffusionWavelets(2), lambda g: random_walk(g)),
    ("DiffusionScattering on the walk", lambda: DiffusionScattering(2, 2), lambda g: random_walk(g)),
    ("ScaleSelector on the walk", lambda: ScaleSelector(4, 2), lambda g: random_walk(g)),
    ("DiffusionWavelets", lambda: DiffusionWavelets(2), lambda g: diffusion(g)),
    ("RenormalizedFilter", lambda: RenormalizedFilter(2, 3), lambda g: g),
    ("MagneticFilter", lambda: MagneticFilter(2, 2, order=1, charge=0.1), lambda g: g),
    ("BandMix", lambda: BandMix(2, 3), lambda g: g),
]


@pytest.mark.parametrize("name,build,operand", _LAYERS_ON_OPERATORS, ids=[c[0] for c in _LAYERS_ON_OPERATORS])
def test_every_layer_refuses_integer_features_with_one_message(name, build, operand):
    # before issue 12 the walk-based layers cast the similarity scale to int64 and returned inf / NaN
    g = _two_components()
    with pytest.raises(GraphInputError, match=_INT_MESSAGE):
        build()(torch.ones(7, 2, dtype=torch.int64), operand(g))


def test_moment_readout_refuses_integer_features():
    with pytest.raises(GraphInputError, match=r"convert integer features with x\.float\(\)\); got dtype torch\.int64"):
        MomentReadout()(torch.ones(4, 2, dtype=torch.int64))


# ---------------------------------------------------------------------- Chebyshev on [a, b]



@pytest.mark.parametrize("kind", ["magnetic_adjacency", "renormalized_adjacency", "normalized_laplacian"])
def test_chebyshev_filter_maps_the_operator_interval_onto_minus_one_one(kind):
    g = _two_components()
    op = {"magnetic_adjacency": lambda: magnetic_adjacency(g, 0.25, dtype=torch.complex128),
          "renormalized_adjacency": lambda: renormalized_adjacency(g, dtype=torch.float64),
          "normalized_laplacian": lambda: normalized_laplacian(g, dtype=torch.float64)}[kind]()
    layer = ChebyshevFilter(2, 3, order=6, bias=False, dtype=torch.float64)
    x = torch.randn(7, 2, dtype=torch.float64, generator=torch.Generator().manual_seed(0))
    y = layer(x.to(op.dtype), op).detach().numpy()
    L = op.to_dense().numpy()
    a = op.spectrum[0]
    b = float(np.linalg.eigvalsh(L)[-1])  # source: numpy.linalg.eigvalsh
    ref = dense.chebyshev_filter(L, x.numpy(), layer.weight.detach().numpy(), b, a)
    np.testing.assert_allclose(y, ref, rtol=1e-9, atol=1e-9)


@settings(max_examples=25)
@given(st.integers(0, 2 ** 31 - 1), st.sampled_from(["magnetic_adjacency", "renormalized_adjacency"]))
def test_chebyshev_terms_stay_bounded_on_indefinite_operators(seed, kind):
    # |T_k(t)| <= 1 on [-1, 1] (Chebyshev polynomials, a closed form): with all W_k = I the
    # output of order K has norm at most (K + 1) |x|. Rescaled as if the spectrum started at 0,
    # the magnetic adjacency gave terms 1e3 - 1e6 times larger (issue 12).
    rng = np.random.default_rng(seed)
    n = 8
    src, dst = rng.integers(0, n, 14), rng.integers(0, n, 14)
    g = DirectedGraph(src, dst, rng.uniform(0.1, 1.0, 14), n)
    op = (magnetic_adjacency(g, 0.3, dtype=torch.complex128) if kind == "magnetic_adjacency"
          else renormalized_adjacency(g, dtype=torch.float64))
    K = 8
    layer = ChebyshevFilter(3, 3, order=K, bias=False, dtype=torch.float64)
    with torch.no_grad():
        layer.weight.copy_(torch.eye(3, dtype=torch.float64).expand(K + 1, 3, 3))
    x = torch.as_tensor(rng.standard_normal((n, 3))).to(op.dtype)
    y = layer(x, op).detach()
    assert float(y.abs().pow(2).sum().sqrt()) <= (K + 1) * float(x.abs().pow(2).sum().sqrt()) * (1 + 1e-9)


def test_chebyshev_filter_refuses_an_operator_without_a_spectrum_interval():
    m = normalized_laplacian(_two_components()).matrix
    op = SparseOperator(m, hermitian=True, kind="custom")
    with pytest.raises(GraphInputError, match=r"op \(kind 'custom'\) carries no spectrum interval, so ChebyshevFilter "
                                              r"cannot map its eigenvalues onto \[-1, 1\]; build it with "
                                              r"SparseOperator\(\.\.\., spectrum=\(lower, upper\)\)"):
        ChebyshevFilter(2, 2, order=2)(torch.ones(7, 2), op)


def test_chebyshev_filter_refuses_a_max_eigenvalue_below_the_interval():
    m = (2 * torch.eye(3)).to_sparse_csr()
    op = SparseOperator(m, hermitian=True, spectrum=(1.0, 3.0), kind="shifted")
    with pytest.raises(GraphInputError, match=r"max_eigenvalue 0\.5 lies below the lower end 1 of op's spectrum "
                                              r"interval \(1\.0, 3\.0\) \(kind 'shifted'\); pass a max_eigenvalue in \[1, 3\]"):
        ChebyshevFilter(2, 2, order=2)(torch.ones(3, 2), op, max_eigenvalue=0.5)


# ---------------------------------------------------------------------- learned charge
@pytest.mark.parametrize("dtype", [torch.float32, torch.float64])
@pytest.mark.parametrize("direction", [1.0, -1.0])
def test_learned_charge_stays_strictly_inside_with_a_live_gradient(dtype, direction):
    g = _two_components()
    layer = MagneticFilter(2, 2, order=2, charge=LearnedCharge(start=0.1), dtype=dtype)
    opt = torch.optim.SGD([layer.charge_logit], lr=1e9)
    x = torch.randn(7, 2, dtype=dtype, generator=torch.Generator().manual_seed(1))
    for _ in range(3):  # each step throws the logit about 1e8 further out
        opt.zero_grad()
        loss = direction * 1e3 * layer.charge + layer(x, g).abs().sum() * 0
        loss.backward()
        opt.step()
    assert abs(float(layer.charge_logit.detach())) > 1e6
    q = float(layer.charge.detach())
    assert 0.0 < q < 0.5
    opt.zero_grad()
    layer.charge.backward()
    assert float(layer.charge_logit.grad) != 0.0  # the map never goes flat: the charge can come back


def test_learned_charge_straight_through_clamp_passes_gradcheck_inside_its_bound():
    from phasorgraph.nn.magnetic import _learned_charge

    u = torch.tensor([-3.0, 0.2, 5.0], dtype=torch.float64, requires_grad=True)
    assert torch.autograd.gradcheck(_learned_charge, (u,))


# ---------------------------------------------------------------------- MomentReadout scales
@pytest.mark.parametrize("scale", [1e10, 1e-12, 1e19, 1e-19])
def test_moment_readout_is_finite_for_float32_features_at_extreme_scales(scale):
    rng = np.random.default_rng(3)
    x64 = rng.standard_normal((40, 3)) * scale
    x = torch.as_tensor(x64, dtype=torch.float32)
    out = MomentReadout(moments=4)(x)
    assert torch.isfinite(out[:, 6:]).all()  # skewness and kurtosis
    xs = x.double().numpy()
    # source: scipy.stats.skew and scipy.stats.kurtosis(fisher=False) (population moments), float64
    np.testing.assert_allclose(out[0, 6:9].double().numpy(), scipy.stats.skew(xs, axis=0), rtol=1e-4, atol=1e-5)
    np.testing.assert_allclose(out[0, 9:12].double().numpy(), scipy.stats.kurtosis(xs, axis=0, fisher=False),
                               rtol=1e-4)
    np.testing.assert_allclose(out[0, :3].double().numpy(), xs.mean(0), rtol=1e-4, atol=1e-6 * scale)


@settings(max_examples=30)
@given(st.floats(-12, 12), st.integers(0, 2 ** 31 - 1))
def test_standardized_moments_do_not_depend_on_the_scale_of_the_features(log_scale, seed):
    # m_k / sigma^k is invariant under x -> c x, c > 0 (a closed form)
    rng = np.random.default_rng(seed)
    x = torch.as_tensor(rng.standard_normal((12, 2)), dtype=torch.float32)
    base = MomentReadout(moments=4)(x)[:, 4:]
    scaled = MomentReadout(moments=4)(x * float(10 ** log_scale))[:, 4:]
    torch.testing.assert_close(scaled, base, rtol=1e-4, atol=1e-4)


# ---------------------------------------------------------------------- the NaN rule
def _component_of(node: int) -> set:
    return {0, 1, 2, 3} if node < 4 else {4, 5, 6}


_NAN_CASES = [
    ("ChebyshevFilter", lambda: ChebyshevFilter(2, 3, order=3, dtype=torch.float64),
     lambda g: normalized_laplacian(g, dtype=torch.float64)),
    ("SpectralMultiplier", lambda: SpectralMultiplier(2, 3, knots=4, dtype=torch.float64),
     lambda g: normalized_laplacian(g, dtype=torch.float64)),
    ("SpectralMultiplier magnetic", lambda: SpectralMultiplier(2, 3, knots=4, dtype=torch.float64),
     lambda g: magnetic_laplacian(g, 0.2, dtype=torch.complex128)),
    ("MagneticFilter", lambda: MagneticFilter(2, 2, order=2, charge=0.25, dtype=torch.float64), lambda g: g),
    ("RenormalizedFilter", lambda: RenormalizedFilter(2, 3, dtype=torch.float64), lambda g: g),
    ("DiffusionScattering", lambda: DiffusionScattering(2, 2, order=2), lambda g: diffusion(g, dtype=torch.float64)),
    ("ScaleSelector", lambda: ScaleSelector(4, 2, dtype=torch.float64), lambda g: random_walk(g, dtype=torch.float64)),
    ("BandMix", lambda: BandMix(2, 3, dtype=torch.float64), lambda g: g),
]


@pytest.mark.parametrize("name,build,operand", _NAN_CASES, ids=[c[0] for c in _NAN_CASES])
@pytest.mark.parametrize("node", [1, 5])
def test_nan_stays_in_its_own_node_and_component(name, build, operand, node):
    torch.manual_seed(0)
    g = _two_components()
    layer = build()
    x = torch.randn(7, 2, dtype=torch.float64)
    clean = layer(x, operand(g))
    dirty_x = x.clone()
    dirty_x[node, 0] = float("nan")
    dirty = layer(dirty_x, operand(g)).reshape(7, -1)
    clean = clean.reshape(7, -1)
    nan_rows = {int(r) for r in torch.nonzero(torch.isnan(dirty).any(dim=1).reshape(-1))}
    assert node in nan_rows                        # visible where it belongs
    assert nan_rows <= _component_of(node)         # and nowhere else
    outside = sorted(set(range(7)) - _component_of(node))
    torch.testing.assert_close(dirty[outside], clean[outside], rtol=1e-12, atol=1e-12)


def test_moment_readout_nan_stays_in_its_own_graph():
    x = torch.randn(6, 2)
    x[1, 0] = float("nan")
    out = MomentReadout()(x, torch.tensor([0, 0, 0, 1, 1, 1]))
    assert torch.isnan(out[0]).any() and torch.isfinite(out[1]).all()


@pytest.mark.parametrize("layer", [ZReLU(), RealPartGate(), Cardioid(), SplitReLU(), ModReLU(4)],
                         ids=lambda m: type(m).__name__)
def test_complex_activations_keep_nan_as_nan(layer):
    # before issue 12, ZReLU and RealPartGate turned NaN into 0 (NaN compares false)
    z = torch.tensor([complex(math.nan, 1.0), complex(-1.0, math.nan), 1 + 1j, -2 - 1j])
    out = layer(z)
    assert torch.isnan(out[0]) and torch.isnan(out[1])
    assert not torch.isnan(out[2:]).any()


@settings(max_examples=20)
@given(st.integers(0, 2 ** 31 - 1), st.sampled_from(["chebyshev", "spectral", "magnetic"]))
def test_property_nan_never_leaves_its_connected_component(seed, layer_kind):
    # components from scipy.sparse.csgraph.connected_components (weak connectivity), an outside reference
    from scipy.sparse.csgraph import connected_components

    rng = np.random.default_rng(seed)
    n = 10
    src, dst = rng.integers(0, n, 9), rng.integers(0, n, 9)
    g = DirectedGraph(src, dst, rng.uniform(0.2, 1.0, 9), n)
    labels = connected_components(g.to_scipy(), directed=True, connection="weak")[1]
    node = int(rng.integers(0, n))
    torch.manual_seed(seed % 1000)
    if layer_kind == "chebyshev":
        layer, operand = ChebyshevFilter(2, 2, order=3, dtype=torch.float64), normalized_laplacian(g, dtype=torch.float64)
    elif layer_kind == "spectral":
        layer, operand = SpectralMultiplier(2, 2, knots=4, dtype=torch.float64), normalized_laplacian(g, dtype=torch.float64)
    else:
        layer, operand = MagneticFilter(2, 2, order=2, charge=0.2, dtype=torch.float64), g
    x = torch.as_tensor(rng.standard_normal((n, 2)))
    clean = layer(x, operand).detach()
    x[node, 1] = float("nan")
    dirty = layer(x, operand).detach()
    nan_rows = torch.isnan(dirty).any(dim=1).numpy()
    assert nan_rows[node]
    assert (labels[nan_rows] == labels[node]).all()
    outside = labels != labels[node]
    torch.testing.assert_close(dirty[outside], clean[outside], rtol=1e-12, atol=1e-12)

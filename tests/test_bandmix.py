"""BandMix: channels against dense references, the attention formula, gradients, caching, errors.

References: low-pass channels are powers of the renormalized adjacency (Kipf & Welling 2017)
and band-pass channels the moduli of diffusion wavelets (Min et al. 2020), both
computed here densely with numpy.linalg.matrix_power; the renormalized adjacency itself is
rebuilt from networkx's adjacency matrix of the symmetrized graph.
"""

import pickle

import networkx as nx
import numpy as np
import pytest
import torch

from phasorgraph import DirectedGraph, GraphInputError, operators
from phasorgraph.nn import BandMix



def _graph():
    return DirectedGraph.from_edges([[0, 1, 2, 3, 3, 4, 1, 5], [1, 2, 0, 4, 4, 3, 1, 0]],
                                    weight=[1.0, 0.5, 2.0, 0.3, 0.4, 0.9, 0.2, 0.7], num_nodes=7)


def _x(seed=0):
    return torch.randn(7, 3, dtype=torch.float64, generator=torch.Generator().manual_seed(seed))


def _dense_channels(graph, x, steps, J):
    # renormalized adjacency from networkx: As = (A + A^T) / 2, D~^-1/2 (As + I) D~^-1/2
    A = nx.to_numpy_array(graph.to_networkx(), nodelist=range(graph.num_nodes), weight="weight")
    As = (A + A.T) / 2
    d = As.sum(axis=1)
    At = (As + np.eye(len(d))) / np.sqrt(np.outer(d + 1, d + 1))
    s = np.where(d > 0, 1 / np.sqrt(np.where(d > 0, d, 1)), 0)
    T = (np.eye(len(d)) + As * np.outer(s, s)) / 2
    low = [np.linalg.matrix_power(At, k) @ x for k in steps]
    P = [np.eye(len(d))] + [np.linalg.matrix_power(T, 2 ** j) for j in range(J + 1)]
    band = [np.abs((P[i] - P[i + 1]) @ x) for i in range(J + 1)]
    return np.stack(low + band, axis=1)


def test_channels_match_dense_reference():
    g, x = _graph(), _x()
    layer = BandMix(3, 4, low_pass_steps=(0, 1, 3), scales=2, dtype=torch.float64)
    got = layer.channels(x, g)
    assert got.shape == (7, 3 + 3, 3) and layer.num_channels == 6
    np.testing.assert_allclose(got.numpy(), _dense_channels(g, x.numpy(), (0, 1, 3), 2), atol=1e-12)


def test_forward_is_attention_over_channel_maps():
    g, x = _graph(), _x(1)
    layer = BandMix(3, 4, low_pass_steps=2, scales=2, dtype=torch.float64)
    assert layer.low_pass_steps == (1, 2)
    z = torch.as_tensor(_dense_channels(g, x.numpy(), (1, 2), 2))
    h = torch.stack([z[:, c] @ layer.weight[c].T + layer.bias[c] for c in range(layer.num_channels)], dim=1)
    score = torch.nn.functional.leaky_relu(h @ layer.attention[0] + (h.mean(1) @ layer.attention[1])[:, None], 0.2)
    alpha = torch.softmax(score, dim=1)
    want = (alpha[..., None] * h).sum(1)
    torch.testing.assert_close(layer(x, g), want)
    torch.testing.assert_close(layer.last_attention.sum(1), torch.ones(7, dtype=torch.float64))


def test_gradcheck():
    g = _graph()
    layer = BandMix(3, 2, low_pass_steps=(1, 2), scales=1, dtype=torch.float64)
    x = _x(2).requires_grad_(True)
    names = [k for k, _ in layer.named_parameters()]
    params = [p.detach().clone().requires_grad_(True) for _, p in layer.named_parameters()]

    def fn(v, *ps):
        return torch.func.functional_call(layer, dict(zip(names, ps)), (v, g))

    assert torch.autograd.gradcheck(fn, (x, *params))


def test_permutation_equivariant():
    g, x = _graph(), _x(3)
    perm = torch.tensor([6, 3, 0, 5, 1, 4, 2])
    layer = BandMix(3, 4, (1, 2), 2, dtype=torch.float64)
    torch.testing.assert_close(layer(x[perm], g.permute(perm)), layer(x, g)[perm], atol=1e-12, rtol=0)


def test_operator_cache_per_graph_and_no_sparse_state():
    g, x = _graph(), _x()
    layer = BandMix(3, 4, (1,), 1, dtype=torch.float64)
    layer(x, g)
    first = g.operator(operators.renormalized_adjacency, dtype=torch.float64, device=x.device)
    layer(x, g)
    # same graph object: nothing rebuilt (the operators are kept with the graph)
    assert g.operator(operators.renormalized_adjacency, dtype=torch.float64, device=x.device) is first
    g2 = _graph()
    layer(x, g2)
    assert g2.operator(operators.renormalized_adjacency, dtype=torch.float64, device=x.device) is not first
    assert not hasattr(layer, "_operators")
    assert all(not t.is_sparse and t.layout == torch.strided for t in layer.state_dict().values())
    assert set(layer.state_dict()) == {"weight", "bias", "attention"}
    clone = pickle.loads(pickle.dumps(layer))
    torch.testing.assert_close(clone(x, g), layer(x, g))


def test_isolated_nodes_no_nan_and_repr():
    g = DirectedGraph.from_edges([[0], [1]], num_nodes=4)
    layer = BandMix(2, 3, (1, 2), 2, bias=False)
    assert torch.isfinite(layer(torch.ones(4, 2), g)).all()
    assert repr(layer) == "BandMix(2, 3, low_pass_steps=(1, 2), scales=2, bias=False)"


# ---------------------------------------------------------------------- bad input
@pytest.mark.parametrize("bad", [(), (1, -1), (1.5,), 0, "ab", 2 ** 40, (2 ** 40,)])
def test_refuses_bad_low_pass_steps(bad):
    with pytest.raises(GraphInputError, match=r"low_pass_steps must be"):
        BandMix(3, 4, bad, 2)


def test_refuses_bad_scales_and_channels():
    with pytest.raises(GraphInputError, match=r"scales must be an integer in \[1, 16\] .*; got 0"):
        BandMix(3, 4, (1,), 0)
    with pytest.raises(GraphInputError, match=r"out_channels must be an integer >= 1; got 0"):
        BandMix(3, 0, (1,), 2)


def test_refuses_bad_inputs():
    layer = BandMix(3, 4, (1,), 2, dtype=torch.float64)
    with pytest.raises(GraphInputError, match=r"x must have num_nodes = 7 rows; got shape \(5, 3\)"):
        layer(torch.zeros(5, 3, dtype=torch.float64), _graph())
    with pytest.raises(GraphInputError, match=r"x must have in_channels = 3 columns"):
        layer(torch.zeros(7, 2, dtype=torch.float64), _graph())
    with pytest.raises(GraphInputError, match=r"x must be real float32 or float64 for BandMix"):
        layer(torch.zeros(7, 3, dtype=torch.complex128), _graph())
    with pytest.raises(GraphInputError, match=r"graph must be a DirectedGraph .*for BandMix; got SparseOperator"):
        layer(torch.zeros(7, 3, dtype=torch.float64), operators.diffusion(_graph()))


# ---------------------------------------------------------------------- magnetic band-pass channels
def _dense_magnetic_bands(graph, x, J, q, phase):
    # T(q) = (I + D^-1/2 H D^-1/2) / 2, H = As * exp(i Theta) (DESIGN.md; Zhang et al. 2021),
    # written densely from networkx's adjacency matrix
    A = nx.to_numpy_array(graph.to_networkx(), nodelist=range(graph.num_nodes), weight="weight")
    As, anti = (A + A.T) / 2, A - A.T
    theta = 2 * np.pi * q * (np.sign(anti) if phase == "sign" else anti)
    d = As.sum(axis=1)
    s = np.where(d > 0, 1 / np.sqrt(np.where(d > 0, d, 1)), 0)
    T = (np.eye(len(d)) + As * np.exp(1j * theta) * np.outer(s, s)) / 2
    P = [np.eye(len(d))] + [np.linalg.matrix_power(T, 2 ** j) for j in range(J + 1)]
    return np.stack([np.abs((P[i] - P[i + 1]) @ x) for i in range(J + 1)], axis=1)


@pytest.mark.parametrize("q, phase", [(0.25, "difference"), (0.1, "sign")])
def test_magnetic_band_channels_match_dense_reference(q, phase):
    g, x = _graph(), _x(4)
    layer = BandMix(3, 4, low_pass_steps=(1,), scales=2, charge=q, phase=phase, dtype=torch.float64)
    got = layer.channels(x, g)
    assert got.dtype == torch.float64 and got.shape == (7, 1 + 3, 3)
    np.testing.assert_allclose(got[:, 1:].numpy(), _dense_magnetic_bands(g, x.numpy(), 2, q, phase), atol=1e-12)
    # the low-pass channels do not depend on the charge
    plain = BandMix(3, 4, low_pass_steps=(1,), scales=2, dtype=torch.float64)
    torch.testing.assert_close(got[:, :1], plain.channels(x, g)[:, :1])


def test_magnetic_band_channels_charge_zero_and_reversal():
    g, x = _graph(), _x(5)
    plain = BandMix(3, 4, (1, 2), 2, dtype=torch.float64).channels(x, g)
    # q = 0: H(0) = As, the symmetric channels again (DESIGN.md)
    torch.testing.assert_close(BandMix(3, 4, (1, 2), 2, charge=0.0, dtype=torch.float64).channels(x, g), plain)
    # reversing every edge conjugates T(q); with real x the moduli are unchanged (DESIGN.md)
    layer = BandMix(3, 4, (1, 2), 2, charge=0.3, dtype=torch.float64)
    torch.testing.assert_close(layer.channels(x, g.reverse()), layer.channels(x, g), atol=1e-12, rtol=0)
    # and they differ from the symmetric ones when edges are one-way
    assert not torch.allclose(layer.channels(x, g)[:, 2:], plain[:, 2:])
    assert repr(layer) == "BandMix(3, 4, low_pass_steps=(1, 2), scales=2, charge=0.3)"


def test_magnetic_gradcheck_and_float32():
    g = _graph()
    layer = BandMix(3, 2, low_pass_steps=(1,), scales=1, charge=0.2, phase="sign", dtype=torch.float64)
    x = _x(6).requires_grad_(True)
    names = [k for k, _ in layer.named_parameters()]
    params = [p.detach().clone().requires_grad_(True) for _, p in layer.named_parameters()]

    def fn(v, *ps):
        return torch.func.functional_call(layer, dict(zip(names, ps)), (v, g))

    assert torch.autograd.gradcheck(fn, (x, *params))
    out = BandMix(3, 2, (1,), 1, charge=0.2)(torch.randn(7, 3), g)
    assert out.dtype == torch.float32 and torch.isfinite(out).all()


@pytest.mark.parametrize("kwargs, match", [
    (dict(charge=0.7), r"charge must lie in \[0, 0.5\]; got 0.7"),
    (dict(charge="a"), r"charge must be a real number"),
    (dict(charge=0.1, phase="odd"), r"phase"),
])
def test_magnetic_bad_arguments(kwargs, match):
    with pytest.raises(GraphInputError, match=match):
        BandMix(3, 4, (1,), 2, **kwargs)


def test_charge_and_phase_travel_in_the_state_dict():
    # the charge and phase choose the band-pass diffusion T(q) (operators.diffusion), so a state
    # trained on one must not load into a layer built on another
    import io

    layer = BandMix(3, 4, (1,), 2, charge=0.25, phase="relative", dtype=torch.float64)
    buf = io.BytesIO()
    torch.save(layer.state_dict(), buf)
    buf.seek(0)
    state = torch.load(buf, weights_only=True)
    assert float(state["fixed_charge"]) == 0.25 and int(state["phase_code"]) == 2  # 2: "relative"
    BandMix(3, 4, (1,), 2, charge=0.25, phase="relative", dtype=torch.float64).load_state_dict(state)
    with pytest.raises(GraphInputError, match=r"state_dict was saved from a BandMix with phase='relative' but this "
                                              r"layer has phase='sign'; build the layer with phase='relative'"):
        BandMix(3, 4, (1,), 2, charge=0.25, phase="sign", dtype=torch.float64).load_state_dict(state)
    with pytest.raises(GraphInputError, match=r"state_dict was saved from a BandMix with charge 0.25 but this layer "
                                              r"has charge 0.1; build the layer with charge=0.25"):
        BandMix(3, 4, (1,), 2, charge=0.1, phase="relative", dtype=torch.float64).load_state_dict(state)
    with pytest.raises(GraphInputError, match=r"state_dict was saved from a BandMix with charge 0.25 but this layer "
                                              r"has charge None \(symmetric band-pass channels\)"):
        BandMix(3, 4, (1,), 2, dtype=torch.float64).load_state_dict(state)
    # older layout (weights only, built by hand): loads strictly with the layer's own charge and phase
    g, x = _graph(), _x()
    fresh = BandMix(3, 4, (1,), 2, charge=0.25, phase="relative", dtype=torch.float64)
    fresh.load_state_dict({k: state[k] for k in ("weight", "bias", "attention")})
    torch.testing.assert_close(fresh(x, g), layer(x, g))
    assert float(fresh.fixed_charge) == 0.25 and int(fresh.phase_code) == 2

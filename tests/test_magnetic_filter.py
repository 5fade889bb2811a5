"""MagneticFilter: generic spec checks, the q = 0 reduction, charge maps, banks, caching, bad input.

References: the dense normalized magnetic Laplacian I - D^-1/2 (As * exp(i 2 pi q (A - A^T)))
D^-1/2 written in NumPy (Zhang et al. 2021; src/phasorgraph/operators.py) with numpy.linalg.eigh and
numpy.polynomial.chebyshev.chebval on its eigenvalues (tests/layer_specs.py).
"""

import datetime
import os

import numpy as np
import pytest
import torch
from hypothesis import given
from hypothesis import strategies as st

from layer_specs import (
    GENERIC_CHECKS,
    features,
    np_chebyshev_filter,
    np_normalized_magnetic_laplacian,
    reference_graph,
    specs_for,
)
from strategies import charges, graphs_and_permutations
from phasorgraph import DirectedGraph, GraphInputError, normalized_laplacian
from phasorgraph.nn import ChebyshevFilter, LearnedCharge, MagneticFilter
from phasorgraph.nn import magnetic as magnetic_module



def weights_of(layer):
    """The state_dict without the saved fixed charge and phase, to move weights between layer kinds."""
    return {k: v for k, v in layer.state_dict().items() if k not in ("fixed_charge", "phase_code")}


@pytest.mark.parametrize("check", GENERIC_CHECKS, ids=lambda f: f.__name__)
@pytest.mark.parametrize("spec", specs_for("magnetic"), ids=str)
def test_generic(spec, check):
    check(spec)


# ---------------------------------------------------------------------- reductions and identities
@pytest.mark.parametrize("learn", [False, True])
def test_charge_zero_equals_chebyshev_on_the_normalized_laplacian_of_As(learn):
    # q = 0: the magnetic Laplacian is the normalized Laplacian of As (src/phasorgraph/operators.py), max_eigenvalue = 2
    g, _ = reference_graph()
    torch.manual_seed(0)
    mag = MagneticFilter(3, 4, order=3, charge=0.0, dtype=torch.float64)
    cheb = ChebyshevFilter(3, 4, order=3, max_eigenvalue=2.0, dtype=torch.float64)
    cheb.load_state_dict(weights_of(mag))
    x = features(7, 3, torch.float64, False)
    y = mag(x, g)
    torch.testing.assert_close(y.real, cheb(x, normalized_laplacian(g, dtype=torch.float64)))
    torch.testing.assert_close(y.imag, torch.zeros_like(y.imag))
    if learn:
        # a learned charge driven to (numerically) zero reaches the same operator
        lm = MagneticFilter(3, 4, order=3, charge=LearnedCharge(start=0.1), dtype=torch.float64)
        lm.load_state_dict({**weights_of(mag), "charge_logit": torch.tensor([-80.0], dtype=torch.float64)})
        torch.testing.assert_close(lm(x, g), y)


def test_learned_charge_forward_matches_the_fixed_charge_operator():
    g, _ = reference_graph()
    torch.manual_seed(0)
    fixed = MagneticFilter(2, 4, order=3, charge=0.17, dtype=torch.float64)
    learned = MagneticFilter(2, 4, order=3, charge=LearnedCharge(start=0.17), dtype=torch.float64)
    learned.load_state_dict({**weights_of(fixed), "charge_logit": learned.charge_logit.detach()})
    x = features(7, 2, torch.float64, True)
    torch.testing.assert_close(learned(x, g), fixed(x, g))


def test_bank_channel_groups_follow_the_documented_split():
    # charge list [q0, q1, q2] with C_out = 6: columns 2g, 2g + 1 belong to charge g
    g, _ = reference_graph()
    torch.manual_seed(0)
    bank = MagneticFilter(3, 6, order=2, charge=[0.0, 0.1, 0.4], dtype=torch.float64)
    x = features(7, 3, torch.float64, False)
    y = bank(x, g)
    for k, q in enumerate([0.0, 0.1, 0.4]):
        single = MagneticFilter(3, 2, order=2, charge=q, dtype=torch.float64)
        single.load_state_dict({"weight": bank.weight[:, :, 2 * k:2 * k + 2], "bias": bank.bias[2 * k:2 * k + 2],
                                "fixed_charge": torch.tensor([q], dtype=torch.float64)})
        torch.testing.assert_close(y[:, 2 * k:2 * k + 2], single(x, g))


def test_reversing_every_edge_conjugates_the_output_for_real_inputs_and_weights():
    # L(q) of the reversed graph is conj(L(q)) (src/phasorgraph/operators.py); real x, W, b then give conj(Y)
    g, _ = reference_graph()
    layer = MagneticFilter(3, 4, order=3, charge=0.3, dtype=torch.float64)
    x = features(7, 3, torch.float64, False)
    torch.testing.assert_close(layer(x, g.reverse()), layer(x, g).conj().resolve_conj())


def test_output_dtypes_and_real_input_as_complex():
    g, _ = reference_graph()
    layer = MagneticFilter(3, 2, order=2, charge=0.2)
    x = features(7, 3, torch.float32, False)
    y = layer(x, g)
    assert y.dtype == torch.complex64
    torch.testing.assert_close(y, layer(torch.complex(x, torch.zeros_like(x)), g))
    assert layer.double()(x.double(), g).dtype == torch.complex128


# ---------------------------------------------------------------------- the charge attribute and map
def test_charge_attribute_shapes_and_values():
    assert MagneticFilter(2, 2, 1, charge=0.3).charge.shape == ()
    assert float(MagneticFilter(2, 2, 1, charge=0.3).charge) == pytest.approx(0.3)
    bank = MagneticFilter(2, 4, 1, charge=[0.1, 0.2])
    torch.testing.assert_close(bank.charge, torch.tensor([0.1, 0.2]))
    learned = MagneticFilter(2, 4, 1, charge=LearnedCharge(start=[0.02, 0.45]), dtype=torch.float64)
    torch.testing.assert_close(learned.charge.detach(), torch.tensor([0.02, 0.45], dtype=torch.float64))
    assert learned.charge.requires_grad


def test_charge_map_stays_in_range_and_has_no_flat_spot_at_the_start():
    layer = MagneticFilter(1, 1, 0, charge=LearnedCharge(start=0.02), dtype=torch.float64)
    q = layer.charge
    q.backward()
    # closed form: q = sigmoid(u) / 2 gives dq/du = q (1 - 2 q), far from 0 at q = 0.02
    assert float(layer.charge_logit.grad) == pytest.approx(0.02 * (1 - 0.04), rel=1e-10)
    with torch.no_grad():
        layer.charge_logit.fill_(1e4)
    assert 0.0 <= float(layer.charge.detach()) <= 0.5
    with torch.no_grad():
        layer.charge_logit.fill_(-1e4)
    assert 0.0 <= float(layer.charge.detach()) <= 0.5


def test_loss_gradient_reaches_the_learned_charge():
    g, _ = reference_graph()
    layer = MagneticFilter(1, 2, order=2, charge=LearnedCharge(start=0.02), dtype=torch.float64)
    layer(torch.ones(7, 1, dtype=torch.float64), g).imag.pow(2).sum().backward()
    assert float(layer.charge_logit.grad.abs()) > 0


def test_reset_parameters_restores_the_start_charge():
    layer = MagneticFilter(2, 2, 1, charge=LearnedCharge(start=0.07))
    with torch.no_grad():
        layer.charge_logit.fill_(3.0)
    layer.reset_parameters()
    assert float(layer.charge.detach()) == pytest.approx(0.07, rel=1e-5)


# ---------------------------------------------------------------------- caching and wrapping
def test_fixed_charge_builds_its_operator_once_per_graph(monkeypatch):
    calls = []
    real = magnetic_module.magnetic_laplacian
    monkeypatch.setattr(magnetic_module, "magnetic_laplacian", lambda *a, **k: calls.append(1) or real(*a, **k))
    g, _ = reference_graph()
    layer = MagneticFilter(3, 4, order=2, charge=[0.1, 0.25])
    x = features(7, 3, torch.float32, False)
    layer(x, g), layer(x, g)
    assert len(calls) == 2                       # one per charge, then cached
    g2 = DirectedGraph.from_edges([[0, 1], [1, 2]])
    layer(features(3, 3, torch.float32, False), g2)
    assert len(calls) == 4
    assert all(b.layout == torch.strided for b in layer.buffers())   # operators are never buffers
    assert not hasattr(layer, "_operators")      # they are kept with the graph, not the layer


def test_ddp_can_wrap_the_layer(tmp_path):
    # DistributedDataParallel broadcasts parameters and buffers: none may be sparse
    import torch.distributed as dist
    from torch.nn.parallel import DistributedDataParallel

    if not dist.is_available():
        pytest.skip("torch.distributed is not built in this torch")
    # a bounded timeout: a stuck store or collective fails the test instead of hanging the suite
    dist.init_process_group("gloo", init_method=f"file://{os.path.join(tmp_path, 'store')}", rank=0, world_size=1,
                            timeout=datetime.timedelta(seconds=60))
    try:
        g, _ = reference_graph()
        layer = MagneticFilter(3, 4, order=2, charge=LearnedCharge(start=0.02))
        wrapped = DistributedDataParallel(layer)
        wrapped(features(7, 3, torch.float32, False), g).abs().sum().backward()
        assert layer.charge_logit.grad is not None
        fixed = DistributedDataParallel(MagneticFilter(3, 4, order=2, charge=0.25))
        fixed(features(7, 3, torch.float32, False), g).abs().sum().backward()
    finally:
        dist.destroy_process_group()


def test_graph_without_nodes_or_edges_is_nan_free():
    empty = DirectedGraph.from_edges([[], []], num_nodes=0)
    assert MagneticFilter(2, 2, 2, charge=0.25)(torch.zeros(0, 2), empty).shape == (0, 2)
    lonely = DirectedGraph.from_edges([[], []], num_nodes=3)
    for learn in (False, True):
        y = MagneticFilter(2, 2, 2, charge=LearnedCharge(start=0.1) if learn else 0.1)(torch.ones(3, 2), lonely)
        assert torch.isfinite(torch.view_as_real(y)).all()


# ---------------------------------------------------------------------- bad input
@pytest.mark.parametrize("charge", [-0.1, 0.6, [0.1, 0.7]])
def test_charge_outside_the_range(charge):
    with pytest.raises(GraphInputError, match=r"charge must lie in \[0, 0.5\]; got"):
        MagneticFilter(2, 2, 1, charge=charge)


def test_other_bad_charges():
    with pytest.raises(GraphInputError, match=r"a learned charge must start inside the open interval \(0, 0.5\).*got 0.0"):
        MagneticFilter(2, 2, 1, charge=LearnedCharge(start=0.0))
    with pytest.raises(GraphInputError, match=r"got an empty list"):
        MagneticFilter(2, 2, 1, charge=[])
    with pytest.raises(GraphInputError, match=r"charge must hold real numbers in \[0, 0.5\]; got 'a'"):
        MagneticFilter(2, 2, 1, charge=["a"])
    with pytest.raises(GraphInputError, match=r"out_channels must be a multiple of the number of charges \(2\).*got out_channels = 3"):
        MagneticFilter(2, 3, 1, charge=[0.1, 0.2])


def test_other_bad_arguments():
    g, _ = reference_graph()
    with pytest.raises(GraphInputError, match=r"order must be an integer >= 0; got -2"):
        MagneticFilter(2, 2, order=-2, charge=0.25)
    with pytest.raises(GraphInputError, match=r"phase must be one of \('difference', 'sign', 'relative'\); got 'angle'"):
        MagneticFilter(2, 2, 1, charge=0.25, phase="angle")
    layer = MagneticFilter(3, 2, 1, charge=0.25)
    with pytest.raises(GraphInputError, match=r"x must have num_nodes = 7 rows .*got shape \(8, 3\)"):
        layer(features(8, 3, torch.float32, False), g)
    with pytest.raises(GraphInputError, match=r"graph must be a DirectedGraph .*got SparseOperator, which lacks "
                                              r"operator, magnetic_product"):
        layer(features(7, 3, torch.float32, False), normalized_laplacian(g))
    with pytest.raises(GraphInputError, match=r"x has dtype torch.complex128 but the layer's parameters are torch.float32"):
        layer(features(7, 3, torch.float64, True), g)


# ---------------------------------------------------------------------- properties on generated graphs
@given(gp=graphs_and_permutations(min_nodes=1, max_nodes=8, unit_weights=True), q=charges(),
       learn=st.booleans())
def test_property_dense_reference_and_permutation_equivariance(gp, q, learn):
    # generated graphs with isolated nodes, self-loops, duplicates and reciprocal edges
    # reference: numpy.linalg.eigh + numpy.polynomial.chebyshev.chebval on the dense
    # I - D^-1/2 (As * exp(i 2 pi q (A - A^T))) D^-1/2 (layer_specs.np_chebyshev_filter)
    graph, perm = gp
    if learn:
        q = min(max(q, 1e-3), 0.5 - 1e-3)          # a learned charge starts strictly inside
    torch.manual_seed(0)
    layer = MagneticFilter(2, 2, order=2, charge=LearnedCharge(start=q) if learn else q, dtype=torch.float64)
    n = graph.num_nodes
    x = features(n, 2, torch.float64, True)
    y = layer(x, graph)
    A = graph.to_scipy().toarray()
    qq = float(layer.charge.detach())
    W = layer.weight.detach().numpy()
    expected = np_chebyshev_filter(np_normalized_magnetic_laplacian(A, qq), x.numpy(), W, 2.0)
    np.testing.assert_allclose(y.detach().numpy(), expected + layer.bias.detach().numpy(), atol=1e-9)
    torch.testing.assert_close(layer(x[perm], graph.permute(perm)), y[perm])


# ---------------------------------------------------------------------- saving, freezing, loading
def _saved(layer):
    import io

    buf = io.BytesIO()
    torch.save(layer.state_dict(), buf)
    buf.seek(0)
    return torch.load(buf, weights_only=True)     # plain tensors and numbers: the safe loader reads it


def test_fixed_and_banked_charges_travel_in_the_state_dict():
    bank = MagneticFilter(3, 4, order=1, charge=[0.1, 0.25])
    state = _saved(bank)
    assert state["fixed_charge"].tolist() == [0.1, 0.25] and state["fixed_charge"].dtype == torch.float64
    MagneticFilter(3, 4, order=1, charge=[0.1, 0.25]).load_state_dict(state)
    with pytest.raises(GraphInputError, match=r"state_dict was saved from a MagneticFilter with charge \[0.1, 0.25\] "
                                              r"but this layer has charge \[0.1, 0.3\]"):
        MagneticFilter(3, 4, order=1, charge=[0.1, 0.3]).load_state_dict(state)
    learned = MagneticFilter(3, 4, order=1, charge=LearnedCharge(start=0.1))
    with pytest.raises(GraphInputError, match=r"state_dict holds a learned charge \(charge_logit\) but this "
                                              r"MagneticFilter has a fixed charge; call freeze_charge\(\)"):
        MagneticFilter(3, 4, order=1, charge=0.1).load_state_dict(_saved(learned))
    with pytest.raises(GraphInputError, match=r"state_dict holds a fixed charge \[0.1, 0.25\] but this MagneticFilter "
                                              r"learns its charge"):
        MagneticFilter(3, 4, order=1, charge=LearnedCharge(start=[0.1, 0.2])).load_state_dict(state)
    # a float32 copy of the bank (module.float() casts buffers) still loads: compared to float32 precision
    MagneticFilter(3, 4, order=1, charge=[0.1, 0.25]).load_state_dict({k: v.float() for k, v in state.items()})


@pytest.mark.parametrize("charge", [0.25, LearnedCharge(start=0.1)], ids=["fixed", "learned"])
def test_the_phase_travels_in_the_state_dict(charge):
    # the phase chooses the operator (operators.magnetic_adjacency), so a state trained on one
    # phase must not load into a layer of another
    state = _saved(MagneticFilter(3, 4, order=1, charge=charge, phase="relative"))
    assert state["phase_code"].dtype == torch.int64 and int(state["phase_code"]) == 2   # 0 difference, 1 sign, 2 relative
    MagneticFilter(3, 4, order=1, charge=charge, phase="relative").load_state_dict(state)
    for phase in ("difference", "sign"):
        with pytest.raises(GraphInputError, match=rf"state_dict was saved from a MagneticFilter with phase='relative' "
                                                  rf"but this layer has phase='{phase}'; build the layer with "
                                                  rf"phase='relative'"):
            MagneticFilter(3, 4, order=1, charge=charge, phase=phase).load_state_dict(state)
    with pytest.raises(GraphInputError, match=r"state_dict holds phase_code tensor\(7\); a saved phase_code is one "
                                              r"number: 0 \(difference\), 1 \(sign\), 2 \(relative\)"):
        MagneticFilter(3, 4, order=1, charge=charge, phase="relative").load_state_dict(
            {**state, "phase_code": torch.tensor(7)})
    # a float copy of the whole state (state_dict values cast with .float()) still reads
    MagneticFilter(3, 4, order=1, charge=charge, phase="relative").load_state_dict(
        {k: v.float() for k, v in state.items()})


def test_a_state_dict_in_the_older_layout_loads_strictly_with_the_layers_own_charge_and_phase():
    # built by hand as saved before the fixed_charge and phase_code buffers existed: weights
    # and bias only (fixed charge) or weights, bias and charge_logit (learned charge)
    g, _ = reference_graph()
    x = features(7, 3, torch.float64, False)
    torch.manual_seed(0)
    old = MagneticFilter(3, 4, order=2, charge=[0.1, 0.25], phase="sign", dtype=torch.float64)
    weights = {"weight": old.weight.detach().clone(), "bias": old.bias.detach().clone()}
    layer = MagneticFilter(3, 4, order=2, charge=[0.1, 0.25], phase="sign", dtype=torch.float64)
    layer.load_state_dict(weights)                               # strict=True: nothing missing
    assert layer.fixed_charge.tolist() == [0.1, 0.25] and int(layer.phase_code) == 1
    torch.testing.assert_close(layer(x, g), old(x, g))
    learned_old = MagneticFilter(3, 4, order=2, charge=LearnedCharge(start=0.2), phase="relative",
                                 dtype=torch.float64)
    learned = MagneticFilter(3, 4, order=2, charge=LearnedCharge(start=0.05), phase="relative", dtype=torch.float64)
    learned.load_state_dict({"weight": learned_old.weight.detach(), "bias": learned_old.bias.detach(),
                             "charge_logit": learned_old.charge_logit.detach()})
    torch.testing.assert_close(learned(x, g), learned_old(x, g))
    # the older layout inside a bigger model (prefixed keys)
    model = torch.nn.Sequential(MagneticFilter(3, 4, order=2, charge=[0.1, 0.25], phase="sign", dtype=torch.float64))
    model.load_state_dict({"0." + k: v for k, v in weights.items()})
    torch.testing.assert_close(model[0](x, g), old(x, g))


def test_freeze_charge_keeps_the_output_and_loads_into_a_fixed_layer():
    g, _ = reference_graph()
    torch.manual_seed(0)
    layer = MagneticFilter(3, 4, order=2, charge=LearnedCharge(start=0.05), dtype=torch.float64)
    with torch.no_grad():
        layer.charge_logit.fill_(-1.0)                  # q = 0.5 sigmoid(-1), a trained value
    x = features(7, 3, torch.float64, False)
    before = layer(x, g)
    assert layer.freeze_charge() is layer and not layer.learns_charge
    assert "charge_logit" not in dict(layer.named_parameters())
    # source: the closed form q = 0.5 / (1 + e) of the logistic function at u = -1
    assert layer.initial_charge == pytest.approx((0.5 / (1 + np.e),), rel=1e-15)
    torch.testing.assert_close(layer(x, g), before)
    fixed = MagneticFilter(3, 4, order=2, charge=layer.initial_charge, dtype=torch.float64)
    fixed.load_state_dict(_saved(layer))
    torch.testing.assert_close(fixed(x, g), before)


def test_repr_shows_the_current_learned_charge():
    layer = MagneticFilter(2, 2, order=1, charge=LearnedCharge(start=0.05))
    assert "charge=LearnedCharge(start=0.05), charge_now=0.05" in repr(layer)
    with torch.no_grad():
        layer.charge_logit.fill_(0.0)                   # q = 0.5 sigmoid(0) = 0.25
    assert "charge_now=0.25" in repr(layer)


def test_charge_is_keyword_only_and_required():
    with pytest.raises(TypeError):
        MagneticFilter(2, 2, 1, 0.25)
    with pytest.raises(TypeError, match="charge"):
        MagneticFilter(2, 2, 1)
    with pytest.raises(GraphInputError, match=r"a learned charge must start inside the open interval"):
        LearnedCharge(start=0.5)
    assert LearnedCharge(start=[0.1, 0.2]) == LearnedCharge(start=[0.1, 0.2])


def test_layers_keep_no_graph_alive():
    # a long-running process that sees many graphs must not grow: layers hold no graph
    import gc
    import weakref

    from phasorgraph.nn import BandMix, RenormalizedFilter

    layers = [MagneticFilter(3, 2, order=1, charge=0.2), MagneticFilter(3, 2, order=1, charge=LearnedCharge(start=0.1)),
              RenormalizedFilter(3, 2), BandMix(3, 2, (1,), 1)]
    for layer in layers:
        g = DirectedGraph.from_edges([[0, 1, 2], [1, 2, 0]])
        layer(torch.ones(3, 3), g)
        dead = weakref.ref(g)
        del g
        gc.collect()
        assert dead() is None, type(layer).__name__

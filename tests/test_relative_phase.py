"""phase="relative" in every magnetic builder, and the PhaseWrapWarning of the default phase.

References: the magnetic Laplacian as defined in src/phasorgraph/operators.py (Shubin, Comm. Math. Phys. 1994;
Zhang et al., NeurIPS 2021) with the phase Theta = 2 pi q (A - A^T) / (A + A^T), written
densely in numpy below; ``numpy.linalg.eigvalsh`` for the spectra; closed forms for one-way
unit edges.
"""

import warnings

import numpy as np
import pytest
import torch
from hypothesis import given
from hypothesis import strategies as st

import dense
from phasorgraph import DirectedGraph, GraphInputError, diffusion, magnetic_adjacency, magnetic_laplacian, magnetic_matmul
from phasorgraph.errors import PhaseWrapWarning
from phasorgraph.nn import MagneticFilter
from strategies import charges, directed_graphs

C128 = torch.complex128
TOL = dict(rtol=1e-10, atol=1e-10)


def _dense_relative(g: DirectedGraph, q: float):
    """(H, L_norm, L, T) with the relative phase, from the dense adjacency (numpy; tests/dense.py)."""
    ref = dense.DenseGraph(g)
    return (ref.H(q, "relative"), ref.mag_norm(q, "relative"), ref.mag(q, "relative"), ref.T(q, "relative"))


def _ops(g, q):
    return (magnetic_adjacency(g, q, phase="relative", dtype=C128).to_dense().numpy(),
            magnetic_laplacian(g, q, phase="relative", dtype=C128).to_dense().numpy(),
            magnetic_laplacian(g, q, normalized=False, phase="relative", dtype=C128).to_dense().numpy(),
            diffusion(g, q, phase="relative", dtype=C128).to_dense().numpy())


@given(directed_graphs(), charges())
def test_every_builder_matches_the_dense_formula(g, q):
    for got, want in zip(_ops(g, q), _dense_relative(g, q)):
        np.testing.assert_allclose(got, want, **TOL)


@given(directed_graphs(min_nodes=1), charges(), st.floats(1e-3, 1e6))
def test_invariant_to_scaling_every_weight(g, q, scale):
    scaled = DirectedGraph(g.source, g.target, g.weight * scale, g.num_nodes)
    for name, (a, b) in zip(("H", "L_norm", "L", "T"), zip(_ops(g, q), _ops(scaled, q))):
        if name in ("H", "L"):  # unnormalized: the magnitudes scale, the phases do not
            np.testing.assert_allclose(b, a * scale, rtol=1e-9, atol=1e-9 * scale)
        else:
            np.testing.assert_allclose(b, a, **TOL)


@given(directed_graphs(), charges())
def test_reversing_every_edge_conjugates(g, q):
    for a, b in zip(_ops(g.reverse(), q), _ops(g, q)):
        np.testing.assert_allclose(a, b.conj(), **TOL)


@given(directed_graphs(min_nodes=1), charges())
def test_hermitian_psd_and_normalized_spectrum_in_0_2(g, q):
    _, L_norm, L, T = _ops(g, q)
    for M in (L_norm, L, T):
        np.testing.assert_allclose(M, M.conj().T, **TOL)
    ev = np.linalg.eigvalsh(L_norm)  # numpy.linalg
    assert ev.min() >= -1e-9 and ev.max() <= 2 + 1e-9
    assert np.linalg.eigvalsh(L).min() >= -1e-9
    ev_t = np.linalg.eigvalsh(T)
    assert ev_t.min() >= -1e-9 and ev_t.max() <= 1 + 1e-9


@given(directed_graphs(), charges())
def test_equals_the_default_for_unit_weights(g, q):
    unit = DirectedGraph(g.source, g.target, None, g.num_nodes)  # every summed weight 1
    for phase_default, relative in zip(
            (magnetic_adjacency(unit, q, dtype=C128), magnetic_laplacian(unit, q, dtype=C128),
             magnetic_laplacian(unit, q, normalized=False, dtype=C128), diffusion(unit, q, dtype=C128)),
            _ops(unit, q)):
        np.testing.assert_allclose(phase_default.to_dense().numpy(), relative, **TOL)


def test_closed_forms():
    # one-way edge of any weight w: fraction 1, H[u, v] = w/2 e^{i 2 pi q} (closed form)
    for w in (1.0, 7.5, 1e6):
        g = DirectedGraph.from_edges([[0], [1]], weight=[w])
        H = magnetic_adjacency(g, 0.25, phase="relative", dtype=C128).to_dense().numpy()
        np.testing.assert_allclose(H, [[0, 0.5j * w], [-0.5j * w, 0]], rtol=1e-12, atol=1e-12)
    # u -> v of 3, v -> u of 1: fraction (3 - 1) / (3 + 1) = 1/2, angle pi q
    g = DirectedGraph.from_edges([[0, 1], [1, 0]], weight=[3.0, 1.0])
    H = magnetic_adjacency(g, 0.5, phase="relative", dtype=C128).to_dense().numpy()
    np.testing.assert_allclose(H[0, 1], 2.0 * np.exp(1j * np.pi * 0.5), rtol=1e-12)


@given(directed_graphs(min_nodes=1), st.floats(0.0, 0.5))
def test_learned_charge_product_matches_the_fixed_operator(g, q):
    x = torch.randn(g.num_nodes, 2, dtype=torch.float64, generator=torch.Generator().manual_seed(0))
    y = magnetic_matmul(g, torch.tensor(q, dtype=torch.float64), x, phase="relative")
    want = torch.as_tensor(_dense_relative(g, q)[1]) @ x.to(C128)
    torch.testing.assert_close(y, want, rtol=1e-10, atol=1e-10)


def test_gradcheck_of_the_charge_with_the_relative_phase():
    g = DirectedGraph.from_edges([[0, 1, 1, 2], [1, 0, 2, 0]], weight=[5.0, 1.0, 200.0, 0.5])
    x = torch.randn(3, 2, dtype=torch.float64, generator=torch.Generator().manual_seed(1))
    q = torch.tensor(0.13, dtype=torch.float64, requires_grad=True)
    assert torch.autograd.gradcheck(lambda c: torch.view_as_real(magnetic_matmul(g, c, x, phase="relative")), (q,))


def test_magnetic_filter_accepts_the_relative_phase():
    g = DirectedGraph.from_edges([[0, 1, 2], [1, 2, 0]], weight=[1.0, 1e5, 3.0])
    layer = MagneticFilter(2, 4, order=2, charge=0.25, phase="relative").double()
    x = torch.randn(3, 2, dtype=torch.float64)
    scaled = DirectedGraph(g.source, g.target, g.weight * 1000, g.num_nodes)
    torch.testing.assert_close(layer(x, g), layer(x, scaled))  # scale-free
    assert "relative" in repr(layer)
    with pytest.raises(GraphInputError, match=r"phase must be one of \('difference', 'sign', 'relative'\); got 'ratio'"):
        magnetic_laplacian(g, 0.25, phase="ratio")


def test_wrap_warning_rule_and_advice():
    # rule: q * max |A - A^T| > 1/2 (the phase passes pi); q = 0.25 -> net flows above 2
    heavy = DirectedGraph.from_edges([[0, 1], [1, 2]], weight=[1.0, 2.5])
    with pytest.warns(PhaseWrapWarning, match=r"above 1 / \(2 q\) = 2.*Use phase='relative'"):
        magnetic_laplacian(heavy, 0.25)
    assert issubclass(PhaseWrapWarning, UserWarning)
    with warnings.catch_warnings():
        warnings.simplefilter("error", PhaseWrapWarning)
        # at the edge of the rule, with the other phases, or after the first warning: silent
        DirectedGraph.from_edges([[0], [1]], weight=[2.0])  # build only
        magnetic_laplacian(DirectedGraph.from_edges([[0], [1]], weight=[2.0]), 0.25)  # exactly 1/(2q)
        magnetic_laplacian(DirectedGraph.from_edges([[0], [1]]), 0.5)  # unit weights, largest q
        fresh = DirectedGraph.from_edges([[0, 1], [1, 2]], weight=[1.0, 2.5])
        magnetic_laplacian(fresh, 0.25, phase="relative")
        magnetic_laplacian(fresh, 0.25, phase="sign")
        magnetic_laplacian(fresh, 0.1)  # 0.1 * 2.5 = 0.25 <= 1/2
        magnetic_laplacian(heavy, 0.25)  # warned once already for this graph
    for build in (lambda g: magnetic_adjacency(g, 0.3), lambda g: diffusion(g, 0.3),
                  lambda g: magnetic_matmul(g, torch.tensor(0.3), torch.ones(3, 1))):
        with pytest.warns(PhaseWrapWarning):
            build(DirectedGraph.from_edges([[0, 1], [1, 2]], weight=[1.0, 2.5]))

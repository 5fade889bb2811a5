"""filter_response / plot_filter_response: the learned polynomial against a dense eigendecomposition."""

from __future__ import annotations

import numpy as np
import pytest
import torch

import phasorgraph as pg
from phasorgraph import GraphInputError
from phasorgraph.data import directed_block_model
from phasorgraph.nn import ChebyshevFilter, LearnedCharge, MagneticFilter
from phasorgraph.responses import filter_response, plot_filter_response


def _graph():
    g, _ = directed_block_model([6, 6], 0.4, [[0.5, 0.8], [0.2, 0.5]], seed=0)
    return g


def _spectral_output(L: np.ndarray, x: np.ndarray, response_at) -> np.ndarray:
    """sum_i v_i v_i^H x G(lambda_i) from numpy.linalg.eigh (the spectral theorem)."""
    lam, V = np.linalg.eigh(L)
    G = response_at(lam)  # (n, C_in, C_out)
    coeff = V.conj().T @ x  # (n, C_in): <v_i, x>
    return np.einsum("ni,ic,ico->no", V, coeff, G)


def test_chebyshev_response_reproduces_the_layer_through_eigh():
    torch.manual_seed(0)
    g = _graph()
    op = pg.normalized_laplacian(g, dtype=torch.float64)
    layer = ChebyshevFilter(3, 2, order=4, max_eigenvalue=2.0, dtype=torch.float64)
    x = torch.randn(g.num_nodes, 3, dtype=torch.float64)
    y = (layer(x, op) - layer.bias).detach().numpy()
    L = op.to_dense().numpy()

    def at(lam):
        return filter_response(layer, torch.from_numpy(lam)).gains[0].numpy()

    np.testing.assert_allclose(_spectral_output(L, x.numpy(), at), y, atol=1e-10)


@pytest.mark.parametrize("complex_weights", [False, True])
def test_magnetic_response_per_charge_group_reproduces_the_layer_through_eigh(complex_weights):
    torch.manual_seed(1)
    g = _graph()
    layer = MagneticFilter(2, 4, order=3, charge=[0.0, 0.2], complex_weights=complex_weights, dtype=torch.float64)
    x = torch.randn(g.num_nodes, 2, dtype=torch.float64)
    bias = torch.view_as_complex(layer.bias) if complex_weights else layer.bias
    y = (layer(x, g) - bias).detach().numpy()
    for group, q in enumerate((0.0, 0.2)):
        L = pg.magnetic_laplacian(g, q, dtype=torch.complex128).to_dense().numpy()

        def at(lam, group=group):
            return filter_response(layer, torch.from_numpy(lam)).gains[group].numpy()

        np.testing.assert_allclose(_spectral_output(L, x.numpy(), at), y[:, 2 * group:2 * group + 2], atol=1e-10)


def test_response_grid_norm_and_charges():
    layer = MagneticFilter(3, 6, order=2, charge=LearnedCharge(start=0.05))
    r = filter_response(layer, points=9)
    assert r.eigenvalues.tolist() == pytest.approx(np.linspace(0, 2, 9).tolist())
    assert r.gains.shape == (1, 9, 3, 6) and r.norm.shape == (1, 9)
    assert r.charges.tolist() == pytest.approx([0.05])
    # the Frobenius norm over channel pairs (its definition)
    np.testing.assert_allclose(r.norm[0].numpy(), np.sqrt((r.gains[0].numpy() ** 2).sum((1, 2))), rtol=1e-12)
    # T_k(1) = 1 for every k (closed form): at lambda = 2 the gain is sum_k W_k
    np.testing.assert_allclose(r.gains[0, -1].numpy(), layer.weight.detach().double().sum(0).numpy(), rtol=1e-6)


def test_plot_writes_a_png(tmp_path):
    path = plot_filter_response(MagneticFilter(2, 4, order=2, charge=[0.0, 0.25]), tmp_path / "r.png", points=32)
    assert open(path, "rb").read(8) == b"\x89PNG\r\n\x1a\n"


def test_bad_input_names_the_argument():
    with pytest.raises(GraphInputError, match="layer must be a ChebyshevFilter or a MagneticFilter; got Linear"):
        filter_response(torch.nn.Linear(2, 2))
    with pytest.raises(GraphInputError, match="max_eigenvalue must be given for a ChebyshevFilter"):
        filter_response(ChebyshevFilter(2, 2, 2))
    with pytest.raises(GraphInputError, match="points must be an integer >= 2"):
        filter_response(ChebyshevFilter(2, 2, 2), 1, max_eigenvalue=2.0)


def test_chebyshev_response_on_an_indefinite_operator_uses_its_interval():
    # the renormalized adjacency has spectrum in [-1, 1] (Kipf & Welling 2017); the layer maps
    # [a, b] = [op.spectrum[0], max_eigenvalue] onto [-1, 1], and so must the response
    torch.manual_seed(2)
    g = _graph()
    op = pg.renormalized_adjacency(g, dtype=torch.float64)
    layer = ChebyshevFilter(2, 3, order=3, max_eigenvalue=1.0, dtype=torch.float64)
    x = torch.randn(g.num_nodes, 2, dtype=torch.float64)
    y = (layer(x, op) - layer.bias).detach().numpy()

    def at(lam):
        return filter_response(layer, torch.from_numpy(lam), min_eigenvalue=op.spectrum[0]).gains[0].numpy()

    # reference: the spectral theorem through numpy.linalg.eigh
    np.testing.assert_allclose(_spectral_output(op.to_dense().numpy(), x.numpy(), at), y, atol=1e-10)
    assert filter_response(layer, points=3, min_eigenvalue=-1.0).eigenvalues.tolist() == [-1.0, 0.0, 1.0]
    with pytest.raises(GraphInputError, match="min_eigenvalue must be a number below max_eigenvalue 1"):
        filter_response(layer, min_eigenvalue=1.5)

"""Spectral tools against numpy.linalg and closed forms.

References: ``numpy.linalg.eigvalsh`` / ``eigh`` / ``eigvals``; the diffusion-wavelet frame
bounds of the DiffusionWavelets docstring, src/phasorgraph/nn/wavelets.py (Coifman & Maggioni 2006; Gama et al. 2019): the bank
Psi_0 = I - T, Psi_j = T^(2^(j-1)) - T^(2^j), Phi_J = T^(2^J) has bounds in [1 / (J + 2), 1];
the Dirichlet energy as a sum over edges (a dense formula written here).
"""

import numpy as np
import pytest
import scipy.sparse.linalg as spla
import torch
from hypothesis import given

from phasorgraph import (
    DirectedGraph,
    GraphInputError,
    SparseOperator,
    combinatorial_laplacian,
    diffusion,
    magnetic_adjacency,
    magnetic_laplacian,
    normalized_laplacian,
    pagerank_laplacian,
    random_walk,
    random_walk_laplacian,
    renormalized_adjacency,
)
from phasorgraph.sparse import csr_matrix
from phasorgraph.spectral import dirichlet_energy, fourier_basis, frame_bounds, largest_eigenvalue
from strategies import charges, directed_graphs


F64, C128 = torch.float64, torch.complex128


def _random_graph(n, m, seed):
    rng = np.random.default_rng(seed)
    return DirectedGraph.from_edges(rng.integers(0, n, size=(2, m)), weight=rng.uniform(0.1, 1.0, m), num_nodes=n)


def _hermitian_ops(g, q):
    return [normalized_laplacian(g, dtype=F64), combinatorial_laplacian(g, dtype=F64),
            renormalized_adjacency(g, dtype=F64), magnetic_laplacian(g, q, dtype=C128),
            magnetic_laplacian(g, q, normalized=False, dtype=C128), magnetic_adjacency(g, q, dtype=C128),
            diffusion(g, q, dtype=C128)]


# ---------------------------------------------------------------------- largest eigenvalue
@given(directed_graphs(min_nodes=1), charges())
def test_largest_eigenvalue_dense_path_matches_numpy(g, q):
    # source: numpy.linalg.eigvalsh (n <= 64 uses the dense path)
    for op in _hermitian_ops(g, q):
        expected = np.linalg.eigvalsh(op.to_dense().numpy())[-1]
        assert abs(largest_eigenvalue(op) - expected) < 1e-10
        assert op.max_eigenvalue == largest_eigenvalue(op)  # cached


@pytest.mark.parametrize("seed", [0, 1])
def test_largest_eigenvalue_lanczos_path_matches_numpy(seed):
    # source: numpy.linalg.eigvalsh; n = 150 > 64 goes through scipy's eigsh (Lanczos)
    g = _random_graph(150, 400, seed)
    ops = _hermitian_ops(g, 0.15) + [pagerank_laplacian(g, dtype=F64)]  # pagerank: low-rank part
    for op in ops:
        expected = np.linalg.eigvalsh(op.to_dense().numpy())[-1]
        assert abs(largest_eigenvalue(op) - expected) < 1e-6, op.kind


def test_largest_eigenvalue_even_cycle_regression():
    # closed form: the even cycle's normalized Laplacian has top eigenvalue 2 with an
    # alternating eigenvector, orthogonal to a constant start vector (which used to give 1.9988)
    n = 100
    g = DirectedGraph.from_edges(np.arange(n), (np.arange(n) + 1) % n)
    assert abs(largest_eigenvalue(normalized_laplacian(g, dtype=F64)) - 2.0) < 1e-8
    assert abs(largest_eigenvalue(magnetic_laplacian(g, 0.0, dtype=C128)) - 2.0) < 1e-8
    # directed cycle, q = 0.1: max over k of 1 - cos(2 pi (k / n + q)) (closed form)
    expected = np.max(1 - np.cos(2 * np.pi * (np.arange(n) / n + 0.1)))
    assert abs(largest_eigenvalue(magnetic_laplacian(g, 0.1, dtype=C128)) - expected) < 1e-8


def test_largest_eigenvalue_cache_and_refresh():
    op = normalized_laplacian(_random_graph(10, 20, 0), dtype=F64)
    first = largest_eigenvalue(op)
    op.max_eigenvalue = 123.0
    assert largest_eigenvalue(op) == 123.0
    assert abs(largest_eigenvalue(op, refresh=True) - first) < 1e-12


@pytest.mark.parametrize("n", [20, 100])
def test_largest_eigenvalue_of_walks_uses_the_similar_base(n):
    # numpy.linalg.eigvals of the non-symmetric matrix: P and I - D^-1 As share T's spectrum
    g = _random_graph(n, 3 * n, 2)
    for op in (random_walk(g, dtype=F64), random_walk(g, lazy=False, dtype=F64), random_walk_laplacian(g, dtype=F64)):
        expected = np.linalg.eigvals(op.to_dense().numpy()).real.max()
        assert abs(largest_eigenvalue(op) - expected) < 1e-6, op.kind


def test_power_iteration_fallback_for_non_hermitian():
    # numpy.linalg.eigvals: a non-symmetric matrix with dominant eigenvalue 3 and no `similar`
    M = torch.tensor([[3.0, 1.0, 0.0], [0.0, 1.0, 2.0], [0.0, 0.0, 0.5]], dtype=F64)
    op = SparseOperator(M.to_sparse_csr(), hermitian=False, kind="upper")
    assert abs(largest_eigenvalue(op) - np.abs(np.linalg.eigvals(M.numpy())).max()) < 1e-8
    # the adjoint of a lazy walk has no similar base: power iteration finds its top eigenvalue 1
    adj = random_walk(_random_graph(12, 40, 3), dtype=F64).transpose_conj()
    assert adj.similar is None and abs(largest_eigenvalue(adj) - 1.0) < 1e-6


def test_lanczos_failure_falls_back_to_shifted_power_iteration(monkeypatch):
    # a Hermitian operator whose most negative eigenvalue has the largest modulus: the fallback
    # shifts by the known lower end of the spectrum so it still returns the largest eigenvalue
    n = 70
    diag = torch.linspace(-3.0, 1.0, n, dtype=F64)
    op = SparseOperator(torch.diag(diag).to_sparse_csr(), hermitian=True, spectrum=(-3.0, 1.0), kind="diag")

    def no_convergence(*args, **kwargs):
        raise spla.ArpackNoConvergence("forced for the test", np.zeros(0), np.zeros((n, 0)))

    monkeypatch.setattr(spla, "eigsh", no_convergence)
    assert abs(largest_eigenvalue(op) - 1.0) < 1e-3


def test_largest_eigenvalue_empty_and_edgeless():
    empty = DirectedGraph.from_edges(np.zeros((2, 0), dtype=np.int64))
    assert largest_eigenvalue(normalized_laplacian(empty)) == 0.0
    edgeless = DirectedGraph.from_edges(np.zeros((2, 0), dtype=np.int64), num_nodes=80)
    assert abs(largest_eigenvalue(normalized_laplacian(edgeless, dtype=F64)) - 1.0) < 1e-10
    assert abs(largest_eigenvalue(combinatorial_laplacian(edgeless, dtype=F64))) < 1e-10


# ---------------------------------------------------------------------- Fourier basis
@given(directed_graphs(), charges())
def test_fourier_basis_matches_numpy_eigh(g, q):
    # source: numpy.linalg.eigh; op = U diag(lam) U^H with U unitary
    for op in (normalized_laplacian(g, dtype=F64), magnetic_laplacian(g, q, dtype=C128)):
        lam, U = fourier_basis(op)
        M = op.to_dense().numpy()
        np.testing.assert_allclose(lam.numpy(), np.linalg.eigvalsh(M), atol=1e-10)
        Un = U.numpy()
        np.testing.assert_allclose(Un.conj().T @ Un, np.eye(g.num_nodes), atol=1e-10)
        np.testing.assert_allclose((Un * lam.numpy()) @ Un.conj().T, M, atol=1e-10)
        assert not np.isnan(Un).any()


def test_fourier_basis_refuses_large_graphs_with_a_clear_message():
    op = normalized_laplacian(_random_graph(30, 60, 0))
    with pytest.raises(GraphInputError, match=r"op has 30 nodes .* accepts at most max_nodes = 20; use largest_eigenvalue"):
        fourier_basis(op, max_nodes=20)
    with pytest.raises(GraphInputError, match="op must be Hermitian for fourier_basis; got kind 'lazy_random_walk'"):
        fourier_basis(random_walk(_random_graph(5, 6, 0)))


# ---------------------------------------------------------------------- frame bounds
def _wavelet_bank(T: np.ndarray, J: int):
    """Dense diffusion wavelets (DiffusionWavelets docstring, src/phasorgraph/nn/wavelets.py): Psi_0 = I - T, Psi_j = T^(2^(j-1)) - T^(2^j), Phi_J."""
    n = T.shape[0]
    powers = {0: np.eye(n, dtype=T.dtype), 1: T}
    for j in range(1, J + 1):
        powers[2 ** j] = powers[2 ** (j - 1)] @ powers[2 ** (j - 1)]
    bank = [np.eye(n) - T] + [powers[2 ** (j - 1)] - powers[2 ** j] for j in range(1, J + 1)]
    return bank + [powers[2 ** J]]


@given(directed_graphs(min_nodes=1), charges())
def test_frame_bounds_of_diffusion_wavelets(g, q):
    # the bound of the DiffusionWavelets docstring: sum_j ||Psi_j x||^2 + ||Phi_J x||^2 in [||x||^2 / (J + 2), ||x||^2];
    # the bounds are the extreme eigenvalues of sum_j F_j^H F_j (numpy.linalg.eigvalsh)
    J = 3
    for T in (diffusion(g, dtype=F64).to_dense().numpy(), diffusion(g, q, dtype=C128).to_dense().numpy()):
        bank = _wavelet_bank(T, J)
        A, B = frame_bounds(bank)
        gram = sum(F.conj().T @ F for F in bank)
        lam = np.linalg.eigvalsh(gram)
        assert abs(A - lam[0]) < 1e-10 and abs(B - lam[-1]) < 1e-10
        assert A >= 1 / (J + 2) - 1e-10 and B <= 1 + 1e-10
    # callable form: the bank applied to the identity, stacked along dim 1
    As, Bs = frame_bounds(lambda eye: torch.stack([torch.as_tensor(F) @ eye for F in bank], dim=1),
                          diffusion(g, q, dtype=C128))
    assert abs(As - A) < 1e-10 and abs(Bs - B) < 1e-10


def test_frame_bounds_of_random_walk_wavelets_in_the_degree_norm():
    # DiffusionWavelets docstring: for P the bounds hold in the norm ||D^-1/2 x||; with F_j = D^-1/2 Psi_j(P) and
    # weight d^-1/2 they equal the bounds of the symmetric bank (Psi_j(P) = D^1/2 Psi_j(T) D^-1/2)
    g = _random_graph(12, 40, 5).symmetrized()
    d = np.asarray(g.to_scipy().sum(axis=1)).ravel()
    assert (d > 0).all()
    J = 2
    P = random_walk(g, dtype=F64).to_dense().numpy()
    T = diffusion(g, dtype=F64).to_dense().numpy()
    bank_P = [F / np.sqrt(d)[:, None] for F in _wavelet_bank(P, J)]
    A, B = frame_bounds(bank_P, weight=torch.as_tensor(1 / np.sqrt(d)))
    A_T, B_T = frame_bounds(_wavelet_bank(T, J))
    assert abs(A - A_T) < 1e-9 and abs(B - B_T) < 1e-9
    assert A >= 1 / (J + 2) - 1e-10 and B <= 1 + 1e-10


def test_frame_bounds_identity_and_sparse_operators():
    g = _random_graph(6, 10, 0)
    assert frame_bounds([np.eye(6)]) == pytest.approx((1.0, 1.0))
    T = diffusion(g, dtype=F64)
    A, B = frame_bounds([T])  # SparseOperator entries are made dense: bounds = eig(T^2)
    lam = np.linalg.eigvalsh(T.to_dense().numpy())
    assert A == pytest.approx(lam.min() ** 2, abs=1e-12) and B == pytest.approx(lam.max() ** 2, abs=1e-12)


# ---------------------------------------------------------------------- Dirichlet energy
def _energy_reference(g, x, q=None):
    """1/2 sum_{u,v} As[u,v] |y_u - e^{i Theta_uv} y_v|^2 + sum_{isolated} |x_u|^2, y = D^-1/2 x."""
    n = g.num_nodes
    A = np.zeros((n, n))
    np.add.at(A, (g.source.numpy(), g.target.numpy()), g.weight.numpy())
    As = (A + A.T) / 2
    d = As.sum(1)
    phase = np.ones((n, n)) if q is None else np.exp(1j * 2 * np.pi * q * (A - A.T))
    xs = x.numpy()
    xs = xs[:, None] if xs.ndim == 1 else xs
    y = np.where(d[:, None] > 0, xs / np.sqrt(np.where(d > 0, d, 1))[:, None], 0)
    total = 0.0
    for u in range(n):
        for v in range(n):
            if As[u, v]:
                total += 0.5 * As[u, v] * np.sum(np.abs(y[u] - phase[u, v] * y[v]) ** 2)
    return total + np.sum(np.abs(xs[d == 0]) ** 2)


@given(directed_graphs(), charges())
def test_dirichlet_energy_matches_edge_sum(g, q):
    gen = torch.Generator().manual_seed(g.num_edges)
    x = torch.randn(g.num_nodes, 2, dtype=F64, generator=gen)
    xc = torch.randn(g.num_nodes, 2, dtype=C128, generator=gen)
    e = dirichlet_energy(x, normalized_laplacian(g, dtype=F64))
    assert e.dtype == F64 and e.dim() == 0
    assert abs(float(e) - _energy_reference(g, x)) < 1e-9
    assert abs(float(dirichlet_energy(xc, magnetic_laplacian(g, q, dtype=C128))) - _energy_reference(g, xc, q)) < 1e-9
    assert abs(float(dirichlet_energy(x[:, 0], normalized_laplacian(g, dtype=F64))) - _energy_reference(g, x[:, 0])) < 1e-9


def test_dirichlet_energy_gradcheck_and_constant_vector():
    g = _random_graph(8, 20, 1).symmetrized()
    op = normalized_laplacian(g, dtype=F64)
    x = torch.randn(8, 2, dtype=F64, requires_grad=True)
    assert torch.autograd.gradcheck(lambda t: dirichlet_energy(t, op), (x,))
    d = torch.as_tensor(np.asarray(g.to_scipy().sum(axis=1)).ravel())
    # D^1/2 1 is in the kernel of the normalized Laplacian (components of positive degree)
    e = dirichlet_energy(d.sqrt()[:, None], op)
    iso = d == 0
    assert abs(float(e) - float(iso.sum())) < 1e-10 * max(1, g.num_nodes)


def test_dirichlet_energy_empty_graph_is_zero():
    empty = DirectedGraph.from_edges(np.zeros((2, 0), dtype=np.int64))
    x = torch.zeros(0, 3, dtype=F64, requires_grad=True)
    e = dirichlet_energy(x, normalized_laplacian(empty, dtype=F64))
    assert e.item() == 0.0 and not torch.isnan(e.detach())
    e.backward()
    edgeless = DirectedGraph.from_edges(np.zeros((2, 0), dtype=np.int64), num_nodes=3)
    assert float(dirichlet_energy(torch.ones(3, 2, dtype=F64), normalized_laplacian(edgeless, dtype=F64))) == 6.0


def test_fourier_basis_and_frame_bounds_of_empty_graph():
    empty = DirectedGraph.from_edges(np.zeros((2, 0), dtype=np.int64))
    lam, U = fourier_basis(normalized_laplacian(empty))
    assert lam.shape == (0,) and U.shape == (0, 0)
    sparse_zero = SparseOperator(csr_matrix(torch.zeros(1, dtype=torch.int64), torch.zeros(0, dtype=torch.int64),
                                            torch.zeros(0, dtype=F64), (0, 0)), hermitian=True)
    assert largest_eigenvalue(sparse_zero) == 0.0

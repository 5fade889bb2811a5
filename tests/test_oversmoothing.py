"""Over-smoothing: stacked low-pass steps collapse the Dirichlet energy, band-pass wavelets keep it.

Sources for the collapse: Q. Li, Z. Han and X.-M. Wu, AAAI 2018 (repeated Laplacian smoothing makes features
constant on each component); K. Oono and T. Suzuki, ICLR 2020 (the distance to that subspace shrinks
geometrically with the number of layers). The band-pass side is the argument of Min et al.
(NeurIPS 2020). The thresholds (1% after 16 steps, at least 5% kept) are the
issue's; the graph is generated, connectivity checked with scipy.sparse.csgraph.
"""

import numpy as np
import pytest
import scipy.sparse as sp
import scipy.sparse.csgraph as csgraph
import torch

from phasorgraph import DirectedGraph, operators, spectral
from phasorgraph.nn import DiffusionScattering, DiffusionWavelets



def _connected_freight_graph(n=300, extra=4, seed=0):
    """Depots on a one-way delivery loop plus random one-way shipments (weights in [0.5, 1.5])."""
    rng = np.random.default_rng(seed)
    loop = rng.permutation(n)
    src = np.concatenate([loop, rng.integers(0, n, extra * n)])
    dst = np.concatenate([np.roll(loop, -1), rng.integers(0, n, extra * n)])
    w = rng.uniform(0.5, 1.5, src.size)
    graph = DirectedGraph.from_edges(src, dst, weight=w, num_nodes=n)
    count, _ = csgraph.connected_components(sp.csr_matrix((w, (src, dst)), shape=(n, n)), directed=False)
    assert count == 1  # test precondition: one component (scipy.sparse.csgraph)
    return graph


def _signal(n, f=4, seed=1):
    x = torch.randn(n, f, dtype=torch.float64, generator=torch.Generator().manual_seed(seed))
    return x - x.mean(dim=0)  # zero-mean random signal


def test_renormalized_steps_collapse_dirichlet_energy():
    graph = _connected_freight_graph()
    lap = operators.normalized_laplacian(graph, dtype=torch.float64)
    adj = operators.renormalized_adjacency(graph, dtype=torch.float64)
    x = _signal(graph.num_nodes)
    start = float(spectral.dirichlet_energy(x, lap))
    y, energies = x, []
    for _ in range(16):
        y = adj @ y
        energies.append(float(spectral.dirichlet_energy(y, lap)))
    assert energies[-1] < 0.01 * start  # Li, Han & Wu 2018; Oono & Suzuki 2020
    assert all(b <= a * (1 + 1e-12) for a, b in zip(energies, energies[1:]))  # monotone decay


def test_band_pass_coefficients_keep_energy():
    graph = _connected_freight_graph()
    lap = operators.normalized_laplacian(graph, dtype=torch.float64)
    T = operators.diffusion(graph, dtype=torch.float64)
    x = _signal(graph.num_nodes)
    n = graph.num_nodes
    J = 4  # diffusion up to 2^4 = 16 steps, the same depth as the low-pass stack
    bands = DiffusionWavelets(J)(x, T)[:, :-1]  # Psi_0 x .. Psi_J x, no low-pass
    kept = float((bands ** 2).sum()) / float((x ** 2).sum())
    assert kept >= 0.05
    kept_dirichlet = float(spectral.dirichlet_energy(bands.reshape(n, -1), lap)) / float(spectral.dirichlet_energy(x, lap))
    assert kept_dirichlet >= 0.05
    # first-order scattering moduli |Psi_j x| (no low-pass) keep the same norm
    moduli = DiffusionScattering(4, J, lowpass=False).coefficients(x, T)[:, 1:]
    assert float((moduli ** 2).sum()) / float((x ** 2).sum()) >= 0.05

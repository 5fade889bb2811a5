"""Flow-aware clustering and the adjusted Rand index.

References: the adjusted Rand index of Hubert & Arabie (Journal of Classification 1985),
checked on contingency tables worked out by hand below; its brute-force pair-counting form
(Rand 1971: agreements over all item pairs) for the expectation-free part; numpy.linalg.eigh
for the eigenvectors of the dense path.
"""

from itertools import combinations

import numpy as np
import pytest
import torch
from hypothesis import given
from hypothesis import strategies as st
import scipy.sparse as sp
import scipy.sparse.linalg  # noqa: F401  (sp.linalg)

from phasorgraph import (DirectedGraph, GraphInputError, adjusted_rand_index, cluster_nodes, magnetic_laplacian,
                         normalized_laplacian)
from phasorgraph.clustering import _embedding, _smallest_eigenvectors
from phasorgraph.data import directed_block_model


# ---------------------------------------------------------------------- adjusted Rand index
def test_ari_hand_computed_examples():
    # a = [0,0,0,1,1,1], b = [0,0,1,1,2,2]: contingency rows (2,1,0) and (0,1,2):
    # sum C(n_ij,2) = 1 + 1 = 2; rows a_i = (3,3): 3 + 3 = 6; columns b_j = (2,2,2): 1+1+1 = 3;
    # C(6,2) = 15, E = 6 * 3 / 15 = 1.2, max = (6 + 3) / 2 = 4.5, ARI = 0.8 / 3.3 = 8/33
    # (worked by hand from Hubert & Arabie 1985, eq. (5))
    assert adjusted_rand_index([0, 0, 0, 1, 1, 1], [0, 0, 1, 1, 2, 2]) == pytest.approx(8 / 33, abs=1e-12)
    # [0,0,1,1] against [0,0,1,2]: index 1, rows 2, columns 1, C(4,2) = 6, E = 1/3, max = 3/2:
    # (2/3) / (7/6) = 4/7 (by hand; 0.57 is also the value recalled from memory of common tools)
    assert adjusted_rand_index([0, 0, 1, 1], [0, 0, 1, 2]) == pytest.approx(4 / 7, abs=1e-12)
    # identical up to renaming: 1; a perfectly crossed 2 x 2 table below chance:
    # a = [0,0,1,1], b = [0,1,0,1]: index 0, rows 2, columns 2, E = 4/6, max = 2:
    # (0 - 2/3) / (2 - 2/3) = -1/2 (by hand)
    assert adjusted_rand_index([3, 3, 7, 7, 5], [1, 1, 0, 0, 9]) == 1.0
    assert adjusted_rand_index([0, 0, 1, 1], [0, 1, 0, 1]) == pytest.approx(-0.5, abs=1e-12)
    # both one cluster, or both all singletons: identical partitions, 1 (0/0 defined as 1)
    assert adjusted_rand_index([0, 0, 0], [4, 4, 4]) == 1.0
    assert adjusted_rand_index([0, 1, 2], [2, 0, 1]) == 1.0
    assert adjusted_rand_index(torch.tensor([0, 1, 1]), np.array([1, 0, 0])) == 1.0


def _rand_pairs(a, b):
    # brute force over all item pairs: (pairs together in both, together in a, together in b)
    both = ina = inb = 0
    for i, j in combinations(range(len(a)), 2):
        sa, sb = a[i] == a[j], b[i] == b[j]
        both += sa and sb
        ina += sa
        inb += sb
    return both, ina, inb


@given(st.lists(st.tuples(st.integers(0, 3), st.integers(0, 4)), min_size=2, max_size=25))
def test_ari_matches_pair_counting(pairs):
    # Hubert & Arabie (1985) eq. (5) written with pair counts: sum C(n_ij, 2) is the number of
    # pairs together in both partitions, sum C(a_i, 2) the pairs together in a (Rand 1971)
    a, b = np.array([p[0] for p in pairs]), np.array([p[1] for p in pairs])
    both, ina, inb = _rand_pairs(a, b)
    total = len(a) * (len(a) - 1) / 2
    expected, top = ina * inb / total, (ina + inb) / 2
    want = 1.0 if top == expected else (both - expected) / (top - expected)
    assert adjusted_rand_index(a, b) == pytest.approx(want, abs=1e-12)
    assert adjusted_rand_index(a, b) == pytest.approx(adjusted_rand_index(b, a), abs=1e-12)  # symmetric


def test_ari_is_near_zero_for_independent_partitions():
    # expectation 0 under the permutation model (Hubert & Arabie 1985); a random pair of
    # 3-way partitions of 3000 items has |ARI| well under 0.01 (common practice, no source)
    rng = np.random.default_rng(0)
    assert abs(adjusted_rand_index(rng.integers(0, 3, 3000), rng.integers(0, 3, 3000))) < 0.01


@pytest.mark.parametrize("a, b, match", [
    ([0, 1], [0, 1, 1], "same length"),
    ([[0, 1]], [0, 1], "1-D array of integer"),
    ([0.5, 1.0], [0, 1], "1-D array of integer"),
])
def test_ari_bad_input(a, b, match):
    with pytest.raises(GraphInputError, match=match):
        adjusted_rand_index(a, b)


# ---------------------------------------------------------------------- clustering
def _cyclic_flow(m, strength):
    # block b sends to block b + 1 (mod m) with probability `strength`
    flow = np.full((m, m), 0.5)
    for b in range(m):
        flow[b, (b + 1) % m], flow[(b + 1) % m, b] = strength, 1 - strength
    return flow


@pytest.mark.parametrize("seed", [0, 1])
def test_flow_blocks_invisible_to_symmetrized_clustering(seed):
    # equal densities inside and between blocks: the symmetrized graph is an Erdos-Renyi graph
    # and carries no block signal; only the direction of the edges does
    g, y = directed_block_model([100, 100, 100], 0.08, _cyclic_flow(3, 0.95), seed=seed)
    sym = adjusted_rand_index(cluster_nodes(g, 3, charge=0.0, seed=seed), y)
    mag = adjusted_rand_index(cluster_nodes(g, 3, charge=1 / 3, seed=seed), y)
    mag_default = adjusted_rand_index(cluster_nodes(g, 3, seed=seed), y)  # q = 0.25
    mag_one = adjusted_rand_index(cluster_nodes(g, 3, charge=1 / 3, num_vectors=1, seed=seed), y)
    assert abs(sym) < 0.05  # near chance (0)
    assert mag > 0.9 and mag_default > 0.8 and mag_one > 0.9


def test_lanczos_path_matches_dense_eigenvectors():
    # source: numpy.linalg.eigh on the dense Laplacian; the eigenvector of the smallest
    # eigenvalue (the block signal, well separated) agrees up to a unit factor (its projector)
    g, _ = directed_block_model([110, 110, 110], 0.1, _cyclic_flow(3, 0.95), seed=3)
    lap = magnetic_laplacian(g, 1 / 3, dtype=torch.complex128)
    vals, vecs = np.linalg.eigh(lap.to_dense().numpy())
    assert vals[1] - vals[0] > 0.1  # a gap, so the eigenvector is well defined
    u = _smallest_eigenvectors(lap, 1, np.random.default_rng(0))
    dense = vecs[:, :1]
    assert np.abs(u @ u.conj().T - dense @ dense.conj().T).max() < 1e-6
    emb = _embedding(u)
    assert np.allclose(np.linalg.norm(emb, axis=1), 1.0)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_lanczos_path_spans_the_dense_eigenvectors_below_a_gap(seed):
    # source: numpy.linalg.eigh. Four assortative blocks of slightly different densities: the
    # four smallest eigenvalues (0 and three close ones near 0.3) lie well below the bulk (from
    # about 0.6), so the span of their eigenvectors is well defined (Davis-Kahan) even though
    # the three close ones are not, each on its own; k-means only sees that span
    n = 800
    density = np.full((4, 4), 8.0 / n)
    np.fill_diagonal(density, np.array([60, 64, 68, 72]) / n)
    g, _ = directed_block_model([n // 4] * 4, density, np.full((4, 4), 0.5), seed=1)
    lap = normalized_laplacian(g, dtype=torch.float64)
    vals, vecs = np.linalg.eigh(lap.to_dense().numpy())
    assert vals[4] - vals[3] > 0.2 and vals[3] - vals[1] < 0.05
    u = _smallest_eigenvectors(lap, 4, np.random.default_rng(seed))
    dense = vecs[:, :4]
    assert np.abs(u @ (u.conj().T @ dense) - dense).max() < 1e-5
    np.testing.assert_allclose(u.conj().T @ u, np.eye(4), atol=1e-10)  # an orthonormal basis


def test_default_vectors_need_few_lanczos_products():
    # four blocks around a directed cycle, mean degree 40 (bench/clustering.py at 4000 nodes):
    # one eigenvector carries the blocks, the other three default ones lie in the bulk of the
    # spectrum, where any vector does as well and a tight Lanczos tolerance only costs products
    # (125 products to a 1e-4 residual; 45 to 1 %, then a degree-6 filter on the block)
    from phasorgraph import clustering

    g, y = directed_block_model([1000] * 4, 0.01, _cyclic_flow(4, 0.95), seed=0)
    eigsh, products = clustering.spla.eigsh, [0]

    def counted(matrix, *args, **kwargs):
        def matvec(v):
            products[0] += 1
            return matrix @ v
        return eigsh(sp.linalg.LinearOperator(matrix.shape, matvec=matvec, dtype=matrix.dtype), *args, **kwargs)

    clustering.spla.eigsh = counted
    try:
        labels = cluster_nodes(g, 4, charge=0.25, seed=0)
    finally:
        clustering.spla.eigsh = eigsh
    assert products[0] <= 60
    assert adjusted_rand_index(labels, y) > 0.95


def test_cluster_nodes_small_cases_and_isolated_nodes():
    # two triangles with lanes both ways (no phase) and an isolated node: the two smallest
    # eigenvectors are constant on each triangle (the components), so each triangle is a cluster
    ring = [[0, 1, 2, 3, 4, 5], [1, 2, 0, 4, 5, 3]]
    g = DirectedGraph.from_edges([ring[0] + ring[1], ring[1] + ring[0]], num_nodes=7)
    labels = cluster_nodes(g, 2, seed=0)
    assert labels.dtype == torch.int64 and labels.shape == (7,)
    assert labels[:3].unique().numel() == 1 and labels[3:6].unique().numel() == 1 and labels[0] != labels[3]
    assert cluster_nodes(g, 1).tolist() == [0] * 7
    assert torch.equal(cluster_nodes(g, 2, seed=5), cluster_nodes(g, 2, seed=5))  # seeded


@pytest.mark.parametrize("kwargs, match", [
    (dict(num_clusters=0), r"num_clusters must be an integer in \[1, num_nodes = 4\]; got 0"),
    (dict(num_clusters=5), r"num_clusters must be an integer in \[1, num_nodes = 4\]; got 5"),
    (dict(num_clusters=2.0), "num_clusters must be an integer"),
    (dict(num_clusters=2, charge=0.7), "charge"),
    (dict(num_clusters=2, seed=-1), "seed must be None, an integer >= 0"),
    (dict(num_clusters=2, num_vectors=0), r"num_vectors must be None or an integer in \[1, num_nodes = 4\]; got 0"),
])
def test_cluster_nodes_bad_input(kwargs, match):
    g = DirectedGraph.from_edges([[0, 1, 2], [1, 2, 3]])
    with pytest.raises(GraphInputError, match=match):
        cluster_nodes(g, **kwargs)


def test_cluster_nodes_rejects_non_graph_and_empty_graph():
    with pytest.raises(GraphInputError, match="graph must be a DirectedGraph"):
        cluster_nodes([[0, 1], [1, 0]], 2)
    with pytest.raises(GraphInputError, match="no nodes"):
        cluster_nodes(DirectedGraph.from_edges([[], []], num_nodes=0), 1)

"""Operator constructions: properties, brute-force dense references and outside references.

Sources named beside each check:
* the formulas of src/phasorgraph/operators.py (module conventions and builder docstrings) (the dense numpy reference ``_ref`` below is written straight from them);
* networkx ``laplacian_matrix``, ``normalized_laplacian_matrix``, ``directed_laplacian_matrix``;
* ``scipy.sparse.csgraph.laplacian``;
* ``numpy.linalg.eigh`` / ``eigvalsh`` / ``eigvals``;
* closed forms (directed cycle spectrum, one-way edge phases, Perron vector of the
  renormalized adjacency).

Isolated-node conventions differ between libraries, and the tests pin them down:
our normalized Laplacians put 1 on the diagonal of an isolated node (D^-1/2 = 0 there, the
identity stays); networkx ``normalized_laplacian_matrix`` puts 0 there (it computes
D^-1/2 (D - A) D^-1/2); ``scipy.sparse.csgraph.laplacian(normed=True)`` puts 0 there too and,
unlike us and networkx, ignores self-loops when it computes degrees.
"""

import math
import pickle

import networkx as nx
import numpy as np
import pytest
import scipy.sparse as sp
import torch
from hypothesis import given
from hypothesis import strategies as st
from scipy.sparse.csgraph import laplacian as scipy_laplacian

from phasorgraph import (
    DirectedGraph,
    SparseOperator,
    combinatorial_laplacian,
    diffusion,
    magnetic_adjacency,
    magnetic_laplacian,
    normalized_laplacian,
    pagerank_laplacian,
    proximity_operators,
    random_walk,
    random_walk_laplacian,
    renormalized_adjacency,
)
from dense import DenseGraph, dense_adjacency
from strategies import charges, directed_graphs, graphs_and_permutations

F64, C128 = torch.float64, torch.complex128
TOL = dict(rtol=1e-10, atol=1e-10)



# ---------------------------------------------------------------------- dense reference
# every formula of src/phasorgraph/operators.py written densely once, in tests/dense.py
_dense_A = dense_adjacency
_ref = DenseGraph


def _dense(op: SparseOperator) -> np.ndarray:
    return op.to_dense().numpy()


def _real_operators(g):
    """Every real-valued construction at float64 (name -> SparseOperator)."""
    out = {
        "combinatorial": combinatorial_laplacian(g, dtype=F64),
        "normalized": normalized_laplacian(g, dtype=F64),
        "random_walk_laplacian": random_walk_laplacian(g, dtype=F64),
        "renormalized": renormalized_adjacency(g, dtype=F64),
        "diffusion": diffusion(g, dtype=F64),
        "random_walk_lazy": random_walk(g, dtype=F64),
        "random_walk": random_walk(g, lazy=False, dtype=F64),
    }
    if g.num_nodes:
        out["pagerank"] = pagerank_laplacian(g, dtype=F64)
    return out


def _magnetic_operators(g, q):
    return {
        "H_diff": magnetic_adjacency(g, q, dtype=C128),
        "H_sign": magnetic_adjacency(g, q, phase="sign", dtype=C128),
        "L_norm_diff": magnetic_laplacian(g, q, dtype=C128),
        "L_norm_sign": magnetic_laplacian(g, q, phase="sign", dtype=C128),
        "L_diff": magnetic_laplacian(g, q, normalized=False, dtype=C128),
        "T_q": diffusion(g, q, dtype=C128),
    }


# ---------------------------------------------------------------------- brute-force references
@given(directed_graphs(), charges())
def test_magnetic_operators_match_dense_formulas(g, q):
    # source: the formulas of src/phasorgraph/operators.py, written densely in numpy (class _ref)
    r = _ref(g)
    ops = _magnetic_operators(g, q)
    np.testing.assert_allclose(_dense(ops["H_diff"]), r.H(q), **TOL)
    np.testing.assert_allclose(_dense(ops["H_sign"]), r.H(q, "sign"), **TOL)
    np.testing.assert_allclose(_dense(ops["L_norm_diff"]), r.mag_norm(q), **TOL)
    np.testing.assert_allclose(_dense(ops["L_norm_sign"]), r.mag_norm(q, "sign"), **TOL)
    np.testing.assert_allclose(_dense(ops["L_diff"]), r.mag(q), **TOL)
    np.testing.assert_allclose(_dense(ops["T_q"]), r.I - r.mag_norm(q) / 2, **TOL)


@given(directed_graphs())
def test_real_operators_match_dense_formulas(g):
    # source: the formulas of src/phasorgraph/operators.py, written densely in numpy (class _ref)
    r = _ref(g)
    ops = _real_operators(g)
    np.testing.assert_allclose(_dense(ops["combinatorial"]), r.comb(), **TOL)
    np.testing.assert_allclose(_dense(ops["normalized"]), r.norm(), **TOL)
    np.testing.assert_allclose(_dense(ops["random_walk_laplacian"]), r.rw(), **TOL)
    np.testing.assert_allclose(_dense(ops["renormalized"]), r.renorm(), **TOL)
    np.testing.assert_allclose(_dense(ops["diffusion"]), r.T(), **TOL)
    np.testing.assert_allclose(_dense(ops["random_walk_lazy"]), r.P(True), **TOL)
    np.testing.assert_allclose(_dense(ops["random_walk"]), r.P(False), **TOL)


# ---------------------------------------------------------------------- properties
@given(directed_graphs(), charges())
def test_hermitian_flag_is_true(g, q):
    # an operator flagged hermitian equals its conjugate transpose (definition)
    ops = {**_real_operators(g), **_magnetic_operators(g, q)}
    for name, op in ops.items():
        M = _dense(op)
        if op.hermitian:
            np.testing.assert_allclose(M, M.conj().T, **TOL, err_msg=name)
        assert not np.isnan(M).any(), name


@given(directed_graphs(), charges())
def test_laplacians_are_psd_and_normalized_spectra_in_0_2(g, q):
    # numpy.linalg.eigvalsh; bounds from the builders' docstrings (src/phasorgraph/operators.py) (PSD; normalized spectrum in [0, 2])
    ops = {**_real_operators(g), **_magnetic_operators(g, q)}
    for name in ["combinatorial", "normalized", "pagerank", "L_norm_diff", "L_norm_sign", "L_diff"]:
        if name not in ops:
            continue
        lam = np.linalg.eigvalsh(_dense(ops[name]))
        assert lam.min(initial=0.0) >= -1e-10, name
        lo, hi = ops[name].spectrum
        assert lo - 1e-10 <= lam.min(initial=lo) and lam.max(initial=hi) <= hi + 1e-10, name
    for name in ["normalized", "pagerank", "L_norm_diff", "L_norm_sign"]:
        if name in ops:
            assert ops[name].spectrum == (0.0, 2.0)


@given(directed_graphs())
def test_charge_zero_is_laplacian_of_symmetrized_graph(g):
    # src/phasorgraph/operators.py: q = 0 gives the Laplacian of As; As is also built independently as g.symmetrized()
    for ref in (normalized_laplacian(g, dtype=F64), normalized_laplacian(g.symmetrized(), dtype=F64)):
        np.testing.assert_allclose(_dense(magnetic_laplacian(g, 0.0, dtype=C128)), _dense(ref), **TOL)
    np.testing.assert_allclose(_dense(magnetic_laplacian(g, 0.0, normalized=False, dtype=C128)),
                               _dense(combinatorial_laplacian(g.symmetrized(), dtype=F64)), **TOL)


@given(directed_graphs(), charges())
def test_reversing_every_edge_conjugates(g, q):
    # src/phasorgraph/operators.py: reversing every edge conjugates H (A - A^T changes sign)
    rev = g.reverse()
    for phase in ("difference", "sign"):
        np.testing.assert_allclose(_dense(magnetic_adjacency(rev, q, phase=phase, dtype=C128)),
                                   _dense(magnetic_adjacency(g, q, phase=phase, dtype=C128)).conj(), **TOL)
        for normalized in (True, False):
            a = magnetic_laplacian(rev, q, normalized, phase, dtype=C128)
            b = magnetic_laplacian(g, q, normalized, phase, dtype=C128)
            np.testing.assert_allclose(_dense(a), _dense(b).conj(), **TOL)


@given(graphs_and_permutations(min_nodes=1), charges())
def test_permuting_nodes_permutes_every_operator(gp, q):
    # permutation equivariance: op(A[p][:, p]) = op(A)[p][:, p]
    g, perm = gp
    p = perm.numpy()
    h = g.permute(perm)
    ours = {**_real_operators(g), **_magnetic_operators(g, q)}
    theirs = {**_real_operators(h), **_magnetic_operators(h, q)}
    for name in ours:
        np.testing.assert_allclose(_dense(theirs[name]), _dense(ours[name])[np.ix_(p, p)],
                                   rtol=1e-9, atol=1e-9, err_msg=name)


@given(directed_graphs())
def test_random_walk_is_column_stochastic_on_nodes_with_edges(g):
    # src/phasorgraph/operators.py: P = (I + As D^-1)/2 spreads the mass at u over its neighbours (columns sum to 1)
    r = _ref(g)
    pos = r.d > 0
    for lazy in (True, False):
        cols = _dense(random_walk(g, lazy=lazy, dtype=F64)).sum(axis=0)
        np.testing.assert_allclose(cols[pos], 1.0, **TOL)
        np.testing.assert_allclose(cols[~pos], 0.5 if lazy else 0.0, **TOL)


@given(directed_graphs())
def test_symmetric_diffusion_is_similar_to_random_walk(g):
    # src/phasorgraph/operators.py: T = D^-1/2 P D^1/2 (on the nodes of positive degree)
    r = _ref(g)
    pos = r.d > 0
    P = _dense(random_walk(g, dtype=F64))
    T = _dense(diffusion(g, dtype=F64))
    s = np.sqrt(r.d[pos])
    np.testing.assert_allclose(T[np.ix_(pos, pos)], (P[np.ix_(pos, pos)] * s[None, :]) / s[:, None], **TOL)


@given(directed_graphs(), charges())
def test_diffusion_spectra_in_0_1(g, q):
    # numpy.linalg.eigvalsh; src/phasorgraph/operators.py: T and T(q) have spectra in [0, 1]
    for op in (diffusion(g, dtype=F64), diffusion(g, q, dtype=C128)):
        assert op.spectrum == (0.0, 1.0)
        lam = np.linalg.eigvalsh(_dense(op))
        if lam.size:
            assert lam.min() >= -1e-10 and lam.max() <= 1 + 1e-10


@given(directed_graphs())
def test_random_walk_laplacian_has_normalized_laplacian_spectrum(g):
    # similar matrices share eigenvalues (numpy.linalg.eigvals vs eigvalsh)
    rw = np.sort(np.linalg.eigvals(_dense(random_walk_laplacian(g, dtype=F64))).real)
    nl = np.linalg.eigvalsh(_dense(normalized_laplacian(g, dtype=F64)))
    np.testing.assert_allclose(rw, nl, rtol=1e-7, atol=1e-7)


@given(directed_graphs())
def test_similar_field_is_consistent(g):
    # the `similar` contract of SparseOperator: matrix == diag(scale) @ base @ diag(1 / scale)
    for op in (random_walk_laplacian(g, dtype=F64), random_walk(g, dtype=F64), random_walk(g, lazy=False, dtype=F64)):
        base, scale = op.similar
        assert base.hermitian and not op.hermitian
        s = scale.numpy()
        np.testing.assert_allclose(_dense(op), s[:, None] * _dense(base) / s[None, :], **TOL)


@given(directed_graphs(min_nodes=1), st.floats(0.01, 0.99))
def test_low_rank_to_dense_matches_matmul(g, t):
    # SparseOperator contract: op = matrix + U V^H, and op @ x uses the same sum
    op = pagerank_laplacian(g, teleport=t, dtype=F64)
    assert op.low_rank is not None
    x = torch.randn(g.num_nodes, 3, dtype=F64, generator=torch.Generator().manual_seed(0))
    np.testing.assert_allclose((op @ x).numpy(), op.to_dense().numpy() @ x.numpy(), **TOL)
    # the dense matrix is symmetric and its rows sum to zero against sqrt(pi) (Chung 2005)
    M = _dense(op)
    np.testing.assert_allclose(M, M.T, **TOL)


# ---------------------------------------------------------------------- outside references
def _undirected_nx(g):
    """networkx Graph of As (weights As[u, v], self-loops As[u, u] = A[u, u])."""
    G = nx.from_numpy_array(_ref(g).As)
    G.add_nodes_from(range(g.num_nodes))
    return G


@given(directed_graphs(min_nodes=1))
def test_combinatorial_laplacian_matches_networkx_and_scipy(g):
    # source: networkx.laplacian_matrix (D - A, self-loops counted in D and A) and
    # scipy.sparse.csgraph.laplacian(normed=False) (self-loops ignored in both D and A: the
    # diagonal d_u - As[u, u] is the same either way, so all three agree exactly)
    ours = _dense(combinatorial_laplacian(g, dtype=F64))
    G = _undirected_nx(g)
    theirs = nx.laplacian_matrix(G, nodelist=range(g.num_nodes), weight="weight").toarray()
    np.testing.assert_allclose(ours, theirs, **TOL)
    np.testing.assert_allclose(ours, scipy_laplacian(_ref(g).As, normed=False), **TOL)
    np.testing.assert_allclose(ours, scipy_laplacian(sp.csr_matrix(_ref(g).As), normed=False).toarray(), **TOL)


@given(directed_graphs(min_nodes=1))
def test_normalized_laplacian_matches_networkx_except_isolated_diagonal(g):
    # source: networkx.normalized_laplacian_matrix = D^-1/2 (D - A) D^-1/2, which is 0 on the
    # diagonal of an isolated node; ours is I - D^-1/2 As D^-1/2, which is 1 there.
    ours = _dense(normalized_laplacian(g, dtype=F64))
    G = _undirected_nx(g)
    theirs = nx.normalized_laplacian_matrix(G, nodelist=range(g.num_nodes), weight="weight").toarray()
    isolated = _ref(g).d == 0
    theirs[isolated, isolated] = 1.0
    np.testing.assert_allclose(ours, theirs, **TOL)


@given(directed_graphs(min_nodes=1, self_loops=False))
def test_normalized_laplacian_matches_scipy_on_loop_free_graphs(g):
    # source: scipy.sparse.csgraph.laplacian(normed=True); it puts 0 on the diagonal of an
    # isolated node (ours 1) and ignores self-loops, so the check is on loop-free graphs.
    ours = _dense(normalized_laplacian(g, dtype=F64))
    As = _ref(g).As
    isolated = _ref(g).d == 0
    for theirs in (scipy_laplacian(As, normed=True), scipy_laplacian(sp.csr_matrix(As), normed=True).toarray()):
        theirs = theirs.copy()
        np.testing.assert_allclose(np.diag(theirs)[isolated], 0.0)
        theirs[isolated, isolated] = 1.0
        np.testing.assert_allclose(ours, theirs, **TOL)


def test_self_loop_convention_differs_from_scipy_normed():
    # scipy.sparse.csgraph.laplacian ignores self-loops (degree of node 0 is 1, diagonal 1);
    # we and networkx count them (d_0 = 2, diagonal 1 - As[0, 0] / d_0 = 1/2).
    g = DirectedGraph.from_edges([[0, 0, 1], [0, 1, 0]])  # loop at 0 plus a reciprocal pair
    ours = _dense(normalized_laplacian(g, dtype=F64))
    As = _ref(g).As
    np.testing.assert_allclose(ours, [[0.5, -1 / math.sqrt(2)], [-1 / math.sqrt(2), 1.0]], **TOL)
    np.testing.assert_allclose(scipy_laplacian(As, normed=True), [[1.0, -1.0], [-1.0, 1.0]], **TOL)
    np.testing.assert_allclose(nx.normalized_laplacian_matrix(nx.from_numpy_array(As)).toarray(), ours, **TOL)


@given(directed_graphs(min_nodes=3), st.sampled_from([0.05, 0.15, 0.5]))
def test_pagerank_laplacian_matches_networkx_directed_laplacian(g, t):
    # source: networkx.directed_laplacian_matrix(G, walk_type="pagerank", alpha=1 - t)
    # (Chung 2005); the strategy yields dangling nodes (no out-edges) and isolated nodes.
    G = g.to_networkx()
    theirs = nx.directed_laplacian_matrix(G, nodelist=range(g.num_nodes), weight="weight",
                                          walk_type="pagerank", alpha=1 - t)
    ours = _dense(pagerank_laplacian(g, teleport=t, dtype=F64))
    np.testing.assert_allclose(ours, np.asarray(theirs), rtol=1e-7, atol=1e-7)


def test_pagerank_laplacian_with_dangling_nodes_explicit():
    # networkx.directed_laplacian_matrix again, on a path (node 3 dangling) plus an isolated node
    g = DirectedGraph.from_edges([[0, 1, 2], [1, 2, 3]], weight=[1.0, 2.0, 0.5], num_nodes=5)
    assert int((g.to_scipy().sum(axis=1) == 0).sum()) == 2
    theirs = nx.directed_laplacian_matrix(g.to_networkx(), nodelist=range(5), walk_type="pagerank", alpha=0.9)
    np.testing.assert_allclose(_dense(pagerank_laplacian(g, teleport=0.1, dtype=F64)), theirs, rtol=1e-8, atol=1e-8)


@given(directed_graphs(min_nodes=1))
def test_renormalized_adjacency_spectrum(g):
    # numpy.linalg.eigvalsh; Kipf & Welling 2017: spectrum of D~^-1/2 (As + I) D~^-1/2 in (-1, 1]
    lam = np.linalg.eigvalsh(_dense(renormalized_adjacency(g, dtype=F64)))
    assert lam.min() > -1 and lam.max() <= 1 + 1e-12


def test_renormalized_adjacency_perron_vector_is_sqrt_degree_plus_one():
    # closed form: D~^-1/2 (As + I) D~^-1/2 D~^1/2 1 = D~^-1/2 (As + I) 1 = D~^1/2 1, so on a
    # connected graph the top eigenvalue 1 is simple with eigenvector sqrt(d + 1)
    g = DirectedGraph.from_edges([[0, 1, 2, 3, 3, 0], [1, 2, 3, 0, 1, 0]], weight=[1, 2, 0.5, 1, 3, 1])
    assert nx.is_weakly_connected(g.to_networkx())
    lam, U = np.linalg.eigh(_dense(renormalized_adjacency(g, dtype=F64)))
    assert abs(lam[-1] - 1) < 1e-12 and lam[-2] < 1 - 1e-6 and lam[0] > -1
    v = np.sqrt(_ref(g).d + 1)
    np.testing.assert_allclose(np.abs(U[:, -1]), v / np.linalg.norm(v), **TOL)


# ---------------------------------------------------------------------- closed forms
@pytest.mark.parametrize("n", [3, 5, 8])
@pytest.mark.parametrize("q", [0.0, 0.1, 0.25, 1 / 3, 0.5])
def test_directed_cycle_spectrum(n, q):
    # closed form: H is circulant with c_1 = e^{i 2 pi q} / 2, c_-1 = conj, d = 1, so the
    # normalized magnetic Laplacian has eigenvalues 1 - cos(2 pi (k / n + q)), k = 0..n-1
    g = DirectedGraph.from_edges(np.arange(n), (np.arange(n) + 1) % n)
    lam = np.linalg.eigvalsh(_dense(magnetic_laplacian(g, q, dtype=C128)))
    expected = np.sort(1 - np.cos(2 * np.pi * (np.arange(n) / n + q)))
    np.testing.assert_allclose(lam, expected, atol=1e-12)


def test_one_way_unit_edge_phases():
    # closed form: H[u, v] = 1/2 e^{+i 2 pi q}; q = 0.25 gives +0.5i / -0.5i, q = 0.5 gives -1/2
    g = DirectedGraph.from_edges([[0], [1]])
    H = _dense(magnetic_adjacency(g, 0.25, dtype=C128))
    np.testing.assert_allclose(H, [[0, 0.5j], [-0.5j, 0]], atol=1e-15)
    H0 = _dense(magnetic_adjacency(g, 0.0, dtype=C128))
    H5 = _dense(magnetic_adjacency(g, 0.5, dtype=C128))
    np.testing.assert_allclose(H0, [[0, 0.5], [0.5, 0]], atol=1e-15)
    np.testing.assert_allclose(H5, -H0, atol=1e-15)
    # reciprocal edges of equal weight carry no phase at any charge
    both = DirectedGraph.from_edges([[0, 1], [1, 0]])
    np.testing.assert_allclose(_dense(magnetic_adjacency(both, 0.3, dtype=C128)), [[0, 1], [1, 0]], atol=1e-15)
    # "sign" phase uses only the direction: a weight-3 one-way edge has the same phase as 1
    heavy = DirectedGraph.from_edges([[0], [1]], weight=[3.0])
    Hs = _dense(magnetic_adjacency(heavy, 0.25, phase="sign", dtype=C128))
    np.testing.assert_allclose(Hs, [[0, 1.5j], [-1.5j, 0]], atol=1e-14)


def test_out_star_and_in_star_share_eigenvalues_not_eigenvectors():
    # numpy.linalg.eigh; the in-star is the out-star reversed, so L_in = conj(L_out): same
    # (real) eigenvalues, conjugated eigenvectors. At q > 0 the top eigenvector's projector has
    # non-real centre-leaf entries, so the two graphs' eigenvectors differ.
    k = 4
    out_star = DirectedGraph.from_edges(np.zeros(k, dtype=np.int64), np.arange(1, k + 1))
    in_star = DirectedGraph.from_edges(np.arange(1, k + 1), np.zeros(k, dtype=np.int64))
    for q in (0.1, 0.25):
        lo, Uo = np.linalg.eigh(_dense(magnetic_laplacian(out_star, q, dtype=C128)))
        li, Ui = np.linalg.eigh(_dense(magnetic_laplacian(in_star, q, dtype=C128)))
        np.testing.assert_allclose(lo, li, atol=1e-12)
        assert abs(lo[-1] - 2) < 1e-12 and lo[-2] < 2 - 1e-6  # bipartite: 2 is simple
        Po = np.outer(Uo[:, -1], Uo[:, -1].conj())
        Pi = np.outer(Ui[:, -1], Ui[:, -1].conj())
        assert np.abs(Po - Pi).max() > 0.1
        np.testing.assert_allclose(Po, Pi.conj(), atol=1e-12)
    # at q = 0 both are the undirected star: identical operators
    np.testing.assert_allclose(_dense(magnetic_laplacian(out_star, 0.0)), _dense(magnetic_laplacian(in_star, 0.0)))


def test_proximity_operators_match_dense_formulas():
    # source: the formulas in proximity_operators' docstring (recalled from memory, Tong et al.
    # 2020), written densely: second_out = A D_in^-1 A^T, second_in = A^T D_out^-1 A, no diagonal
    g = DirectedGraph.from_edges([[0, 1, 2, 2, 3], [2, 2, 3, 0, 1]], weight=[1, 2, 1, 0.5, 1], num_nodes=5)
    A = _dense_A(g)
    din, dout = A.sum(0), A.sum(1)
    inv = lambda d: np.where(d > 0, 1 / np.where(d > 0, d, 1), 0)  # noqa: E731
    so = A @ np.diag(inv(din)) @ A.T
    si = A.T @ np.diag(inv(dout)) @ A
    np.fill_diagonal(so, 0)
    np.fill_diagonal(si, 0)

    def renorm(W):
        S = np.diag(1 / np.sqrt(W.sum(1) + 1))
        return S @ (W + np.eye(len(W))) @ S

    ops = proximity_operators(g, dtype=F64)
    np.testing.assert_allclose(_dense(ops.first), renorm((A + A.T) / 2), **TOL)
    np.testing.assert_allclose(_dense(ops.second_out), renorm(so), **TOL)
    np.testing.assert_allclose(_dense(ops.second_in), renorm(si), **TOL)


# ---------------------------------------------------------------------- dtype grid
_REAL_BUILDERS = [combinatorial_laplacian, normalized_laplacian, random_walk_laplacian,
                  renormalized_adjacency, diffusion, random_walk, pagerank_laplacian]


@pytest.fixture(scope="module")
def small_graph():
    rng = np.random.default_rng(3)
    return DirectedGraph.from_edges(rng.integers(0, 9, size=(2, 25)), weight=rng.uniform(0.1, 1, 25), num_nodes=10)


@pytest.mark.parametrize("builder", _REAL_BUILDERS, ids=lambda f: f.__name__)
@pytest.mark.parametrize("dtype", [None, torch.float32, torch.float64])
def test_real_dtype_grid(small_graph, builder, dtype):
    op = builder(small_graph) if dtype is None else builder(small_graph, dtype=dtype)
    expected = torch.float32 if dtype is None else dtype
    assert op.dtype == expected and op.matrix.layout == torch.sparse_csr
    ref = builder(small_graph, dtype=F64).to_dense()
    tol = 1e-6 if expected == torch.float32 else 1e-12
    torch.testing.assert_close(op.to_dense().to(F64), ref, rtol=tol, atol=tol)
    x = torch.randn(10, 2, dtype=expected)
    torch.testing.assert_close(op @ x, op.to_dense() @ x, rtol=1e-5, atol=1e-5)
    # complex features through a real operator (one real product of width 2F)
    xc = torch.randn(10, 2, dtype=torch.complex64 if expected == torch.float32 else C128)
    torch.testing.assert_close(op @ xc, op.to_dense().to(xc.dtype) @ xc, rtol=1e-5, atol=1e-5)


@pytest.mark.parametrize("builder", [magnetic_adjacency, magnetic_laplacian,
                                     lambda g, q, **kw: diffusion(g, q, **kw)], ids=["H", "L", "T"])
@pytest.mark.parametrize("dtype,expected", [(None, torch.complex64), (torch.complex64, torch.complex64),
                                            (torch.complex128, C128), (torch.float32, torch.complex64),
                                            (torch.float64, C128)])
def test_complex_dtype_grid(small_graph, builder, dtype, expected):
    op = builder(small_graph, 0.2) if dtype is None else builder(small_graph, 0.2, dtype=dtype)
    assert op.dtype == expected and op.hermitian
    ref = builder(small_graph, 0.2, dtype=C128).to_dense()
    tol = 1e-6 if expected == torch.complex64 else 1e-12
    torch.testing.assert_close(op.to_dense().to(C128), ref, rtol=tol, atol=tol)
    real = torch.float32 if expected == torch.complex64 else F64
    x = torch.randn(10, 3, dtype=real)
    torch.testing.assert_close(op @ x, op.to_dense() @ x.to(expected), rtol=1e-5, atol=1e-5)


# ---------------------------------------------------------------------- pickling, empty graphs
def test_sparse_operator_pickle_round_trip(small_graph):
    for op in (magnetic_laplacian(small_graph, 0.1), random_walk(small_graph, dtype=F64),
               pagerank_laplacian(small_graph)):
        back = pickle.loads(pickle.dumps(op))
        assert (back.kind, back.hermitian, back.spectrum, back.dtype) == (op.kind, op.hermitian, op.spectrum, op.dtype)
        torch.testing.assert_close(back.to_dense(), op.to_dense(), rtol=0, atol=0)
        if op.similar is not None:
            torch.testing.assert_close(back.similar[0].to_dense(), op.similar[0].to_dense(), rtol=0, atol=0)
            torch.testing.assert_close(back.similar[1], op.similar[1], rtol=0, atol=0)


@pytest.mark.parametrize("num_nodes", [0, 1, 4])
def test_empty_and_edgeless_graphs_give_no_nan(num_nodes):
    # isolated nodes: every D^-1/2 or D^-1 of a zero degree is 0 (src/phasorgraph/operators.py), so no NaN
    g = DirectedGraph.from_edges(np.zeros((2, 0), dtype=np.int64), num_nodes=num_nodes)
    ops = {**_real_operators(g), **_magnetic_operators(g, 0.25)}
    ops.update({f"prox_{i}": op for i, op in enumerate(proximity_operators(g, dtype=F64))})
    for name, op in ops.items():
        M = op.to_dense()
        assert M.shape == (num_nodes, num_nodes), name
        assert not torch.isnan(M).any() and not torch.isinf(M).any(), name
        y = op @ torch.ones(num_nodes, 2, dtype=op.dtype)
        assert y.shape == (num_nodes, 2) and not torch.isnan(y).any(), name
    if num_nodes:
        eye = np.eye(num_nodes)
        np.testing.assert_allclose(_dense(ops["normalized"]), eye)  # diagonal 1 at isolated nodes
        np.testing.assert_allclose(_dense(ops["L_norm_diff"]), eye)
        np.testing.assert_allclose(_dense(ops["combinatorial"]), 0 * eye)
        np.testing.assert_allclose(_dense(ops["renormalized"]), eye)
        np.testing.assert_allclose(_dense(ops["diffusion"]), eye / 2)
        np.testing.assert_allclose(_dense(ops["random_walk"]), 0 * eye)
        # edgeless PageRank walk is uniform: L = I - J / n (Chung 2005 with pi uniform)
        np.testing.assert_allclose(_dense(ops["pagerank"]), eye - 1 / num_nodes, atol=1e-12)


# ---------------------------------------------------------------------- build internals
def test_complex64_phases_stay_accurate_for_large_weights():
    # the complex64 build reduces the angle in float64 before float32 cos / sin: with weights
    # up to 1000 (angles of thousands of radians) it must still match complex128 to ~1e-6
    rng = np.random.default_rng(7)
    g = DirectedGraph.from_edges(rng.integers(0, 30, size=(2, 120)), weight=rng.uniform(1, 1000, 120), num_nodes=30)
    for phase in ("difference", "sign"):
        lo = magnetic_laplacian(g, 0.37, phase=phase, dtype=torch.complex64).to_dense().to(C128)
        hi = magnetic_laplacian(g, 0.37, phase=phase, dtype=C128).to_dense()
        torch.testing.assert_close(lo, hi, rtol=0, atol=2e-6)
        np.testing.assert_allclose(hi.numpy(), _ref(g).mag_norm(0.37, phase), atol=1e-12)


@given(directed_graphs(min_nodes=1))
def test_operators_share_the_structures_row_pointer(g):
    # one owner of the CSR row pointer of the union pattern: the graph's structure. An operator
    # without a diagonal term holds the structure's crow and columns themselves; one with a
    # diagonal gets them from the canonical merge, checked against a dense numpy reference
    from phasorgraph.operators import _assemble

    st = g.structure
    n = g.num_nodes
    np.testing.assert_array_equal(st.crow.numpy(), np.concatenate([[0], np.cumsum(np.bincount(st.rows.numpy(),
                                                                                          minlength=n))]))
    for op in (magnetic_adjacency(g, 0.2, dtype=C128), magnetic_adjacency(g, 0.0, dtype=torch.complex64)):
        assert op.matrix.crow_indices().data_ptr() == st.crow.data_ptr()
        assert op.matrix.col_indices().data_ptr() == st.cols.data_ptr()
    diag = torch.arange(n, dtype=F64) + 0.5
    dense = np.zeros((n, n))
    np.add.at(dense, (st.rows.numpy(), st.cols.numpy()), st.symmetric.numpy())   # numpy reference
    np.testing.assert_allclose(_assemble(st.crow, st.cols, st.symmetric, F64, diag=diag).to_dense().numpy(),
                               dense + np.diag(diag.numpy()), rtol=0, atol=1e-15)
    np.testing.assert_allclose(_assemble(st.crow, st.cols, st.symmetric, F64).to_dense().numpy(), dense, rtol=0, atol=0)

"""DirectedGraph: canonical form, every input container, adapters out, helpers, pickling.

References: a dense numpy adjacency built with ``numpy.add.at`` from the raw edges (so
duplicates are summed independently of our code), scipy.sparse's own format conversions,
networkx's graph classes and ``scipy.sparse.csgraph.reverse_cuthill_mckee``.
"""

import pickle

import networkx as nx
import numpy as np
import pytest
import scipy.sparse as sp
import torch
from hypothesis import given
from scipy.sparse.csgraph import reverse_cuthill_mckee

from phasorgraph import DirectedGraph, GraphInputError, magnetic_laplacian, normalized_laplacian
from strategies import directed_graphs, edge_lists, graphs_and_permutations



def _dense_from_raw(src, dst, w, n):
    """Reference adjacency: numpy.add.at sums duplicate (u, v) entries."""
    A = np.zeros((n, n))
    np.add.at(A, (np.asarray(src, dtype=np.int64), np.asarray(dst, dtype=np.int64)), np.asarray(w, dtype=float))
    return A


def _dense(g: DirectedGraph):
    return g.to_scipy().toarray()


# a fixed raw input with a duplicate (0 -> 1 twice), a self-loop (2 -> 2), a reciprocal pair
# (1 -> 2, 2 -> 1), a zero-weight edge (3 -> 0) and an isolated node (4)
SRC = [0, 1, 0, 2, 2, 3]
DST = [1, 2, 1, 2, 1, 0]
W = [1.0, 2.0, 0.5, 3.0, 4.0, 0.0]
N = 5
EXPECTED = _dense_from_raw(SRC, DST, W, N)


def test_canonical_form_sums_duplicates_drops_zeros_keeps_self_loops():
    g = DirectedGraph(SRC, DST, W, N)
    assert g.num_nodes == 5 and g.num_edges == 4
    assert list(zip(g.source.tolist(), g.target.tolist(), g.weight.tolist())) == [
        (0, 1, 1.5), (1, 2, 2.0), (2, 1, 4.0), (2, 2, 3.0)]
    assert g.source.dtype == torch.int64 and g.target.dtype == torch.int64 and g.weight.dtype == torch.float64
    # duplicates that cancel exactly are dropped as zero-weight edges too
    c = DirectedGraph([0, 0], [1, 1], [2.0, -2.0], 2)
    assert c.num_edges == 0 and c.num_nodes == 2


def test_negative_weights_are_accepted_by_the_graph():
    # documented in the DirectedGraph docstring: signed graphs are valid graphs; operators refuse them
    g = DirectedGraph([0], [1], [-2.5])
    assert g.weight.tolist() == [-2.5]


@given(edge_lists())
def test_canonical_form_matches_numpy_add_at(raw):
    src, dst, w, n = raw
    g = DirectedGraph(src, dst, w, n)
    np.testing.assert_allclose(_dense(g), _dense_from_raw(src, dst, w, n), rtol=1e-12, atol=1e-12)
    key = g.source * max(n, 1) + g.target
    assert torch.all(key[1:] > key[:-1])  # sorted by (source, target), no repeats
    assert torch.all(g.weight != 0)


# ---------------------------------------------------------------------- input containers
_EDGE_CONTAINERS = {
    "numpy (2, E) int64": lambda: (np.array([SRC, DST]),),
    "numpy (2, E) int32": lambda: (np.array([SRC, DST], dtype=np.int32),),
    "numpy (2, E) integral floats": lambda: (np.array([SRC, DST], dtype=np.float64),),
    "list of two lists": lambda: ([SRC, DST],),
    "torch (2, E) int64": lambda: (torch.tensor([SRC, DST]),),
    "torch (2, E) int32": lambda: (torch.tensor([SRC, DST], dtype=torch.int32),),
    "torch (2, E) non-contiguous": lambda: (torch.tensor([SRC, DST]).T.contiguous().T,),
    "two lists": lambda: (SRC, DST),
    "two numpy arrays": lambda: (np.array(SRC), np.array(DST)),
    "two torch tensors": lambda: (torch.tensor(SRC), torch.tensor(DST)),
    "numpy uint8 arrays": lambda: (np.array(SRC, dtype=np.uint8), np.array(DST, dtype=np.uint8)),
}
_WEIGHT_CONTAINERS = {
    "list": lambda: W,
    "numpy float32": lambda: np.array(W, dtype=np.float32),
    "torch float32": lambda: torch.tensor(W, dtype=torch.float32),
    "torch float64": lambda: torch.tensor(W, dtype=torch.float64),
}


@pytest.mark.parametrize("container", list(_EDGE_CONTAINERS), ids=list(_EDGE_CONTAINERS))
@pytest.mark.parametrize("weights", list(_WEIGHT_CONTAINERS), ids=list(_WEIGHT_CONTAINERS))
def test_from_edges_container_grid(container, weights):
    args = _EDGE_CONTAINERS[container]()
    w = _WEIGHT_CONTAINERS[weights]()
    if len(args) == 1:
        g = DirectedGraph.from_edges(args[0], weight=w, num_nodes=N)
    else:
        g = DirectedGraph.from_edges(args[0], args[1], weight=w, num_nodes=N)
    np.testing.assert_allclose(_dense(g), EXPECTED, rtol=1e-7)
    assert g.num_nodes == N


def test_from_edges_defaults():
    g = DirectedGraph.from_edges([[0, 1], [1, 3]])
    assert g.num_nodes == 4 and g.weight.tolist() == [1.0, 1.0]  # num_nodes = largest + 1, weight 1
    s = DirectedGraph.from_edges([[0, 1], [1, 3]], weight=2.0)
    assert s.weight.tolist() == [2.0, 2.0]  # a scalar weight is broadcast
    b = DirectedGraph.from_edges([[0, 1], [1, 3]], weight=np.array([True, False]))
    assert b.num_edges == 1  # boolean weights: False is a zero weight, dropped
    e = DirectedGraph.from_edges(np.zeros((2, 0), dtype=np.int64), num_nodes=3)
    assert e.num_nodes == 3 and e.num_edges == 0
    assert DirectedGraph.from_edges([[], []]).num_nodes == 0
    assert DirectedGraph([0], [1], num_nodes=np.int64(4)).num_nodes == 4
    assert DirectedGraph([0], [1], num_nodes=torch.tensor(4)).num_nodes == 4


_SCIPY_FORMATS = ["csr", "csc", "coo", "lil", "dok", "bsr", "dia"]


@pytest.mark.parametrize("fmt", _SCIPY_FORMATS)
@pytest.mark.parametrize("kind", ["matrix", "array"])
def test_from_scipy_every_format(fmt, kind):
    # scipy's own conversions produce each format; an explicit stored zero must be dropped
    base = sp.coo_matrix((W, (SRC, DST)), shape=(N, N)) if kind == "matrix" else sp.coo_array((W, (SRC, DST)), shape=(N, N))
    m = base.asformat(fmt)
    g = DirectedGraph.from_scipy(m)
    np.testing.assert_allclose(_dense(g), EXPECTED)
    assert g.num_edges == 4 and g.num_nodes == N


def test_from_scipy_sums_coo_duplicates_and_dense_inputs():
    coo = sp.coo_matrix((W, (SRC, DST)), shape=(N, N))
    assert coo.nnz == 6  # duplicates still stored separately
    np.testing.assert_allclose(_dense(DirectedGraph.from_scipy(coo)), EXPECTED)
    for dense in (EXPECTED, EXPECTED.astype(np.float32), EXPECTED.tolist(), torch.tensor(EXPECTED),
                  (EXPECTED != 0).astype(np.int64)):
        g = DirectedGraph.from_scipy(dense)
        np.testing.assert_allclose(_dense(g), np.asarray(dense, dtype=float))


@pytest.mark.parametrize("fmt", _SCIPY_FORMATS)
@given(g=directed_graphs())
def test_scipy_round_trip(fmt, g):
    m = g.to_scipy(fmt)
    assert m.format == fmt and m.shape == (g.num_nodes, g.num_nodes)
    assert DirectedGraph.from_scipy(m) == g


def test_from_networkx_graph_kinds():
    # networkx semantics: Graph = both directions, DiGraph as is, MultiDiGraph parallel edges summed
    G = nx.Graph()
    G.add_nodes_from(["a", "b", "c", "d"])  # node order a, b, c, d -> 0..3; d isolated
    G.add_edge("a", "b", weight=2.0)
    G.add_edge("c", "c", weight=5.0)
    g = DirectedGraph.from_networkx(G)
    np.testing.assert_allclose(_dense(g), nx.to_numpy_array(G, nodelist=["a", "b", "c", "d"]))
    assert g.num_nodes == 4 and g.num_edges == 3  # a->b, b->a, c->c

    D = nx.DiGraph()
    D.add_edge(0, 1, weight=1.5)
    D.add_edge(1, 0, weight=0.5)
    D.add_edge(1, 2)  # no weight attribute: 1
    d = DirectedGraph.from_networkx(D)
    np.testing.assert_allclose(_dense(d), nx.to_numpy_array(D, nodelist=[0, 1, 2]))

    M = nx.MultiDiGraph()
    M.add_edge(0, 1, weight=1.0)
    M.add_edge(0, 1, weight=2.5)
    M.add_edge(1, 1, cost=4.0)
    m = DirectedGraph.from_networkx(M)
    np.testing.assert_allclose(_dense(m), nx.to_numpy_array(M, nodelist=[0, 1]))  # networkx sums too
    assert m.weight.tolist() == [3.5, 1.0]
    c = DirectedGraph.from_networkx(M, weight="cost")
    assert c.weight.tolist() == [2.0, 4.0]  # missing "cost" counts as 1 on each 0 -> 1 edge
    u = DirectedGraph.from_networkx(M, weight=None)
    assert u.weight.tolist() == [2.0, 1.0]

    MG = nx.MultiGraph()
    MG.add_edge(0, 1, weight=1.0)
    MG.add_edge(0, 1, weight=2.0)
    np.testing.assert_allclose(_dense(DirectedGraph.from_networkx(MG)), nx.to_numpy_array(MG))


@given(directed_graphs())
def test_networkx_round_trip(g):
    G = g.to_networkx()
    assert isinstance(G, nx.DiGraph) and G.number_of_nodes() == g.num_nodes
    assert G.number_of_edges() == g.num_edges
    assert DirectedGraph.from_networkx(G) == g
    np.testing.assert_allclose(nx.to_numpy_array(G, nodelist=range(g.num_nodes)), _dense(g))


# ---------------------------------------------------------------------- helpers
@given(directed_graphs())
def test_reverse_and_symmetrized(g):
    A = _dense(g)
    np.testing.assert_allclose(_dense(g.reverse()), A.T)
    np.testing.assert_allclose(_dense(g.symmetrized()), (A + A.T) / 2, rtol=1e-12, atol=1e-12)
    assert g.reverse().reverse() == g


@given(graphs_and_permutations())
def test_permute_convention(gp):
    g, perm = gp
    p = perm.numpy()
    h = g.permute(perm)
    np.testing.assert_allclose(_dense(h), _dense(g)[np.ix_(p, p)])  # A_new = A[perm][:, perm]
    inverse = torch.argsort(perm)
    assert h.permute(inverse) == g


def test_locality_order_matches_scipy_rcm_and_reduces_bandwidth():
    # source: scipy.sparse.csgraph.reverse_cuthill_mckee on the symmetrized pattern; a shuffled
    # path has bandwidth ~N, and RCM recovers a path ordering (bandwidth 1)
    n = 40
    shuffle = np.random.default_rng(0).permutation(n)
    g = DirectedGraph.from_edges(shuffle[:-1], shuffle[1:], num_nodes=n)

    def bandwidth(graph):
        return int((graph.source - graph.target).abs().max())

    assert bandwidth(g) > 10
    h, perm = g.locality_order()
    assert perm.dtype == torch.int64 and sorted(perm.tolist()) == list(range(n))
    pattern = sp.csr_matrix(_dense(g) + _dense(g).T)
    np.testing.assert_array_equal(perm.numpy(), reverse_cuthill_mckee(pattern, symmetric_mode=True))
    assert h == g.permute(perm) and bandwidth(h) == 1


@given(graphs_and_permutations(min_nodes=0), )
def test_locality_order_features_follow_x_perm(gp):
    g, _ = gp
    h, perm = g.locality_order()
    assert h == g.permute(perm)
    x = torch.randn(g.num_nodes, 2, dtype=torch.float64, generator=torch.Generator().manual_seed(1))
    if g.num_nodes:
        for build in (normalized_laplacian, lambda gr, dtype: magnetic_laplacian(gr, 0.2, dtype=dtype)):
            y = build(g, dtype=torch.float64) @ x
            y_new = build(h, dtype=torch.float64) @ x[perm]
            torch.testing.assert_close(y_new, y[perm])
            torch.testing.assert_close(y_new[torch.argsort(perm)], y)


def test_subgraph_edges_and_repr():
    g = DirectedGraph(SRC, DST, W, N)
    s = g.subgraph_edges(torch.tensor([True, False, True, False]))
    assert s.num_nodes == N and s.num_edges == 2
    assert repr(g) == "DirectedGraph(num_nodes=5, num_edges=4)"


@given(directed_graphs())
def test_pickle_round_trip(g):
    back = pickle.loads(pickle.dumps(g))
    assert back == g and back.num_nodes == g.num_nodes
    # the operator cache is not carried over, and rebuilt operators agree
    torch.testing.assert_close(normalized_laplacian(back).to_dense(), normalized_laplacian(g).to_dense())


def test_graph_is_immutable():
    g = DirectedGraph(SRC, DST, W, N)
    with pytest.raises(AttributeError):
        g.num_nodes = 3
    with pytest.raises(AttributeError):
        g.extra = 1


def test_many_more_nodes_than_edges_uses_little_memory():
    # 1e12 nodes and 3 edges: canonicalization must stay O(E) (no row pointer of N + 1 entries)
    g = DirectedGraph([10**12 - 1, 5, 5], [0, 7, 7], [1.0, 2.0, 0.5], num_nodes=10**12)
    assert g.num_nodes == 10**12 and g.num_edges == 2
    assert list(zip(g.source.tolist(), g.target.tolist(), g.weight.tolist())) == [(5, 7, 2.5), (10**12 - 1, 0, 1.0)]
    r = DirectedGraph([0, 0, 3], [1, 1, 0], [1.0, -1.0, 2.0], num_nodes=10**6)  # cancelling duplicates
    assert r.num_edges == 1 and r.weight.tolist() == [2.0]


@given(edge_lists(min_nodes=1))
def test_sparse_node_range_fallback_matches_main_path(raw):
    # DirectedGraph canonicalizes through scipy's COO -> CSR unless num_nodes far exceeds the
    # edge count; both routes must store identical edges
    src, dst, w, n = raw
    small = DirectedGraph(src, dst, w, n)
    huge = DirectedGraph(src, dst, w, 10**7)  # 10**7 > 4 E + 4096: the sort-based route
    assert torch.equal(small.source, huge.source) and torch.equal(small.target, huge.target)
    torch.testing.assert_close(small.weight, huge.weight, rtol=1e-15, atol=1e-15)


# ---------------------------------------------------------------------- the graph-like protocol
def test_equal_graphs_hash_alike_and_are_weakly_referenceable():
    import weakref

    a = DirectedGraph.from_edges([[0, 1, 1], [1, 2, 2]], weight=[1.0, 2.0, 3.0])
    b = DirectedGraph.from_edges([[1, 0], [2, 1]], weight=[5.0, 1.0])
    assert a == b and hash(a) == hash(b) and len({a, b}) == 1   # Python's rule: a == b implies equal hashes
    assert a != a.reverse()
    ref = weakref.ref(a)
    assert ref() is a


def test_operator_is_built_once_kept_with_the_graph_and_freed_with_it():
    import gc
    import weakref

    g = DirectedGraph.from_edges([[0, 1, 2], [1, 2, 0]])
    op = g.operator(magnetic_laplacian, charge=0.1, dtype=torch.complex128)
    assert g.operator(magnetic_laplacian, charge=0.1, dtype=torch.complex128) is op
    assert g.operator(magnetic_laplacian, charge=0.2, dtype=torch.complex128) is not op
    # source: the builder itself, called directly
    torch.testing.assert_close(op.to_dense(), magnetic_laplacian(g, 0.1, dtype=torch.complex128).to_dense())
    assert g.num_rows == g.num_nodes == 3
    g.clear_cache()
    assert g.operator(magnetic_laplacian, charge=0.1, dtype=torch.complex128) is not op
    dead = weakref.ref(g.operator(normalized_laplacian))
    del g, op
    gc.collect()
    assert dead() is None            # nothing outside the graph kept its operators alive


def test_operator_refuses_unhashable_options_and_non_functions():
    g = DirectedGraph.from_edges([[0], [1]])
    with pytest.raises(GraphInputError, match=r"option 'charge' of graph.operator must be hashable .*got list"):
        g.operator(magnetic_laplacian, charge=[0.1])
    with pytest.raises(GraphInputError, match=r"builder must be a function graph -> operator; got str"):
        g.operator("magnetic_laplacian")


@pytest.mark.parametrize("layout", ["dense", "coo", "csr", "csc"])
def test_from_scipy_accepts_torch_tensors(layout):
    # reference: scipy.sparse.coo_matrix of the same dense numpy array (issue 12: a torch sparse
    # tensor used to raise numpy's TypeError)
    dense = torch.tensor([[0.0, 2.0, 0.0], [0.0, 0.0, 3.0], [1.0, 0.0, 0.5]])
    m = {"dense": dense, "coo": dense.to_sparse(), "csr": dense.to_sparse_csr(),
         "csc": dense.to_sparse_csc()}[layout]
    g = DirectedGraph.from_scipy(m)
    ref = sp.coo_matrix(dense.numpy())
    assert g == DirectedGraph(ref.row, ref.col, ref.data, 3)


def test_subgraph_edges_accepts_boolean_lists_and_arrays():
    g = DirectedGraph.from_edges([[0, 1, 2], [1, 2, 0]])
    for keep in ([True, False, True], np.array([True, False, True])):
        assert g.subgraph_edges(keep).target.tolist() == [1, 0]

"""GraphBatch: block-diagonal structure and operators against scipy.sparse.block_diag, readouts
against a per-graph loop, split_by_graph round trip, empty graphs, mini-batch iteration, bad input."""

import numpy as np
import pytest
import scipy.sparse as sp
import torch

from phasorgraph import (
    DirectedGraph,
    GraphInputError,
    combinatorial_laplacian,
    diffusion,
    magnetic_laplacian,
    magnetic_matmul,
    normalized_laplacian,
    random_walk,
    random_walk_laplacian,
    renormalized_adjacency,
)
from phasorgraph.data import GraphBatch, directed_block_model, directed_cycle, in_star, iterate_batches, random_out_graph


def parts():
    """Mixed graphs: weighted with reciprocal edges and a self-loop, isolated nodes, empty ones."""
    weighted = DirectedGraph.from_edges([[0, 1, 1, 2, 3], [1, 0, 2, 2, 0]], weight=[0.5, 1.5, 1.0, 2.0, 0.3], num_nodes=5)
    isolated = DirectedGraph.from_edges(torch.empty(2, 0, dtype=torch.int64), num_nodes=3)
    nothing = DirectedGraph.from_edges(torch.empty(2, 0, dtype=torch.int64), num_nodes=0)
    g, _ = directed_block_model([6, 5], 0.4, [[0.5, 0.8], [0.2, 0.5]], seed=0)
    return [weighted, directed_cycle(4), nothing, isolated, in_star(5), g, nothing, random_out_graph(7, 2, seed=1)]


def test_batch_structure_is_block_diagonal():
    graphs = parts()
    b = GraphBatch.from_graphs(graphs)
    sizes = [g.num_nodes for g in graphs]
    assert b.num_graphs == len(graphs) == len(b)
    assert b.num_nodes_per_graph.tolist() == sizes
    assert b.node_offsets.tolist() == np.concatenate([[0], np.cumsum(sizes)]).tolist()
    assert b.graph_index.tolist() == np.repeat(np.arange(len(graphs)), sizes).tolist()
    # reference: scipy.sparse.block_diag of the parts' adjacencies
    ref = sp.block_diag([g.to_scipy() for g in graphs]).toarray()
    np.testing.assert_array_equal(b.graph.to_scipy().toarray(), ref)


OPERATORS = {
    "normalized_laplacian": lambda g: normalized_laplacian(g, dtype=torch.float64),
    "combinatorial_laplacian": lambda g: combinatorial_laplacian(g, dtype=torch.float64),
    "random_walk_laplacian": lambda g: random_walk_laplacian(g, dtype=torch.float64),
    "renormalized_adjacency": lambda g: renormalized_adjacency(g, dtype=torch.float64),
    "magnetic_laplacian": lambda g: magnetic_laplacian(g, 0.2, dtype=torch.complex128),
    "magnetic_laplacian_unnormalized": lambda g: magnetic_laplacian(g, 0.3, normalized=False, dtype=torch.complex128),
    "diffusion": lambda g: diffusion(g, dtype=torch.float64),
    "magnetic_diffusion": lambda g: diffusion(g, charge=0.1, dtype=torch.complex128),
    "random_walk": lambda g: random_walk(g, dtype=torch.float64),
    "random_walk_not_lazy": lambda g: random_walk(g, lazy=False, dtype=torch.float64),
}


@pytest.mark.parametrize("name", sorted(OPERATORS))
def test_every_operator_of_the_batch_is_the_block_diagonal_of_its_parts(name):
    build = OPERATORS[name]
    graphs = parts()
    b = GraphBatch.from_graphs(graphs)
    got = build(b.graph).to_dense().numpy()
    # reference: scipy.sparse.block_diag of the operators of the parts (0-node parts add nothing)
    ref = sp.block_diag([sp.csr_matrix(build(g).to_dense().numpy()) for g in graphs]).toarray()
    np.testing.assert_allclose(got, ref, rtol=0, atol=1e-13)


def test_magnetic_product_with_a_learned_charge_splits_over_the_parts():
    graphs = parts()
    b = GraphBatch.from_graphs(graphs)
    q = torch.tensor(0.17, dtype=torch.float64)
    x = torch.randn(b.graph.num_nodes, 3, dtype=torch.float64, generator=torch.Generator().manual_seed(0))
    whole = magnetic_matmul(b.graph, q, x)
    pieces = [magnetic_matmul(g, q, xi) for g, xi in zip(graphs, b.split_by_graph(x))]  # 0-node parts included
    torch.testing.assert_close(whole, torch.cat(pieces), rtol=0, atol=1e-13)


@pytest.mark.parametrize("reduce", ["mean", "sum", "max"])
def test_readout_matches_a_per_graph_loop(reduce):
    graphs = parts()
    b = GraphBatch.from_graphs(graphs)
    x = torch.randn(b.graph.num_nodes, 2, 3, dtype=torch.float64, generator=torch.Generator().manual_seed(1))
    got = b.readout(x, reduce=reduce)
    fn = {"mean": lambda t: t.mean(0), "sum": lambda t: t.sum(0), "max": lambda t: t.max(0).values}[reduce]
    expected = torch.stack([fn(xi) if xi.shape[0] else torch.zeros(2, 3, dtype=torch.float64) for xi in b.split_by_graph(x)])
    torch.testing.assert_close(got, expected, rtol=0, atol=1e-14)
    assert got.shape == (len(graphs), 2, 3) and bool(torch.isfinite(got).all())


def test_readout_of_complex_features_and_empty_graphs_is_finite():
    b = GraphBatch.from_graphs(parts())
    z = torch.randn(b.graph.num_nodes, 4, dtype=torch.complex128, generator=torch.Generator().manual_seed(2))
    mean = b.readout(z, "mean")
    torch.testing.assert_close(mean[1], z[b.graph_index == 1].mean(0))
    empty = (b.num_nodes_per_graph == 0).nonzero().flatten()
    assert empty.tolist() == [2, 6]
    for reduce in ("mean", "sum"):
        assert bool((b.readout(z, reduce)[empty] == 0).all())
    assert bool((b.readout(z.abs(), "max")[empty] == 0).all())
    only_empty = GraphBatch.from_graphs([parts()[2]] * 3)
    assert only_empty.readout(torch.zeros(0, 2), "mean").tolist() == [[0.0, 0.0]] * 3


def test_readout_gradient_passes_gradcheck():
    b = GraphBatch.from_graphs([directed_cycle(3), in_star(4), directed_cycle(2)])
    x = torch.randn(b.graph.num_nodes, 2, dtype=torch.float64, requires_grad=True)
    for reduce in ("mean", "sum", "max"):
        assert torch.autograd.gradcheck(lambda t: b.readout(t, reduce), (x,))


def test_split_by_graph_round_trip():
    graphs = parts()
    b = GraphBatch.from_graphs(graphs)
    x = torch.arange(b.graph.num_nodes * 2, dtype=torch.float32).view(-1, 2)
    pieces = b.split_by_graph(x)
    assert [p.shape[0] for p in pieces] == [g.num_nodes for g in graphs]
    assert torch.equal(torch.cat(pieces), x)
    again = GraphBatch.from_graphs(graphs)
    assert again.graph == b.graph


def test_empty_batch():
    b = GraphBatch.from_graphs([])
    assert b.num_graphs == 0 and b.graph.num_nodes == 0 and b.node_offsets.tolist() == [0]
    assert b.readout(torch.zeros(0, 3)).shape == (0, 3) and b.split_by_graph(torch.zeros(0, 3)) == []


def test_iterate_batches_covers_each_graph_once_with_its_target():
    graphs = [directed_cycle(n) for n in range(3, 14)]
    targets = torch.arange(3, 14, dtype=torch.float32)
    seen = []
    for batch, y in iterate_batches(graphs, targets, batch_size=4, shuffle=True, seed=0):
        assert len(batch) <= 4 and y.shape == (len(batch),)
        assert batch.num_nodes_per_graph.tolist() == y.long().tolist()  # cycle n has n nodes
        seen += y.long().tolist()
    assert sorted(seen) == list(range(3, 14)) and seen != list(range(3, 14))
    again = [y.long().tolist() for _, y in iterate_batches(graphs, targets, 4, shuffle=True, seed=0)]
    assert sum(again, []) == seen
    plain = [y.long().tolist() for _, y in iterate_batches(graphs, targets, 5)]
    assert plain == [[3, 4, 5, 6, 7], [8, 9, 10, 11, 12], [13]]
    assert [t for _, t in iterate_batches(graphs, None, 6)] == [None, None]


@pytest.mark.parametrize(
    "call,message",
    [
        (lambda: GraphBatch.from_graphs(directed_cycle(3)), r"graphs must be a list or tuple of DirectedGraph; got DirectedGraph"),
        (lambda: GraphBatch.from_graphs([directed_cycle(3), "g"]), r"graphs\[1\] must be a DirectedGraph; got str"),
        (lambda: GraphBatch.from_graphs([directed_cycle(3)]).readout(torch.ones(3, 1), "median"),
         r"reduce must be one of \('mean', 'sum', 'max'\); got 'median'"),
        (lambda: GraphBatch.from_graphs([directed_cycle(3)]).readout(torch.ones(4, 1)),
         r"x must be a tensor with one row per node of the batch \(3\), shape \(N, ...\); got \(4, 1\)"),
        (lambda: GraphBatch.from_graphs([directed_cycle(3)]).split_by_graph(np.ones((3, 1))),
         r"x must be a tensor with one row per node of the batch \(3\).*got ndarray"),
        (lambda: GraphBatch.from_graphs([directed_cycle(3)]).readout(torch.ones(3, 1, dtype=torch.complex64), "max"),
         r"x must be real for a max readout"),
        (lambda: iterate_batches([directed_cycle(3)], None, 0), r"batch_size must be an integer >= 1; got 0"),
        (lambda: iterate_batches([directed_cycle(3)], torch.ones(2), 1),
         r"targets must be None or a tensor with one row per graph \(1\); got \(2,\)"),
        (lambda: iterate_batches([directed_cycle(3), 5], None, 1), r"graphs\[1\] must be a DirectedGraph; got int"),
    ],
)
def test_batch_rejects_bad_input(call, message):
    with pytest.raises(GraphInputError, match=message):
        call()


# ---------------------------------------------------------------------- properties
from hypothesis import given  # noqa: E402
from hypothesis import strategies as st  # noqa: E402

from strategies import charges, directed_graphs  # noqa: E402


@given(st.lists(directed_graphs(max_nodes=6), min_size=1, max_size=4), charges())
def test_property_batch_magnetic_laplacian_is_block_diagonal(graphs, q):
    # reference: scipy.sparse.block_diag of the parts' operators, on generated graphs with
    # isolated nodes, self-loops, duplicates, reciprocal edges and 0-node graphs
    b = GraphBatch.from_graphs(graphs)
    got = magnetic_laplacian(b.graph, q, dtype=torch.complex128).to_dense().numpy()
    ref = sp.block_diag([sp.csr_matrix(magnetic_laplacian(g, q, dtype=torch.complex128).to_dense().numpy())
                         for g in graphs]).toarray()
    np.testing.assert_allclose(got, ref.reshape(got.shape), rtol=0, atol=1e-13)
    x = torch.ones(b.graph.num_nodes, 1, dtype=torch.float64)
    assert b.readout(x, "sum").flatten().tolist() == [float(g.num_nodes) for g in graphs]

"""Node and link splits: stratification, leak-freedom, true negatives, direction labels,
seeded determinism, bad input. Edge membership is checked with networkx (DiGraph.has_edge)."""

import networkx as nx
import numpy as np
import pytest
import torch

from phasorgraph import DirectedGraph, GraphInputError, magnetic_laplacian, normalized_laplacian
from phasorgraph.data import directed_block_model, split_link_orientation, split_link_presence, split_nodes


# ---------------------------------------------------------------------- nodes
def test_node_split_is_a_stratified_partition():
    labels = torch.tensor([0] * 50 + [1] * 30 + [2] * 7 + [5] * 13)
    s = split_nodes(labels, train=0.6, val=0.2, seed=0)
    every = torch.cat([s.train, s.val, s.test])
    assert torch.equal(torch.sort(every).values, torch.arange(100))  # disjoint and covering
    for c, n_c in [(0, 50), (1, 30), (2, 7), (5, 13)]:
        assert int((labels[s.train] == c).sum()) == round(0.6 * n_c)
        assert int((labels[s.val] == c).sum()) == round(0.2 * n_c)
    for part in (s.train, s.val, s.test):
        assert part.dtype == torch.int64 and torch.equal(part, torch.sort(part).values)


def test_node_split_is_seeded_and_shuffled():
    labels = np.repeat([0, 1], 40)
    a, b, c = (split_nodes(labels, 0.5, 0.25, seed=s) for s in (3, 3, 4))
    assert torch.equal(a.train, b.train) and torch.equal(a.test, b.test)
    assert not torch.equal(a.train, c.train)
    assert not torch.equal(a.train[:20], torch.arange(20))  # not simply the first nodes


def test_node_split_edge_cases():
    s = split_nodes([1, 1, 1], train=0.0, val=0.0, seed=0)
    assert s.train.numel() == 0 and s.test.tolist() == [0, 1, 2]
    s = split_nodes([], 0.5, 0.5, seed=0)
    assert s.train.numel() == s.val.numel() == s.test.numel() == 0


def test_unlabeled_nodes_are_in_no_split():
    # -1 marks an unlabeled node (as node_labels gives it); a mask leaves nodes out too
    labels = torch.tensor([0] * 10 + [1] * 10 + [-1] * 5)
    s = split_nodes(labels, train=0.6, val=0.2, seed=0)
    every = torch.cat([s.train, s.val, s.test])
    assert torch.equal(torch.sort(every).values, torch.arange(20))  # exactly the labeled nodes
    for c in (0, 1):  # stratified as before: 6 / 2 / 2 of each class of 10
        assert [int((labels[p] == c).sum()) for p in (s.train, s.val, s.test)] == [6, 2, 2]
    mask = torch.ones(25, dtype=torch.bool)
    mask[:4] = False
    m = split_nodes(labels, train=0.6, val=0.2, seed=0, labeled=mask)
    kept = torch.sort(torch.cat([m.train, m.val, m.test])).values
    assert torch.equal(kept, torch.arange(4, 20))
    none = split_nodes([-1, -1, -1], seed=0)
    assert none.train.numel() == none.val.numel() == none.test.numel() == 0
    with pytest.raises(GraphInputError, match=r"labels must be classes >= 0, or -1 for an unlabeled node; got -2 at position 1"):
        split_nodes([0, -2, 1], seed=0)
    with pytest.raises(GraphInputError, match=r"labeled must be None or a boolean mask with one entry per label, shape \(3,\); got shape \(2,\)"):
        split_nodes([0, 1, 1], seed=0, labeled=[True, False])


@pytest.mark.parametrize(
    "args,message",
    [
        (([0, 1], 0.7, 0.5), r"train \+ val must be at most 1; got 0.7 \+ 0.5 = 1.2"),
        (([0, 1], -0.1, 0.2), r"train must be a fraction in \[0, 1\); got -0.1"),
        (([0, 1], 0.5, "a"), r"val must be a fraction in \[0, 1\); got 'a'"),
        (([0.5, 1.0], 0.5, 0.2), r"labels must be a 1-D array of integer classes"),
        (([[0, 1]], 0.5, 0.2), r"labels must be a 1-D array of integer classes; got shape \(1, 2\)"),
    ],
)
def test_node_split_rejects_bad_input(args, message):
    with pytest.raises(GraphInputError, match=message):
        split_nodes(*args, seed=0)


# ---------------------------------------------------------------------- links
@pytest.fixture(scope="module")
def full_graph():
    """A block-model graph plus some reciprocal edges and self-loops (weights vary)."""
    g, _ = directed_block_model([40, 40], [[0.15, 0.05], [0.05, 0.15]], [[0.5, 0.9], [0.1, 0.5]], seed=0)
    rng = np.random.default_rng(0)
    back = rng.choice(g.num_edges, 40, replace=False)  # make 40 links reciprocal
    loops = torch.tensor([3, 17, 55])
    src = torch.cat([g.source, g.target[back], loops])
    dst = torch.cat([g.target, g.source[back], loops])
    w = torch.as_tensor(rng.uniform(0.5, 2.0, src.numel()))
    return DirectedGraph(src, dst, w, g.num_nodes)


def pairs_of(link_set, label=None):
    p = link_set.pairs
    if label is not None:
        p = p[:, link_set.labels == label]
    return list(zip(p[0].tolist(), p[1].tolist()))


def links_of(graph):
    return {frozenset((u, v)) for u, v in zip(graph.source.tolist(), graph.target.tolist()) if u != v}


def test_presence_split_is_leak_free(full_graph):
    s = split_link_presence(full_graph, 0.1, 0.2, seed=1)
    ref = full_graph.to_networkx()  # networkx reference for edge membership
    train_ref = s.train_graph.to_networkx()
    links = links_of(full_graph)
    held = [frozenset(p) for p in pairs_of(s.val, 1) + pairs_of(s.test, 1)]
    assert len(s.val.labels) // 2 == round(0.1 * len(links)) and len(s.test.labels) // 2 == round(0.2 * len(links))
    for u, v in map(tuple, held):
        assert not train_ref.has_edge(u, v) and not train_ref.has_edge(v, u)
    # train_graph is exactly the full graph minus every edge of a held-out link
    kept = {(u, v): d["weight"] for u, v, d in ref.edges(data=True) if frozenset((u, v)) not in set(held) or u == v}
    assert {(u, v): d["weight"] for u, v, d in train_ref.edges(data=True)} == kept
    assert s.train_graph.num_nodes == full_graph.num_nodes
    # every link is a positive of exactly one split; positives are edges of the full graph
    positives = pairs_of(s.train, 1) + pairs_of(s.val, 1) + pairs_of(s.test, 1)
    assert sorted(map(sorted, map(tuple, map(frozenset, positives)))) == sorted(map(sorted, links))
    assert all(ref.has_edge(u, v) for u, v in positives)
    # no operator of train_graph couples a held-out pair
    lap = magnetic_laplacian(s.train_graph, 0.25, dtype=torch.complex128).to_dense()
    nl = normalized_laplacian(s.train_graph, dtype=torch.float64).to_dense()
    for u, v in map(tuple, held):
        assert lap[u, v] == 0 and lap[v, u] == 0 and nl[u, v] == 0


def test_presence_negatives_are_true_non_edges(full_graph):
    s = split_link_presence(full_graph, 0.1, 0.1, seed=2)
    ref = full_graph.to_networkx()
    negatives = []
    for part in (s.train, s.val, s.test):
        assert int(part.labels.sum()) * 2 == len(part)  # balanced
        assert part.pairs.dtype == torch.int64 and part.pairs.shape == (2, len(part))
        negatives += pairs_of(part, 0)
    for u, v in negatives:
        assert u != v and not ref.has_edge(u, v) and not ref.has_edge(v, u)
    assert len({frozenset(p) for p in negatives}) == len(negatives)  # never repeated across splits


def test_direction_split_labels_and_excludes_reciprocal_links(full_graph):
    s = split_link_orientation(full_graph, 0.1, 0.1, seed=3)
    ref = full_graph.to_networkx()
    train_ref = s.train_graph.to_networkx()
    reciprocal = {frozenset((u, v)) for u, v in ref.edges() if u != v and ref.has_edge(v, u)}
    one_way = links_of(full_graph) - reciprocal
    assert len(reciprocal) == 40
    seen = []
    for part in (s.train, s.val, s.test):
        pos, neg = pairs_of(part, 1), pairs_of(part, 0)
        assert neg == [(v, u) for u, v in pos]  # (v, u) labelled 0 for each one-way u -> v
        for u, v in pos:
            assert ref.has_edge(u, v) and not ref.has_edge(v, u)
        seen += [frozenset(p) for p in pos]
    assert sorted(map(sorted, seen)) == sorted(map(sorted, one_way))  # each one-way link once
    for u, v in pairs_of(s.val, 1) + pairs_of(s.test, 1):
        assert not train_ref.has_edge(u, v) and not train_ref.has_edge(v, u)
    for link in reciprocal:  # excluded from the task, kept in the training graph
        u, v = tuple(link)
        assert train_ref.has_edge(u, v) and train_ref.has_edge(v, u)


def test_link_split_is_seeded(full_graph):
    a = split_link_presence(full_graph, 0.1, 0.1, seed=5)
    b = split_link_presence(full_graph, 0.1, 0.1, seed=5)
    c = split_link_presence(full_graph, 0.1, 0.1, seed=6)
    assert a.train_graph == b.train_graph and torch.equal(a.test.pairs, b.test.pairs)
    assert torch.equal(a.train.pairs, b.train.pairs) and not torch.equal(a.test.pairs, c.test.pairs)


def test_link_split_of_an_edgeless_graph_is_refused():
    # refused, not an empty split (issue 12: an empty split must never come back without a word)
    g = DirectedGraph.from_edges(torch.empty(2, 0, dtype=torch.int64), num_nodes=4)
    with pytest.raises(GraphInputError, match=r"graph has no link between distinct nodes"):
        split_link_presence(g, 0.2, 0.2, seed=0)


def test_link_split_with_zero_fractions_keeps_every_link_for_training():
    # asking for no val / test links is allowed and gives empty val / test splits
    g = DirectedGraph.from_edges([[0, 1, 2], [1, 2, 3]])
    s = split_link_orientation(g, 0.0, 0.0, seed=0)
    assert len(s.val) == len(s.test) == 0 and len(s.train) == 2 * 3


def test_orientation_split_of_a_graph_with_only_reciprocal_links_is_refused():
    g = DirectedGraph.from_edges([[0, 1, 1, 2], [1, 0, 2, 1]])
    with pytest.raises(GraphInputError, match=r"graph has no one-way link, so split_link_orientation has "
                                              r"nothing to split: 2 reciprocal links"):
        split_link_orientation(g, 0.1, 0.1, seed=0)


@pytest.mark.parametrize("split", [split_link_presence, split_link_orientation])
def test_link_split_fraction_that_rounds_to_no_link_is_refused(split):
    g = DirectedGraph.from_edges([[0, 1, 2, 4], [1, 2, 3, 5]], num_nodes=8)  # 4 one-way links
    with pytest.raises(GraphInputError, match=r"val_fraction = 0\.1 of the 4 eligible links rounds to 0 links; "
                                              r"raise val_fraction to at least 0\.125"):
        split(g, 0.1, 0.3, seed=0)
    with pytest.raises(GraphInputError, match=r"test_fraction = 0\.05 of the 4 eligible links rounds to 0"):
        split(g, 0.3, 0.05, seed=0)
    with pytest.raises(GraphInputError, match=r"take all 4 eligible links after rounding"):
        split(g, 0.45, 0.45, seed=0)


@pytest.mark.parametrize(
    "kwargs,message",
    [
        (dict(val_fraction=0.5, test_fraction=0.5), r"val_fraction \+ test_fraction must be below 1"),
        (dict(val_fraction=1.0), r"val_fraction must be a fraction in \[0, 1\); got 1.0"),
        (dict(graph=[[0, 1]]), r"graph must be a DirectedGraph; got list"),
    ],
)
def test_link_split_rejects_bad_input(full_graph, kwargs, message):
    args = dict(graph=full_graph, val_fraction=0.1, test_fraction=0.1, seed=0)
    args.update(kwargs)
    for split in (split_link_presence, split_link_orientation):
        with pytest.raises(GraphInputError, match=message):
            split(**args)


def test_presence_split_refuses_a_graph_too_dense_for_negatives():
    complete = DirectedGraph.from_networkx(nx.complete_graph(5))
    with pytest.raises(GraphInputError, match=r"graph has only 0 non-adjacent node pairs but split_link_presence needs 10"):
        split_link_presence(complete, 0.2, 0.2, seed=0)


# ---------------------------------------------------------------------- properties
from hypothesis import given  # noqa: E402
from hypothesis import strategies as st  # noqa: E402

from strategies import directed_graphs  # noqa: E402


@given(directed_graphs(max_nodes=12, max_edges=10), st.sampled_from(["presence", "orientation"]), st.integers(0, 3))
def test_property_no_held_out_pair_reaches_the_training_graph(graph, task, seed):
    # generated graphs with isolated nodes, self-loops, duplicates and reciprocal edges
    try:
        split = split_link_presence if task == "presence" else split_link_orientation
        s = split(graph, 0.3, 0.3, seed=seed)
    except GraphInputError as err:
        # the allowed refusals: too dense for balanced negatives, or a split that would be empty
        message = str(err)
        links = {(min(u, v), max(u, v)) for u, v in zip(graph.source.tolist(), graph.target.tolist()) if u != v}
        one_way = {(u, v) for u, v in links if not ((u, v) in set(zip(graph.source.tolist(), graph.target.tolist()))
                                                    and (v, u) in set(zip(graph.source.tolist(), graph.target.tolist())))}
        eligible = len(links) if task == "presence" else len(one_way)
        if "non-adjacent node pairs" in message:
            assert task == "presence"
        elif "rounds to 0 links" in message:
            assert round(0.3 * eligible) == 0 < eligible
        elif "nothing to split" in message or "no link between distinct nodes" in message:
            assert eligible == 0
        else:
            assert "leaving none for training" in message and 2 * round(0.3 * eligible) >= eligible
        return
    train = set(zip(s.train_graph.source.tolist(), s.train_graph.target.tolist()))
    full = set(zip(graph.source.tolist(), graph.target.tolist()))
    assert train <= full
    for part in (s.val, s.test):
        for (u, v), label in zip(part.pairs.t().tolist(), part.labels.tolist()):
            assert (u, v) not in train and (v, u) not in train
            if label == 0 and task == "presence":
                assert (u, v) not in full and (v, u) not in full and u != v
    kept_loops = {(u, v) for u, v in full if u == v}
    assert kept_loops <= train


def test_reverse_edge_lookup_matches_a_dictionary(full_graph):
    from phasorgraph.data.splits import _reverse_edges

    src, dst = full_graph.source.numpy(), full_graph.target.numpy()
    position = {(u, v): i for i, (u, v) in enumerate(zip(src.tolist(), dst.tolist()))}
    expected = [position.get((v, u), -1) for u, v in zip(src.tolist(), dst.tolist())]
    assert _reverse_edges(src, dst, full_graph.num_nodes).tolist() == expected

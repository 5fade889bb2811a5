"""Generated graphs: edge counts against the binomial law, flow ratios, exact pair sampling,
named families against networkx and closed forms, seeded determinism, bad input.

Tolerance for random counts: 5 standard deviations of the binomial law (common practice, no
source); every check uses a fixed seed, so the tests are deterministic.
"""

import itertools
import math

import networkx as nx
import numpy as np
import pytest
import scipy.stats
import torch

from phasorgraph import DirectedGraph, GraphInputError, magnetic_laplacian
from phasorgraph.data import (
    directed_block_model,
    directed_cycle,
    in_star,
    layered_flow_graph,
    out_star,
    random_out_graph,
)
from phasorgraph.data._pairs import (
    index_from_pair as _index_from_pair,
    num_pairs as _num_pairs,
    pair_from_index as _pair_from_index,
    sample_avoiding as _sample_avoiding,
    sample_distinct as _sample_distinct,
)

SIGMAS = 5.0  # tolerance in binomial standard deviations (common practice, no source)


def within_binomial(count, trials, p):
    """|count - trials p| <= 5 sd of Binomial(trials, p) (plus 0.5 for the discrete edge)."""
    sd = math.sqrt(trials * p * (1 - p))
    return abs(count - trials * p) <= SIGMAS * sd + 0.5


def block_counts(graph, labels, blocks):
    """Counts C[a, b] of edges from block a to block b."""
    a = labels[graph.source].numpy()
    b = labels[graph.target].numpy()
    counts = np.zeros((blocks, blocks), dtype=np.int64)
    np.add.at(counts, (a, b), 1)
    return counts


SIZES = [40, 70, 25]
DENSITY = np.array([[0.20, 0.05, 0.10], [0.05, 0.70, 0.02], [0.10, 0.02, 0.95]])
FLOW = np.array([[0.5, 0.8, 0.3], [0.2, 0.5, 0.9], [0.7, 0.1, 0.5]])


# ---------------------------------------------------------------------- pair numbering
@pytest.mark.parametrize("n", list(range(0, 13)) + [101, 400])
def test_pair_numbering_is_a_bijection_onto_all_pairs(n):
    # outside reference: itertools.combinations lists every unordered pair exactly once
    k = np.arange(_num_pairs(n))
    lo, hi = _pair_from_index(k, n)
    if n <= 12:
        assert sorted(zip(lo.tolist(), hi.tolist())) == list(itertools.combinations(range(n), 2))
    else:
        assert np.unique(lo * n + hi).size == k.size and (lo < hi).all() and hi.max() < n
    assert np.array_equal(_index_from_pair(hi, lo, n), k)


@pytest.mark.parametrize("m,k", [(6, 2), (6, 5)])  # sparse path and complement path
def test_distinct_sampling_is_uniform_over_subsets(m, k):
    # Pearson's chi-square goodness of fit (scipy.stats.chisquare) against the uniform law on
    # the C(m, k) subsets; p > 1e-6 is the acceptance level (common practice, no source)
    rng = np.random.default_rng(1)
    subsets = {s: i for i, s in enumerate(itertools.combinations(range(m), k))}
    draws = 6000
    counts = np.zeros(len(subsets))
    for _ in range(draws):
        s = _sample_distinct(rng, m, k)
        assert s.size == k and np.unique(s).size == k
        counts[subsets[tuple(s.tolist())]] += 1
    assert scipy.stats.chisquare(counts).pvalue > 1e-6


def test_sampling_in_a_complement_avoids_the_taken_values():
    rng = np.random.default_rng(2)
    taken = np.array([0, 3, 4, 9, 10, 17], dtype=np.int64)
    got = _sample_avoiding(rng, 20, 14, taken)
    assert sorted(got.tolist()) == sorted(set(range(20)) - set(taken.tolist()))
    with pytest.raises(GraphInputError, match="cannot draw 15 distinct pairs: only 14 are free"):
        _sample_avoiding(rng, 20, 15, taken)


# ---------------------------------------------------------------------- block model
def test_block_model_edge_counts_match_the_binomial_law():
    g, y = directed_block_model(SIZES, DENSITY, FLOW, seed=0)
    c = block_counts(g, y, 3)
    for a in range(3):
        for b in range(a, 3):
            trials = _num_pairs(SIZES[a]) if a == b else SIZES[a] * SIZES[b]
            joined = c[a, b] + (c[b, a] if a != b else 0)
            assert within_binomial(joined, trials, DENSITY[a, b]), (a, b, joined, trials * DENSITY[a, b])


def test_block_model_flow_ratio_matches_the_requested_one():
    sizes = [300, 300]
    flow = np.array([[0.5, 0.85], [0.15, 0.5]])
    g, y = directed_block_model(sizes, 0.05, flow, seed=3)
    c = block_counts(g, y, 2)
    between = c[0, 1] + c[1, 0]
    assert between > 1000
    assert within_binomial(c[0, 1], between, 0.85)
    # inside a block both directions are equally likely, and lo -> hi is as likely as hi -> lo
    inside = (y[g.source] == 0) & (y[g.target] == 0)
    up = int(((g.source < g.target) & inside).sum())
    assert within_binomial(up, int(inside.sum()), 0.5)


def test_block_model_is_simple_with_unit_weights_and_block_labels():
    g, y = directed_block_model(SIZES, DENSITY, FLOW, seed=4)
    assert g.num_nodes == sum(SIZES)
    assert y.dtype == torch.int64 and y.tolist() == [0] * 40 + [1] * 70 + [2] * 25
    assert not bool((g.source == g.target).any())  # no self-loops
    key = set((g.source * g.num_nodes + g.target).tolist())
    assert not key & set((g.target * g.num_nodes + g.source).tolist())  # no reciprocal edges
    assert torch.equal(g.weight, torch.ones(g.num_edges, dtype=torch.float64))


def test_complete_and_empty_blocks_are_exact():
    g, y = directed_block_model([5, 4], [[1.0, 0.0], [0.0, 1.0]], [[0.5, 0.5], [0.5, 0.5]], seed=0)
    und = nx.Graph(list(zip(g.source.tolist(), g.target.tolist())))
    # networkx reference: the disjoint union of complete graphs K5 and K4
    assert nx.is_isomorphic(und, nx.disjoint_union(nx.complete_graph(5), nx.complete_graph(4)))
    g0, _ = directed_block_model([7, 3], 0.0, [[0.5, 1.0], [0.0, 0.5]], seed=0)
    assert g0.num_edges == 0 and g0.num_nodes == 10
    g1, y1 = directed_block_model([3, 4], [[0.0, 1.0], [1.0, 0.0]], [[0.5, 1.0], [0.0, 0.5]], seed=0)
    # every edge of the complete bipartite graph, all pointing from block 0 to block 1
    assert g1.num_edges == 12 and bool((y1[g1.source] == 0).all()) and bool((y1[g1.target] == 1).all())


def test_noise_adds_the_requested_number_of_new_edges():
    g, y = directed_block_model([60, 60], [[0.1, 0.0], [0.0, 0.1]], [[0.5, 1.0], [0.0, 0.5]], seed=5)
    gn, _ = directed_block_model([60, 60], [[0.1, 0.0], [0.0, 0.1]], [[0.5, 1.0], [0.0, 0.5]], noise=0.25, seed=5)
    assert gn.num_edges == g.num_edges + round(0.25 * g.num_edges)
    lo = torch.minimum(gn.source, gn.target)
    hi = torch.maximum(gn.source, gn.target)
    assert torch.unique(lo * 120 + hi).numel() == gn.num_edges  # still no pair joined twice
    across = int((y[gn.source] != y[gn.target]).sum())
    assert across > 0  # noise reaches pairs the block model never joins


def test_block_model_is_seeded():
    a, _ = directed_block_model(SIZES, DENSITY, FLOW, noise=0.1, seed=11)
    b, _ = directed_block_model(SIZES, DENSITY, FLOW, noise=0.1, seed=11)
    c, _ = directed_block_model(SIZES, DENSITY, FLOW, noise=0.1, seed=12)
    assert a == b and a != c
    d, _ = directed_block_model(SIZES, DENSITY, FLOW, seed=np.random.default_rng(11))
    e, _ = directed_block_model(SIZES, DENSITY, FLOW, seed=11)
    assert d == e


def test_block_model_handles_a_large_sparse_graph():
    g, y = directed_block_model([20000, 30000], 1e-4, [[0.5, 0.6], [0.4, 0.5]], seed=0)
    trials = _num_pairs(50000)
    assert within_binomial(g.num_edges, trials, 1e-4)
    assert y.numel() == 50000


@pytest.mark.parametrize(
    "kwargs,message",
    [
        (dict(flow=[[0.4, 0.5], [0.5, 0.5]]), r"flow\[0, 0\] must be 0.5"),
        (dict(flow=[[0.5, 0.7], [0.5, 0.5]]), r"flow\[0, 1\] \+ flow\[1, 0\] must equal 1 .*got 0.7 \+ 0.5 = 1.2"),
        (dict(flow=[[0.5, 1.2], [-0.2, 0.5]]), r"flow\[0, 1\] must be a probability in \[0, 1\]; got 1.2"),
        (dict(flow=[0.5, 0.5]), r"flow must be a scalar or a \(2, 2\) matrix"),
        (dict(flow=[[0.5, np.nan], [0.5, 0.5]]), r"flow\[0, 1\] must be finite"),
        (dict(density=[[0.1, 0.2], [0.3, 0.1]]), r"density must be symmetric .*density\[0, 1\] = 0.2"),
        (dict(density=1.5), r"density\[0, 0\] must be a probability in \[0, 1\]; got 1.5"),
        (dict(sizes=[3, -1]), r"sizes must hold non-negative integers"),
        (dict(sizes=[]), r"sizes must be a non-empty 1-D sequence"),
        (dict(sizes=[2.5, 3]), r"sizes must hold non-negative integers"),
        (dict(noise=-0.1), r"noise must be a finite fraction >= 0"),
        (dict(seed="abc"), r"seed must be None, a non-negative int or a numpy Generator"),
        (dict(sizes=[3, 3], density=1.0, noise=0.5), r"noise asks for 8 extra edges but only 0 node pairs"),
    ],
)
def test_block_model_rejects_bad_input(kwargs, message):
    args = dict(sizes=[5, 6], density=0.3, flow=[[0.5, 0.9], [0.1, 0.5]])
    args.update(kwargs)
    with pytest.raises(GraphInputError, match=message):
        directed_block_model(**args)


# ---------------------------------------------------------------------- small families
def edge_set(g):
    return set(zip(g.source.tolist(), g.target.tolist()))


@pytest.mark.parametrize("n", [1, 2, 5])
def test_directed_cycle_matches_networkx(n):
    # networkx reference: cycle_graph with create_using=DiGraph orients i -> i + 1
    assert edge_set(directed_cycle(n)) == set(nx.cycle_graph(n, create_using=nx.DiGraph).edges()) | (
        {(0, 0)} if n == 1 else set()
    )


@pytest.mark.parametrize("n,q", [(5, 0.1), (8, 0.25)])
def test_directed_cycle_has_the_closed_form_magnetic_spectrum(n, q):
    # closed form (the directed_cycle docstring, src/phasorgraph/data/generators.py): eigenvalues 1 - cos(2 pi (k / n + q)), k = 0..n-1
    lam = np.linalg.eigvalsh(magnetic_laplacian(directed_cycle(n), q, dtype=torch.complex128).to_dense().numpy())
    expected = np.sort(1 - np.cos(2 * np.pi * (np.arange(n) / n + q)))
    np.testing.assert_allclose(lam, expected, atol=1e-12)


def test_stars_match_networkx():
    # networkx reference: star_graph(n - 1) has hub 0 joined to 1..n-1
    star = nx.star_graph(5)
    assert edge_set(out_star(6)) == {(0, v) for _, v in star.edges()}
    assert edge_set(in_star(6)) == {(v, 0) for _, v in star.edges()}
    assert out_star(1).num_edges == 0 and out_star(1).num_nodes == 1


def test_random_out_graph_has_exact_out_degree_and_uniform_targets():
    n, k = 200, 4
    g = random_out_graph(n, k, seed=0)
    assert g.num_edges == n * k  # distinct targets (duplicates would merge)
    assert torch.equal(torch.bincount(g.source, minlength=n), torch.full((n,), k))
    assert not bool((g.source == g.target).any())
    # the offset (target - source) mod n is uniform on 1..n-1 for uniform targets: chi-square
    # goodness of fit (scipy.stats.chisquare), accepted at p > 1e-6 (common practice, no source)
    big = random_out_graph(60, 20, seed=1)
    offsets = ((big.target - big.source) % 60).numpy()
    assert scipy.stats.chisquare(np.bincount(offsets, minlength=60)[1:]).pvalue > 1e-6
    assert random_out_graph(5, 4, seed=0).num_edges == 20  # k = n - 1: the complete digraph
    assert random_out_graph(5, 3, seed=9) == random_out_graph(5, 3, seed=9)


def test_layered_flow_graph_edges_run_between_adjacent_layers():
    sizes = [30, 40, 20]
    g, layer = layered_flow_graph(sizes, forward_prob=0.3, back_prob=0.05, seed=0)
    step = layer[g.target] - layer[g.source]
    assert bool(((step == 1) | (step == -1)).all())
    pairs = 30 * 40 + 40 * 20
    assert within_binomial(int((step == 1).sum()), pairs, 0.3)
    assert within_binomial(int((step == -1).sum()), pairs, 0.05)
    full, _ = layered_flow_graph([3, 4, 2], 1.0, 0.0, seed=0)
    assert full.num_edges == 3 * 4 + 4 * 2


@pytest.mark.parametrize(
    "call,message",
    [
        (lambda: directed_cycle(0), r"n must be an integer >= 1; got 0"),
        (lambda: out_star(2.0), r"n must be an integer >= 1; got 2.0"),
        (lambda: random_out_graph(5, 5), r"k must be at most n - 1 = 4"),
        (lambda: random_out_graph(5, -1), r"k must be an integer >= 0"),
        (lambda: layered_flow_graph([3, 3], 1.5), r"forward_prob must be a probability in \[0, 1\]; got 1.5"),
        (lambda: layered_flow_graph([[3, 3]], 0.5), r"layer_sizes must be a non-empty 1-D sequence"),
    ],
)
def test_small_families_reject_bad_input(call, message):
    with pytest.raises(GraphInputError, match=message):
        call()

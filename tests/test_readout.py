"""MomentReadout: per-graph moments against scipy.stats, guards, invariance, gradients, errors.

Reference: a per-graph Python loop with numpy.mean, scipy.stats.moment (central moments,
population form), scipy.stats.skew(bias=True) and scipy.stats.kurtosis(fisher=False,
bias=True) (Pearson's kurtosis), the definitions named in the layer's docstring.
"""

import numpy as np
import pytest
import scipy.stats
import torch
from hypothesis import given
from hypothesis import strategies as st

from phasorgraph import GraphInputError
from phasorgraph.nn import MomentReadout



def _reference(x, index, num_graphs, moments, normalized):
    out = np.zeros((num_graphs, moments, x.shape[1]))
    for g in range(num_graphs):
        rows = x[index == g]
        if len(rows) == 0:
            continue
        out[g, 0] = rows.mean(axis=0)
        if moments >= 2:
            out[g, 1] = scipy.stats.moment(rows, moment=2, axis=0)
        for k in range(3, moments + 1):
            if not normalized:
                out[g, k - 1] = scipy.stats.moment(rows, moment=k, axis=0)
            elif k == 3:
                out[g, k - 1] = scipy.stats.skew(rows, axis=0, bias=True)
            elif k == 4:
                out[g, k - 1] = scipy.stats.kurtosis(rows, axis=0, fisher=False, bias=True)
            else:
                out[g, k - 1] = scipy.stats.moment(rows, moment=k, axis=0) / scipy.stats.moment(rows, moment=2, axis=0) ** (k / 2)
    return out.reshape(num_graphs, -1)


def _batch(seed=0, sizes=(5, 3, 8, 2), channels=3):
    gen = torch.Generator().manual_seed(seed)
    index = torch.repeat_interleave(torch.arange(len(sizes)), torch.tensor(sizes))
    x = torch.randn(int(sum(sizes)), channels, generator=gen, dtype=torch.float64) * 2 + 1
    return x, index


@pytest.mark.parametrize("moments", [1, 2, 4, 5])
@pytest.mark.parametrize("normalized", [True, False])
def test_moments_match_scipy_stats(moments, normalized):
    x, index = _batch()
    got = MomentReadout(moments, normalized)(x, index)
    want = _reference(x.numpy(), index.numpy(), 4, moments, normalized)
    np.testing.assert_allclose(got.numpy(), want, rtol=1e-10, atol=1e-12)


@given(sizes=st.lists(st.integers(1, 6), min_size=1, max_size=4), seed=st.integers(0, 1000))
def test_moments_match_scipy_on_random_batches(sizes, seed):
    x, index = _batch(seed, sizes, 2)
    got = MomentReadout(4)(x, index, len(sizes))
    want = _reference(x.numpy(), index.numpy(), len(sizes), 4, True)
    # one-node graphs: scipy gives nan for 0/0 skewness, the layer defines it as 0
    want = np.where(np.isnan(want), 0.0, want)
    np.testing.assert_allclose(got.numpy(), want, rtol=1e-9, atol=1e-9)


def test_single_graph_when_index_is_none():
    x, _ = _batch()
    out = MomentReadout()(x)
    assert out.shape == (1, 12)
    np.testing.assert_allclose(out.numpy(), _reference(x.numpy(), np.zeros(len(x), int), 1, 4, True), rtol=1e-10)


def test_one_node_constant_and_empty_graphs_give_no_nan():
    x = torch.tensor([[3.0, 1.0], [0.7, 1.0], [0.7, 1.0], [0.7, 1.0], [2.0, -1.0], [5.0, 4.0]],
                     dtype=torch.float64, requires_grad=True)
    index = torch.tensor([0, 1, 1, 1, 3, 3])  # graph 0: one node, 1: constant, 2: empty
    out = MomentReadout(5)(x, index, num_graphs=4)
    assert torch.isfinite(out).all()
    assert out.shape == (4, 10)
    # one node: mean is the node, every other moment 0
    assert out[0].tolist() == [3.0, 1.0] + [0.0] * 8
    # constant (0.7 is not exact in binary, so the float mean is off by an ulp): moments >= 2 are 0
    torch.testing.assert_close(out[1, :2], torch.tensor([0.7, 1.0], dtype=torch.float64))
    assert out[1, 4:].abs().max() == 0
    assert out[2].abs().max() == 0
    out.sum().backward()
    assert torch.isfinite(x.grad).all()


def test_permutation_invariant():
    x, index = _batch(3)
    perm = torch.randperm(len(x), generator=torch.Generator().manual_seed(1))
    layer = MomentReadout(4)
    torch.testing.assert_close(layer(x[perm], index[perm]), layer(x, index), rtol=1e-10, atol=1e-12)


@pytest.mark.parametrize("normalized", [True, False])
def test_gradcheck(normalized):
    x, index = _batch(5, (4, 3), 2)
    x.requires_grad_(True)
    assert torch.autograd.gradcheck(lambda v: MomentReadout(4, normalized)(v, index), (x,))


def test_repr():
    assert repr(MomentReadout()) == "MomentReadout(moments=4)"
    assert repr(MomentReadout(3, normalized=False)) == "MomentReadout(moments=3, normalized=False)"


# ---------------------------------------------------------------------- bad input
@pytest.mark.parametrize("bad", [0, -1, 2.0, True, 2 ** 40])
def test_refuses_bad_moments(bad):
    with pytest.raises(GraphInputError, match=r"moments must be an integer in \[1, 16\]"):
        MomentReadout(bad)


def test_refuses_bad_features_and_index():
    layer = MomentReadout()
    with pytest.raises(GraphInputError, match=r"x must be a real floating tensor.*modulus"):
        layer(torch.zeros(3, 2, dtype=torch.complex128))
    with pytest.raises(GraphInputError, match=r"x must be a \(N, C\) tensor; got \(3,\)"):
        layer(torch.zeros(3))
    with pytest.raises(GraphInputError, match=r"x must have one row per entry of graph_index \(4\)"):
        layer(torch.zeros(3, 2), torch.tensor([0, 0, 1, 1]))
    with pytest.raises(GraphInputError, match=r"graph_index holds graph 2 but num_graphs is 2"):
        layer(torch.zeros(3, 2), torch.tensor([0, 1, 2]), num_graphs=2)
    with pytest.raises(GraphInputError, match=r"num_graphs must be None or 1 when graph_index is None"):
        layer(torch.zeros(3, 2), num_graphs=3)

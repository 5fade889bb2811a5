"""torch.compile support: the layers compile (default backend) without graph breaks and match eager.

References: the eager forward and backward of the same modules (the products are the
``phasorgraph::csr_*`` custom ops, whose eager results the other test files check against
dense numpy references); graph-break counts from ``torch._dynamo.explain``.
"""

from __future__ import annotations

import shutil

import pytest
import torch

from phasorgraph import DirectedGraph, operators
from phasorgraph.nn import (
    BandMix,
    ChebyshevFilter,
    DiffusionScattering,
    DiffusionWavelets,
    LearnedCharge,
    MagneticFilter,
    RenormalizedFilter,
    ScaleSelector,
)

dynamo = pytest.importorskip("torch._dynamo")


def _graph():
    return DirectedGraph.from_edges([[0, 1, 2, 3, 4, 5, 1, 6], [1, 2, 3, 4, 5, 0, 4, 2]])


class _AllLayers(torch.nn.Module):
    """Every operator-based layer on one graph: one compile covers them all."""

    def __init__(self):
        super().__init__()
        kw = dict(dtype=torch.float64)
        self.fixed = MagneticFilter(3, 4, order=3, charge=0.25, **kw)
        self.bank = MagneticFilter(3, 4, order=2, charge=[0.0, 0.2], **kw)
        self.learned = MagneticFilter(3, 4, order=2, charge=LearnedCharge(0.1), **kw)
        self.cheb = ChebyshevFilter(3, 4, order=3, **kw)
        self.renorm = RenormalizedFilter(3, 4, **kw)
        self.wavelets = DiffusionWavelets(2)
        self.scattering = DiffusionScattering(3, scales=2, order=2)
        self.selector = ScaleSelector(3, 2, **kw)
        self.bandmix = BandMix(3, 4, **kw)

    def forward(self, x, graph, lap, diffusion, walk):
        return (self.fixed(x, graph), self.bank(x, graph), self.learned(x, graph), self.cheb(x, lap, 2.0),
                self.renorm(x, graph), self.wavelets(x, diffusion), self.wavelets(x, walk),
                self.scattering(x, diffusion), self.selector(x, diffusion), self.bandmix(x, graph))


class _MagneticLayers(torch.nn.Module):
    """MagneticFilter with a fixed, a banked and a learned charge."""

    def __init__(self):
        super().__init__()
        kw = dict(dtype=torch.float64)
        self.fixed = MagneticFilter(3, 4, order=3, charge=0.25, **kw)
        self.bank = MagneticFilter(3, 4, order=2, charge=[0.0, 0.2], **kw)
        self.learned = MagneticFilter(3, 4, order=2, charge=LearnedCharge(0.1), **kw)

    def forward(self, x, graph, lap, diffusion, walk):
        return self.fixed(x, graph), self.bank(x, graph), self.learned(x, graph)


def _inputs():
    g = _graph()
    x = torch.randn(g.num_nodes, 3, dtype=torch.float64, generator=torch.Generator().manual_seed(0))
    ops = (operators.normalized_laplacian(g, dtype=torch.float64), operators.diffusion(g, dtype=torch.float64),
           operators.random_walk(g, dtype=torch.float64))
    return g, x, ops


def _loss(outs):
    return sum((o.abs() ** 2).sum() for o in outs)


def test_every_layer_traces_without_graph_breaks():
    g, x, ops = _inputs()
    model = _AllLayers()
    model(x, g, *ops)  # the graph's operators are built (once, eagerly) before tracing
    dynamo.reset()
    report = dynamo.explain(model)(x, g, *ops)
    assert report.graph_break_count == 0, [str(r.reason)[:200] for r in report.break_reasons]
    assert report.graph_count == 1


@pytest.mark.parametrize("backend", [
    "aot_eager",
    pytest.param("inductor", marks=pytest.mark.skipif(shutil.which("g++") is None and shutil.which("c++") is None,
                                                      reason="inductor's CPU code generation needs a C++ compiler")),
])
def test_compiled_model_matches_eager_forward_and_backward(backend):
    # aot_eager: dynamo, fake tensors and the custom ops' autograd formulas for every layer;
    # inductor (the default backend) on the magnetic layers only, to keep the suite's time
    g, x, ops = _inputs()
    model = _AllLayers() if backend == "aot_eager" else _MagneticLayers()
    xe = x.clone().requires_grad_()
    eager = model(xe, g, *ops)
    _loss(eager).backward()
    grads = {n: p.grad.clone() for n, p in model.named_parameters()}
    model.zero_grad()
    dynamo.reset()
    g.clear_cache()  # the first compiled call builds the operators itself (one eager break)
    compiled = torch.compile(model, backend=backend)
    xc = x.clone().requires_grad_()
    outs = compiled(xc, g, *ops)
    for a, b in zip(outs, eager):
        torch.testing.assert_close(a, b.detach(), rtol=1e-10, atol=1e-10)
    _loss(outs).backward()
    torch.testing.assert_close(xc.grad, xe.grad, rtol=1e-10, atol=1e-10)
    for n, p in model.named_parameters():
        torch.testing.assert_close(p.grad, grads[n], rtol=1e-10, atol=1e-10, msg=n)
    # a second call reuses the compiled code and the cached operators
    outs2 = compiled(x, g, *ops)
    for a, b in zip(outs2, eager):
        torch.testing.assert_close(a, b.detach(), rtol=1e-10, atol=1e-10)

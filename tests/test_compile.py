"""torch.compile support: every layer compiles and matches eager; graph breaks counted.

References: the eager forward and backward of the same modules (the products are the
``phasorgraph::csr_*`` custom ops, whose eager results the other test files check against
dense numpy references); graph-break counts from ``torch._dynamo.explain``. Every public layer
of ``phasorgraph.nn`` is in one of the models below (checked against ``nn.__all__``), and a
model of the same layers on a one-process ``GraphShard`` (world size 1, no process group:
the sharded operators and the halo-exchange autograd functions, without communication).
"""

from __future__ import annotations

import shutil

import pytest
import torch

from phasorgraph import DirectedGraph, operators
from phasorgraph import nn as pgnn
from phasorgraph.distributed import GraphShard, partition_nodes
from phasorgraph.nn import (
    BandMix,
    Cardioid,
    ChebyshevFilter,
    ComplexToReal,
    DiffusionScattering,
    DiffusionWavelets,
    LearnedCharge,
    MagneticFilter,
    ModReLU,
    MomentReadout,
    RealPartGate,
    RenormalizedFilter,
    ScaleSelector,
    SpectralMultiplier,
    SplitReLU,
    ZReLU,
)

dynamo = pytest.importorskip("torch._dynamo")
from torch._dynamo.testing import CompileCounterWithBackend  # noqa: E402


def _graph():
    return DirectedGraph.from_edges([[0, 1, 2, 3, 4, 5, 1, 6], [1, 2, 3, 4, 5, 0, 4, 2]])


class _AllLayers(torch.nn.Module):
    """Every layer on one graph: one compile covers them all (graph_index=None readout)."""

    def __init__(self):
        super().__init__()
        kw = dict(dtype=torch.float64)
        self.fixed = MagneticFilter(3, 4, order=3, charge=0.25, **kw)
        self.bank = MagneticFilter(3, 4, order=2, charge=[0.0, 0.2], **kw)
        self.learned = MagneticFilter(3, 4, order=2, charge=LearnedCharge(0.1), phase="relative", **kw)
        self.cheb = ChebyshevFilter(3, 4, order=3, **kw)
        self.renorm = RenormalizedFilter(3, 4, **kw)
        self.wavelets = DiffusionWavelets(2)
        self.scattering = DiffusionScattering(3, scales=2, order=2)
        self.selector = ScaleSelector(3, 2, **kw)
        self.bandmix = BandMix(3, 4, charge=0.25, **kw)
        self.spectral = SpectralMultiplier(3, 4, knots=5, **kw)
        self.spectral_free = SpectralMultiplier(3, 4, knots="per_eigenvalue", num_nodes=7, **kw)
        self.modrelu = ModReLU(4, **kw)
        self.gates = torch.nn.ModuleList([SplitReLU(), ZReLU(), Cardioid(), RealPartGate()])
        self.heads = torch.nn.ModuleList([ComplexToReal(m) for m in ("cartesian", "modulus", "polar")])
        self.moments = MomentReadout(4)

    def forward(self, x, graph, lap, diffusion, walk, mlap):
        fixed = self.fixed(x, graph)
        h = self.modrelu(fixed)
        gated = [gate(h) for gate in self.gates]
        reals = [head(z) for head, z in zip(self.heads, gated)]
        return (fixed, self.bank(x, graph), self.learned(x, graph), self.cheb(x, lap, 2.0),
                self.renorm(x, graph), self.wavelets(x, diffusion), self.wavelets(x, walk),
                self.scattering(x, diffusion), self.selector(x, diffusion), self.bandmix(x, graph),
                self.spectral(x, lap), self.spectral_free(x, mlap),
                *gated, *reals, self.moments(reals[0]))


class _ShardLayers(torch.nn.Module):
    """The graph- and operator-based layers on a GraphShard and its sharded operators."""

    def __init__(self):
        super().__init__()
        kw = dict(dtype=torch.float64)
        self.fixed = MagneticFilter(3, 4, order=3, charge=0.25, **kw)
        self.learned = MagneticFilter(3, 4, order=2, charge=LearnedCharge(0.1), **kw)
        self.cheb = ChebyshevFilter(3, 4, order=3, max_eigenvalue=2.0, **kw)
        self.renorm = RenormalizedFilter(3, 4, **kw)
        self.wavelets = DiffusionWavelets(2)
        self.scattering = DiffusionScattering(3, scales=2, order=1, out_channels=4, **kw)
        self.bandmix = BandMix(3, 4, charge=0.25, **kw)

    def forward(self, x, shard, lap, diffusion, walk):
        return (self.fixed(x, shard), self.learned(x, shard), self.cheb(x, lap), self.renorm(x, shard),
                self.wavelets(x, diffusion), self.wavelets(x, walk), self.scattering(x, diffusion),
                self.bandmix(x, shard), walk.matmul_add(x, 2 * x, alpha=0.5, shift=0.25, beta=-1.0))


class _GroupedReadout(torch.nn.Module):
    def __init__(self):
        super().__init__()
        self.moments = MomentReadout(4)

    def forward(self, x, graph_index):
        return self.moments(x, graph_index, 2)


class _MagneticLayers(torch.nn.Module):
    """MagneticFilter with a fixed, a banked and a learned charge."""

    def __init__(self):
        super().__init__()
        kw = dict(dtype=torch.float64)
        self.fixed = MagneticFilter(3, 4, order=3, charge=0.25, **kw)
        self.bank = MagneticFilter(3, 4, order=2, charge=[0.0, 0.2], **kw)
        self.learned = MagneticFilter(3, 4, order=2, charge=LearnedCharge(0.1), **kw)

    def forward(self, x, graph, lap, diffusion, walk, mlap):
        return self.fixed(x, graph), self.bank(x, graph), self.learned(x, graph)


def _inputs():
    g = _graph()
    x = torch.randn(g.num_nodes, 3, dtype=torch.float64, generator=torch.Generator().manual_seed(0))
    # operators made here (not by the graph) keep their Fourier basis when the graph's cache is cleared
    ops = (operators.normalized_laplacian(g, dtype=torch.float64), operators.diffusion(g, dtype=torch.float64),
           operators.random_walk(g, dtype=torch.float64), operators.magnetic_laplacian(g, 0.25, dtype=torch.complex128))
    return g, x, ops


def _shard_inputs():
    g, x, _ = _inputs()
    shard = GraphShard.from_graph(g, partition_nodes(g, 1))  # no process group: one part, no halo
    ops = tuple(shard.operator(b, dtype=torch.float64) for b in
                (operators.normalized_laplacian, operators.diffusion, operators.random_walk))
    return shard, x[shard.nodes].contiguous(), ops


def _loss(outs):
    return sum((o.abs() ** 2).sum() for o in outs)


def test_the_models_hold_every_public_layer():
    covered = {type(m).__name__ for model in (_AllLayers(), _ShardLayers(), _GroupedReadout()) for m in model.modules()}
    layers = {name for name in pgnn.__all__ if isinstance(getattr(pgnn, name), type)
              and issubclass(getattr(pgnn, name), torch.nn.Module)}
    assert layers <= covered, layers - covered


def test_every_layer_traces_without_graph_breaks():
    g, x, ops = _inputs()
    model = _AllLayers()
    model(x, g, *ops)  # the graph's operators (and a Fourier basis) are built once, eagerly, before tracing
    dynamo.reset()
    report = dynamo.explain(model)(x, g, *ops)
    assert report.graph_break_count == 0, [str(r.reason)[:200] for r in report.break_reasons]
    assert report.graph_count == 1


def test_grouped_readout_breaks_once_to_check_graph_index_and_matches_eager():
    # MomentReadout reads graph_index's values once (smallest and largest id, to refuse a bad
    # index): one graph break, so two graphs; everything else is traced
    x = torch.randn(9, 4, dtype=torch.float64, generator=torch.Generator().manual_seed(1))
    index = torch.tensor([0, 0, 0, 1, 1, 1, 1, 0, 1])
    model = _GroupedReadout()
    dynamo.reset()
    counter = CompileCounterWithBackend("aot_eager")
    compiled = torch.compile(model, backend=counter)
    xe, xc = x.clone().requires_grad_(), x.clone().requires_grad_()
    eager, out = model(xe, index), compiled(xc, index)
    torch.testing.assert_close(out, eager.detach(), rtol=1e-12, atol=1e-12)
    assert counter.frame_count == 2
    eager.sum().backward()
    out.sum().backward()
    torch.testing.assert_close(xc.grad, xe.grad, rtol=1e-12, atol=1e-12)


def _eager_run(model, x, graph, ops):
    """The eager reference: outputs, the input (with its gradient) and the parameters' gradients."""
    xe = x.clone().requires_grad_()
    eager = model(xe, graph, *ops)
    _loss(eager).backward()
    grads = {n: p.grad.clone() for n, p in model.named_parameters()}
    model.zero_grad()
    return eager, xe, grads


def _assert_matches_eager(model, outs, xc, eager, xe, grads):
    """Compiled outputs and every gradient equal the eager ones to 1e-10 (float64)."""
    for a, b in zip(outs, eager):
        torch.testing.assert_close(a, b.detach(), rtol=1e-10, atol=1e-10)
    _loss(outs).backward()
    torch.testing.assert_close(xc.grad, xe.grad, rtol=1e-10, atol=1e-10)
    for n, p in model.named_parameters():
        torch.testing.assert_close(p.grad, grads[n], rtol=1e-10, atol=1e-10, msg=n)


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
    eager, xe, grads = _eager_run(model, x, g, ops)
    dynamo.reset()
    g.clear_cache()  # the first compiled call builds the operators itself (one eager break)
    compiled = torch.compile(model, backend=backend)
    xc = x.clone().requires_grad_()
    outs = compiled(xc, g, *ops)
    _assert_matches_eager(model, outs, xc, eager, xe, grads)
    # a second call reuses the compiled code and the cached operators (x requiring grad as in
    # the first call: no recompilation)
    outs2 = compiled(x.clone().requires_grad_(), g, *ops)
    for a, b in zip(outs2, eager):
        torch.testing.assert_close(a, b.detach(), rtol=1e-10, atol=1e-10)
    if backend == "aot_eager":
        # a NaN feature: the same rows are NaN compiled and eager (SpectralMultiplier puts it back
        # on its component without reading a value)
        bad = x.clone()
        bad[0, 1] = float("nan")
        for a, b in zip(compiled(bad.requires_grad_(), g, *ops), model(bad, g, *ops)):
            torch.testing.assert_close(a, b.detach(), rtol=1e-10, atol=1e-10, equal_nan=True)


def test_compiled_model_on_a_graph_shard_matches_eager_forward_and_backward():
    # the sharded operators (halo exchange and fused products as autograd functions) and the
    # layers on a GraphShard, compiled with aot_eager, against the same model run eagerly; the
    # shard's operators exist (built by the eager run), so the model is one graph: no break
    shard, x, ops = _shard_inputs()
    model = _ShardLayers()
    eager, xe, grads = _eager_run(model, x, shard, ops)
    dynamo.reset()
    counter = CompileCounterWithBackend("aot_eager")
    compiled = torch.compile(model, backend=counter)
    xc = x.clone().requires_grad_()
    outs = compiled(xc, shard, *ops)
    assert counter.frame_count == 1
    _assert_matches_eager(model, outs, xc, eager, xe, grads)

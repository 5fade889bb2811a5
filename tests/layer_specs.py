"""The table of layer specs that drives the generic layer tests, and the generic checks.

Each :class:`LayerSpec` says how to build a layer (with factory kwargs), how to make its
inputs on a small fixed graph, and (optionally) a dense NumPy reference of its forward. The
generic checks (``GENERIC_CHECKS``) run on every spec: reference forward (float64, and float32
against the same reference), device/dtype factory kwargs, repr, pickle / torch.save and
state_dict round trips, non-contiguous input, gradcheck in float64 over the features and every
parameter (learned charges included), and permutation equivariance (PyTorch's test_modules.py
does the same kind of sweep; the structure here is our own).

To add layers: append ``LayerSpec`` entries with a new ``family`` and, in that family's test
file, parametrize over ``specs_for("<family>")`` and ``GENERIC_CHECKS`` exactly as
tests/test_filters.py does (four lines).

References used below (each also named beside its formula):

* normalized / combinatorial Laplacian of As, renormalized adjacency (Kipf & Welling 2017) and
  the normalized magnetic Laplacian (Zhang et al. 2021, as written in src/phasorgraph/operators.py), all built
  densely in NumPy straight from the formulas, independent of phasorgraph.operators;
* spectral filters evaluated with ``numpy.linalg.eigh`` and ``numpy.polynomial.chebyshev.chebval``
  on the eigenvalues, or ``numpy.interp`` for knot multipliers;
* elementwise formulas of the complex activations from their papers;
* band-pass layers (family "bandpass"): dense wavelets, learned bands, scattering coefficients
  and band-mixing channels from numpy.linalg.matrix_power (tests/dense.py; Coifman & Maggioni
  2006, Gama et al. 2019, Gao et al. 2019, Tong et al. 2021, Min et al. 2020), moments from
  scipy.stats.

The dense formulas live once, in tests/dense.py; this module only wires them to the layers.
"""

from __future__ import annotations

import io
import pickle
from dataclasses import dataclass, field
from typing import Callable, Optional

import numpy as np
import pytest
import torch

import dense
from phasorgraph import (
    DirectedGraph,
    combinatorial_laplacian,
    diffusion,
    magnetic_laplacian,
    normalized_laplacian,
    random_walk,
    renormalized_adjacency,
)
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

__all__ = ["LayerSpec", "SPECS", "specs_for", "GENERIC_CHECKS", "reference_graph", "np_normalized_magnetic_laplacian",
           "np_chebyshev_filter", "np_weights", "np_bias", "features"]



# ---------------------------------------------------------------------- the fixed small graph
def reference_graph():
    """(DirectedGraph, A numpy) on 7 nodes: one-way and reciprocal edges, a self-loop, an isolated node.

    Weights lie in (0, 1], the regime of phase="difference".
    """
    rng = np.random.default_rng(2024)
    n = 7
    A = np.zeros((n, n))
    pairs = [(0, 1), (1, 2), (2, 0), (2, 3), (3, 4), (4, 5), (5, 3), (1, 4), (0, 5)]
    for u, v in pairs:
        A[u, v] = rng.uniform(0.2, 1.0)
    A[4, 3] = 0.35            # reciprocal with a different weight
    A[1, 1] = 0.5             # a self-loop
    # node 6 is isolated
    return DirectedGraph.from_scipy(A), A


def features(n: int, width: int, dtype: torch.dtype, complex_values: bool, seed: int = 0) -> torch.Tensor:
    """Seeded (n, width) features; complex of the matching precision when asked."""
    gen = torch.Generator().manual_seed(seed)
    x = torch.randn(n, width, generator=gen, dtype=dtype)
    if complex_values:
        x = torch.complex(x, torch.randn(n, width, generator=gen, dtype=dtype))
    return x


# ---------------------------------------------------------------------- numpy references (tests/dense.py)
np_normalized_magnetic_laplacian = dense.normalized_magnetic_laplacian
np_normalized_laplacian = dense.normalized_laplacian
np_combinatorial_laplacian = dense.combinatorial_laplacian
np_renormalized_adjacency = dense.renormalized_adjacency
np_chebyshev_filter = dense.chebyshev_filter


def np_weights(t: torch.Tensor, complex_pairs: bool) -> np.ndarray:
    a = t.detach().cpu().numpy()
    return a[..., 0] + 1j * a[..., 1] if complex_pairs else a


def np_bias(module) -> np.ndarray | float:
    if module.bias is None:
        return 0.0
    return np_weights(module.bias, getattr(module, "complex_weights", False))


# ---------------------------------------------------------------------- references per layer
def _ref_chebyshev(build_L, max_eigenvalue: Optional[float] = None):
    def ref(m, x, A):
        L = build_L(A)
        lm = max_eigenvalue if max_eigenvalue is not None else float(np.linalg.eigvalsh(L)[-1])
        return np_chebyshev_filter(L, x, np_weights(m.weight, m.complex_weights), lm) + np_bias(m)
    return ref


def _ref_renormalized(m, x, A):
    return np_renormalized_adjacency(A) @ x @ m.weight.detach().numpy() + np_bias(m)


def _ref_spectral(build_L):
    def ref(m, x, A):
        L = build_L(A)
        lam, U = np.linalg.eigh(L)                       # source: numpy.linalg.eigh
        W = m.weight.detach().numpy()
        if m.per_eigenvalue:
            g = W                                         # (N, C_in, C_out), one value per eigenvalue
        else:
            # source: numpy.interp (piecewise-linear interpolation between the knots)
            g = np.empty((len(lam),) + W.shape[1:])
            for i in range(W.shape[1]):
                for o in range(W.shape[2]):
                    g[:, i, o] = np.interp(lam, m.knots, W[:, i, o])
        xh = U.conj().T @ x
        yh = np.einsum("ni,nio->no", xh, g)
        return U @ yh + np_bias(m)
    return ref


def _ref_magnetic(m, x, A):
    q = np.atleast_1d(m.charge.detach().numpy().astype(np.float64))
    W = np_weights(m.weight, m.complex_weights)
    width = m.out_channels // len(q)
    blocks = []
    for g, qg in enumerate(q):
        L = np_normalized_magnetic_laplacian(A, float(qg), m.phase)
        # max_eigenvalue = 2: the normalized magnetic Laplacian has spectrum in [0, 2]
        blocks.append(np_chebyshev_filter(L, x, W[:, :, g * width:(g + 1) * width], 2.0))
    return np.concatenate(blocks, axis=1) + np_bias(m)


def _ref_modrelu(m, z, A):
    # Arjovsky et al. 2016: ReLU(|z| + b) z / |z|, 0 at z = 0
    r = np.abs(z)
    return np.where(r > 0, np.maximum(r + m.bias.detach().numpy(), 0) * z / np.where(r > 0, r, 1), 0)


_ELEMENTWISE = {
    # Trabelsi et al. 2018
    "split_relu": lambda z: np.maximum(z.real, 0) + 1j * np.maximum(z.imag, 0),
    # Guberman 2016: keep the first quadrant
    "zrelu": lambda z: np.where((z.real >= 0) & (z.imag >= 0), z, 0),
    # Virtue et al. 2017: (1 + cos(angle z)) z / 2
    "cardioid": lambda z: 0.5 * (1 + np.cos(np.angle(z))) * z,
    "real_part_gate": lambda z: np.where(z.real >= 0, z, 0),
    "cartesian": lambda z: np.concatenate([z.real, z.imag], axis=-1),
    "modulus": lambda z: np.abs(z),
    "polar": lambda z: np.concatenate([np.abs(z), np.angle(z)], axis=-1),
}


def _dense_diffusion(kind: str, A):
    """The dense operator a band-pass spec is given: lazy diffusion T, its magnetic form at q = 0.2,
    or the lazy walk P (tests/dense.py)."""
    ref = dense.DenseGraph(A)
    return {"real": ref.T(), "magnetic": ref.T(0.2), "walk": ref.P()}[kind]


def _diffusion_operand(kind: str):
    def operand(g, p):
        if kind == "magnetic":
            return diffusion(g, charge=0.2, dtype=_cplx(p))
        return diffusion(g, dtype=p) if kind == "real" else random_walk(g, dtype=p)
    return operand


def _ref_wavelets(kind):
    def ref(m, x, A):
        bands = dense.wavelet_bands(_dense_diffusion(kind, A), m.scales)
        return np.stack([B @ x for B in bands], axis=1)
    return ref


def _ref_selector(m, x, A):
    bands = dense.selector_bands(_dense_diffusion("real", A), m.selection.detach().numpy())
    return np.stack([B @ x for B in bands], axis=1)


def _ref_scattering(kind, order, lowpass):
    def ref(m, x, A):
        c = dense.scattering(_dense_diffusion(kind, A), x, m.scales, order, lowpass)
        c = c.reshape(c.shape[0], -1)
        if m.weight is None:
            return c
        return c @ m.weight.detach().numpy().T + np_bias(m)
    return ref


def _ref_band_mix(m, x, A):
    # channels from tests/dense.py; maps and attention as the layer's docstring writes them
    z = dense.band_mix_channels(A, x, m.low_pass_steps, m.scales)
    h = np.einsum("ncf,cof->nco", z, m.weight.detach().numpy()) + np_bias(m)
    a = m.attention.detach().numpy()
    score = h @ a[0] + (h.mean(axis=1) @ a[1])[:, None]
    score = np.where(score > 0, score, 0.2 * score)                 # LeakyReLU(0.2)
    alpha = np.exp(score - score.max(axis=1, keepdims=True))
    alpha /= alpha.sum(axis=1, keepdims=True)                       # softmax over channels
    return (alpha[..., None] * h).sum(axis=1)


def _ref_moments(m, x, A):
    # scipy.stats: mean, population variance, skew(bias=True), Pearson kurtosis(bias=True)
    import scipy.stats

    cols = [x.mean(axis=0), scipy.stats.moment(x, moment=2, axis=0),
            scipy.stats.skew(x, axis=0, bias=True), scipy.stats.kurtosis(x, axis=0, fisher=False, bias=True)]
    return np.stack(cols[:m.moments], axis=0).reshape(1, -1)


# ---------------------------------------------------------------------- the spec table
@dataclass(frozen=True)
class LayerSpec:
    """How to build, feed and check one layer configuration.

    Attributes:
        name: test id.
        family: which test file runs it ("filters", "magnetic", "complex", ...).
        build: ``build(**factory_kwargs) -> nn.Module`` (factory kwargs: device, dtype).
        in_width: feature width of x.
        complex_input: x complex (else real).
        operand: ``operand(graph, precision) -> op or graph`` passed after x, or None for
            elementwise layers called as ``module(x)``.
        reference: ``reference(module, x_numpy, A_numpy) -> numpy output`` or None.
        equivariant: whether permuting the nodes must permute the output (False for the free
            per-eigenvalue multiplier, whose values are tied to eigenvalue indices).
        repr_contains: strings the repr must contain.
    """

    name: str
    family: str
    build: Callable
    in_width: int
    complex_input: bool = False
    operand: Optional[Callable] = None
    reference: Optional[Callable] = None
    equivariant: bool = True
    repr_contains: tuple = field(default_factory=tuple)

    def __str__(self) -> str:
        return self.name


def _real(t):
    return {torch.complex64: torch.float32, torch.complex128: torch.float64}.get(t, t)


def _cplx(t):
    return {torch.float32: torch.complex64, torch.float64: torch.complex128}[_real(t)]


_N = 7


def _modrelu(**kw):
    m = ModReLU(4, **kw)
    with torch.no_grad():
        if m.bias.device.type != "meta":
            m.bias.copy_(torch.tensor([-0.5, 0.3, -1.2, 0.0], dtype=m.bias.dtype))
    return m


SPECS = [
    # ------------------------------------------------------------------ filters
    LayerSpec("chebyshev_normalized", "filters", lambda **kw: ChebyshevFilter(3, 4, order=3, **kw), 3,
              operand=lambda g, p: normalized_laplacian(g, dtype=p),
              reference=_ref_chebyshev(np_normalized_laplacian),
              repr_contains=("ChebyshevFilter(3, 4, order=3)",)),
    LayerSpec("chebyshev_combinatorial_nobias", "filters",
              lambda **kw: ChebyshevFilter(3, 2, order=2, bias=False, **kw), 3, complex_input=True,
              operand=lambda g, p: combinatorial_laplacian(g, dtype=p),
              reference=_ref_chebyshev(np_combinatorial_laplacian), repr_contains=("bias=False",)),
    LayerSpec("chebyshev_order0", "filters", lambda **kw: ChebyshevFilter(3, 2, order=0, **kw), 3,
              operand=lambda g, p: normalized_laplacian(g, dtype=p),
              reference=_ref_chebyshev(np_normalized_laplacian), repr_contains=("order=0",)),
    LayerSpec("chebyshev_magnetic_complex_weights", "filters",
              lambda **kw: ChebyshevFilter(2, 3, order=2, complex_weights=True, max_eigenvalue=2.0, **kw), 2,
              complex_input=True,
              operand=lambda g, p: magnetic_laplacian(g, 0.2, dtype=_cplx(p)),
              reference=_ref_chebyshev(lambda A: np_normalized_magnetic_laplacian(A, 0.2), max_eigenvalue=2.0),
              repr_contains=("complex_weights=True", "max_eigenvalue=2.0")),
    LayerSpec("renormalized_graph", "filters", lambda **kw: RenormalizedFilter(3, 5, **kw), 3,
              operand=lambda g, p: g, reference=_ref_renormalized,
              repr_contains=("RenormalizedFilter(3, 5)",)),
    LayerSpec("renormalized_operator_narrow", "filters",
              lambda **kw: RenormalizedFilter(5, 2, bias=False, **kw), 5, complex_input=True,
              operand=lambda g, p: renormalized_adjacency(g, dtype=p), reference=_ref_renormalized,
              repr_contains=("bias=False",)),
    LayerSpec("spectral_knots", "filters", lambda **kw: SpectralMultiplier(3, 4, knots=5, **kw), 3,
              operand=lambda g, p: normalized_laplacian(g, dtype=p),
              reference=_ref_spectral(np_normalized_laplacian), repr_contains=("knots=5",)),
    LayerSpec("spectral_positions_magnetic", "filters",
              lambda **kw: SpectralMultiplier(2, 3, knots=[0.0, 0.4, 1.1, 2.0], bias=False, **kw), 2,
              operand=lambda g, p: magnetic_laplacian(g, 0.3, dtype=_cplx(p)),
              reference=_ref_spectral(lambda A: np_normalized_magnetic_laplacian(A, 0.3)),
              repr_contains=("knots=4",)),
    LayerSpec("spectral_per_eigenvalue", "filters",
              lambda **kw: SpectralMultiplier(2, 3, knots="per_eigenvalue", num_nodes=_N, **kw), 2,
              complex_input=True,
              operand=lambda g, p: normalized_laplacian(g, dtype=p),
              reference=_ref_spectral(np_normalized_laplacian), equivariant=False,
              repr_contains=("per_eigenvalue", "num_nodes=7")),
    # ------------------------------------------------------------------ magnetic
    LayerSpec("magnetic_fixed", "magnetic", lambda **kw: MagneticFilter(3, 4, order=2, charge=0.25, **kw), 3,
              operand=lambda g, p: g, reference=_ref_magnetic,
              repr_contains=("MagneticFilter(3, 4, order=2, charge=0.25)",)),
    LayerSpec("magnetic_bank_complex_weights", "magnetic",
              lambda **kw: MagneticFilter(2, 6, order=3, charge=[0.0, 0.1, 0.3], complex_weights=True, **kw), 2,
              complex_input=True, operand=lambda g, p: g, reference=_ref_magnetic,
              repr_contains=("charge=[0.0, 0.1, 0.3]", "complex_weights=True")),
    LayerSpec("magnetic_learned", "magnetic",
              lambda **kw: MagneticFilter(3, 4, order=2, charge=LearnedCharge(start=0.15), **kw), 3,
              complex_input=True, operand=lambda g, p: g, reference=_ref_magnetic,
              repr_contains=("charge=LearnedCharge(start=0.15), charge_now=0.15",)),
    LayerSpec("magnetic_learned_bank_sign", "magnetic",
              lambda **kw: MagneticFilter(2, 4, order=1, charge=LearnedCharge(start=[0.05, 0.3]), phase="sign",
                                          bias=False, **kw), 2,
              operand=lambda g, p: g, reference=_ref_magnetic,
              repr_contains=("phase='sign'", "bias=False")),
    # ------------------------------------------------------------------ complex
    LayerSpec("modrelu", "complex", _modrelu, 4, complex_input=True, reference=_ref_modrelu,
              repr_contains=("ModReLU(4)",)),
] + [
    LayerSpec(name, "complex", (lambda cls: (lambda **kw: cls()))(cls), 4, complex_input=True,
              reference=(lambda f: (lambda m, z, A: f(z)))(_ELEMENTWISE[name]), repr_contains=(cls.__name__,))
    for name, cls in [("split_relu", SplitReLU), ("zrelu", ZReLU), ("cardioid", Cardioid),
                      ("real_part_gate", RealPartGate)]
] + [
    LayerSpec(f"complex_to_real_{mode}", "complex", (lambda mode: (lambda **kw: ComplexToReal(mode)))(mode), 4,
              complex_input=True, reference=(lambda f: (lambda m, z, A: f(z)))(_ELEMENTWISE[mode]),
              repr_contains=("ComplexToReal",))
    for mode in ("cartesian", "modulus", "polar")
] + [
    # ------------------------------------------------------------------ band-pass
    LayerSpec(f"wavelets_{kind}", "bandpass", (lambda **kw: DiffusionWavelets(2)), 3,
              complex_input=(kind == "magnetic"), operand=_diffusion_operand(kind), reference=_ref_wavelets(kind),
              repr_contains=("DiffusionWavelets(scales=2)",))
    for kind in ("real", "magnetic", "walk")
] + [
    LayerSpec("scale_selector", "bandpass", lambda **kw: ScaleSelector(4, 2, **kw), 3,
              operand=_diffusion_operand("real"), reference=_ref_selector, repr_contains=("ScaleSelector(",)),
    LayerSpec("scattering_order1", "bandpass", lambda **kw: DiffusionScattering(3, scales=2), 3,
              operand=_diffusion_operand("real"), reference=_ref_scattering("real", 1, True),
              repr_contains=("DiffusionScattering(3, scales=2)",)),
    LayerSpec("scattering_order2_mixed_magnetic", "bandpass",
              lambda **kw: DiffusionScattering(3, scales=2, order=2, out_channels=4, **kw), 3,
              operand=_diffusion_operand("magnetic"), reference=_ref_scattering("magnetic", 2, True),
              repr_contains=("order=2", "out_channels=4")),
    LayerSpec("scattering_walk_no_lowpass", "bandpass",
              lambda **kw: DiffusionScattering(3, scales=1, order=2, lowpass=False), 3,
              operand=_diffusion_operand("walk"), reference=_ref_scattering("walk", 2, False),
              repr_contains=("lowpass=False",)),
    LayerSpec("band_mix", "bandpass", lambda **kw: BandMix(3, 4, (0, 1, 2), 2, **kw), 3,
              operand=lambda g, p: g, reference=_ref_band_mix,
              repr_contains=("BandMix(3, 4, low_pass_steps=(0, 1, 2), scales=2)",)),
    LayerSpec("moment_readout", "bandpass", lambda **kw: MomentReadout(4), 3, reference=_ref_moments,
              equivariant=False, repr_contains=("MomentReadout(",)),
]


def specs_for(family: str) -> list:
    return [s for s in SPECS if s.family == family]


# ---------------------------------------------------------------------- generic checks
def _args(spec: LayerSpec, precision: torch.dtype, x: Optional[torch.Tensor] = None, graph=None):
    graph = reference_graph()[0] if graph is None else graph
    if x is None:
        x = features(graph.num_nodes, spec.in_width, precision, spec.complex_input)
    return (x,) if spec.operand is None else (x, spec.operand(graph, precision))


def _build(spec: LayerSpec, seed: int = 0, **kw):
    torch.manual_seed(seed)
    return spec.build(**kw)


def check_reference(spec: LayerSpec):
    """Forward in float64 against the dense NumPy reference of the spec."""
    if spec.reference is None:
        return
    m = _build(spec, dtype=torch.float64)
    args = _args(spec, torch.float64)
    out = m(*args)
    A = reference_graph()[1]
    expected = spec.reference(m, args[0].numpy(), A)
    got = out.detach().numpy()
    assert got.shape == np.shape(expected)
    np.testing.assert_allclose(got, expected, rtol=1e-9, atol=1e-10)
    # float32 parameters give float32 / complex64 results close to the same reference
    m32 = _build(spec)
    m32.load_state_dict({k: v.float() for k, v in m.state_dict().items()})
    x32 = args[0].to(torch.complex64 if args[0].is_complex() else torch.float32)
    out32 = m32(*_args(spec, torch.float32, x=x32))
    assert out32.dtype in (torch.float32, torch.complex64)
    np.testing.assert_allclose(out32.detach().numpy(), expected, rtol=1e-4, atol=1e-4)


def check_factory_kwargs(spec: LayerSpec):
    """dtype and device reach every parameter (PyTorch factory-kwargs convention)."""
    m = _build(spec, dtype=torch.float64)
    for name, p in m.named_parameters():
        assert p.dtype == torch.float64, name
    m = _build(spec, device="meta")
    for name, p in m.named_parameters():
        assert p.device.type == "meta", name
    m = _build(spec, device="cpu", dtype=torch.float32)
    for name, p in m.named_parameters():
        assert p.device.type == "cpu" and p.dtype == torch.float32, name


def check_repr(spec: LayerSpec):
    text = repr(_build(spec))
    for piece in spec.repr_contains:
        assert piece in text, (piece, text)


def check_pickle_and_state_dict(spec: LayerSpec):
    """pickle / torch.save round trips and load_state_dict into a differently seeded layer."""
    m = _build(spec, seed=0, dtype=torch.float64)
    args = _args(spec, torch.float64)
    out = m(*args)                      # fills any operator cache before pickling
    clone = pickle.loads(pickle.dumps(m))
    torch.testing.assert_close(clone(*args), out)
    buf = io.BytesIO()
    torch.save(m, buf)
    buf.seek(0)
    torch.testing.assert_close(torch.load(buf, weights_only=False)(*args), out)
    other = _build(spec, seed=1, dtype=torch.float64)
    buf = io.BytesIO()
    torch.save(m.state_dict(), buf)
    buf.seek(0)
    other.load_state_dict(torch.load(buf, weights_only=True))   # plain tensors and numbers only
    torch.testing.assert_close(other(*args), out)
    for value in m.state_dict().values():
        assert value.layout == torch.strided   # no sparse tensor is ever a buffer/parameter


def check_non_contiguous(spec: LayerSpec):
    m = _build(spec, dtype=torch.float64)
    x, *rest = _args(spec, torch.float64)
    x_nc = x.T.contiguous().T
    assert not x_nc.is_contiguous()
    torch.testing.assert_close(m(x_nc, *rest), m(x, *rest))


def check_gradcheck(spec: LayerSpec):
    """torch.autograd.gradcheck in float64 over x and every parameter (learned charges included)."""
    m = _build(spec, dtype=torch.float64)
    x, *rest = _args(spec, torch.float64)
    names = [n for n, _ in m.named_parameters()]
    params = [p.detach().clone().requires_grad_(True) for _, p in m.named_parameters()]
    x = x.detach().clone().requires_grad_(True)

    def fn(x, *ps):
        return torch.func.functional_call(m, dict(zip(names, ps)), (x, *rest))

    assert torch.autograd.gradcheck(fn, (x, *params), eps=1e-6, atol=1e-5, rtol=1e-4)


def check_permutation_equivariance(spec: LayerSpec):
    """Relabelling the nodes (graph.permute(perm), x[perm]) relabels the output rows."""
    if not spec.equivariant:
        return
    graph = reference_graph()[0]
    m = _build(spec, dtype=torch.float64)
    x, *rest = _args(spec, torch.float64, graph=graph)
    perm = torch.tensor([3, 6, 0, 5, 1, 4, 2])
    out = m(x, *rest)
    out_perm = m(*_args(spec, torch.float64, x=x[perm], graph=graph.permute(perm)))
    torch.testing.assert_close(out_perm, out[perm])


GENERIC_CHECKS = [check_reference, check_factory_kwargs, check_repr, check_pickle_and_state_dict,
                  check_non_contiguous, check_gradcheck, check_permutation_equivariance]

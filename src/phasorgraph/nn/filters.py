r"""Low-pass and polynomial spectral filters: ChebyshevFilter, RenormalizedFilter, SpectralMultiplier.

All three are ``torch.nn.Module`` layers with ``forward(x, op)`` where ``op`` is a
:class:`phasorgraph.SparseOperator` (RenormalizedFilter also takes a DirectedGraph). Features
are ``(N, C_in)`` real or complex; the output is complex when the features, the operator or the
weights are complex.

Weights are real by default; one real ``W_k`` then acts on the real and the imaginary part of
complex features alike. ``complex_weights=True`` (ChebyshevFilter) stores fully complex weights
as real pairs ``(..., 2)`` so that ``module.double()``, ``module.to(dtype)`` and
DistributedDataParallel treat them like any other float parameter; ``torch.view_as_complex``
turns them into the complex weights.

No layer registers a sparse tensor as a buffer or parameter: operators built from a graph are
kept with the graph (``graph.operator(builder, ...)``); what a layer derives from an operator it
is given (largest eigenvalue, Fourier basis) sits in one weak cache shared by all layers
(``nn._layer.derived``), and no forward pass changes an operator.
"""

from __future__ import annotations

import math
import numbers
from typing import Optional, Sequence

import numpy as np
import scipy.sparse as sp
from scipy.sparse.csgraph import connected_components
import torch
from torch import nn

from .._limits import physical_memory
from ..errors import GraphInputError
from ..operators import renormalized_adjacency
from ..sparse import SparseOperator
from ..spectral import DENSE_NODE_LIMIT, fourier_basis, largest_eigenvalue
from ._chebyshev import ChebyshevBase
from ._layer import (COMPLEX_OF, bilinear, derived, check_count, check_features, check_graph_like, check_operator, empty_output,
                     factory_kwargs, make_parameters, mix, output_dtype, reset_uniform)

__all__ = ["ChebyshevFilter", "RenormalizedFilter", "SpectralMultiplier"]


def _check_max_eigenvalue(value, name: str = "max_eigenvalue") -> Optional[float]:
    if value is None:
        return None
    if isinstance(value, bool) or not isinstance(value, numbers.Real) or not math.isfinite(float(value)) \
            or float(value) <= 0:
        raise GraphInputError(f"{name} must be a finite number > 0 or None (computed from op); got {value!r}")
    return float(value)


def _chebyshev_rescaling(op: SparseOperator, max_eigenvalue: Optional[float]) -> tuple:
    r"""``(alpha, beta)`` with :math:`\tilde L = \alpha L + \beta I = 2 (L - a) / (b - a) - I`.

    ``a`` is the lower end of the operator's known spectrum interval (``op.spectrum[0]``: 0 for
    Laplacians, -1 for renormalized adjacencies, :math:`-d_{max}` for a magnetic adjacency), so
    an indefinite operator is mapped onto [-1, 1] as well, instead of being rescaled as if its
    spectrum started at 0 (its terms would then grow geometrically with k). ``b`` is
    ``max_eigenvalue`` when given, else the largest eigenvalue of ``op`` (computed once per
    operator and kept in the layers' shared weak cache; the operator is not changed). An operator with ``b = a`` (the zero Laplacian of a graph
    without edges) gives :math:`\tilde L = -I`.
    """
    if op.spectrum is None:
        raise GraphInputError(
            f"op (kind {op.kind!r}) carries no spectrum interval, so ChebyshevFilter cannot map its "
            f"eigenvalues onto [-1, 1]; build it with SparseOperator(..., spectrum=(lower, upper)) holding "
            f"every eigenvalue (lower = 0 for a Laplacian), or use a builder of phasorgraph.operators, "
            f"which sets it"
        )
    a = float(op.spectrum[0])
    if max_eigenvalue is None:
        # computed once per operator and kept in the layers' shared weak cache: op is not changed
        b = derived(op, ("max_eigenvalue",), lambda: largest_eigenvalue(op, remember=False))
    else:
        b = float(max_eigenvalue)
    if b < a - 1e-12 * max(1.0, abs(a)):
        raise GraphInputError(
            f"max_eigenvalue {b:.6g} lies below the lower end {a:.6g} of op's spectrum interval "
            f"{op.spectrum} (kind {op.kind!r}); pass a max_eigenvalue in [{a:.6g}, {op.spectrum[1]:.6g}]"
        )
    width = b - a
    if width <= 1e-12 * max(1.0, abs(a), abs(b)):
        return 2.0, -1.0 - 2.0 * a  # L = a I: L~ = -I
    return 2.0 / width, -(b + a) / width


class ChebyshevFilter(ChebyshevBase):
    r"""Chebyshev polynomial filter :math:`Y = \sum_{k=0}^{K} T_k(\tilde L)\, X W_k + b`.

    :math:`\tilde L = 2 (L - a) / (\lambda_{max} - a) - I` maps the spectrum
    :math:`[a, \lambda_{max}]` of L onto [-1, 1], with a the lower end of the operator's known
    spectrum interval (``op.spectrum[0]``): 0 for Laplacians, so :math:`\tilde L = 2 L /
    \lambda_{max} - I`; -1 for the renormalized adjacency; :math:`-d_{max}` for a magnetic
    adjacency. An operator without a spectrum interval is refused. The terms follow the recursion
    :math:`T_0 = X`, :math:`T_1 = \tilde L X`, :math:`T_k = 2 \tilde L T_{k-1} - T_{k-2}`
    (Defferrard et al. 2016; recursion as in Hammond et al. 2011). K sparse products per
    forward, K more in backward (the Hermitian kernel), memory O(nnz + K N C_in).

    :math:`\lambda_{max}` comes from, in this order: the ``max_eigenvalue`` argument of ``forward``,
    the ``max_eigenvalue`` given to the constructor, or
    :func:`phasorgraph.spectral.largest_eigenvalue` (computed once per operator and kept in the
    layers' shared weak cache; the operator itself is not changed). Pass ``max_eigenvalue=2`` for normalized Laplacians
    (their spectrum lies in [0, 2]) to skip the eigenvalue computation. An operator whose largest
    eigenvalue equals the lower end a (the Laplacian of a graph without edges) gives
    :math:`\tilde L = -I`.

    Args:
        in_channels: C_in.
        out_channels: C_out.
        order: K >= 0, the polynomial degree; the layer has K + 1 weight matrices.
        bias: learn an additive bias (default True).
        complex_weights: fully complex W_k and bias (default False: real weights, one W_k for
            the real and imaginary parts of complex features; a real bias adds to the real part).
        max_eigenvalue: optional fixed :math:`\lambda_{max} > 0` (e.g. 2.0 for normalized operators).
        device, dtype: factory kwargs for the parameters (dtype float32 or float64; complex
            weights use the matching complex precision).

    Shape:
        x: (N, C_in) real or complex. op: (N, N) real symmetric or Hermitian SparseOperator.
        Output: (N, C_out); real when x, op and the weights are all real, complex otherwise.

    Attributes:
        weight: (K + 1, C_in, C_out) real; with ``complex_weights`` (K + 1, C_in, C_out, 2) real
            pairs (``torch.view_as_complex(weight)`` is the complex weight).
            Init: U(-s, s), s = 1 / sqrt((K + 1) C_in); complex: real and imaginary parts
            U(-s / sqrt 2, s / sqrt 2), the same E|w|^2.
        bias: (C_out,) (or (C_out, 2) pairs), same distribution; None when ``bias=False``.

    References:
        M. Defferrard, X. Bresson, P. Vandergheynst, NeurIPS 2016. D. K. Hammond,
        P. Vandergheynst, R. Gribonval, Applied and Computational Harmonic Analysis 2011.

    Example:
        >>> import torch
        >>> from phasorgraph import DirectedGraph, normalized_laplacian
        >>> g = DirectedGraph.from_edges([[0, 1, 2], [1, 2, 0]])
        >>> layer = ChebyshevFilter(4, 8, order=2, max_eigenvalue=2.0)
        >>> layer(torch.randn(3, 4), normalized_laplacian(g)).shape
        torch.Size([3, 8])
    """

    def __init__(self, in_channels: int, out_channels: int, order: int, bias: bool = True,
                 complex_weights: bool = False, *, max_eigenvalue: Optional[float] = None, device=None,
                 dtype=None):
        super().__init__(in_channels, out_channels, order, bias=bias, complex_weights=complex_weights,
                         device=device, dtype=dtype)
        self.max_eigenvalue = _check_max_eigenvalue(max_eigenvalue)
        self.reset_parameters()

    def _repr_options(self):
        return () if self.max_eigenvalue is None else (f"max_eigenvalue={self.max_eigenvalue}",)

    def forward(self, x: torch.Tensor, op: SparseOperator, max_eigenvalue: Optional[float] = None) -> torch.Tensor:
        """Filter ``x`` (N, C_in) with the operator ``op``; ``max_eigenvalue`` overrides the stored value."""
        precision, device = self.weight.dtype, self.weight.device
        op = check_operator(op, precision, device, layer="ChebyshevFilter")
        if not op.hermitian:
            raise GraphInputError(
                f"op must be real symmetric or Hermitian for ChebyshevFilter (its max_eigenvalue and cheap "
                f"backward rely on it); got kind {op.kind!r} with hermitian=False"
            )
        x = check_features(x, op.num_rows, self.in_channels, precision, device)
        lam = _check_max_eigenvalue(max_eigenvalue, "max_eigenvalue (forward)")
        if lam is None:
            lam = self.max_eigenvalue
        if op.num_nodes == 0:
            return empty_output(x, self.out_channels, output_dtype(x, op, self._weights()), self.parameters())
        # L~ = 2 (L - a) / (lambda_max - a) - I on the operator's spectrum interval [a, lambda_max]
        alpha, beta = _chebyshev_rescaling(op, lam)
        return self._filter(x, [(op, alpha, beta)])


# ---------------------------------------------------------------------- renormalized
class RenormalizedFilter(nn.Module):
    r"""One renormalized-adjacency product and a linear map, :math:`Y = \hat A X W + b`.

    :math:`\hat A = \tilde D^{-1/2} (A_s + I) \tilde D^{-1/2}` (Kipf & Welling 2017), from
    :func:`phasorgraph.operators.renormalized_adjacency`. Given a DirectedGraph, the operator is
    built once per graph and kept with it (``graph.operator``); given a SparseOperator it is used
    as is. The operator must be real: for complex (magnetic) operators use
    :class:`ChebyshevFilter` or :class:`~phasorgraph.nn.MagneticFilter`. The product runs on the
    narrower side (``X W`` first when C_out < C_in).

    Args:
        in_channels: C_in.
        out_channels: C_out.
        bias: learn an additive bias (default True).
        device, dtype: factory kwargs (float32 or float64).

    Shape:
        x: (N, C_in) real or complex (real weights act on both parts). Output: (N, C_out).

    Attributes:
        weight: (C_in, C_out), U(-s, s) with s = 1 / sqrt(C_in).
        bias: (C_out,), same distribution; None when ``bias=False``.

    References:
        T. N. Kipf and M. Welling, ICLR 2017.

    Example:
        >>> import torch
        >>> from phasorgraph import DirectedGraph
        >>> g = DirectedGraph.from_edges([[0, 1], [1, 2]])
        >>> RenormalizedFilter(4, 2)(torch.randn(3, 4), g).shape
        torch.Size([3, 2])
    """

    def __init__(self, in_channels: int, out_channels: int, bias: bool = True, *, device=None, dtype=None):
        super().__init__()
        self.in_channels = check_count("in_channels", in_channels)
        self.out_channels = check_count("out_channels", out_channels)
        make_parameters(self, (self.in_channels, self.out_channels), bias, factory_kwargs(device, dtype))
        self.reset_parameters()

    def reset_parameters(self) -> None:
        """U(-s, s) with s = 1 / sqrt(in_channels) for weight and bias."""
        reset_uniform(self, 1.0 / math.sqrt(self.in_channels))

    def extra_repr(self) -> str:
        return f"{self.in_channels}, {self.out_channels}" + (", bias=False" if self.bias is None else "")

    def _operator(self, op_or_graph):
        precision, device = self.weight.dtype, self.weight.device
        if not hasattr(op_or_graph, "operator"):   # an operator, not a graph-like object
            if not all(hasattr(op_or_graph, a) for a in ("matmul", "hermitian", "kind", "num_rows")):
                raise GraphInputError(
                    f"op_or_graph must be a SparseOperator or a DirectedGraph (or another graph-like object); got "
                    f"{type(op_or_graph).__name__}"
                )
            if op_or_graph.is_complex:
                raise GraphInputError(
                    f"op must be real for RenormalizedFilter (the renormalized adjacency); got "
                    f"{op_or_graph.dtype} (kind {op_or_graph.kind!r}); use ChebyshevFilter or "
                    f"MagneticFilter for complex operators"
                )
            if not hasattr(op_or_graph, "matmul"):
                raise GraphInputError(
                    f"op_or_graph must be a SparseOperator or a DirectedGraph (or another graph-like object); got "
                    f"{type(op_or_graph).__name__}"
                )
            return check_operator(op_or_graph, precision, device, layer="RenormalizedFilter")
        graph = check_graph_like(op_or_graph, "RenormalizedFilter")
        return graph.operator(renormalized_adjacency, dtype=precision, device=device)

    def forward(self, x: torch.Tensor, op_or_graph) -> torch.Tensor:
        """``op @ x @ weight + bias``; ``op_or_graph`` a real SparseOperator or a DirectedGraph."""
        op = self._operator(op_or_graph)
        x = check_features(x, op.num_rows, self.in_channels, self.weight.dtype, self.weight.device)
        if op.num_nodes == 0:
            return empty_output(x, self.out_channels, output_dtype(x, self.weight), self.parameters())
        if self.out_channels < self.in_channels:
            out = op.matmul(mix(x, self.weight))
        else:
            out = mix(op.matmul(x), self.weight)
        return out if self.bias is None else out + self.bias


# ---------------------------------------------------------------------- spectral multiplier
PER_EIGENVALUE = "per_eigenvalue"


def _cached_basis(op: SparseOperator, dtype: torch.dtype, device, max_nodes: int):
    """(eigenvalues float64 CPU, eigenvectors in ``dtype`` on ``device``), one eigh per operator."""
    lam, U = derived(op, ("fourier_basis",), lambda: fourier_basis(op, max_nodes=max_nodes))
    return lam, derived(op, ("fourier_basis", dtype, str(device)), lambda: U.to(device=device, dtype=dtype))


def _components(op: SparseOperator, device) -> tuple:
    """((N,) int64 connected-component label of each node in the pattern of ``op`` on ``device``,
    the number of components), kept like the basis.

    An operator with a dense low-rank term couples every node: one component.
    """
    labels = derived(op, ("components",), lambda: _component_labels(op))
    count = derived(op, ("components", "count"), lambda: int(labels.max()) + 1 if labels.numel() else 0)
    return derived(op, ("components", str(device)), lambda: labels.to(device)), count


def _component_labels(op: SparseOperator) -> torch.Tensor:
    n = op.num_rows
    if op.low_rank is not None:
        return torch.zeros(n, dtype=torch.int64)
    m = op.matrix.to("cpu")
    crow, col = m.crow_indices().numpy(), m.col_indices().numpy()
    pattern = sp.csr_matrix((np.ones(col.size, dtype=np.int8), col, crow), shape=(n, n))
    return torch.as_tensor(connected_components(pattern, directed=False)[1].astype(np.int64))


def _poison_components(out: torch.Tensor, bad_rows: torch.Tensor, op: SparseOperator) -> torch.Tensor:
    """NaN on every row of ``out`` whose connected component holds a row in ``bad_rows`` (N,) bool.

    The dense Fourier basis mixes all nodes (a product ``0 * NaN`` is NaN), so the filter runs
    on x with its non-finite entries set to 0 and the garbage is put back, as NaN, exactly on
    the components it reaches through the operator: no other component sees it. Shapes never
    depend on the data (torch.compile traces it without a break).
    """
    labels, count = _components(op, out.device)
    hit = torch.zeros(count, dtype=out.real.dtype, device=out.device).index_add_(0, labels, bad_rows.to(out.real.dtype))
    rows = (hit > 0).index_select(0, labels)
    return torch.where(rows.unsqueeze(1), torch.full_like(out, float("nan")), out)


def _hat_basis(lam: torch.Tensor, knots: Sequence[float]) -> torch.Tensor:
    """(N, K) piecewise-linear interpolation weights: g(lam_n) = sum_k B[n, k] g_k (np.interp)."""
    k = len(knots)
    lam = lam.clamp(knots[0], knots[-1])
    knots = torch.tensor(knots, dtype=torch.float64)
    right = torch.searchsorted(knots, lam, right=True).clamp(1, k - 1)
    left = right - 1
    t = (lam - knots[left]) / (knots[right] - knots[left])
    B = torch.zeros(lam.numel(), k, dtype=lam.dtype)
    rows = torch.arange(lam.numel())
    B[rows, left] = 1 - t
    B[rows, right] += t
    return B


class SpectralMultiplier(nn.Module):
    r"""Filter in the Fourier basis: :math:`Y = U\, [\,g_{io}(\lambda) \odot (U^H X)\,]\, + b`.

    With :math:`L = U \operatorname{diag}(\lambda) U^H` the eigendecomposition of a Hermitian
    operator, output channel o is
    :math:`y_o = \sum_i U \operatorname{diag}(g_{io}(\lambda)) U^H x_i` (Bruna et al. 2014).

    * Interpolated (``knots`` an int or a sequence): each multiplier :math:`g_{io}` is the
      piecewise-linear interpolant of K learned values at fixed knot positions over
      ``interval`` (``numpy.interp`` semantics). The knots live on the eigenvalue axis, not on
      eigenvalue indices, so one layer applies to graphs of any size.
    * Free (``knots="per_eigenvalue"``, ``num_nodes=N``): one learned value per eigenvalue, in
      ascending order, for one fixed graph of N nodes. With repeated eigenvalues this variant
      depends on the eigenbasis numpy returns; the interpolated one does not.

    Small graphs only: the Fourier basis is a dense N x N matrix from ``numpy.linalg.eigh``
    (O(N^3) once per operator, cached per operator object; O(N^2 C) per forward). Operators
    with more than ``max_nodes`` nodes are refused with a clear error; use ChebyshevFilter on
    large graphs.

    Args:
        in_channels: C_in.
        out_channels: C_out.
        knots: int K >= 2 (K evenly spaced knots over ``interval``), a strictly increasing
            sequence of >= 2 knot positions, or ``"per_eigenvalue"``.
        interval: (low, high) eigenvalue range covered by the knots (default (0, 2), the
            spectrum of normalized Laplacians). Eigenvalues outside it (beyond a 1e-6 relative
            tolerance) are refused.
        num_nodes: N, required for (and only used by) ``knots="per_eigenvalue"``.
        bias: learn an additive bias (default True).
        max_nodes: largest accepted N (default ``phasorgraph.spectral.DENSE_NODE_LIMIT`` = 4096).
        device, dtype: factory kwargs (float32 or float64).

    Shape:
        x: (N, C_in) real or complex; op: Hermitian (N, N) SparseOperator. Output (N, C_out),
        complex when x or op is complex.

    Attributes:
        weight: (K, C_in, C_out) multiplier values at the knots (or (N, C_in, C_out) per
            eigenvalue), U(-s, s) with s = 1 / sqrt(C_in).
        bias: (C_out,), same distribution; None when ``bias=False``.

    References:
        J. Bruna, W. Zaremba, A. Szlam, Y. LeCun, ICLR 2014.

    Example:
        >>> import torch
        >>> from phasorgraph import DirectedGraph, normalized_laplacian
        >>> op = normalized_laplacian(DirectedGraph.from_edges([[0, 1, 2], [1, 2, 3]]))
        >>> SpectralMultiplier(2, 3, knots=5)(torch.randn(4, 2), op).shape
        torch.Size([4, 3])
    """

    def __init__(self, in_channels: int, out_channels: int, knots, *, interval: Sequence[float] = (0.0, 2.0),
                 num_nodes: Optional[int] = None, bias: bool = True, max_nodes: int = DENSE_NODE_LIMIT,
                 device=None, dtype=None):
        super().__init__()
        self.in_channels = check_count("in_channels", in_channels)
        self.out_channels = check_count("out_channels", out_channels)
        self.max_nodes = check_count("max_nodes", max_nodes)
        try:
            low, high = (float(v) for v in interval)
        except (TypeError, ValueError, RuntimeError, NotImplementedError):
            raise GraphInputError(f"interval must be a pair (low, high) of numbers; got {interval!r}") from None
        if not (math.isfinite(low) and math.isfinite(high) and low < high):
            raise GraphInputError(f"interval must be a finite pair with low < high; got {interval!r}")
        self.interval = (low, high)
        if isinstance(knots, str):
            if knots != PER_EIGENVALUE:
                raise GraphInputError(
                    f"knots must be an int >= 2, a strictly increasing sequence of positions, or "
                    f"{PER_EIGENVALUE!r}; got {knots!r}"
                )
            if num_nodes is None:
                raise GraphInputError(f"num_nodes is required with knots={PER_EIGENVALUE!r} (one value per eigenvalue)")
            self.num_nodes = check_count("num_nodes", num_nodes)
            if self.num_nodes > self.max_nodes:
                raise GraphInputError(
                    f"num_nodes = {self.num_nodes} exceeds max_nodes = {self.max_nodes}: SpectralMultiplier "
                    f"builds a dense N x N Fourier basis and is for small graphs only"
                )
            self.knots = PER_EIGENVALUE
            size = self.num_nodes
        else:
            if isinstance(knots, numbers.Integral) and not isinstance(knots, bool):
                count = check_count("knots", knots, minimum=2)
                if count * self.in_channels * self.out_channels * 8 > physical_memory():
                    raise GraphInputError(f"knots = {count} needs ({count}, {self.in_channels}, {self.out_channels}) "
                                          f"multiplier values, more than this machine's memory holds; use fewer knots")
                positions = tuple(low + (high - low) * j / (count - 1) for j in range(count))
            else:
                try:
                    positions = tuple(float(v) for v in knots)
                except (TypeError, ValueError, RuntimeError, NotImplementedError):
                    raise GraphInputError(
                        f"knots must be an int >= 2, a strictly increasing sequence of positions, or "
                        f"{PER_EIGENVALUE!r}; got {knots!r}"
                    ) from None
                if len(positions) < 2 or any(not b > a for a, b in zip(positions, positions[1:])) \
                        or not all(math.isfinite(p) for p in positions):
                    raise GraphInputError(f"knots must hold >= 2 finite, strictly increasing positions; got {knots!r}")
                self.interval = (positions[0], positions[-1])
            self.knots = positions
            self.num_nodes = None
            size = len(positions)
        make_parameters(self, (size, self.in_channels, self.out_channels), bias, factory_kwargs(device, dtype))
        self.reset_parameters()

    def reset_parameters(self) -> None:
        """U(-s, s) with s = 1 / sqrt(in_channels) for the multiplier values and the bias."""
        reset_uniform(self, 1.0 / math.sqrt(self.in_channels))

    @property
    def per_eigenvalue(self) -> bool:
        return self.knots == PER_EIGENVALUE

    def extra_repr(self) -> str:
        if self.per_eigenvalue:
            s = f"{self.in_channels}, {self.out_channels}, knots={PER_EIGENVALUE!r}, num_nodes={self.num_nodes}"
        else:
            s = f"{self.in_channels}, {self.out_channels}, knots={len(self.knots)}, interval={self.interval}"
        if self.bias is None:
            s += ", bias=False"
        if self.max_nodes != DENSE_NODE_LIMIT:
            s += f", max_nodes={self.max_nodes}"
        return s

    def multipliers(self, eigenvalues: torch.Tensor) -> torch.Tensor:
        """The multipliers g_io at the given eigenvalues, shape (N, C_in, C_out) (interpolated only)."""
        if self.per_eigenvalue:
            return self.weight
        B = _hat_basis(torch.as_tensor(eigenvalues, dtype=torch.float64).cpu(), self.knots)
        B = B.to(device=self.weight.device, dtype=self.weight.dtype)
        return torch.einsum("nk,kio->nio", B, self.weight)

    def forward(self, x: torch.Tensor, op: SparseOperator) -> torch.Tensor:
        precision, device = self.weight.dtype, self.weight.device
        op = check_operator(op, precision, device, layer="SpectralMultiplier")
        if not op.hermitian:
            raise GraphInputError(f"op must be Hermitian for SpectralMultiplier; got kind {op.kind!r} with hermitian=False")
        n = op.num_rows
        if n > self.max_nodes:
            raise GraphInputError(
                f"op has {n} nodes but SpectralMultiplier builds a dense N x N Fourier basis and accepts "
                f"at most max_nodes = {self.max_nodes}; use ChebyshevFilter on large graphs"
            )
        if self.per_eigenvalue and n != self.num_nodes:
            raise GraphInputError(
                f"op has {n} nodes but this per-eigenvalue SpectralMultiplier was built for "
                f"num_nodes = {self.num_nodes}; use interpolated knots for graphs of other sizes"
            )
        x = check_features(x, n, self.in_channels, precision, device)
        if n == 0:
            return empty_output(x, self.out_channels, output_dtype(x, op, self.weight), self.parameters())
        basis_dtype = COMPLEX_OF[precision] if op.is_complex else precision
        lam, U = _cached_basis(op, basis_dtype, device, self.max_nodes)
        if not self.per_eigenvalue and n:
            low, high = self.interval
            tol = 1e-6 * max(1.0, abs(low), abs(high))
            lo, hi = derived(op, ("fourier_basis", "ends"), lambda: (float(lam[0]), float(lam[-1])))
            if lo < low - tol or hi > high + tol:
                raise GraphInputError(
                    f"op has eigenvalues in [{lo:.4g}, {hi:.4g}] but the knots cover "
                    f"interval = ({low}, {high}); build the layer with a wider interval"
                )
        # non-finite entries are filtered as 0 and put back as NaN on their components below
        # (always, without reading a value: nothing here breaks a compiled graph)
        finite = torch.isfinite(x)
        x_in = torch.where(finite, x, torch.zeros_like(x))
        Uh = U.conj().T if U.is_complex() else U.T
        xh = bilinear(torch.matmul, Uh, x_in)                    # (N, C_in)
        if self.per_eigenvalue:
            yh = bilinear(lambda a, b: torch.bmm(a.unsqueeze(1), b).squeeze(1), xh, self.weight)
        else:
            B = derived(op, ("hat_basis", self.knots), lambda: _hat_basis(lam, self.knots))
            B = B.to(device=device, dtype=precision)                           # (N, K)
            z = (B.unsqueeze(2) * xh.unsqueeze(1)).reshape(n, -1)              # (N, K C_in)
            yh = bilinear(torch.matmul, z, self.weight.reshape(-1, self.out_channels))
        out = bilinear(torch.matmul, U, yh)
        # garbage in stays visible where it belongs: its own component only
        out = _poison_components(out, ~finite.all(dim=1), op)
        return out if self.bias is None else out + self.bias

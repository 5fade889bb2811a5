r"""MagneticFilter: Chebyshev filters on the normalized magnetic Laplacian, fixed, banked or learned charge."""

from __future__ import annotations

import math
import numbers
from typing import Sequence, Union

import torch
from torch import nn

from ..errors import GraphInputError
from ..graph import DirectedGraph
from ..operators import _check_phase, magnetic_laplacian, magnetic_product
from .filters import (
    _COMPLEX_OF,
    _CachedOperators,
    _add_bias,
    _OperatorCache,
    _check_count,
    _check_features,
    _chebyshev_sum,
    _complex_view,
    _empty_output,
    _make_chebyshev_parameters,
    _real_factory_dtype,
    _reset_chebyshev_parameters,
)

__all__ = ["MagneticFilter"]



def _check_charges(charge, learn: bool) -> tuple:
    """A tuple of floats in [0, 0.5] (open (0, 0.5) when learned) and whether one was given."""
    if isinstance(charge, torch.Tensor):
        charge = charge.detach().cpu().tolist()
    scalar = isinstance(charge, numbers.Real) and not isinstance(charge, bool)
    values = [charge] if scalar else charge
    try:
        values = list(values)
    except TypeError:
        raise GraphInputError(
            f"charge must be a real number in [0, 0.5] or a non-empty list of them; got {type(charge).__name__}"
        ) from None
    if not values:
        raise GraphInputError("charge must be a real number in [0, 0.5] or a non-empty list of them; got an empty list")
    out = []
    for q in values:
        if isinstance(q, bool) or not isinstance(q, numbers.Real) or not math.isfinite(float(q)):
            raise GraphInputError(f"charge must hold real numbers in [0, 0.5]; got {q!r}")
        q = float(q)
        if not 0.0 <= q <= 0.5:
            raise GraphInputError(f"charge must lie in [0, 0.5]; got {q}")
        if learn and not 0.0 < q < 0.5:
            raise GraphInputError(
                f"a learned charge must start inside the open interval (0, 0.5), where its map "
                f"q = 0.5 * sigmoid(u) is defined; got {q} (start at a small value such as 0.02)"
            )
        out.append(q)
    return tuple(out), scalar


class MagneticFilter(_CachedOperators, nn.Module):
    r"""Chebyshev filter on the normalized magnetic Laplacian: :math:`Y = \sum_k T_k(L(q) - I) X W_k + b`.

    :math:`L(q) = I - D^{-1/2} H(q) D^{-1/2}` with :math:`H(q) = A_s \odot e^{i 2\pi q (A - A^T)}`
    (:func:`phasorgraph.operators.magnetic_laplacian`) is Hermitian with spectrum in [0, 2], so
    the Chebyshev rescaling uses :math:`\lambda_{max} = 2`: :math:`\tilde L = L(q) - I`, and the
    terms follow :math:`T_0 = X`, :math:`T_1 = \tilde L X`, :math:`T_k = 2 \tilde L T_{k-1} - T_{k-2}`
    (Defferrard et al. 2016 on the magnetic Laplacian, as in Zhang et al. 2021). The charge
    q sets how strongly edge direction shows as phase: q = 0 ignores direction (the normalized
    Laplacian of :math:`A_s`), q = 0.25 makes one-way edges purely imaginary.

    Charges:

    * one float: one operator; all C_out output channels use it.
    * a list of G floats (a bank): C_out must be divisible by G; output channels
      ``g * C_out // G`` to ``(g + 1) * C_out // G - 1`` use charge g (block g of the columns of
      every W_k and of the bias).
    * ``learn_charge=True``: each charge is a parameter. It is kept in [0, 0.5] by
      :math:`q = \tfrac12 \sigma(u)` with :math:`u` (``charge_logit``) unconstrained, starting at
      :math:`u_0 = \operatorname{logit}(2 q_0)`. The map has no flat spot: :math:`dq/du = q (1 - 2q)`
      is zero only in the limits q -> 0 or q -> 0.5, which are never reached, and near 0,
      :math:`d \log q / du = 1 - 2q \approx 1`, so a small starting charge grows geometrically
      when the loss asks for it (a map such as :math:`q = \tfrac14 (1 - \cos\theta)` has
      :math:`dq/d\theta = 0` exactly at q = 0 and can stay stuck there). The start must therefore
      lie in the open interval (0, 0.5). The operator is then rebuilt from q on every forward
      through :func:`phasorgraph.operators.magnetic_product` (values built once per forward, differentiable in q).

    With a fixed charge the operator is built once per graph and cached in a plain attribute
    (a few graphs at a time; no sparse buffers, so DistributedDataParallel can wrap the layer).

    Args:
        in_channels: C_in.
        out_channels: C_out (a multiple of the number of charges).
        order: K >= 0, the polynomial degree (K + 1 weight matrices).
        charge: q in [0, 0.5] or a list of them (default 0.25).
        learn_charge: make each charge a parameter (default False).
        bias: learn an additive bias (default True).
        complex_weights: fully complex W_k and bias (default False: real weights act on the real
            and imaginary parts alike; a real bias adds to the real part).
        phase: "difference" (default, for weights in [0, 1]) or "sign"; see
            :func:`phasorgraph.operators.magnetic_adjacency` for when to use which.
        device, dtype: factory kwargs (float32 or float64; the charge logits share them).

    Shape:
        x: (N, C_in), real (taken as complex with zero imaginary part) or complex.
        Output: (N, C_out) complex64 for float32/complex64 input, complex128 for float64/complex128.

    Attributes:
        weight: (K + 1, C_in, C_out) real, or (K + 1, C_in, C_out, 2) real pairs with
            ``complex_weights`` (``torch.view_as_complex(weight)``). Init U(-s, s),
            s = 1 / sqrt((K + 1) C_in); complex parts U(-s / sqrt 2, s / sqrt 2).
        bias: (C_out,) (or (C_out, 2)), same distribution, or None.
        charge_logit: (G,) when ``learn_charge``, else absent.
        charge: the current charge(s) as a tensor: 0-dim when one float was given, else (G,).
            Differentiable when learned.

    References:
        X. Zhang et al., MagNet: a neural network for
        directed graphs, NeurIPS 2021. M. Defferrard et al., NeurIPS 2016.

    Example:
        >>> import torch
        >>> from phasorgraph import DirectedGraph
        >>> g = DirectedGraph.from_edges([[0, 1, 2], [1, 2, 0]])
        >>> layer = MagneticFilter(2, 4, order=2, charge=[0.0, 0.25])
        >>> y = layer(torch.randn(3, 2), g); y.shape, y.dtype
        (torch.Size([3, 4]), torch.complex64)
        >>> learned = MagneticFilter(2, 4, order=1, charge=0.02, learn_charge=True)
        >>> round(float(learned.charge.detach()), 6)
        0.02
    """

    def __init__(self, in_channels: int, out_channels: int, order: int,
                 charge: Union[float, Sequence[float]] = 0.25, learn_charge: bool = False, *,
                 bias: bool = True, complex_weights: bool = False, phase: str = "difference",
                 device=None, dtype=None):
        super().__init__()
        self.in_channels = _check_count("in_channels", in_channels)
        self.out_channels = _check_count("out_channels", out_channels)
        self.order = _check_count("order", order, minimum=0)
        self.learn_charge = bool(learn_charge)
        self.initial_charge, self._scalar_charge = _check_charges(charge, self.learn_charge)
        groups = len(self.initial_charge)
        if self.out_channels % groups:
            raise GraphInputError(
                f"out_channels must be a multiple of the number of charges ({groups}) so each charge "
                f"gets out_channels // {groups} channels; got out_channels = {self.out_channels}"
            )
        self.phase = _check_phase(phase)
        self.complex_weights = bool(complex_weights)
        factory = {"device": device, "dtype": _real_factory_dtype(dtype)}
        _make_chebyshev_parameters(self, bias, factory)
        if self.learn_charge:
            self.charge_logit = nn.Parameter(torch.empty(groups, **factory))
        self._operators = _OperatorCache()
        self.reset_parameters()

    def reset_parameters(self) -> None:
        """Weights U(-s, s), s = 1 / sqrt((order + 1) in_channels); charge logits logit(2 q_0)."""
        _reset_chebyshev_parameters(self)
        with torch.no_grad():
            if self.learn_charge:
                start = torch.tensor(self.initial_charge, dtype=torch.float64)
                self.charge_logit.copy_(torch.logit(2 * start))

    @property
    def num_charges(self) -> int:
        return len(self.initial_charge)

    @property
    def charge(self) -> torch.Tensor:
        """Current charge(s): 0-dim if one float was given, else (G,); differentiable when learned."""
        if self.learn_charge:
            q = 0.5 * torch.sigmoid(self.charge_logit)
        else:
            q = torch.tensor(self.initial_charge, dtype=self.weight.dtype, device=self.weight.device)
        return q[0] if self._scalar_charge else q

    def extra_repr(self) -> str:
        q = self.initial_charge[0] if self._scalar_charge else list(self.initial_charge)
        s = f"{self.in_channels}, {self.out_channels}, order={self.order}, charge={q}"
        if self.learn_charge:
            s += ", learn_charge=True"
        if self.bias is None:
            s += ", bias=False"
        if self.complex_weights:
            s += ", complex_weights=True"
        if self.phase != "difference":
            s += f", phase={self.phase!r}"
        return s

    def _operator(self, graph: DirectedGraph, q: float, cdtype: torch.dtype):
        device = self.weight.device
        return self._operators.get(
            graph, ("magnetic_laplacian", q, self.phase, cdtype, str(device)),
            lambda: magnetic_laplacian(graph, q, normalized=True, phase=self.phase, dtype=cdtype).to(device=device))

    def forward(self, x: torch.Tensor, graph: DirectedGraph) -> torch.Tensor:
        """Filter ``x`` (N, C_in) on ``graph``; returns (N, C_out) complex."""
        if not isinstance(graph, DirectedGraph):
            raise GraphInputError(
                f"graph must be a DirectedGraph (MagneticFilter builds its magnetic Laplacian from "
                f"the edges); got {type(graph).__name__}"
            )
        precision, device = self.weight.dtype, self.weight.device
        x = _check_features(x, graph.num_nodes, self.in_channels, precision, device)
        cdtype = _COMPLEX_OF[precision]
        if not x.is_complex():
            x = x.to(cdtype)
        if graph.num_nodes == 0:
            return _empty_output(x, self.out_channels, cdtype, self.parameters())
        w = _complex_view(self.weight) if self.complex_weights else self.weight
        width = self.out_channels // self.num_charges
        charges = self.charge.reshape(-1) if self.learn_charge else self.initial_charge
        groups = []
        for g in range(self.num_charges):
            wg = w[:, :, g * width:(g + 1) * width]
            if self.learn_charge:
                # values built once per charge and forward, shared by the K products
                product = magnetic_product(graph, charges[g], phase=self.phase)
            else:
                product = self._operator(graph, charges[g], cdtype).matmul
            # L~ = L(q) - I: lmax = 2 for the normalized magnetic Laplacian
            groups.append(_chebyshev_sum(x, product, 1.0, -1.0, wg))
        out = groups[0] if len(groups) == 1 else torch.cat(groups, dim=1)
        if self.bias is None:
            return out
        return _add_bias(out, _complex_view(self.bias) if self.complex_weights else self.bias)

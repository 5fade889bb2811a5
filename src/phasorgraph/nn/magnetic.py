r"""MagneticFilter: Chebyshev filters on the normalized magnetic Laplacian, fixed, banked or learned charge."""

from __future__ import annotations

import math
import numbers
from typing import Sequence, Union

import torch
from torch import nn

from ..errors import GraphInputError
from ..operators import check_phase, magnetic_laplacian
from ._chebyshev import ChebyshevBase
from ._layer import COMPLEX_OF, check_features, check_graph_like, check_saved_options, empty_output, phase_buffer

__all__ = ["MagneticFilter", "LearnedCharge"]



_CHARGE_RULE = "a real number in [0, 0.5], a non-empty list of them, or LearnedCharge(start=...)"


def _charge_values(charge, learned: bool) -> tuple:
    """A tuple of floats in [0, 0.5] (open (0, 0.5) when learned) and whether one number was given.

    The charge-tensor rule (shared with :mod:`phasorgraph.operators`): a tensor that requires
    grad is refused, never detached in silence (it would look learned and stay fixed); a
    learned charge is asked for with :class:`LearnedCharge`. A tensor without grad is read as
    its numbers. Text is refused whole (never read character by character).
    """
    if isinstance(charge, str):
        raise GraphInputError(f"charge must be {_CHARGE_RULE}; got the text {charge!r} (pass a number)")
    if isinstance(charge, torch.Tensor):
        if charge.requires_grad:
            raise GraphInputError(
                f"charge is a tensor that requires grad ({charge.detach().cpu().reshape(-1).tolist()}); a fixed "
                f"charge would silently drop its gradient. To learn the charge pass "
                f"charge=LearnedCharge(start=...); for a fixed charge pass a number (or charge.detach())"
            )
        if charge.device.type == "meta" or charge.is_complex():
            raise GraphInputError(f"charge must be {_CHARGE_RULE}; got a tensor of dtype {charge.dtype} on {charge.device}")
        charge = charge.detach().cpu().tolist()
    scalar = isinstance(charge, numbers.Real) and not isinstance(charge, bool)
    values = [charge] if scalar else charge
    try:
        values = list(values)
    except TypeError:
        raise GraphInputError(f"charge must be {_CHARGE_RULE}; got {type(charge).__name__}") from None
    if not values:
        raise GraphInputError(f"charge must be {_CHARGE_RULE}; got an empty list")
    out = []
    for q in values:
        if isinstance(q, bool) or not isinstance(q, numbers.Real) or not math.isfinite(float(q)):
            raise GraphInputError(f"charge must hold real numbers in [0, 0.5]; got {q!r}")
        q = float(q)
        if not 0.0 <= q <= 0.5:
            raise GraphInputError(f"charge must lie in [0, 0.5]; got {q}")
        if learned and not _Q_MIN[torch.float32] <= q <= 0.5 - _Q_MIN[torch.float32]:
            raise GraphInputError(
                f"a learned charge must start inside the open interval (0, 0.5), where its map "
                f"q = 0.5 * sigmoid(u) is defined (in float32 it reaches [{_Q_MIN[torch.float32]:.2g}, "
                f"0.5 - {_Q_MIN[torch.float32]:.2g}]); got {q} (start at a small value such as 0.02)"
            )
        out.append(q)
    return tuple(out), scalar


#: |u| bound of the charge logit: sigmoid(+-bound) stays strictly inside (0, 1) in the dtype,
#: with a derivative of about exp(-bound) > 0 (ln(1 / eps) - 1: 14.9 in float32, 35.0 in float64)
_LOGIT_BOUND = {dt: math.log(1.0 / torch.finfo(dt).eps) - 1.0 for dt in (torch.float32, torch.float64)}
#: the smallest learned charge, 0.5 sigmoid(-bound) (about 1.6e-7 in float32, 3.0e-16 in float64)
_Q_MIN = {dt: 0.5 / (1.0 + math.exp(b)) for dt, b in _LOGIT_BOUND.items()}


def _learned_charge(logit: torch.Tensor) -> torch.Tensor:
    r""":math:`q = \tfrac12 \sigma(\mathrm{clamp}(u, -c, c))`, strictly inside (0, 0.5), gradient alive.

    A large learning rate can push the logit u far out (u = 1e4, say), where
    :math:`\sigma(u)` is exactly 1 in floating point and its derivative exactly 0: the charge
    would sit at 0.5 for good. The forward clamps u to :math:`\pm c` (c = ``_LOGIT_BOUND``, where
    :math:`\sigma` still differs from 0 and 1 in the dtype) and the backward passes the gradient
    through the clamp unchanged (straight-through), so dq/du is never 0 and the loss can pull
    the charge back.
    """
    bound = _LOGIT_BOUND.get(logit.dtype, _LOGIT_BOUND[torch.float32])
    return 0.5 * torch.sigmoid(_ClampStraightThrough.apply(logit, bound))


class _ClampStraightThrough(torch.autograd.Function):
    """Forward ``clamp(u, -bound, bound)``; backward the identity (the gradient passes unchanged).

    (Written as a Function: ``u + (clamp(u) - u).detach()`` cancels catastrophically for large u.)
    """

    @staticmethod
    def forward(ctx, u, bound: float):
        return u.clamp(-bound, bound)

    @staticmethod
    def backward(ctx, grad):
        return grad, None


class LearnedCharge:
    r"""A charge that :class:`MagneticFilter` learns, starting from ``start``.

    Pass it as ``MagneticFilter(..., charge=LearnedCharge(start=0.05))``. Each charge becomes a
    parameter through :math:`q = \tfrac12 \sigma(u)` (see :class:`MagneticFilter`), so the start
    must lie in the open interval (0, 0.5).

    Args:
        start: one float, or a list of G floats (a learned bank), each in (0, 0.5).

    Example:
        >>> LearnedCharge(start=0.05)
        LearnedCharge(start=0.05)
        >>> LearnedCharge(start=[0.02, 0.2]).start
        (0.02, 0.2)
    """

    __slots__ = ("start", "_scalar")

    def __init__(self, start):
        values, scalar = _charge_values(start, learned=True)
        object.__setattr__(self, "start", values)
        object.__setattr__(self, "_scalar", scalar)

    def __setattr__(self, name, value):
        raise AttributeError("LearnedCharge is immutable; make a new one")

    def __eq__(self, other) -> bool:
        return isinstance(other, LearnedCharge) and other.start == self.start and other._scalar == self._scalar

    def __hash__(self) -> int:
        return hash((LearnedCharge, self.start, self._scalar))

    def __repr__(self) -> str:
        return f"LearnedCharge(start={self.start[0] if self._scalar else list(self.start)})"

    def __reduce__(self):
        return (LearnedCharge, (self.start[0] if self._scalar else list(self.start),))


def _as_list(values: torch.Tensor) -> list:
    return [float(v) for v in values.detach().reshape(-1).cpu().tolist()]


class MagneticFilter(ChebyshevBase):
    r"""Chebyshev filter on the normalized magnetic Laplacian: :math:`Y = \sum_k T_k(L(q) - I) X W_k + b`.

    :math:`L(q) = I - D^{-1/2} H(q) D^{-1/2}` with :math:`H(q) = A_s \odot e^{i 2\pi q (A - A^T)}`
    (:func:`phasorgraph.operators.magnetic_laplacian`) is Hermitian with spectrum in [0, 2], so
    the Chebyshev rescaling uses :math:`\lambda_{max} = 2`: :math:`\tilde L = L(q) - I`, and the
    terms follow :math:`T_0 = X`, :math:`T_1 = \tilde L X`, :math:`T_k = 2 \tilde L T_{k-1} - T_{k-2}`
    (Defferrard et al. 2016 on the magnetic Laplacian, as in Zhang et al. 2021). The charge
    q sets how strongly edge direction shows as phase: q = 0 ignores direction (the normalized
    Laplacian of :math:`A_s`), q = 0.25 makes one-way edges purely imaginary.

    Charges (``charge`` is keyword-only and has no default: choose it):

    * one float: one operator; all C_out output channels use it.
    * a list of G floats (a bank): C_out must be divisible by G; output channels
      ``g * C_out // G`` to ``(g + 1) * C_out // G - 1`` use charge g (block g of the columns of
      every W_k and of the bias).
    * :class:`LearnedCharge` ``(start=q0)`` (q0 one float or a list): each charge is a parameter.
      It is kept in [0, 0.5] by :math:`q = \tfrac12 \sigma(u)` with :math:`u` (``charge_logit``)
      unconstrained, starting at :math:`u_0 = \operatorname{logit}(2 q_0)`. The map has no flat
      spot: :math:`dq/du = q (1 - 2q)` is zero only in the limits q -> 0 or q -> 0.5, which are
      never reached, and near 0, :math:`d \log q / du = 1 - 2q \approx 1`, so a small starting
      charge grows geometrically when the loss asks for it (a map such as
      :math:`q = \tfrac14 (1 - \cos\theta)` has :math:`dq/d\theta = 0` exactly at q = 0 and can
      stay stuck there). In floating point :math:`\sigma(u)` rounds to exactly 0 or 1 for large
      |u|, so the forward clamps u to :math:`\pm(\ln(1/\epsilon) - 1)` (14.9 in float32, 35.0
      in float64) with the gradient passed straight through: even after a huge learning-rate
      step q stays strictly inside (0, 0.5), at least 1.6e-7 from either end in float32, and
      its gradient never vanishes. The start must therefore lie in the open interval (0, 0.5). The
      operator is then rebuilt from q on every forward through ``graph.magnetic_product``
      (:func:`phasorgraph.learned_charge.magnetic_product`; values built once per forward,
      differentiable in q). :meth:`freeze_charge` turns a learned charge into a fixed one.

    With a fixed charge the operator comes from ``graph.operator(magnetic_laplacian, ...)``:
    built once per graph, kept with the graph (it goes when the graph goes), never a buffer, so
    DistributedDataParallel can wrap the layer.

    Saving: a fixed charge or bank is kept in the ``state_dict`` as the buffer ``fixed_charge``
    (G,) float64 (a learned one as ``charge_logit``), the phase as the buffer ``phase_code``
    (0-dim int64: 0 "difference", 1 "sign", 2 "relative"). Loading a state into a layer with
    other fixed charges or another phase, or a learned state into a fixed-charge layer (or the
    reverse), raises :class:`~phasorgraph.GraphInputError` naming both. A state_dict saved
    before ``fixed_charge`` or ``phase_code`` existed loads (strictly) with the layer's own.

    Args:
        in_channels: C_in.
        out_channels: C_out (a multiple of the number of charges).
        order: K >= 0, the polynomial degree (K + 1 weight matrices).
        charge: keyword-only, required: q in [0, 0.5], a list of them, or a
            :class:`LearnedCharge`. A tensor without grad is read as its numbers; a tensor that
            requires grad is refused (it would be detached and stay fixed in silence: learn the
            charge with :class:`LearnedCharge`), the same rule as the operator builders.
        bias: learn an additive bias (default True).
        complex_weights: fully complex W_k and bias (default False: real weights act on the real
            and imaginary parts alike; a real bias adds to the real part).
        phase: "difference" (default, for weights in [0, 1]), "sign" or "relative" (for
            amounts, volumes, counts: free of the weights' units); see
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
        charge_logit: (G,) when the charge is learned, else absent.
        fixed_charge: (G,) float64 buffer when the charge is fixed, else absent.
        phase_code: 0-dim int64 buffer, the phase (0 "difference", 1 "sign", 2 "relative").
        charge: the current charge(s) as a tensor: 0-dim when one float was given, else (G,).
            Differentiable when learned.
        learns_charge (bool): whether the charge is a parameter.

    References:
        X. Zhang, Y. He, N. Brugnone, M. Perlmutter, M. Hirn, NeurIPS 2021.
        M. Defferrard, X. Bresson, P. Vandergheynst, NeurIPS 2016.

    Example:
        >>> import torch
        >>> from phasorgraph import DirectedGraph
        >>> g = DirectedGraph.from_edges([[0, 1, 2], [1, 2, 0]])
        >>> layer = MagneticFilter(2, 4, order=2, charge=[0.0, 0.25])
        >>> y = layer(torch.randn(3, 2), g); y.shape, y.dtype
        (torch.Size([3, 4]), torch.complex64)
        >>> learned = MagneticFilter(2, 4, order=1, charge=LearnedCharge(start=0.02))
        >>> round(float(learned.charge.detach()), 6)
        0.02
    """

    def __init__(self, in_channels: int, out_channels: int, order: int, *,
                 charge: Union[float, Sequence[float], LearnedCharge],
                 bias: bool = True, complex_weights: bool = False, phase: str = "difference",
                 device=None, dtype=None):
        super().__init__(in_channels, out_channels, order, bias=bias, complex_weights=complex_weights,
                         device=device, dtype=dtype)
        if isinstance(charge, LearnedCharge):
            self.learns_charge = True
            self.initial_charge, self._scalar_charge = charge.start, charge._scalar
        else:
            self.learns_charge = False
            self.initial_charge, self._scalar_charge = _charge_values(charge, learned=False)
        groups = len(self.initial_charge)
        if self.out_channels % groups:
            raise GraphInputError(
                f"out_channels must be a multiple of the number of charges ({groups}) so each charge "
                f"gets out_channels // {groups} channels; got out_channels = {self.out_channels}"
            )
        self.phase = check_phase(phase)
        # saved with the weights, so that a state_dict says which operator it was trained on
        self.register_buffer("phase_code", phase_buffer(self.phase, self.weight.device))
        if self.learns_charge:
            self.charge_logit = nn.Parameter(torch.empty(groups, dtype=self.weight.dtype, device=self.weight.device))
        else:
            # saved with the weights so a state_dict cannot be loaded into a layer of other charges;
            # the Python floats in initial_charge stay the values used
            self.register_buffer("fixed_charge", torch.tensor(self.initial_charge, dtype=torch.float64,
                                                              device=self.weight.device))
        self.reset_parameters()

    def reset_parameters(self) -> None:
        """Weights U(-s, s), s = 1 / sqrt((order + 1) in_channels); charge logits logit(2 q_0)."""
        super().reset_parameters()
        with torch.no_grad():
            if self.learns_charge:
                start = torch.tensor(self.initial_charge, dtype=torch.float64)
                self.charge_logit.copy_(torch.logit(2 * start))

    @property
    def num_charges(self) -> int:
        return len(self.initial_charge)

    @property
    def charge(self) -> torch.Tensor:
        """Current charge(s): 0-dim if one float was given, else (G,); differentiable when learned."""
        if self.learns_charge:
            q = _learned_charge(self.charge_logit)
        else:
            q = torch.tensor(self.initial_charge, dtype=self.weight.dtype, device=self.weight.device)
        return q[0] if self._scalar_charge else q

    def _current_charges(self) -> tuple:
        """The charges as Python floats (learned ones at their current value, in float64)."""
        if not self.learns_charge:
            return self.initial_charge
        with torch.no_grad():
            q = _learned_charge(self.charge_logit.detach().to(device="cpu"))
        return tuple(float(v) for v in q)

    def freeze_charge(self) -> "MagneticFilter":
        """Turn a learned charge into a fixed one at its current value; returns the layer.

        ``charge_logit`` is removed; the state_dict afterwards loads into a fixed-charge layer
        built with ``charge=layer.initial_charge`` (a float or a list, as given at the start).
        A layer whose charge is already fixed is returned unchanged.

        Example:
            >>> layer = MagneticFilter(2, 2, order=1, charge=LearnedCharge(start=0.1))
            >>> layer.freeze_charge().learns_charge, [round(q, 6) for q in layer.initial_charge]
            (False, [0.1])
        """
        if self.learns_charge:
            self.initial_charge = self._current_charges()
            self.learns_charge = False
            device = self.charge_logit.device
            del self.charge_logit
            self.register_buffer("fixed_charge", torch.tensor(self.initial_charge, dtype=torch.float64, device=device))
        return self

    def _load_from_state_dict(self, state_dict, prefix, local_metadata, strict, missing_keys, unexpected_keys,
                              error_msgs):
        # check the saved charges against this layer's before torch copies the tensors
        saved = state_dict.get(prefix + "fixed_charge")
        learned = (prefix + "charge_logit") in state_dict
        if self.learns_charge and saved is not None and not learned:
            raise GraphInputError(
                f"state_dict holds a fixed charge {_as_list(saved)} but this MagneticFilter learns its charge; "
                f"build the layer with charge={_as_list(saved)}"
            )
        if not self.learns_charge and learned and saved is None:
            raise GraphInputError(
                "state_dict holds a learned charge (charge_logit) but this MagneticFilter has a fixed charge; "
                "call freeze_charge() on the trained layer before saving, or build this layer with "
                "charge=LearnedCharge(...)"
            )
        # then the fixed charges and the phase; a state_dict saved before these buffers existed
        # gets the layer's own (its fixed charges, its phase) and loads with strict=True
        own = {"phase_code": (self.phase, self.phase_code)}
        if not self.learns_charge:
            own["fixed_charge"] = (list(self.initial_charge), self.fixed_charge)
        state_dict = check_saved_options("MagneticFilter", state_dict, prefix, own)
        super()._load_from_state_dict(state_dict, prefix, local_metadata, strict, missing_keys, unexpected_keys,
                                      error_msgs)

    def _repr_options(self):
        q = self.initial_charge[0] if self._scalar_charge else list(self.initial_charge)
        if not self.learns_charge:
            options = [f"charge={q}"]
        else:
            now = self._current_charges()
            now = f"{now[0]:.4g}" if self._scalar_charge else "[" + ", ".join(f"{v:.4g}" for v in now) + "]"
            options = [f"charge={LearnedCharge(q)!r}", f"charge_now={now}"]
        if self.phase != "difference":
            options.append(f"phase={self.phase!r}")
        return options

    def forward(self, x: torch.Tensor, graph) -> torch.Tensor:
        """Filter ``x`` (graph.num_rows, C_in) on ``graph``; returns (graph.num_rows, C_out) complex.

        ``graph`` is a DirectedGraph or another graph-like object (one that offers
        ``num_nodes``, ``num_rows``, ``operator(builder, **options)`` and
        ``magnetic_product(charge, phase=...)``, such as a shard of a distributed graph).
        """
        graph = check_graph_like(graph, "MagneticFilter", ("num_nodes", "num_rows", "operator", "magnetic_product"))
        precision, device = self.weight.dtype, self.weight.device
        x = check_features(x, graph.num_rows, self.in_channels, precision, device)
        cdtype = COMPLEX_OF[precision]
        if not x.is_complex():
            x = x.to(cdtype)
        if graph.num_nodes == 0:
            return empty_output(x, self.out_channels, cdtype, self.parameters())
        products = []
        for q in (self.charge.reshape(-1) if self.learns_charge else self.initial_charge):
            if self.learns_charge:
                # values built once per charge and forward, shared by the K products
                product = graph.magnetic_product(q, phase=self.phase)
            else:
                product = graph.operator(magnetic_laplacian, charge=q, normalized=True, phase=self.phase,
                                         dtype=cdtype, device=device)
            # L~ = L(q) - I: max_eigenvalue = 2 for the normalized magnetic Laplacian
            products.append((product, 1.0, -1.0))
        return self._filter(x, products)

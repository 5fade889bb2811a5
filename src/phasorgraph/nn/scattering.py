r"""Diffusion scattering: low-passed moduli of diffusion wavelets, of order 1 and 2, per node.

Built on :mod:`phasorgraph.nn.wavelets`. Every wavelet pass is one chain of :math:`2^J` wide
sparse products: order 2 stacks all first-order moduli into one (N, (J + 1) F) block, so its
second wavelet pass is again :math:`2^J` products, not :math:`(J + 1) 2^J`.
"""

from __future__ import annotations

import math
import numbers
from typing import Optional

import torch
from torch import nn

from ..errors import GraphInputError
from ..sparse import SparseOperator
from ._diffusion import check_diffusion_operator, diffusion_powers, dyadic_bands
from .._checks import check_flag
from ._layer import check_count, check_features, check_scales, empty_parameter, factory_kwargs

__all__ = ["DiffusionScattering"]


def _modulus(z: torch.Tensor) -> torch.Tensor:
    return z.abs()


def _real(z: torch.Tensor) -> torch.Tensor:
    """The modulus of a complex low-pass output; a real one is returned as it is."""
    return z.abs() if z.is_complex() else z


class DiffusionScattering(nn.Module):
    r"""Scattering coefficients :math:`\Phi_J x,\ \Phi_J |\Psi_j x|,\ \Phi_J |\Psi_{j_2} |\Psi_{j_1} x||` per node.

    With the diffusion wavelets :math:`\Psi_0, \dots, \Psi_J, \Phi_J` of
    :class:`~phasorgraph.nn.DiffusionWavelets` (Gama et al. 2019; Gao et al. 2019), the
    coefficients ("paths") are, in this order:

    * zeroth order, path ``()``: :math:`\Phi_J x`;
    * first order, paths ``(j,)`` for j = 0..J: :math:`\Phi_J |\Psi_j x|`;
    * second order (``order=2``), paths ``(j1, j2)`` for 0 <= j1 < j2 <= J, j1 outer and j2
      inner: :math:`\Phi_J |\Psi_{j_2} |\Psi_{j_1} x||`.

    ``num_coefficients`` is K = 1 + (J + 1) (+ J (J + 1) / 2 for order 2) and ``paths`` lists
    them. With ``lowpass=False`` the :math:`\Phi_J` on the outside is dropped (x itself for the
    zeroth order, :math:`|\Psi_j x|` and :math:`|\Psi_{j_2} |\Psi_{j_1} x||` for the others),
    the form of Gao et al. meant to be followed by :class:`~phasorgraph.nn.MomentReadout`.

    The modulus makes complex (magnetic) responses real, so the output is always real: when x
    or the operator is complex, every low-pass output also takes a modulus
    (:math:`|\Phi_J x|`, :math:`|\Phi_J |\Psi_j x||`, ...). For the real T or P this changes
    nothing beyond the zeroth order, whose sign is kept: their entries are non-negative, so the
    low-pass of a modulus is already non-negative.
    Without ``out_channels`` the output is (N, K F) with column ``k * F + f`` holding path k
    of input channel f. With ``out_channels`` a learned linear map
    :math:`y = c W^T + b` mixes all K F coefficients into ``out_channels``.

    Cost in sparse products of one wide block (a wavelet or low-pass chain is :math:`2^J`
    products): order 1 = 2 chains (widths F and (J + 1) F; 1 chain with ``lowpass=False``);
    order 2 = 3 chains (widths F, (J + 1) F and J (J + 1) F / 2; 2 chains of widths F and
    J F with ``lowpass=False``).

    Args:
        in_channels: F, feature columns of x.
        scales: J >= 1.
        order: 1 (default) or 2.
        out_channels: None (default: no mixing, no parameters) or the width of the learned map.
        bias: add a learned bias (default True; only with ``out_channels``).
        lowpass: apply :math:`\Phi_J` to every coefficient (default True).
        device, dtype: factory kwargs for the weight and bias (real floating dtype).

    Shape:
        - x: (N, F) real or complex; op: a diffusion operator with spectrum in [0, 1]
          (``operators.diffusion(graph)``, ``operators.diffusion(graph, charge=q)`` or
          ``operators.random_walk(graph)``).
        - output: (N, K F) real, or (N, out_channels) with mixing.

    Attributes:
        weight (Tensor or None): (out_channels, K F), initialized like ``torch.nn.Linear``
            (Kaiming-uniform, a = sqrt(5)).
        bias (Tensor or None): (out_channels,), uniform in :math:`\pm 1/\sqrt{K F}`.
        paths (list of tuple): the K paths in output order.
        num_coefficients (int): K.

    References:
        F. Gama, A. Ribeiro and J. Bruna, ICLR 2019.
        F. Gao et al., ICML 2019.

    Example:
        >>> import torch
        >>> from phasorgraph import DirectedGraph, operators
        >>> g = DirectedGraph.from_edges([[0, 1, 2, 3], [1, 2, 3, 0]])
        >>> layer = DiffusionScattering(2, scales=3, order=2)
        >>> layer.num_coefficients, layer(torch.randn(4, 2), operators.diffusion(g)).shape
        (11, torch.Size([4, 22]))
    """

    def __init__(self, in_channels: int, scales: int, order: int = 1, out_channels: Optional[int] = None,
                 bias: bool = True, lowpass: bool = True, *, device=None, dtype=None):
        super().__init__()
        self.in_channels = check_count("in_channels", in_channels)
        self.scales = check_scales("scales", scales)
        if isinstance(order, bool) or not isinstance(order, numbers.Integral) or order not in (1, 2):
            raise GraphInputError(f"order must be 1 or 2; got {order!r}")
        self.order = int(order)
        self.out_channels = check_count("out_channels", out_channels, optional=True)
        self.lowpass = check_flag("lowpass", lowpass)
        J = self.scales
        self.paths = [()] + [(j,) for j in range(J + 1)]
        if self.order == 2:
            self.paths += [(j1, j2) for j1 in range(J + 1) for j2 in range(j1 + 1, J + 1)]
        self.num_coefficients = len(self.paths)
        factory = factory_kwargs(device, dtype)
        if self.out_channels is not None:
            self.weight = empty_parameter((self.out_channels, self.num_coefficients * self.in_channels), factory)
            if check_flag("bias", bias):
                self.bias = empty_parameter((self.out_channels,), factory)
            else:
                self.register_parameter("bias", None)
        else:
            self.register_parameter("weight", None)
            self.register_parameter("bias", None)
        self.reset_parameters()

    @property
    def num_outputs(self) -> int:
        """Output width: K F without mixing, out_channels with it."""
        return self.num_coefficients * self.in_channels if self.out_channels is None else self.out_channels

    def reset_parameters(self) -> None:
        with torch.no_grad():
            if self.weight is not None:
                nn.init.kaiming_uniform_(self.weight, a=math.sqrt(5))
            if self.bias is not None:
                bound = 1.0 / math.sqrt(self.weight.shape[1])
                nn.init.uniform_(self.bias, -bound, bound)

    def coefficients(self, x: torch.Tensor, op: SparseOperator) -> torch.Tensor:
        """The unmixed coefficients, (N, K, F) real, in the order of ``paths``."""
        T, scale = check_diffusion_operator(op)
        w = self.weight
        x = check_features(x, T.num_rows, self.in_channels, None if w is None else w.dtype,
                           None if w is None else w.device, shape="(N, F)", restate_shape=False)
        J, n, F = self.scales, x.shape[0], x.shape[1]
        first = dyadic_bands(T, scale, x, J)  # (N, J + 2, F): Psi_0..Psi_J, Phi_J
        zeroth = _real(first[:, -1] if self.lowpass else x)
        u1 = _modulus(first[:, :-1])  # (N, J + 1, F) real
        blocks = [zeroth.unsqueeze(1)]
        if self.order == 1:
            if self.lowpass:
                (low,) = diffusion_powers(T, scale, u1.reshape(n, (J + 1) * F), [2 ** J])
                blocks.append(_real(low).reshape(n, J + 1, F))
            else:
                blocks.append(u1)
            return torch.cat(blocks, dim=1)
        # order 2: one wavelet pass on the whole (N, width * F) block of first-order moduli
        width = J + 1 if self.lowpass else J  # |Psi_J x| has no j2 > J; keep it only for its low-pass
        second = dyadic_bands(T, scale, u1[:, :width].reshape(n, width * F), J).reshape(n, J + 2, width, F)
        pairs_j1 = [j1 for j1 in range(J + 1) for j2 in range(j1 + 1, J + 1)]
        pairs_j2 = [j2 for j1 in range(J + 1) for j2 in range(j1 + 1, J + 1)]
        u2 = _modulus(second[:, pairs_j2, pairs_j1])  # (N, P, F), P = J (J + 1) / 2
        P = len(pairs_j1)
        if self.lowpass:
            blocks.append(_real(second[:, -1]))  # Phi_J |Psi_j x|, j = 0..J, from the same pass
            (low2,) = diffusion_powers(T, scale, u2.reshape(n, P * F), [2 ** J])
            blocks.append(_real(low2).reshape(n, P, F))
        else:
            blocks.append(u1)
            blocks.append(u2)
        return torch.cat(blocks, dim=1)

    def forward(self, x: torch.Tensor, op: SparseOperator) -> torch.Tensor:
        c = self.coefficients(x, op)
        c = c.reshape(c.shape[0], c.shape[1] * c.shape[2])  # explicit: N may be 0
        if self.weight is None:
            return c
        return nn.functional.linear(c, self.weight, self.bias)

    def extra_repr(self) -> str:
        s = f"{self.in_channels}, scales={self.scales}"
        if self.order != 1:
            s += f", order={self.order}"
        if self.out_channels is not None:
            s += f", out_channels={self.out_channels}"
            if self.bias is None:
                s += ", bias=False"
        if not self.lowpass:
            s += ", lowpass=False"
        return s

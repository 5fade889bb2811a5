r"""The Chebyshev family's one base: weights, initialization, repr and the recursion.

Private to :mod:`phasorgraph.nn`. :class:`ChebyshevBase` owns the K + 1 weight matrices, the
bias, ``reset_parameters``, ``extra_repr`` and :func:`chebyshev_sum`; a subclass
(:class:`~phasorgraph.nn.ChebyshevFilter`, :class:`~phasorgraph.nn.MagneticFilter`) supplies
only its product: which operator, and the affine map :math:`\tilde L = \alpha L + \beta I`.
"""

from __future__ import annotations

import math
from typing import Optional, Sequence

import torch
from torch import nn

from .._checks import check_flag
from ._layer import add_bias, check_count, complex_view, factory_kwargs, make_parameters, mix, reset_uniform


def chebyshev_sum(x: torch.Tensor, op, alpha: float, beta: float, weights: torch.Tensor) -> torch.Tensor:
    r""":math:`\sum_k T_k W_k` with :math:`\tilde L t = \alpha P t + \beta t` and ``op`` applying P.

    :math:`T_0 = x`, :math:`T_1 = \tilde L x`, :math:`T_k = 2 \tilde L T_{k-1} - T_{k-2}`
    (Hammond et al. 2011); ``weights`` is (K + 1, C_in, C_out). ``op`` is anything with the
    fused product ``op.matmul_add(t, z, alpha=, beta=, shift=)`` (a SparseOperator, a
    PatternOperator, a sharded operator), so each term is one pass over memory:
    ``T_k = op.matmul_add(T_{k-1}, T_{k-2}, alpha=2 alpha, shift=2 beta, beta=-1)``. A plain
    callable applying P is also accepted (unfused steps). Memory holds the K + 1 terms autograd
    needs, the output and one transient block. This is the one place the recursion is
    written: every Chebyshev layer calls it.
    """
    order = weights.shape[0] - 1
    out = mix(x, weights[0])
    if order == 0:
        return out

    def add(out, term):
        return out.add_(term) if out.dtype == term.dtype else out + term

    fused = getattr(op, "matmul_add", None)
    if fused is None:  # a plain callable (or an object with only ``matmul``)
        product = getattr(op, "matmul", op)

        def fused(t, z=None, *, alpha, shift, beta=1.0):
            p = product(t) * alpha + t * shift
            return p if z is None else p + z * beta

    prev, cur = x, fused(x, alpha=alpha, shift=beta)
    out = add(out, mix(cur, weights[1]))
    for k in range(2, order + 1):
        prev, cur = cur, fused(cur, prev, alpha=2 * alpha, shift=2 * beta, beta=-1.0)
        out = add(out, mix(cur, weights[k]))
    return out


class ChebyshevBase(nn.Module):
    r"""Weights, bias, initialization, repr and recursion of a Chebyshev filter layer.

    Parameters: ``weight`` (K + 1, C_in, C_out) real, or (K + 1, C_in, C_out, 2) real pairs when
    ``complex_weights``; ``bias`` (C_out,) (or (C_out, 2)) or None. Initialization U(-s, s),
    s = 1 / sqrt((K + 1) C_in) (complex parts U(-s / sqrt 2, s / sqrt 2), the same E|w|^2).

    A subclass calls ``super().__init__(...)``, sets its own attributes, ends its ``__init__``
    with ``self.reset_parameters()``, adds its repr options in :meth:`_repr_options` and, in
    ``forward``, calls :meth:`_filter` with one ``(product, alpha, beta)`` per group of output
    columns.
    """

    def __init__(self, in_channels: int, out_channels: int, order: int, *, bias: bool, complex_weights: bool,
                 device=None, dtype=None):
        super().__init__()
        self.in_channels = check_count("in_channels", in_channels)
        self.out_channels = check_count("out_channels", out_channels)
        self.order = check_count("order", order, minimum=0)
        self.complex_weights = check_flag("complex_weights", complex_weights)
        make_parameters(self, (self.order + 1, self.in_channels, self.out_channels), bias,
                        factory_kwargs(device, dtype), self.complex_weights)

    def reset_parameters(self) -> None:
        """U(-s, s) with s = 1 / sqrt((order + 1) in_channels) for weight and bias (complex: see the class)."""
        reset_uniform(self, 1.0 / math.sqrt((self.order + 1) * self.in_channels), self.complex_weights)

    def _repr_options(self) -> Sequence[str]:
        """The subclass's own constructor options that differ from their defaults, as ``name=value``."""
        return ()

    def extra_repr(self) -> str:
        parts = [str(self.in_channels), str(self.out_channels), f"order={self.order}", *self._repr_options()]
        if self.bias is None:
            parts.append("bias=False")
        if self.complex_weights:
            parts.append("complex_weights=True")
        return ", ".join(parts)

    def _weights(self) -> torch.Tensor:
        return complex_view(self.weight) if self.complex_weights else self.weight

    def _bias(self) -> Optional[torch.Tensor]:
        if self.bias is None:
            return None
        return complex_view(self.bias) if self.complex_weights else self.bias

    def _filter(self, x: torch.Tensor, products: Sequence[tuple]) -> torch.Tensor:
        r"""The filtered output: output-column group g is :func:`chebyshev_sum` of ``products[g]``.

        ``products`` holds G triples ``(op, alpha, beta)``, :math:`\tilde L_g = \alpha P_g + \beta I`
        (``op`` with ``matmul_add``, or a callable applying P);
        the C_out columns of every W_k (and of the bias) split into G equal consecutive blocks.
        """
        w = self._weights()
        if w.is_complex() and not x.is_complex():
            x = x.to(w.dtype)
        width = self.out_channels // len(products)
        groups = [chebyshev_sum(x, product, alpha, beta, w[:, :, g * width:(g + 1) * width])
                  for g, (product, alpha, beta) in enumerate(products)]
        out = groups[0] if len(groups) == 1 else torch.cat(groups, dim=1)
        return add_bias(out, self._bias())

r"""Graph-level statistics of node features: mean, variance and standardized moments per graph."""

from __future__ import annotations

from typing import Optional

import torch
from torch import nn

from .._checks import check_flag
from ..errors import GraphInputError
from .._groups import check_groups, group_max, group_mean
from ._layer import check_count

__all__ = ["MomentReadout"]

#: a feature whose standard deviation is below this many machine epsilons of its largest
#: magnitude in the graph counts as constant (common practice, no source)
_CONSTANT_ULPS = 8.0
#: the most moments a readout computes (a bound so that a typo such as 2**40 is refused, not run;
#: moments of order > 16 of float data are dominated by rounding, common practice, no source)
_MAX_MOMENTS = 16


class MomentReadout(nn.Module):
    r"""Moments of the node features per graph: :math:`\mu`, :math:`\sigma^2`, :math:`\mu_k / \sigma^k`.

    For each graph g with node set :math:`V_g` (:math:`n_g = |V_g|`) and each channel, with
    :math:`\mu = \frac{1}{n_g} \sum_{v \in V_g} x_v` and the central moments
    :math:`m_k = \frac{1}{n_g} \sum_{v \in V_g} (x_v - \mu)^k` (population form, divisor
    :math:`n_g`), moment k = 1, ..., ``moments`` is

    * k = 1: the mean :math:`\mu`;
    * k = 2: the variance :math:`m_2 = \sigma^2`;
    * k >= 3: the standardized moment :math:`m_k / \sigma^k` (``normalized=True``, default:
      skewness for k = 3, Pearson's, not excess, kurtosis for k = 4), or the central
      moment :math:`m_k` itself (``normalized=False``).

    These are the graph statistics of geometric scattering (Gao et al. 2019), applied to any
    node features (typically :class:`~phasorgraph.nn.DiffusionScattering` with
    ``lowpass=False``). They are invariant to the order of the nodes.

    Guards: a graph with one node, or a channel that is constant on a graph (standard
    deviation below 8 machine epsilons times the channel's largest magnitude there), gets
    standardized moments 0 instead of 0/0; an empty graph (an id below ``num_graphs`` that
    owns no node) gets all zeros. The moments are computed on x divided by the largest
    magnitude of each graph and channel, then scaled back, so no power overflows: standardized
    moments are finite for every finite input (float32 features around 1e10 or 1e-12
    included); the mean and the unstandardized moments overflow to inf only when the value
    itself lies beyond the dtype's range. No NaN comes from finite input and gradients stay
    finite; a NaN or inf feature makes its own graph's row NaN and no other row.

    Args:
        moments: the number of moments K, 1 <= K <= 16 (default 4).
        normalized: standardize the moments of order >= 3 (default True).

    Shape:
        - x: (N, C) real.
        - graph_index: (N,) int64 graph id of each node, or None (all nodes form one graph).
        - num_graphs: G, or None (largest id + 1).
        - output: (G, K C), column ``(k - 1) C + c`` holding moment k of channel c.

    References:
        F. Gao et al., ICML 2019.

    Example:
        >>> import torch
        >>> x = torch.tensor([[1.0], [2.0], [3.0], [5.0], [5.0]])
        >>> [[round(v, 6) for v in row] for row in MomentReadout(moments=2)(x, torch.tensor([0, 0, 0, 1, 1])).tolist()]
        [[2.0, 0.666667], [5.0, 0.0]]
    """

    def __init__(self, moments: int = 4, normalized: bool = True):
        super().__init__()
        self.moments = check_count("moments", moments, maximum=_MAX_MOMENTS,
                                   why=" (higher standardized moments carry no usable information)")
        self.normalized = check_flag("normalized", normalized)

    def forward(self, x: torch.Tensor, graph_index: Optional[torch.Tensor] = None,
                num_graphs: Optional[int] = None) -> torch.Tensor:
        if not isinstance(x, torch.Tensor) or x.dim() != 2:
            raise GraphInputError(f"x must be a (N, C) tensor; got {tuple(getattr(x, 'shape', ())) or type(x).__name__}")
        if x.is_complex() or not x.dtype.is_floating_point:
            raise GraphInputError(f"x must be a real floating tensor (take the modulus of complex features "
                                  f"first, convert integer features with x.float()); got dtype {x.dtype}")
        if x.device.type == "meta":
            raise GraphInputError("x is on the meta device, which holds shapes but no values; MomentReadout "
                                  "needs the values (pass features on cpu or an accelerator)")
        if graph_index is None:
            if num_graphs not in (None, 1):
                raise GraphInputError(f"num_graphs must be None or 1 when graph_index is None; got {num_graphs!r}")
            graph_index = torch.zeros(x.shape[0], dtype=torch.int64, device=x.device)
            g = 1  # valid by construction: no value of it is read (no compiled-graph break)
        else:
            g = check_groups(x, graph_index, num_graphs)  # reads the values once
        index = graph_index.to(torch.int64)
        # Moments of z = x / s with s the largest |x| of each graph and channel (a constant for
        # autograd: every output is exactly s^k times the moment of z, or, standardized, free of
        # s). |z| <= 1, so no power overflows or underflows: finite float32 features around 1e10
        # or 1e-12 give finite standardized moments (x^4 itself would overflow float32 at 1e10).
        s = group_max(x.detach().abs(), index, g, checked=True)
        s = torch.where(s > 0, s, torch.ones_like(s))  # an all-zero channel: z = x = 0
        z = x / s.index_select(0, index)
        mean_z = group_mean(z, index, g, checked=True)
        out = [mean_z * s]
        if self.moments >= 2:
            centered = z - mean_z.index_select(0, index)
            var_z = group_mean(centered * centered, index, g, checked=True)
            out.append(var_z * s * s)
            if self.moments >= 3:
                # constant on the graph: standard deviation below 8 eps of the largest |x| (|z| <= 1)
                constant = var_z <= (_CONSTANT_ULPS * torch.finfo(x.dtype).eps) ** 2
                safe_var = torch.where(constant, torch.ones_like(var_z), var_z)
                for k in range(3, self.moments + 1):
                    mk = group_mean(centered ** k, index, g, checked=True)
                    if self.normalized:
                        mk = torch.where(constant, torch.zeros_like(mk), mk / safe_var ** (k / 2))
                    else:
                        mk = mk * s ** k
                    out.append(mk)
        return torch.cat(out, dim=1)

    def extra_repr(self) -> str:
        s = f"moments={self.moments}"
        if not self.normalized:
            s += ", normalized=False"
        return s

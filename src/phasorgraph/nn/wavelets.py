r"""Diffusion wavelets :math:`\Psi_j = T^{2^{j-1}} - T^{2^j}` and a learned choice of diffusion scales.

Both layers take a diffusion operator with spectrum in [0, 1]: the symmetric lazy diffusion
``operators.diffusion(graph)``, its magnetic form ``operators.diffusion(graph, charge=q)``
(complex Hermitian), or the non-symmetric lazy walk ``operators.random_walk(graph)``. For the
walk every product still runs on the Hermitian kernel (cheap backward, no transposed CSR
matrix). The powers and bands come from :mod:`phasorgraph.nn._diffusion`, shared with
scattering and band mixing.
"""

from __future__ import annotations

import torch
from torch import nn

from ..sparse import SparseOperator
from ._diffusion import check_diffusion_operator, diffusion_powers, dyadic_bands
from ._layer import check_count, check_features, check_scales, check_steps, empty_parameter, factory_kwargs

__all__ = ["DiffusionWavelets", "ScaleSelector"]


class DiffusionWavelets(nn.Module):
    r"""Diffusion wavelets :math:`\Psi_0 = I - T,\ \Psi_j = T^{2^{j-1}} - T^{2^j},\ \Phi_J = T^{2^J}` applied to x.

    The filter bank of Coifman & Maggioni (2006) as used for graph scattering by Gama et al.
    (2019) and Gao et al. (2019). On the spectrum :math:`\lambda \in [0, 1]` of T the responses
    :math:`1 - \lambda,\ \lambda^{2^{j-1}} - \lambda^{2^j},\ \lambda^{2^J}` are non-negative and
    telescope to 1, so :math:`\sum_j \Psi_j + \Phi_J = I` and
    :math:`\|x\|^2 / (J + 2) \le \sum_j \|\Psi_j x\|^2 + \|\Phi_J x\|^2 \le \|x\|^2` (Cauchy-Schwarz
    for the lower bound). For the random walk P the same holds in the norm
    :math:`\|D^{-1/2} x\|`.

    All J + 2 outputs come from :math:`2^J` repeated products of the (N, F) block in total
    (one product per diffusion step, all channels at once) plus J + 1 subtractions.

    Args:
        scales: J >= 1, the number of dyadic scales (largest diffusion time :math:`2^J`).

    Shape:
        - x: (N, F), real or complex, of the operator's precision.
        - op: (N, N) diffusion operator (see the module docstring).
        - output: (N, J + 2, F) in the order :math:`\Psi_0 x, \dots, \Psi_J x, \Phi_J x`;
          complex if x or op is complex.

    Attributes:
        steps (tuple of int): the diffusion times :math:`1, 2, 4, \dots, 2^J` that bound the bands.

    References:
        R. R. Coifman and M. Maggioni, Applied and Computational Harmonic Analysis 2006.
        F. Gama, A. Ribeiro and J. Bruna, ICLR 2019. F. Gao et al., ICML 2019.

    Example:
        >>> import torch
        >>> from phasorgraph import DirectedGraph, operators
        >>> g = DirectedGraph.from_edges([[0, 1, 2], [1, 2, 0]])
        >>> bands = DiffusionWavelets(2)(torch.randn(3, 4), operators.diffusion(g))
        >>> bands.shape
        torch.Size([3, 4, 4])
    """

    def __init__(self, scales: int):
        super().__init__()
        self.scales = check_scales("scales", scales)
        self.steps = tuple(2 ** j for j in range(self.scales + 1))

    @property
    def num_bands(self) -> int:
        """J + 2: the J + 1 wavelets and the low-pass."""
        return self.scales + 2

    def forward(self, x: torch.Tensor, op: SparseOperator) -> torch.Tensor:
        T, scale = check_diffusion_operator(op)
        x = check_features(x, T.num_rows, shape="(N, F)", restate_shape=False)
        return dyadic_bands(T, scale, x, self.scales)

    def extra_repr(self) -> str:
        return f"scales={self.scales}"


class ScaleSelector(nn.Module):
    r"""Learned diffusion scales: bands :math:`B_{j-1} - B_j` with :math:`B_j = \sum_{t=0}^{t_{max}} F_{jt} T^t`.

    After the learnable geometric scattering of Tong et al. (2021): each of the ``scales``
    boundaries is a soft choice of a diffusion time, :math:`F = \mathrm{softmax}(W)` taken
    over the steps :math:`t = 0, \dots, t_{max}` (``max_steps``) of each row of the logits W
    (scales, max_steps + 1). With :math:`B_0 = I` the outputs are

    .. math:: \Psi_0 = I - B_1,\quad \Psi_j = B_j - B_{j+1}\ (1 \le j < S),\quad \Phi = B_S,

    which sum to I for any W. While the boundaries keep their order (each :math:`F_j` puts its
    weight on later steps than :math:`F_{j-1}`), every band's response is non-negative. W starts
    as a near one-hot choice of the geometric steps :math:`t_j = \mathrm{round}(t_{max}^{(j-1)/(S-1)})`
    (:math:`t_1 = t_{max}` when S = 1): logit 6 at :math:`t_j`, 0 elsewhere. With
    :math:`t_{max} = 2^J` and S = J + 1 this starts next to :class:`DiffusionWavelets` (J).

    The powers :math:`T^t x,\ t \le t_{max}` come from ``max_steps`` repeated products of the
    (N, F) block; the mixing is one einsum. Memory O(max_steps N F) for the backward.

    Args:
        max_steps: :math:`t_{max} \ge 1`, the longest diffusion time.
        scales: S >= 1, the number of learned boundaries (the output has S + 1 bands).
        device, dtype: factory kwargs for the logits (real floating dtype).

    Shape:
        - x: (N, F) real or complex; op: a diffusion operator (spectrum in [0, 1]).
        - output: (N, S + 1, F), in the order :math:`\Psi_0, \dots, \Psi_{S-1}, \Phi`.

    Attributes:
        logits (Tensor): (scales, max_steps + 1) real parameter W.
        selection (Tensor, property): :math:`F = \mathrm{softmax}(W, \dim=1)`.

    References:
        A. Tong et al., IEEE MLSP 2021 (parametrization as recalled
        from memory; documented above so it can be checked).

    Example:
        >>> import torch
        >>> from phasorgraph import DirectedGraph, operators
        >>> g = DirectedGraph.from_edges([[0, 1, 2], [1, 2, 0]])
        >>> ScaleSelector(8, 4)(torch.randn(3, 2), operators.diffusion(g)).shape
        torch.Size([3, 5, 2])
    """

    _INIT_LOGIT = 6.0

    def __init__(self, max_steps: int, scales: int, *, device=None, dtype=None):
        super().__init__()
        self.max_steps = check_steps("max_steps", max_steps)
        self.scales = check_count("scales", scales, maximum=self.max_steps + 1,
                                  why=" (at most one boundary per diffusion step)")
        factory = factory_kwargs(device, dtype)
        self.logits = empty_parameter((self.scales, self.max_steps + 1), factory)
        self.reset_parameters()

    def initial_steps(self) -> list:
        """The diffusion times :math:`t_j` the logits start on (geometric from 1 to max_steps)."""
        if self.scales == 1:
            return [self.max_steps]
        return [int(round(self.max_steps ** (j / (self.scales - 1)))) for j in range(self.scales)]

    def reset_parameters(self) -> None:
        with torch.no_grad():
            self.logits.zero_()
            for j, t in enumerate(self.initial_steps()):
                self.logits[j, t] = self._INIT_LOGIT

    @property
    def selection(self) -> torch.Tensor:
        return torch.softmax(self.logits, dim=1)

    def forward(self, x: torch.Tensor, op: SparseOperator) -> torch.Tensor:
        T, scale = check_diffusion_operator(op)
        x = check_features(x, T.num_rows, None, self.logits.dtype, self.logits.device, shape="(N, F)",
                           restate_shape=False)
        powers = torch.stack(diffusion_powers(T, scale, x, range(self.max_steps + 1)), dim=1)  # (N, t+1, F)
        F = self.selection.to(powers.dtype)  # real weights; cast to complex for a magnetic T
        boundaries = torch.einsum("ntf,jt->njf", powers, F)  # (N, S, F)
        parts = torch.cat([x.unsqueeze(1).to(boundaries.dtype), boundaries], dim=1)  # B_0 = I, B_1..B_S
        bands = parts[:, :-1] - parts[:, 1:]
        return torch.cat([bands, boundaries[:, -1:]], dim=1)

    def extra_repr(self) -> str:
        return f"max_steps={self.max_steps}, scales={self.scales}"

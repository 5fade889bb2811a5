r"""Diffusion wavelets :math:`\Psi_j = T^{2^{j-1}} - T^{2^j}` and a learned choice of diffusion scales.

Both layers take a diffusion operator with spectrum in [0, 1]: the symmetric lazy diffusion
``operators.diffusion(graph)``, its magnetic form ``operators.diffusion(graph, charge=q)``
(complex Hermitian), or the non-symmetric lazy walk ``operators.random_walk(graph)``. For the
walk, :math:`P = S T S^{-1}` with :math:`S = \mathrm{diag}(\sqrt d)` (kept in the operator's
``similar`` field), so :math:`P^k x = S T^k S^{-1} x` and every product runs on the Hermitian
kernel (cheap backward, no transposed CSR matrix).

Powers are computed by repeated products of one wide (N, W) block: all feature channels go
through each sparse product together, never in a Python loop over channels.
"""

from __future__ import annotations

import numbers
from typing import Optional, Sequence

import torch
from torch import nn

from ..errors import GraphInputError
from ..sparse import SparseOperator

__all__ = ["DiffusionWavelets", "ScaleSelector"]

#: slack on the spectrum check (the stored interval is exact, this only absorbs float text)
_SPECTRUM_TOL = 1e-9

_HINT = ("pass operators.diffusion(graph), operators.diffusion(graph, charge=q) or "
         "operators.random_walk(graph) (lazy)")


# ---------------------------------------------------------------------- shared helpers
def _check_scales(scales, name: str = "scales") -> int:
    if isinstance(scales, bool) or not isinstance(scales, numbers.Integral):
        raise GraphInputError(f"{name} must be an integer >= 1; got {scales!r}")
    if int(scales) < 1:
        raise GraphInputError(f"{name} must be an integer >= 1; got {int(scales)}")
    return int(scales)


def _check_diffusion_operator(op, name: str = "op"):
    r"""Validate a diffusion operator and return ``(T, scale)``: ``op = diag(scale) T diag(1/scale)``.

    ``scale`` is None for a Hermitian op (then ``T`` is op itself).
    """
    if not isinstance(op, SparseOperator):
        raise GraphInputError(f"{name} must be a SparseOperator diffusion operator ({_HINT}); "
                              f"got {type(op).__name__}")
    spec = op.spectrum
    if spec is None or spec[0] < -_SPECTRUM_TOL or spec[1] > 1 + _SPECTRUM_TOL:
        raise GraphInputError(
            f"{name} must be a diffusion operator with spectrum in [0, 1]; got kind {op.kind!r} with "
            f"spectrum {spec} (a Laplacian has spectrum [0, 2]); {_HINT}"
        )
    if op.hermitian:
        return op, None
    if op.similar is None:
        raise GraphInputError(
            f"{name} is not Hermitian (kind {op.kind!r}) and carries no similar=(T, scale) form, so its "
            f"powers cannot use the Hermitian kernel; {_HINT}"
        )
    base, scale = op.similar
    if (not isinstance(base, SparseOperator) or not base.hermitian or base.spectrum is None
            or base.spectrum[0] < -_SPECTRUM_TOL or base.spectrum[1] > 1 + _SPECTRUM_TOL):
        raise GraphInputError(
            f"{name}.similar must hold a Hermitian base operator with spectrum in [0, 1]; got "
            f"{getattr(base, 'kind', type(base).__name__)!r}; {_HINT}"
        )
    return base, scale


def _check_node_features(x, num_nodes: int, name: str = "x", in_channels: Optional[int] = None) -> torch.Tensor:
    if not isinstance(x, torch.Tensor):
        raise GraphInputError(f"{name} must be a torch.Tensor of shape (N, F); got {type(x).__name__}")
    if x.dim() != 2:
        raise GraphInputError(f"{name} must have shape (N, F) (2-D); got shape {tuple(x.shape)}")
    if x.shape[0] != num_nodes:
        raise GraphInputError(f"{name} must have num_nodes = {num_nodes} rows; got shape {tuple(x.shape)}")
    if in_channels is not None and x.shape[1] != in_channels:
        raise GraphInputError(f"{name} must have in_channels = {in_channels} columns; got shape {tuple(x.shape)}")
    return x


def _scaled(x2d: torch.Tensor, scale: Optional[torch.Tensor], inverse: bool) -> torch.Tensor:
    if scale is None:
        return x2d
    s = scale.to(device=x2d.device)
    s = s.to(x2d.real.dtype if x2d.is_complex() else x2d.dtype)
    return x2d / s[:, None] if inverse else x2d * s[:, None]


def _diffusion_powers(T: SparseOperator, scale: Optional[torch.Tensor], x2d: torch.Tensor,
                      steps: Sequence[int]) -> list:
    r"""``[op^k x for k in steps]`` by ``max(steps)`` repeated products of the whole (N, W) block.

    ``op = diag(scale) T diag(1/scale)`` (``scale`` None: ``op = T``); every product is ``T @ .``
    on the Hermitian kernel. Steps may repeat and come in any order; 0 gives x itself.
    """
    wanted = sorted(set(int(k) for k in steps))
    if x2d.numel() == 0:
        # nothing to multiply (empty graph or no channels); sparse.py cannot reshape (0, -1)
        dtype = T.dtype if T.is_complex and not x2d.is_complex() else x2d.dtype
        return [x2d.to(dtype).clone() for _ in steps]
    z = _scaled(x2d, scale, inverse=True)
    found = {}
    y = z
    k = 0
    for target in wanted:
        while k < target:
            y = T @ y
            k += 1
        found[target] = y
    return [_scaled(found[int(k)], scale, inverse=False) for k in steps]


def _dyadic_bands(T: SparseOperator, scale: Optional[torch.Tensor], x2d: torch.Tensor, scales: int) -> torch.Tensor:
    r"""(N, J + 2, W): :math:`\Psi_0 x, \dots, \Psi_J x, \Phi_J x` from :math:`2^J` products of width W."""
    steps = [0] + [2 ** j for j in range(scales + 1)]  # x, T x, T^2 x, T^4 x, ..., T^(2^J) x
    powers = _diffusion_powers(T, scale, x2d, steps)
    bands = [powers[i] - powers[i + 1] for i in range(scales + 1)]
    bands.append(powers[-1])
    return torch.stack(bands, dim=1)


# ---------------------------------------------------------------------- layers
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
        R. R. Coifman and M. Maggioni, Diffusion wavelets, ACHA 2006. F. Gama, A. Ribeiro and
        J. Bruna, Diffusion scattering transforms on graphs, ICLR 2019. F. Gao et al.,
        Geometric scattering for graph data analysis, ICML 2019.

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
        self.scales = _check_scales(scales)
        self.steps = tuple(2 ** j for j in range(self.scales + 1))

    @property
    def num_bands(self) -> int:
        """J + 2: the J + 1 wavelets and the low-pass."""
        return self.scales + 2

    def forward(self, x: torch.Tensor, op: SparseOperator) -> torch.Tensor:
        T, scale = _check_diffusion_operator(op)
        x = _check_node_features(x, T.num_rows)
        return _dyadic_bands(T, scale, x, self.scales)

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
        A. Tong et al., Data-driven learning of
        geometric scattering modules for GNNs, IEEE MLSP 2021 (parametrization as recalled
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
        self.max_steps = _check_scales(max_steps, "max_steps")
        self.scales = _check_scales(scales)
        factory = {"device": device, "dtype": dtype}
        self.logits = nn.Parameter(torch.empty(self.scales, self.max_steps + 1, **factory))
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
        T, scale = _check_diffusion_operator(op)
        x = _check_node_features(x, T.num_rows)
        powers = torch.stack(_diffusion_powers(T, scale, x, range(self.max_steps + 1)), dim=1)  # (N, t+1, F)
        F = self.selection.to(powers.dtype)  # real weights; cast to complex for a magnetic T
        boundaries = torch.einsum("ntf,jt->njf", powers, F)  # (N, S, F)
        parts = torch.cat([x.unsqueeze(1).to(boundaries.dtype), boundaries], dim=1)  # B_0 = I, B_1..B_S
        bands = parts[:, :-1] - parts[:, 1:]
        return torch.cat([bands, boundaries[:, -1:]], dim=1)

    def extra_repr(self) -> str:
        return f"max_steps={self.max_steps}, scales={self.scales}"

r"""Low-pass and band-pass channels side by side, mixed per node by learned attention."""

from __future__ import annotations

import math
import numbers
from typing import Optional, Sequence

import torch
from torch import nn

from .. import operators
from ..errors import GraphInputError
from ._diffusion import diffusion_powers, dyadic_bands
from .._checks import check_flag
from ._layer import (MAX_STEPS, check_count, check_features, check_graph_like, check_saved_options, check_scales,
                     empty_parameter, factory_kwargs, phase_buffer)

__all__ = ["BandMix"]


def _check_steps(low_pass_steps) -> tuple:
    if isinstance(low_pass_steps, numbers.Integral) and not isinstance(low_pass_steps, bool):
        if not 1 <= low_pass_steps <= MAX_STEPS:
            raise GraphInputError(f"low_pass_steps must be an integer in [1, {MAX_STEPS}] or a sequence of "
                                  f"integers in [0, {MAX_STEPS}]; got {low_pass_steps!r}")
        return tuple(range(1, int(low_pass_steps) + 1))
    try:
        steps = tuple(low_pass_steps)
    except TypeError:
        raise GraphInputError(f"low_pass_steps must be an integer >= 1 or a sequence of integers >= 0; "
                              f"got {low_pass_steps!r}") from None
    if isinstance(low_pass_steps, str) or not steps or any(
            isinstance(k, bool) or not isinstance(k, numbers.Integral) or not 0 <= k <= MAX_STEPS for k in steps):
        raise GraphInputError(f"low_pass_steps must be a non-empty sequence of integers in [0, {MAX_STEPS}] "
                              f"(one sparse product per step); got {low_pass_steps!r}")
    return tuple(int(k) for k in steps)


class BandMix(nn.Module):
    r"""Per-node attention over low-pass :math:`\tilde A^k x` and band-pass :math:`|\Psi_j x|` channels.

    After Min et al. (2020), who pair graph-convolution (low-pass) channels with
    scattering (band-pass) channels to counter over-smoothing. Channels, in this order:

    * low-pass c = 1..L: :math:`Z_c = \tilde A^{k_c} x` for :math:`k_c` in ``low_pass_steps``,
      with :math:`\tilde A` the renormalized adjacency (Kipf & Welling 2017);
    * band-pass c = L + 1..L + J + 1: :math:`Z_c = |\Psi_j x|`, j = 0..J, the diffusion
      wavelets of the lazy diffusion T (:class:`~phasorgraph.nn.DiffusionWavelets`); with
      ``charge=q`` the wavelets of the magnetic diffusion
      :math:`T(q) = (I + D^{-1/2} H(q) D^{-1/2}) / 2` (:func:`~phasorgraph.operators.diffusion`),
      so the band-pass channels see which way the edges run. The modulus makes them real; it
      also makes them unchanged when every edge is reversed (that conjugates T(q), and x is real).

    Each channel has its own linear map :math:`H_c = Z_c W_c^T + b_c` (N, out). A node v scores
    its channels with :math:`e_{vc} = \mathrm{LeakyReLU}_{0.2}(a_1^T H_{vc} + a_2^T \bar H_v)`,
    :math:`\bar H_v` the mean of :math:`H_{vc}` over channels, and returns
    :math:`y_v = \sum_c \mathrm{softmax}_c(e_{v\cdot})_c H_{vc}`. (The score follows the
    paper's idea of attention over channels; its exact form here is our own choice, stated
    so it can be checked.)

    ``forward(x, graph)`` builds :math:`\tilde A` and T with :mod:`phasorgraph.operators` through
    ``graph.operator``, which keeps them with the graph (not a buffer: nothing sparse enters the
    state_dict or a pickle). Cost: :math:`\max k_c + 2^J` sparse products of
    width F.

    Args:
        in_channels: F.
        out_channels: width of every channel map and of the output.
        low_pass_steps: the powers :math:`k_c` (a sequence of integers >= 0), or an integer K
            for 1..K.
        scales: J >= 1 (band-pass channels j = 0..J).
        bias: learned :math:`b_c` (default True).
        charge: None (default: symmetric T) or a fixed q in [0, 0.5] for the band-pass channels
            (keyword-only); q = 0 gives the symmetric channels again.
        phase: "difference" (default), "sign" or "relative": the magnetic phase of T(q), as in
            :func:`~phasorgraph.operators.magnetic_adjacency` (keyword-only; only with a charge).
        device, dtype: factory kwargs for the parameters (real floating dtype).

    Shape:
        - x: (N, F) real; graph: a DirectedGraph with N nodes.
        - output: (N, out_channels).

    Attributes:
        weight (Tensor): (C, out_channels, F), C = L + J + 1, each slice initialized like
            ``torch.nn.Linear`` (Kaiming-uniform, a = sqrt(5)).
        bias (Tensor or None): (C, out_channels), uniform in :math:`\pm 1/\sqrt F`.
        attention (Tensor): (2, out_channels), rows :math:`a_1, a_2`, uniform in
            :math:`\pm 1/\sqrt{out}`.
        last_attention (Tensor or None): the (N, C) weights of the last forward (detached).
        fixed_charge, phase_code: with a charge, 0-dim buffers saved in the state_dict: q
            (float64) and the phase (int64: 0 "difference", 1 "sign", 2 "relative"). Loading a
            state saved with another charge or phase raises GraphInputError naming both; one
            saved without them (before they existed) loads with the layer's own.

    References:
        Y. Min et al., NeurIPS 2020.

    Example:
        >>> import torch
        >>> from phasorgraph import DirectedGraph
        >>> g = DirectedGraph.from_edges([[0, 1, 2, 3], [1, 2, 3, 0]])
        >>> BandMix(3, 5, low_pass_steps=(1, 2), scales=2)(torch.randn(4, 3), g).shape
        torch.Size([4, 5])
    """

    def __init__(self, in_channels: int, out_channels: int, low_pass_steps: Sequence[int] | int = (1, 2, 3),
                 scales: int = 3, bias: bool = True, *, charge: Optional[float] = None,
                 phase: str = "difference", device=None, dtype=None):
        super().__init__()
        self.charge = None if charge is None else operators._check_charge(charge)
        self.phase = operators.check_phase(phase)
        self.in_channels = check_count("in_channels", in_channels)
        self.out_channels = check_count("out_channels", out_channels)
        self.low_pass_steps = _check_steps(low_pass_steps)
        self.scales = check_scales("scales", scales)
        self.num_channels = len(self.low_pass_steps) + self.scales + 1
        factory = factory_kwargs(device, dtype)
        self.weight = empty_parameter((self.num_channels, self.out_channels, self.in_channels), factory)
        if check_flag("bias", bias):
            self.bias = empty_parameter((self.num_channels, self.out_channels), factory)
        else:
            self.register_parameter("bias", None)
        self.attention = empty_parameter((2, self.out_channels), factory)
        if self.charge is not None:
            # saved with the weights, so that a state_dict says which diffusion it was trained on
            where = self.weight.device
            self.register_buffer("fixed_charge", torch.tensor(self.charge, dtype=torch.float64, device=where))
            self.register_buffer("phase_code", phase_buffer(self.phase, where))
        self.last_attention = None
        self.reset_parameters()

    def _load_from_state_dict(self, state_dict, prefix, local_metadata, strict, missing_keys, unexpected_keys,
                              error_msgs):
        saved = state_dict.get(prefix + "fixed_charge")
        if self.charge is None and saved is not None:
            raise GraphInputError(
                f"state_dict was saved from a BandMix with charge {saved.tolist()} but this layer has charge None "
                f"(symmetric band-pass channels); build the layer with charge={saved.tolist()}"
            )
        if self.charge is not None:  # a state_dict saved before these buffers existed gets the layer's own
            state_dict = check_saved_options("BandMix", state_dict, prefix, {
                "fixed_charge": (self.charge, self.fixed_charge), "phase_code": (self.phase, self.phase_code)})
        super()._load_from_state_dict(state_dict, prefix, local_metadata, strict, missing_keys, unexpected_keys,
                                      error_msgs)

    def reset_parameters(self) -> None:
        with torch.no_grad():
            for c in range(self.num_channels):
                nn.init.kaiming_uniform_(self.weight[c], a=math.sqrt(5))
            if self.bias is not None:
                bound = 1.0 / math.sqrt(self.in_channels)
                nn.init.uniform_(self.bias, -bound, bound)
            bound = 1.0 / math.sqrt(self.out_channels)
            nn.init.uniform_(self.attention, -bound, bound)

    def _graph_operators(self, graph, dtype: torch.dtype, device: torch.device):
        # kept with the graph (graph.operator): switching graphs rebuilds nothing
        adj = graph.operator(operators.renormalized_adjacency, dtype=dtype, device=device)
        if self.charge is None:
            diff = graph.operator(operators.diffusion, dtype=dtype, device=device)
        else:  # dtype float32 / float64 selects complex64 / complex128
            diff = graph.operator(operators.diffusion, charge=self.charge, phase=self.phase, dtype=dtype,
                                  device=device)
        return adj, diff

    def channels(self, x: torch.Tensor, graph) -> torch.Tensor:
        """The stacked input channels (N, C, F) before the maps: low-pass first, then band-pass."""
        graph = check_graph_like(graph, "BandMix")
        x = check_features(x, graph.num_rows, self.in_channels, self.weight.dtype, self.weight.device,
                           shape="(N, F)", restate_shape=False)
        if x.is_complex() or x.dtype not in (torch.float32, torch.float64):
            raise GraphInputError(f"x must be real float32 or float64 for BandMix; got dtype {x.dtype}")
        adj, diff = self._graph_operators(graph, x.dtype, x.device)
        low = torch.stack(diffusion_powers(adj, None, x, self.low_pass_steps), dim=1)
        band = dyadic_bands(diff, None, x, self.scales)[:, :-1].abs().to(x.dtype)
        return torch.cat([low, band], dim=1)

    def forward(self, x: torch.Tensor, graph) -> torch.Tensor:
        z = self.channels(x, graph)  # (N, C, F)
        h = torch.einsum("ncf,cof->nco", z, self.weight)
        if self.bias is not None:
            h = h + self.bias
        score = h @ self.attention[0] + (h.mean(dim=1) @ self.attention[1]).unsqueeze(1)  # (N, C)
        alpha = torch.softmax(nn.functional.leaky_relu(score, 0.2), dim=1)
        self.last_attention = alpha.detach()
        return (alpha.unsqueeze(-1) * h).sum(dim=1)

    def __getstate__(self):
        state = dict(self.__dict__)
        state["last_attention"] = None
        return state

    def extra_repr(self) -> str:
        s = f"{self.in_channels}, {self.out_channels}, low_pass_steps={self.low_pass_steps}, scales={self.scales}"
        if self.bias is None:
            s += ", bias=False"
        if self.charge is not None:
            s += f", charge={self.charge}"
            if self.phase != "difference":
                s += f", phase={self.phase!r}"
        return s

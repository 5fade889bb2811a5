r"""Private: vectorized reductions of node rows over groups (the graphs of a batch), no Python loop.

``index`` (N,) int64 assigns each row of ``x`` (N, ...) to a group in ``0 .. num_groups-1``.
Empty groups give 0 (never NaN or -inf). Used by :class:`phasorgraph.data.GraphBatch` and the
graph-level readouts; users call ``GraphBatch.readout``.
"""

from __future__ import annotations

import torch

from ._checks import check_int
from ._limits import check_node_count
from .errors import GraphInputError

__all__ = ["group_sum", "group_mean", "group_max", "group_count", "check_groups"]


def _check_index(index: torch.Tensor, num_groups) -> int:
    """Validate graph_index (and num_graphs); return the number of groups."""
    if not isinstance(index, torch.Tensor) or index.dim() != 1 or index.dtype not in (torch.int64, torch.int32):
        what = f"shape {tuple(index.shape)}, dtype {index.dtype}" if isinstance(index, torch.Tensor) else type(index).__name__
        raise GraphInputError(f"graph_index must be a 1-D int64 or int32 tensor; got {what}")
    if index.device.type == "meta":
        raise GraphInputError("graph_index is on the meta device, which holds shapes but no values")
    if num_groups is not None:
        num_groups = check_node_count(check_int("num_graphs", num_groups), what="a per-graph readout",
                                        bytes_per_node=8, name="num_graphs")
    lo, hi = torch.stack(torch.aminmax(index)).tolist() if index.numel() else (0, -1)  # one read of the values
    if lo < 0:
        raise GraphInputError("graph_index must be non-negative")
    largest = hi + 1
    if num_groups is None:
        return largest
    if largest > num_groups:
        raise GraphInputError(f"graph_index holds graph {largest - 1} but num_graphs is {num_groups}")
    return num_groups


def check_groups(x: torch.Tensor, index: torch.Tensor, num_groups: int | None = None) -> int:
    """Validate (x, index) and return the number of groups."""
    s = _check_index(index, num_groups)
    if not isinstance(x, torch.Tensor):
        raise GraphInputError(f"x must be a torch.Tensor with one row per node; got {type(x).__name__}")
    if x.dim() < 1 or x.shape[0] != index.shape[0]:
        raise GraphInputError(f"x must have one row per entry of graph_index ({index.shape[0]}); got shape {tuple(x.shape)}")
    if x.device != index.device:
        raise GraphInputError(f"x is on {x.device} but graph_index on {index.device}; put them on the same device")
    return s


def _expand(index: torch.Tensor, x: torch.Tensor) -> torch.Tensor:
    return index.to(torch.int64).view((-1,) + (1,) * (x.dim() - 1)).expand_as(x)


def _sum(x: torch.Tensor, index: torch.Tensor, s: int) -> torch.Tensor:
    return x.new_zeros((s,) + tuple(x.shape[1:])).index_add(0, index.to(torch.int64), x)


def _count(index: torch.Tensor, s: int) -> torch.Tensor:
    # (index_add rather than bincount, whose output size depends on the values: no compiled-graph break)
    return torch.zeros(s, dtype=torch.int64, device=index.device).index_add_(
        0, index.to(torch.int64), torch.ones_like(index, dtype=torch.int64))


def _groups(x: torch.Tensor, index: torch.Tensor, num_groups, checked: bool) -> int:
    """The group count: validated here, or, with ``checked``, ``num_groups`` as the caller's
    own :func:`check_groups` returned it (the values of ``index`` are read once per call chain)."""
    return int(num_groups) if checked else check_groups(x, index, num_groups)


def group_sum(x: torch.Tensor, index: torch.Tensor, num_groups: int | None = None, *,
              checked: bool = False) -> torch.Tensor:
    """Sum of the rows of each group: (S, ...). ``checked=True``: ``num_groups`` is the result of
    the caller's :func:`check_groups` on the same ``x`` and ``index`` (no second validation)."""
    return _sum(x, index, _groups(x, index, num_groups, checked))


def group_count(index: torch.Tensor, num_groups: int | None = None) -> torch.Tensor:
    """Rows per group: (S,) int64."""
    return _count(index, _check_index(index, num_groups))


def group_mean(x: torch.Tensor, index: torch.Tensor, num_groups: int | None = None, *,
               checked: bool = False) -> torch.Tensor:
    """Mean of the rows of each group (0 for an empty group): (S, ...). ``checked`` as for :func:`group_sum`."""
    s = _groups(x, index, num_groups, checked)
    total = _sum(x, index, s)
    count = _count(index, s).clamp(min=1).to(total.real.dtype if total.is_complex() else total.dtype)
    return total / count.view((-1,) + (1,) * (x.dim() - 1))


def group_max(x: torch.Tensor, index: torch.Tensor, num_groups: int | None = None, *,
              checked: bool = False) -> torch.Tensor:
    """Elementwise max over the rows of each group (0 for an empty group): (S, ...). Real x only.
    ``checked`` as for :func:`group_sum`."""
    s = _groups(x, index, num_groups, checked)
    if x.is_complex():
        raise GraphInputError("x must be real for a max readout; take the modulus or real part first")
    out = x.new_zeros((s,) + tuple(x.shape[1:]))
    if x.shape[0] == 0:
        return out
    return out.scatter_reduce(0, _expand(index, x), x, reduce="amax", include_self=False)

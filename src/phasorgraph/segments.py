r"""Vectorized reductions of node rows over segments (graphs of a batch), no Python loop.

``index`` (N,) int64 assigns each row of ``x`` (N, ...) to a segment in ``0 .. num_segments-1``.
Empty segments give 0 (never NaN or -inf).
"""

from __future__ import annotations

import torch

from .errors import GraphInputError

__all__ = ["segment_sum", "segment_mean", "segment_max", "segment_count", "check_segments"]


def check_segments(x: torch.Tensor, index: torch.Tensor, num_segments: int | None = None) -> int:
    """Validate (x, index) and return the number of segments."""
    if not isinstance(index, torch.Tensor) or index.dim() != 1 or index.dtype not in (torch.int64, torch.int32):
        raise GraphInputError(f"graph_index must be a 1-D integer tensor; got {getattr(index, 'shape', type(index).__name__)}")
    if x.dim() < 1 or x.shape[0] != index.shape[0]:
        raise GraphInputError(f"x must have one row per entry of graph_index ({index.shape[0]}); got shape {tuple(x.shape)}")
    if index.numel() and int(index.min()) < 0:
        raise GraphInputError("graph_index must be non-negative")
    largest = int(index.max()) + 1 if index.numel() else 0
    if num_segments is None:
        return largest
    if largest > num_segments:
        raise GraphInputError(f"graph_index holds segment {largest - 1} but num_graphs is {num_segments}")
    return int(num_segments)


def _expand(index: torch.Tensor, x: torch.Tensor) -> torch.Tensor:
    return index.to(torch.int64).view((-1,) + (1,) * (x.dim() - 1)).expand_as(x)


def segment_sum(x: torch.Tensor, index: torch.Tensor, num_segments: int | None = None) -> torch.Tensor:
    """Sum of the rows of each segment: (S, ...)."""
    s = check_segments(x, index, num_segments)
    out = x.new_zeros((s,) + tuple(x.shape[1:]))
    return out.index_add(0, index.to(torch.int64), x)


def segment_count(index: torch.Tensor, num_segments: int | None = None) -> torch.Tensor:
    """Rows per segment: (S,) int64."""
    s = int(index.max()) + 1 if num_segments is None and index.numel() else (num_segments or 0)
    return torch.bincount(index.to(torch.int64), minlength=s)


def segment_mean(x: torch.Tensor, index: torch.Tensor, num_segments: int | None = None) -> torch.Tensor:
    """Mean of the rows of each segment (0 for an empty segment): (S, ...)."""
    s = check_segments(x, index, num_segments)
    total = segment_sum(x, index, s)
    count = segment_count(index, s).clamp(min=1).to(total.real.dtype if total.is_complex() else total.dtype)
    return total / count.view((-1,) + (1,) * (x.dim() - 1))


def segment_max(x: torch.Tensor, index: torch.Tensor, num_segments: int | None = None) -> torch.Tensor:
    """Elementwise max over the rows of each segment (0 for an empty segment): (S, ...). Real x only."""
    if x.is_complex():
        raise GraphInputError("x must be real for a max readout; take the modulus or real part first")
    s = check_segments(x, index, num_segments)
    out = x.new_zeros((s,) + tuple(x.shape[1:]))
    if x.shape[0] == 0:
        return out
    return out.scatter_reduce(0, _expand(index, x), x, reduce="amax", include_self=False)

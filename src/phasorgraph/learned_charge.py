r"""The normalized magnetic Laplacian at a learned (tensor) charge, differentiable in the charge.

:func:`magnetic_product` and :func:`magnetic_matmul` build the non-zero values of
:math:`D^{-1/2} H(q) D^{-1/2}` from a tensor q with torch operations on the graph's fixed
pattern (:attr:`phasorgraph.DirectedGraph.structure`), by the same arithmetic as the fixed-charge
operators (:func:`phasorgraph.operators.magnetic_phasors`), and multiply with a
:class:`phasorgraph.sparse.PatternOperator`, which carries the gradient to q.
"""

from __future__ import annotations

import torch

from .errors import GraphInputError
from .graph import DirectedGraph
from .operators import check_graph, check_phase, magnetic_phasors, phase_base, warn_if_wrapped
from .sparse import PatternOperator

__all__ = ["magnetic_product", "magnetic_matmul"]

_REAL = (torch.float32, torch.float64)
_COMPLEX = (torch.complex64, torch.complex128)


def _pattern(graph: DirectedGraph, phase: str, dtype: torch.dtype, device: str) -> tuple:
    r"""``(crow, cols, magnitude, base)`` on ``device``, kept with the graph: the CSR pattern of
    A + A^T, the magnitudes :math:`(A_s)_{uv} / \sqrt{d_u d_v}` in ``dtype`` and the phase base
    (float64, :func:`phasorgraph.operators.phase_base`)."""
    st = graph.structure
    where = torch.device(device)
    return (st.crow.to(where), st.cols.to(where), st.normalized.to(device=where, dtype=dtype),
            phase_base(st, phase).to(where))


def magnetic_product(graph: DirectedGraph, charge: torch.Tensor, *, phase: str = "difference"):
    r"""The map :math:`x \mapsto L_{norm}(q)\, x` at a tensor charge, with the values built once.

    :math:`L_{norm}(q) x = x - D^{-1/2} H(q) D^{-1/2} x`. The non-zero values
    :math:`w_{uv} e^{i \Theta_{uv}(q)} / \sqrt{d_u d_v}` are computed from ``charge`` with torch
    ops on the graph's fixed sparsity pattern (kept with the graph) when this function is called; every
    call of the returned map reuses them, so a K-step Chebyshev recursion computes (and keeps
    for the backward) one value array, not K. :class:`phasorgraph.sparse.PatternOperator` carries
    the gradient from the values to q (a fused value-gradient kernel). Build a new map whenever
    the charge changes (once per forward pass in a layer).

    Args:
        graph: a DirectedGraph with non-negative weights.
        charge: 0-dim real floating tensor q (may require grad). Not range-checked (the
            operator is periodic in q); layers keep it in [0, 0.5] themselves.
        phase: "difference" (default), "sign" or "relative".

    The precision and device of the values follow ``charge``.

    Returns:
        A :class:`phasorgraph.sparse.PatternOperator` ``I - A(q)``: call it (or its ``matmul``)
        on x (N, ...) real or complex of the charge's precision for the complex (N, ...)
        product (real x is multiplied without being cast to complex); its ``matmul_add`` gives
        the fused ``alpha L x + shift x + beta z`` of a Chebyshev step.

    Example:
        >>> import torch
        >>> g = DirectedGraph.from_edges([[0, 1, 2], [1, 2, 0]])
        >>> q = torch.tensor(0.1, requires_grad=True)
        >>> apply = magnetic_product(g, q)
        >>> y = apply(apply(torch.ones(3, 2)))
        >>> y.abs().sum().backward(); q.grad is not None
        True
    """
    graph = check_graph(graph, "magnetic_product")
    phase = check_phase(phase)
    if not isinstance(charge, torch.Tensor) or charge.dim() != 0 or not charge.dtype.is_floating_point:
        raise GraphInputError(
            f"charge must be a 0-dim real floating tensor; got "
            f"{type(charge).__name__ if not isinstance(charge, torch.Tensor) else f'shape {tuple(charge.shape)}, dtype {charge.dtype}'}"
        )
    real = charge.dtype
    if real not in _REAL:
        raise GraphInputError(f"charge must be float32 or float64; got {real}")
    # a meta tensor holds no value to check; compiled code skips the check too (reading the
    # charge's value there would break the graph on every forward): an eager call warns
    if charge.device.type != "meta" and not torch.compiler.is_compiling():
        warn_if_wrapped(graph, abs(float(charge.detach())), phase)
    crow, cols, magnitude, base = graph.cached(_pattern, phase=phase, dtype=real, device=str(charge.device))
    # the non-zeros of D^-1/2 H(q) D^-1/2 as two real arrays (what the kernels read), by the
    # arithmetic of the fixed-charge operators
    re, im = magnetic_phasors(magnitude, base, charge)
    return PatternOperator(crow, cols, re, im, hermitian=True, identity=1.0, scale=-1.0, _checked=True)


def magnetic_matmul(graph: DirectedGraph, charge: torch.Tensor, x: torch.Tensor, *,
                    phase: str = "difference") -> torch.Tensor:
    r"""The normalized magnetic Laplacian at a tensor charge times x, differentiable in both.

    :math:`y = L_{norm}(q)\, x = x - D^{-1/2} H(q) D^{-1/2} x`, built as in
    :func:`magnetic_product` (values from ``charge`` with torch ops on a cached fixed pattern;
    :class:`phasorgraph.sparse.PatternOperator` carries the gradient to q). For several products
    at the same charge, call :func:`magnetic_product` once and reuse the map.

    Args:
        graph: a DirectedGraph with non-negative weights.
        charge: 0-dim real tensor q (may require grad), not range-checked.
        x: (N, ...) real or complex features; the precision of ``charge`` must match.
        phase: "difference" (default), "sign" or "relative".

    Returns:
        (N, ...) complex tensor.

    Example:
        >>> import torch
        >>> g = DirectedGraph.from_edges([[0, 1, 2], [1, 2, 0]])
        >>> q = torch.tensor(0.1, dtype=torch.float64, requires_grad=True)
        >>> y = magnetic_matmul(g, q, torch.ones(3, 2, dtype=torch.float64))
        >>> y.abs().sum().backward(); q.grad is not None
        True
    """
    n = graph.num_nodes if isinstance(graph, DirectedGraph) else None
    if n is not None and (not isinstance(x, torch.Tensor) or x.dim() < 1 or x.shape[0] != n):
        raise GraphInputError(f"x must have num_nodes = {n} rows (shape (N, ...)); got shape {tuple(getattr(x, 'shape', ()))}")
    apply = magnetic_product(graph, charge, phase=phase)
    if x.dtype not in _REAL + _COMPLEX:
        raise GraphInputError(f"x must be float32, float64, complex64 or complex128; got {x.dtype}")
    if x.device != charge.device:
        raise GraphInputError(
            f"x is on {x.device} but charge on {charge.device}; put them on the same device"
            + (" (the meta device holds no values)" if x.device.type == "meta" else "")
        )
    precision = torch.float64 if x.dtype in (torch.float64, torch.complex128) else torch.float32
    if precision != charge.dtype:
        raise GraphInputError(f"charge has dtype {charge.dtype} but x has precision {precision}; use the same precision")
    return apply(x)

r"""What did a polynomial filter learn? Its frequency response over the spectrum interval.

A Chebyshev-type layer computes :math:`Y = \sum_k T_k(\tilde L) X W_k` (+ bias). In the
eigenbasis of the operator, :math:`L = \sum_i \lambda_i v_i v_i^H`, this is
:math:`Y = \sum_i v_i v_i^H X\, G(\lambda_i)` with the (C_in, C_out) gain matrix
:math:`G(\lambda) = \sum_k T_k(\tilde\lambda) W_k`, where :math:`\tilde\lambda` is
:math:`\lambda` rescaled as the layer rescales the operator. :func:`filter_response`
evaluates :math:`G` on a grid of :math:`\lambda` (or at given values), which shows which
frequencies each channel pair passes: small :math:`\lambda` are smooth signals over the graph,
large :math:`\lambda` signals that change sign between neighbours. For a magnetic filter,
:math:`\lambda` are the eigenvalues of :math:`L(q)`, one set per charge group.

This module reads layers (it sits above ``nn``); nothing imports it.
"""

from __future__ import annotations

import numbers
from dataclasses import dataclass
from typing import Any, Optional

import torch

from .errors import GraphInputError
from .nn.filters import ChebyshevFilter
from .nn.magnetic import MagneticFilter

__all__ = ["FilterResponse", "filter_response", "plot_filter_response"]


@dataclass(frozen=True)
class FilterResponse:
    """Gains of a polynomial filter over its spectrum interval.

    Attributes:
        eigenvalues: (P,) float64, the values of :math:`\\lambda` evaluated.
        gains: (G, P, C_in, C_out / G) float64 or complex128: :math:`G_g(\\lambda_p)` per charge
            group g (G = 1 for a ChebyshevFilter), per (input, output) channel pair.
        norm: (G, P) float64, the Frobenius norm of each gain matrix.
        charges: (G,) float64 charges of the groups (current values for a learned charge), or
            None for a ChebyshevFilter.
        interval: (low, high), the spectrum interval the layer assumes.
    """

    eigenvalues: torch.Tensor
    gains: torch.Tensor
    norm: torch.Tensor
    charges: Optional[torch.Tensor]
    interval: tuple


def _chebyshev_values(t: torch.Tensor, order: int) -> torch.Tensor:
    """(K + 1, P): T_k(t) by the three-term recursion."""
    out = [torch.ones_like(t)]
    if order >= 1:
        out.append(t)
    for _ in range(2, order + 1):
        out.append(2 * t * out[-1] - out[-2])
    return torch.stack(out)


def _weights(layer) -> torch.Tensor:
    w = layer.weight.detach().to(torch.float64)
    if getattr(layer, "complex_weights", False):
        w = torch.view_as_complex(w.contiguous())
    return w  # (K + 1, C_in, C_out)


#: the most evenly spaced evaluation points (a bound so a typo such as 2**40 is refused, not allocated)
_MAX_POINTS = 2 ** 20


def filter_response(layer, points: Any = 256, *, max_eigenvalue: Optional[float] = None,
                    min_eigenvalue: float = 0.0) -> FilterResponse:
    r"""The gain matrices :math:`G(\lambda) = \sum_k T_k(\tilde\lambda) W_k` of a trained filter.

    * ``ChebyshevFilter``: :math:`\lambda \in [a, \lambda_{max}]`, :math:`\tilde\lambda =
      2 (\lambda - a) / (\lambda_{max} - a) - 1`, as the layer rescales its operator, with
      :math:`\lambda_{max}` the layer's fixed value or ``max_eigenvalue`` (2 for a normalized
      Laplacian) and :math:`a` = ``min_eigenvalue``, the lower end of the operator's spectrum
      interval (``op.spectrum[0]``: 0 for Laplacians, -1 for adjacency-type operators).
    * ``MagneticFilter``: :math:`\lambda \in [0, 2]` (the normalized magnetic Laplacian),
      :math:`\tilde\lambda = \lambda - 1`; one gain block per charge group (output channels
      ``g * C_out / G`` to ``(g + 1) * C_out / G - 1``). The polynomial does not depend on the
      charge; the charge sets where the graph's eigenvalues fall in the interval.

    The bias is not part of the response. On a graph, ``layer(x, op) - bias`` equals
    :math:`\sum_i v_i v_i^H x\, G(\lambda_i)` over the operator's eigenpairs (checked in the tests
    against numpy.linalg.eigh).

    Args:
        layer: a ChebyshevFilter or MagneticFilter.
        points: number of evenly spaced values over the interval (default 256, at least 2), or
            a 1-D tensor / sequence of eigenvalues to evaluate at.
        max_eigenvalue: :math:`\lambda_{max}` for a ChebyshevFilter built without one
            (ignored for a MagneticFilter).
        min_eigenvalue: the lower end :math:`a` of the operator's spectrum interval for a
            ChebyshevFilter (default 0.0, right for every Laplacian; pass ``op.spectrum[0]``,
            e.g. -1.0 for the renormalized adjacency). Ignored for a MagneticFilter.

    Returns:
        :class:`FilterResponse`.

    Example:
        >>> from phasorgraph.nn import MagneticFilter
        >>> layer = MagneticFilter(2, 4, order=3, charge=[0.0, 0.25])
        >>> r = filter_response(layer, points=5)
        >>> tuple(r.gains.shape), r.eigenvalues.tolist()
        ((2, 5, 2, 2), [0.0, 0.5, 1.0, 1.5, 2.0])
    """
    if isinstance(layer, MagneticFilter):
        low, high = 0.0, 2.0
        charges = torch.as_tensor(layer.charge.detach(), dtype=torch.float64).reshape(-1)
        groups = int(charges.numel())
    elif isinstance(layer, ChebyshevFilter):
        lam = layer.max_eigenvalue if max_eigenvalue is None else max_eigenvalue
        if lam is None:
            raise GraphInputError(
                "max_eigenvalue must be given for a ChebyshevFilter built without a fixed largest "
                "eigenvalue (pass the operator's, e.g. 2.0 for a normalized Laplacian); got None"
            )
        if isinstance(lam, bool) or not isinstance(lam, numbers.Real) or not float(lam) > 0:
            raise GraphInputError(f"max_eigenvalue must be a number > 0; got {lam!r}")
        if isinstance(min_eigenvalue, bool) or not isinstance(min_eigenvalue, numbers.Real) \
                or not float(min_eigenvalue) < float(lam):
            raise GraphInputError(
                f"min_eigenvalue must be a number below max_eigenvalue {float(lam):.6g} (the lower end of "
                f"the operator's spectrum interval, op.spectrum[0]); got {min_eigenvalue!r}"
            )
        low, high = float(min_eigenvalue), float(lam)
        charges, groups = None, 1
    else:
        raise GraphInputError(
            f"layer must be a ChebyshevFilter or a MagneticFilter; got {type(layer).__name__}"
        )
    if isinstance(points, numbers.Integral) and not isinstance(points, bool):
        if not 2 <= points <= _MAX_POINTS:
            raise GraphInputError(f"points must be an integer >= 2 and <= {_MAX_POINTS} or a 1-D sequence of "
                                  f"eigenvalues; got {points}")
        lam_values = torch.linspace(low, high, int(points), dtype=torch.float64)
    else:
        if isinstance(points, torch.Tensor) and points.device.type == "meta":
            raise GraphInputError("points is on the meta device, which holds shapes but no values; pass eigenvalues")
        try:
            lam_values = torch.as_tensor(points, dtype=torch.float64).reshape(-1) if not isinstance(points, torch.Tensor) \
                else points.detach().to(torch.float64).reshape(-1)
        except (TypeError, ValueError, RuntimeError):
            raise GraphInputError(
                f"points must be an integer >= 2 or a 1-D sequence of eigenvalues; got {type(points).__name__}"
            ) from None
        if not bool(torch.isfinite(lam_values).all()):
            raise GraphInputError("points must hold finite eigenvalues; got a NaN or infinite value")
    if isinstance(layer, MagneticFilter):
        scaled = lam_values - 1.0
    else:
        scaled = 2.0 * (lam_values - low) / (high - low) - 1.0
    w = _weights(layer)  # (K + 1, C_in, C_out)
    T = _chebyshev_values(scaled, w.shape[0] - 1).to(w.dtype)  # (K + 1, P)
    gains = torch.einsum("kp,kio->pio", T, w)  # (P, C_in, C_out)
    width = w.shape[2] // groups
    gains = gains.reshape(gains.shape[0], w.shape[1], groups, width).permute(2, 0, 1, 3).contiguous()
    norm = torch.linalg.vector_norm(gains, dim=(2, 3))
    return FilterResponse(lam_values, gains, norm, charges, (low, high))


def plot_filter_response(layer, path, points: int = 256, *, max_eigenvalue: Optional[float] = None,
                         min_eigenvalue: float = 0.0) -> str:
    """Write a PNG of :func:`filter_response`: gain norm against eigenvalue, one panel per charge group.

    Thin lines show the modulus of each (input, output) pair's gain when there are at most 64
    pairs; the thick line is the Frobenius norm over all pairs. Returns the path.

    Example:
        >>> import tempfile, os
        >>> from phasorgraph.nn import ChebyshevFilter
        >>> out = plot_filter_response(ChebyshevFilter(2, 2, 3, max_eigenvalue=2.0), os.path.join(tempfile.mkdtemp(), "r.png"))
        >>> out.endswith("r.png")
        True
    """
    response = filter_response(layer, points, max_eigenvalue=max_eigenvalue, min_eigenvalue=min_eigenvalue)
    try:
        import matplotlib

        matplotlib.use("Agg", force=False)
        import matplotlib.pyplot as plt
    except ImportError as err:  # pragma: no cover - matplotlib is in the tutorials extra
        raise ImportError("plot_filter_response needs matplotlib (pip install matplotlib)") from err
    groups = response.gains.shape[0]
    fig, axes = plt.subplots(1, groups, figsize=(4.2 * groups, 3.4), squeeze=False, sharey=True)
    lam = response.eigenvalues.numpy()
    for g in range(groups):
        ax = axes[0, g]
        pairs = response.gains[g].abs().reshape(lam.size, -1).numpy()
        if pairs.shape[1] <= 64:
            ax.plot(lam, pairs, color="#2a7ab9", lw=0.6, alpha=0.35)
        ax.plot(lam, response.norm[g].numpy(), color="k", lw=2, label="norm over channel pairs")
        title = type(layer).__name__
        if response.charges is not None:
            title += f", q = {float(response.charges[g]):.3g}"
        ax.set_title(title, fontsize=10)
        ax.set_xlabel("eigenvalue (low = smooth, high = alternating)")
        ax.set_xlim(*response.interval)
    axes[0, 0].set_ylabel("|gain|")
    axes[0, 0].legend(fontsize=8)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return str(path)

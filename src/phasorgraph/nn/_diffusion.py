r"""Diffusion powers and dyadic bands: the one place wavelets, scattering, scale selection and band mixing get them.

Private to :mod:`phasorgraph.nn`. A diffusion operator has spectrum in [0, 1]: the symmetric
lazy diffusion ``operators.diffusion(graph)``, its magnetic form, or the non-symmetric lazy walk
``operators.random_walk(graph)``. For the walk, :math:`P = S T S^{-1}` with
:math:`S = \mathrm{diag}(\sqrt d)` (kept in the operator's ``similar`` field), so
:math:`P^k x = S T^k S^{-1} x` and every product runs on the Hermitian kernel. Powers come from
repeated products of one wide (N, W) block: all channels go through each sparse product together.
"""

from __future__ import annotations

from typing import Optional, Sequence

import torch

from ..errors import GraphInputError
from ..sparse import SparseOperator

#: slack on the spectrum check (the stored interval is exact, this only absorbs float text)
_SPECTRUM_TOL = 1e-9

_HINT = ("pass operators.diffusion(graph), operators.diffusion(graph, charge=q) or "
         "operators.random_walk(graph) (lazy)")


def check_diffusion_operator(op, name: str = "op"):
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


def _scaled(x2d: torch.Tensor, scale: Optional[torch.Tensor], inverse: bool) -> torch.Tensor:
    if scale is None:
        return x2d
    s = scale.to(device=x2d.device)
    s = s.to(x2d.real.dtype if x2d.is_complex() else x2d.dtype)
    return x2d / s[:, None] if inverse else x2d * s[:, None]


def diffusion_powers(T: SparseOperator, scale: Optional[torch.Tensor], x2d: torch.Tensor,
                      steps: Sequence[int]) -> list:
    r"""``[op^k x for k in steps]`` by ``max(steps)`` repeated products of the whole (N, W) block.

    ``op = diag(scale) T diag(1/scale)`` (``scale`` None: ``op = T``); every product is ``T @ .``
    on the Hermitian kernel. Steps may repeat and come in any order; 0 gives x itself.
    """
    wanted = sorted(set(int(k) for k in steps))
    if T.num_nodes == 0 or x2d.shape[1] == 0:
        # nothing to multiply (empty graph or no channels). Tested on the whole graph's node
        # count, not on x's rows: a shard that owns no rows still joins every product.
        dtype = T.dtype if T.is_complex and not x2d.is_complex() else x2d.dtype
        return [x2d.to(dtype).clone() for _ in steps]
    z = _scaled(x2d, scale, inverse=True)
    found = {}
    y = z
    k = 0
    for target in wanted:
        while k < target:
            y = T.matmul(y)  # the method, not @: torch.compile cannot trace @ on an operator object
            k += 1
        found[target] = y
    return [_scaled(found[int(k)], scale, inverse=False) for k in steps]


def dyadic_bands(T: SparseOperator, scale: Optional[torch.Tensor], x2d: torch.Tensor, scales: int) -> torch.Tensor:
    r"""(N, J + 2, W): :math:`\Psi_0 x, \dots, \Psi_J x, \Phi_J x` from :math:`2^J` products of width W."""
    steps = [0] + [2 ** j for j in range(scales + 1)]  # x, T x, T^2 x, T^4 x, ..., T^(2^J) x
    powers = diffusion_powers(T, scale, x2d, steps)
    bands = [powers[i] - powers[i + 1] for i in range(scales + 1)]
    bands.append(powers[-1])
    return torch.stack(bands, dim=1)

r"""Complex activations from the literature, a name-to-class table, and ComplexToReal heads.

Every activation maps complex features elementwise to complex features of the same shape and
dtype, is NaN-free at z = 0 (value and gradient), and refuses real input with a clear error
(a real tensor here usually means a head was applied too early). A NaN entry stays NaN (a gate
never turns it into 0: garbage in stays visible where it belongs, and only there).

========================  ==================================================================
name                      formula
========================  ==================================================================
``"modrelu"``             :math:`\mathrm{ReLU}(|z| + b)\, z / |z|` (Arjovsky et al. 2016)
``"split_relu"``          :math:`\mathrm{ReLU}(\mathrm{Re}\,z) + i\,\mathrm{ReLU}(\mathrm{Im}\,z)` (Trabelsi et al. 2018)
``"zrelu"``               z where :math:`\arg z \in [0, \pi/2]`, else 0 (Guberman 2016)
``"cardioid"``            :math:`\tfrac12 (1 + \cos \arg z)\, z` (Virtue et al. 2017)
``"real_part_gate"``      z where :math:`\mathrm{Re}\,z \ge 0`, else 0
========================  ==================================================================
"""

from __future__ import annotations

import torch
from torch import nn

from ..errors import GraphInputError
from ._layer import check_count, empty_parameter, real_factory_dtype

__all__ = [
    "ModReLU",
    "SplitReLU",
    "ZReLU",
    "Cardioid",
    "RealPartGate",
    "ComplexToReal",
    "ACTIVATIONS",
    "complex_activation",
]


def _check_complex(z, layer: str) -> torch.Tensor:
    if not isinstance(z, torch.Tensor):
        raise GraphInputError(f"z must be a complex torch.Tensor for {layer}; got {type(z).__name__}")
    if not z.is_complex():
        raise GraphInputError(
            f"z must be complex (complex64 or complex128) for {layer}; got {z.dtype} "
            f"(use torch.nn.ReLU for real features)"
        )
    return z


def _nan_mask(z: torch.Tensor) -> torch.Tensor:
    """Entries with a NaN real or imaginary part (gates pass them through unchanged)."""
    return torch.isnan(z.real) | torch.isnan(z.imag)


def _safe_modulus(z: torch.Tensor):
    """(|z|, mask |z| > 0, |z| with zeros replaced by 1): lets z / |z| stay NaN-free in backward."""
    r = z.abs()
    nonzero = r > 0
    return r, nonzero, torch.where(nonzero, r, torch.ones_like(r))


class ModReLU(nn.Module):
    r"""modReLU: :math:`f(z) = \mathrm{ReLU}(|z| + b)\, \dfrac{z}{|z|}` with a learned bias per feature.

    Keeps the phase, shrinks the modulus by :math:`-b` and zeroes it below the threshold
    (Arjovsky, Shah, Bengio, Unitary evolution recurrent neural networks, ICML 2016). At z = 0
    the output is 0.

    Args:
        num_features: F, the size of the last axis (one bias per feature).
        device, dtype: factory kwargs for the bias (float32 or float64).

    Shape:
        z: (..., F) complex. Output: same shape and dtype.

    Attributes:
        bias: (F,) real, initialized to 0 (the identity at the start of training).

    Example:
        >>> import torch
        >>> act = ModReLU(2)
        >>> with torch.no_grad(): _ = act.bias.fill_(-2.5)
        >>> act(torch.tensor([[6 + 8j, 0.3 + 0.4j]])).tolist()
        [[(4.5+6j), 0j]]
    """

    def __init__(self, num_features: int, *, device=None, dtype=None):
        super().__init__()
        self.num_features = check_count("num_features", num_features)
        self.bias = empty_parameter((self.num_features,), {"device": device, "dtype": real_factory_dtype(dtype)})
        self.reset_parameters()

    def reset_parameters(self) -> None:
        """bias = 0."""
        with torch.no_grad():
            self.bias.zero_()

    def extra_repr(self) -> str:
        return f"{self.num_features}"

    def forward(self, z: torch.Tensor) -> torch.Tensor:
        z = _check_complex(z, "ModReLU")
        if z.shape[-1:] != (self.num_features,):
            raise GraphInputError(
                f"z must have num_features = {self.num_features} entries on its last axis; got shape {tuple(z.shape)}"
            )
        if z.device != self.bias.device:
            raise GraphInputError(
                f"z is on {z.device} but ModReLU's bias is on {self.bias.device}; move one of them "
                f"(module.to(device) or z.to(device))"
            )
        r, nonzero, safe = _safe_modulus(z)
        scale = torch.where(nonzero, torch.relu(safe + self.bias) / safe, torch.zeros_like(safe))
        return z * scale


class SplitReLU(nn.Module):
    r"""Split ReLU: :math:`\mathrm{ReLU}(\mathrm{Re}\,z) + i\, \mathrm{ReLU}(\mathrm{Im}\,z)`.

    ReLU on the real and imaginary parts separately ("CReLU" in Trabelsi et al., Deep complex
    networks, ICLR 2018).

    Shape: z (...) complex; output same shape and dtype.

    Example:
        >>> import torch
        >>> SplitReLU()(torch.tensor([1 - 2j, -1 + 3j])).tolist()
        [(1+0j), 3j]
    """

    def forward(self, z: torch.Tensor) -> torch.Tensor:
        z = _check_complex(z, "SplitReLU")
        return torch.complex(torch.relu(z.real), torch.relu(z.imag))


class ZReLU(nn.Module):
    r"""zReLU: z where :math:`0 \le \arg z \le \pi/2` (Re z >= 0 and Im z >= 0), else 0.

    Passes the first quadrant unchanged (Guberman, On complex valued convolutional neural
    networks, 2016). Points on the two bounding half-axes (and z = 0) are kept; an entry with a
    NaN part is passed through (NaN stays NaN).

    Shape: z (...) complex; output same shape and dtype.

    Example:
        >>> import torch
        >>> ZReLU()(torch.tensor([1 + 2j, -1 + 3j, 2 - 1j])).tolist()
        [(1+2j), 0j, 0j]
    """

    def forward(self, z: torch.Tensor) -> torch.Tensor:
        z = _check_complex(z, "ZReLU")
        keep = (z.real >= 0) & (z.imag >= 0) | _nan_mask(z)  # NaN stays NaN, never 0
        return torch.where(keep, z, torch.zeros_like(z))


class Cardioid(nn.Module):
    r"""Cardioid: :math:`f(z) = \tfrac12 (1 + \cos \arg z)\, z = \tfrac12 (1 + \mathrm{Re}\,z / |z|)\, z`.

    Scales by a phase-dependent factor in [0, 1]: the identity on the positive real axis, 0 on
    the negative one (Virtue, Yu, Lustig, Better than real: complex-valued neural nets for MRI
    fingerprinting, ICIP 2017). f(0) = 0.

    Shape: z (...) complex; output same shape and dtype.

    Example:
        >>> import torch
        >>> Cardioid()(torch.tensor([2 + 0j, 3j])).tolist()
        [(2+0j), 1.5j]
    """

    def forward(self, z: torch.Tensor) -> torch.Tensor:
        z = _check_complex(z, "Cardioid")
        r, nonzero, safe = _safe_modulus(z)
        cos = torch.where(nonzero, z.real / safe, torch.zeros_like(safe))
        return z * (0.5 * (1 + cos))


class RealPartGate(nn.Module):
    r"""Real-part gate: :math:`f(z) = z` where :math:`\mathrm{Re}\,z \ge 0`, else 0.

    Keeps whole complex numbers (phase included) on the right half-plane; an entry with a NaN
    part is passed through (NaN stays NaN).

    Shape: z (...) complex; output same shape and dtype.

    Example:
        >>> import torch
        >>> RealPartGate()(torch.tensor([1 - 2j, -1 + 3j])).tolist()
        [(1-2j), 0j]
    """

    def forward(self, z: torch.Tensor) -> torch.Tensor:
        z = _check_complex(z, "RealPartGate")
        keep = (z.real >= 0) | _nan_mask(z)  # NaN stays NaN, never 0
        return torch.where(keep, z, torch.zeros_like(z))


#: activation name -> class
ACTIVATIONS = {
    "modrelu": ModReLU,
    "split_relu": SplitReLU,
    "zrelu": ZReLU,
    "cardioid": Cardioid,
    "real_part_gate": RealPartGate,
}


def complex_activation(name: str, **kwargs) -> nn.Module:
    """A complex activation by name (see ``ACTIVATIONS``); keyword arguments go to its constructor.

    Example:
        >>> complex_activation("modrelu", num_features=8)
        ModReLU(8)
        >>> complex_activation("cardioid")
        Cardioid()
    """
    try:
        cls = ACTIVATIONS[name]
    except (KeyError, TypeError):
        raise GraphInputError(
            f"name must be one of {sorted(ACTIVATIONS)} (complex activations); got {name!r}"
        ) from None
    if cls is ModReLU and "num_features" not in kwargs:
        raise GraphInputError("name 'modrelu' needs num_features=F (one learned bias per feature)")
    return cls(**kwargs)


_MODES = ("cartesian", "modulus", "polar")


class ComplexToReal(nn.Module):
    r"""Complex features to real ones for a task head, along the last (feature) axis.

    * ``"cartesian"`` (default): :math:`[\mathrm{Re}\,z, \mathrm{Im}\,z]`, F complex -> 2F real
      (the F real parts first, then the F imaginary parts).
    * ``"modulus"``: :math:`|z|`, F -> F. Invariant to a global phase.
    * ``"polar"``: :math:`[|z|, \arg z]`, F -> 2F, with :math:`\arg z \in (-\pi, \pi]` and
      arg 0 = 0. The angle jumps on the negative real axis; its gradient at z = 0 is taken as 0.

    Args:
        mode: "cartesian", "modulus" or "polar".

    Shape:
        z: (..., F) complex. Output (..., 2F) or (..., F) real of the matching precision.

    Example:
        >>> import torch
        >>> ComplexToReal()(torch.tensor([[1 + 2j, 3 - 4j]])).tolist()
        [[1.0, 3.0, 2.0, -4.0]]
        >>> ComplexToReal("modulus")(torch.tensor([[3 - 4j]])).tolist()
        [[5.0]]
    """

    def __init__(self, mode: str = "cartesian"):
        super().__init__()
        if not isinstance(mode, str) or mode not in _MODES:
            raise GraphInputError(f"mode must be one of {_MODES}; got {mode!r}")
        self.mode = mode

    def extra_repr(self) -> str:
        return "" if self.mode == "cartesian" else f"mode={self.mode!r}"

    def forward(self, z: torch.Tensor) -> torch.Tensor:
        z = _check_complex(z, "ComplexToReal")
        if self.mode == "cartesian":
            return torch.cat([z.real, z.imag], dim=-1)
        if self.mode == "modulus":
            return z.abs()
        r, nonzero, _ = _safe_modulus(z)
        one = torch.ones_like(r)
        re = torch.where(nonzero, z.real, one)
        im = torch.where(nonzero, z.imag, torch.zeros_like(r))
        angle = torch.where(nonzero, torch.atan2(im, re), torch.zeros_like(r))
        return torch.cat([r, angle], dim=-1)

"""Layers (torch.nn.Module): low-pass, magnetic, complex activations, wavelets, scattering."""

from . import bandmix, complex, filters, magnetic, readout, scattering, wavelets
from .bandmix import *  # noqa: F401,F403
from .complex import *  # noqa: F401,F403
from .filters import *  # noqa: F401,F403
from .magnetic import *  # noqa: F401,F403
from .readout import *  # noqa: F401,F403
from .scattering import *  # noqa: F401,F403
from .wavelets import *  # noqa: F401,F403

__all__ = (
    list(filters.__all__) + list(magnetic.__all__) + list(complex.__all__) + list(wavelets.__all__)
    + list(scattering.__all__) + list(readout.__all__) + list(bandmix.__all__)
)

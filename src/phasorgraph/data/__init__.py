"""Data utilities: generated graphs, leak-free splits, many-graph batches."""

from . import batch, generators, splits
from .batch import *  # noqa: F401,F403
from .generators import *  # noqa: F401,F403
from .splits import *  # noqa: F401,F403

__all__ = list(generators.__all__) + list(splits.__all__) + list(batch.__all__)

"""Argument checks shared by the functions of the package: flags, choices, counts, dtypes.

Each returns the standardized value or raises :class:`~phasorgraph.errors.GraphInputError` naming
the argument, what is accepted and the value given. They never let Python's truthiness decide:
``normalized="False"`` is refused, not read as True, and an array passed where a string or a
flag belongs gives our message instead of numpy's "truth value of an array is ambiguous".
"""

from __future__ import annotations

import math
import numbers
from typing import Any, Sequence

import numpy as np
import torch

from .errors import GraphInputError, value_text

__all__ = ["check_flag", "check_choice", "check_int", "check_positive_number", "check_dtype"]


def check_flag(name: str, value: Any) -> bool:
    """A Python or numpy bool; anything else (strings, numbers, tensors) is refused."""
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    raise GraphInputError(f"{name} must be True or False; got {value_text(value)}")


def check_choice(name: str, value: Any, choices: Sequence[str]) -> str:
    """One of the strings ``choices``."""
    if isinstance(value, str) and value in choices:
        return value
    raise GraphInputError(f"{name} must be one of {tuple(choices)}; got {value_text(value)}")


def check_int(name: str, value: Any, minimum: int = 0) -> int:
    """An integer >= minimum (Python or numpy int; not bool, not float)."""
    if isinstance(value, bool) or not isinstance(value, numbers.Integral) or int(value) < minimum:
        raise GraphInputError(f"{name} must be an integer >= {minimum}; got {value_text(value)}")
    return int(value)


def check_positive_number(name: str, value: Any) -> float:
    """A finite real number > 0."""
    if isinstance(value, bool) or not isinstance(value, numbers.Real) or not (0.0 < float(value) < math.inf):
        raise GraphInputError(f"{name} must be a finite number > 0; got {value_text(value)}")
    return float(value)


def check_dtype(name: str, value: Any, allowed: Sequence[torch.dtype], what: str) -> torch.dtype:
    """One of the torch dtypes ``allowed``; ``what`` says what they are for."""
    if isinstance(value, torch.dtype) and value in allowed:
        return value
    names = " or ".join(str(d) for d in allowed)
    raise GraphInputError(f"{name} must be {names} {what}; got {value_text(value)}")

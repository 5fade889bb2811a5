r"""Seeded, exact sampling of distinct node pairs, shared by the generators and the link splits.

Private to :mod:`phasorgraph.data` (names without an underscore so its modules can import
them). Unordered node pairs of a block (or of the whole graph) are numbered by an exact integer
bijection (:func:`pair_from_index`), so drawing distinct pairs is drawing distinct integers
from ``range(M)``: by independent uniform draws and de-duplication while fewer than half of
the M pairs are wanted, and by drawing the complement when more than half are wanted. Both
give every subset of the requested size the same probability.
"""

from __future__ import annotations

import math
import numbers
from typing import Any

import numpy as np

from ..errors import GraphInputError


def seeded_generator(seed: Any) -> np.random.Generator:
    """A numpy Generator from None, a non-negative int, or a Generator (returned as is)."""
    if isinstance(seed, np.random.Generator):
        return seed
    if seed is None or (isinstance(seed, numbers.Integral) and not isinstance(seed, bool) and seed >= 0):
        return np.random.default_rng(seed)
    raise GraphInputError(f"seed must be None, a non-negative int or a numpy Generator; got {seed!r}")


def num_pairs(n: int) -> int:
    """Unordered pairs of distinct nodes among n."""
    return n * (n - 1) // 2


def pair_from_index(k: np.ndarray, n: int) -> tuple[np.ndarray, np.ndarray]:
    r"""The k-th unordered pair of distinct nodes of ``range(n)``, as (low, high); exact integers.

    Pair k is :math:`\{c, (c + d) \bmod n\}` with ``d = k // n + 1``, ``c = k % n`` for
    ``k < n h`` (h = (n - 1) // 2), and ``d = n / 2``, ``c = k - n h`` for the last n / 2 pairs
    when n is even. Every unordered pair appears exactly once for k in ``range(n (n - 1) / 2)``.
    """
    k = np.asarray(k, dtype=np.int64)
    h = (n - 1) // 2
    main = k < n * h
    d = np.where(main, k // max(n, 1) + 1, n // 2)
    c = np.where(main, k % max(n, 1), k - n * h)
    other = (c + d) % max(n, 1)
    return np.minimum(c, other), np.maximum(c, other)


def index_from_pair(u: np.ndarray, v: np.ndarray, n: int) -> np.ndarray:
    """Inverse of :func:`pair_from_index` for distinct u, v (either order)."""
    lo = np.minimum(u, v).astype(np.int64)
    hi = np.maximum(u, v).astype(np.int64)
    gap = hi - lo
    h = (n - 1) // 2
    forward = gap < n - gap  # the short way round goes lo -> hi
    d = np.where(forward, gap, n - gap)
    c = np.where(forward, lo, hi)
    half = 2 * gap == n  # only for even n: the diameter pairs, started at lo < n / 2
    return np.where(half, n * h + lo, (d - 1) * n + c)


def _sorted_unique(x: np.ndarray) -> np.ndarray:
    """Sorted distinct values by one sort (np.unique is much slower on large int64 arrays here)."""
    s = np.sort(x)
    if s.size < 2:
        return s
    keep = np.empty(s.size, dtype=bool)
    keep[0] = True
    np.not_equal(s[1:], s[:-1], out=keep[1:])
    return s[keep]


def _sample_few(rng: np.random.Generator, m: int, k: int) -> np.ndarray:
    """k distinct integers of range(m), uniformly over k-subsets, for k <= m / 2 (sorted).

    Independent uniform draws are pooled and de-duplicated until k distinct values are seen;
    the distinct set, given its size, is uniform over subsets of that size (the draws are
    exchangeable under relabelling), so dropping a uniform random surplus keeps it uniform.
    """
    found = np.empty(0, dtype=np.int64)
    while found.size < k:
        want, left = k - found.size, m - found.size
        draws = int(math.ceil(-left * math.log1p(-want / left) * 1.02)) + 16
        found = _sorted_unique(np.concatenate([found, rng.integers(0, m, size=draws, dtype=np.int64)]))
    if found.size > k:
        found = np.delete(found, rng.choice(found.size, found.size - k, replace=False))
    return found


def sample_distinct(rng: np.random.Generator, m: int, k: int) -> np.ndarray:
    """k distinct integers of range(m), every k-subset equally likely (sorted).

    Few (k <= m / 2): pooled uniform draws, de-duplicated. Many: the complement is drawn
    that way and the rest enumerated, which costs O(m) <= O(2 k) memory.
    """
    if k <= 0:
        return np.empty(0, dtype=np.int64)
    if k >= m:
        return np.arange(m, dtype=np.int64)
    if 2 * k <= m:
        return _sample_few(rng, m, k)
    keep = np.ones(m, dtype=bool)
    keep[_sample_few(rng, m, m - k)] = False
    return np.flatnonzero(keep).astype(np.int64)


def sample_avoiding(rng: np.random.Generator, m: int, k: int, taken: np.ndarray) -> np.ndarray:
    """k distinct integers of range(m) outside the sorted distinct array ``taken``, uniformly.

    Draws ranks in the complement and maps rank r to the r-th integer not in ``taken``
    (``r + #{taken <= value}``, by a binary search on ``taken - arange``).
    """
    free = m - taken.size
    if k > free:
        raise GraphInputError(f"cannot draw {k} distinct pairs: only {free} are free")
    ranks = sample_distinct(rng, free, k)
    shifted = taken - np.arange(taken.size, dtype=np.int64)
    return ranks + np.searchsorted(shifted, ranks, side="right")

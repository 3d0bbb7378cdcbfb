"""Distinct values of large arrays, numbered (pure numpy).

A million planned points hold a few thousand frequencies and a handful of ripple levels:
what depends on them alone is computed once per distinct value (or pair) and taken back
to every point by its number. Sorting the distinct values and searching them is cheaper
than ``np.unique(..., return_inverse=True)`` at that size, and the numbers are kept as
32-bit integers (half the memory of a million 64-bit ones).
"""

from __future__ import annotations

from typing import Any

import numpy as np

DENSE_PAIRS = 1 << 24  # pair numbers up to this are ranked through a table, not a sort


def _small(count: int) -> type:
    return np.int32 if count < 2**31 - 1 else np.int64


def numbered(values: Any) -> tuple[np.ndarray, np.ndarray]:
    """(the distinct values, sorted; each value's position among them)."""
    values = np.ravel(np.asarray(values))
    distinct = np.unique(values)
    return distinct, np.searchsorted(distinct, values).astype(_small(distinct.size))


def pairs(
    first: np.ndarray, first_count: int, second: np.ndarray, second_count: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Number the distinct pairs of two numberings (values 0..count-1): (each pair's
    (first, second) numbers, as two arrays, in pair order; each element's pair number)."""
    key = np.multiply(first, second_count, dtype=np.int64)
    key += second
    span = first_count * second_count
    if span <= DENSE_PAIRS:
        seen = np.zeros(span, dtype=bool)
        seen[key] = True
        present = np.flatnonzero(seen)
        del seen
        rank: np.ndarray = np.zeros(span, dtype=_small(present.size))
        rank[present] = np.arange(present.size)
        number = rank[key]
    else:
        present, number = numbered(key)
    del key
    return present // second_count, present % second_count, number


def first_of(number: np.ndarray, count: int) -> np.ndarray:
    """For each number 0..count-1, the first position holding it."""
    first = np.full(count, number.size, dtype=np.int64)
    np.minimum.at(first, number, np.arange(number.size, dtype=_small(number.size)))
    return first

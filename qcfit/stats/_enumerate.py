"""Enumeration of count vectors for exact p-values (private)."""

from __future__ import annotations

from functools import cache
from math import comb

import numpy as np


def n_compositions(total: int, k: int) -> int:
    """Number of ways to put ``total`` items in ``k`` labelled cells: C(total + k - 1, k - 1)."""
    return comb(total + k - 1, k - 1)


def n_bounded(total: int, caps: tuple[int, ...]) -> int:
    """Number of vectors x with 0 <= x_j <= caps[j] and sum x = total (polynomial DP in
    floating point: exact while below 2**53, which is all the exact-test limit needs)."""
    ways = np.zeros(total + 1)
    ways[0] = 1.0
    for c in caps:  # new[t] = sum_{a=0..c} ways[t - a], by a running sum
        csum = np.concatenate([[0.0], np.cumsum(ways)])
        lo = np.maximum(np.arange(total + 1) - min(c, total), 0)
        ways = csum[np.arange(total + 1) + 1] - csum[lo]
    return int(min(round(ways[total]), 2**62))


def bounded_compositions(total: int, caps: tuple[int, ...]) -> np.ndarray:
    """All vectors x (rows) with 0 <= x_j <= caps[j] and sum x = total, as int64.

    Built from the last category forwards, memoized within this call only (no module-level
    cache holding large arrays).
    """

    @cache
    def build(t: int, start: int) -> np.ndarray:
        rest_caps = caps[start:]
        if len(rest_caps) == 1:
            return np.array([[t]] if t <= rest_caps[0] else np.empty((0, 1)), dtype=np.int64)
        room = sum(rest_caps[1:])
        parts = []
        for a in range(max(0, t - room), min(rest_caps[0], t) + 1):
            rest = build(t - a, start + 1)
            parts.append(np.column_stack([np.full(len(rest), a, dtype=np.int64), rest]))
        if not parts:
            return np.empty((0, len(rest_caps)), dtype=np.int64)
        return np.concatenate(parts)

    return build(total, 0)


def compositions(total: int, k: int) -> np.ndarray:
    """All vectors of ``k`` non-negative integers summing to ``total``."""
    return bounded_compositions(total, (total,) * k)

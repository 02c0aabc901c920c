"""Enumeration of count vectors for exact p-values (private)."""

from __future__ import annotations

from functools import lru_cache
from math import comb

import numpy as np


def n_compositions(total: int, k: int) -> int:
    """Number of ways to put ``total`` items in ``k`` labelled cells: C(total + k - 1, k - 1)."""
    return comb(total + k - 1, k - 1)


def n_bounded(total: int, caps: tuple[int, ...]) -> int:
    """Number of vectors x with 0 <= x_j <= caps[j] and sum x = total (polynomial DP)."""
    ways = np.zeros(total + 1, dtype=object)
    ways[0] = 1
    for c in caps:
        new = np.zeros_like(ways)
        for a in range(min(c, total) + 1):
            new[a:] += ways[: total + 1 - a]
        ways = new
    return int(ways[total])


@lru_cache(maxsize=64)
def bounded_compositions(total: int, caps: tuple[int, ...]) -> np.ndarray:
    """All vectors x (rows) with 0 <= x_j <= caps[j] and sum x = total; read-only int64."""
    if len(caps) == 1:
        out = np.array([[total]] if total <= caps[0] else np.empty((0, 1)), dtype=np.int64)
    else:
        room = sum(caps[1:])
        parts = []
        for a in range(max(0, total - room), min(caps[0], total) + 1):
            rest = bounded_compositions(total - a, caps[1:])
            parts.append(np.column_stack([np.full(len(rest), a, dtype=np.int64), rest]))
        out = np.concatenate(parts) if parts else np.empty((0, len(caps)), dtype=np.int64)
    out.setflags(write=False)
    return out


def compositions(total: int, k: int) -> np.ndarray:
    """All vectors of ``k`` non-negative integers summing to ``total``."""
    return bounded_compositions(total, (total,) * k)

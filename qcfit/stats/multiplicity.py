"""Multiplicity adjustment of the p-values of one pass (many lines tested at once).

- Holm (1979, *Scand. J. Statist.* 6, 65-70): step-down, family-wise error rate;
  adjusted p_(i) = max_{j <= i} min(1, (m - j + 1) p_(j)).
- Benjamini & Hochberg (1995, *JRSS B* 57, 289-300): false discovery rate;
  adjusted p_(i) = min_{j >= i} min(1, m p_(j) / j).
- Benjamini & Yekutieli (2001, *Ann. Statist.* 29, 1165-1188): BH times sum_{j<=m} 1/j,
  valid under any dependence.

NaN marks an untested line: it stays NaN and does not count in m (only tested hypotheses
are adjusted). Output keeps the input's order and shape.
"""

from __future__ import annotations

import numpy as np

from qcfit.errors import InvalidArgumentError
from qcfit.stats import _checks

METHODS = ("bh", "holm", "by")


def _step_up(p_sorted: np.ndarray, factor: float) -> np.ndarray:
    m = p_sorted.size
    ranks = np.arange(1, m + 1)
    raw = factor * m * p_sorted / ranks
    return np.minimum(1.0, np.minimum.accumulate(raw[::-1])[::-1])


def _holm(p_sorted: np.ndarray) -> np.ndarray:
    m = p_sorted.size
    raw = (m - np.arange(m)) * p_sorted
    return np.minimum(1.0, np.maximum.accumulate(raw))


def adjust_pvalues(p: object, method: str = "bh") -> np.ndarray:
    """Adjusted p-values (same shape as ``p``) by "bh", "holm" or "by"; NaN stays NaN."""
    method = _checks.choice(method, "method", METHODS)
    arr = _checks.as_float_array(p, "p")
    flat = arr.ravel()
    ok = ~np.isnan(flat)
    vals = flat[ok]
    bad = (vals < 0) | (vals > 1)
    if bad.any():
        raise InvalidArgumentError("p", f"p-value {float(vals[bad][0]):g} is outside [0, 1]")
    out = np.full(flat.shape, np.nan)
    if vals.size:
        order = np.argsort(vals, kind="stable")
        s = vals[order]
        if method == "holm":
            adj = _holm(s)
        else:
            factor = 1.0 if method == "bh" else float(np.sum(1.0 / np.arange(1, s.size + 1)))
            adj = _step_up(s, factor)
        back = np.empty_like(adj)
        back[order] = adj
        out[ok] = back
    return out.reshape(arr.shape)

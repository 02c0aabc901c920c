"""Cell diagnostics: expected counts, Pearson and adjusted standardized residuals, contributions.

Formulas (Agresti, *Categorical Data Analysis*, 2nd ed. 2002, sec. 3.3; Haberman,
*Biometrics* 29, 1973):

- Pearson residual: (o - e) / sqrt(e).
- Goodness of fit, adjusted residual: (o - e) / sqrt(e (1 - p)), e = n p; approximately
  N(0, 1) under the baseline since Var(o) = n p (1 - p).
- r x c table, adjusted standardized residual (Haberman 1973):
  (o_ij - e_ij) / sqrt(e_ij (1 - p_i+) (1 - p_+j)), e_ij = n p_i+ p_+j.
- Contributions: (o - e)^2 / e (Pearson) or 2 (o ln(o/e) - (o - e)) (G^2 deviance terms);
  both are >= 0 and sum to the statistic.

Cells with expected 0 get residual 0 and contribution 0 (they carry no test information).
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np
from scipy.special import xlogy


def _safe_div(num: np.ndarray, den: np.ndarray) -> np.ndarray:
    with np.errstate(divide="ignore", invalid="ignore"):
        out = np.where(den > 0, num / np.where(den > 0, den, 1.0), 0.0)
    return out


def expected_gof(n: np.ndarray, proportions: np.ndarray) -> np.ndarray:
    """e = n p; n of shape (...,), proportions (..., k)."""
    return np.asarray(n, dtype=float)[..., None] * proportions


def expected_table(table: np.ndarray) -> np.ndarray:
    """e_ij = R_i C_j / n for an (r, c) table (or a stack (..., r, c))."""
    t = np.asarray(table, dtype=float)
    rows = t.sum(axis=-1, keepdims=True)
    cols = t.sum(axis=-2, keepdims=True)
    n = t.sum(axis=(-2, -1), keepdims=True)
    return _safe_div(rows * cols, n)


def pearson_residuals(observed: np.ndarray, expected: np.ndarray) -> np.ndarray:
    return _safe_div(observed - expected, np.sqrt(expected))


def adjusted_residuals_gof(observed: np.ndarray, expected: np.ndarray,
                           proportions: np.ndarray) -> np.ndarray:
    """(o - e) / sqrt(e (1 - p)) for a fit to baseline proportions p."""
    return _safe_div(observed - expected, np.sqrt(expected * np.clip(1 - proportions, 0, None)))


def adjusted_residuals_table(observed: np.ndarray, expected: np.ndarray) -> np.ndarray:
    """Haberman (1973) adjusted residuals of an (..., r, c) table under independence."""
    o = np.asarray(observed, dtype=float)
    n = o.sum(axis=(-2, -1), keepdims=True)
    pr = _safe_div(o.sum(axis=-1, keepdims=True), n)
    pc = _safe_div(o.sum(axis=-2, keepdims=True), n)
    return _safe_div(o - expected, np.sqrt(expected * (1 - pr) * (1 - pc)))


def contributions(observed: np.ndarray, expected: np.ndarray, statistic: str = "pearson"
                  ) -> np.ndarray:
    """Each cell's term of X^2 ("pearson") or of G^2 ("g"); 0 where expected is 0."""
    o = np.asarray(observed, dtype=float)
    e = np.asarray(expected, dtype=float)
    if statistic == "pearson":
        return _safe_div((o - e) ** 2, e)
    ok = e > 0
    ratio = np.where(ok, o, 1.0) / np.where(ok, e, 1.0)
    return np.where(ok, 2.0 * (xlogy(o, ratio) - (o - e)), 0.0)


class CategoryShift(NamedTuple):
    """One category that drives a difference: index, code (if codes given), direction
    ("up" = more defects than expected, "down" = fewer), adjusted residual, and whether the
    category is impossible under the baseline (then adjusted_residual is NaN)."""

    index: int
    code: object
    direction: str
    adjusted_residual: float
    impossible: bool = False


def top_categories(
    adjusted: object,
    *,
    codes: object = None,
    limit: int = 3,
    threshold: float = 2.0,
    impossible: object = None,
) -> list[CategoryShift]:
    """Categories with |adjusted residual| >= ``threshold``, largest first, at most ``limit``.

    ``adjusted`` is a 1-D array of adjusted residuals or a single-line result that has
    ``adjusted_residuals`` (and, for a fit to baseline, ``impossible_mask``, which is listed
    first). The default threshold 2 is common practice (about the two-sided 5% normal point),
    no source.
    """
    if hasattr(adjusted, "adjusted_residuals"):
        impossible = getattr(adjusted, "impossible_mask", impossible)
        adjusted = adjusted.adjusted_residuals
    r = np.asarray(adjusted, dtype=float)
    if r.ndim != 1:
        raise ValueError("top_categories works on one line: pass a 1-D array or result.row(i)")
    imp = np.zeros(r.shape, bool) if impossible is None else np.asarray(impossible, bool)
    names = list(range(r.size)) if codes is None else list(codes)  # type: ignore[call-overload]
    out = [CategoryShift(int(i), names[i], "up", float("nan"), True) for i in np.flatnonzero(imp)]
    order = np.argsort(-np.abs(r), kind="stable")
    for i in order:
        if imp[i] or abs(r[i]) < threshold:
            continue
        out.append(CategoryShift(int(i), names[i], "up" if r[i] > 0 else "down", float(r[i])))
    return out[:limit]

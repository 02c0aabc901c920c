"""Simultaneous confidence intervals for multinomial proportions (baseline fitting uses them).

- Goodman (1965, *Technometrics* 7, 247-254): with B = chi2_{1 - alpha/k}(1) (Bonferroni),
  p_i in [B + 2 n_i -/+ sqrt(B (B + 4 n_i (N - n_i) / N))] / (2 (N + B)).
- Sison & Glaz (1995, *JASA* 90, 366-369): p_i in [n_i/N - c/N, n_i/N + (c + 2 gamma)/N],
  clipped to [0, 1], where the integer c solves nu(c) <= 1 - alpha < nu(c + 1), nu(c) being
  the Edgeworth approximation of P(n_i - c <= X_i <= n_i + c for all i) built from truncated
  Poisson moments, and gamma = (1 - alpha - nu(c)) / (nu(c + 1) - nu(c)). Sison and Glaz
  recommend it for k >= 7 categories (with fewer it still runs; a warning is logged).
"""

from __future__ import annotations

import logging

import numpy as np
from scipy import special, stats

from qcfit.errors import InvalidArgumentError
from qcfit.stats import _checks

log = logging.getLogger(__name__)
METHODS = ("goodman", "sison-glaz")


def _goodman(x: np.ndarray, alpha: float) -> np.ndarray:
    n = x.sum()
    b = stats.chi2.isf(alpha / x.size, 1)
    half = np.sqrt(b * (b + 4 * x * (n - x) / n))
    low = (b + 2 * x - half) / (2 * (n + b))
    high = (b + 2 * x + half) / (2 * (n + b))
    return np.column_stack([np.maximum(low, 0.0), np.minimum(high, 1.0)])


def _poisson_box(lo: np.ndarray, hi: np.ndarray, lam: np.ndarray) -> np.ndarray:
    """P(lo <= Z <= hi) for Z ~ Poisson(lam), elementwise (empty box -> 0)."""
    return np.where(hi >= lo, _poisson_cdf(hi, lam) - _poisson_cdf(lo - 1, lam), 0.0)


def _poisson_cdf(k: np.ndarray, lam: np.ndarray) -> np.ndarray:
    """P(Z <= k) for Z ~ Poisson(lam); scipy.special.pdtr without the distribution overhead."""
    k = np.asarray(k, dtype=float)
    return np.where(k < 0, 0.0, special.pdtr(np.maximum(k, 0.0), lam))


def _factorial_moment(lo, hi, r, lam):
    """r-th factorial moment of Poisson(lam) truncated to [lo, hi]."""
    return lam**r * (1 - (_poisson_box(hi - r + 1, hi, lam) - _poisson_box(lo - r, lo - 1, lam))
                     / _poisson_box(lo, hi, lam))


def _nu(c: float, x: np.ndarray) -> float:
    """Sison-Glaz eq. (7): approximate coverage of the box n_i +/- c."""
    n = x.sum()
    lo, hi = np.maximum(x - c, 0), np.minimum(x + c, n)
    f1, f2, f3, f4 = (_factorial_moment(lo, hi, r, x) for r in range(1, 5))
    mu = f1
    m2 = f2 + mu - mu**2
    m3 = f3 + f2 * (3 - 3 * mu) + mu - 3 * mu**2 + 2 * mu**3
    m4 = f4 + f3 * (6 - 4 * mu) + f2 * (7 - 12 * mu + 6 * mu**2) + mu - 4 * mu**2 \
        + 6 * mu**3 - 3 * mu**4
    s2 = m2.sum()
    g1 = m3.sum() / s2**1.5
    g2 = (m4.sum() - 3 * (m2**2).sum()) / s2**2
    z = (n - mu.sum()) / np.sqrt(s2)
    h3, h4, h6 = z**3 - 3 * z, z**4 - 6 * z**2 + 3, z**6 - 15 * z**4 + 45 * z**2 - 15
    f = stats.norm.pdf(z) * (1 + g1 * h3 / 6 + g2 * h4 / 24 + g1**2 * h6 / 72) / np.sqrt(s2)
    log_box = np.log(_poisson_box(lo, hi, x)).sum()
    return float(np.exp(log_box + np.log(f) - stats.poisson.logpmf(n, n)))


def _sison_glaz(x: np.ndarray, alpha: float) -> np.ndarray:
    n = x.sum()
    if x.size < 7:
        log.warning("Sison-Glaz intervals with %d < 7 categories may be inaccurate", x.size)
    target = 1 - alpha
    with np.errstate(divide="ignore", invalid="ignore"):
        c = _first_c_above(x, target, int(n))
        nu_c, nu_next = (_nu(c, x), _nu(c + 1, x)) if c is not None else (np.nan, np.nan)
    if c is None or not nu_c <= target < nu_next:
        log.warning("no Sison-Glaz solution for counts %s: Goodman intervals instead",
                    x.astype(int).tolist())
        return _goodman(x, alpha)
    gamma = (target - nu_c) / (nu_next - nu_c)
    p = x / n
    return np.column_stack([np.maximum(p - c / n, 0.0), np.minimum(p + (c + 2 * gamma) / n, 1.0)])


def _first_c_above(x: np.ndarray, target: float, n: int) -> int | None:
    """Smallest integer c in [1, n] with nu(c + 1) > target, by bisection (nu grows with c:
    a wider box covers more); None when even c = n does not reach it."""
    lo, hi = 1, max(n, 1)
    if not _nu(hi + 1, x) > target:
        return None
    while lo < hi:
        mid = (lo + hi) // 2
        if _nu(mid + 1, x) > target:
            hi = mid
        else:
            lo = mid + 1
    return lo


def multinomial_intervals(counts: object, confidence: float = 0.95, method: str = "goodman"
                          ) -> np.ndarray:
    """Simultaneous intervals for the k category proportions of ``counts``: (k, 2) array of
    [low, high] with joint coverage ``confidence``."""
    method = _checks.choice(method, "method", METHODS)
    x = _checks.counts(counts, "counts", ndim=(1,))
    alpha = 1 - _checks.probability(confidence, "confidence")
    if x.sum() <= 0:
        raise InvalidArgumentError("counts", "all counts are zero")
    if x.size < 2:
        raise InvalidArgumentError("counts", "needs at least 2 categories")
    out = _goodman(x, alpha) if method == "goodman" else _sison_glaz(x, alpha)
    return _checks.readonly(out)

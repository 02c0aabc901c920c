"""Defect rate of a line against a baseline rate (defects per inspected unit).

Exact one-sided Poisson test for an increase: with d defects in u units and baseline rate
r0, mu = u r0 and p = P(X >= d), X ~ Poisson(mu) (the exact test of R ``poisson.test`` with
alternative "greater"). Effect size: the ratio (d / u) / r0.

Exact (Garwood 1936, *Biometrika* 28, 437-442) interval for a Poisson rate::

    lower = chi2_{a/2}(2 d) / (2 u),  upper = chi2_{1 - a/2}(2 d + 2) / (2 u),  a = 1 - conf

with lower = 0 when d = 0. Baseline fitting uses it for the rate of a fit window.
"""

from __future__ import annotations

import numpy as np
from scipy import special, stats

from qcfit.errors import InvalidArgumentError
from qcfit.stats import _checks
from qcfit.stats.results import RateResult


def _units(units: object, shape: tuple[int, ...]) -> np.ndarray:
    u = _checks.as_float_array(units, "units")
    bad = ~np.isfinite(u) | (u < 0)
    if bad.any():
        raise InvalidArgumentError("units", "must be finite and >= 0")
    try:
        return np.broadcast_to(u, shape).astype(float)
    except ValueError as exc:
        raise InvalidArgumentError("units", f"shape {u.shape} does not match {shape}") from exc


def poisson_sf(k: object, mu: object) -> np.ndarray:
    """P(X > k) for X ~ Poisson(mu), arrays broadcast (float64 array out).

    The same values as ``scipy.stats.poisson.sf`` (``scipy.special.pdtrc`` at floor(k), 1 for
    k < 0) without its per-call argument handling, which costs about 20x the special function
    on a shift's 50 lines; input with a non-finite k or mu, or mu < 0, goes to scipy.stats.
    """
    k, mu = np.broadcast_arrays(np.asarray(k, dtype=float), np.asarray(mu, dtype=float))
    if not (np.isfinite(k).all() and np.isfinite(mu).all() and (mu >= 0).all()):
        return np.asarray(stats.poisson.sf(k, mu), dtype=float)
    tail = np.clip(special.pdtrc(np.floor(np.maximum(k, 0.0)), mu), 0, 1)
    return np.where(k < 0, 1.0, tail)


def poisson_isf(q: object, mu: object) -> np.ndarray:
    """The smallest k with P(X > k) <= q for X ~ Poisson(mu), arrays broadcast (float64 out).

    ``scipy.stats.poisson.isf`` for 0 < q < 1 and finite mu >= 0, computed as scipy does
    (its ppf at 1 - q from ``scipy.special.pdtrik``, stepped down one where ``pdtr`` allows)
    without the per-call argument handling; other input goes to scipy.stats.
    """
    q, mu = np.broadcast_arrays(np.asarray(q, dtype=float), np.asarray(mu, dtype=float))
    if not (((q > 0) & (q < 1)).all() and np.isfinite(mu).all() and (mu >= 0).all()):
        return np.asarray(stats.poisson.isf(q, mu), dtype=float)
    p = 1.0 - q
    vals = np.ceil(special.pdtrik(p, mu))
    vals1 = np.maximum(vals - 1, 0)
    return np.where(special.pdtr(vals1, mu) >= p, vals1, vals)


def poisson_rate_interval(defects: object, units: object, confidence: float = 0.95
                          ) -> tuple[object, object]:
    """Exact (Garwood) interval (low, high) for a rate, per unit; floats or arrays."""
    d = _checks.counts(defects, "defects", ndim=(0, 1)) if np.ndim(defects) else \
        _checks.counts([defects], "defects", ndim=(1,))[0]
    u = _units(units, np.shape(d))
    a = 1 - _checks.probability(confidence, "confidence")
    if (u <= 0).any():
        raise InvalidArgumentError("units", "must be > 0 for a rate interval")
    with np.errstate(invalid="ignore"):
        low = np.where(d > 0, stats.chi2.ppf(a / 2, 2 * d) / (2 * u), 0.0)
    high = stats.chi2.ppf(1 - a / 2, 2 * d + 2) / (2 * u)
    if np.ndim(d) == 0:
        return float(low), float(high)
    return _checks.readonly(low), _checks.readonly(high)


def rate_test(defects: object, units: object, baseline_rate: object, *,
              confidence: float = 0.95, interval: bool = True) -> RateResult:
    """One-sided exact Poisson test that the rate d/u exceeds ``baseline_rate`` (per unit).

    Scalars or arrays of shape (m,). A line with 0 units is not tested (NaN p-value); 0 defects
    gives p = 1. ``baseline_rate`` must be > 0. ``interval=False`` skips the interval for the
    rate (``ci_low``/``ci_high`` are then NaN), for callers that need the p-value only.
    """
    d = _checks.counts(np.atleast_1d(np.asarray(defects, dtype=float)), "defects", ndim=(1,))
    single = np.ndim(defects) == 0
    u = _units(units, d.shape)
    r0 = _checks.as_float_array(baseline_rate, "baseline_rate")
    if (~np.isfinite(r0) | (r0 <= 0)).any():
        raise InvalidArgumentError("baseline_rate", "must be finite and > 0")
    r0 = np.broadcast_to(r0, d.shape).astype(float)
    conf = _checks.probability(confidence, "confidence")
    tested = u > 0
    mu = u * r0
    safe_u = np.where(tested, u, 1.0)
    p = np.where(tested, poisson_sf(d - 1, mu), np.nan)
    rate = np.where(tested, d / safe_u, np.nan)
    if interval:
        low, high = poisson_rate_interval(d, safe_u, conf)
    else:
        low = high = np.full(d.shape, np.nan)
    reason = np.where(tested, "exact one-sided Poisson test for an increase",
                      "not tested: no inspected units").astype(object)
    out = dict(defects=d.astype(np.int64), units=u, baseline_rate=r0, expected=mu, rate=rate,
               ratio=rate / r0, pvalue=p, ci_low=np.where(tested, low, np.nan),
               ci_high=np.where(tested, high, np.nan), tested=tested, method_reason=reason)
    if single:
        out = {k: v[0].item() if isinstance(v[0], np.generic) else v[0] for k, v in out.items()}
    else:
        out = {k: _checks.readonly(np.asarray(v)) for k, v in out.items()}
    return RateResult(**out, confidence=conf)

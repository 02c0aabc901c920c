"""Power and sample size of chi-square tests (noncentral chi-square).

Cohen (1988), *Statistical Power Analysis for the Behavioral Sciences*, 2nd ed., ch. 7::

    power = P(chi2'(dof, lambda = n w^2) > chi2_{1 - alpha}(dof))

the model of R ``pwr::pwr.chisq.test`` and statsmodels ``GofChisquarePower`` (which takes
n_bins = dof + 1). The monitor uses it to say "too little data to tell": a shift whose power
against the smallest effect that matters is low cannot be called in control.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import optimize, stats

from qcfit.errors import InvalidArgumentError
from qcfit.stats import _checks

MAX_N = 10**12


def _dof(dof: int) -> int:
    return _checks.positive_int(dof, "dof")


def _positive(x: float, name: str) -> float:
    v = float(x)
    if not np.isfinite(v) or v <= 0:
        raise InvalidArgumentError(name, f"must be a positive number, got {x!r}")
    return v


def _power(w: float, dof: int, n: float, alpha: float) -> float:
    crit = stats.chi2.isf(alpha, dof)
    return float(stats.ncx2.sf(crit, dof, n * w * w))


def chisq_power(w: float, dof: int, n: float, alpha: float = 0.05) -> float:
    """Power of a chi-square test with ``dof`` degrees of freedom for effect size w (Cohen's w)
    with ``n`` observations at level ``alpha``."""
    w = float(w)
    if not np.isfinite(w) or w < 0:
        raise InvalidArgumentError("w", f"must be >= 0, got {w!r}")
    return _power(w, _dof(dof), _positive(n, "n"), _checks.probability(alpha, "alpha"))


def sample_size_for_power(w: float, dof: int, alpha: float = 0.05, power: float = 0.8) -> int:
    """Smallest whole n whose power reaches ``power`` (Cohen's tables round to the nearest n
    instead, so they can show one less)."""
    w = _positive(w, "w")
    dof = _dof(dof)
    alpha = _checks.probability(alpha, "alpha")
    target = _checks.probability(power, "power")
    if target <= alpha:
        return 1
    hi = 1.0
    while _power(w, dof, hi, alpha) < target:
        hi *= 2
        if hi > MAX_N:
            raise InvalidArgumentError("w", f"effect {w!r} too small: n would exceed {MAX_N}")
    x = optimize.brentq(lambda n: _power(w, dof, n, alpha) - target, 0.0, hi, xtol=1e-10)
    n = max(1, math.ceil(x))
    while n > 1 and _power(w, dof, n - 1, alpha) >= target:
        n -= 1
    while _power(w, dof, n, alpha) < target:
        n += 1
    return n


def detectable_effect(n: float, dof: int, alpha: float = 0.05, power: float = 0.8) -> float:
    """Smallest Cohen's w detected with probability ``power`` from ``n`` observations."""
    n = _positive(n, "n")
    dof = _dof(dof)
    alpha = _checks.probability(alpha, "alpha")
    target = _checks.probability(power, "power")
    if target <= alpha:
        return 0.0
    hi = 1.0
    while _power(hi, dof, n, alpha) < target:
        hi *= 2
    return float(optimize.brentq(lambda w: _power(w, dof, n, alpha) - target, 0.0, hi,
                                 xtol=1e-14, rtol=1e-12))

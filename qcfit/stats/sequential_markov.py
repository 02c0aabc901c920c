"""Exact run lengths of one-sided CUSUMs by the Markov chain of Brook & Evans (1972).

Brook & Evans (1972), "An approach to the probability distribution of CUSUM run length",
Biometrika 59(3) (method from memory): a CUSUM ``S_t = max(0, S_{t-1} + J_t)`` whose
increments ``J`` live on a lattice ``{j * step}`` is a Markov chain on the states
``0, step, ..., (M-1) step`` below the limit ``h = M step``. With ``Q`` the transient
transition matrix, the vector of ARLs from every start state is ``(I - Q)^{-1} 1``.

* Integer increments (Bernoulli CUSUM with integer weights, Poisson CUSUM of Lucas 1985
  with integer reference value ``k`` and limit ``h``): the chain is exact.
* Real increments (the multinomial LLR): each increment value's probability is split between
  its two lattice neighbours (mean kept); with ``step ~ h / 300`` the ARL0 is within about 1-2%
  of a 4x finer lattice (a finer step is a parameter).

Every limit at once: the chain below limit ``L`` is the chain below a larger limit restricted
to its first ``L`` states (``Q_L = Q[:L, :L]``), so one Gaussian elimination of ``I - Q``
without pivoting (stable: ``I - Q`` is a weakly row-diagonally-dominant M-matrix, Golub & Van
Loan, *Matrix Computations*, 4th ed. 2013, sec. 3.4.3, growth factor at most 2) gives the LU
factors of every leading block. With ``y = L^{-1} 1`` and ``r`` the first row of ``U^{-1}``
the zero-state ARL at limit ``L`` is ``sum_{j < L} r_j y_j`` (:func:`arl_all_limits`). The
elimination runs in numpy's element-wise loops, not in a threaded BLAS: on a busy 2-core machine
OpenBLAS threads turned a 150 x 150 solve from 0.1 ms into 100 ms.

Also Siegmund's corrected-diffusion approximation (Siegmund 1985, "Sequential Analysis",
from memory): ARL ~ (exp(-2 D b) + 2 D b - 1) / (2 D^2), D = mu/sigma, b = h/sigma + 1.166.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

from qcfit.errors import InvalidArgumentError


def _transient_matrix(pmf: np.ndarray, j_min: int, limit: int) -> np.ndarray:
    """``I - Q`` of S = max(0, S + J) on the states 0..limit-1 (validated pmf)."""
    pmf = np.asarray(pmf, dtype=float)
    if limit < 1:
        raise InvalidArgumentError("limit", f"must be >= 1, got {limit}")
    if np.any(pmf < 0) or not np.isclose(pmf.sum(), 1.0, atol=1e-9):
        raise InvalidArgumentError("pmf", "must be a probability vector")
    cdf = np.cumsum(pmf)
    i = np.arange(limit)
    # Q[i, l] = P(J = l - i) for l >= 1;  Q[i, 0] = P(J <= -i)
    off = np.subtract.outer(i, i)  # off[i, l] = i - l
    idx = -off - j_min  # index of J = l - i
    q = np.where((idx >= 0) & (idx < pmf.size), pmf[np.clip(idx, 0, pmf.size - 1)], 0.0)
    c_idx = -i - j_min
    q[:, 0] = np.where(c_idx >= 0, cdf[np.clip(c_idx, 0, cdf.size - 1)], 0.0)
    q[:, 0] = np.where(c_idx >= cdf.size, 1.0, q[:, 0])
    return np.eye(limit) - q


def arl_integer_chain(pmf: np.ndarray, j_min: int, limit: int) -> np.ndarray:
    """ARLs from each state 0..limit-1 of S = max(0, S + J), alarm at S >= limit.

    ``pmf[i]`` = P(J = j_min + i). Returns shape (limit,); [0] is the zero-state ARL.
    """
    return np.linalg.solve(_transient_matrix(pmf, j_min, limit), np.ones(limit))


def arl_all_limits(pmf: np.ndarray, j_min: int, limit: int) -> np.ndarray:
    """Zero-state ARL of S = max(0, S + J) for every integer limit 1..``limit``.

    ``pmf[i]`` = P(J = j_min + i). Returns shape (limit,): entry ``L - 1`` is the ARL with
    alarm at S >= L (what ``arl_integer_chain(pmf, j_min, L)[0]`` gives, up to rounding);
    inf from the first limit whose chain cannot leave its states. One elimination without
    pivoting for all limits (see the module docstring); O(limit^3 / 3), no BLAS.
    """
    a = _transient_matrix(pmf, j_min, limit)
    y = np.ones(limit)
    for k in range(limit - 1):
        piv = a[k, k]
        if not piv > 0:
            break
        col = a[k + 1:, k] / piv
        a[k + 1:, k + 1:] -= np.multiply.outer(col, a[k, k + 1:])
        y[k + 1:] -= col * y[k]
    diag = np.diagonal(a).copy()
    bad = np.flatnonzero(~(diag > 1e-300))
    n_ok = int(bad[0]) if bad.size else limit
    ut = np.ascontiguousarray(a.T)  # rows of ut are the columns of U
    r = np.zeros(limit)
    if n_ok:
        r[0] = 1.0 / diag[0]
    for j in range(1, n_ok):  # r = e_0^T U^{-1}: forward substitution on U^T
        r[j] = -float(ut[j, :j] @ r[:j]) / diag[j]
    out = np.cumsum(r * y)
    out[n_ok:] = np.inf
    return out


def bernoulli_cusum_arl(p: float, up: int, down: int, h: int) -> float:
    """Zero-state ARL of S = max(0, S + up*X - down*(1-X)), X ~ Bernoulli(p), alarm S >= h.

    Integer weights (scaled Bernoulli CUSUM, Reynolds & Stoumbos 1999); exact.
    """
    if not 0 < p < 1:
        raise InvalidArgumentError("p", f"must be in (0, 1), got {p}")
    pmf = np.zeros(up + down + 1)
    pmf[0], pmf[-1] = 1 - p, p
    return float(arl_integer_chain(pmf, -down, h)[0])


def poisson_cusum_arl(mu: float, k: int, h: int) -> float:
    """Zero-state ARL of the Poisson CUSUM S = max(0, S + X - k), alarm S >= h (Lucas 1985).

    X ~ Poisson(mu); integer ``k`` and ``h``; exact up to a 1e-14 tail cut.
    """
    if mu <= 0:
        raise InvalidArgumentError("mu", f"must be > 0, got {mu}")
    top = int(stats.poisson.isf(1e-15, mu)) + 1
    pmf = stats.poisson.pmf(np.arange(top + 1), mu)
    pmf[-1] += stats.poisson.sf(top, mu)
    return float(arl_integer_chain(pmf / pmf.sum(), -k, h)[0])


def siegmund_arl(mu: float, sigma: float, h: float) -> float:
    """Siegmund's corrected-diffusion ARL of a CUSUM with increment mean mu, SD sigma."""
    b = h / sigma + 1.166
    dlt = mu / sigma
    if abs(dlt) < 1e-9:
        return float(b * b)
    return float((np.exp(-2 * dlt * b) + 2 * dlt * b - 1) / (2 * dlt * dlt))


@dataclass(frozen=True, slots=True)
class LatticePmf:
    """Increment pmf on the lattice ``step * (j_min + i)``; ``method`` says how it was got."""

    pmf: np.ndarray
    j_min: int
    step: float
    method: str


def _n_profile(n_profile) -> tuple[np.ndarray, np.ndarray]:
    n = np.asarray(n_profile, dtype=np.int64).reshape(-1)
    if n.size == 0 or np.any(n < 0):
        raise InvalidArgumentError("n_profile", "needs one or more defect totals >= 0")
    vals, cnt = np.unique(n, return_counts=True)
    return vals, cnt / cnt.sum()


def llr_increment_pmf(p: np.ndarray, weights: np.ndarray, n_profile, step: float, *,
                      rng: np.random.Generator | None = None, draws: int = 200_000,
                      ) -> LatticePmf:
    """Lattice pmf of W = sum_j x_j w_j, x ~ Multinomial(n, p), n drawn from ``n_profile``.

    Exact when the weights take at most two distinct values (binomial) or three with
    n <= 400 (trinomial); otherwise a histogram of ``draws`` seeded multinomial draws.
    """
    p = np.asarray(p, float)
    w = np.asarray(weights, float)
    uw, inv = np.unique(np.round(w, 12), return_inverse=True)
    gp = np.bincount(inv, weights=p, minlength=uw.size)
    nv, npr = _n_profile(n_profile)
    vals, probs, method = [], [], "exact"
    if uw.size <= 2 or (uw.size == 3 and nv.max() <= 400):
        for n, pr in zip(nv, npr, strict=True):
            v, q = _grouped_exact(uw, gp, int(n))
            vals.append(v)
            probs.append(q * pr)
    else:
        method = f"histogram of {draws} draws"
        g = rng if rng is not None else np.random.default_rng(0)
        n_draw = g.choice(nv, size=draws, p=npr)
        x = g.multinomial(n_draw, gp)
        vals.append(x @ uw)
        probs.append(np.full(draws, 1.0 / draws))
    v = np.concatenate(vals)
    q = np.concatenate(probs)
    # split each value's probability between its two lattice neighbours so the mean is kept
    # (plain rounding aliases with the increment's own lattice and biased ARL0 by ~4%)
    u = v / step
    j = np.floor(u).astype(np.int64)
    frac = u - j
    j_min = int(j.min())
    size = int(j.max()) - j_min + 2
    pmf = np.bincount(j - j_min, weights=q * (1 - frac), minlength=size)
    pmf += np.bincount(j - j_min + 1, weights=q * frac, minlength=size)
    return LatticePmf(pmf / pmf.sum(), j_min, float(step), method)


def _grouped_exact(uw, gp, n):
    if uw.size == 1:
        return np.array([n * uw[0]]), np.array([1.0])
    if uw.size == 2:
        x = np.arange(n + 1)
        return x * uw[1] + (n - x) * uw[0], stats.binom.pmf(x, n, gp[1])
    a, b = np.meshgrid(np.arange(n + 1), np.arange(n + 1), indexing="ij")
    ok = a + b <= n
    a, b = a[ok], b[ok]
    c = n - a - b
    lp = (stats.multinomial.logpmf(np.stack([a, b, c], 1), n, gp) if n > 0
          else np.zeros(a.size))
    return a * uw[0] + b * uw[1] + c * uw[2], np.exp(lp)


def lattice_arl(lp: LatticePmf, h: float) -> float:
    """Zero-state ARL of the CUSUM with increment pmf ``lp`` and limit ``h``."""
    limit = max(1, int(np.ceil(h / lp.step - 1e-9)))
    return float(arl_integer_chain(lp.pmf, lp.j_min, limit)[0])


@dataclass(frozen=True, slots=True)
class MarkovCalibration:
    """Limit ``h`` with zero-state ARL0 ``arl0`` (Markov chain), lattice ``step``, method."""

    h: float
    arl0: float
    step: float
    method: str


def calibrate_llr_cusum(p0: np.ndarray, weights: np.ndarray, n_profile, arl0: float, *,
                        rng: np.random.Generator | None = None, points: int = 300,
                        ) -> MarkovCalibration:
    """Limit of one LLR CUSUM for in-control ARL ``arl0`` by the Brook-Evans chain.

    The ARL0 of every lattice limit up to about ``points`` states (one elimination,
    :func:`arl_all_limits`), the first lattice limit reaching ``arl0``, then interpolation of
    ln ARL between it and its lower neighbour.
    """
    if arl0 <= 1:
        raise InvalidArgumentError("arl0", f"must be > 1, got {arl0}")
    guess = np.log(arl0)  # Wald bound: ARL0 >= e^h, so the answer is below ln(arl0)
    step = guess / points
    lp = llr_increment_pmf(p0, weights, n_profile, step, rng=rng)
    hi = int(np.ceil(guess / step)) + 1
    arls = arl_all_limits(lp.pmf, lp.j_min, hi)
    while arls[-1] < arl0:  # increments so coarse that the bound is loose the other way
        hi *= 2
        arls = arl_all_limits(lp.pmf, lp.j_min, hi)
    # smallest lattice limit hi >= 2 with ARL0 >= arl0, and its lower neighbour lo
    hi = max(2, int(np.argmax(arls >= arl0)) + 1)
    lo = hi - 1
    a_lo, a_hi = float(arls[lo - 1]), float(arls[hi - 1])
    frac = (np.log(arl0) - np.log(a_lo)) / max(np.log(a_hi) - np.log(a_lo), 1e-12)
    h = (lo + float(np.clip(frac, 1e-9, 1)) * (hi - lo)) * step
    # ceil(h / step) == hi, so the chain's ARL0 at h is a_hi (>= arl0, within one lattice step)
    return MarkovCalibration(float(h), float(a_hi), float(step), lp.method)

"""Control limits of the sequential charts for a target in-control ARL.

* **Concern CUSUMs** (one LLR CUSUM each): exact Brook-Evans Markov chain on the increment
  distribution mixed over the line's n profile (:mod:`qcfit.stats.sequential_markov`).
* **MEWMA and bank** (the omnibus pair): Monte Carlo. Per line, ``paths`` in-control paths of
  ``horizon`` shifts are simulated at once (n drawn from the line's n profile each shift).
  From the running maximum of each statistic, one simulation gives the ARL0 of *every*
  limit ``h`` by the renewal ratio estimator::

      ARL0(h) = sum_i min(T_i(h), H) / #{i : T_i(h) <= H}

  (exact when the chart's state at H is as good as new; the zero-state/steady-state ARL0
  difference of these charts is a few percent, and H = ARL0 keeps its weight below ~0.6 of
  it). Its Monte Carlo standard error (delta method, Var of sum(Y_i - A D_i) / (sum D_i)^2)
  is reported; relative SE ~ 1 / sqrt(number of alarms seen).
* The MEWMA and the bank run **together** and split the false-alarm budget equally: both get
  the same individual ARL0 ``B``, and ``B`` is chosen so that the combined scheme (signal if
  either signals) has ARL0 = target.

Every line draws from its own stream ``SeedSequence(seed).spawn(m)[i]``, so a line's limits do
not depend on which other lines are calibrated with it.
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass
from typing import Any

import numpy as np

from qcfit.errors import InvalidArgumentError
from qcfit.stats.pvalues import MultinomialSampler
from qcfit.stats.sequential import (
    DEFAULT_ARL0,
    SequentialDesign,
    SequentialLimits,
    _ro,
)
from qcfit.stats.sequential_markov import calibrate_llr_cusum

DEFAULT_PATHS = 300


# ------------------------------------------------------------------------------ simulation


@dataclass(frozen=True, slots=True)
class Traces:
    """Chart statistics along simulated paths: ``ewma`` (H, R), ``bank`` (H, R) max over the
    bank, ``concerns`` (H, R, c). Entry [t, i] is the value after shift t+1 of path i."""

    ewma: np.ndarray
    bank: np.ndarray
    concerns: np.ndarray


def bank_matrix(design: SequentialDesign, line: int) -> np.ndarray:
    """(k, D) matrix whose product with a count vector gives every bank increment."""
    k, d = design.k, design.d
    w = np.zeros((k, d))
    cols = np.arange(d)
    w[design.bank_pairs[:, 0], cols] = design.bank_weights[line, :, 0]
    w[design.bank_pairs[:, 1], cols] = design.bank_weights[line, :, 1]
    return w


def simulate_traces(design: SequentialDesign, line: int, n_profile: Any, *, paths: int,
                    horizon: int, rng: np.random.Generator, p_after: Any = None,
                    change_at: int = 0, chunk: int = 64) -> Traces:
    """Run line ``line``'s charts on ``paths`` simulated paths of ``horizon`` shifts.

    Counts ~ Multinomial(n, p0), n drawn uniformly from ``n_profile`` per shift and path;
    from shift ``change_at + 1`` on (0-based index ``change_at``) the shares are ``p_after``
    if given. Same recursions as :func:`qcfit.stats.sequential.update`.
    """
    p0 = design.p0[line]
    p1 = p0 if p_after is None else np.asarray(p_after, float)
    nv = np.asarray(n_profile, dtype=np.int64).reshape(-1)
    lam, k = design.ewma_lambda, design.k
    wb = bank_matrix(design, line)
    wc = design.concern_weights[line].T  # (k, c)
    inv_p0 = 1.0 / p0
    draw0 = MultinomialSampler(p0, int(nv.max()))
    draw1 = draw0 if p_after is None else MultinomialSampler(p1, int(nv.max()))
    z = np.broadcast_to(p0, (paths, k)).copy()
    v = np.zeros(paths)
    sb = np.zeros((paths, design.d))
    sc = np.zeros((paths, design.c))
    out_e = np.empty((horizon, paths))
    out_b = np.zeros((horizon, paths))
    out_c = np.empty((horizon, paths, design.c))
    for t0 in range(0, horizon, chunk):
        hc = min(chunk, horizon - t0)
        n = nv[rng.integers(0, nv.size, size=(hc, paths))] if nv.size > 1 else \
            np.full((hc, paths), nv[0])
        x = np.empty((hc, paths, k))
        pre = max(0, min(hc, change_at - t0))
        if pre:
            x[:pre] = draw0.draw(rng, n[:pre])
        if pre < hc:
            x[pre:] = draw1.draw(rng, n[pre:])
        inc_b = x @ wb if design.d else None  # stacked small products: BLAS, one thread
        inc_c = x @ wc
        has = n > 0
        y = x / np.where(has, n, 1)[..., None]
        all_has = bool(has.all())
        inv_n = 1.0 / np.where(has, n, 1)
        for s in range(hc):
            if lam > 0:
                _ewma_sim_step(z, v, y[s], has[s], inv_n[s], lam, all_has)
                q = ((z - p0) ** 2) @ inv_p0
                np.divide(q, np.where(v > 0, v, np.inf), out=out_e[t0 + s])
            else:
                out_e[t0 + s] = 0.0
            if design.d:
                np.add(sb, inc_b[s], out=sb)
                np.maximum(sb, 0.0, out=sb)
                sb.max(axis=1, out=out_b[t0 + s])
            if design.c:
                np.add(sc, inc_c[s], out=sc)
                np.maximum(sc, 0.0, out=sc)
                out_c[t0 + s] = sc
    return Traces(out_e, out_b, out_c)


def _ewma_sim_step(z, v, y, has, inv_n, lam, all_has) -> None:
    """In place: z <- (1-lam) z + lam y, v <- (1-lam)^2 v + lam^2 / n where n > 0."""
    if all_has:
        z *= 1 - lam
        z += lam * y
        v *= (1 - lam) ** 2
        v += lam**2 * inv_n
        return
    z[has] = (1 - lam) * z[has] + lam * y[has]
    v[has] = (1 - lam) ** 2 * v[has] + lam**2 * inv_n[has]


# ------------------------------------------------------------------- ARL from running maxima


@dataclass(frozen=True, slots=True)
class ArlCurve:
    """ARL0(h) of one statistic from its running maximum ``runmax`` (H, R)."""

    inner: np.ndarray  # sorted runmax[:H-1], flattened
    last: np.ndarray  # sorted runmax[H-1]
    paths: int

    @staticmethod
    def from_traces(stat: np.ndarray) -> ArlCurve:
        rm = np.maximum.accumulate(stat, axis=0)
        return ArlCurve(np.sort(rm[:-1].ravel()), np.sort(rm[-1]), rm.shape[1])

    def arl(self, h: float) -> float:
        y = self.paths + np.searchsorted(self.inner, h, side="left")
        d = self.last.size - np.searchsorted(self.last, h, side="left")
        return float(y / d) if d > 0 else float("inf")

    def limit_for(self, target: float) -> float:
        lo, hi = float(self.inner[0]) if self.inner.size else 0.0, float(self.last[-1])
        if self.arl(hi) < target:
            return float("nan")  # target beyond what the horizon shows
        for _ in range(60):
            mid = 0.5 * (lo + hi)
            if self.arl(mid) >= target:
                hi = mid
            else:
                lo = mid
        return hi


def _first_passage_arl(rm_e: np.ndarray | None, he: float, rm_b: np.ndarray | None,
                       hb: float) -> tuple[float, float, int]:
    """:func:`ratio_arl` of the scheme "MEWMA >= he or bank >= hb" from the running maxima
    (H, R) of the two statistics: each path's first alarm is the number of shifts where
    both running maxima are still below their limits (they never decrease)."""
    below = None
    for rm, h in ((rm_e, he), (rm_b, hb)):
        if rm is not None:
            b = np.count_nonzero(rm < h, axis=0)
            below = b if below is None else np.minimum(below, b)
    assert below is not None
    horizon = (rm_e if rm_e is not None else rm_b).shape[0]
    alarmed = below < horizon
    if not alarmed.any():
        return float("inf"), float("inf"), 0
    y = np.where(alarmed, below + 1, horizon).astype(float)
    d = alarmed.astype(float)
    a = y.sum() / d.sum()
    se = float(np.sqrt(np.sum((y - a * d) ** 2)) / d.sum())
    return float(a), se, int(d.sum())


def ratio_arl(stat_over_limit: np.ndarray) -> tuple[float, float, int]:
    """ARL0 estimate, its MC standard error and the alarm count; alarm when value >= 1.

    ``stat_over_limit`` (H, R): each path's statistic divided by its limit.
    """
    hit = np.maximum.accumulate(stat_over_limit, axis=0) >= 1.0
    alarmed = hit[-1]
    h = hit.shape[0]
    first = np.where(alarmed, hit.argmax(axis=0) + 1, h)
    y = first.astype(float)
    d = alarmed.astype(float)
    if d.sum() == 0:
        return float("inf"), float("inf"), 0
    a = y.sum() / d.sum()
    se = float(np.sqrt(np.sum((y - a * d) ** 2)) / d.sum())
    return float(a), se, int(d.sum())


# ----------------------------------------------------------------------------- calibration


@dataclass(frozen=True, slots=True)
class SequentialCalibration:
    """Limits for a target ARL0 and what the simulation showed at them (arrays read-only).

    ``omnibus_arl0``/``omnibus_se`` (m,): MC ARL0 of MEWMA-or-bank at the limits and its
    standard error; ``omnibus_alarms`` (m,) alarms seen; ``ewma_arl0``/``bank_arl0`` (m,)
    each chart's own ARL0 (MC); ``concern_arl0`` (m, c) by the Markov chain.
    """

    limits: SequentialLimits
    arl0_target: float
    omnibus_arl0: np.ndarray
    omnibus_se: np.ndarray
    omnibus_alarms: np.ndarray
    ewma_arl0: np.ndarray
    bank_arl0: np.ndarray
    concern_arl0: np.ndarray
    seed: int
    paths: int
    horizon: int
    method: str
    method_reason: str


def line_profiles(n_profile: Any, m: int) -> list[np.ndarray]:
    """One 1-D array of typical shift totals per line (shared if a single array is given)."""
    flat = np.isscalar(n_profile) or all(np.isscalar(a) for a in n_profile)
    if flat:
        arrs = [np.asarray(n_profile, dtype=np.int64).reshape(-1)] * m
    else:
        arrs = [np.asarray(a, dtype=np.int64).reshape(-1) for a in n_profile]
        if len(arrs) == 1:
            arrs = arrs * m
    if len(arrs) != m:
        raise InvalidArgumentError("n_profile", f"needs one profile or {m} (one per line)")
    for i, a in enumerate(arrs):
        if a.size == 0 or np.any(a < 0) or not np.any(a > 0):
            raise InvalidArgumentError("n_profile", f"line {i}: needs totals >= 0, some > 0")
    return arrs


def _omnibus_limits(tr: Traces, arl0: float, use_e: bool, use_b: bool):
    ce = ArlCurve.from_traces(tr.ewma) if use_e else None
    cb = ArlCurve.from_traces(tr.bank) if use_b else None
    if not (use_e or use_b):
        return np.inf, np.inf, (np.inf, 0.0, 0), np.inf, np.inf

    rm_e = np.maximum.accumulate(tr.ewma, axis=0) if ce else None
    rm_b = np.maximum.accumulate(tr.bank, axis=0) if cb else None

    def joint(b: float):
        he = ce.limit_for(b) if ce else np.inf
        hb = cb.limit_for(b) if cb else np.inf
        return he, hb, _first_passage_arl(rm_e, he, rm_b, hb)

    if ce is None or cb is None:
        he, hb, res = joint(arl0)
    else:
        lo, hi = arl0, 2.0 * arl0
        for _ in range(20):  # bracket width 2^-20 arl0
            mid = 0.5 * (lo + hi)
            he, hb, res = joint(mid)
            if not np.isfinite(he) or not np.isfinite(hb):
                hi = mid
                continue
            lo, hi = (lo, mid) if res[0] >= arl0 else (mid, hi)
        he, hb, res = joint(hi)
    ae = ce.arl(he) if ce else np.inf
    ab = cb.arl(hb) if cb else np.inf
    return he, hb, res, ae, ab


def calibrate(design: SequentialDesign, n_profile: Any, *, arl0: float = DEFAULT_ARL0,
              seed: int = 0, paths: int = DEFAULT_PATHS, horizon: int | None = None,
              line_ids: Any = None) -> SequentialCalibration:
    """Limits of every chart of ``design`` for in-control ARL ``arl0`` (shifts).

    ``n_profile``: typical defects per shift, one 1-D array for all lines or one per line
    (each simulated shift draws its n uniformly from it). ``horizon`` defaults to ``arl0``.
    Line i draws from ``SeedSequence(seed, spawn_key=(line_ids[i],))`` (default ids 0..m-1),
    so calibrating lines in parts (e.g. one process per core) gives the same limits.
    MC relative SE of the omnibus ARL0 is about 1/sqrt(0.63 paths).
    """
    if arl0 <= 1:
        raise InvalidArgumentError("arl0", f"must be > 1, got {arl0}")
    if paths < 20:
        raise InvalidArgumentError("paths", f"must be >= 20, got {paths}")
    h_len = int(horizon or round(arl0))
    profs = line_profiles(n_profile, design.m)
    m, c = design.m, design.c
    ids = list(range(m)) if line_ids is None else [int(i) for i in line_ids]
    if len(ids) != m:
        raise InvalidArgumentError("line_ids", f"needs {m} ids, got {len(ids)}")
    streams = [np.random.SeedSequence(seed, spawn_key=(i,)) for i in ids]
    he, hb = np.full(m, np.inf), np.full(m, np.inf)
    oa, ose, oal = np.full(m, np.inf), np.zeros(m), np.zeros(m, dtype=np.int64)
    ea, ba = np.full(m, np.inf), np.full(m, np.inf)
    hc, ca = np.full((m, c), np.inf), np.full((m, c), np.inf)
    use_e, use_b = design.ewma_lambda > 0, design.d > 0
    for i in range(m):
        rng = np.random.default_rng(streams[i])
        for j in range(c):
            mc = calibrate_llr_cusum(design.p0[i], design.concern_weights[i, j], profs[i], arl0,
                                     rng=rng)
            hc[i, j], ca[i, j] = mc.h, mc.arl0
        if use_e or use_b:
            tr = simulate_traces(design, i, profs[i], paths=paths, horizon=h_len, rng=rng)
            he[i], hb[i], (oa[i], ose[i], oal[i]), ea[i], ba[i] = _omnibus_limits(
                tr, arl0, use_e, use_b)
    bad = ~np.isfinite(he) & use_e | ~np.isfinite(hb) & use_b
    if np.any(bad):
        raise InvalidArgumentError("paths", f"too few paths or shifts to reach ARL0 {arl0} on "
                                   f"line {int(np.flatnonzero(bad)[0])}; raise paths/horizon")
    limits = SequentialLimits(_ro(he), _ro(hc), _ro(hb))
    return SequentialCalibration(
        limits=limits, arl0_target=float(arl0), omnibus_arl0=_ro(oa), omnibus_se=_ro(ose),
        omnibus_alarms=_ro(oal), ewma_arl0=_ro(ea), bank_arl0=_ro(ba), concern_arl0=_ro(ca),
        seed=int(seed), paths=int(paths), horizon=h_len,
        method="monte carlo (MEWMA, bank) + Brook-Evans Markov chain (concern CUSUMs)",
        method_reason="renewal ratio estimator on running maxima; equal split of the "
                      "false-alarm budget between MEWMA and bank",
    )


def calibration_key(design: SequentialDesign, line: int, n_profile: Any, *,
                    arl0: float = DEFAULT_ARL0, seed: int = 0, paths: int = DEFAULT_PATHS,
                    horizon: int | None = None) -> str:
    """Stable hex key of everything a line's limits depend on (for a calibration cache).

    Covers the line's baseline and chart settings, its n profile (as a sorted multiset), the
    target ARL0 and the simulation settings; limits are recalibrated when the key changes.
    """
    prof = sorted(int(v) for v in np.asarray(n_profile, dtype=np.int64).reshape(-1))
    body = {
        "v": 1, "p0": design.p0[line].tolist(), "lambda": design.ewma_lambda,
        "concerns": design.concern_p1[line].tolist(), "bank_w": design.bank_w,
        "pairs": design.bank_pairs.tolist(), "n": prof, "arl0": float(arl0), "seed": int(seed),
        "paths": int(paths), "horizon": int(horizon or round(arl0)),
    }
    text = json.dumps(body, sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(text.encode()).hexdigest()


def conservative_limits(design: SequentialDesign, arl0: float = DEFAULT_ARL0) -> SequentialLimits:
    """Safe limits before a calibration is ready (ARL0 >= arl0 for CUSUMs, any n sequence).

    LLR CUSUM: h = ln(arl0) (e^S is built on P0-martingales, so ARL0 >= e^h); bank of D:
    h = ln(D arl0) (both as in the project's methods notes, a standard optional-stopping
    argument); MEWMA: not covered by this argument, so it is switched off (inf).
    """
    m, c, d = design.m, design.c, design.d
    return SequentialLimits(
        ewma=_ro(np.full(m, np.inf)), concerns=_ro(np.full((m, c), np.log(arl0))),
        bank=_ro(np.full(m, np.log(max(d, 1) * arl0) if d else np.inf)),
    )


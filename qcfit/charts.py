"""The sequential stage: each line's charts after each evaluated shift, and their findings.

For every line with a baseline in force, after each shift: the MEWMA of the category shares
beside the bank of directional CUSUMs (the default omnibus pair of
:mod:`qcfit.stats.sequential`), plus one LLR CUSUM per configured ``[sequential] concerns``
entry ("category X up by a factor r"). The pure part (:func:`plan_line`, :func:`advance`,
:func:`line_finding`, :func:`calibrate_plan`) takes the stored chart rows of the previous
shift, the baseline in force and this shift's counts; :class:`ChartStage` is the thin shell
the service hands its engine to (reads the previous rows, keeps the calibration cache, writes
the new rows inside the evaluation's own write transaction).

Rules (documented in the README):

* **Categories charted**: those with a baseline share > 0 (a defect in a category the baseline
  rules out is the per-shift test's "impossible category" alarm).
* **False-alarm budget**: ``target_arl`` is per line, for all its charts together. Without
  concerns the MEWMA + bank pair is calibrated jointly to it. With c concerns, half the
  false-alarm rate goes to the pair (ARL0 2 x target) and half is shared by the concern
  CUSUMs (ARL0 2 c x target each): the alarm rates add at most (union bound; common practice,
  no source), so the line's ARL0 is at least about the target.
* **n profile**: the median defects per shift of the line over the last 30 shifts in the store
  up to this one, rounded to a grid of 2 steps per doubling (about +-19 %), and simulated as
  Poisson with that mean (20 quantiles). The limits change only when the line's typical
  volume moves by a grid step.
* **Calibration**: Monte Carlo (pair) and Brook-Evans (concerns), seeded from ``[thresholds]
  seed`` and the cache key, cached in ``chart_calibration`` by a hash of everything the limits
  depend on (baseline shares, chart settings, n profile, target, seed, paths). If a
  calibration cannot be made, the conservative limits (ln(D ARL0) for the bank, ln(ARL0) for
  a CUSUM, MEWMA off) are used and the finding says so. One evaluation run spends at most
  ``CALIBRATION_BUDGET_S`` (10 CPU seconds) calibrating; lines beyond it get the conservative
  limits for that run and are calibrated by a following run (50 lines of 6 to 10 categories
  with two concerns each take about 6 CPU seconds, ``python -m bench sequential``, so a cold
  service start fills the cache in its first run).
* **Resets**: the charts start afresh at a line's first shift, when its baseline version or
  chart settings change, and after an acknowledgement with the cause removed.
* **Order**: the chart rows after shift s are computed from the rows of the latest shift before
  s. Evaluating a shift older than the latest chart rows re-evaluates every later shift that
  has chart rows, in order (:meth:`ChartStage.expand`), so later values never rest on an
  outdated past.
* **After a signal** the CUSUMs carried to the next shift are held at 1.5 x their limit
  (:func:`capped`), so a chart comes back below its limit within a few shifts once a large
  change is over; the alarm stays open (updated) while any chart is at its limit.
* **Start of the change**: a signal names the shift where the change most likely began (the
  CUSUM's last zero + 1; for the MEWMA the shift after it last sat at or below its in-control
  mean k - 1).
"""

from __future__ import annotations

import bisect
import dataclasses
import datetime as dt
import hashlib
import json
import logging
import math
import time
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import stats as sps

from qcfit import evaluate as ev
from qcfit.errors import InvalidArgumentError, NotFoundError, QcfitError, StoreError
from qcfit.model import BaselineRef, CountTable, ShiftInstance
from qcfit.stats.sequential import (
    STATE_FORMAT,
    SequentialDesign,
    SequentialLimits,
    SequentialState,
    SequentialStep,
    SignalReport,
    concern_share_up,
    init_state,
    make_design,
    signal_reports,
    stack_designs,
    stack_limits,
    stack_states,
    state_from_json,
    state_to_json,
    update,
)
from qcfit.stats.sequential_calibration import DEFAULT_PATHS, calibrate, conservative_limits
from qcfit.stats.sequential_markov import calibrate_llr_cusum

log = logging.getLogger(__name__)

CHART_MEWMA = "MEWMA"
CHART_BANK = "bank"
CUSUM_PREFIX = "CUSUM "
N_WINDOW = 30  # shifts whose median total sets the n profile
N_GRID = 2  # grid steps per doubling of the typical total (about +-19 %)
PROFILE_POINTS = 20
CALIBRATION_VERSION = 1
CHAIN_LOOKBACK = 5000
#: lattice states of the Brook-Evans chain: h within 0.3 % of a 300-state lattice in a check
#: (p0 of 8 categories, n ~ 200, ARL0 1480), at an eighth of the cost
MARKOV_POINTS = 150
#: CPU seconds one evaluation run may spend calibrating; later lines get conservative limits
#: until a following run has filled the cache (keeps a service start within its time budget)
CALIBRATION_BUDGET_S = 10.0
CUSUM_CAP = 1.5  # CUSUM values carried on are held at most this multiple of their limit
CALIBRATED = "calibrated"
CONSERVATIVE = "conservative"


# ---------------------------------------------------------------------------------------
# plan: what a line's charts are for one shift


@dataclass(frozen=True, slots=True)
class LinePlan:
    """A line's chart set under one baseline version: ``codes`` the charted categories (share
    > 0) at ``columns`` of the plant's category list; ``charts`` the chart names (MEWMA, bank,
    one per concern); ``signature`` a hash of everything the chart *values* depend on."""

    line: str
    baseline_version_id: int
    codes: tuple[str, ...]
    columns: tuple[int, ...]
    design: SequentialDesign
    charts: tuple[str, ...]
    signature: str
    skipped: tuple[str, ...] = ()


def _hash(body: Any) -> str:
    text = json.dumps(body, sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def plan_line(line: str, baseline: BaselineRef, settings: Any) -> LinePlan:
    """The chart set of ``line`` under ``baseline`` with ``[sequential]`` ``settings``.

    Raises InvalidArgumentError when fewer than two categories have a baseline share > 0.
    A concern on a category the baseline rules out, or whose factor would push the share to
    1 or more, is skipped (named in ``skipped``).
    """
    p = np.asarray(baseline.proportions, dtype=float)
    keep = np.flatnonzero(p > 0)
    if keep.size < 2:
        raise InvalidArgumentError(f"baseline {baseline.name}", "needs two categories with a "
                                   "share > 0 for sequential charts")
    codes = tuple(baseline.categories[j] for j in keep)
    p0 = p[keep] / p[keep].sum()
    concerns, names, skipped = [], [], []
    for c in settings.concerns:
        name = f"{c.category} x{c.factor:g}"
        if c.category not in codes or c.factor * p0[codes.index(c.category)] >= 1:
            skipped.append(name)
            continue
        concerns.append(concern_share_up(p0, codes.index(c.category), c.factor, name=name))
        names.append(CUSUM_PREFIX + name)
    design = make_design(p0, ewma_lambda=float(settings.ewma_lambda), concerns=concerns, bank=True)
    signature = _hash({"v": baseline.version_id, "codes": codes, "p0": p0.tolist(),
                       "lambda": design.ewma_lambda, "concerns": names, "bank_w": design.bank_w})
    return LinePlan(line, int(baseline.version_id), codes, tuple(int(j) for j in keep), design,
                    (CHART_MEWMA, CHART_BANK, *names), signature, tuple(skipped))


def n_level(totals: Sequence[int]) -> int:
    """Typical defects per shift: the median of ``totals`` on a grid of N_GRID steps per
    doubling (at least 1)."""
    t = np.asarray(totals, dtype=float)
    med = float(np.median(t)) if t.size else 0.0
    if med < 1:
        return 1
    return max(1, int(round(2 ** (round(N_GRID * math.log2(med)) / N_GRID))))


def n_profile(level: int) -> np.ndarray:
    """Shift totals the calibration draws from: Poisson(level) quantiles at (i + 0.5) / 20."""
    q = (np.arange(PROFILE_POINTS) + 0.5) / PROFILE_POINTS
    prof = sps.poisson.ppf(q, level).astype(np.int64)
    if not np.any(prof > 0):
        prof[-1] = 1
    return prof


def split_targets(target: float, concerns: int) -> tuple[float, float]:
    """(ARL0 of the MEWMA + bank pair, ARL0 of each concern CUSUM) for a line target."""
    if concerns == 0:
        return float(target), math.inf
    return 2.0 * target, 2.0 * concerns * target


# ---------------------------------------------------------------------------------------
# calibration


@dataclass(frozen=True, slots=True)
class LineLimits:
    """Limits of a line's charts and where they come from (``kind`` calibrated/conservative)."""

    key: str
    limits: SequentialLimits
    kind: str
    n_level: int
    details: Mapping[str, Any]

    def limits_for(self, chart: str, plan: LinePlan) -> float:
        """The limit of one chart of ``plan`` (inf: the chart never signals)."""
        if chart == CHART_MEWMA:
            return float(self.limits.ewma[0])
        if chart == CHART_BANK:
            return float(self.limits.bank[0])
        return float(self.limits.concerns[0, plan.charts.index(chart) - 2])


def calibration_key(plan: LinePlan, level: int, target: float, seed: int,
                    paths: int = DEFAULT_PATHS) -> str:
    """Hash of everything a line's limits depend on (the chart_calibration key)."""
    d = plan.design
    return _hash({"v": CALIBRATION_VERSION, "p0": d.p0[0].tolist(), "lambda": d.ewma_lambda,
                  "concerns": d.concern_p1[0].tolist(), "bank_w": d.bank_w,
                  "pairs": d.bank_pairs.tolist(), "n": level, "target": float(target),
                  "seed": int(seed), "paths": int(paths)})


def calibration_seed(base_seed: int, key: str) -> int:
    return ev.derive_seed(base_seed, "charts", key)


def calibrate_plan(plan: LinePlan, level: int, target: float, seed: int,
                   paths: int = DEFAULT_PATHS) -> LineLimits:
    """Limits of one line's charts for a line ARL0 of ``target`` (see the module docstring)."""
    d = plan.design
    prof = n_profile(level)
    pair_arl, concern_arl = split_targets(target, d.c)
    pair = make_design(d.p0, ewma_lambda=d.ewma_lambda, bank=True, bank_w=d.bank_w)
    cal = calibrate(pair, prof, arl0=pair_arl, seed=seed, paths=paths)
    rng = np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(1_000_003,)))
    hc = [calibrate_llr_cusum(d.p0[0], d.concern_weights[0, j], prof, concern_arl, rng=rng,
                              points=MARKOV_POINTS).h for j in range(d.c)]
    limits = SequentialLimits(cal.limits.ewma, _ro(np.array([hc], dtype=float).reshape(1, d.c)),
                              cal.limits.bank)
    key = calibration_key(plan, level, target, seed, paths)
    details = {"pair_arl0": pair_arl, "concern_arl0": concern_arl if d.c else None,
               "pair_arl0_mc": float(cal.omnibus_arl0[0]), "pair_arl0_se": float(cal.omnibus_se[0]),
               "paths": paths, "horizon": cal.horizon, "seed": seed, "n_level": level,
               "method": cal.method}
    return LineLimits(key, limits, CALIBRATED, level, details)


def fallback_limits(plan: LinePlan, level: int, target: float, key: str, why: str) -> LineLimits:
    """Conservative limits (MEWMA off) when no calibration can be made."""
    pair_arl, concern_arl = split_targets(target, plan.design.c)
    lim = conservative_limits(plan.design, pair_arl)
    if plan.design.c:
        cons = conservative_limits(plan.design, concern_arl)
        lim = SequentialLimits(lim.ewma, cons.concerns, lim.bank)
    return LineLimits(key, lim, CONSERVATIVE, level, {"reason": why})


def _ro(a: np.ndarray) -> np.ndarray:
    a = np.ascontiguousarray(a)
    a.setflags(write=False)
    return a


# ---------------------------------------------------------------------------------------
# one shift of one line


@dataclass(frozen=True, slots=True)
class PriorCharts:
    """The stored chart rows a line's next shift starts from (chart name -> state dict)."""

    shift_id: str
    states: Mapping[str, Mapping[str, Any]]
    reset_note: str | None = None


@dataclass(frozen=True, slots=True)
class LineStep:
    """One line after one shift: the rows to store, the chart step and its signals."""

    rows: tuple[Mapping[str, Any], ...]
    state: SequentialState
    step: SequentialStep
    reports: tuple[SignalReport, ...]
    started: str | None  # why the charts started afresh this shift (None: they carried on)
    n: int


def state_from_rows(plan: LinePlan, states: Mapping[str, Mapping[str, Any]]) -> SequentialState:
    """Reassemble a line's SequentialState from its per-chart rows (exact)."""
    e, b = states[CHART_MEWMA], states[CHART_BANK]
    cus = [states[name] for name in plan.charts[2:]]
    row = {"format": e["format"], "t": e["t"], "ewma_z": e["ewma_z"], "ewma_v": e["ewma_v"],
           "ewma_calm": e["ewma_calm"], "bank_s": b["bank_s"], "bank_zero": b["bank_zero"],
           "bank_counts": b["bank_counts"], "cusum_s": [c["cusum_s"] for c in cus],
           "cusum_zero": [c["cusum_zero"] for c in cus],
           "cusum_counts": [c["cusum_counts"] for c in cus]}
    return state_from_json([row])


def _stat(x: float) -> float | None:
    return float(x) if math.isfinite(x) else None


_LIMITS_JSON: dict[int, tuple[LineLimits, Any]] = {}


def _limits_json(lim: LineLimits) -> Any:
    """``lim.limits.to_json()``, made once per LineLimits object (the object is kept with its
    text so that its id is not reused while cached). Callers must not change the result."""
    hit = _LIMITS_JSON.get(id(lim))
    if hit is not None and hit[0] is lim:
        return hit[1]
    if len(_LIMITS_JSON) > 4096:
        _LIMITS_JSON.clear()
    text = lim.limits.to_json()
    _LIMITS_JSON[id(lim)] = (lim, text)
    return text


def rows_for(plan: LinePlan, state: SequentialState, step: SequentialStep,
             lim: LineLimits) -> tuple[dict[str, Any], ...]:
    """The chart_state rows of a line after a shift (one per chart)."""
    s = state_to_json(state)[0]
    common = {"format": s["format"], "t": s["t"]}
    meta = {"signature": plan.signature, "codes": list(plan.codes), "charts": list(plan.charts),
            "calibration": lim.key, "limits_kind": lim.kind, "n_level": lim.n_level,
            "limits": _limits_json(lim)}
    rows = [
        {"chart": CHART_MEWMA, "state": common | {k: s[k] for k in ("ewma_z", "ewma_v", "ewma_calm")}
         | {"design": meta}, "statistic": _stat(step.ewma_stat[0]),
         "threshold": _stat(lim.limits.ewma[0])},
        {"chart": CHART_BANK, "state": common | {k: s[k] for k in ("bank_s", "bank_zero",
                                                                    "bank_counts")},
         "statistic": _stat(step.bank_stat[0]), "threshold": _stat(lim.limits.bank[0])},
    ]
    for j, name in enumerate(plan.charts[2:]):
        rows.append({"chart": name, "state": common | {
            "cusum_s": s["cusum_s"][j], "cusum_zero": s["cusum_zero"][j],
            "cusum_counts": s["cusum_counts"][j]},
            "statistic": _stat(step.concern_stat[0, j]),
            "threshold": _stat(lim.limits.concerns[0, j])})
    return tuple(r | {"baseline_version_id": plan.baseline_version_id} for r in rows)


def _fresh_reason(plan: LinePlan, prior: PriorCharts | None) -> str | None:
    if prior is None:
        return "first shift charted for this line"
    if prior.reset_note is not None:
        return f"charts reset after {prior.shift_id}: {prior.reset_note}"
    meta = prior.states.get(CHART_MEWMA, {}).get("design", {})
    if meta.get("signature") != plan.signature or set(prior.states) != set(plan.charts):
        return "baseline version or chart settings changed"
    return None


def _fresh_reason_done(plan: LinePlan, done: Any) -> str | None:
    """:func:`_fresh_reason` for values computed in this run (``done.plan`` made them)."""
    if done.reset_note is not None:
        return f"charts reset after {done.shift_id}: {done.reset_note}"
    if done.plan.signature != plan.signature or set(done.plan.charts) != set(plan.charts):
        return "baseline version or chart settings changed"
    return None


def _start_of(prior: Any) -> dt.datetime:
    return prior.start if hasattr(prior, "start") else prior.start_utc


def advance(plan: LinePlan, prior: PriorCharts | None, counts: Sequence[int] | np.ndarray,
            lim: LineLimits) -> LineStep:
    """Advance a line's charts by one shift. ``counts`` (K,) over the plant's categories."""
    x = np.asarray(counts, dtype=np.int64)[list(plan.columns)][None, :]
    started = _fresh_reason(plan, prior)
    state = init_state(plan.design) if started else state_from_rows(plan, prior.states)
    new, step = update(state, x, plan.design, lim.limits)
    reports = tuple(signal_reports(step, new, plan.design, lim.limits))
    new = capped(new, lim.limits)
    return LineStep(rows_for(plan, new, step, lim), new, step, reports, started, int(x.sum()))


def capped(state: SequentialState, limits: SequentialLimits, cap: float = CUSUM_CAP
           ) -> SequentialState:
    """The state carried to the next shift, with every CUSUM held at most ``cap`` x its limit.

    Only values already past the limit change, so the run length to the first signal (and
    so the calibration) is untouched; after a large change ends, the charts come back below
    their limits within a few shifts instead of working off a huge excess (common practice,
    no source: a chart is restarted after a signal).
    """
    cs = np.minimum(state.cusum_s, cap * limits.concerns)
    bs = np.minimum(state.bank_s, cap * limits.bank[:, None])
    return dataclasses.replace(state, cusum_s=_ro(cs), bank_s=_ro(bs))


# ---------------------------------------------------------------------------------------
# findings


def _chart_name(plan: LinePlan, r: SignalReport) -> str:
    if r.chart == "ewma":
        return CHART_MEWMA
    if r.chart == "bank":
        a, b = (int(v.removeprefix("cat")) for v in r.name.split("->"))
        return f"{CHART_BANK} ({plan.codes[a]} -> {plan.codes[b]})"
    return CUSUM_PREFIX + r.name


def _driver(plan: LinePlan, r: SignalReport, mv: Any, v: float) -> ev.CategoryShift:
    p0, est = mv.baseline_share, mv.estimated_share
    n_eff = (1.0 / v if v > 0 else 0.0) if r.chart == "ewma" else float(r.defects_since_start)
    sd = math.sqrt(p0 * (1 - p0) / n_eff) if n_eff > 0 else math.inf
    z = (est - p0) / sd if sd > 0 and math.isfinite(sd) else 0.0
    return ev.CategoryShift(code=plan.codes[mv.category], direction=mv.direction,
                            adjusted_residual=float(z), observed=int(round(est * n_eff)),
                            expected=float(p0 * n_eff), share=float(est), reference_share=float(p0))


def _words(c: ev.CategoryShift, names: Mapping[str, str]) -> str:
    ratio = c.share / c.reference_share if c.reference_share > 0 else math.inf
    return (f"{names.get(c.code, c.code)} {c.direction} {100 * c.reference_share:.1f}% -> "
            f"{100 * c.share:.1f}% (x{ratio:.2f})")


def _start_words(shift_id: str | None, back: int) -> str:
    if back == 0:
        return "change most likely began this shift"
    where = f"in shift {shift_id}" if shift_id else "earlier"
    return f"change most likely began {where} ({back} shift{'s' if back != 1 else ''} back)"


def line_finding(plan: LinePlan, ls: LineStep, lim: LineLimits, chain: Sequence[str],
                 names: Mapping[str, str]) -> ev.Finding:
    """The ``sequential`` finding of one line for one shift.

    ``chain``: shift ids of the line's charted shifts, newest first, ``chain[0]`` this shift
    (only read on a signal, to name the shift where the change began).
    """
    st = ls.step
    ratios = {CHART_MEWMA: float(st.ewma_stat[0] / lim.limits.ewma[0]),
              CHART_BANK: float(st.bank_stat[0] / lim.limits.bank[0])}
    for j, name in enumerate(plan.charts[2:]):
        ratios[name] = float(st.concern_stat[0, j] / lim.limits.concerns[0, j])
    values = {CHART_MEWMA: float(st.ewma_stat[0]), CHART_BANK: float(st.bank_stat[0])}
    values |= {name: float(st.concern_stat[0, j]) for j, name in enumerate(plan.charts[2:])}
    charts = [{"chart": c, "statistic": values[c], "limit": _stat(lim.limits_for(c, plan)),
               "share_of_limit": ratios[c] if math.isfinite(ratios[c]) else None}
              for c in plan.charts]
    common = {"kind": ev.KIND_SEQUENTIAL, "line": plan.line,
              "baseline_version_id": plan.baseline_version_id, "n": ls.n,
              "categories": plan.codes, "effect_name": "statistic / limit",
              "method": "sequential charts",
              "method_reason": f"MEWMA lambda {plan.design.ewma_lambda:g} + bank of "
                               f"{plan.design.d} directional CUSUMs"
                               + (f" + {plan.design.c} concern CUSUM(s)" if plan.design.c else "")
                               + f"; limits {lim.kind} (n ~ {lim.n_level} defects/shift)"}
    details = {"charts": charts, "t": int(st.t[0]), "limits_kind": lim.kind,
               "calibration": lim.key, "n_level": lim.n_level, "started": ls.started,
               "skipped_concerns": list(plan.skipped)}
    if not ls.reports and not ls.n:  # no defects: the charts learn nothing about the mix
        return ev.Finding(verdict=ev.NOT_TESTED, reason="not tested: no defects this shift",
                          details=details, **common)
    if not ls.reports:
        top = max(ratios, key=lambda c: ratios[c] if math.isfinite(ratios[c]) else -1.0)
        share = ratios[top] if math.isfinite(ratios[top]) else 0.0
        reason = (f"no chart at its limit (nearest: {top} at {100 * share:.0f}% of its limit)"
                  + (f"; {ls.started}" if ls.started else ""))
        return ev.Finding(verdict="in-control", reason=reason, statistic=values[top],
                          effect_size=share, details=details, **common)
    return _signal_finding(plan, ls, lim, chain, names, common, details)


def _signal_finding(plan, ls, lim, chain, names, common, details) -> ev.Finding:
    reports = sorted(ls.reports, key=lambda r: -(r.statistic / r.limit))
    primary = reports[0]
    v = float(ls.state.ewma_v[0])
    drivers = tuple(_driver(plan, primary, mv, v) for mv in primary.drivers)
    back = int(primary.shifts_back)
    start_id = chain[back] if back < len(chain) else None
    charts_words = ", ".join(f"{_chart_name(plan, r)} {r.statistic:.2f} >= limit {r.limit:.2f}"
                             for r in reports)
    reason = "; ".join([*(_words(c, names) for c in drivers), charts_words,
                        _start_words(start_id, back)])
    details = details | {
        "start_shift": start_id, "shifts_back": back,
        "defects_since_start": primary.defects_since_start if primary.defects_since_start >= 0
        else None,
        "signals": [{"chart": _chart_name(plan, r), "statistic": r.statistic, "limit": r.limit,
                     "shifts_back": r.shifts_back,
                     "start_shift": chain[r.shifts_back] if r.shifts_back < len(chain) else None,
                     "drivers": [_driver(plan, r, mv, v).as_json() for mv in r.drivers]}
                    for r in reports]}
    return ev.Finding(verdict="alarm", severity="alarm", reason=reason,
                      statistic=float(primary.statistic),
                      effect_size=float(primary.statistic / primary.limit),
                      top_categories=drivers, details=details, **common)


def fault_finding(line: str, version: int | None, exc: BaseException) -> ev.Finding:
    return ev.Finding(kind=ev.KIND_SEQUENTIAL, line=line, verdict=ev.FAULT,
                      baseline_version_id=version,
                      reason=f"sequential charts of line {line} failed: "
                             f"{type(exc).__name__}: {exc}")


# ---------------------------------------------------------------------------------------
# one shift of many lines at once


@dataclass(slots=True)
class _Block:
    """One batched update of the charts of lines that share a design shape (same k, MEWMA
    lambda, concern names and bank): the stacked values carried on (capped) and the step."""

    plans: tuple[LinePlan, ...]
    lims: tuple[LineLimits, ...]
    state: SequentialState
    step: SequentialStep
    n: list[int]


def _take(obj: Any, i: int) -> Any:
    """Line ``i`` of a stacked SequentialState or SequentialStep (read-only views)."""
    return type(obj)(*(getattr(obj, f)[i:i + 1] for f in obj.__slots__))


def _shape_key(plan: LinePlan) -> tuple[Any, ...]:
    d = plan.design
    return (d.k, d.ewma_lambda, d.bank_w, d.concern_names, d.bank_pairs.tobytes())


_META_JSON: dict[tuple[int, int], tuple[LinePlan, LineLimits, str]] = {}


def _meta_json(plan: LinePlan, lim: LineLimits) -> str:
    """JSON text of the MEWMA row's ``design`` entry (as :func:`rows_for` makes it), made once
    per (plan, limits) object pair."""
    hit = _META_JSON.get((id(plan), id(lim)))
    if hit is not None and hit[0] is plan and hit[1] is lim:
        return hit[2]
    if len(_META_JSON) > 4096:
        _META_JSON.clear()
    meta = {"signature": plan.signature, "codes": list(plan.codes), "charts": list(plan.charts),
            "calibration": lim.key, "limits_kind": lim.kind, "n_level": lim.n_level,
            "limits": _limits_json(lim)}
    from qcfit.store import jsontext

    text = jsontext.dumps(meta)
    _META_JSON[(id(plan), id(lim))] = (plan, lim, text)
    return text


def encoded_rows(block: _Block, i: int) -> tuple[dict[str, Any], ...]:
    """The chart_state rows of line ``i`` of ``block``, equal to :func:`rows_for` of that line
    except that each ``state`` is its JSON text (the text :mod:`qcfit.store.jsontext` makes of the
    row's state dict), as :class:`qcfit.store.charts.StateText`."""
    from qcfit.store import jsontext
    from qcfit.store.charts import StateText

    plan, lim, st, sp = block.plans[i], block.lims[i], block.state, block.step
    limits = lim.limits
    t = int(st.t[i])
    # one line at a time: the lists made here are freed before the next line's are made
    mewma = jsontext.dumps({"format": STATE_FORMAT, "t": t, "ewma_z": st.ewma_z[i].tolist(),
                        "ewma_v": float(st.ewma_v[i]), "ewma_calm": int(st.ewma_calm[i])})
    mewma = f'{mewma[:-1]},"design":{_meta_json(plan, lim)}}}'
    bank = jsontext.dumps({"format": STATE_FORMAT, "t": t, "bank_s": st.bank_s[i].tolist(),
                       "bank_zero": st.bank_zero[i].tolist(),
                       "bank_counts": st.bank_counts[i].tolist()})
    version = plan.baseline_version_id
    rows = [
        {"chart": CHART_MEWMA, "state": StateText(mewma), "statistic": _stat(sp.ewma_stat[i]),
         "threshold": _stat(limits.ewma[0]), "baseline_version_id": version},
        {"chart": CHART_BANK, "state": StateText(bank), "statistic": _stat(sp.bank_stat[i]),
         "threshold": _stat(limits.bank[0]), "baseline_version_id": version}]
    if len(plan.charts) > 2:
        cs, cz, cc = st.cusum_s[i].tolist(), st.cusum_zero[i].tolist(), \
            st.cusum_counts[i].tolist()
        stat = sp.concern_stat[i].tolist()
        for j, name in enumerate(plan.charts[2:]):
            text = jsontext.dumps({"format": STATE_FORMAT, "t": t, "cusum_s": cs[j],
                               "cusum_zero": cz[j], "cusum_counts": cc[j]})
            rows.append({"chart": name, "state": StateText(text), "statistic": _stat(stat[j]),
                         "threshold": _stat(limits.concerns[0, j]),
                         "baseline_version_id": version})
    return tuple(rows)


# ---------------------------------------------------------------------------------------
# the shell the service hands its engine to


@dataclass(slots=True)
class _Done:
    """A line's chart values after one shift computed in this run (``block`` row ``row``;
    ``block`` is dropped once a later shift of the line is stored: the store has them)."""

    start: dt.datetime
    shift_id: str
    prior_id: str | None
    prior_start: dt.datetime | None
    plan: LinePlan
    block: _Block | None
    row: int
    reset_note: str | None = None  # an acknowledgement's reset mark already on this shift

    @property
    def rows(self) -> tuple[Mapping[str, Any], ...]:
        """The rows as :func:`rows_for` makes them (state dicts)."""
        if self.block is None:
            raise StoreError(f"chart values of line {self.plan.line} at {self.shift_id} are "
                             "no longer kept in memory")
        b, i = self.block, self.row
        return rows_for(b.plans[i], _take(b.state, i), _take(b.step, i), b.lims[i])


@dataclass(slots=True)
class _Work:
    """One line of the shift being computed."""

    line: str
    index: int  # row in the count table
    plan: LinePlan
    prior: Any = None  # _Done, StoredCharts or None
    lim: LineLimits | None = None
    started: str | None = None
    source: tuple[SequentialState, int] | None = None
    found: ev.Finding | None = None
    done: _Done | None = None


class ChartStage:
    """Sequential charts for one evaluation run (one instance per run; not thread-safe).

    Called by the service as ``stage(table, baselines) -> findings`` while computing a shift,
    then ``stage.write(conn, shift, shift_row_id)`` inside that shift's write transaction.
    Shifts computed earlier in the run are the predecessors of later ones, so a chunk of
    shifts computed before it is written chains correctly. ``write`` checks that the rows the
    computation started from are still the latest in the store (else StoreError: evaluate
    again).

    The lines of a shift are advanced together, one :func:`update` per design shape, and a
    line's values stay in memory until its next shift is stored. Every line's rows at a
    shift include a MEWMA row, so the store is probed through the MEWMA rows' keys (index
    lookups) instead of scanning each line's rows.
    """

    def __init__(self, engine: Any, config: Any, *, now: dt.datetime,
                 paths: int = DEFAULT_PATHS,
                 budget_s: float | None = CALIBRATION_BUDGET_S) -> None:
        self.engine = engine
        self.config = config
        self.stamp = now  # when calibrations made in this run are recorded
        self.paths = paths
        self.budget_s = budget_s
        self._limits: dict[str, LineLimits] = {}
        self._plans: dict[tuple[str, Any], LinePlan] = {}  # (line, baseline) -> plan
        self._keys: dict[tuple[Any, ...], str] = {}  # (plan signature, level) -> cache key
        self._done: dict[str, list[_Done]] = {}  # line -> computed this run, in start order
        self._pending: dict[str, dict[str, _Done]] = {}  # shift id -> line -> rows to write
        self._stacked: dict[tuple[int, ...], tuple[Any, ...]] = {}  # ids -> (objects, stacked)
        self._fresh: dict[int, tuple[LinePlan, SequentialState]] = {}  # id(plan) -> init state
        self._totals: dict[int, dict[str, int]] = {}  # shift row id -> line -> defects
        self._chains: dict[str, list[tuple[dt.datetime, str]]] = {}  # line -> stored chain
        self._written: dict[str, tuple[dt.datetime, tuple[str, ...]]] = {}  # see _settle
        self.calibration_seconds = 0.0
        self.calibrations = 0

    @property
    def settings(self) -> Any:
        return self.config.sequential

    # -- compute --------------------------------------------------------------------------

    def __call__(self, table: CountTable, baselines: Mapping[str, BaselineRef | None]
                 ) -> list[ev.Finding]:
        if not self.settings.enabled:
            return []
        from qcfit.store import charts as sql
        from qcfit.store.engine import read_tx, to_utc_naive

        self._settle()
        shift = table.shift
        lines = [ln for ln in table.lines if baselines.get(ln) is not None]
        if not lines:
            return []
        start = to_utc_naive(shift.start)
        slots: list[ev.Finding | _Work] = []
        for i, line in enumerate(table.lines):
            b = baselines.get(line)
            if b is None:
                continue
            try:
                slots.append(_Work(line, i, self._plan(line, b)))
            except InvalidArgumentError as exc:  # e.g. a baseline with one category
                slots.append(ev.Finding(kind=ev.KIND_SEQUENTIAL, line=line,
                                        verdict=ev.NOT_TESTED, baseline_version_id=b.version_id,
                                        reason=f"no sequential charts: {exc}"))
        work = [w for w in slots if isinstance(w, _Work)]
        with read_tx(self.engine) as conn:
            marks = self._priors(conn, work, start)
            totals = sql.line_totals(conn, lines, start, N_WINDOW, cache=self._totals)
        ready = [w for w in work if self._prepare(w, shift, totals[w.line])]
        groups: dict[tuple[Any, ...], list[_Work]] = {}
        for w in ready:
            groups.setdefault(_shape_key(w.plan), []).append(w)
        for group in groups.values():
            self._advance(shift, table, group)
        pending = self._pending[shift.id] = {}  # a shift computed again starts afresh
        for w in ready:
            if w.done is not None:
                w.done.reset_note = marks.get(w.line)
                pending[w.line] = w.done
                self._remember(w.line, w.done)
        return [s if isinstance(s, ev.Finding) else s.found for s in slots
                if isinstance(s, ev.Finding) or s.found is not None]

    def _plan(self, line: str, baseline: BaselineRef) -> LinePlan:
        """:func:`plan_line`, once per line and baseline in a run (the settings are fixed)."""
        try:
            found = self._plans.get((line, baseline))
        except TypeError:  # an unhashable baseline record: no memo
            return plan_line(line, baseline, self.settings)
        if found is None:
            found = self._plans[(line, baseline)] = plan_line(line, baseline, self.settings)
        return found

    def _fail(self, w: _Work, shift: ShiftInstance, exc: QcfitError) -> None:
        log.error("sequential charts of %s at %s: %s", w.line, shift.id, exc)
        w.found, w.done = fault_finding(w.line, w.plan.baseline_version_id, exc), None

    def _prepare(self, w: _Work, shift: ShiftInstance, totals: Sequence[int]) -> bool:
        """Limits, start reason and starting values of one line (False: it failed)."""
        try:
            w.lim = self.limits(w.plan, n_level(totals))
            w.started, w.source = self._source(w.plan, w.prior)
        except QcfitError as exc:
            self._fail(w, shift, exc)
            return False
        return True

    def _source(self, plan: LinePlan, prior: Any) -> tuple[str | None, tuple[SequentialState,
                                                                                int]]:
        if isinstance(prior, _Done):
            started = _fresh_reason_done(plan, prior)
            if started is None and len(set(plan.charts)) == len(plan.charts):
                return None, (prior.block.state, prior.row)
            if started is None:  # repeated chart names: exactly as the rows would give it
                states = {r["chart"]: r["state"] for r in prior.rows}
                return None, (state_from_rows(plan, states), 0)
        else:
            started = _fresh_reason(plan, None if prior is None else PriorCharts(
                prior.shift_id, prior.states, prior.reset_after))
            if started is None:
                return None, (state_from_rows(plan, prior.states), 0)
        return started, (self._init_state(plan), 0)

    def _init_state(self, plan: LinePlan) -> SequentialState:
        hit = self._fresh.get(id(plan))
        if hit is None or hit[0] is not plan:
            hit = self._fresh[id(plan)] = (plan, init_state(plan.design))
        return hit[1]

    def _stack(self, objs: Sequence[Any], make: Any) -> Any:
        """``make(objs)``, made once per tuple of objects (kept with it, so no id is reused)."""
        key = tuple(id(o) for o in objs)
        hit = self._stacked.get(key)
        if hit is None or any(a is not b for a, b in zip(hit[0], objs, strict=True)):
            if len(self._stacked) > 256:
                self._stacked.clear()
            hit = self._stacked[key] = (tuple(objs), make(objs))
        return hit[1]

    def _advance(self, shift: ShiftInstance, table: CountTable, group: list[_Work]) -> None:
        """Advance the charts of ``group`` (one design shape) by ``shift``; a line whose
        values cannot be advanced with the others is tried alone, so a failure stays its own."""
        try:
            self._advance_together(shift, table, group)
        except QcfitError:
            if len(group) == 1:
                raise
            for w in group:
                try:
                    self._advance_together(shift, table, [w])
                except QcfitError as exc:
                    self._fail(w, shift, exc)

    def _advance_together(self, shift: ShiftInstance, table: CountTable, group: list[_Work]
                          ) -> None:
        from qcfit.store.engine import to_utc_naive

        plans = [w.plan for w in group]
        design = self._stack(plans, lambda ps: stack_designs([p.design for p in ps]))
        limits = self._stack([w.lim for w in group],
                             lambda ls: stack_limits([lim.limits for lim in ls]))
        state = stack_states([w.source for w in group])
        counts = np.asarray(table.counts, dtype=np.int64)
        cols = {p.columns for p in plans}
        rows = [w.index for w in group]
        if len(cols) == 1:
            x = counts[np.ix_(rows, list(next(iter(cols))))]
        else:
            x = np.stack([counts[w.index][list(w.plan.columns)] for w in group])
        new, step = update(state, x, design, limits)
        by_line: dict[int, list[SignalReport]] = {}
        for r in signal_reports(step, new, design, limits):
            by_line.setdefault(r.line, []).append(dataclasses.replace(r, line=0))
        block = _Block(tuple(plans), tuple(w.lim for w in group), capped(new, limits), step,
                       x.sum(axis=1).tolist())
        start = to_utc_naive(shift.start)
        names = dict(self.config.categories)
        for i, w in enumerate(group):
            try:
                reports = tuple(by_line.get(i, ()))
                ls = LineStep((), _take(block.state, i), _take(step, i), reports, w.started,
                              int(block.n[i]))
                chain = self._chain(w.line, shift, int(step.t[i])) if reports else [shift.id]
                w.found = line_finding(w.plan, ls, w.lim, chain, names)
            except QcfitError as exc:
                self._fail(w, shift, exc)
                continue
            prior = w.prior
            w.done = _Done(start, shift.id, None if prior is None else prior.shift_id,
                           None if prior is None else _start_of(prior), w.plan, block, i)

    # -- where each line starts from ------------------------------------------------------

    def _mine(self, line: str, start: dt.datetime) -> _Done | None:
        """The line's latest values computed in this run for a shift before ``start``."""
        for d in reversed(self._done.get(line, ())):
            if d.start < start:
                return d
        return None

    def _priors(self, conn: Any, work: Sequence[_Work], start: dt.datetime) -> dict[str, str]:
        """Set each line's prior (this run's values, or the store's latest rows before
        ``start`` when they are newer); returns the reset marks on the lines' rows at
        ``start`` (an acknowledgement made after those rows were stored)."""
        from qcfit.store import charts as sql

        if not work:
            return {}
        mine = {w.line: self._mine(w.line, start) for w in work}
        since = min((d.start for d in mine.values() if d is not None), default=start)
        seen = sql.starts_between(conn, list(mine), since, start, chart=CHART_MEWMA,
                                  include_end=True)
        at_start, need = [], []
        for line, d in mine.items():
            got = seen.get(line, [])
            if got and got[-1][0] == start:
                at_start.append(line)
                got = got[:-1]
            if d is None or d.block is None or (got and got[-1][0] > d.start):
                need.append(line)
        stored = sql.latest_before(conn, need, start) if need else {}
        for w in work:
            d, s = mine[w.line], stored.get(w.line)
            w.prior = d if d is not None and d.block is not None and (
                s is None or d.start >= s.start_utc) else s
        return sql.marks_at(conn, at_start, start) if at_start else {}

    def _remember(self, line: str, done: _Done) -> None:
        lst = self._done.setdefault(line, [])
        if lst and lst[-1].start >= done.start:
            lst[:] = [d for d in lst if d.shift_id != done.shift_id]
            lst.append(done)
            lst.sort(key=lambda d: d.start)
        else:
            lst.append(done)

    def _chain(self, line: str, shift: ShiftInstance, t: int) -> list[str]:
        """Shift ids of the line's chain, newest first, starting with ``shift`` (t entries)."""
        from qcfit.store import charts as sql
        from qcfit.store.engine import read_tx, to_utc_naive

        start = to_utc_naive(shift.start)
        chain = self._chains.get(line)
        if chain is None:  # the store's chain, read once a run (later rows are this run's)
            with read_tx(self.engine) as conn:
                chain = self._chains[line] = sql.chain_ids(conn, line, None, None)[::-1]
        cut = bisect.bisect_left(chain, start, key=lambda e: e[0])
        stored = chain[max(0, cut - min(t, CHAIN_LOOKBACK)):cut]
        merged = {sid: st for st, sid in stored}
        merged |= {d.shift_id: d.start for d in self._done.get(line, []) if d.start < start}
        older = sorted(merged, key=lambda s: merged[s], reverse=True)
        return [shift.id, *older][:t]

    # -- limits ---------------------------------------------------------------------------

    def limits(self, plan: LinePlan, level: int) -> LineLimits:
        """The line's limits: from this run, the store's cache, or a new calibration."""
        from qcfit.store import charts as sql
        from qcfit.store.engine import read_tx, to_utc_naive, write_tx

        target = float(self.settings.target_arl)
        base = int(self.config.thresholds.seed)
        memo = (plan.signature, level, target, base, self.paths)
        key = self._keys.get(memo)
        if key is None:
            key = self._keys[memo] = calibration_key(plan, level, target, base, self.paths)
        if key in self._limits:
            return self._limits[key]
        with read_tx(self.engine) as conn:
            row = sql.get_calibrations(conn, [key]).get(key)
        if row is not None:
            det = row["details"] or {}
            lim = LineLimits(key, SequentialLimits.from_json(det["limits"]), CALIBRATED, level,
                             det)
        elif self.budget_s is not None and self.calibration_seconds >= self.budget_s:
            lim = fallback_limits(plan, level, target, key, "calibration pending (this run's "
                                  f"{self.budget_s:g} s calibration budget is spent)")
        else:
            t0 = time.process_time()
            try:
                lim = dataclasses.replace(calibrate_plan(
                    plan, level, target, calibration_seed(base, key), self.paths), key=key)
            except InvalidArgumentError as exc:
                log.warning("line %s: no calibration (%s); conservative limits", plan.line, exc)
                lim = fallback_limits(plan, level, target, key, str(exc))
            self.calibration_seconds += time.process_time() - t0
            self.calibrations += 1
            if lim.kind == CALIBRATED:
                with write_tx(self.engine) as conn:
                    sql.put_calibration(conn, {
                        "key": key, "chart": ",".join(plan.charts)[:64],
                        "threshold": float(lim.limits.bank[0]), "target_arl": target,
                        "details": dict(lim.details) | {"limits": lim.limits.to_json()},
                        "created_utc": to_utc_naive(self.stamp)})
        self._limits[key] = lim
        return lim


    # -- write ----------------------------------------------------------------------------

    def write(self, conn: Any, shift: ShiftInstance, shift_row_id: int) -> None:
        """Store the rows computed for ``shift`` (inside the evaluation's write transaction)."""
        from qcfit.store import charts as sql
        from qcfit.store.engine import to_utc_naive

        start = to_utc_naive(shift.start)
        pending = self._pending.get(shift.id, {})
        self._check_unchanged(conn, shift, start, pending)
        sql.write_states_many(conn, shift_row_id,
                              {line: encoded_rows(d.block, d.row) for line, d in pending.items()},
                              probe_chart=CHART_MEWMA)
        # forgotten only at the next computation: the transaction may still be rolled back
        # and this write run again (a retry of the whole chunk)
        self._written[shift.id] = (start, tuple(pending))

    def _settle(self) -> None:
        """Forget what earlier writes stored: their pending rows, and the in-memory values of
        those lines older than the shift written (they are in the store now). Called before a
        computation, when the write transactions of the shifts computed before it are over."""
        for shift_id, (start, lines) in self._written.items():
            self._pending.pop(shift_id, None)
            for line in lines:
                for d in reversed(self._done.get(line, ())):
                    if d.start >= start:
                        continue
                    if d.block is None:
                        break
                    d.block = None
        self._written.clear()

    def _check_unchanged(self, conn: Any, shift: ShiftInstance, start: dt.datetime,
                         pending: Mapping[str, _Done]) -> None:
        """StoreError unless each line's latest rows before ``start`` in the store are still
        the ones its values were computed from."""
        from qcfit.store import charts as sql

        after = [ln for ln, d in pending.items() if d.prior_id is not None]
        bad = set()
        if after:
            since = min(pending[ln].prior_start for ln in after)
            seen = sql.starts_between(conn, after, since, start, chart=CHART_MEWMA,
                                      include_end=False)
            bad |= {ln for ln in after
                    if not seen.get(ln) or seen[ln][-1][1] != pending[ln].prior_id}
        first = [ln for ln, d in pending.items() if d.prior_id is None]
        if first:
            bad |= set(sql.latest_starts_before(conn, first, start))
        if not bad:
            return
        line = next(ln for ln in pending if ln in bad)
        have = sql.latest_ids_before(conn, [line], start).get(line)
        self._done.pop(line, None)
        self._chains.clear()
        raise StoreError(f"chart state of line {line} changed while shift {shift.id} was "
                         f"computed (started from {pending[line].prior_id}, the store has "
                         f"{have}); evaluate again")

    # -- order ----------------------------------------------------------------------------

    def expand(self, shifts: Sequence[ShiftInstance]) -> list[ShiftInstance]:
        """``shifts`` plus every later shift that has chart rows, in start order (a shift
        older than the latest chart rows changes what every later chart value rests on)."""
        if not shifts or not self.settings.enabled:
            return list(shifts)
        from qcfit.calendar import ShiftCalendar
        from qcfit.store import charts as sql
        from qcfit.store.engine import read_tx, to_utc_naive

        first = min(shifts, key=lambda s: s.start)
        with read_tx(self.engine) as conn:
            later = sql.shifts_with_state_after(conn, to_utc_naive(first.start))
        out = {s.id: s for s in shifts}
        if later:
            cal = ShiftCalendar.from_config(self.config)
            for day, name in later:
                try:
                    s = cal.instance(day, name)
                except NotFoundError:
                    continue  # a shift name no longer in the config
                out.setdefault(s.id, s)
        added = len(out) - len(shifts)
        if added:
            log.info("re-evaluating %d later shift(s) so their sequential charts rest on %s",
                     added, first.id)
        return sorted(out.values(), key=lambda s: s.start)


def stage_for(engine: Any, config: Any, *, now: dt.datetime,
              budget_s: float | None = CALIBRATION_BUDGET_S) -> ChartStage | None:
    """The sequential stage of an evaluation run, or None when ``[sequential]`` is off."""
    if not config.sequential.enabled:
        return None
    return ChartStage(engine, config, now=now, budget_s=budget_s)

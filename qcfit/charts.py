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
    SequentialDesign,
    SequentialLimits,
    SequentialState,
    SequentialStep,
    SignalReport,
    concern_share_up,
    init_state,
    make_design,
    signal_reports,
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
# the shell the service hands its engine to


@dataclass(slots=True)
class _Done:
    start: dt.datetime
    shift_id: str
    prior_id: str | None
    rows: tuple[Mapping[str, Any], ...]
    reset_note: str | None = None  # an acknowledgement's reset mark already on this shift


class ChartStage:
    """Sequential charts for one evaluation run (one instance per run; not thread-safe).

    Called by the service as ``stage(table, baselines) -> findings`` while computing a shift,
    then ``stage.write(conn, shift, shift_row_id)`` inside that shift's write transaction.
    Shifts computed earlier in the run are the predecessors of later ones, so a chunk of
    shifts computed before it is written chains correctly. ``write`` checks that the rows the
    computation started from are still the latest in the store (else StoreError: evaluate
    again).
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

        shift = table.shift
        lines = [ln for ln in table.lines if baselines.get(ln) is not None]
        if not lines:
            return []
        start = to_utc_naive(shift.start)
        with read_tx(self.engine) as conn:
            # chart values are read only for lines this run has no newer values of
            newest = sql.latest_starts_before(conn, lines, start)
            stored = sql.latest_before(conn, [ln for ln in lines if ln in newest
                                              and not self._newer_here(ln, start, newest[ln])],
                                       start)
            totals = sql.line_totals(conn, lines, start, N_WINDOW)
            marks = sql.marks_at(conn, lines, start)
        out: list[ev.Finding] = []
        pending = self._pending.setdefault(shift.id, {})
        for i, line in enumerate(table.lines):
            b = baselines.get(line)
            if b is None:
                continue
            try:
                plan = self._plan(line, b)
            except InvalidArgumentError as exc:  # e.g. a baseline with one category
                out.append(ev.Finding(kind=ev.KIND_SEQUENTIAL, line=line, verdict=ev.NOT_TESTED,
                                      baseline_version_id=b.version_id,
                                      reason=f"no sequential charts: {exc}"))
                continue
            try:
                found, done = self._line(shift, plan, table.counts[i], stored.get(line),
                                         totals[line])
            except QcfitError as exc:
                log.error("sequential charts of %s at %s: %s", line, shift.id, exc)
                out.append(fault_finding(line, b.version_id, exc))
                continue
            done.reset_note = marks.get(line)
            pending[line] = done
            self._remember(line, done)
            out.append(found)
        return out

    def _plan(self, line: str, baseline: BaselineRef) -> LinePlan:
        """:func:`plan_line`, once per line and baseline in a run (the settings are fixed)."""
        try:
            found = self._plans.get((line, baseline))
        except TypeError:  # an unhashable baseline record: no memo
            return plan_line(line, baseline, self.settings)
        if found is None:
            found = self._plans[(line, baseline)] = plan_line(line, baseline, self.settings)
        return found

    def _line(self, shift: ShiftInstance, plan: LinePlan, counts: np.ndarray,
              stored: Any, totals: Sequence[int]) -> tuple[ev.Finding, _Done]:
        from qcfit.store.engine import to_utc_naive

        line = plan.line
        prior = self._prior(line, to_utc_naive(shift.start), stored)
        lim = self.limits(plan, n_level(totals))
        ls = advance(plan, prior, counts, lim)
        chain = self._chain(line, shift, int(ls.step.t[0])) if ls.reports else [shift.id]
        found = line_finding(plan, ls, lim, chain, dict(self.config.categories))
        return found, _Done(to_utc_naive(shift.start), shift.id,
                            prior.shift_id if prior else None, ls.rows)

    def _newer_here(self, line: str, start: dt.datetime, stored_start: dt.datetime) -> bool:
        """True when :meth:`_prior` would take this run's values over the store's."""
        mine = [d for d in self._done.get(line, []) if d.start < start]
        return bool(mine) and mine[-1].start >= stored_start

    def _prior(self, line: str, start: dt.datetime, stored: Any) -> PriorCharts | None:
        mine = [d for d in self._done.get(line, []) if d.start < start]
        if mine and (stored is None or mine[-1].start >= stored.start_utc):
            d = mine[-1]
            return PriorCharts(d.shift_id, {r["chart"]: r["state"] for r in d.rows},
                               d.reset_note)
        if stored is None:
            return None
        return PriorCharts(stored.shift_id, stored.states, stored.reset_after)

    def _remember(self, line: str, done: _Done) -> None:
        lst = [d for d in self._done.get(line, []) if d.shift_id != done.shift_id]
        lst.append(done)
        lst.sort(key=lambda d: d.start)
        self._done[line] = lst

    def _chain(self, line: str, shift: ShiftInstance, t: int) -> list[str]:
        """Shift ids of the line's chain, newest first, starting with ``shift`` (t entries)."""
        from qcfit.store import charts as sql
        from qcfit.store.engine import read_tx, to_utc_naive

        start = to_utc_naive(shift.start)
        with read_tx(self.engine) as conn:
            stored = sql.chain_ids(conn, line, start - dt.timedelta(microseconds=1),
                                   min(t, CHAIN_LOOKBACK))
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
        pending = self._pending.pop(shift.id, {})
        stored = sql.latest_ids_before(conn, list(pending), start)
        for line, done in pending.items():
            have = stored.get(line)
            if have != done.prior_id:
                self._done.pop(line, None)
                raise StoreError(f"chart state of line {line} changed while shift {shift.id} "
                                 f"was computed (started from {done.prior_id}, the store has "
                                 f"{have}); evaluate again")
        sql.write_states_many(conn, shift_row_id,
                              {line: done.rows for line, done in pending.items()})

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

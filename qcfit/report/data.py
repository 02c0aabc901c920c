"""Everything one shift report shows, read from the store into a frozen :class:`ReportData`.

:func:`gather` runs one read transaction (queries in :mod:`qcfit.store.reportdata`) and turns
the rows into plain frozen records: the shift and its evaluation, every finding of the shift,
the alarms it touched or left open, the history of the last ``history`` evaluated shifts per
line (mix test p-value and effect size, defect rate with its baseline and limit), the
sequential chart values when the store has them, and the shift's category totals.
:func:`~qcfit.report.render.render_html` turns the record into the page; nothing after
:func:`gather` reads the store.

Floats are plain ``float`` with ``nan`` for "no value"; tuples everywhere, so a ReportData is
hashable and cannot change under the renderer.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import stats as sps

from qcfit.errors import InvalidArgumentError, NotFoundError
from qcfit.model import format_shift_id, parse_shift_id
from qcfit.store import reportdata as sql
from qcfit.store.engine import from_utc_naive, read_tx

DEFAULT_HISTORY = 30  # shifts drawn in the "over time" charts (10 production days at 3 a day)
NAN = math.nan

# verdicts and severities as qcfit.evaluate / qcfit.policy write them
ALARM = "alarm"
WATCH = "watch"
IN_CONTROL = "in-control"
TOO_LITTLE = "too-little-data"
KIND_MIX = "baseline"
KIND_RATE = "rate"
KIND_BETWEEN = "between-lines"
KIND_VS_REST = "line-vs-rest"
KIND_SEQUENTIAL = "sequential"
HISTORY_KINDS = (KIND_MIX, KIND_RATE)
ACTIVE_STATES = ("open", "acknowledged")


@dataclass(frozen=True, slots=True)
class ShiftInfo:
    """One shift: id ``2026-10-07_B``, local start/end (aware, plant time zone)."""

    id: str
    row_id: int
    date: dt.date
    name: str
    start: dt.datetime
    end: dt.datetime


@dataclass(frozen=True, slots=True)
class EvaluationInfo:
    """The shift's current evaluation: what reproduces it."""

    id: int
    status: str  # ok | failed
    error: str | None
    config_hash: str
    code_version: str
    seed: int
    finished: dt.datetime  # aware UTC


@dataclass(frozen=True, slots=True)
class CategoryMove:
    """A category named by a test: ``direction`` up/down, the adjusted residual, observed count
    and share against the reference share (baseline, or the other lines)."""

    code: str
    direction: str
    adjusted_residual: float
    observed: int
    share: float
    reference_share: float


@dataclass(frozen=True, slots=True)
class FindingView:
    """One finding of the shift. ``severity`` is alarm / watch / None; floats are nan when
    the test gave none. ``observed``/``expected``/``residuals`` follow ``categories``."""

    kind: str
    line: str | None
    verdict: str
    severity: str | None
    reason: str
    pvalue: float
    adjusted_pvalue: float
    effect_size: float
    effect_name: str
    effect_floor: float
    alarm_level: float
    watch_level: float
    power: float
    n: int
    method: str
    baseline_version_id: int | None
    categories: tuple[str, ...]
    observed: tuple[float, ...]
    expected: tuple[float, ...]
    residuals: tuple[float, ...]
    top: tuple[CategoryMove, ...]
    units: float  # rate tests: units inspected, else nan
    baseline_rate: float  # rate tests: defects per unit, else nan


@dataclass(frozen=True, slots=True)
class AlarmItem:
    """An alarm as the report lists it. ``role`` says how this shift relates to it: ``new``
    (opened by this shift), ``continues`` (open before, crossed again), ``cleared`` (cleared
    itself after this shift) or ``earlier`` (opened before and still open; this shift did not
    cross). ``state`` is the state when the report was made."""

    id: int
    kind: str
    line: str | None
    severity: str
    state: str
    role: str
    summary: str
    first_shift: str | None
    last_shift: str | None
    shift_count: int
    adjusted_pvalue: float
    effect_size: float
    categories: tuple[CategoryMove, ...]
    baseline_name: str | None
    acknowledged_by: str | None
    note: str | None


@dataclass(frozen=True, slots=True)
class LineHistory:
    """One line over the history shifts (aligned with ``ReportData.history``); nan where the
    shift has no such test. ``rate_limit`` is the defect rate at which the one-sided exact
    Poisson test reaches ``alarm_level`` before multiplicity adjustment."""

    line: str
    mix_adjusted_p: tuple[float, ...]
    mix_effect: tuple[float, ...]
    mix_verdict: tuple[str, ...]
    rate: tuple[float, ...]
    rate_baseline: tuple[float, ...]
    rate_limit: tuple[float, ...]
    rate_verdict: tuple[str, ...]


@dataclass(frozen=True, slots=True)
class ChartSeries:
    """One sequential chart of one line over the history shifts: statistic and threshold."""

    line: str
    chart: str
    statistic: tuple[float, ...]
    threshold: tuple[float, ...]


@dataclass(frozen=True, slots=True)
class BaselineInfo:
    id: int
    name: str
    effective: dt.date
    content_hash: str
    rate: float


@dataclass(frozen=True, slots=True)
class Levels:
    """The thresholds the report draws (the config's, or the shift's per-baseline values)."""

    alarm_level: float
    watch_level: float
    min_effect_w: float
    min_effect_v: float
    min_rate_ratio: float
    multiple_testing: str
    power: float  # power needed before "no alarm" is called in control


@dataclass(frozen=True, slots=True)
class ReportData:
    """Everything one shift report shows (see the module docstring)."""

    plant_name: str
    timezone_name: str
    lines: tuple[tuple[str, str], ...]  # (code, display name), config order
    categories: tuple[tuple[str, str], ...]
    shift: ShiftInfo
    evaluation: EvaluationInfo
    findings: tuple[FindingView, ...]
    alarms: tuple[AlarmItem, ...]
    history: tuple[ShiftInfo, ...]  # oldest first, ends with ``shift``
    line_history: tuple[LineHistory, ...]
    charts: tuple[ChartSeries, ...]
    counts: tuple[tuple[int, ...], ...]  # lines x categories, this shift
    units: tuple[float, ...]  # per line, nan when unknown
    baselines: tuple[BaselineInfo, ...]
    levels: Levels
    line_levels: tuple[tuple[str, Levels], ...]  # per line, per-baseline overrides applied
    generated: dt.datetime  # aware

    def line_name(self, code: str | None) -> str:
        return dict(self.lines).get(code, code) if code is not None else "all lines"

    def category_name(self, code: str) -> str:
        return dict(self.categories).get(code, code)

    def finding(self, kind: str, line: str | None) -> FindingView | None:
        for t in self.findings:
            if t.kind == kind and t.line == line:
                return t
        return None

    def levels_for(self, line: str) -> Levels:
        return dict(self.line_levels).get(line, self.levels)


# ---------------------------------------------------------------------------------------
# small converters


def _f(value: Any) -> float:
    if value is None:
        return NAN
    try:
        out = float(value)
    except (TypeError, ValueError):
        return NAN
    return out


def _floats(values: Any) -> tuple[float, ...]:
    if values is None:
        return ()
    return tuple(_f(v) for v in values)


def _moves(items: Any) -> tuple[CategoryMove, ...]:
    out = []
    for c in items or ():
        if not isinstance(c, Mapping) or "code" not in c:
            continue
        out.append(CategoryMove(
            code=str(c["code"]), direction=str(c.get("direction") or ""),
            adjusted_residual=_f(c.get("adjusted_residual")), observed=int(c.get("observed") or 0),
            share=_f(c.get("share")), reference_share=_f(c.get("reference_share"))))
    return tuple(out)


def _shift_info(row: Mapping[str, Any], tz: dt.tzinfo) -> ShiftInfo:
    return ShiftInfo(
        id=format_shift_id(row["shift_date"], str(row["shift_name"])),
        row_id=int(row["id"]), date=row["shift_date"], name=str(row["shift_name"]),
        start=from_utc_naive(row["start_utc"]).astimezone(tz),
        end=from_utc_naive(row["end_utc"]).astimezone(tz))


def _evaluation_info(row: Mapping[str, Any]) -> EvaluationInfo:
    return EvaluationInfo(
        id=int(row["evaluation_id"]), status=str(row["status"]), error=row.get("error"),
        config_hash=str(row["config_hash"]), code_version=str(row["code_version"]),
        seed=int(row["seed"]), finished=from_utc_naive(row["finished_utc"]))


def finding_view(row: Mapping[str, Any]) -> FindingView:
    """A ``finding`` row (as :func:`qcfit.store.reportdata.finding_rows` returns it) as a
    :class:`FindingView`."""
    details = row.get("details") or {}
    extra = details.get("extra") or {}
    return FindingView(
        kind=str(row["kind"]), line=row.get("line"), verdict=str(row["verdict"]),
        severity=details.get("severity"), reason=str(details.get("reason") or ""),
        pvalue=_f(row.get("pvalue")), adjusted_pvalue=_f(row.get("adjusted_pvalue")),
        effect_size=_f(row.get("effect_size")), effect_name=str(details.get("effect_name") or ""),
        effect_floor=_f(details.get("effect_floor")),
        alarm_level=_f(details.get("alarm_level")), watch_level=_f(details.get("watch_level")),
        power=_f(row.get("power")), n=int(row.get("n") or 0), method=str(row.get("method") or ""),
        baseline_version_id=row.get("baseline_version_id"),
        categories=tuple(str(c) for c in details.get("categories") or ()),
        observed=_floats(details.get("observed")), expected=_floats(details.get("expected")),
        residuals=_floats(details.get("adjusted_residuals")),
        top=_moves(row.get("top_categories")),
        units=_f(extra.get("units")), baseline_rate=_f(extra.get("baseline_rate")))


# ---------------------------------------------------------------------------------------
# alarms


def _role(row: Mapping[str, Any]) -> str:
    actions = [a for a, _ in row.get("events") or ()]
    if "open" in actions:
        return "new"
    if any(a in ("auto-clear", "clear") for a in actions):
        return "cleared"
    if "update" in actions or "escalate" in actions:
        return "continues"
    return "earlier"


def _shift_summary(row: Mapping[str, Any]) -> str:
    """What the alarm said about this shift (its open/update note), else its latest summary."""
    notes = [n for a, n in row.get("events") or () if a in ("open", "update") and n]
    return str(notes[-1] if notes else row["summary"])


def _alarm_item(row: Mapping[str, Any], events: Sequence[Mapping[str, Any]]) -> AlarmItem:
    ack = [e for e in events if e["action"] in ("acknowledge", "clear")]
    last = ack[-1] if ack else None

    def sid(date: Any, name: Any) -> str | None:
        return format_shift_id(date, str(name)) if date is not None and name is not None else None

    return AlarmItem(
        id=int(row["id"]), kind=str(row["kind"]), line=row.get("line"),
        severity=str(row["severity"]), state=str(row["state"]), role=_role(row),
        summary=_shift_summary(row),
        first_shift=sid(row.get("first_shift_date"), row.get("first_shift_name")),
        last_shift=sid(row.get("last_shift_date"), row.get("last_shift_name")),
        shift_count=int(row.get("shift_count") or 1),
        adjusted_pvalue=_f(row.get("adjusted_pvalue")), effect_size=_f(row.get("effect_size")),
        categories=_moves(row.get("categories")), baseline_name=row.get("baseline_name"),
        acknowledged_by=None if last is None else str(last["by"]),
        note=None if last is None else last.get("note"))


def _as_of_shift(a: AlarmItem, tests: Sequence[FindingView]) -> AlarmItem:
    """An alarm this shift crossed, with this shift's figures (the alarm row holds the
    latest shift's figures, which a report of an older shift must not show)."""
    if a.role not in ("new", "continues"):
        return a
    f = next((t for t in tests if t.kind == a.kind and t.line == a.line), None)
    if f is None or f.severity is None:
        return a
    return dataclasses.replace(
        a, severity=str(f.severity), adjusted_pvalue=f.adjusted_pvalue,
        effect_size=f.effect_size, categories=f.top)


_ROLE_ORDER = {"new": 0, "continues": 1, "earlier": 2, "cleared": 3}
_SEVERITY_ORDER = {ALARM: 0, WATCH: 1}


def alarm_order(a: AlarmItem) -> tuple:
    """What to look at first: alarms before watches, active before cleared, new before
    continuing, then the smallest adjusted p-value."""
    p = a.adjusted_pvalue if math.isfinite(a.adjusted_pvalue) else 2.0
    cleared = a.role == "cleared"
    return (cleared, _SEVERITY_ORDER.get(a.severity, 2), _ROLE_ORDER.get(a.role, 4), p, a.id)


# ---------------------------------------------------------------------------------------
# history


def poisson_upper_limit(mu0: np.ndarray, alpha: float) -> np.ndarray:
    """Smallest count c with P(X >= c | mu0) <= alpha (X ~ Poisson(mu0)), elementwise; nan
    where mu0 is not positive. The critical value of the exact one-sided Poisson test
    (e.g. Johnson, Kemp & Kotz, Univariate Discrete Distributions, 2005, ch. 4)."""
    mu = np.asarray(mu0, dtype=float)
    ok = np.isfinite(mu) & (mu > 0)
    m = np.where(ok, mu, 1.0)
    # P(X >= c) = sf(c - 1); isf gives the smallest x with sf(x) <= alpha, so c = x + 1
    c = sps.poisson.isf(alpha, m) + 1.0
    return np.where(ok, c, np.nan)


def _series(history: Sequence[ShiftInfo], lines: Sequence[str], eval_ids: Mapping[int, int],
            rows: Sequence[Mapping[str, Any]], units: Mapping[tuple[int, str], float],
            rates: Mapping[int, float], levels: Mapping[str, Levels]) -> tuple[LineHistory, ...]:
    pos = {eid: i for i, eid in enumerate(eval_ids.values())}
    n = len(history)
    mix_p = {ln: np.full(n, np.nan) for ln in lines}
    mix_w = {ln: np.full(n, np.nan) for ln in lines}
    mix_v = {ln: [""] * n for ln in lines}
    defects = {ln: np.full(n, np.nan) for ln in lines}
    base = {ln: np.full(n, np.nan) for ln in lines}
    rate_v = {ln: [""] * n for ln in lines}
    for r in rows:
        line = r["line"]
        i = pos.get(int(r["evaluation_id"]))
        if line not in mix_p or i is None:
            continue
        if r["kind"] == KIND_MIX:
            mix_p[line][i] = _f(r["adjusted_pvalue"])
            mix_w[line][i] = _f(r["effect_size"])
            mix_v[line][i] = str(r["verdict"])
        elif r["kind"] == KIND_RATE:
            defects[line][i] = _f(r["n"])
            base[line][i] = rates.get(r["baseline_version_id"] or -1, NAN)
            rate_v[line][i] = str(r["verdict"])
    out = []
    for line in lines:
        u = np.array([units.get((s.row_id, line), np.nan) for s in history], dtype=float)
        with np.errstate(divide="ignore", invalid="ignore"):
            rate = np.where(u > 0, defects[line] / u, np.nan)
            limit = poisson_upper_limit(base[line] * u, levels[line].alarm_level) / u
        out.append(LineHistory(
            line=line, mix_adjusted_p=_floats(mix_p[line]), mix_effect=_floats(mix_w[line]),
            mix_verdict=tuple(mix_v[line]), rate=_floats(rate), rate_baseline=_floats(base[line]),
            rate_limit=_floats(np.where(u > 0, limit, np.nan)), rate_verdict=tuple(rate_v[line])))
    return tuple(out)


def _charts(history: Sequence[ShiftInfo], rows: Sequence[Mapping[str, Any]],
            lines: Sequence[str]) -> tuple[ChartSeries, ...]:
    pos = {s.row_id: i for i, s in enumerate(history)}
    found: dict[tuple[str, str], tuple[np.ndarray, np.ndarray]] = {}
    for r in rows:
        i = pos.get(int(r["shift_id"]))
        if i is None:
            continue
        key = (str(r["line"]), str(r["chart"]))
        if key not in found:
            found[key] = (np.full(len(history), np.nan), np.full(len(history), np.nan))
        found[key][0][i] = _f(r["statistic"])
        found[key][1][i] = _f(r["threshold"])
    order = {ln: i for i, ln in enumerate(lines)}
    keys = sorted(found, key=lambda k: (order.get(k[0], len(order)), k[0], k[1]))
    return tuple(ChartSeries(k[0], k[1], _floats(found[k][0]), _floats(found[k][1])) for k in keys)


# ---------------------------------------------------------------------------------------
# levels


def _levels(thresholds: Any) -> Levels:
    return Levels(
        alarm_level=float(thresholds.alarm_level), watch_level=float(thresholds.watch_level),
        min_effect_w=float(thresholds.min_effect_w), min_effect_v=float(thresholds.min_effect_v),
        min_rate_ratio=float(thresholds.min_rate_ratio),
        multiple_testing=str(thresholds.multiple_testing), power=float(thresholds.power))


def _line_levels(base: Levels, tests: Sequence[FindingView], lines: Sequence[str]
                 ) -> dict[str, Levels]:
    """Per line: the levels its own findings carry (per-baseline overrides), else the config's."""
    out = {}
    for line in lines:
        mine = [t for t in tests if t.line == line and t.kind in HISTORY_KINDS
                and math.isfinite(t.alarm_level)]
        lv = base
        for t in mine:
            lv = Levels(
                alarm_level=t.alarm_level,
                watch_level=t.watch_level if math.isfinite(t.watch_level) else lv.watch_level,
                min_effect_w=t.effect_floor if t.kind == KIND_MIX and math.isfinite(t.effect_floor)
                else lv.min_effect_w,
                min_effect_v=lv.min_effect_v,
                min_rate_ratio=t.effect_floor if t.kind == KIND_RATE
                and math.isfinite(t.effect_floor) else lv.min_rate_ratio,
                multiple_testing=lv.multiple_testing, power=lv.power)
        out[line] = lv
    return out


# ---------------------------------------------------------------------------------------
# the entry point


def _find_shift(conn: Any, shift_id: str | None) -> dict[str, Any]:
    if shift_id is None:
        row = sql.latest_evaluated_shift(conn)
        if row is None:
            raise NotFoundError("evaluated shift", "in the store (run qcfit evaluate first)")
        return row
    date, name = parse_shift_id(shift_id)
    row = sql.shift_evaluation(conn, date, name)
    if row is None:
        raise NotFoundError("shift", f"{shift_id} in the store")
    if row.get("evaluation_id") is None:
        raise NotFoundError("evaluation of shift", f"{shift_id} (run qcfit evaluate --shift "
                                                   f"{shift_id})")
    return row


def gather(engine: Any, config: Any, shift_id: str | None = None, *, now: dt.datetime,
           history: int = DEFAULT_HISTORY) -> ReportData:
    """Read one shift's report data (the latest evaluated shift when ``shift_id`` is None).

    ``now`` (aware) is recorded as the time the report was made; ``history`` is how many
    evaluated shifts (this one included) the "over time" charts show. Raises NotFoundError when
    the shift is not in the store or has no current evaluation.
    """
    if now.tzinfo is None:
        raise InvalidArgumentError("now", "pass an aware datetime")
    if history < 1:
        raise InvalidArgumentError("history", f"must be at least 1, not {history}")
    tz = config.timezone
    lines = tuple(config.lines)
    with read_tx(engine) as conn:
        row = _find_shift(conn, shift_id)
        finding_rows = sql.finding_rows(conn, int(row["evaluation_id"]))
        alarm_rows = sql.alarms_of_shift(conn, int(row["id"]), row["start_utc"])
        events = sql.alarm_events(conn, [int(a["id"]) for a in alarm_rows])
        hist_rows = sql.shifts_before(conn, row["start_utc"], history)
        if not hist_rows or hist_rows[-1]["id"] != row["id"]:  # a failed shift still ends it
            hist_rows = [*hist_rows[-(history - 1):], row] if history > 1 else [row]
        eval_ids = {int(h["id"]): int(h["evaluation_id"]) for h in hist_rows}
        hist_findings = sql.history_findings(conn, list(eval_ids.values()), HISTORY_KINDS)
        shift_ids = list(eval_ids)
        unit_rows = sql.units_of(conn, shift_ids)
        count_rows = sql.counts_of(conn, [int(row["id"])])
        chart_rows = sql.chart_states(conn, shift_ids)
        version_ids = {f["baseline_version_id"] for f in hist_findings} | {
            f["baseline_version_id"] for f in finding_rows}
        versions = sql.baseline_versions(conn, [v for v in version_ids if v is not None])
    return _assemble(config, row, finding_rows, alarm_rows, events, hist_rows, eval_ids,
                     hist_findings, unit_rows, count_rows, chart_rows, versions, now, lines, tz)


def _assemble(config: Any, row: Mapping[str, Any], finding_rows: Sequence[Mapping[str, Any]],
              alarm_rows: Sequence[Mapping[str, Any]], events: Sequence[Mapping[str, Any]],
              hist_rows: Sequence[Mapping[str, Any]], eval_ids: Mapping[int, int],
              hist_findings: Sequence[Mapping[str, Any]], unit_rows: Sequence[tuple],
              count_rows: Sequence[tuple], chart_rows: Sequence[Mapping[str, Any]],
              versions: Sequence[Mapping[str, Any]], now: dt.datetime, lines: tuple[str, ...],
              tz: dt.tzinfo) -> ReportData:
    cats = tuple(config.categories)
    tests = tuple(finding_view(f) for f in finding_rows)
    by_alarm: dict[int, list[Mapping[str, Any]]] = {}
    for e in events:
        by_alarm.setdefault(int(e["alarm_id"]), []).append(e)
    items = (_alarm_item(a, by_alarm.get(int(a["id"]), [])) for a in alarm_rows)
    alarms = tuple(sorted((_as_of_shift(a, tests) for a in items), key=alarm_order))
    history = tuple(_shift_info(h, tz) for h in hist_rows)
    units = {(s, ln): float(u) for s, ln, u in unit_rows}
    rates = {int(v["id"]): _f(v["rate"]) for v in versions}
    base_levels = _levels(config.thresholds)
    per_line = _line_levels(base_levels, tests, lines)
    li = {ln: i for i, ln in enumerate(lines)}
    ki = {c: j for j, c in enumerate(cats)}
    counts = np.zeros((len(lines), len(cats)), dtype=np.int64)
    for _, ln, cat, value in count_rows:
        if ln in li and cat in ki:
            counts[li[ln], ki[cat]] = value
    shift = history[-1]
    return ReportData(
        plant_name=str(getattr(config, "plant_name", "") or ""),
        timezone_name=str(config.timezone_name),
        lines=tuple((ln, str(config.lines[ln])) for ln in lines),
        categories=tuple((c, str(config.categories[c])) for c in cats),
        shift=shift,
        evaluation=_evaluation_info(row),
        findings=tests,
        alarms=alarms,
        history=history,
        line_history=_series(history, lines, eval_ids, hist_findings, units, rates, per_line),
        charts=_charts(history, chart_rows, lines),
        counts=tuple(tuple(int(x) for x in r) for r in counts),
        units=tuple(units.get((shift.row_id, ln), NAN) for ln in lines),
        baselines=tuple(BaselineInfo(int(v["id"]), str(v["name"]), v["effective"],
                                     str(v["content_hash"]), _f(v["rate"])) for v in versions),
        levels=base_levels,
        line_levels=tuple(per_line.items()),
        generated=now,
    )


def report_shift_id(engine: Any, shift_id: str | None) -> str:
    """The id of the shift a report would show (the latest evaluated one when None)."""
    with read_tx(engine) as conn:
        row = _find_shift(conn, shift_id)
    return format_shift_id(row["shift_date"], str(row["shift_name"]))


__all__ = [
    "DEFAULT_HISTORY", "AlarmItem", "BaselineInfo", "CategoryMove", "ChartSeries",
    "EvaluationInfo", "LineHistory", "Levels", "ReportData", "ShiftInfo", "FindingView",
    "alarm_order", "gather", "poisson_upper_limit", "report_shift_id", "finding_view",
]

"""Findings of one shift + the alarms already in the log -> alarm decisions (pure).

Rules (the ``[thresholds]`` keys in brackets):

1. **Multiplicity.** The p-values of all ``baseline``, ``rate`` and ``between-lines`` tests of
   one shift form one family and are adjusted together [multiple_testing: bh (Benjamini &
   Hochberg 1995, default), holm (Holm 1979), by (Benjamini & Yekutieli 2001), none].
   ``line-vs-rest`` tests only say *which* line is behind a between-lines difference; they are
   adjusted in their own family. Untestable findings take no part (m counts tested hypotheses).
2. **Severity.** A test crosses at ``alarm`` when its adjusted p < alarm_level AND its effect
   size >= the floor (min_effect_w for the mix, min_effect_v between lines, min_rate_ratio for
   the rate); at ``watch`` when adjusted p < watch_level and the effect floor is met. A
   significant p with an effect below the floor is in control: the change is too small to
   matter. A defect in a category the baseline says never occurs crosses at ``alarm``.
3. **Verdicts.** A test that does not cross is ``in-control`` only with enough power;
   otherwise it stays ``too-little-data``.
4. **Persistence.** A new alarm is raised only when k of the last m shifts crossed
   [persistence_k, persistence_m]; the history of earlier shifts is passed in.
5. **One alarm per line and kind.** An alarm still open (or acknowledged) for the same line and
   kind is updated (shifts covered, latest figures) instead of raising a new one. When shift s
   is judged, an alarm raised by a later shift does not exist yet and is ignored; an alarm (in
   any state) whose covered shifts contain s is the one s updates, so re-evaluating a shift
   never raises a second alarm for it.
6. **Auto-clear** after [auto_clear_after] in-control shifts in a row for that line and kind;
   only shifts after the alarm's last crossing shift count.
7. **People's decisions stand.** Re-evaluating a shift the alarm already covers updates its
   figures and shift list only: an acknowledgement or a clearing is never undone.
8. **Faults** (a test that raised, a failed evaluation) become ``service-fault`` alarms.

Shift lists (not counters) drive the counts, so applying the same shift twice changes nothing.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from qcfit import evaluate as ev
from qcfit import stats as qstats
from qcfit.errors import InvalidArgumentError
from qcfit.evaluate import CategoryShift, Finding

IN_CONTROL = "in-control"
WATCH = "watch"
ALARM = "alarm"
SEVERITIES = (WATCH, ALARM)
SEVERITY_RANK = {None: 0, WATCH: 1, ALARM: 2}

KIND_FAULT = "service-fault"
FAMILY_KINDS = frozenset({ev.KIND_BASELINE, ev.KIND_RATE, ev.KIND_BETWEEN})
ALARM_KINDS = (ev.KIND_BASELINE, ev.KIND_BETWEEN, ev.KIND_RATE, ev.KIND_SEQUENTIAL, KIND_FAULT)
METHODS = ("bh", "holm", "by", "none")

OPEN = "open"
ACKNOWLEDGED = "acknowledged"
CLEARED = "cleared"
ACTIVE_STATES = (OPEN, ACKNOWLEDGED)

# Decision actions
RAISE = "open"
UPDATE = "update"
IN_CONTROL_SHIFT = "in-control"
AUTO_CLEAR = "auto-clear"
WITHDRAW = "withdraw"
NOT_YET = "not-persistent"


@dataclass(frozen=True, slots=True)
class ActiveAlarm:
    """An alarm in the log that this shift may update or clear.

    ``shifts`` are the shift ids it covers (the first raised it); ``in_control_shifts`` the
    shifts in a row since the last crossing that were in control. Relative to the shift being
    judged: ``raised_after`` when the alarm was raised by a later shift (it does not exist yet
    at the judged shift), ``crossed_after`` when it covers a crossing shift later than the
    judged one (so the judged shift cannot count toward its auto-clear).
    """

    id: int
    kind: str
    line: str | None
    severity: str
    state: str
    first_shift: str
    baseline_version_id: int | None
    shifts: tuple[str, ...]
    in_control_shifts: tuple[str, ...] = ()
    raised_after: bool = False
    crossed_after: bool = False
    change_start: Mapping[str, Any] | None = None  # sequential: the start estimate it keeps


@dataclass(frozen=True, slots=True)
class AlarmDecision:
    """What to do with one alarm: open a new one, update, count an in-control shift,
    auto-clear, or withdraw (re-evaluation no longer supports it); ``not-persistent`` records a
    crossing that did not yet meet the k-of-m rule (nothing is written)."""

    action: str
    kind: str
    line: str | None
    shift_id: str
    alarm_id: int | None = None
    severity: str | None = None
    baseline_version_id: int | None = None
    pvalue: float | None = None
    adjusted_pvalue: float | None = None
    effect_size: float | None = None
    categories: tuple[CategoryShift, ...] = ()
    category_lines: tuple[str | None, ...] = ()  # between lines: the line of each category
    summary: str = ""
    note: str = ""
    shifts: tuple[str, ...] = ()
    in_control_shifts: tuple[str, ...] = ()
    details: Mapping[str, Any] = field(default_factory=dict)


@dataclass(frozen=True, slots=True)
class PolicyResult:
    findings: tuple[Finding, ...]
    decisions: tuple[AlarmDecision, ...]

    def by_action(self, action: str) -> list[AlarmDecision]:
        return [d for d in self.decisions if d.action == action]


# ---------------------------------------------------------------------------------------
# multiplicity and severity


def adjust(pvalues: Sequence[float], method: str) -> list[float]:
    """Adjusted p-values for one family (bh / holm / by / none); empty in, empty out."""
    if method not in METHODS:
        raise InvalidArgumentError("thresholds.multiple_testing",
                                   f"{method!r} is not one of {', '.join(METHODS)}")
    if not pvalues:
        return []
    p = np.asarray(pvalues, dtype=float)
    if method == "none" or len(p) == 1:
        return [float(x) for x in p]
    return [float(x) for x in np.asarray(qstats.adjust_pvalues(p, method=method))]


def severity_of(f: Finding, adjusted_p: float | None = None) -> str | None:
    """alarm / watch / None for a finding (its adjusted p-value, or ``adjusted_p``)."""
    if f.verdict == ev.IMPOSSIBLE:
        return ALARM
    p = f.adjusted_pvalue if adjusted_p is None else adjusted_p
    if not f.testable or p is None or f.effect_size is None:
        return None
    if f.effect_floor is not None and not f.effect_size >= f.effect_floor:
        return None
    if p < f.alarm_level:
        return ALARM
    if p < f.watch_level:
        return WATCH
    return None


def judge(findings: Sequence[Finding], method: str) -> tuple[Finding, ...]:
    """Adjust p-values per family, then set each testable finding's severity and verdict."""
    out = list(findings)
    family: list[int] = []
    vs_rest: list[int] = []
    for i, f in enumerate(out):
        if f.verdict in ev.TESTABLE and f.pvalue is not None:  # f.testable
            if f.kind in FAMILY_KINDS:
                family.append(i)
            elif f.kind == ev.KIND_VS_REST:
                vs_rest.append(i)
    adjusted: dict[int, float] = {}
    for members in (family, vs_rest):
        values = adjust([out[i].pvalue for i in members], method)  # type: ignore[misc]
        adjusted.update((i, min(1.0, a)) for i, a in zip(members, values, strict=True))
    for i, f in enumerate(out):
        if f.verdict == ev.IMPOSSIBLE:
            out[i] = ev.with_values(f, severity=ALARM)
        elif i in adjusted:
            out[i] = _judged(f, adjusted[i])
    return tuple(out)


def for_decisions(judged: Iterable[Finding]) -> tuple[Finding, ...]:
    """Judged findings as :func:`decide` needs them: in full where one crosses or reports a
    fault (its figures go into the alarm), otherwise only its kind, line and verdict (which
    alarm it belongs to, and whether that line and kind was in control). Cheap to send between
    processes; ``decide(..., judged=True)`` gives the same decisions as with the full ones."""
    return tuple(f if crossed(f) or f.verdict == ev.FAULT else _Bare(f.kind, f.line, f.verdict, "")
                 for f in judged)


class _Bare(Finding):
    """A finding reduced to its kind, line and verdict (see :func:`for_decisions`); it
    pickles as the :class:`Finding` with just these, in a few bytes."""

    __slots__ = ()

    def __reduce__(self) -> tuple[Any, tuple[Any, ...]]:
        return (Finding, (self.kind, self.line, self.verdict, self.reason))


def _judged(f: Finding, adjusted_p: float) -> Finding:
    sev = severity_of(f, adjusted_p)
    verdict = sev or (ev.TOO_LITTLE_DATA if f.verdict == ev.TOO_LITTLE_DATA else IN_CONTROL)
    if sev:
        reason = _crossing_reason(f, adjusted_p, sev)
    else:
        reason = f.reason if verdict == ev.TOO_LITTLE_DATA else _in_control_reason(f, adjusted_p)
    return ev.with_values(f, adjusted_pvalue=adjusted_p, severity=sev, verdict=verdict,
                          reason=reason)


def _crossing_reason(f: Finding, adjusted_p: float, sev: str) -> str:
    """Why a test crossed, e.g. ``adjusted p 0.0004 < 0.01 and w 0.412 >= 0.15: alarm``."""
    level = f.alarm_level if sev == ALARM else f.watch_level
    words = f"adjusted p {adjusted_p:.3g} < {level:g}"
    if f.effect_floor is not None and f.effect_size is not None:
        words += f" and {f.effect_name or 'effect'} {f.effect_size:.3f} >= {f.effect_floor:g}"
    words += f": {sev}"
    if f.verdict == ev.TOO_LITTLE_DATA and f.power is not None:
        needed = f" < {f.power_needed:.2f}" if f.power_needed is not None else ""
        words += f" (power {f.power:.2f}{needed}, yet the signal is clear)"
    return words


def _in_control_reason(f: Finding, adjusted_p: float) -> str:
    if adjusted_p < f.watch_level and f.effect_floor is not None:
        return (f"adjusted p {adjusted_p:.3g} is small but {f.effect_name} "
                f"{f.effect_size:.3f} < {f.effect_floor:g}: too small to matter")
    return f.reason


# ---------------------------------------------------------------------------------------
# words


def _name(code: str, names: Mapping[str, str]) -> str:
    return names.get(code, code)


def describe_category(c: CategoryShift, names: Mapping[str, str], reference: str = "baseline") -> str:
    """e.g. ``flash share 2.6x baseline (adj. residual +4.1)``."""
    if c.reference_share <= 0:
        return f"{_name(c.code, names)} seen {c.observed}x, {reference} share 0"
    return (f"{_name(c.code, names)} share {c.ratio:.1f}x {reference} "
            f"(adj. residual {c.adjusted_residual:+.1f})")


def describe(f: Finding, names: Mapping[str, str], vs_rest: Sequence[Finding] = ()) -> str:
    """What changed, in words, for the alarm summary."""
    if f.verdict == ev.FAULT or f.kind == ev.KIND_SEQUENTIAL:  # sequential: the chart's own words
        return f.reason
    if f.kind == ev.KIND_RATE:
        d = f.details
        return (f"defect rate {f.effect_size:.1f}x baseline ({f.n:,} defects in "
                f"{d.get('units', 0):,.0f} units, expected {d.get('expected_defects', 0):.1f})")
    if f.kind == ev.KIND_BETWEEN:
        parts = [f"lines differ (V {f.effect_size:.2f})"]
        for r in vs_rest[:2]:
            if r.top_categories:
                parts.append(f"{r.line}: {describe_category(r.top_categories[0], names, 'rest')}")
        return "; ".join(parts)
    cats = [describe_category(c, names) for c in f.top_categories[:2]]
    return "; ".join(cats) if cats else f"mix differs from baseline ({f.effect_name} {f.effect_size:.2f})"


# ---------------------------------------------------------------------------------------
# decisions


def _alarm_kind(f: Finding) -> str | None:
    if f.verdict == ev.FAULT:
        return KIND_FAULT
    if f.kind == ev.KIND_VS_REST:
        return None
    return f.kind


def _persistent(crossed_before: Sequence[bool], k: int, m: int) -> bool:
    recent = list(crossed_before)[-(m - 1):] if m > 1 else []
    return sum(bool(x) for x in recent) + 1 >= k


def crossed(f: Finding) -> bool:
    """True when a finding counts as a crossing (for the k-of-m history)."""
    return f.severity in SEVERITIES


def _figures(f: Finding, names: Mapping[str, str], vs_rest: Sequence[Finding]) -> dict[str, Any]:
    lines = [r.line for r in vs_rest]
    cats, cat_lines = f.top_categories, ()
    if not cats and vs_rest:  # between lines: the categories of the lines the summary names
        named = [(r.line, c) for r in vs_rest[:2] for c in r.top_categories]
        cats = tuple(c for _, c in named)
        cat_lines = tuple(line for line, _ in named)
    return {
        "category_lines": cat_lines,
        "severity": f.severity or ALARM,
        "baseline_version_id": f.baseline_version_id,
        "pvalue": f.pvalue,
        "adjusted_pvalue": f.adjusted_pvalue,
        "effect_size": f.effect_size,
        "categories": cats,
        "summary": describe(f, names, vs_rest),
        "details": finding_story(f) | ({"lines_differing": lines} if lines else {}),
    }


def finding_story(f: Finding) -> dict[str, Any]:
    """The figures an alarm keeps from its latest finding (JSON-ready)."""
    return {
        "finding_kind": f.kind,
        "verdict": f.verdict,
        "reason": f.reason,
        "statistic": f.statistic,
        "dof": f.dof,
        "effect_name": f.effect_name,
        "effect_floor": f.effect_floor,
        "method": f.method,
        "n": f.n,
        "power": f.power,
        "categories": list(f.categories),
        "observed": list(f.observed),
        "expected": list(f.expected),
        "adjusted_residuals": [r if math.isfinite(r) else None for r in f.adjusted_residuals],
        "extra": {k: v for k, v in f.details.items() if _jsonable(v)},
    }


def _jsonable(v: Any) -> bool:
    return isinstance(v, str | int | float | bool | list | dict | tuple) or v is None


def decide(
    findings: Sequence[Finding],
    thresholds: Any,
    *,
    shift_id: str,
    active: Sequence[ActiveAlarm] = (),
    history: Mapping[tuple[str | None, str], Sequence[bool]] | None = None,
    names: Mapping[str, str] | None = None,
    judged: bool = False,
) -> PolicyResult:
    """Judge one shift's findings and decide what happens to each alarm (``judged``: the
    findings went through :func:`judge` with the same thresholds already, or through
    :func:`for_decisions` after it).

    ``active``: alarms open or acknowledged now, plus any alarm (in any state) that this shift
    raised or that covers it (so a re-evaluation updates or withdraws it instead of raising
    another), with ``raised_after`` / ``crossed_after`` set relative to this shift. ``history[(line, kind)]``: whether each earlier
    shift crossed, oldest first (only the last m - 1 are used). ``names``: display names of
    categories for the words.
    """
    if not judged:
        findings = judge(findings, thresholds.multiple_testing)
    judged_findings = tuple(findings)
    names = names or {}
    history = history or {}
    groups = _group(judged_findings)
    by_key: dict[tuple[str | None, str], list[ActiveAlarm]] = {}
    for a in active:
        by_key.setdefault((a.line, a.kind), []).append(a)
    decisions: list[AlarmDecision] = []
    vs_rest = sorted((f for f in judged_findings if f.kind == ev.KIND_VS_REST and crossed(f)),
                     key=lambda f: f.adjusted_pvalue or 1.0)
    for key in sorted(set(groups) | set(by_key), key=lambda k: (k[1], k[0] or "")):
        found, alarms = groups.get(key, []), by_key.get(key, [])
        if not alarms and not any(crossed(f) or f.verdict == ev.FAULT for f in found):
            continue  # no alarm to touch and nothing crossed: _decide_key would decide nothing
        decisions += _decide_key(key, found, alarms, thresholds, shift_id,
                                 history.get(key, ()), names, vs_rest)
    return PolicyResult(judged_findings, tuple(decisions))


def _group(findings: Iterable[Finding]) -> dict[tuple[str | None, str], list[Finding]]:
    out: dict[tuple[str | None, str], list[Finding]] = {}
    for f in findings:
        kind = _alarm_kind(f)
        if kind is not None:
            out.setdefault((f.line, kind), []).append(f)
    return out


def _worst(found: Sequence[Finding]) -> Finding | None:
    crossing = [f for f in found if crossed(f) or f.verdict == ev.FAULT]
    if not crossing:
        return None
    return max(crossing, key=lambda f: (SEVERITY_RANK[f.severity], -(f.adjusted_pvalue or 0.0)))


def _decide_key(key, found, alarms, thresholds, shift_id, crossed_before, names, vs_rest):
    line, kind = key
    worst = _worst(found)
    alarms = [a for a in alarms if not a.raised_after]  # not raised yet at this shift
    covering = [a for a in alarms if shift_id in a.shifts or a.first_shift == shift_id]
    live = [a for a in alarms if a.state in ACTIVE_STATES and a not in covering]
    if worst is not None:
        if worst.verdict == ev.FAULT and worst.severity is None:
            worst = ev.with_values(worst, severity=ALARM)
        figs = _figures(worst, names, vs_rest if kind == ev.KIND_BETWEEN else ())
        target = (covering or live or [None])[0]
        if kind == ev.KIND_SEQUENTIAL:
            figs = _with_change_start(figs, worst, shift_id, target)
        if target is not None:
            return [_update(target, shift_id, figs, kind, line)]
        # a sequential chart already accumulates evidence across shifts: no k-of-m rule on top
        if kind not in (KIND_FAULT, ev.KIND_SEQUENTIAL) and not _persistent(
                crossed_before, thresholds.persistence_k, thresholds.persistence_m):
            return [AlarmDecision(action=NOT_YET, kind=kind, line=line, shift_id=shift_id,
                                  note=f"crossed, but fewer than {thresholds.persistence_k} of "
                                       f"the last {thresholds.persistence_m} shifts did", **figs)]
        return [AlarmDecision(action=RAISE, kind=kind, line=line, shift_id=shift_id,
                              shifts=(shift_id,), note=figs["summary"], **figs)]
    return [d for a in covering + live if (d := _quiet(a, found, thresholds, shift_id, kind))]


START_WORDS = "change most likely began"


def change_start(f: Finding, shift_id: str,
                 held: Mapping[str, Any] | None) -> Mapping[str, Any] | None:
    """Where a sequential alarm's change began, as the alarm keeps it: the estimate of the chart
    that raised it, taken at the raising shift (``reference``). Later shifts re-derive it from
    whichever chart ranks first and it would drift; it is replaced only when the chart that
    raised the alarm restarted (its run now starts at a later chart step)."""
    signals = [s for s in f.details.get("signals") or () if isinstance(s, Mapping)]
    if not signals:
        return held
    t_now = int(f.details.get("t") or 0)

    def estimate(sig: Mapping[str, Any]) -> dict[str, Any]:
        back = int(sig.get("shifts_back") or 0)
        return {"chart": sig.get("chart"), "shift": sig.get("start_shift"), "back": back,
                "reference": shift_id, "t_start": t_now - back}

    if held is None:
        return estimate(signals[0])
    same = next((s for s in signals if s.get("chart") == held.get("chart")), None)
    if same is None:
        return held
    new = estimate(same)
    return new if new["t_start"] > int(held.get("t_start") or 0) else held


def change_start_words(start: Mapping[str, Any]) -> str:
    """e.g. ``change most likely began in shift 2026-10-07_B (2 shifts before 2026-10-08_A)``."""
    back, ref = int(start.get("back") or 0), start.get("reference")
    if back == 0:
        return f"{START_WORDS} in shift {ref}"
    where = f"in shift {start['shift']}" if start.get("shift") else "earlier"
    return f"{START_WORDS} {where} ({back} shift{'s' if back != 1 else ''} before {ref})"


def _with_change_start(figs: dict[str, Any], f: Finding, shift_id: str,
                       target: ActiveAlarm | None) -> dict[str, Any]:
    held = target.change_start if target is not None else None
    start = change_start(f, shift_id, held)
    if start is None:
        return figs
    clauses = [c for c in figs["summary"].split("; ") if not c.startswith(START_WORDS)]
    return figs | {"summary": "; ".join([*clauses, change_start_words(start)]),
                   "details": dict(figs["details"]) | {"change_start": dict(start)}}


def _update(a: ActiveAlarm, shift_id: str, figs: dict[str, Any], kind: str, line) -> AlarmDecision:
    shifts = tuple(sorted(set(a.shifts) | {shift_id}))
    severity = max(a.severity, figs["severity"], key=lambda s: SEVERITY_RANK[s])
    figs = figs | {"severity": severity}
    # a crossing ends the in-control run, unless the alarm already crossed later than this shift
    keep = shift_id in a.shifts or a.crossed_after
    return AlarmDecision(action=UPDATE, kind=kind, line=line, shift_id=shift_id, alarm_id=a.id,
                         shifts=shifts, in_control_shifts=a.in_control_shifts if keep else (),
                         note=figs["summary"], **figs)


def _quiet(a: ActiveAlarm, found: Sequence[Finding], thresholds: Any, shift_id: str,
           kind: str) -> AlarmDecision | None:
    """No crossing this shift for an alarm's line and kind."""
    base = {"kind": kind, "line": a.line, "shift_id": shift_id, "alarm_id": a.id,
            "severity": a.severity}
    if shift_id in a.shifts:  # re-evaluation: this shift no longer supports the alarm
        shifts = tuple(s for s in a.shifts if s != shift_id)
        if not shifts:
            return AlarmDecision(action=WITHDRAW, shifts=(), **base,
                                 note=f"re-evaluation of {shift_id} no longer supports this alarm")
        return AlarmDecision(action=UPDATE, shifts=shifts, in_control_shifts=a.in_control_shifts,
                             note=f"re-evaluation of {shift_id} no longer crosses", **base)
    if a.state not in ACTIVE_STATES or a.crossed_after or not _in_control(found, kind):
        return None  # only shifts after the last crossing count toward auto-clear
    streak = tuple(sorted(set(a.in_control_shifts) | {shift_id}))
    if len(streak) >= thresholds.auto_clear_after:
        return AlarmDecision(action=AUTO_CLEAR, shifts=a.shifts, in_control_shifts=streak, **base,
                             note=f"in control for {len(streak)} shifts in a row "
                                  f"({streak[0]} to {streak[-1]})")
    return AlarmDecision(action=IN_CONTROL_SHIFT, shifts=a.shifts, in_control_shifts=streak, **base)


def _in_control(found: Sequence[Finding], kind: str) -> bool:
    if kind == KIND_FAULT:
        return bool(found) is False  # no fault finding for this line this shift
    return bool(found) and all(f.verdict == IN_CONTROL for f in found)


def fault_decisions(shift_id: str, reason: str, active: Sequence[ActiveAlarm], *,
                    summary: str | None = None) -> tuple[AlarmDecision, ...]:
    """A failed evaluation (or another service fault, with its own ``summary``): one
    plant-wide service-fault alarm, updated if one is already open."""
    words = summary or f"evaluation of {shift_id} failed: {reason}"
    figs = {"severity": ALARM, "summary": words[:500], "details": {"error": reason}}
    for a in active:
        if a.kind == KIND_FAULT and a.line is None and a.state in ACTIVE_STATES:
            return (_update(a, shift_id, figs, KIND_FAULT, None),)
    return (AlarmDecision(action=RAISE, kind=KIND_FAULT, line=None, shift_id=shift_id,
                          shifts=(shift_id,), note=figs["summary"], **figs),)

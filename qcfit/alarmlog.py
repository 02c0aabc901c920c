"""The alarm log: persist the policy's decisions, acknowledge and clear, list, tell the story.

* :func:`apply_decisions` writes one shift's decisions inside the caller's transaction. It is
  idempotent: an alarm is keyed by (shift that raised it, line, kind, baseline version) with the
  alarm table's unique key, and the shifts an alarm covers are kept as a list, so applying the
  same shift again changes no count and adds no event.
* :func:`acknowledge` / :func:`clear` change state with who, when and a note, as a
  compare-and-set in one write transaction (two people acting at once cannot both win).
* :func:`list_alarms` and :func:`alarm_story` read.

States: open -> acknowledged -> cleared (open -> cleared directly is allowed; a watch that
escalates to an alarm in a new shift re-opens an acknowledged alarm so it is seen again).
Re-evaluating a shift an alarm already covers updates figures only: it never undoes an
acknowledgement or a clearing.
"""

from __future__ import annotations

import datetime as dt
import logging
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

from qcfit.errors import InvalidArgumentError, NotFoundError
from qcfit.evaluate import CategoryShift
from qcfit.model import format_shift_id
from qcfit.policy import (
    ACKNOWLEDGED,
    ACTIVE_STATES,
    AUTO_CLEAR,
    CLEARED,
    IN_CONTROL_SHIFT,
    OPEN,
    RAISE,
    SEVERITY_RANK,
    UPDATE,
    WITHDRAW,
    ActiveAlarm,
    AlarmDecision,
)
from qcfit.store import alarms as sql
from qcfit.store.engine import from_utc_naive, read_tx, to_utc_naive, write_tx
from qcfit.store.reference import read_lines

log = logging.getLogger(__name__)

SYSTEM_USER = "qcfit"
MAX_NAME = 128


@dataclass(frozen=True, slots=True)
class AlarmView:
    """One alarm as people read it (times aware UTC; the CLI shows plant time)."""

    id: int
    kind: str
    line: str | None
    severity: str
    state: str
    summary: str
    pvalue: float | None
    adjusted_pvalue: float | None
    effect_size: float | None
    categories: tuple[Mapping[str, Any], ...]
    shift_id: str | None
    shift_date: dt.date | None
    shift_name: str | None
    shift_start: dt.datetime | None
    last_shift_id: str | None
    last_shift_start: dt.datetime | None
    shift_count: int
    in_control_streak: int
    baseline_version_id: int | None
    baseline_name: str | None
    opened: dt.datetime
    updated: dt.datetime
    details: Mapping[str, Any] = field(default_factory=dict)

    def as_json(self, tz: dt.tzinfo | None = None) -> dict[str, Any]:
        """The JSON row of ``qcfit alarms --format json`` (times ISO 8601, plant time if tz)."""
        def iso(ts: dt.datetime | None) -> str | None:
            if ts is None:
                return None
            return (ts.astimezone(tz) if tz else ts).isoformat()

        return {
            "id": self.id,
            "kind": self.kind,
            "line": self.line,
            "shift_date": self.shift_date.isoformat() if self.shift_date else None,
            "shift_name": self.shift_name,
            "shift_start": iso(self.shift_start),
            "last_shift_start": iso(self.last_shift_start),
            "pvalue": self.pvalue,
            "adjusted_pvalue": self.adjusted_pvalue,
            "effect_size": self.effect_size,
            "severity": self.severity,
            "state": self.state,
            "categories": [
                ({"line": c["line"]} if c.get("line") else {})
                | {"code": c["code"], "direction": c["direction"],
                   "adjusted_residual": c.get("adjusted_residual")}
                for c in self.categories
            ],
            "summary": self.summary,
            "shift_count": self.shift_count,
            "baseline_version_id": self.baseline_version_id,
            "opened": iso(self.opened),
            "updated": iso(self.updated),
        }


@dataclass(frozen=True, slots=True)
class AlarmEventView:
    at: dt.datetime
    action: str
    by: str
    note: str | None
    from_state: str | None
    to_state: str
    shift_id: str | None


@dataclass(frozen=True, slots=True)
class AlarmStory:
    alarm: AlarmView
    events: tuple[AlarmEventView, ...]
    baseline_effective: dt.date | None


@dataclass(frozen=True, slots=True)
class Applied:
    """What :func:`apply_decisions` did, by alarm id."""

    opened: tuple[int, ...] = ()
    updated: tuple[int, ...] = ()
    cleared: tuple[int, ...] = ()


# ---------------------------------------------------------------------------------------
# reading rows


def _aware(value: Any) -> dt.datetime | None:
    return None if value is None else from_utc_naive(value)


def _date(value: Any) -> dt.date | None:
    if value is None or isinstance(value, dt.date):
        return value
    return dt.date.fromisoformat(str(value))


def _shift_id(date: Any, name: Any) -> str | None:
    d = _date(date)
    return format_shift_id(d, str(name)) if d is not None and name is not None else None


def view(row: Mapping[str, Any]) -> AlarmView:
    details = dict(row.get("details") or {})
    return AlarmView(
        id=int(row["id"]),
        kind=str(row["kind"]),
        line=row["line"],
        severity=str(row["severity"]),
        state=str(row["state"]),
        summary=str(row["summary"]),
        pvalue=row["pvalue"],
        adjusted_pvalue=row["adjusted_pvalue"],
        effect_size=row["effect_size"],
        categories=tuple(row.get("categories") or ()),
        shift_id=_shift_id(row.get("shift_date"), row.get("shift_name")),
        shift_date=_date(row.get("shift_date")),
        shift_name=row.get("shift_name"),
        shift_start=_aware(row.get("shift_start_utc")),
        last_shift_id=_shift_id(row.get("last_shift_date"), row.get("last_shift_name")),
        last_shift_start=_aware(row.get("last_shift_start_utc")),
        shift_count=int(row["shift_count"]),
        in_control_streak=int(row["in_control_streak"]),
        baseline_version_id=row["baseline_version_id"],
        baseline_name=row.get("baseline_name"),
        opened=from_utc_naive(row["opened_utc"]),
        updated=from_utc_naive(row["updated_utc"]),
        details=details,
    )


def _naive(value: Any) -> dt.datetime | None:
    if value is None or isinstance(value, dt.datetime):
        return value
    return dt.datetime.fromisoformat(str(value))


def _active(row: Mapping[str, Any], judged_start: dt.datetime | None = None) -> ActiveAlarm:
    """The policy's view of an alarm row; ``judged_start`` (naive UTC) is the start of the
    shift being judged, for the alarm's position relative to it."""
    details = row.get("details") or {}
    first = _shift_id(row.get("shift_date"), row.get("shift_name")) or ""
    first_start = _naive(row.get("shift_start_utc"))
    last_start = _naive(row.get("last_shift_start_utc"))
    return ActiveAlarm(
        id=int(row["id"]),
        kind=str(row["kind"]),
        line=row["line"],
        severity=str(row["severity"]),
        state=str(row["state"]),
        first_shift=first,
        baseline_version_id=row["baseline_version_id"],
        shifts=tuple(details.get("shifts") or ([first] if first else [])),
        in_control_shifts=tuple(details.get("in_control_shifts") or ()),
        raised_after=(judged_start is not None and first_start is not None
                      and first_start > judged_start),
        crossed_after=(judged_start is not None and last_start is not None
                       and last_start > judged_start),
        change_start=details.get("change_start"),
    )


def active_alarms(conn: Any, shift_row_id: int | None = None) -> list[ActiveAlarm]:
    """Alarms open or acknowledged now; when a shift is given, also every alarm (any state)
    raised by it or spanning it, each marked relative to it (raised or crossed later)."""
    if shift_row_id is None:
        return [_active(r) for r in sql.select_alarms(conn, states=ACTIVE_STATES)]
    return active_alarms_with_rows(conn, shift_row_id)[0]


def active_alarms_with_rows(conn: Any, shift_row_id: int
                            ) -> tuple[list[ActiveAlarm], dict[int, dict[str, Any]]]:
    """:func:`active_alarms` of a shift, and their stored rows by id (to hand to
    :func:`apply_decisions` in the same transaction, which then need not read them again)."""
    rows, start = sql.alarms_around_shift(conn, shift_row_id)
    return [_active(r, start) for r in rows], {int(r["id"]): r for r in rows}


# ---------------------------------------------------------------------------------------
# applying decisions


def _categories_json(cats: Sequence[CategoryShift],
                     lines: Sequence[str | None] = ()) -> list[dict[str, Any]]:
    """Categories as stored on the alarm; between lines each carries its ``line``."""
    out = []
    for i, c in enumerate(cats):
        row = c.as_json()
        if i < len(lines) and lines[i] is not None:
            row = {"line": lines[i]} | row
        out.append(row)
    return out


def _figures(d: AlarmDecision) -> dict[str, Any]:
    return {
        "severity": d.severity or "alarm",
        "pvalue": d.pvalue,
        "adjusted_pvalue": d.adjusted_pvalue,
        "effect_size": d.effect_size,
        "categories": _categories_json(d.categories, d.category_lines),
        "summary": d.summary or d.note or d.kind,
    }


def _details(d: AlarmDecision, old: Mapping[str, Any] | None = None) -> dict[str, Any]:
    base = dict(old or {})
    if d.details:
        base = {k: v for k, v in base.items() if k in ("shifts", "in_control_shifts")}
        base.update(d.details)
    base["shifts"] = list(d.shifts)
    base["in_control_shifts"] = list(d.in_control_shifts)
    return base


@dataclass(slots=True)
class _ShiftEvents:
    """Raise/update events of one shift: the alarms given one in this apply, and whether the
    store had none of that shift before it (then it need not be asked)."""

    fresh: bool
    alarms: set[int] = field(default_factory=set)


def _event(conn: Any, alarm_id: int, action: str, *, now_utc: dt.datetime, shift_row: int | None,
           from_state: str | None, to_state: str, note: str | None, by: str = SYSTEM_USER,
           seen: _ShiftEvents | None = None) -> None:
    # one event per alarm and shift: re-applying a shift (or updating by the shift that
    # raised the alarm) adds none
    once = shift_row is not None and action in (RAISE, UPDATE)
    if once and seen is not None and alarm_id in seen.alarms:
        return
    if once and (seen is None or not seen.fresh) and sql.has_event(
            conn, alarm_id, (RAISE, UPDATE), shift_row):
        return
    sql.insert_event(conn, {"alarm_id": alarm_id, "at_utc": now_utc, "action": action, "by": by,
                            "note": note, "from_state": from_state, "to_state": to_state,
                            "shift_id": shift_row})
    if once and seen is not None:
        seen.alarms.add(alarm_id)


def shifts_with_events(conn: Any, shift_row_ids: Sequence[int]) -> set[int]:
    """Which of the shifts already have a raise or update event (the others are ``fresh`` for
    :func:`apply_decisions`)."""
    return sql.shifts_with_events(conn, shift_row_ids, (RAISE, UPDATE))


def apply_decisions(
    conn: Any,
    decisions: Sequence[AlarmDecision],
    *,
    shift_row_id: int | None,
    shift_start_utc: dt.datetime | None,
    now: dt.datetime,
    rows: Mapping[int, Mapping[str, Any]] | None = None,
    fresh: bool = False,
) -> Applied:
    """Write one shift's decisions in the caller's transaction (idempotent). ``rows``: alarm
    rows read earlier in this transaction (:func:`active_alarms_with_rows`), by id; each is
    used at most once, before anything here changed that alarm. ``fresh``: the caller knows
    the store has no raise/update event of this shift yet (see :func:`shifts_with_events`)."""
    now_utc = to_utc_naive(now)
    opened: list[int] = []
    updated: list[int] = []
    cleared: list[int] = []
    ctx = (conn, shift_row_id, shift_start_utc, now_utc, dict(rows or {}),
           _ShiftEvents(fresh and shift_row_id is not None))
    for d in decisions:
        if d.action == RAISE:
            alarm_id, new = _raise(ctx, d)
            (opened if new else updated).append(alarm_id)
        elif d.action == UPDATE:
            updated.append(_update(ctx, d))
        elif d.action == IN_CONTROL_SHIFT:
            _streak(ctx, d)
        elif d.action in (AUTO_CLEAR, WITHDRAW):
            if _close(ctx, d):
                cleared.append(int(d.alarm_id))  # type: ignore[arg-type]
    return Applied(tuple(opened), tuple(updated), tuple(cleared))


def _raise(ctx: tuple, d: AlarmDecision) -> tuple[int, bool]:
    conn, shift_row, _start, now_utc, rows, seen = ctx
    key = (shift_row or 0, d.line or "", d.kind, d.baseline_version_id or 0)
    existing = sql.find_by_key(conn, *key)
    if existing is not None and shift_row is None and existing["state"] == CLEARED:
        return _reopen(ctx, existing, d), True
    if existing is not None:  # the same shift applied again: refresh figures, keep the state
        rows.pop(int(existing["id"]), None)
        sql.update_alarm(conn, existing["id"], _figures(d) | {
            "details": _details(d, existing.get("details")), "updated_utc": now_utc})
        return int(existing["id"]), False
    alarm_id = sql.insert_alarm(conn, _figures(d) | {
        "kind": d.kind, "line": d.line, "line_key": key[1],
        "first_shift_id": shift_row, "last_shift_id": shift_row, "shift_key": key[0],
        "baseline_version_id": d.baseline_version_id, "baseline_key": key[3],
        "state": OPEN, "shift_count": 1, "in_control_streak": 0,
        "details": _details(d), "opened_utc": now_utc, "updated_utc": now_utc,
    })
    _event(conn, alarm_id, RAISE, now_utc=now_utc, shift_row=shift_row, from_state=None, seen=seen,
           to_state=OPEN, note=d.summary)
    return alarm_id, True


def _reopen(ctx: tuple, row: Mapping[str, Any], d: AlarmDecision) -> int:
    """A new fault tied to no shift after the plant-wide one was cleared: such faults share one
    key, so the cleared alarm is opened again (``opened`` becomes now; the history keeps the
    earlier opening and clearing) and reads as new."""
    conn, _shift_row, _start, now_utc, rows, _seen = ctx
    rows.pop(int(row["id"]), None)
    sql.update_alarm(conn, row["id"], _figures(d) | {
        "state": OPEN, "shift_count": 1, "in_control_streak": 0, "details": _details(d),
        "opened_utc": now_utc, "updated_utc": now_utc})
    _event(conn, row["id"], RAISE, now_utc=now_utc, shift_row=None, from_state=CLEARED,
           to_state=OPEN, note=f"raised again after it was cleared: {d.summary}")
    return int(row["id"])


def _load(ctx: tuple, alarm_id: int | None) -> dict[str, Any]:
    """The alarm's row: the one read before (then forgotten: it is about to change), else
    from the store."""
    conn, rows = ctx[0], ctx[4]
    row = rows.pop(int(alarm_id), None) if alarm_id is not None else None
    if row is None and alarm_id is not None:
        row = sql.get_alarm(conn, int(alarm_id))
    if row is None:
        raise NotFoundError("alarm", alarm_id)
    return row


def _is_latest(row: Mapping[str, Any], shift_start: dt.datetime | None) -> bool:
    last = row.get("last_shift_start_utc")
    if shift_start is None or last is None:
        return True
    if isinstance(last, str):
        last = dt.datetime.fromisoformat(last)
    return shift_start >= last


def _update(ctx: tuple, d: AlarmDecision) -> int:
    conn, shift_row, start, now_utc, _rows, _seen = ctx
    row = _load(ctx, d.alarm_id)
    values: dict[str, Any] = {
        "shift_count": max(1, len(d.shifts)),
        "in_control_streak": len(d.in_control_shifts),
        "updated_utc": now_utc,
        "details": _details(d, row.get("details")),
    }
    crossing = bool(d.details)
    if crossing and _is_latest(row, start):
        values |= _figures(d) | {"last_shift_id": shift_row}
    state = row["state"]
    # a re-evaluation of a shift the alarm already covers never undoes a person's decision
    seen = d.shift_id in ((row.get("details") or {}).get("shifts") or ())
    escalated = (crossing and state == ACKNOWLEDGED and not seen
                 and SEVERITY_RANK[d.severity] > SEVERITY_RANK[row["severity"]])
    if escalated:
        values["state"] = OPEN
    sql.update_alarm(conn, row["id"], values)
    if crossing:
        note = d.summary + (" (escalated to alarm: re-opened)" if escalated else "")
        _event(conn, row["id"], UPDATE, now_utc=now_utc, shift_row=shift_row, from_state=state,
               seen=ctx[5],
               to_state=values.get("state", state), note=note)
    return int(row["id"])


def _streak(ctx: tuple, d: AlarmDecision) -> None:
    conn, _shift_row, _start, now_utc, _rows, _seen = ctx
    row = _load(ctx, d.alarm_id)
    sql.update_alarm(conn, row["id"], {"in_control_streak": len(d.in_control_shifts),
                                       "details": _details(d, row.get("details"))})


def _close(ctx: tuple, d: AlarmDecision) -> bool:
    conn, shift_row, _start, now_utc, _rows, _seen = ctx
    row = _load(ctx, d.alarm_id)
    if row["state"] not in ACTIVE_STATES:
        sql.update_alarm(conn, row["id"], {"details": _details(d, row.get("details")),
                                           "shift_count": max(1, len(d.shifts))})
        return False
    sql.update_alarm(conn, row["id"], {
        "state": CLEARED, "updated_utc": now_utc, "in_control_streak": len(d.in_control_shifts),
        "shift_count": max(1, len(d.shifts)), "details": _details(d, row.get("details"))})
    _event(conn, row["id"], AUTO_CLEAR, now_utc=now_utc, shift_row=shift_row, seen=ctx[5],
           from_state=row["state"], to_state=CLEARED, note=d.note)
    return True


SERVICE_LABEL = "service"  # stands for the shift in the shift list of a fault with no shift


def record_service_fault(engine: Any, reason: str, *, now: dt.datetime) -> int:
    """A service fault not tied to a shift (for example an invalid new config): one plant-wide
    ``service-fault`` alarm, updated if one is open. Returns its id. The alarm clears itself
    after ``auto_clear_after`` shifts evaluated without fault, or by hand; a fault after that
    opens the same alarm again (state ``open``, an ``open`` event in its history)."""
    from qcfit.policy import fault_decisions

    with write_tx(engine) as conn:
        active = active_alarms(conn)
        decisions = fault_decisions(SERVICE_LABEL, reason, active, summary=f"service: {reason}")
        applied = apply_decisions(conn, decisions, shift_row_id=None, shift_start_utc=None, now=now)
    alarm_id = (applied.opened or applied.updated)[0]
    log.info("alarm %d: service fault: %s", alarm_id, reason)
    return alarm_id


# ---------------------------------------------------------------------------------------
# people acting on alarms


def _check_person(by: str) -> str:
    name = (by or "").strip()
    if not name:
        raise InvalidArgumentError("--by", "give the name of the person acting on the alarm")
    if len(name) > MAX_NAME:
        raise InvalidArgumentError("--by", f"name longer than {MAX_NAME} characters")
    return name


def _change(engine: Any, alarm_id: int, *, by: str, note: str | None, now: dt.datetime,
            allowed: Sequence[str], to_state: str, action: str,
            cause_removed: bool = False) -> AlarmView:
    person = _check_person(by)
    now_utc = to_utc_naive(now)
    with write_tx(engine) as conn:
        row = sql.get_alarm(conn, int(alarm_id))
        if row is None:
            raise NotFoundError("alarm", alarm_id)
        state = row["state"]
        if state not in allowed:
            raise InvalidArgumentError("ID", _refusal(conn, row, action))
        if not sql.set_state(conn, row["id"], expected_state=state, state=to_state, at_utc=now_utc):
            raise InvalidArgumentError("ID", f"alarm {alarm_id} changed meanwhile; try again")
        if cause_removed:  # the line's sequential charts start afresh from the next shift
            note = _reset_charts(conn, row, person, note)
        _event(conn, row["id"], action, now_utc=now_utc, shift_row=None, from_state=state,
               to_state=to_state, note=(note or None), by=person)
        out = view(sql.get_alarm(conn, row["id"]))  # type: ignore[arg-type]
    log.info("alarm %s %s by %s", alarm_id, to_state, person)
    return out


def _refusal(conn: Any, row: Mapping[str, Any], action: str) -> str:
    last = [e for e in sql.events_of(conn, row["id"]) if e["to_state"] == row["state"]]
    who = ""
    if last:
        e = last[-1]
        who = f" by {e['by']} at {from_utc_naive(e['at_utc']).isoformat(timespec='minutes')}"
    verb = "acknowledge" if action == "acknowledge" else "clear"
    return f"alarm {row['id']} is {row['state']}{who}; cannot {verb} it"


def acknowledge(engine: Any, alarm_id: int, *, by: str, note: str | None = None,
                now: dt.datetime, cause_removed: bool = False) -> AlarmView:
    """open -> acknowledged, recording who, when and an optional note. ``cause_removed``:
    the line's sequential charts restart from the next shift (the note says after which)."""
    return _change(engine, alarm_id, by=by, note=note, now=now, allowed=(OPEN,),
                   to_state=ACKNOWLEDGED, action="acknowledge", cause_removed=cause_removed)


def _reset_charts(conn: Any, row: Mapping[str, Any], person: str, note: str | None) -> str:
    from qcfit.store import charts as chart_sql

    if not row.get("line"):
        raise InvalidArgumentError("--cause-removed", f"alarm {row['id']} is not tied to one "
                                   "line; there are no line charts to reset")
    marked = chart_sql.mark_reset(conn, row["line"], f"alarm {row['id']} acknowledged by "
                                                     f"{person}, cause removed")
    words = (f"cause removed: sequential charts of {row['line']} restart after {marked}"
             if marked else f"cause removed ({row['line']} has no chart values yet)")
    return f"{note}; {words}" if note else words


def clear(engine: Any, alarm_id: int, *, by: str, note: str, now: dt.datetime) -> AlarmView:
    """open or acknowledged -> cleared; the note (why it is cleared) is required."""
    if not (note or "").strip():
        raise InvalidArgumentError("--note", "say why the alarm is cleared")
    return _change(engine, alarm_id, by=by, note=note.strip(), now=now, allowed=ACTIVE_STATES,
                   to_state=CLEARED, action="clear")


# ---------------------------------------------------------------------------------------
# reading


def list_alarms(engine: Any, *, open_only: bool = False, line: str | None = None,
                since: dt.datetime | None = None) -> list[AlarmView]:
    """Alarms newest first; ``open_only`` keeps open and acknowledged ones; ``since`` keeps
    alarms whose latest covered shift starts at or after it (so a backfill lists what it
    covers, not when it ran); ``line`` must be a line the store knows (InvalidArgumentError
    naming it otherwise)."""
    with read_tx(engine) as conn:
        if line is not None:
            known = read_lines(conn, active_only=False)
            if line not in known:
                raise InvalidArgumentError("--line", f"unknown line {line!r}; the lines are "
                                           f"{', '.join(sorted(known)) or '(none)'}")
        rows = sql.select_alarms(conn, states=ACTIVE_STATES if open_only else None, line=line,
                                 since_utc=to_utc_naive(since) if since else None)
    return [view(r) for r in rows]


def get_alarm(engine: Any, alarm_id: int) -> AlarmView:
    with read_tx(engine) as conn:
        row = sql.get_alarm(conn, int(alarm_id))
    if row is None:
        raise NotFoundError("alarm", alarm_id)
    return view(row)


def alarm_story(engine: Any, alarm_id: int) -> AlarmStory:
    """The alarm with its latest figures, its baseline and every state change."""
    with read_tx(engine) as conn:
        row = sql.get_alarm(conn, int(alarm_id))
        if row is None:
            raise NotFoundError("alarm", alarm_id)
        events = sql.events_of(conn, int(alarm_id))
    return AlarmStory(
        alarm=view(row),
        events=tuple(
            AlarmEventView(at=from_utc_naive(e["at_utc"]), action=str(e["action"]), by=str(e["by"]),
                           note=e["note"], from_state=e["from_state"], to_state=str(e["to_state"]),
                           shift_id=_shift_id(e.get("shift_date"), e.get("shift_name")))
            for e in events
        ),
        baseline_effective=_date(row.get("baseline_effective")),
    )

"""SQL for the sequential charts: ``chart_state`` (each line's chart values after each shift)
and ``chart_calibration`` (control limits cached by what they depend on).

A line's *chain* is its ``chart_state`` rows in shift order; the rows of one (line, shift) are
one per chart (``chart`` names it), each holding that chart's values as plain JSON, and the
values after the latest shift before a given one are what the next shift starts from. A
``"reset_after"`` entry in a row's state (written by an acknowledgement with the cause
removed) tells the next shift to start the line's charts afresh.

Functions take a Connection inside the caller's transaction and plain values in and out.
Times are naive UTC (see :mod:`qcfit.store.schema`).
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from sqlalchemy import Text, and_, bindparam, cast, delete, func, insert, select, update
from sqlalchemy.engine import Connection

from qcfit.model import format_shift_id
from qcfit.store import jsontext
from qcfit.store.schema import chart_calibration, chart_state, defect_count, shift

RESET_KEY = "reset_after"
IN_CHUNK = 500  # values per IN (...) list


class StateText(str):
    """A chart state already encoded: the text :func:`qcfit.store.jsontext.dumps` makes of the
    state dict (written as it is, so it must be a JSON object)."""

    __slots__ = ()


@dataclass(frozen=True, slots=True)
class StoredCharts:
    """The chart rows of one line at one shift: ``states`` chart name -> state dict."""

    line: str
    shift_row_id: int
    shift_id: str
    start_utc: dt.datetime
    baseline_version_id: int | None
    states: Mapping[str, Mapping[str, Any]]

    @property
    def reset_after(self) -> str | None:
        """The note of an acknowledgement that reset the charts after this shift, if any."""
        for st in self.states.values():
            if st.get(RESET_KEY):
                return str(st[RESET_KEY])
        return None


def _naive(value: Any) -> dt.datetime:
    return value if isinstance(value, dt.datetime) else dt.datetime.fromisoformat(str(value))


def _date(value: Any) -> dt.date:
    return value if isinstance(value, dt.date) else dt.date.fromisoformat(str(value))


def _group(rows: Iterable[Any]) -> dict[str, StoredCharts]:
    out: dict[str, dict[str, Any]] = {}
    for r in rows:
        g = out.setdefault(r.line, {"line": r.line, "shift_row_id": int(r.shift_id),
                                    "shift_id": format_shift_id(_date(r.shift_date), r.shift_name),
                                    "start_utc": _naive(r.start_utc),
                                    "baseline_version_id": r.baseline_version_id, "states": {}})
        g["states"][r.chart] = dict(r.state or {})
    return {k: StoredCharts(**v) for k, v in out.items()}


def _rows_select():
    return (select(chart_state.c.line, chart_state.c.chart, chart_state.c.shift_id,
                   chart_state.c.baseline_version_id, chart_state.c.state, shift.c.start_utc,
                   shift.c.shift_date, shift.c.shift_name)
            .join(shift, shift.c.id == chart_state.c.shift_id))


def latest_before(conn: Connection, lines: Sequence[str], before_utc: dt.datetime
                  ) -> dict[str, StoredCharts]:
    """Per line, its chart rows at the latest shift that starts before ``before_utc``."""
    found = latest_starts_before(conn, lines, before_utc)
    if not found:
        return {}
    rows = conn.execute(_rows_select().where(chart_state.c.line.in_(list(found)),
                                             shift.c.start_utc.in_(sorted(set(found.values())))))
    want = set(found.items())
    return _group(r for r in rows if (r.line, _naive(r.start_utc)) in want)


def latest_starts_before(conn: Connection, lines: Sequence[str], before_utc: dt.datetime
                         ) -> dict[str, dt.datetime]:
    """Per line, the start of the latest shift before ``before_utc`` with its chart rows."""
    if not lines:
        return {}
    found = conn.execute(
        select(chart_state.c.line, func.max(shift.c.start_utc))
        .join(shift, shift.c.id == chart_state.c.shift_id)
        .where(chart_state.c.line.in_(list(lines)), shift.c.start_utc < before_utc)
        .group_by(chart_state.c.line)).all()
    return {ln: _naive(start) for ln, start in found}


def latest_ids_before(conn: Connection, lines: Sequence[str], before_utc: dt.datetime
                      ) -> dict[str, str]:
    """Per line, the shift id of its latest chart rows before ``before_utc`` (as
    :func:`latest_before`, without reading the chart values)."""
    found = latest_starts_before(conn, lines, before_utc)
    if not found:
        return {}
    rows = conn.execute(
        select(chart_state.c.line, shift.c.start_utc, shift.c.shift_date, shift.c.shift_name)
        .join(shift, shift.c.id == chart_state.c.shift_id)
        .where(chart_state.c.line.in_(list(found)),
               shift.c.start_utc.in_(sorted(set(found.values())))))
    want = set(found.items())
    out: dict[str, str] = {}
    for r in rows:
        if (r.line, _naive(r.start_utc)) in want:
            out.setdefault(r.line, format_shift_id(_date(r.shift_date), r.shift_name))
    return out


def starts_between(conn: Connection, lines: Sequence[str], since_utc: dt.datetime,
                   until_utc: dt.datetime, *, chart: str, include_end: bool = False
                   ) -> dict[str, list[tuple[dt.datetime, str]]]:
    """Per line, (start, shift id) of the shifts starting from ``since_utc`` to before
    ``until_utc`` (or at it, with ``include_end``) where the line has a row of ``chart``,
    oldest first. A chart every line's rows include finds every shift with chart rows; the
    rows are found by their key (shifts by start, then line, chart and shift), so the cost
    grows with the window, not with the store."""
    if not lines:
        return {}
    end = shift.c.start_utc <= until_utc if include_end else shift.c.start_utc < until_utc
    found = conn.execute(
        select(shift.c.id, shift.c.start_utc, shift.c.shift_date, shift.c.shift_name)
        .where(shift.c.start_utc >= since_utc, end)).all()
    if not found:
        return {}
    info = {int(r.id): (_naive(r.start_utc), format_shift_id(_date(r.shift_date), r.shift_name))
            for r in found}
    ids = list(info)
    out: dict[str, list[tuple[dt.datetime, str]]] = {}
    for i in range(0, len(ids), IN_CHUNK):
        rows = conn.execute(
            select(chart_state.c.line, chart_state.c.shift_id)
            .where(chart_state.c.line.in_(list(lines)), chart_state.c.chart == chart,
                   chart_state.c.shift_id.in_(ids[i:i + IN_CHUNK])))
        for line, sid in rows:
            out.setdefault(line, []).append(info[int(sid)])
    for v in out.values():
        v.sort()
    return out


def states_at(conn: Connection, shift_row_id: int, lines: Sequence[str] | None = None
              ) -> dict[str, StoredCharts]:
    """Per line, its chart rows at one shift."""
    q = _rows_select().where(chart_state.c.shift_id == shift_row_id)
    if lines is not None:
        q = q.where(chart_state.c.line.in_(list(lines)))
    return _group(conn.execute(q))


def marks_at(conn: Connection, lines: Sequence[str], start_utc: dt.datetime) -> dict[str, str]:
    """Reset marks on the lines' chart rows at the shift starting at ``start_utc``."""
    if not lines:
        return {}
    rows = conn.execute(_rows_select().where(chart_state.c.line.in_(list(lines)),
                                             shift.c.start_utc == start_utc))
    return {ln: mark for ln, g in _group(rows).items() if (mark := g.reset_after)}


def chain_ids(conn: Connection, line: str, until_utc: dt.datetime | None, limit: int | None
              ) -> list[tuple[dt.datetime, str]]:
    """(start, shift id) of the line's chain up to and including ``until_utc`` (None: all),
    newest first, at most ``limit`` (None: all)."""
    q = (select(shift.c.shift_date, shift.c.shift_name, shift.c.start_utc)
         .where(shift.c.id.in_(select(chart_state.c.shift_id).where(chart_state.c.line == line)))
         .order_by(shift.c.start_utc.desc()))
    if until_utc is not None:
        q = q.where(shift.c.start_utc <= until_utc)
    if limit is not None:
        q = q.limit(limit)
    return [(_naive(r.start_utc), format_shift_id(_date(r.shift_date), r.shift_name))
            for r in conn.execute(q)]

def shifts_with_state_after(conn: Connection, after_utc: dt.datetime) -> list[tuple[dt.date, str]]:
    """(date, name) of every shift starting after ``after_utc`` that has chart rows."""
    rows = conn.execute(
        select(shift.c.shift_date, shift.c.shift_name)
        .where(shift.c.id.in_(select(chart_state.c.shift_id)), shift.c.start_utc > after_utc)
        .order_by(shift.c.start_utc))
    return [(_date(r.shift_date), str(r.shift_name)) for r in rows]


def latest_start(conn: Connection) -> dt.datetime | None:
    """Start (naive UTC) of the latest shift that has chart rows, or None."""
    value = conn.execute(
        select(func.max(shift.c.start_utc)).where(shift.c.id.in_(select(chart_state.c.shift_id)))
    ).scalar()
    return None if value is None else _naive(value)


def write_states_many(conn: Connection, shift_row_id: int,
                      by_line: Mapping[str, Sequence[Mapping[str, Any]]], *,
                      probe_chart: str | None = None) -> None:
    """Replace the chart rows of several lines at one shift (each row: chart,
    baseline_version_id, state, statistic, threshold); a reset mark on the rows replaced is
    kept. A ``state`` may be a :class:`StateText`. With ``probe_chart`` (a chart every line's
    rows include), the lines' rows at the shift are looked up by that chart's keys first and
    only lines that have rows there are read and deleted. One executemany insert."""
    if not by_line:
        return
    lines = list(by_line)
    if probe_chart is not None:
        lines = [r.line for r in conn.execute(
            select(chart_state.c.line).where(chart_state.c.line.in_(lines),
                                             chart_state.c.chart == probe_chart,
                                             chart_state.c.shift_id == shift_row_id))]
    old = states_at(conn, shift_row_id, lines) if lines else {}
    if lines:
        conn.execute(delete(chart_state).where(chart_state.c.line.in_(lines),
                                               chart_state.c.shift_id == shift_row_id))
    values = []
    for line, rows in by_line.items():
        g = old.get(line)
        mark = g.reset_after if g is not None else None
        for r in rows:
            values.append({"line": line, "chart": r["chart"], "shift_id": shift_row_id,
                           "baseline_version_id": r.get("baseline_version_id"),
                           "state_text": _state_text(r["state"], mark),
                           "statistic": r.get("statistic"), "threshold": r.get("threshold")})
    if not values:
        return
    # the state goes in as ready JSON text (cast on PostgreSQL, whose json takes no text)
    text = bindparam("state_text", type_=Text)
    if conn.dialect.name != "sqlite":
        text = cast(text, chart_state.c.state.type)
    conn.execute(insert(chart_state).values(state=text), values)


def _state_text(state: Any, mark: str | None) -> str:
    """A row's state as JSON text, with the reset mark added."""
    if isinstance(state, StateText):
        if mark:
            return f"{state[:-1]},{jsontext.dumps(RESET_KEY)}:{jsontext.dumps(mark)}}}"
        return str(state)
    state = dict(state)
    if mark:
        state[RESET_KEY] = mark
    return jsontext.dumps(state)


def mark_reset(conn: Connection, line: str, note: str) -> str | None:
    """Mark the line's latest chart rows so that the next shift starts afresh; returns the
    shift id marked (None when the line has no chart rows yet)."""
    last = latest_before(conn, [line], dt.datetime(9999, 1, 1)).get(line)
    if last is None:
        return None
    for chart, st in last.states.items():
        conn.execute(update(chart_state)
                     .where(and_(chart_state.c.line == line, chart_state.c.chart == chart,
                                 chart_state.c.shift_id == last.shift_row_id))
                     .values(state=dict(st) | {RESET_KEY: note or "reset"}))
    return last.shift_id


def line_totals(conn: Connection, lines: Sequence[str], until_utc: dt.datetime, last: int,
                cache: dict[int, dict[str, int]] | None = None) -> dict[str, list[int]]:
    """Per line, the defect totals of the ``last`` shifts in the store that start at or before
    ``until_utc`` (0 for a shift with no count rows for the line), newest first.

    ``cache`` (shift row id -> line -> total) keeps the totals read, for the next call: a
    caller that passes it again must know that those shifts' counts have not changed."""
    ids = [(int(r.id)) for r in conn.execute(
        select(shift.c.id).where(shift.c.start_utc <= until_utc)
        .order_by(shift.c.start_utc.desc()).limit(last))]
    if not ids or not lines:
        return {ln: [0] * len(ids) for ln in lines}
    cache = {} if cache is None else cache
    want = set(lines)
    need = [sid for sid in ids if sid not in cache or not want <= cache[sid].keys()]
    if need:
        got = {sid: dict.fromkeys(lines, 0) for sid in need}
        q = (select(defect_count.c.shift_id, defect_count.c.line,
                    func.sum(defect_count.c["count"]))
             .where(defect_count.c.shift_id.in_(need), defect_count.c.line.in_(list(lines)))
             .group_by(defect_count.c.shift_id, defect_count.c.line))
        for sid, ln, total in conn.execute(q):
            got[int(sid)][ln] = int(total or 0)
        cache.update(got)
    return {ln: [cache[sid][ln] for sid in ids] for ln in lines}

def get_calibrations(conn: Connection, keys: Iterable[str]) -> dict[str, dict[str, Any]]:
    """Cached calibration rows by key."""
    keys = list(set(keys))
    if not keys:
        return {}
    rows = conn.execute(select(chart_calibration).where(chart_calibration.c.key.in_(keys)))
    return {r.key: dict(r._mapping) for r in rows}


def put_calibration(conn: Connection, row: Mapping[str, Any]) -> bool:
    """Insert a calibration row unless its key is already cached; True when inserted."""
    if get_calibrations(conn, [row["key"]]):
        return False
    conn.execute(insert(chart_calibration).values(**row))
    return True

"""SQL for the ``evaluation`` and ``finding`` tables.

Every function takes a Connection inside a transaction the caller opened (``write_tx`` /
``read_tx``) and plain values in and out (dicts of column values), so callers above the store
never see SQLAlchemy. Times are naive UTC here (see :mod:`qcfit.store.schema`).

At most one evaluation per shift is current (partial unique index ``uq_evaluation_current``);
re-evaluating marks the old one superseded in the same transaction that inserts the new one.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Iterable, Mapping, Sequence
from typing import Any

from sqlalchemy import JSON, and_, bindparam, func, insert, select, update
from sqlalchemy.engine import Connection

from qcfit.store import jsontext
from qcfit.store.engine import driver_placeholder
from qcfit.store.schema import evaluation, finding, shift

FINDING_COLUMNS = tuple(c.name for c in finding.columns if c.name not in ("id", "evaluation_id"))


# statements built once (a backfill runs them for every shift)
_CURRENT = select(evaluation).where(evaluation.c.shift_id == bindparam("shift_row_id"),
                                    evaluation.c.is_current)
_SUPERSEDE = (update(evaluation).where(evaluation.c.id == bindparam("evaluation_id"))
              .values(is_current=False, superseded_utc=bindparam("at_utc")))
_INSERT = insert(evaluation)


def current_evaluation(conn: Connection, shift_row_id: int) -> dict[str, Any] | None:
    """The current evaluation row of a shift (ok or failed), or None."""
    row = conn.execute(_CURRENT, {"shift_row_id": shift_row_id}).mappings().first()
    return dict(row) if row else None


def evaluations_of(conn: Connection, shift_row_id: int) -> list[dict[str, Any]]:
    """Every evaluation row of a shift, oldest first (current and superseded)."""
    rows = conn.execute(
        select(evaluation).where(evaluation.c.shift_id == shift_row_id).order_by(evaluation.c.id)
    ).mappings()
    return [dict(r) for r in rows]


def supersede_current(conn: Connection, shift_row_id: int, at_utc: dt.datetime) -> int | None:
    """Mark the shift's current evaluation superseded; returns its id (None if there was none)."""
    old = current_evaluation(conn, shift_row_id)
    if old is None:
        return None
    conn.execute(_SUPERSEDE, {"evaluation_id": old["id"], "at_utc": at_utc})
    return int(old["id"])


def insert_evaluation(conn: Connection, values: Mapping[str, Any]) -> int:
    """Insert one evaluation row; returns its id."""
    result = conn.execute(_INSERT, dict(values))
    return int(result.inserted_primary_key[0])


_JSON_COLUMNS = frozenset(c.name for c in finding.columns if isinstance(c.type, JSON))
_INSERT_COLUMNS = ("evaluation_id", *FINDING_COLUMNS)
_JSON_AT = tuple(i for i, c in enumerate(_INSERT_COLUMNS) if c in _JSON_COLUMNS)


_JSON_IN_ROW = tuple(j - 1 for j in _JSON_AT)


def json_text_row(values: Sequence[Any]) -> tuple[Any, ...]:
    """A finding row's values (order of :data:`FINDING_COLUMNS`) with its JSON columns as the
    text the JSON column type would write (None -> 'null'), by :mod:`qcfit.store.jsontext`."""
    out = list(values)
    for j in _JSON_IN_ROW:
        out[j] = jsontext.dumps(out[j])
    return tuple(out)


def insert_finding_values(conn: Connection, evaluation_id: int,
                          rows: Iterable[Sequence[Any]], *, json_text: bool = False) -> int:
    """Insert finding rows given as values in the order of :data:`FINDING_COLUMNS` (the JSON
    columns as Python values, or with ``json_text`` as text :func:`json_text_row` made) in one
    executemany; returns how many.

    The driver's own executemany with the JSON columns written by :mod:`qcfit.store.jsontext`
    (the text the JSON column type would write): a backfill inserts some 150 rows a shift,
    where SQLAlchemy's per-row parameter processing cost more than the insert itself.
    """
    if json_text:
        batch = [(evaluation_id, *r) for r in rows]
    else:
        batch = [(evaluation_id, *json_text_row(r)) for r in rows]
    if batch:
        mark, quote = driver_placeholder(conn), conn.dialect.identifier_preparer.quote
        conn.exec_driver_sql(
            f"INSERT INTO {quote(finding.name)} ({', '.join(map(quote, _INSERT_COLUMNS))}) "
            f"VALUES ({', '.join(mark for _ in _INSERT_COLUMNS)})", batch)
    return len(batch)


def findings_of(conn: Connection, evaluation_id: int) -> list[dict[str, Any]]:
    rows = conn.execute(
        select(finding).where(finding.c.evaluation_id == evaluation_id).order_by(finding.c.id)
    ).mappings()
    return [dict(r) for r in rows]


def current_status_between(
    conn: Connection, start_utc: dt.datetime, end_utc: dt.datetime
) -> dict[tuple[dt.date, str], str]:
    """(shift_date, shift_name) -> status of the current evaluation, for shifts starting in
    [start_utc, end_utc)."""
    rows = conn.execute(
        select(shift.c.shift_date, shift.c.shift_name, evaluation.c.status)
        .join(evaluation, and_(evaluation.c.shift_id == shift.c.id, evaluation.c.is_current))
        .where(shift.c.start_utc >= start_utc, shift.c.start_utc < end_utc)
    )
    return {(_date(r[0]), str(r[1])): str(r[2]) for r in rows}


def earliest_shift_start(conn: Connection) -> dt.datetime | None:
    """Start (naive UTC) of the earliest shift row in the store, or None."""
    value = conn.execute(select(func.min(shift.c.start_utc))).scalar()
    if isinstance(value, str):
        value = dt.datetime.fromisoformat(value)
    return value


def recent_crossings(
    conn: Connection, before_utc: dt.datetime, shifts: int, kinds: Sequence[str]
) -> list[tuple[int, str | None, str, str]]:
    """Findings of the current ok evaluations of the ``shifts`` latest shifts that start before
    ``before_utc``: (shift row id, line, kind, verdict), oldest shift first."""
    if shifts <= 0:
        return []
    latest = (
        select(shift.c.id, shift.c.start_utc)
        .join(evaluation, and_(evaluation.c.shift_id == shift.c.id, evaluation.c.is_current,
                               evaluation.c.status == "ok"))
        .where(shift.c.start_utc < before_utc)
        .order_by(shift.c.start_utc.desc())
        .limit(shifts)
        .subquery()
    )
    rows = conn.execute(
        select(latest.c.id, finding.c.line, finding.c.kind, finding.c.verdict)
        .join(evaluation, and_(evaluation.c.shift_id == latest.c.id, evaluation.c.is_current))
        .join(finding, finding.c.evaluation_id == evaluation.c.id)
        .where(finding.c.kind.in_(list(kinds)))
        .order_by(latest.c.start_utc)
    )
    return [(int(r[0]), r[1], str(r[2]), str(r[3])) for r in rows]


def _date(value: Any) -> dt.date:
    if isinstance(value, str):
        return dt.date.fromisoformat(value)
    return value

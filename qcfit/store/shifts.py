"""Shift instance rows: ``shift`` (one row per shift id such as ``2026-01-05_A``).

Every function takes a Connection inside a transaction the caller opened
(:func:`~qcfit.store.engine.write_tx` / :func:`~qcfit.store.engine.read_tx`). Times come out
as aware UTC datetimes; the table keeps naive UTC (see :mod:`qcfit.store.schema`).

A shift row, once written, keeps its start and end: if the config's shift times change
later, old shifts keep the times they were counted with (a warning is logged when an
instance of the new calendar disagrees with the stored row).
"""

from __future__ import annotations

import datetime as dt
import logging
from collections.abc import Iterable, Sequence
from dataclasses import dataclass

from sqlalchemy import Connection, and_, insert, or_, select

from qcfit.model import ShiftInstance, format_shift_id, parse_shift_id
from qcfit.store.engine import from_utc_naive, to_utc_naive
from qcfit.store.schema import shift

__all__ = ["ShiftRow", "ensure_shifts", "shift_row", "shift_rows"]

log = logging.getLogger(__name__)

CHUNK = 400  # rows per IN (...) / OR query: far below every driver's parameter limit


@dataclass(frozen=True, slots=True)
class ShiftRow:
    """One row of ``shift``: ``row_id`` is the integer key other tables refer to."""

    row_id: int
    date: dt.date
    name: str
    start: dt.datetime  # aware UTC
    end: dt.datetime  # aware UTC

    @property
    def shift_id(self) -> str:
        return format_shift_id(self.date, self.name)


def _row(r) -> ShiftRow:
    return ShiftRow(
        int(r.id),
        _as_date(r.shift_date),
        str(r.shift_name),
        from_utc_naive(r.start_utc),
        from_utc_naive(r.end_utc),
    )


def _as_date(value) -> dt.date:
    if isinstance(value, dt.datetime):
        return value.date()
    if isinstance(value, dt.date):
        return value
    return dt.date.fromisoformat(str(value)[:10])


def _chunks(items: Sequence, size: int = CHUNK) -> Iterable[Sequence]:
    for i in range(0, len(items), size):
        yield items[i : i + size]


def _existing(conn: Connection, keys: Sequence[tuple[dt.date, str]]) -> dict[str, ShiftRow]:
    found: dict[str, ShiftRow] = {}
    for part in _chunks(keys):
        cond = or_(*(and_(shift.c.shift_date == d, shift.c.shift_name == n) for d, n in part))
        for r in conn.execute(select(shift).where(cond)):
            row = _row(r)
            found[row.shift_id] = row
    return found


def ensure_shifts(conn: Connection, instances: Sequence[ShiftInstance]) -> dict[str, int]:
    """Row ids of the shift instances (shift id -> ``shift.id``), inserting missing rows."""
    wanted = {inst.id: inst for inst in instances}
    if not wanted:
        return {}
    keys = sorted((inst.date, inst.name) for inst in wanted.values())
    found = _existing(conn, keys)
    missing = [inst for sid, inst in sorted(wanted.items()) if sid not in found]
    for inst in missing:
        result = conn.execute(
            insert(shift).values(
                shift_date=inst.date,
                shift_name=inst.name,
                start_utc=to_utc_naive(inst.start),
                end_utc=to_utc_naive(inst.end),
            )
        )
        found[inst.id] = ShiftRow(
            int(result.inserted_primary_key[0]),
            inst.date,
            inst.name,
            inst.start.astimezone(dt.UTC),
            inst.end.astimezone(dt.UTC),
        )
    for sid, inst in wanted.items():
        row = found[sid]
        if row.start != inst.start or row.end != inst.end:
            log.warning(
                "shift %s is stored as %s..%s but the calendar now says %s..%s; "
                "keeping the stored times",
                sid,
                row.start,
                row.end,
                inst.start,
                inst.end,
            )
    return {sid: found[sid].row_id for sid in wanted}


def shift_row(conn: Connection, shift_id: str) -> ShiftRow | None:
    """The stored row of shift ``2026-01-05_A``, or None. InvalidArgumentError for a bad id."""
    date, name = parse_shift_id(shift_id)
    return _existing(conn, [(date, name)]).get(format_shift_id(date, name))


def shift_rows_of(conn: Connection, shift_ids: Iterable[str]) -> dict[str, ShiftRow]:
    """The stored rows of the shifts ``2026-01-05_A``, ... (shift id -> row; absent ones left
    out), in one query per hundred or so shifts. InvalidArgumentError for a bad id."""
    keys = sorted({parse_shift_id(sid) for sid in shift_ids})
    return _existing(conn, keys)


def shift_rows(conn: Connection, row_ids: Iterable[int]) -> dict[int, ShiftRow]:
    """Stored shift rows by ``shift.id``."""
    ids = sorted({int(i) for i in row_ids})
    out: dict[int, ShiftRow] = {}
    for part in _chunks(ids):
        for r in conn.execute(select(shift).where(shift.c.id.in_(part))):
            out[int(r.id)] = _row(r)
    return out

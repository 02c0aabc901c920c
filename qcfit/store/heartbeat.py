"""The service's own bookkeeping in the store: the heartbeat row, and the alarm changes it
has not yet announced (log line, notification).

Heartbeat: one row (``id = 1``) in table ``heartbeat``; the service rewrites it on every beat, in its
own short write transaction, so ``qcfit status`` (another process) can tell whether a
service is alive and what it is doing. Times are naive UTC in the store, aware UTC here.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass

from sqlalchemy import func, select
from sqlalchemy.engine import Engine

from qcfit.store.engine import from_utc_naive, read_tx, to_utc_naive, write_tx
from qcfit.store.schema import alarm_event, heartbeat

__all__ = ["Heartbeat", "alarm_changes_after", "last_alarm_event", "read_heartbeat",
           "write_heartbeat"]

ROW_ID = 1
MAX_STATUS = 32


@dataclass(frozen=True, slots=True)
class Heartbeat:
    """The heartbeat row (times aware UTC)."""

    pid: int
    host: str
    started: dt.datetime
    beat: dt.datetime
    last_wake: dt.datetime | None
    next_wake: dt.datetime | None
    config_hash: str | None
    status: str

    def age_s(self, now: dt.datetime) -> float:
        """Seconds since the last beat (negative if the clock went back)."""
        return (now - self.beat).total_seconds()


def _naive(ts: dt.datetime | None) -> dt.datetime | None:
    return None if ts is None else to_utc_naive(ts)


def _aware(ts: dt.datetime | str | None) -> dt.datetime | None:
    return None if ts is None else from_utc_naive(ts)


def write_heartbeat(engine: Engine, beat: Heartbeat) -> None:
    """Store ``beat`` as the heartbeat row (insert or replace), in one write transaction."""
    values = {
        "pid": int(beat.pid),
        "host": beat.host[:255],
        "started_utc": _naive(beat.started),
        "beat_utc": _naive(beat.beat),
        "last_wake_utc": _naive(beat.last_wake),
        "next_wake_utc": _naive(beat.next_wake),
        "config_hash": beat.config_hash,
        "status": beat.status[:MAX_STATUS],
    }
    with write_tx(engine) as conn:
        done = conn.execute(heartbeat.update().where(heartbeat.c.id == ROW_ID).values(**values))
        if done.rowcount == 0:
            conn.execute(heartbeat.insert().values(id=ROW_ID, **values))


def read_heartbeat(engine: Engine) -> Heartbeat | None:
    """The heartbeat row, or None when no service has ever run on this store."""
    with read_tx(engine) as conn:
        row = conn.execute(select(heartbeat).where(heartbeat.c.id == ROW_ID)).first()
    if row is None:
        return None
    return Heartbeat(
        pid=int(row.pid),
        host=str(row.host),
        started=from_utc_naive(row.started_utc),
        beat=from_utc_naive(row.beat_utc),
        last_wake=_aware(row.last_wake_utc),
        next_wake=_aware(row.next_wake_utc),
        config_hash=row.config_hash,
        status=str(row.status),
    )


def last_alarm_event(engine: Engine) -> int:
    """The id of the newest alarm event (0 when there is none): a watermark."""
    with read_tx(engine) as conn:
        return int(conn.execute(select(func.coalesce(func.max(alarm_event.c.id), 0))).scalar_one())


def alarm_changes_after(engine: Engine, event_id: int, *, by: str) -> list[tuple[int, int, str]]:
    """Alarm events newer than ``event_id`` made by ``by`` (the service's user), oldest
    first, as (event id, alarm id, action)."""
    with read_tx(engine) as conn:
        rows = conn.execute(
            select(alarm_event.c.id, alarm_event.c.alarm_id, alarm_event.c.action)
            .where(alarm_event.c.id > event_id, alarm_event.c.by == by)
            .order_by(alarm_event.c.id)).all()
    return [(int(r[0]), int(r[1]), str(r[2])) for r in rows]

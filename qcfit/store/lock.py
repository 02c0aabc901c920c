"""One service per store: an OS file lock beside a SQLite store, an advisory lock on PostgreSQL.

* SQLite: ``filelock.FileLock`` on ``<store>.lock`` (``flock`` on Unix, ``msvcrt`` on
  Windows). The OS drops it when the process dies, even by ``kill -9``, so there is no stale
  lock to clean up. Who holds it is written to ``<store>.lock.holder`` (JSON) after
  acquiring; the lock file itself is never written.
* PostgreSQL: ``pg_try_advisory_lock`` on a dedicated connection that is not part of any
  pool (a pooled connection would keep the lock after it is returned, or lose it silently
  when the pool recycles it). The key is derived from the database and schema names. The
  connection's ``application_name`` carries the holder's pid and host.

The service calls :meth:`StoreLock.check` on every tick: it raises when the lock is gone
(PostgreSQL restarted, connection killed, lock file removed), and the service then exits so
its supervisor restarts it.
"""

from __future__ import annotations

import abc
import datetime as dt
import json
import logging
import os
import re
import socket
import threading
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import filelock
from sqlalchemy import NullPool, create_engine, text
from sqlalchemy.engine import Connection, Engine

from qcfit.errors import AlreadyRunningError, StoreError
from qcfit.store.engine import read_tx, store_info, to_utc_naive

log = logging.getLogger(__name__)

__all__ = ["LockHolder", "StoreLock", "lock_holder", "store_lock"]

DEFAULT_POLL_S = 2.0
_APP_PREFIX = "qcfit-service"
_KEY_SQL = (
    "SELECT hashtextextended('qcfit-service:' || current_database() || ':' || current_schema(), 0)"
)
_HELD_SQL = """
SELECT l.pid, a.application_name, a.backend_start
FROM pg_locks l LEFT JOIN pg_stat_activity a ON a.pid = l.pid
WHERE l.locktype = 'advisory' AND l.granted AND l.objsubid = 1
  AND l.classid::bigint = :hi AND l.objid::bigint = :lo
  AND l.database = (SELECT oid FROM pg_database WHERE datname = current_database())
"""


@dataclass(frozen=True, slots=True)
class LockHolder:
    """Who holds a store's service lock (as far as it can be told)."""

    pid: int | None
    host: str
    since: dt.datetime | None  # aware UTC
    lock: str  # the lock file, or "PostgreSQL advisory lock"

    def __str__(self) -> str:
        who = f"pid {self.pid}" if self.pid is not None else "a process"
        when = f" since {self.since.isoformat(timespec='seconds')}" if self.since else ""
        return f"{who} on {self.host or 'an unknown host'}{when} ({self.lock})"


class StoreLock(abc.ABC):
    """The service lock of one store; use :func:`store_lock` to make one."""

    def __init__(self, engine: Engine, *, now: dt.datetime | None, pid: int, host: str) -> None:
        self._engine = engine
        self._pid = pid
        self._host = host
        self._since = None if now is None else to_utc_naive(now).replace(tzinfo=dt.UTC)
        self._held = False

    # public API ---------------------------------------------------------------------------

    def acquire(
        self,
        *,
        wait: bool = False,
        poll_s: float = DEFAULT_POLL_S,
        stop: threading.Event | None = None,
    ) -> bool:
        """Take the lock. Held by another: AlreadyRunningError naming the holder, or with
        ``wait`` keep trying every ``poll_s`` seconds until it is free (True) or ``stop``
        is set (False)."""
        if self._held:
            return True
        pause = stop if stop is not None else threading.Event()
        # The first try waits a little: a status probe may hold the file lock for an instant.
        timeout = min(poll_s, DEFAULT_POLL_S)
        while not self._try(timeout):
            if not wait:
                holder = self.holder()
                self._give_up()
                raise AlreadyRunningError(str(holder) if holder else "another qcfit service")
            if pause.wait(poll_s):
                return False
            timeout = 0.0
        self._held = True
        log.info("store lock taken: pid %s on %s", self._pid, self._host)
        return True

    def check(self) -> None:
        """Raise StoreError if the lock taken by :meth:`acquire` has been lost."""
        if not self._held:
            raise StoreError("the service lock on the store is not held")
        reason = self._lost_reason()
        if reason is not None:
            self._held = False
            self._give_up()
            raise StoreError(f"lost the service lock on the store: {reason}")

    def release(self) -> None:
        """Give the lock up (also done by the OS or server when the process ends)."""
        if self._held:
            self._held = False
            self._release()

    @abc.abstractmethod
    def holder(self) -> LockHolder | None:
        """Who holds the lock now, or None when nobody does."""

    @property
    def held(self) -> bool:
        return self._held

    def __enter__(self) -> StoreLock:
        self.acquire()
        return self

    def __exit__(self, *exc: object) -> None:
        self.release()

    # backend hooks ------------------------------------------------------------------------

    @abc.abstractmethod
    def _try(self, timeout_s: float) -> bool:
        """One attempt, waiting at most ``timeout_s`` where the backend can."""

    @abc.abstractmethod
    def _lost_reason(self) -> str | None:
        """Why the lock is no longer ours, or None while it is."""

    @abc.abstractmethod
    def _release(self) -> None:
        """Give the lock up and clean up what :meth:`_try` made."""

    @abc.abstractmethod
    def _give_up(self) -> None:
        """Drop what a failed or lost attempt left open, touching nothing of another holder."""


class _FileStoreLock(StoreLock):
    def __init__(self, engine: Engine, path: Path, **kw: Any) -> None:
        super().__init__(engine, **kw)
        self.lock_path = Path(f"{path}.lock")
        self.holder_path = Path(f"{path}.lock.holder")
        # thread_local=False: the service checks the lock from its scheduler thread too
        self._lock = filelock.FileLock(str(self.lock_path), thread_local=False)
        self._inode: int | None = None

    def _try(self, timeout_s: float) -> bool:
        try:
            self._lock.acquire(timeout=max(timeout_s, 0.0), poll_interval=0.05)
        except filelock.Timeout:
            return False
        except OSError as exc:
            raise StoreError(f"cannot lock {self.lock_path}: {exc.strerror or exc}") from exc
        self._inode = os.stat(self.lock_path).st_ino
        self._write_holder()
        return True

    def _write_holder(self) -> None:
        since = self._since.isoformat() if self._since else None
        info = {"pid": self._pid, "host": self._host, "since": since}
        tmp = self.holder_path.with_name(self.holder_path.name + f".{self._pid}.tmp")
        tmp.write_text(json.dumps(info), encoding="utf-8")
        os.replace(tmp, self.holder_path)

    def _lost_reason(self) -> str | None:
        if not self._lock.is_locked:
            return f"{self.lock_path} is no longer locked by this process"
        try:
            inode = os.stat(self.lock_path).st_ino
        except FileNotFoundError:
            return f"{self.lock_path} was deleted"
        if inode != self._inode:
            return f"{self.lock_path} was replaced by another file"
        return None

    def _release(self) -> None:
        try:
            self.holder_path.unlink(missing_ok=True)
        finally:
            self._lock.release(force=True)

    def _give_up(self) -> None:
        self._lock.release(force=True)

    def holder(self) -> LockHolder | None:
        probe = filelock.FileLock(str(self.lock_path))
        if self._held:
            return self._holder_from_file()
        try:
            probe.acquire(timeout=0)
        except filelock.Timeout:
            return self._holder_from_file()
        except OSError:
            return None
        probe.release(force=True)
        return None

    def _holder_from_file(self) -> LockHolder:
        try:
            info = json.loads(self.holder_path.read_text(encoding="utf-8"))
            since = dt.datetime.fromisoformat(info["since"]) if info["since"] else None
            return LockHolder(int(info["pid"]), str(info["host"]), since, str(self.lock_path))
        except (OSError, ValueError, KeyError, TypeError):
            return LockHolder(None, "", None, str(self.lock_path))


class _PgAdvisoryLock(StoreLock):
    def __init__(self, engine: Engine, **kw: Any) -> None:
        super().__init__(engine, **kw)
        self._own: Engine | None = None
        self._conn: Connection | None = None
        self._key: int | None = None

    def _app_name(self) -> str:
        return f"{_APP_PREFIX} pid={self._pid} host={self._host}"[:63]

    def _try(self, timeout_s: float) -> bool:
        if self._conn is None:
            self._connect()
        assert self._conn is not None
        try:
            got = self._conn.execute(text("SELECT pg_try_advisory_lock(:k)"), {"k": self._key})
            return bool(got.scalar_one())
        except Exception as exc:
            self._disconnect()
            raise StoreError(f"cannot take the PostgreSQL service lock: {exc}") from exc

    def _connect(self) -> None:
        own = create_engine(
            self._engine.url,
            poolclass=NullPool,
            connect_args={"application_name": self._app_name()},
        )
        try:
            conn = own.connect().execution_options(isolation_level="AUTOCOMMIT")
            self._key = int(conn.execute(text(_KEY_SQL)).scalar_one())
        except Exception as exc:
            own.dispose()
            raise StoreError(f"cannot connect for the PostgreSQL service lock: {exc}") from exc
        self._own, self._conn = own, conn

    def _disconnect(self) -> None:
        if self._conn is not None:
            try:
                self._conn.close()
            except Exception:  # the connection is already broken
                log.debug("closing the lock connection failed", exc_info=True)
        if self._own is not None:
            self._own.dispose()
        self._own = self._conn = None

    def _give_up(self) -> None:
        self._disconnect()

    def _lost_reason(self) -> str | None:
        if self._conn is None:
            return "the lock connection is closed"
        try:
            rows = self._conn.execute(text(_HELD_SQL), _key_parts(self._key)).all()
            mine = self._conn.execute(text("SELECT pg_backend_pid()")).scalar_one()
        except Exception as exc:
            self._disconnect()
            return f"the lock connection failed ({_first_line(exc)})"
        if not any(r.pid == mine for r in rows):
            return "the advisory lock is no longer held by this connection"
        return None

    def _release(self) -> None:
        try:
            if self._conn is not None:
                self._conn.execute(text("SELECT pg_advisory_unlock(:k)"), {"k": self._key})
        except Exception:  # closing the session below releases it anyway
            log.debug("pg_advisory_unlock failed", exc_info=True)
        finally:
            self._disconnect()

    def holder(self) -> LockHolder | None:
        with read_tx(self._engine) as conn:
            key = int(conn.execute(text(_KEY_SQL)).scalar_one())
            row = conn.execute(text(_HELD_SQL), _key_parts(key)).first()
        if row is None:
            return None
        pid, host = None, ""
        m = re.match(rf"{_APP_PREFIX} pid=(\d+) host=(.*)$", row.application_name or "")
        if m:
            pid, host = int(m[1]), m[2]
        since = row.backend_start.astimezone(dt.UTC) if row.backend_start else None
        return LockHolder(pid, host, since, f"PostgreSQL advisory lock (backend {row.pid})")


def store_lock(
    engine: Engine,
    *,
    now: dt.datetime | None = None,
    pid: int | None = None,
    host: str | None = None,
) -> StoreLock:
    """The service lock of the store behind ``engine`` (not yet acquired).

    ``now`` (aware) is recorded as the holder's start time on SQLite (PostgreSQL reports
    the session's start); ``pid`` and ``host`` default to this process and this computer.
    """
    info = store_info(engine)
    kw: dict[str, Any] = {
        "now": now,
        "pid": os.getpid() if pid is None else pid,
        "host": socket.gethostname() if host is None else host,
    }
    if info.dialect == "postgresql":
        return _PgAdvisoryLock(engine, **kw)
    if info.path is None:
        raise StoreError("a service lock needs a store file or a PostgreSQL store")
    return _FileStoreLock(engine, info.path, **kw)


def lock_holder(engine: Engine) -> LockHolder | None:
    """Who holds the service lock of this store now (None: no service is running)."""
    return store_lock(engine).holder()


def _key_parts(key: int | None) -> dict[str, int]:
    assert key is not None
    return {"hi": (key >> 32) & 0xFFFFFFFF, "lo": key & 0xFFFFFFFF}


def _first_line(exc: BaseException) -> str:
    return (str(exc).strip().splitlines() or [type(exc).__name__])[0]

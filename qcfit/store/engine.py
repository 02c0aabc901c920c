"""Engines and transactions for the store (SQLite by default, PostgreSQL through psycopg 3).

SQLite discipline, set on every new DBAPI connection of an engine made here:

* ``journal_mode=WAL`` (read back and checked: WAL needs a local disk),
  ``busy_timeout`` (30 s), ``foreign_keys=ON``, ``synchronous=FULL``;
* the driver's own transaction handling is switched off (``isolation_level = None``) and
  every transaction is begun by us: ``BEGIN IMMEDIATE`` for writes, so a second writer
  waits for the first instead of failing or losing an update, and a deferred ``BEGIN`` for
  :func:`read_tx`. This works on Python 3.11 (no ``sqlite3.Connection.autocommit`` there).
  Any other transaction (``engine.begin()``, or the autobegin of a statement on
  ``engine.connect()``) is IMMEDIATE too: read through :func:`read_tx`, or a forgotten
  open connection holds the write lock until it commits or closes.

PostgreSQL (psycopg 3; ``postgresql://`` means ``postgresql+psycopg://``): ``lock_timeout``
equal to the busy timeout, so a writer waiting on another's row lock gives up the same way;
pre-ping on checkout, so a restarted server does not break a long-running service.

Every SQLAlchemy error raised inside :func:`write_tx`, :func:`read_tx` or
:func:`translate_errors` becomes a :class:`~qcfit.errors.StoreError` (or
:class:`~qcfit.errors.SchemaError`) with a plain message; the original stays chained.
"""

from __future__ import annotations

import datetime as dt
import logging
import os
import re
import threading
import weakref
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any, TypeVar

from sqlalchemy import create_engine, event
from sqlalchemy import exc as sa_exc
from sqlalchemy.engine import URL, Connection, Engine, make_url

from qcfit.errors import InvalidArgumentError, QcfitError, SchemaError, StoreError

log = logging.getLogger(__name__)

DEFAULT_BUSY_TIMEOUT_S = 30.0
DEFAULT_WRITE_ATTEMPTS = 3
BEGIN_OPTION = "qcfit_sqlite_begin"  # execution option read by the "begin" hook
NOT_INITIALISED = "store not initialised: run `qcfit init`"

T = TypeVar("T")


@dataclass(frozen=True, slots=True)
class StoreInfo:
    """What an engine made by :func:`make_engine` points at (for messages and locks)."""

    url: str  # password hidden
    dialect: str  # "sqlite" | "postgresql"
    path: Path | None  # SQLite file; None for PostgreSQL or an in-memory SQLite
    busy_timeout_s: float


_INFO: weakref.WeakKeyDictionary[Engine, StoreInfo] = weakref.WeakKeyDictionary()


def make_engine(url: str | URL, *, busy_timeout_s: float = DEFAULT_BUSY_TIMEOUT_S) -> Engine:
    """Engine for a store URL, with the SQLite pragmas and BEGIN hooks described above.

    ``postgresql://`` without a driver means psycopg 3. A relative SQLite path is made
    absolute (a service may run with working directory ``/``). A SQLite file whose
    directory is missing or not writable is refused here with a plain message.
    """
    parsed = _parse_url(url)
    if parsed.get_backend_name() == "sqlite":
        parsed, path = _sqlite_target(parsed)
        info = StoreInfo(_shown(parsed), "sqlite", path, float(busy_timeout_s))
        engine = _create(parsed, info)
        _install_sqlite_hooks(engine, info)
    elif parsed.get_backend_name() == "postgresql":
        if parsed.drivername == "postgresql":
            parsed = parsed.set(drivername="postgresql+psycopg")
        info = StoreInfo(_shown(parsed), "postgresql", None, float(busy_timeout_s))
        engine = _create(parsed, info, pool_pre_ping=True)
        _install_postgresql_hooks(engine, info)
    else:
        raise StoreError(f"unsupported store URL {_shown(parsed)}: use sqlite:/// or postgresql://")
    _INFO[engine] = info
    return engine


def store_info(engine: Engine) -> StoreInfo:
    """What :func:`make_engine` recorded about ``engine`` (a plain guess for foreign engines)."""
    info = _INFO.get(engine)
    if info is not None:
        return info
    name = engine.dialect.name
    db = engine.url.database
    path = Path(db) if name == "sqlite" and db and db != ":memory:" else None
    return StoreInfo(_shown(engine.url), name, path, DEFAULT_BUSY_TIMEOUT_S)


@contextmanager
def write_tx(engine: Engine) -> Iterator[Connection]:
    """One write transaction (``BEGIN IMMEDIATE`` on SQLite); commit on success, else rollback.

    A second write_tx on the same engine inside the first (same thread) is refused at once:
    on SQLite it would wait for the first one's lock, which never comes. Pass ``conn`` down.
    """
    open_here = _open_writes()
    if id(engine) in open_here:
        raise StoreError(
            "a write transaction is already open on this store in this thread; "
            "pass its connection down instead of opening another"
        )
    open_here.add(id(engine))
    try:
        with translate_errors(engine), engine.connect() as conn:
            conn = conn.execution_options(**{BEGIN_OPTION: "IMMEDIATE"})
            with conn.begin():
                yield conn
    finally:
        open_here.discard(id(engine))


_THREAD = threading.local()


def _open_writes() -> set[int]:
    if not hasattr(_THREAD, "writes"):
        _THREAD.writes = set()
    return _THREAD.writes


@contextmanager
def read_tx(engine: Engine) -> Iterator[Connection]:
    """A short read transaction: one consistent snapshot; writing inside it is refused.

    SQLite: deferred ``BEGIN`` with ``PRAGMA query_only``; PostgreSQL: a READ ONLY
    transaction. Fetch the rows, then leave the block before paging or prompting, so
    the WAL can be checkpointed.
    """
    with translate_errors(engine, reading=True), engine.connect() as conn:
        if engine.dialect.name == "sqlite":
            with _sqlite_query_only(conn):
                ro = conn.execution_options(**{BEGIN_OPTION: "DEFERRED"})
                with ro.begin():
                    yield ro
        else:
            ro = conn.execution_options(postgresql_readonly=True)
            with ro.begin():
                yield ro


def run_write(
    engine: Engine,
    work: Callable[[Connection], T],
    *,
    attempts: int = DEFAULT_WRITE_ATTEMPTS,
) -> T:
    """Run ``work(conn)`` in :func:`write_tx`, retrying when the store stays locked.

    Each attempt already waits up to the busy timeout; ``work`` must be safe to repeat
    (it is, when everything it does is inside the transaction that was rolled back).
    """
    if attempts < 1:
        raise InvalidArgumentError("attempts", f"must be at least 1, got {attempts}")
    for attempt in range(1, attempts + 1):
        try:
            with write_tx(engine) as conn:
                return work(conn)
        except StoreError as exc:
            if not getattr(exc, "locked", False) or attempt == attempts:
                raise
            log.warning("store locked (attempt %d of %d), retrying", attempt, attempts)
    raise AssertionError("unreachable")  # pragma: no cover


@contextmanager
def translate_errors(engine: Engine, *, reading: bool = False) -> Iterator[None]:
    """Turn SQLAlchemy errors raised in the block into StoreError/SchemaError."""
    try:
        yield
    except QcfitError:
        raise
    except sa_exc.SQLAlchemyError as exc:
        raise store_error(engine, exc, reading=reading) from exc


def store_error(engine: Engine, exc: BaseException, *, reading: bool = False) -> StoreError:
    """The StoreError (or SchemaError) a plant engineer should see for ``exc``."""
    info = store_info(engine)
    detail = _first_line(getattr(exc, "orig", None) or exc)
    low = detail.lower()
    where = str(info.path) if info.path else info.url
    if "database is locked" in low or "database table is locked" in low or _pgcode(exc) == "55P03":
        err = StoreError(
            f"database is locked for more than {info.busy_timeout_s:g} s "
            f"(another program keeps a write open on {where})"
        )
        err.locked = True  # type: ignore[attr-defined]
        return err
    if "no such table" in low or _pgcode(exc) == "42P01":
        log.debug("missing table: %s", detail)
        return SchemaError(NOT_INITIALISED)
    if "unable to open database file" in low and info.path is not None:
        return StoreError(f"cannot open store file {info.path}: {_why_unopenable(info.path)}")
    if "attempt to write a readonly database" in low:
        if reading:
            return StoreError("a write was attempted inside a read transaction")
        return StoreError(f"store file {where} is read-only for this user")
    if _pgcode(exc) == "25006":
        return StoreError("a write was attempted inside a read transaction")
    if "file is not a database" in low:
        return StoreError(f"{where} is not a SQLite database")
    if isinstance(exc, sa_exc.OperationalError) and info.dialect == "postgresql":
        return StoreError(f"cannot use PostgreSQL store {info.url}: {detail}")
    if isinstance(exc, sa_exc.IntegrityError):
        return StoreError(f"constraint violated in {where}: {detail}")
    return StoreError(f"{where}: {detail}")


def driver_placeholder(conn: Connection) -> str:
    """The driver's parameter mark, for SQL run with ``exec_driver_sql`` (the hot paths of a
    backfill): ``?`` for sqlite3, ``%s`` for psycopg."""
    return "?" if conn.dialect.paramstyle == "qmark" else "%s"


def to_utc_naive(ts: dt.datetime) -> dt.datetime:
    """Aware datetime -> naive UTC, as the store keeps ``*_utc`` columns; naive is refused."""
    if not isinstance(ts, dt.datetime):
        raise InvalidArgumentError("ts", f"expected a datetime, got {type(ts).__name__}")
    if ts.tzinfo is None or ts.tzinfo.utcoffset(ts) is None:
        raise InvalidArgumentError("ts", f"naive datetime {ts.isoformat()}: pass an aware one")
    return ts.astimezone(dt.UTC).replace(tzinfo=None)


def from_utc_naive(ts: dt.datetime | str) -> dt.datetime:
    """Naive UTC from the store (a datetime, or SQLite's text form) -> aware UTC datetime."""
    if isinstance(ts, str):
        ts = dt.datetime.fromisoformat(ts)
    if not isinstance(ts, dt.datetime):
        raise InvalidArgumentError("ts", f"expected a datetime, got {type(ts).__name__}")
    if ts.tzinfo is not None:
        raise InvalidArgumentError("ts", f"{ts.isoformat()} is aware; the store keeps naive UTC")
    return ts.replace(tzinfo=dt.UTC)


# --- URL handling -------------------------------------------------------------------------


def _parse_url(url: str | URL) -> URL:
    try:
        return make_url(url)
    except sa_exc.ArgumentError as exc:
        raise StoreError(f"not a store URL: {url!s}") from exc


def _shown(url: URL) -> str:
    return url.render_as_string(hide_password=True)


def _sqlite_target(url: URL) -> tuple[URL, Path | None]:
    db = url.database
    if not db or db == ":memory:" or db.startswith("file:") or url.query.get("uri"):
        return url, None
    path = Path(db).expanduser()
    if not path.is_absolute():
        path = Path.cwd() / path
    path = Path(os.path.normpath(path))
    directory = path.parent
    if not directory.is_dir():
        raise StoreError(f"cannot open store file {path}: directory {directory} does not exist")
    if not os.access(directory, os.W_OK | os.X_OK):
        raise StoreError(f"cannot open store file {path}: directory not writable")
    return url.set(database=str(path)), path


def _why_unopenable(path: Path) -> str:
    directory = path.parent
    if not directory.is_dir():
        return f"directory {directory} does not exist"
    if not os.access(directory, os.W_OK | os.X_OK):
        return "directory not writable"
    if path.exists() and not os.access(path, os.R_OK | os.W_OK):
        return "file not readable and writable for this user"
    return "the file cannot be opened"


def _create(url: URL, info: StoreInfo, **kwargs: Any) -> Engine:
    from qcfit.store import jsontext

    try:
        return create_engine(url, json_serializer=jsontext.dumps,
                             json_deserializer=jsontext.loads, **kwargs)
    except (ImportError, sa_exc.NoSuchModuleError) as exc:
        if info.dialect == "postgresql":
            raise StoreError(
                "a PostgreSQL store needs psycopg 3: pip install 'qcfit[postgres]'"
            ) from exc
        raise StoreError(f"cannot use store URL {info.url}: {exc}") from exc
    except sa_exc.ArgumentError as exc:
        raise StoreError(f"cannot use store URL {info.url}: {exc}") from exc


# --- SQLite hooks -------------------------------------------------------------------------


def _install_sqlite_hooks(engine: Engine, info: StoreInfo) -> None:
    busy_ms = int(round(info.busy_timeout_s * 1000))

    @event.listens_for(engine, "connect")
    def _on_connect(dbapi_conn: Any, _record: Any) -> None:
        # Take transaction control away from the driver: we emit BEGIN ourselves.
        dbapi_conn.isolation_level = None
        cur = dbapi_conn.cursor()
        try:
            cur.execute(f"PRAGMA busy_timeout = {busy_ms}")
            cur.execute("PRAGMA foreign_keys = ON")
            mode = str(cur.execute("PRAGMA journal_mode = WAL").fetchone()[0]).lower()
            cur.execute("PRAGMA synchronous = FULL")
        finally:
            cur.close()
        if info.path is not None and mode != "wal":
            raise StoreError(
                f"store file {info.path} cannot use the WAL journal (got {mode!r}); "
                "keep the store on a local disk"
            )

    @event.listens_for(engine, "begin")
    def _on_begin(conn: Connection) -> None:
        mode = conn.get_execution_options().get(BEGIN_OPTION, "IMMEDIATE")
        conn.exec_driver_sql("BEGIN" if mode == "DEFERRED" else "BEGIN IMMEDIATE")


def _install_postgresql_hooks(engine: Engine, info: StoreInfo) -> None:
    lock_ms = int(round(info.busy_timeout_s * 1000))

    @event.listens_for(engine, "connect")
    def _on_connect(dbapi_conn: Any, _record: Any) -> None:
        # Waiting for a row or table lock is bounded like SQLite's busy timeout.
        autocommit = dbapi_conn.autocommit
        dbapi_conn.autocommit = True
        try:
            dbapi_conn.execute(f"SET lock_timeout = {lock_ms}")
        finally:
            dbapi_conn.autocommit = autocommit


@contextmanager
def _sqlite_query_only(conn: Connection) -> Iterator[None]:
    raw = conn.connection.driver_connection
    assert raw is not None
    raw.execute("PRAGMA query_only = ON")
    try:
        yield
    finally:
        try:
            raw.execute("PRAGMA query_only = OFF")
        except Exception:  # the connection is unusable: never hand it out again
            conn.invalidate()


# --- error helpers ------------------------------------------------------------------------


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip() or type(exc).__name__
    text = text.splitlines()[0]
    return re.sub(r"\s*\(Background on this error at: .*\)$", "", text)


def _pgcode(exc: BaseException) -> str | None:
    orig = getattr(exc, "orig", None)
    return getattr(orig, "sqlstate", None) or getattr(orig, "pgcode", None)

"""Defect data: raw events, per-shift counts, units inspected, corrections and load audit rows.

Every function takes a Connection inside a transaction the caller opened
(:func:`~qcfit.store.engine.write_tx` / :func:`~qcfit.store.engine.read_tx`); frames go in
and out, so callers never see SQLAlchemy. Times in frames are ``datetime64[us]`` naive UTC;
``*_utc`` columns keep naive UTC (see :mod:`qcfit.store.schema`).

Bulk paths: events are written with the driver's ``executemany`` in batches of
:data:`EVENT_BATCH` rows (on SQLite the timestamps are formatted in the text form SQLAlchemy
itself writes, ``YYYY-MM-DD HH:MM:SS.ffffff``, so ORM reads see ordinary datetimes), and read
back without per-row type processing.

:func:`fetch_source_rows` reads another database (the ``[source]`` of a pull) with a
read-only query; it is here because only this package talks SQL.
"""

from __future__ import annotations

import datetime as dt
import itertools
import logging
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any
from zoneinfo import ZoneInfo

import numpy as np
import pandas as pd
from sqlalchemy import (
    Connection,
    String,
    and_,
    bindparam,
    create_engine,
    insert,
    select,
    text,
    type_coerce,
    update,
)
from sqlalchemy import exc as sa_exc
from sqlalchemy.engine import make_url

from qcfit.errors import InputFileError, StoreError
from qcfit.store.engine import driver_placeholder, from_utc_naive, to_utc_naive
from qcfit.store.schema import (
    count_correction,
    defect_count,
    defect_event,
    load,
    shift,
    units_inspected,
)
from qcfit.store.shifts import _chunks

__all__ = [
    "EVENT_BATCH",
    "Correction",
    "LoadRow",
    "count_cells",
    "event_lines",
    "fetch_source_rows",
    "find_load",
    "insert_events",
    "insert_load",
    "list_loads",
    "read_counts",
    "read_events",
    "record_corrections",
    "shift_table",
    "unit_cells",
    "update_event_quantities",
    "update_load",
    "write_counts",
    "write_units",
]

log = logging.getLogger(__name__)

EVENT_BATCH = 100_000
SQLITE_DATETIME_FORMAT = "%Y-%m-%d %H:%M:%S.%f"  # what SQLAlchemy's SQLite DateTime writes


@dataclass(frozen=True, slots=True)
class LoadRow:
    """One audit row of ``load`` (``loaded`` is aware UTC)."""

    id: int
    kind: str
    source: str
    content_hash: str
    loaded: dt.datetime
    os_user: str
    host: str
    rows_accepted: int
    rows_rejected: int
    corrections: int
    note: str | None


@dataclass(frozen=True, slots=True)
class Correction:
    """A stored value that a later load changed: a count cell, or units (``category`` None)."""

    shift_row_id: int
    line: str
    category: str | None
    old: int
    new: int


# --- load audit rows ----------------------------------------------------------------------


def _load_row(r) -> LoadRow:
    return LoadRow(
        int(r.id),
        r.kind,
        r.source,
        r.content_hash,
        from_utc_naive(r.loaded_utc),
        r.os_user,
        r.host,
        int(r.rows_accepted),
        int(r.rows_rejected),
        int(r.corrections),
        r.note,
    )


def find_load(conn: Connection, kind: str, content_hash: str) -> LoadRow | None:
    """The first load of this kind with this content hash, or None."""
    r = conn.execute(
        select(load)
        .where(load.c.kind == kind, load.c.content_hash == content_hash)
        .order_by(load.c.id)
        .limit(1)
    ).first()
    return _load_row(r) if r else None


def insert_load(
    conn: Connection,
    *,
    kind: str,
    source: str,
    content_hash: str,
    loaded: dt.datetime,
    os_user: str,
    host: str,
    rows_accepted: int = 0,
    rows_rejected: int = 0,
    corrections: int = 0,
    note: str | None = None,
) -> int:
    """Insert an audit row; returns its id (``loaded`` aware)."""
    result = conn.execute(
        insert(load).values(
            kind=kind,
            source=source,
            content_hash=content_hash,
            loaded_utc=to_utc_naive(loaded),
            os_user=os_user,
            host=host,
            rows_accepted=rows_accepted,
            rows_rejected=rows_rejected,
            corrections=corrections,
            note=note,
        )
    )
    return int(result.inserted_primary_key[0])


def update_load(conn: Connection, load_id: int, **values: Any) -> None:
    """Set columns of an audit row (``rows_accepted``, ``rows_rejected``, ``corrections``,
    ``note``)."""
    conn.execute(update(load).where(load.c.id == load_id).values(**values))


def list_loads(conn: Connection, *, limit: int = 50) -> list[LoadRow]:
    """The latest audit rows, newest first."""
    rows = conn.execute(select(load).order_by(load.c.id.desc()).limit(limit))
    return [_load_row(r) for r in rows]


# --- raw events ---------------------------------------------------------------------------


def _ts_text(values: np.ndarray) -> list[str]:
    return pd.DatetimeIndex(values).strftime(SQLITE_DATETIME_FORMAT).tolist()


def insert_events(
    conn: Connection, events: pd.DataFrame, load_id: int, *, batch: int = EVENT_BATCH
) -> int:
    """Append events (columns ``ts_utc`` datetime64 naive UTC, ``shift_id``, ``line``,
    ``category``, ``quantity``); returns how many rows were written."""
    n = len(events)
    if n == 0:
        return 0
    shift_ids = events["shift_id"].to_numpy(dtype=np.int64).tolist()
    lines = events["line"].tolist()
    cats = events["category"].tolist()
    qty = events["quantity"].to_numpy(dtype=np.int64).tolist()
    ts = events["ts_utc"].to_numpy(dtype="datetime64[us]")
    if conn.dialect.name == "sqlite":
        sql = (
            "INSERT INTO defect_event (ts_utc, shift_id, line, category, quantity, load_id) "
            "VALUES (?, ?, ?, ?, ?, ?)"
        )
        for lo in range(0, n, batch):
            hi = min(n, lo + batch)
            rows = zip(
                _ts_text(ts[lo:hi]),
                shift_ids[lo:hi],
                lines[lo:hi],
                cats[lo:hi],
                qty[lo:hi],
                [load_id] * (hi - lo),
                strict=True,
            )
            conn.exec_driver_sql(sql, list(rows))
        return n
    stmt = insert(defect_event)
    for lo in range(0, n, batch):
        hi = min(n, lo + batch)
        stamps = pd.DatetimeIndex(ts[lo:hi]).to_pydatetime()
        conn.execute(
            stmt,
            [
                {
                    "ts_utc": t,
                    "shift_id": s,
                    "line": li,
                    "category": c,
                    "quantity": q,
                    "load_id": load_id,
                }
                for t, s, li, c, q in zip(
                    stamps, shift_ids[lo:hi], lines[lo:hi], cats[lo:hi], qty[lo:hi], strict=True
                )
            ],
        )
    return n


def read_events(conn: Connection, shift_row_ids: Iterable[int]) -> pd.DataFrame:
    """All events of these shifts: ``id``, ``ts_utc`` (datetime64[us]), ``shift_id``,
    ``line``, ``category``, ``quantity``."""
    cols = [
        defect_event.c.id,
        type_coerce(defect_event.c.ts_utc, String).label("ts_utc"),
        defect_event.c.shift_id,
        defect_event.c.line,
        defect_event.c.category,
        defect_event.c.quantity,
    ]
    parts = []
    for part in _chunks(sorted({int(i) for i in shift_row_ids})):
        rows = conn.execute(select(*cols).where(defect_event.c.shift_id.in_(part))).all()
        if rows:
            parts.append(
                pd.DataFrame(
                    rows, columns=["id", "ts_utc", "shift_id", "line", "category", "quantity"]
                )
            )
    if not parts:
        return pd.DataFrame(
            {
                "id": np.array([], dtype=np.int64),
                "ts_utc": np.array([], dtype="datetime64[us]"),
                "shift_id": np.array([], dtype=np.int64),
                "line": pd.array([], dtype="str"),
                "category": pd.array([], dtype="str"),
                "quantity": np.array([], dtype=np.int64),
            }
        )
    frame = pd.concat(parts, ignore_index=True)
    ts = pd.to_datetime(frame["ts_utc"].astype("str"), format="ISO8601")
    frame["ts_utc"] = (
        ts.dt.tz_localize(None).dt.as_unit("us") if ts.dt.tz is not None else ts.dt.as_unit("us")
    )
    for c in ("id", "shift_id", "quantity"):
        frame[c] = frame[c].astype(np.int64)
    for c in ("line", "category"):
        frame[c] = frame[c].astype("str")
    return frame


def update_event_quantities(conn: Connection, changes: pd.DataFrame, load_id: int) -> int:
    """Set ``quantity`` (and ``load_id``) of existing events; ``changes`` has ``id`` and
    ``quantity``."""
    if len(changes) == 0:
        return 0
    stmt = (
        update(defect_event)
        .where(defect_event.c.id == bindparam("b_id"))
        .values(quantity=bindparam("b_q"), load_id=load_id)
    )
    conn.execute(
        stmt,
        [
            {"b_id": int(i), "b_q": int(q)}
            for i, q in zip(changes["id"], changes["quantity"], strict=True)
        ],
    )
    return len(changes)


def event_lines(conn: Connection, shift_row_ids: Iterable[int]) -> set[tuple[int, str]]:
    """(shift row id, line) pairs that have at least one raw event."""
    out: set[tuple[int, str]] = set()
    for part in _chunks(sorted({int(i) for i in shift_row_ids})):
        q = (
            select(defect_event.c.shift_id, defect_event.c.line)
            .where(defect_event.c.shift_id.in_(part))
            .distinct()
        )
        out.update((int(s), str(li)) for s, li in conn.execute(q))
    return out


# --- counts, units, corrections -----------------------------------------------------------


def count_cells(conn: Connection, shift_row_ids: Iterable[int]) -> pd.DataFrame:
    """Stored count cells of these shifts: ``shift_id``, ``line``, ``category``, ``count``,
    ``load_id``."""
    cols = [
        defect_count.c.shift_id,
        defect_count.c.line,
        defect_count.c.category,
        defect_count.c["count"],
        defect_count.c.load_id,
    ]
    rows: list = []
    for part in _chunks(sorted({int(i) for i in shift_row_ids})):
        rows.extend(conn.execute(select(*cols).where(defect_count.c.shift_id.in_(part))).all())
    frame = pd.DataFrame(rows, columns=["shift_id", "line", "category", "count", "load_id"])
    return frame.astype({"shift_id": np.int64, "line": "str", "category": "str", "count": np.int64})


def unit_cells(conn: Connection, shift_row_ids: Iterable[int]) -> pd.DataFrame:
    """Stored units inspected of these shifts: ``shift_id``, ``line``, ``units``."""
    cols = [units_inspected.c.shift_id, units_inspected.c.line, units_inspected.c.units]
    rows: list = []
    for part in _chunks(sorted({int(i) for i in shift_row_ids})):
        rows.extend(conn.execute(select(*cols).where(units_inspected.c.shift_id.in_(part))).all())
    frame = pd.DataFrame(rows, columns=["shift_id", "line", "units"])
    return frame.astype({"shift_id": np.int64, "line": "str", "units": np.int64})


def _upsert(
    conn: Connection,
    table,
    keys: Sequence[str],
    value: str,
    rows: pd.DataFrame,
    old: pd.DataFrame,
    load_id: int,
) -> list[tuple[tuple, int, int]]:
    """Insert new cells, update changed ones; returns (key, old, new) of every changed cell."""
    merged = rows[list(keys) + [value]].merge(
        old[list(keys) + [value]], on=list(keys), how="left", suffixes=("", "_old"), indicator=True
    )
    new = merged[merged["_merge"] == "left_only"]
    both = merged[merged["_merge"] == "both"]
    changed = both[both[value] != both[f"{value}_old"]]
    if len(new):
        conn.execute(
            insert(table),
            [
                dict(zip(keys, _plain(k), strict=True)) | {value: int(v), "load_id": load_id}
                for *k, v in new[list(keys) + [value]].itertuples(index=False)
            ],
        )
    if len(changed):
        cond = and_(*(table.c[k] == bindparam(f"k_{k}") for k in keys))
        stmt = update(table).where(cond).values({value: bindparam("v_new"), "load_id": load_id})
        conn.execute(
            stmt,
            [
                {f"k_{k}": x for k, x in zip(keys, _plain(key), strict=True)} | {"v_new": int(v)}
                for *key, v in changed[list(keys) + [value]].itertuples(index=False)
            ],
        )
    return [
        (tuple(_plain(key)), int(o), int(v))
        for *key, v, o in changed[list(keys) + [value, f"{value}_old"]].itertuples(index=False)
    ]


def _plain(values: Iterable[Any]) -> list[Any]:
    return [v.item() if isinstance(v, np.generic) else v for v in values]


def write_counts(
    conn: Connection, rows: pd.DataFrame, load_id: int, *, record: bool = True
) -> list[Correction]:
    """Upsert count cells (``rows``: ``shift_id`` (shift row id), ``line``, ``category``,
    ``count``). A cell that already held a different value is changed and returned as a
    :class:`Correction`; with ``record`` it is also written to ``count_correction``."""
    if len(rows) == 0:
        return []
    old = count_cells(conn, rows["shift_id"].unique())
    changed = _upsert(
        conn, defect_count, ("shift_id", "line", "category"), "count", rows, old, load_id
    )
    corrections = [Correction(int(k[0]), str(k[1]), str(k[2]), o, n) for k, o, n in changed]
    if record:
        record_corrections(conn, load_id, corrections)
    return corrections


def write_units(
    conn: Connection, rows: pd.DataFrame, load_id: int, *, record: bool = True
) -> list[Correction]:
    """Upsert units inspected (``rows``: ``shift_id``, ``line``, ``units``); like
    :func:`write_counts`."""
    if len(rows) == 0:
        return []
    old = unit_cells(conn, rows["shift_id"].unique())
    changed = _upsert(conn, units_inspected, ("shift_id", "line"), "units", rows, old, load_id)
    corrections = [Correction(int(k[0]), str(k[1]), None, o, n) for k, o, n in changed]
    if record:
        record_corrections(conn, load_id, corrections)
    return corrections


def record_corrections(conn: Connection, load_id: int, corrections: Sequence[Correction]) -> int:
    """Write ``count_correction`` rows for ``corrections``; returns how many."""
    if not corrections:
        return 0
    conn.execute(
        insert(count_correction),
        [
            {
                "load_id": load_id,
                "shift_id": c.shift_row_id,
                "line": c.line,
                "category": c.category,
                "old_value": c.old,
                "new_value": c.new,
            }
            for c in corrections
        ],
    )
    return len(corrections)


# --- reading counts back ------------------------------------------------------------------

COUNT_FRAME_COLUMNS = (
    "shift_date",
    "shift_name",
    "shift_start",
    "shift_end",
    "line",
    "category",
    "count",
)


def read_counts(
    conn: Connection,
    *,
    since: dt.date | None = None,
    until: dt.date | None = None,
    lines: Sequence[str] | None = None,
    tz: ZoneInfo | dt.tzinfo = dt.UTC,
) -> pd.DataFrame:
    """Count cells per shift x line x category, ordered by shift start, line, category.

    ``since``/``until`` bound the shift's local start date, both inclusive. Columns
    :data:`COUNT_FRAME_COLUMNS`; ``shift_date`` is a ``datetime.date``, ``shift_start`` and
    ``shift_end`` aware datetimes in ``tz``, ``count`` int64.
    """
    q = (
        select(
            shift.c.shift_date,
            shift.c.shift_name,
            shift.c.start_utc,
            shift.c.end_utc,
            defect_count.c.line,
            defect_count.c.category,
            defect_count.c["count"],
        )
        .join(shift, shift.c.id == defect_count.c.shift_id)
        .order_by(
            shift.c.start_utc, shift.c.shift_name, defect_count.c.line, defect_count.c.category
        )
    )
    if since is not None:
        q = q.where(shift.c.shift_date >= since)
    if until is not None:
        q = q.where(shift.c.shift_date <= until)
    if lines:
        q = q.where(defect_count.c.line.in_(list(lines)))
    out = [
        (
            r.shift_date,
            r.shift_name,
            from_utc_naive(r.start_utc).astimezone(tz),
            from_utc_naive(r.end_utc).astimezone(tz),
            r.line,
            r.category,
            int(r.count),
        )
        for r in conn.execute(q)
    ]
    frame = pd.DataFrame(out, columns=list(COUNT_FRAME_COLUMNS))
    return frame.astype({"count": np.int64})


def shift_table(
    conn: Connection, shift_row_id: int, lines: Sequence[str], categories: Sequence[str]
) -> tuple[np.ndarray, np.ndarray]:
    """One shift's counts as arrays: (int64 (L, K) counts, float64 (L,) units inspected).

    Rows follow ``lines``, columns ``categories``; a cell with no stored row is 0, a line
    with no stored units is NaN. Cells of codes not asked for are left out. Both arrays
    are read-only.
    """
    li = {code: i for i, code in enumerate(lines)}
    ki = {code: k for k, code in enumerate(categories)}
    counts = np.zeros((len(lines), len(categories)), dtype=np.int64)
    units = np.full(len(lines), np.nan, dtype=np.float64)
    q = select(defect_count.c.line, defect_count.c.category, defect_count.c["count"]).where(
        defect_count.c.shift_id == shift_row_id
    )
    for line_code, cat, value in conn.execute(q):
        if line_code in li and cat in ki:
            counts[li[line_code], ki[cat]] = int(value)
    q = select(units_inspected.c.line, units_inspected.c.units).where(
        units_inspected.c.shift_id == shift_row_id
    )
    for line_code, value in conn.execute(q):
        if line_code in li:
            units[li[line_code]] = float(value)
    counts.setflags(write=False)
    units.setflags(write=False)
    return counts, units


def _raw_rows(conn: Connection, sql: str, ids: Sequence[int]) -> list[tuple]:
    """Plain tuples from the driver (``{ids}`` in ``sql`` becomes the placeholders of ``ids``):
    a backfill reads some 500 count cells a shift, where building SQLAlchemy rows cost more
    than the query. The statement runs through SQLAlchemy (its errors become StoreError as
    everywhere); only the rows are taken from the driver's cursor."""
    mark = driver_placeholder(conn)
    statement, params = sql.format(ids=", ".join(mark for _ in ids)), tuple(ids)
    result = conn.exec_driver_sql(statement, params)
    dbapi_error = conn.dialect.loaded_dbapi.Error
    try:
        return result.cursor.fetchall()
    except dbapi_error as exc:  # as SQLAlchemy would raise it, so callers see a StoreError
        raise sa_exc.DBAPIError.instance(statement, params, exc, dbapi_error) from exc
    finally:
        result.close()


def _positions(index: Mapping[Any, int], keys: Sequence[Any]) -> np.ndarray:
    """Positions of ``keys`` in ``index`` (-1 for a key not in it)."""
    return np.fromiter(map(index.get, keys, itertools.repeat(-1)), dtype=np.intp, count=len(keys))


def shift_tables(
    conn: Connection, shift_row_ids: Sequence[int], lines: Sequence[str], categories: Sequence[str]
) -> dict[int, tuple[np.ndarray, np.ndarray]]:
    """:func:`shift_table` of several shifts at once (one query per table and chunk of shifts):
    shift row id -> (int64 (L, K) counts, float64 (L,) units), arrays read-only."""
    ids = sorted({int(i) for i in shift_row_ids})
    where = {sid: j for j, sid in enumerate(ids)}
    line_index = {code: i for i, code in enumerate(lines)}
    cat_index = {code: k for k, code in enumerate(categories)}
    counts = np.zeros((len(ids), len(lines), len(categories)), dtype=np.int64)
    units = np.full((len(ids), len(lines)), np.nan, dtype=np.float64)
    q = conn.dialect.identifier_preparer.quote
    count_sql = (f"SELECT shift_id, line, category, {q('count')} FROM {q(defect_count.name)} "
                 "WHERE shift_id IN ({ids})")
    units_sql = f"SELECT shift_id, line, units FROM {q(units_inspected.name)} WHERE shift_id IN ({{ids}})"
    for start in range(0, len(ids), _IN_CHUNK):
        part = ids[start : start + _IN_CHUNK]
        rows = _raw_rows(conn, count_sql, part)
        if rows:
            sid, line_code, cat, value = zip(*rows, strict=True)
            s, i, k = _positions(where, sid), _positions(line_index, line_code), _positions(
                cat_index, cat)
            keep = (i >= 0) & (k >= 0)  # codes not asked for are left out
            counts[s[keep], i[keep], k[keep]] = np.asarray(value, dtype=np.int64)[keep]
        rows = _raw_rows(conn, units_sql, part)
        if rows:
            sid, line_code, value = zip(*rows, strict=True)
            s, i = _positions(where, sid), _positions(line_index, line_code)
            keep = i >= 0
            units[s[keep], i[keep]] = np.asarray(value, dtype=np.float64)[keep]
    counts.setflags(write=False)
    units.setflags(write=False)
    return {sid: (counts[j], units[j]) for sid, j in where.items()}


_IN_CHUNK = 400  # shift ids per IN (...) list


# --- pulling from another database --------------------------------------------------------


def fetch_source_rows(
    url: str, query: str, params: Mapping[str, Any], *, base_dir: Path | None = None
) -> tuple[list[str], list[tuple], set[str]]:
    """Run ``query`` on the database at ``url``; return (column names, rows, names bound).

    A relative SQLite file path is taken relative to ``base_dir`` (the config's folder)
    when given. Only the bound parameters the query names (``:since``) are passed. The connection is
    read-only where the driver allows (SQLite files are opened with ``mode=ro``).
    InputFileError (exit 2) when the URL or query is wrong; StoreError when the database
    cannot be reached.
    """
    shown = _shown_url(url)
    try:
        parsed = make_url(url)
    except sa_exc.ArgumentError as exc:
        raise InputFileError(f"[source] url {url!r}", reason=f"not a database URL ({exc})") from exc
    engine_args: dict[str, Any] = {}
    if parsed.get_backend_name() == "sqlite" and parsed.database and parsed.database != ":memory:":
        target = Path(parsed.database).expanduser()
        if not target.is_absolute() and base_dir is not None:
            target = Path(base_dir) / target
        engine_args["creator"] = _sqlite_readonly(target)
    try:
        engine = create_engine(parsed, **engine_args)
    except (sa_exc.ArgumentError, ImportError) as exc:
        raise InputFileError(
            f"[source] url {shown}", reason=f"cannot use this URL ({exc})"
        ) from exc
    stmt = text(query)
    names = set(stmt.compile().params)
    bound = {k: v for k, v in params.items() if k in names}
    try:
        with engine.connect() as conn:
            result = conn.execute(stmt, bound)
            columns = list(result.keys())
            rows = [tuple(r) for r in result]
    except sa_exc.OperationalError as exc:
        detail = str(exc.orig or exc).splitlines()[0]
        if "unable to open" in detail or "connect" in detail.lower():
            raise StoreError(f"cannot read [source] {shown}: {detail}") from exc
        raise InputFileError(
            f"[source] query on {shown}", reason=f"the query failed: {detail}"
        ) from exc
    except sa_exc.SQLAlchemyError as exc:
        detail = str(getattr(exc, "orig", None) or exc).splitlines()[0]
        raise InputFileError(
            f"[source] query on {shown}", reason=f"the query failed: {detail}"
        ) from exc
    finally:
        engine.dispose()
    return columns, rows, set(bound)


def _shown_url(url: str) -> str:
    try:
        return make_url(url).render_as_string(hide_password=True)
    except sa_exc.ArgumentError:
        return url


def _sqlite_readonly(path: Path):
    import sqlite3

    target = path.resolve()

    def connect():
        if not target.exists():
            raise sqlite3.OperationalError(f"unable to open database file {target} (no such file)")
        return sqlite3.connect(f"{target.as_uri()}?mode=ro", uri=True)

    return connect

"""Loading defect data: events CSV, per-shift counts CSV, units-inspected CSV, and pulls from
another database.

File formats (UTF-8, comma-separated, header line first; see :mod:`qcfit.ingest_csv` for the
file rules and :mod:`qcfit.ingest_rows` for the cell rules)::

    timestamp,line,category[,quantity]                 # events: one row per defect event
    2026-01-05T06:30:12-06:00,L1,SCR,1
    2026-01-05 06:31:40,L2,DNT                          # naive: plant-local time

    shift,line,category,count[,units_inspected]        # per-shift counts
    2026-01-05_A,L1,SCR,12,4800                         # shift id: local start date _ name
    2026-01-05_A,L1,DNT,0,4800                          # units repeated on each row of the line
    2026-01-05_A,L2,SCR,0,5100                          # no defects: a 0 row still carries units

    shift,line,units_inspected                         # units inspected per shift x line
    2026-01-05_A,L1,4800                                # for lines whose counts come from events

Rules of a load (one call = one store transaction):

* Any bad row rejects the whole file: nothing is written and every bad row is listed with
  its line number and reason (:class:`~qcfit.errors.InputFileError`, exit code 2). With
  ``skip_bad`` the good rows are loaded and the bad ones are written to a rejects file
  (``line_no,reason,raw``; default ``<file stem>.rejects.csv`` beside the input).
* Loading content that was loaded before (same sha256, same kind) changes nothing and is
  reported as already loaded.
* Events are kept raw in ``defect_event``; the counts of every shift x line they touch are
  recomputed from all stored events of that shift and line, so two different event files
  for one shift add up. An event is identified by (instant, line, category): a row whose
  key is already stored is not added again (overlapping exports are harmless); if it gives
  a different quantity, the stored event is restated and the count change is recorded as a
  correction (restating an event with quantity 0 withdraws it; events are never deleted).
* A counts file states cells; restating a stored cell with a different value (count or
  units inspected) is a correction, kept in ``count_correction`` and counted in the load's
  audit row. Cells a file does not name are left as they are.
* One shift x line gets its counts either from events or from a counts file, never both:
  rows that would mix them are bad rows (they say which).
* A units file states units inspected per shift x line and nothing else, so it may be
  loaded for any shift x line: one whose counts came from events (the only way such a line
  gets units), from a counts file, or that has no defects stored yet. Restating stored
  units with another value is a correction (``count_correction`` row with category NULL),
  whichever file stated them before.
* Every load that writes leaves one audit row in ``load``: kind, source, sha256 of the
  bytes, rows accepted and rejected, corrections, when (``now``), OS user and host; its
  ``note`` keeps the notes (what was accepted and how) and the rejects file's path.
* The file is read and checked before the store is touched; everything written (shifts,
  events, counts, corrections, audit row, and the rejects file) happens in one
  transaction, so a failure at any point leaves the store as it was.

Pull (``[source]`` in the config): ``url`` is a SQLAlchemy URL (a relative SQLite path is
relative to the config file's folder; SQLite sources are opened read-only); ``query``
returns columns named like an events file (``kind = "events"``) or a counts file
(``kind = "counts"``) (use SQL aliases). The rows are rendered as CSV text and go through
exactly the same checks; for a pull "line N" in a message means the N-th row of the query
result. If the query contains ``:since`` it is bound as text ``YYYY-MM-DD HH:MM:SS`` in UTC
(the form SQLite's ``datetime()`` returns); otherwise rows before ``since`` are dropped
after validation. Values from the database: NULL is an empty cell; a naive datetime is
plant-local time like a naive CSV timestamp; a whole float such as ``3.0`` is the
integer 3.
"""

from __future__ import annotations

import csv
import datetime as dt
import decimal
import hashlib
import io
import logging
import os
import tempfile
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from qcfit.calendar import ShiftCalendar
from qcfit.config import Config
from qcfit.errors import BadRow, ConfigError, InputFileError, InvalidArgumentError, Problem
from qcfit.ingest_csv import RawTable, raw_records, read_table
from qcfit.ingest_rows import (
    COUNT_COLUMNS,
    COUNT_OPTIONAL,
    EVENT_COLUMNS,
    EVENT_OPTIONAL,
    UNIT_COLUMNS,
    UNIT_OPTIONAL,
    Ambiguous,
    CountBatch,
    EventBatch,
    UnitBatch,
    validate_counts,
    validate_events,
    validate_units,
)
from qcfit.store.defects import (
    Correction,
    count_cells,
    event_lines,
    fetch_source_rows,
    find_load,
    insert_events,
    insert_load,
    read_events,
    record_corrections,
    unit_cells,
    update_event_quantities,
    update_load,
    write_counts,
    write_units,
)
from qcfit.store.engine import read_tx, write_tx
from qcfit.store.shifts import ensure_shifts

__all__ = [
    "DEFAULT_PULL_LOOKBACK",
    "REJECTS_SUFFIX",
    "LoadReport",
    "default_rejects_path",
    "load_counts_file",
    "load_events_file",
    "load_units_file",
    "pull",
    "spreadsheet_safe",
]

log = logging.getLogger(__name__)

REJECTS_SUFFIX = ".rejects.csv"
DEFAULT_PULL_LOOKBACK = dt.timedelta(days=7)
_FORMULA_START = ("=", "+", "-", "@", "\t", "\r")


@dataclass(frozen=True, slots=True)
class LoadReport:
    """What one load did. ``load_id`` is this load's audit row, or the earlier load's when
    ``already_loaded`` (then nothing was written and ``loaded`` is the earlier time)."""

    kind: str
    source: str
    content_hash: str
    load_id: int | None
    already_loaded: bool
    loaded: dt.datetime
    rows_read: int = 0
    rows_accepted: int = 0
    rows_rejected: int = 0
    events_added: int = 0
    events_unchanged: int = 0
    events_restated: int = 0
    cells_written: int = 0
    units_written: int = 0
    units_unchanged: int = 0
    corrections: int = 0
    shifts: tuple[str, ...] = ()
    rejects_path: str | None = None
    notes: tuple[str, ...] = field(default_factory=tuple)

    def summary(self) -> list[str]:
        """Plain-language lines for a person."""
        if self.already_loaded:
            return [
                f"{self.source}: already loaded (load {self.load_id} at "
                f"{self.loaded:%Y-%m-%d %H:%M} UTC, same content); nothing changed"
            ]
        if self.load_id is None:
            return [f"{self.source}: nothing to load"] + [f"note: {n}" for n in self.notes]
        if self.kind == "units":
            return self._units_summary()
        out = [
            f"{self.source}: loaded {self.rows_accepted} of {self.rows_read} row(s) as load "
            f"{self.load_id}; {len(self.shifts)} shift(s), {self.cells_written} count cell(s) "
            f"written, {self.corrections} correction(s)"
        ]
        if self.kind != "counts" and (
            self.events_added or self.events_unchanged or self.events_restated
        ):
            out.append(
                f"events: {self.events_added} added, {self.events_unchanged} already stored, "
                f"{self.events_restated} restated with a new quantity"
            )
        if self.units_written:
            out.append(f"units inspected: {self.units_written} value(s) written")
        if self.rejects_path:
            out.append(f"{self.rows_rejected} bad row(s) written to {self.rejects_path}")
        out += [f"note: {n}" for n in self.notes]
        return out

    def _units_summary(self) -> list[str]:
        out = [
            f"{self.source}: loaded {self.rows_accepted} of {self.rows_read} row(s) as load "
            f"{self.load_id}; {len(self.shifts)} shift(s), {self.units_written} units inspected "
            f"value(s) written, {self.corrections} correction(s)"
        ]
        if self.units_unchanged:
            out.append(f"units inspected: {self.units_unchanged} value(s) already stored as given")
        if self.rejects_path:
            out.append(f"{self.rows_rejected} bad row(s) written to {self.rejects_path}")
        return out + [f"note: {n}" for n in self.notes]


@dataclass(frozen=True, slots=True)
class _Who:
    at: dt.datetime  # the load time (passed in by the caller)
    os_user: str
    host: str


def default_rejects_path(path: str | Path) -> Path:
    """``events.csv`` -> ``events.rejects.csv`` beside it."""
    p = Path(path)
    return p.with_name(p.stem + REJECTS_SUFFIX)


def _read_file(path: str | Path) -> bytes:
    try:
        return Path(path).read_bytes()
    except FileNotFoundError:
        raise InputFileError(str(path), reason="no such file") from None
    except IsADirectoryError:
        raise InputFileError(str(path), reason="is a directory, not a file") from None
    except OSError as exc:
        raise InputFileError(str(path), reason=f"cannot read: {exc.strerror or exc}") from None


def _require_aware(now: dt.datetime) -> None:
    if not isinstance(now, dt.datetime) or now.tzinfo is None or now.utcoffset() is None:
        raise InvalidArgumentError("now", "must be a timezone-aware datetime")


def load_events_file(
    engine: Any,
    config: Config,
    path: str | Path,
    *,
    now: dt.datetime,
    skip_bad: bool = False,
    rejects: str | Path | None = None,
    ambiguous: Ambiguous = "raise",
    os_user: str = "unknown",
    host: str = "",
) -> LoadReport:
    """Load an events CSV (``timestamp,line,category[,quantity]``) in one transaction."""
    _require_aware(now)
    if ambiguous not in ("raise", "earlier", "later"):
        raise InvalidArgumentError(
            "ambiguous", f"must be raise, earlier or later, not {ambiguous!r}"
        )
    data = _read_file(path)
    target = Path(rejects) if rejects else default_rejects_path(path)
    return _load_events(
        engine,
        config,
        data,
        kind="events",
        source=str(path),
        audit_source=str(Path(path).resolve()),
        who=_Who(now, os_user, host),
        skip_bad=skip_bad,
        rejects=target,
        ambiguous=ambiguous,
    )


def load_counts_file(
    engine: Any,
    config: Config,
    path: str | Path,
    *,
    now: dt.datetime,
    skip_bad: bool = False,
    rejects: str | Path | None = None,
    os_user: str = "unknown",
    host: str = "",
) -> LoadReport:
    """Load a per-shift counts CSV (``shift,line,category,count[,units_inspected]``)."""
    _require_aware(now)
    data = _read_file(path)
    target = Path(rejects) if rejects else default_rejects_path(path)
    return _load_counts(
        engine,
        config,
        data,
        kind="counts",
        source=str(path),
        audit_source=str(Path(path).resolve()),
        who=_Who(now, os_user, host),
        skip_bad=skip_bad,
        rejects=target,
    )


def load_units_file(
    engine: Any,
    config: Config,
    path: str | Path,
    *,
    now: dt.datetime,
    skip_bad: bool = False,
    rejects: str | Path | None = None,
    os_user: str | None = None,
    host: str | None = None,
) -> LoadReport:
    """Load units inspected per shift x line (``shift,line,units_inspected``).

    Allowed for any shift x line, whatever its counts came from (events or a counts file):
    units are not counts. A stored value restated differently is a correction.
    ``os_user``/``host`` default to ``"unknown"`` and ``""`` like the other loaders.
    """
    _require_aware(now)
    data = _read_file(path)
    target = Path(rejects) if rejects else default_rejects_path(path)
    return _load_units(
        engine,
        config,
        data,
        source=str(path),
        audit_source=str(Path(path).resolve()),
        who=_Who(now, "unknown" if os_user is None else os_user, host or ""),
        skip_bad=skip_bad,
        rejects=target,
    )


# --- shared steps -------------------------------------------------------------------------


def _already_loaded(engine: Any, kind: str, digest: str, source: str) -> LoadReport | None:
    with read_tx(engine) as conn:
        prior = find_load(conn, kind, digest)
    return _already(prior, kind, source, digest) if prior else None


def _already(prior, kind: str, source: str, digest: str) -> LoadReport:
    log.info("%s: same content as load %d, nothing to do", source, prior.id)
    return LoadReport(kind, source, digest, prior.id, True, prior.loaded)


def _stop_if_bad(source: str, bad: Sequence[BadRow], good: int, skip_bad: bool) -> None:
    if bad and (not skip_bad or good == 0):
        raise InputFileError(source, bad)


def _rowid_lookup(instances: Sequence, used: np.ndarray, ids: dict[str, int]) -> np.ndarray:
    lookup = np.full(len(instances), -1, dtype=np.int64)
    for i in used:
        lookup[int(i)] = ids[instances[int(i)].id]
    return lookup


def spreadsheet_safe(value: str) -> str:
    """Prefix ``'`` to text a spreadsheet would run as a formula (starts with = + - @ tab CR)."""
    return "'" + value if value.startswith(_FORMULA_START) else value


def _write_rejects(path: Path, table: RawTable, bad: Sequence[BadRow], *, row_numbers: bool) -> str:
    raw = raw_records(table, [b.line_no + (1 if row_numbers else 0) for b in bad])
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow(["line_no", "reason", "raw"])
    for b in bad:
        text = raw.get(b.line_no + (1 if row_numbers else 0), "")
        writer.writerow([b.line_no, spreadsheet_safe(b.reason), spreadsheet_safe(text)])
    try:
        _write_atomically(path, buf.getvalue())
    except OSError as exc:
        raise InvalidArgumentError(
            "--rejects", f"cannot write {path}: {exc.strerror or exc}"
        ) from exc
    return str(path)


def _write_atomically(path: Path, text: str) -> None:
    """Write ``text`` to a temporary file beside ``path``, then rename it over ``path``
    (``os.replace``): a reader sees the old file or the whole new one, never a part. The new
    file keeps the old one's permissions, else gets rw-r--r-- (``mkstemp`` makes rw-------)."""
    mode = path.stat().st_mode & 0o777 if path.is_file() else 0o644
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        os.chmod(tmp, mode)
        with os.fdopen(fd, "w", encoding="utf-8", newline="") as out:
            out.write(text)
            out.flush()
            os.fsync(out.fileno())
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


def _note_text(notes: Sequence[str], rejects: str | None) -> str | None:
    parts = list(notes) + ([f"rejects: {rejects}"] if rejects else [])
    return "; ".join(parts) or None


# --- events -------------------------------------------------------------------------------


def _load_events(
    engine: Any,
    config: Config,
    data: bytes,
    *,
    kind: str,
    source: str,
    audit_source: str,
    who: _Who,
    skip_bad: bool,
    rejects: Path | None,
    ambiguous: Ambiguous,
    since: dt.datetime | None = None,
    row_numbers: bool = False,
) -> LoadReport:
    digest = hashlib.sha256(data).hexdigest()
    prior = _already_loaded(engine, kind, digest, source)
    if prior is not None:
        return prior
    calendar = ShiftCalendar.from_config(config)
    table = read_table(data, source=source, required=EVENT_COLUMNS, optional=EVENT_OPTIONAL)
    batch = validate_events(
        table,
        lines=config.lines,
        categories=config.categories,
        calendar=calendar,
        now=who.at,
        ambiguous=ambiguous,
    )
    batch, notes = _events_since(batch, since)
    bad = _renumber(batch.bad_rows, row_numbers)
    _stop_if_bad(source, bad, len(batch.events), skip_bad)
    with write_tx(engine) as conn:
        prior = find_load(conn, kind, digest)
        if prior is not None:
            return _already(prior, kind, source, digest)
        return _store_events(
            conn,
            batch,
            table,
            bad,
            notes,
            kind=kind,
            source=source,
            audit_source=audit_source,
            digest=digest,
            who=who,
            skip_bad=skip_bad,
            rejects=rejects,
            row_numbers=row_numbers,
        )


def _renumber(bad: Sequence[BadRow], row_numbers: bool) -> list[BadRow]:
    """For pulls: CSV line N (header = line 1) is result row N - 1."""
    return [BadRow(b.line_no - 1, b.reason) for b in bad] if row_numbers else list(bad)


def _events_since(batch: EventBatch, since: dt.datetime | None) -> tuple[EventBatch, list[str]]:
    notes = list(batch.notes)
    if since is None or len(batch.events) == 0:
        return batch, notes
    cut = np.datetime64(since.astimezone(dt.UTC).replace(tzinfo=None), "us")
    keep = batch.events["ts_utc"].to_numpy() >= cut
    if keep.all():
        return batch, notes
    notes.append(f"{int((~keep).sum())} event(s) before {since.isoformat()} left out")
    events = batch.events[keep].reset_index(drop=True)
    return EventBatch(events, batch.instances, batch.bad_rows, batch.notes, batch.rows_read), notes


def _store_events(
    conn,
    batch: EventBatch,
    table: RawTable,
    bad: list[BadRow],
    notes: list[str],
    *,
    kind,
    source,
    audit_source,
    digest,
    who: _Who,
    skip_bad,
    rejects,
    row_numbers,
) -> LoadReport:
    ev = batch.events
    used = np.unique(ev["shift"].to_numpy())
    ids = ensure_shifts(conn, [batch.instances[int(i)] for i in used])
    shift_row = _rowid_lookup(batch.instances, used, ids)[ev["shift"].to_numpy()]
    ev = ev.assign(shift_id=shift_row)
    existing = read_events(conn, ids.values())
    cells = count_cells(conn, ids.values())
    ev, conflict_bad = _without_counted_lines(cells, ev, existing, ids, row_numbers)
    if conflict_bad:
        bad = sorted(bad + conflict_bad, key=lambda b: b.line_no)
        _stop_if_bad(source, bad, len(ev), skip_bad)
    new, restated, unchanged = _split_known(ev, existing)
    load_id = insert_load(
        conn,
        kind=kind,
        source=audit_source,
        content_hash=digest,
        loaded=who.at,
        os_user=who.os_user,
        host=who.host,
    )
    new = new.sort_values(["shift_id", "line", "ts_utc"], kind="stable")
    insert_events(conn, new, load_id)
    update_event_quantities(conn, restated[["id", "quantity"]], load_id)
    totals = _event_totals(existing, new, restated)
    changes = write_counts(conn, totals, load_id, record=False)
    corrections = _restated_cells(changes, restated)
    record_corrections(conn, load_id, corrections)
    rejects_path = _write_rejects(rejects, table, bad, row_numbers=row_numbers) if bad else None
    stored_cells = set(
        zip(
            cells["shift_id"].tolist(),
            cells["line"].tolist(),
            cells["category"].tolist(),
            strict=True,
        )
    )
    inserted = sum(
        k not in stored_cells
        for k in zip(
            totals["shift_id"].tolist(),
            totals["line"].tolist(),
            totals["category"].tolist(),
            strict=True,
        )
    )
    update_load(
        conn,
        load_id,
        rows_accepted=len(ev),
        rows_rejected=len(bad),
        corrections=len(corrections),
        note=_note_text(notes, rejects_path),
    )
    shift_ids = tuple(sorted(batch.instances[int(i)].id for i in np.unique(ev["shift"].to_numpy())))
    log.info("%s: load %d, %d events added, %d restated", source, load_id, len(new), len(restated))
    return LoadReport(
        kind,
        source,
        digest,
        load_id,
        False,
        who.at,
        rows_read=batch.rows_read,
        rows_accepted=len(ev),
        rows_rejected=len(bad),
        events_added=len(new),
        events_unchanged=len(unchanged),
        events_restated=len(restated),
        cells_written=inserted + len(changes),
        corrections=len(corrections),
        shifts=shift_ids,
        rejects_path=rejects_path,
        notes=tuple(notes),
    )


def _without_counted_lines(
    cells: pd.DataFrame, ev: pd.DataFrame, existing: pd.DataFrame, ids, row_numbers
) -> tuple[pd.DataFrame, list[BadRow]]:
    """Events for a shift x line whose stored counts have no events (they came from a counts
    file, or another system wrote them) are bad rows."""
    if len(cells) == 0:
        return ev, []
    with_events = set(zip(existing["shift_id"], existing["line"], strict=True))
    counted = {
        (int(s), str(li)): int(lid) if lid == lid and lid is not None else None
        for s, li, lid in zip(cells["shift_id"], cells["line"], cells["load_id"], strict=True)
        if (int(s), str(li)) not in with_events
    }
    if not counted:
        return ev, []
    pairs = list(zip(ev["shift_id"].tolist(), ev["line"].tolist(), strict=True))
    clash = np.fromiter((p in counted for p in pairs), dtype=bool, count=len(pairs))
    if not clash.any():
        return ev, []
    names = {rid: sid for sid, rid in ids.items()}
    bad = []
    for pos in np.flatnonzero(clash):
        s, li = pairs[pos]
        where = f"load {counted[(s, li)]}" if counted[(s, li)] is not None else "written directly"
        line_no = int(ev["line_no"].iloc[pos]) - (1 if row_numbers else 0)
        bad.append(
            BadRow(
                line_no,
                f"shift {names[s]} line {li} already has per-shift counts ({where}); "
                "events and per-shift counts cannot be mixed for one shift and line",
            )
        )
    return ev[~clash].reset_index(drop=True), bad


def _split_known(
    ev: pd.DataFrame, existing: pd.DataFrame
) -> tuple[pd.DataFrame, pd.DataFrame, pd.DataFrame]:
    """(new events, stored events restated with a new quantity, events already stored as given)."""
    if len(existing) == 0:
        empty = ev.iloc[0:0].assign(id=np.array([], dtype=np.int64))
        return ev, empty, empty
    key = ["ts_utc", "line", "category"]
    merged = ev.merge(
        existing[key + ["id", "quantity"]], on=key, how="left", suffixes=("", "_stored")
    )
    known = merged["id"].notna().to_numpy()
    new = ev[~known]
    hits = merged[known].astype({"id": np.int64, "quantity_stored": np.int64})
    same = hits["quantity"].to_numpy() == hits["quantity_stored"].to_numpy()
    return (
        new,
        hits[~same].drop(columns="quantity_stored"),
        hits[same].drop(columns="quantity_stored"),
    )


def _event_totals(
    existing: pd.DataFrame, new: pd.DataFrame, restated: pd.DataFrame
) -> pd.DataFrame:
    """Counts per shift x line x category over all events of the touched shift x line pairs."""
    cols = ["shift_id", "line", "category", "quantity"]
    touched = pd.concat(
        [new[["shift_id", "line"]], restated[["shift_id", "line"]]]
    ).drop_duplicates()
    stored = existing
    if len(restated):
        q = dict(zip(restated["id"].tolist(), restated["quantity"].tolist(), strict=True))
        stored = existing.assign(
            quantity=[
                q.get(i, v)
                for i, v in zip(existing["id"].tolist(), existing["quantity"].tolist(), strict=True)
            ]
        )
    stored = stored.merge(touched, on=["shift_id", "line"], how="inner")
    allev = pd.concat([stored[cols], new[cols]], ignore_index=True)
    totals = allev.groupby(["shift_id", "line", "category"], sort=True, as_index=False)[
        "quantity"
    ].sum()
    return totals.rename(columns={"quantity": "count"}).astype({"count": np.int64})


def _restated_cells(changes: Sequence[Correction], restated: pd.DataFrame) -> list[Correction]:
    if len(restated) == 0:
        return []
    cells = set(
        zip(
            restated["shift_id"].tolist(),
            restated["line"].tolist(),
            restated["category"].tolist(),
            strict=True,
        )
    )
    return [c for c in changes if (c.shift_row_id, c.line, c.category) in cells]


# --- counts -------------------------------------------------------------------------------


def _load_counts(
    engine: Any,
    config: Config,
    data: bytes,
    *,
    kind: str,
    source: str,
    audit_source: str,
    who: _Who,
    skip_bad: bool,
    rejects: Path | None,
    since: dt.datetime | None = None,
    row_numbers: bool = False,
) -> LoadReport:
    digest = hashlib.sha256(data).hexdigest()
    prior = _already_loaded(engine, kind, digest, source)
    if prior is not None:
        return prior
    calendar = ShiftCalendar.from_config(config)
    table = read_table(data, source=source, required=COUNT_COLUMNS, optional=COUNT_OPTIONAL)
    batch = validate_counts(
        table, lines=config.lines, categories=config.categories, calendar=calendar, now=who.at
    )
    batch, notes = _counts_since(batch, since)
    bad = _renumber(batch.bad_rows, row_numbers)
    _stop_if_bad(source, bad, len(batch.counts), skip_bad)
    with write_tx(engine) as conn:
        prior = find_load(conn, kind, digest)
        if prior is not None:
            return _already(prior, kind, source, digest)
        return _store_counts(
            conn,
            batch,
            table,
            bad,
            notes,
            kind=kind,
            source=source,
            audit_source=audit_source,
            digest=digest,
            who=who,
            skip_bad=skip_bad,
            rejects=rejects,
            row_numbers=row_numbers,
        )


def _counts_since(batch: CountBatch, since: dt.datetime | None) -> tuple[CountBatch, list[str]]:
    notes = list(batch.notes)
    if since is None or len(batch.counts) == 0:
        return batch, notes
    early = {sid for sid, inst in batch.instances.items() if inst.start < since}
    if not early:
        return batch, notes
    counts = batch.counts[~batch.counts["shift"].isin(list(early))].reset_index(drop=True)
    units = batch.units[~batch.units["shift"].isin(list(early))].reset_index(drop=True)
    notes.append(
        f"{len(batch.counts) - len(counts)} row(s) of shifts starting before "
        f"{since.isoformat()} left out"
    )
    instances = {k: v for k, v in batch.instances.items() if k not in early}
    return CountBatch(counts, units, instances, batch.bad_rows, batch.notes, batch.rows_read), notes


def _store_counts(
    conn,
    batch: CountBatch,
    table: RawTable,
    bad: list[BadRow],
    notes: list[str],
    *,
    kind,
    source,
    audit_source,
    digest,
    who: _Who,
    skip_bad,
    rejects,
    row_numbers,
) -> LoadReport:
    ids = ensure_shifts(conn, list(batch.instances.values()))
    counts = batch.counts.assign(shift_id=batch.counts["shift"].map(ids).astype(np.int64))
    units = batch.units.assign(shift_id=batch.units["shift"].map(ids).astype(np.int64))
    counts, units, clash_bad = _without_event_lines(conn, counts, units, ids, row_numbers)
    if clash_bad:
        bad = sorted(bad + clash_bad, key=lambda b: b.line_no)
        _stop_if_bad(source, bad, len(counts), skip_bad)
    load_id = insert_load(
        conn,
        kind=kind,
        source=audit_source,
        content_hash=digest,
        loaded=who.at,
        os_user=who.os_user,
        host=who.host,
    )
    before = len(count_cells(conn, ids.values()))
    cell_changes = write_counts(conn, counts[["shift_id", "line", "category", "count"]], load_id)
    unit_changes = write_units(conn, units[["shift_id", "line", "units"]], load_id)
    inserted = len(count_cells(conn, ids.values())) - before
    corrections = len(cell_changes) + len(unit_changes)
    rejects_path = _write_rejects(rejects, table, bad, row_numbers=row_numbers) if bad else None
    update_load(
        conn,
        load_id,
        rows_accepted=len(counts),
        rows_rejected=len(bad),
        corrections=corrections,
        note=_note_text(notes, rejects_path),
    )
    log.info("%s: load %d, %d cells, %d corrections", source, load_id, len(counts), corrections)
    return LoadReport(
        kind,
        source,
        digest,
        load_id,
        False,
        who.at,
        rows_read=batch.rows_read,
        rows_accepted=len(counts),
        rows_rejected=len(bad),
        cells_written=inserted + len(cell_changes),
        units_written=len(units),
        corrections=corrections,
        shifts=tuple(sorted(set(counts["shift"]))),
        rejects_path=rejects_path,
        notes=tuple(notes),
    )


def _without_event_lines(
    conn, counts: pd.DataFrame, units: pd.DataFrame, ids, row_numbers
) -> tuple[pd.DataFrame, pd.DataFrame, list[BadRow]]:
    """Count rows for a shift x line that has raw events are bad rows."""
    evented = event_lines(conn, ids.values())
    if not evented:
        return counts, units, []
    pairs = list(zip(counts["shift_id"].tolist(), counts["line"].tolist(), strict=True))
    clash = np.fromiter((p in evented for p in pairs), dtype=bool, count=len(pairs))
    if not clash.any():
        return counts, units, []
    bad = [
        BadRow(
            int(counts["line_no"].iloc[i]) - (1 if row_numbers else 0),
            f"shift {counts['shift'].iloc[i]} line {counts['line'].iloc[i]} has raw defect events "
            "(its counts are derived from them); correct it by loading events, not counts "
            "(units inspected alone: qcfit load units)",
        )
        for i in np.flatnonzero(clash)
    ]
    keep_units = [
        (s, li) not in evented
        for s, li in zip(units["shift_id"].tolist(), units["line"].tolist(), strict=True)
    ]
    return (
        counts[~clash].reset_index(drop=True),
        units[np.asarray(keep_units, dtype=bool)].reset_index(drop=True),
        bad,
    )


# --- units inspected ----------------------------------------------------------------------


def _load_units(
    engine: Any,
    config: Config,
    data: bytes,
    *,
    source: str,
    audit_source: str,
    who: _Who,
    skip_bad: bool,
    rejects: Path,
) -> LoadReport:
    kind = "units"
    digest = hashlib.sha256(data).hexdigest()
    prior = _already_loaded(engine, kind, digest, source)
    if prior is not None:
        return prior
    table = read_table(data, source=source, required=UNIT_COLUMNS, optional=UNIT_OPTIONAL)
    batch = validate_units(
        table, lines=config.lines, calendar=ShiftCalendar.from_config(config), now=who.at
    )
    bad = list(batch.bad_rows)
    _stop_if_bad(source, bad, len(batch.units), skip_bad)
    with write_tx(engine) as conn:
        prior = find_load(conn, kind, digest)
        if prior is not None:
            return _already(prior, kind, source, digest)
        return _store_units(
            conn,
            batch,
            table,
            bad,
            source=source,
            audit_source=audit_source,
            digest=digest,
            who=who,
            rejects=rejects,
        )


def _store_units(
    conn,
    batch: UnitBatch,
    table: RawTable,
    bad: list[BadRow],
    *,
    source: str,
    audit_source: str,
    digest: str,
    who: _Who,
    rejects: Path,
) -> LoadReport:
    ids = ensure_shifts(conn, list(batch.instances.values()))
    units = batch.units.assign(shift_id=batch.units["shift"].map(ids).astype(np.int64))
    load_id = insert_load(
        conn,
        kind="units",
        source=audit_source,
        content_hash=digest,
        loaded=who.at,
        os_user=who.os_user,
        host=who.host,
    )
    before = len(unit_cells(conn, ids.values()))
    changes = write_units(conn, units[["shift_id", "line", "units"]], load_id)
    inserted = len(unit_cells(conn, ids.values())) - before
    rejects_path = _write_rejects(rejects, table, bad, row_numbers=False) if bad else None
    update_load(
        conn,
        load_id,
        rows_accepted=len(units),
        rows_rejected=len(bad),
        corrections=len(changes),
        note=_note_text(batch.notes, rejects_path),
    )
    written = inserted + len(changes)
    log.info("%s: load %d, %d units values, %d corrections", source, load_id, written, len(changes))
    return LoadReport(
        "units",
        source,
        digest,
        load_id,
        False,
        who.at,
        rows_read=batch.rows_read,
        rows_accepted=len(units),
        rows_rejected=len(bad),
        units_written=written,
        units_unchanged=len(units) - written,
        corrections=len(changes),
        shifts=tuple(sorted(set(units["shift"]))),
        rejects_path=rejects_path,
        notes=batch.notes,
    )


# --- pull ---------------------------------------------------------------------------------


def pull(
    engine: Any,
    config: Config,
    *,
    now: dt.datetime,
    since: dt.datetime | None = None,
    skip_bad: bool = False,
    rejects: str | Path | None = None,
    os_user: str = "unknown",
    host: str = "",
) -> LoadReport:
    """Run the ``[source]`` query and load its rows like a file of that kind.

    ``since`` (aware; default ``now`` - :data:`DEFAULT_PULL_LOOKBACK`) is bound to ``:since``
    when the query names it, else applied to the validated rows. ``rejects`` is required
    with ``skip_bad`` (a pull has no file to put it beside).
    """
    _require_aware(now)
    source = config.source
    if source is None:
        raise ConfigError(
            [Problem("source", "no [source] section: give url, query and kind to pull from")],
            str(config.path) if config.path else None,
        )
    if since is None:
        since = now - DEFAULT_PULL_LOOKBACK
    _require_aware(since)
    if skip_bad and rejects is None:
        raise InvalidArgumentError("rejects", "a pull with skip_bad needs a rejects file path")
    since_text = since.astimezone(dt.UTC).strftime("%Y-%m-%d %H:%M:%S")
    base = Path(config.path).parent if config.path else None
    columns, rows, bound = fetch_source_rows(
        source.url, source.query, {"since": since_text}, base_dir=base
    )
    data = render_rows(columns, rows)
    label = f"[source] query result ({_shown(source.url)})"
    binds_since = "since" in bound
    common = dict(
        kind="pull",
        source=label,
        audit_source=f"pull {source.kind}: {_shown(source.url)}",
        who=_Who(now, os_user, host),
        skip_bad=skip_bad,
        rejects=Path(rejects) if rejects else None,
        since=None if binds_since else since,
        row_numbers=True,
    )
    if not rows:
        return _empty_pull(label, data, now)
    if source.kind == "events":
        return _load_events(engine, config, data, ambiguous=source.ambiguous, **common)
    return _load_counts(engine, config, data, **common)


def _empty_pull(label: str, data: bytes, now: dt.datetime) -> LoadReport:
    log.info("%s: the query returned no rows", label)
    return LoadReport(
        "pull",
        label,
        hashlib.sha256(data).hexdigest(),
        None,
        False,
        now,
        notes=("the query returned no rows; nothing was loaded",),
    )


def _shown(url: str) -> str:
    from qcfit.store.defects import _shown_url

    return _shown_url(url)


def render_rows(columns: Sequence[str], rows: Sequence[Sequence[Any]]) -> bytes:
    """Query result -> CSV bytes (header + rows) in the form the file loaders read."""
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow([str(c) for c in columns])
    for row in rows:
        writer.writerow([_cell(v) for v in row])
    return buf.getvalue().encode("utf-8")


def _cell(value: Any) -> str:
    if value is None:
        return ""
    if isinstance(value, dt.datetime):
        return value.isoformat(sep=" ")
    if isinstance(value, dt.date):
        return value.isoformat()
    if isinstance(value, bool):
        return str(int(value))
    if (
        isinstance(value, float | decimal.Decimal)
        and value == value
        and value not in (float("inf"), float("-inf"))
    ):
        if value == int(value):
            return str(int(value))
    if isinstance(value, bytes):
        return value.decode("utf-8", errors="replace")
    return str(value)

"""Baseline versions in the store, and the history window a baseline is fitted from.

Each distinct baseline content (the canonical TOML text of one ``[baseline.NAME]`` table,
keyed by its sha256 ``content_hash``) is recorded once in ``baseline_version``, with when it
was first seen and by which OS user. Evaluations, findings and alarms refer to the row id, so
an auditor can always read the exact baseline an alarm was tested against, even after the
config file has moved on. Rows are never updated or deleted.

The store never imports the config module: anything with the attributes of
:class:`BaselineSpecLike` will do.
"""

from __future__ import annotations

import datetime as dt
import logging
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from types import MappingProxyType
from typing import Any, Protocol

import numpy as np
from sqlalchemy import Connection, func, insert, select
from sqlalchemy import exc as sa_exc

from qcfit.errors import InvalidArgumentError, NotFoundError
from qcfit.store.engine import from_utc_naive, to_utc_naive
from qcfit.store.schema import baseline_version, defect_count, shift, units_inspected

log = logging.getLogger(__name__)

__all__ = [
    "BaselineSpecLike",
    "BaselineVersionRow",
    "HistoryWindow",
    "count_versions",
    "get_version",
    "list_versions",
    "read_window",
    "sync_baseline_versions",
    "versions_named",
]


class BaselineSpecLike(Protocol):
    """The parts of ``qcfit.config.BaselineSpec`` the store records."""

    name: str
    lines: tuple[str, ...]
    effective: dt.date
    proportions: Mapping[str, float]
    rate: float | None
    thresholds: Mapping[str, Any]
    toml_text: str
    content_hash: str


@dataclass(frozen=True, slots=True)
class BaselineVersionRow:
    """One ``baseline_version`` row; ``first_seen`` is aware UTC; proportions keep the
    order they were stored in (the plant's category order)."""

    id: int
    name: str
    content_hash: str
    toml_text: str
    lines: tuple[str, ...]
    effective: dt.date
    proportions: Mapping[str, float]
    rate: float | None
    thresholds: Mapping[str, Any]
    first_seen: dt.datetime
    os_user: str


def sync_baseline_versions(
    conn: Connection, config: Any, *, os_user: str, now: dt.datetime
) -> dict[str, int]:
    """Record every baseline of ``config`` (``config.baselines``, ``config.categories``).

    Returns ``content_hash -> baseline_version.id`` for each of them, inserting a row for
    each content not seen before (``first_seen_utc`` = ``now``, aware). Idempotent: running it
    again with the same config inserts nothing. Run it inside one write transaction.
    """
    if now.tzinfo is None:
        raise InvalidArgumentError("now", "must be an aware datetime")
    order = list(config.categories)
    out: dict[str, int] = {}
    for spec in config.baselines:
        if spec.content_hash not in out:
            out[spec.content_hash] = _ensure(conn, spec, order, os_user, now)
    return out


def _ensure(conn: Connection, spec: BaselineSpecLike, order: Sequence[str], os_user: str,
            now: dt.datetime) -> int:
    found = _id_of(conn, spec.content_hash)
    if found is not None:
        return found
    props = {c: float(spec.proportions[c]) for c in order if c in spec.proportions}
    props.update({c: float(v) for c, v in spec.proportions.items() if c not in props})
    values = {
        "name": spec.name,
        "content_hash": spec.content_hash,
        "toml_text": spec.toml_text,
        "lines": list(spec.lines),
        "effective": spec.effective,
        "proportions": props,
        "rate": None if spec.rate is None else float(spec.rate),
        "thresholds": dict(spec.thresholds) or None,
        "first_seen_utc": to_utc_naive(now),
        "os_user": os_user,
    }
    try:
        with conn.begin_nested():
            new_id = conn.execute(insert(baseline_version).values(**values)).inserted_primary_key[0]
    except sa_exc.IntegrityError:  # another process recorded the same content meanwhile
        found = _id_of(conn, spec.content_hash)
        if found is None:
            raise
        return found
    log.info("recorded baseline %s version %s (%s)", spec.name, new_id, spec.content_hash[:12])
    return int(new_id)


def _id_of(conn: Connection, content_hash: str) -> int | None:
    row = conn.execute(
        select(baseline_version.c.id).where(baseline_version.c.content_hash == content_hash)
    ).first()
    return None if row is None else int(row.id)


def _row(r: Any) -> BaselineVersionRow:
    return BaselineVersionRow(
        id=int(r.id),
        name=r.name,
        content_hash=r.content_hash,
        toml_text=r.toml_text,
        lines=tuple(r.lines),
        effective=r.effective,
        proportions=MappingProxyType({str(k): float(v) for k, v in r.proportions.items()}),
        rate=None if r.rate is None else float(r.rate),
        thresholds=MappingProxyType(dict(r.thresholds or {})),
        first_seen=from_utc_naive(r.first_seen_utc),
        os_user=r.os_user,
    )


def list_versions(conn: Connection) -> list[BaselineVersionRow]:
    """Every recorded baseline version, by name then id (oldest first)."""
    rows = conn.execute(select(baseline_version).order_by(baseline_version.c.name,
                                                          baseline_version.c.id))
    return [_row(r) for r in rows]


def versions_named(conn: Connection, name: str) -> list[BaselineVersionRow]:
    """The versions recorded under baseline name ``name``, oldest first (maybe none)."""
    rows = conn.execute(select(baseline_version).where(baseline_version.c.name == name)
                        .order_by(baseline_version.c.id))
    return [_row(r) for r in rows]


def get_version(conn: Connection, version_id: int) -> BaselineVersionRow:
    """The version with this id; NotFoundError when there is none."""
    r = conn.execute(select(baseline_version).where(baseline_version.c.id == int(version_id))).first()
    if r is None:
        raise NotFoundError("baseline version", version_id)
    return _row(r)


# --------------------------------------------------------------------------- fit window


@dataclass(frozen=True, slots=True)
class HistoryWindow:
    """Defects per shift (rows, by start) summed over ``lines``, in ``categories`` order.

    ``units`` is the units inspected per shift summed over the lines, NaN when a line with
    defects that shift has no units row. ``other_categories``: counts in the window for
    category codes not in ``categories`` (code -> defects)."""

    shift_ids: tuple[str, ...]
    shift_starts: tuple[dt.datetime, ...]  # aware UTC
    categories: tuple[str, ...]
    counts: np.ndarray  # (m, k) int64, read-only
    units: np.ndarray  # (m,) float64, read-only
    other_categories: Mapping[str, int]


def read_window(
    conn: Connection, *, lines: Sequence[str], since: dt.date, until: dt.date,
    categories: Sequence[str],
) -> HistoryWindow:
    """Shifts whose local start date is in [since, until] with any defect or units row for
    ``lines``, their counts summed over the lines, and their units inspected."""
    lines = list(lines)
    cats = list(categories)
    in_window = (shift.c.shift_date >= since) & (shift.c.shift_date <= until)
    count_rows = conn.execute(
        select(defect_count.c.shift_id, defect_count.c.category, defect_count.c.line,
               defect_count.c.count)
        .join(shift, shift.c.id == defect_count.c.shift_id)
        .where(in_window, defect_count.c.line.in_(lines))
    ).all()
    unit_rows = conn.execute(
        select(units_inspected.c.shift_id, units_inspected.c.line, units_inspected.c.units)
        .join(shift, shift.c.id == units_inspected.c.shift_id)
        .where(in_window, units_inspected.c.line.in_(lines))
    ).all()
    ids = {r.shift_id for r in count_rows} | {r.shift_id for r in unit_rows}
    shifts = _shift_rows(conn, ids)
    position = {row_id: i for i, (row_id, _, _) in enumerate(shifts)}
    counts = np.zeros((len(shifts), len(cats)), dtype=np.int64)
    col = {c: j for j, c in enumerate(cats)}
    other: dict[str, int] = {}
    lines_with_defects: dict[int, set[str]] = {}
    for r in count_rows:
        if r.category in col:
            counts[position[r.shift_id], col[r.category]] += int(r.count)
        elif r.count:
            other[r.category] = other.get(r.category, 0) + int(r.count)
        if r.count:
            lines_with_defects.setdefault(r.shift_id, set()).add(r.line)
    units = _units(unit_rows, position, lines_with_defects, len(shifts))
    counts.setflags(write=False)
    units.setflags(write=False)
    return HistoryWindow(
        shift_ids=tuple(sid for _, sid, _ in shifts),
        shift_starts=tuple(start for _, _, start in shifts),
        categories=tuple(cats),
        counts=counts,
        units=units,
        other_categories=MappingProxyType(dict(sorted(other.items()))),
    )


def _shift_rows(conn: Connection, ids: set[int]) -> list[tuple[int, str, dt.datetime]]:
    if not ids:
        return []
    rows = conn.execute(
        select(shift.c.id, shift.c.shift_date, shift.c.shift_name, shift.c.start_utc)
        .where(shift.c.id.in_(sorted(ids))).order_by(shift.c.start_utc, shift.c.shift_name)
    ).all()
    return [(int(r.id), f"{r.shift_date.isoformat()}_{r.shift_name}", from_utc_naive(r.start_utc))
            for r in rows]


def _units(unit_rows: Sequence[Any], position: Mapping[int, int],
           lines_with_defects: Mapping[int, set[str]], m: int) -> np.ndarray:
    units = np.zeros(m, dtype=np.float64)
    lines_with_units: dict[int, set[str]] = {}
    for r in unit_rows:
        units[position[r.shift_id]] += float(r.units)
        lines_with_units.setdefault(r.shift_id, set()).add(r.line)
    for row_id, i in position.items():
        have = lines_with_units.get(row_id, set())
        if not have or not lines_with_defects.get(row_id, set()) <= have:
            units[i] = np.nan
    return units


def count_versions(conn: Connection) -> int:
    """Number of recorded baseline versions."""
    return int(conn.execute(select(func.count()).select_from(baseline_version)).scalar_one())

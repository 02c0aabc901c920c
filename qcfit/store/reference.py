"""Reference tables kept in step with the config: lines, defect categories, config versions.

Rules (what ``qcfit init`` does to them):

* a line or category in the config but not in the store is inserted; a changed display
  name is updated;
* a line in the store but no longer in the config is marked ``active = False``, never
  deleted (its history stays readable); it becomes active again when it comes back;
* a category no longer in the config stays as it is (counts refer to it) and is reported;
* each distinct config text is recorded once in ``config_version`` (keyed by its sha256).

The store never imports the config module: anything with the attributes of
:class:`ConfigLike` will do.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Protocol

from sqlalchemy import Connection, insert, select, text, update

from qcfit.errors import InvalidArgumentError
from qcfit.store.engine import to_utc_naive
from qcfit.store.schema import category, config_version, line

__all__ = [
    "ConfigLike",
    "ReferenceSync",
    "db_utc_now",
    "read_categories",
    "read_lines",
    "record_config_version",
    "sync_reference",
]


class ConfigLike(Protocol):
    """The parts of ``qcfit.config.Config`` the store uses."""

    @property
    def path(self) -> Path | None: ...
    @property
    def text(self) -> str: ...
    @property
    def hash(self) -> str: ...
    @property
    def lines(self) -> Mapping[str, str]: ...
    @property
    def categories(self) -> Mapping[str, str]: ...


@dataclass(frozen=True, slots=True)
class ReferenceSync:
    """Codes touched by :func:`sync_reference`; renamed entries are (code, old, new)."""

    lines_added: tuple[str, ...] = ()
    lines_renamed: tuple[tuple[str, str, str], ...] = ()
    lines_reactivated: tuple[str, ...] = ()
    lines_deactivated: tuple[str, ...] = ()
    categories_added: tuple[str, ...] = ()
    categories_renamed: tuple[tuple[str, str, str], ...] = ()
    categories_not_in_config: tuple[str, ...] = ()  # kept, reported only

    @property
    def changed(self) -> bool:
        return any(
            (
                self.lines_added,
                self.lines_renamed,
                self.lines_reactivated,
                self.lines_deactivated,
                self.categories_added,
                self.categories_renamed,
            )
        )


def sync_reference(
    conn: Connection, lines: Mapping[str, str], categories: Mapping[str, str]
) -> ReferenceSync:
    """Make the line and category tables match the config (see the module docstring)."""
    _require_codes("lines", lines)
    _require_codes("categories", categories)
    added, renamed, reactivated, deactivated = _sync_lines(conn, lines)
    cat_added, cat_renamed, cat_extra = _sync_categories(conn, categories)
    return ReferenceSync(
        lines_added=added,
        lines_renamed=renamed,
        lines_reactivated=reactivated,
        lines_deactivated=deactivated,
        categories_added=cat_added,
        categories_renamed=cat_renamed,
        categories_not_in_config=cat_extra,
    )


def _sync_lines(conn: Connection, lines: Mapping[str, str]) -> tuple[Any, Any, Any, Any]:
    stored = {r.code: (r.name, bool(r.active)) for r in conn.execute(select(line))}
    added = tuple(c for c in lines if c not in stored)
    renamed = _renamed(lines, {c: name for c, (name, _) in stored.items()})
    reactivated = tuple(c for c in lines if c in stored and not stored[c][1])
    deactivated = tuple(sorted(c for c, (_, on) in stored.items() if on and c not in lines))
    if added:
        conn.execute(insert(line), [{"code": c, "name": lines[c], "active": True} for c in added])
    for code, _, new in renamed:
        conn.execute(update(line).where(line.c.code == code).values(name=new))
    for codes, active in ((reactivated, True), (deactivated, False)):
        if codes:
            conn.execute(update(line).where(line.c.code.in_(codes)).values(active=active))
    return added, renamed, reactivated, deactivated


def _sync_categories(conn: Connection, categories: Mapping[str, str]) -> tuple[Any, Any, Any]:
    stored = {r.code: r.name for r in conn.execute(select(category))}
    added = tuple(c for c in categories if c not in stored)
    renamed = _renamed(categories, stored)
    if added:
        conn.execute(insert(category), [{"code": c, "name": categories[c]} for c in added])
    for code, _, new in renamed:
        conn.execute(update(category).where(category.c.code == code).values(name=new))
    return added, renamed, tuple(sorted(set(stored) - set(categories)))


def _renamed(
    wanted: Mapping[str, str], stored: Mapping[str, str]
) -> tuple[tuple[str, str, str], ...]:
    return tuple((c, stored[c], n) for c, n in wanted.items() if c in stored and stored[c] != n)


def read_lines(conn: Connection, *, active_only: bool = True) -> dict[str, str]:
    """Line code -> display name, sorted by code (only active lines unless asked)."""
    query = select(line.c.code, line.c.name).order_by(line.c.code)
    if active_only:
        query = query.where(line.c.active.is_(True))
    return {r.code: r.name for r in conn.execute(query)}


def read_categories(conn: Connection) -> dict[str, str]:
    """Category code -> display name, sorted by code."""
    query = select(category.c.code, category.c.name).order_by(category.c.code)
    return {r.code: r.name for r in conn.execute(query)}


def record_config_version(
    conn: Connection, config: ConfigLike, os_user: str, now: dt.datetime
) -> int:
    """Id of the ``config_version`` row for this config text (inserted the first time seen)."""
    return record_config_version_ex(conn, config, os_user, now)[0]


def record_config_version_ex(
    conn: Connection, config: ConfigLike, os_user: str, now: dt.datetime
) -> tuple[int, bool]:
    """Like :func:`record_config_version`, also saying whether the row is new."""
    found = conn.execute(
        select(config_version.c.id).where(config_version.c.content_hash == config.hash)
    ).scalar_one_or_none()
    if found is not None:
        return int(found), False
    row = conn.execute(
        insert(config_version)
        .values(
            content_hash=config.hash,
            toml_text=config.text,
            source=str(config.path) if config.path is not None else "",
            first_seen_utc=to_utc_naive(now),
            os_user=os_user or "unknown",
        )
        .returning(config_version.c.id)
    ).scalar_one()
    return int(row), True


def db_utc_now(conn: Connection) -> dt.datetime:
    """The database server's current time as an aware UTC datetime (used when none is given)."""
    if conn.dialect.name == "sqlite":
        raw = conn.execute(text("SELECT strftime('%Y-%m-%d %H:%M:%f', 'now')")).scalar_one()
        return dt.datetime.fromisoformat(raw).replace(tzinfo=dt.UTC)
    value = conn.execute(text("SELECT timezone('UTC', statement_timestamp())")).scalar_one()
    return value.replace(tzinfo=dt.UTC)


def _require_codes(what: str, codes: Mapping[str, str]) -> None:
    for code, name in codes.items():
        if not isinstance(code, str) or not code or code != code.strip():
            raise InvalidArgumentError(what, f"code {code!r} is empty or has spaces at its ends")
        if not isinstance(name, str):
            raise InvalidArgumentError(what, f"display name of {code!r} is not text")

"""Create, upgrade and check the store schema (Alembic, configured in code, no alembic.ini).

Where the migrations are (:func:`migrations_dir`), independent of the working directory:

1. ``<source tree>/migrations`` beside the ``qcfit`` package, when that tree has a
   ``pyproject.toml`` (a clone, or an editable install of one);
2. ``<prefix>/share/qcfit/migrations``, where a wheel puts them (``[tool.setuptools.data-files]``),
   for the running interpreter's prefix or the user scheme.

How an upgrade runs (:func:`upgrade_store`, :func:`init_store`):

* one transaction for everything: ``BEGIN IMMEDIATE`` on SQLite (so DDL is rolled back
  with the rest when a migration fails), a transaction-level advisory lock on PostgreSQL
  (two ``qcfit init`` at once run one after the other);
* SQLite: ``PRAGMA foreign_keys=OFF`` on that connection before the transaction starts,
  so a batch table rebuild cannot cascade-delete child rows, then
  ``PRAGMA foreign_key_check`` before commit; any violation rolls everything back;
* SQLite: before upgrading a store that already has a revision, a copy is taken with the
  online backup API: ``<file>.rev-<old revision>.bak``.

Writing a new revision after changing ``schema.py`` (developers)::

    python -m qcfit.store.migrate revision -m "what changed" [--url URL]

autogenerates it against a scratch store (a temporary SQLite file unless ``--url`` names
one) and prints the new file's path (:func:`new_revision`).
"""

from __future__ import annotations

import argparse
import datetime as dt
import functools
import logging
import sqlite3
import sys
import sysconfig
import tempfile
import zlib
from collections.abc import Iterator, Mapping, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from types import MappingProxyType
from typing import Any, Protocol

from alembic import command
from alembic.config import Config as AlembicConfig
from alembic.runtime.migration import MigrationContext
from alembic.script import ScriptDirectory
from alembic.script.revision import ResolutionError
from alembic.util import CommandError
from sqlalchemy import MetaData, inspect, text
from sqlalchemy.engine import Connection, Engine
from sqlalchemy.exc import SQLAlchemyError

import qcfit
from qcfit.errors import QcfitError, SchemaError, StoreError
from qcfit.store.baselines import BaselineSpecLike, count_versions, sync_baseline_versions
from qcfit.store.engine import (
    BEGIN_OPTION,
    NOT_INITIALISED,
    make_engine,
    read_tx,
    store_info,
    translate_errors,
)
from qcfit.store.reference import (
    ConfigLike,
    ReferenceSync,
    db_utc_now,
    record_config_version_ex,
    sync_reference,
)
from qcfit.store.schema import metadata

log = logging.getLogger(__name__)

__all__ = [
    "InitConfigLike",
    "InitReport",
    "UpgradeReport",
    "alembic_config",
    "check_schema",
    "current_revision",
    "head_revision",
    "init_store",
    "migration_tx",
    "migrations_dir",
    "new_revision",
    "upgrade_store",
]

MIGRATION_LOCK_KEY = zlib.crc32(b"qcfit store migration")  # pg_advisory_xact_lock key
_WHEEL_SUBDIR = Path("share", "qcfit", "migrations")
AlembicError = (CommandError, ResolutionError)


@dataclass(frozen=True, slots=True)
class UpgradeReport:
    """Revisions before and after an upgrade; ``backup`` is the SQLite copy taken, if any."""

    from_revision: str | None
    to_revision: str
    backup: Path | None

    @property
    def created(self) -> bool:
        return self.from_revision is None

    @property
    def changed(self) -> bool:
        return self.from_revision != self.to_revision


class InitConfigLike(ConfigLike, Protocol):
    """What :func:`init_store` reads of ``qcfit.config.Config``: the reference tables'
    parts (:class:`~qcfit.store.reference.ConfigLike`) and the baselines."""

    @property
    def baselines(self) -> Sequence[BaselineSpecLike]: ...


@dataclass(frozen=True, slots=True)
class InitReport:
    """What :func:`init_store` did (the CLI prints it).

    ``baseline_versions``: content hash -> ``baseline_version.id`` of every baseline in the
    config; ``baseline_versions_new``: how many of them were recorded by this run."""

    store: str  # URL, password hidden
    schema: UpgradeReport
    reference: ReferenceSync
    config_version_id: int
    config_version_new: bool
    baseline_versions: Mapping[str, int]
    baseline_versions_new: int

    @property
    def changed(self) -> bool:
        return (self.schema.changed or self.reference.changed or self.config_version_new
                or self.baseline_versions_new > 0)


# --- locating the migrations --------------------------------------------------------------


def migrations_dir() -> Path:
    """The migrations folder that ships with this qcfit (see the module docstring)."""
    for candidate in _candidate_dirs():
        if (candidate / "env.py").is_file() and (candidate / "versions").is_dir():
            return candidate
    raise StoreError(
        "cannot find the qcfit migrations folder (looked in "
        + ", ".join(str(c) for c in _candidate_dirs())
        + "); reinstall qcfit"
    )


def _candidate_dirs() -> list[Path]:
    root = Path(qcfit.__file__).resolve().parent.parent
    found = []
    if (root / "pyproject.toml").is_file():
        found.append(root / "migrations")
    schemes = [sysconfig.get_default_scheme(), sysconfig.get_preferred_scheme("user")]
    for scheme in dict.fromkeys(schemes):
        try:
            found.append(Path(sysconfig.get_path("data", scheme)) / _WHEEL_SUBDIR)
        except KeyError:  # pragma: no cover - scheme missing on this platform
            continue
    return found


def alembic_config(migrations: Path | None = None) -> AlembicConfig:
    """An Alembic ``Config`` with an absolute ``script_location``; no ini file involved."""
    cfg = AlembicConfig()
    location = (migrations or migrations_dir()).resolve()
    cfg.set_main_option("script_location", str(location))
    cfg.set_main_option("path_separator", "os")
    return cfg


@functools.lru_cache(maxsize=8)
def _scripts(location: Path) -> ScriptDirectory:
    return ScriptDirectory.from_config(alembic_config(location))


def head_revision(migrations: Path | None = None) -> str:
    """The newest revision this qcfit knows."""
    head = _scripts((migrations or migrations_dir()).resolve()).get_current_head()
    if head is None:  # pragma: no cover - the package ships at least one revision
        raise StoreError("the qcfit migrations folder has no revisions")
    return head


def configure_context(context: Any, connection: Connection, target: MetaData) -> None:
    """``context.configure`` as env.py calls it (also used to compare schemas in tests)."""
    context.configure(
        connection=connection,
        target_metadata=target,
        render_as_batch=True,
        compare_type=True,
        transactional_ddl=True,
    )


# --- reading the revision -----------------------------------------------------------------


def current_revision(conn: Connection) -> str | None:
    """The store's revision, or None when it has no Alembic version table (not initialised)."""
    heads = MigrationContext.configure(conn).get_current_heads()
    if len(heads) > 1:
        raise SchemaError(f"store has several schema revisions {sorted(heads)}; cannot tell")
    return heads[0] if heads else None


def check_schema(engine: Engine, *, migrations: Path | None = None) -> None:
    """Refuse a store that is missing, not initialised, older or newer than this qcfit."""
    info = store_info(engine)
    if info.path is not None and not info.path.exists():
        raise SchemaError(NOT_INITIALISED)
    with read_tx(engine) as conn:
        current = current_revision(conn)
    _require_known(current, migrations)
    head = head_revision(migrations)
    if current is None:
        raise SchemaError(NOT_INITIALISED)
    if current != head:
        raise SchemaError(
            f"store is at schema revision {current}, this qcfit needs {head}: "
            "run `qcfit init` to upgrade it"
        )


def _require_known(revision: str | None, migrations: Path | None) -> None:
    if revision is None:
        return
    scripts = _scripts((migrations or migrations_dir()).resolve())
    try:
        known = scripts.get_revision(revision) is not None
    except AlembicError:
        known = False
    if not known:
        raise SchemaError(f"store was made by a newer qcfit (revision {revision})")


# --- upgrading ----------------------------------------------------------------------------


def upgrade_store(
    engine: Engine, *, migrations: Path | None = None, backup: bool = True
) -> UpgradeReport:
    """Bring the schema to head in one transaction (see the module docstring); idempotent."""
    location = (migrations or migrations_dir()).resolve()
    copy = _backup_if_upgrading(engine, location) if backup else None
    with migration_tx(engine) as conn:
        report = _upgrade_in(conn, location)
    if copy is not None and not report.changed:
        copy.unlink(missing_ok=True)  # another process upgraded meanwhile
        copy = None
    return UpgradeReport(report.from_revision, report.to_revision, copy)


def init_store(
    engine: Engine,
    config: InitConfigLike,
    *,
    os_user: str = "unknown",
    now: dt.datetime | None = None,
    migrations: Path | None = None,
) -> InitReport:
    """Create or upgrade the store, sync lines/categories, record the config version and
    every baseline version of the config.

    All in one transaction: after any failure the store is as it was. ``now`` (aware)
    is recorded as ``config_version.first_seen_utc`` and as ``first_seen_utc`` of each
    baseline version not recorded before; default: the database's clock.
    Running it again with the same config changes nothing (``report.changed`` is False).
    """
    location = (migrations or migrations_dir()).resolve()
    copy = _backup_if_upgrading(engine, location)
    with migration_tx(engine) as conn:
        schema = _upgrade_in(conn, location)
        reference = sync_reference(conn, config.lines, config.categories)
        when = now if now is not None else db_utc_now(conn)
        version_id, new = record_config_version_ex(conn, config, os_user, when)
        before = count_versions(conn)
        baselines = sync_baseline_versions(conn, config, os_user=os_user, now=when)
        baselines_new = count_versions(conn) - before
    if copy is not None and not schema.changed:
        copy.unlink(missing_ok=True)
        copy = None
    schema = UpgradeReport(schema.from_revision, schema.to_revision, copy)
    return InitReport(store_info(engine).url, schema, reference, version_id, new,
                      MappingProxyType(dict(baselines)), baselines_new)


def _upgrade_in(conn: Connection, location: Path) -> UpgradeReport:
    before = current_revision(conn)
    _require_known(before, location)
    if before is None:
        _refuse_unmanaged_tables(conn)
    cfg = alembic_config(location)
    cfg.attributes["connection"] = conn
    try:
        command.upgrade(cfg, "head")
    except (QcfitError, SQLAlchemyError):
        raise
    except Exception as exc:  # a migration script failed: everything is rolled back
        raise SchemaError(
            f"schema upgrade from revision {before or '(empty store)'} failed: "
            f"{type(exc).__name__}: {exc}; nothing was changed"
        ) from exc
    after = current_revision(conn)
    if after is None:  # pragma: no cover - alembic always writes the version row
        raise SchemaError("upgrade finished without a schema revision")
    if before != after:
        log.info("store schema upgraded from %s to %s", before, after)
    return UpgradeReport(before, after, None)


def _refuse_unmanaged_tables(conn: Connection) -> None:
    present = set(inspect(conn).get_table_names()) & set(metadata.tables)
    if present:
        raise SchemaError(
            "store has qcfit tables but no schema revision ("
            + ", ".join(sorted(present))
            + "); it was not made by `qcfit init`"
        )


@contextmanager
def migration_tx(engine: Engine) -> Iterator[Connection]:
    """The one transaction a migration runs in (foreign keys off on SQLite, then checked)."""
    with translate_errors(engine), engine.connect() as conn:
        sqlite = conn.dialect.name == "sqlite"
        if sqlite:
            _set_foreign_keys(conn, on=False)
        try:
            conn.execution_options(**{BEGIN_OPTION: "IMMEDIATE"})
            with conn.begin():
                if conn.dialect.name == "postgresql":
                    conn.execute(
                        text("SELECT pg_advisory_xact_lock(:k)"), {"k": MIGRATION_LOCK_KEY}
                    )
                yield conn
                if sqlite:
                    _check_foreign_keys(conn)
        finally:
            if sqlite:
                _restore_foreign_keys(conn)


def _set_foreign_keys(conn: Connection, *, on: bool) -> None:
    raw = conn.connection.driver_connection
    assert raw is not None
    raw.execute(f"PRAGMA foreign_keys = {'ON' if on else 'OFF'}")
    got = raw.execute("PRAGMA foreign_keys").fetchone()[0]
    if bool(got) != on:
        raise StoreError(f"could not set foreign_keys={on} on the store connection")


def _restore_foreign_keys(conn: Connection) -> None:
    try:
        _set_foreign_keys(conn, on=True)
    except Exception:  # never hand out a connection with foreign keys off
        conn.invalidate()


def _check_foreign_keys(conn: Connection) -> None:
    rows = conn.exec_driver_sql("PRAGMA foreign_key_check").fetchall()
    if rows:
        shown = "; ".join(f"{r[0]} row {r[1]} -> {r[2]}" for r in rows[:5])
        raise SchemaError(
            f"migration would leave {len(rows)} row(s) with a broken reference ({shown}); "
            "nothing was changed"
        )


def _backup_if_upgrading(engine: Engine, location: Path) -> Path | None:
    info = store_info(engine)
    if info.dialect != "sqlite" or info.path is None or not info.path.exists():
        return None
    with read_tx(engine) as conn:
        current = current_revision(conn)
    if current is None or current == head_revision(location):
        return None
    _require_known(current, location)
    target = info.path.with_name(f"{info.path.name}.rev-{current}.bak")
    _sqlite_copy(info.path, target)
    log.info("copied the store to %s before upgrading", target)
    return target


def _sqlite_copy(source: Path, target: Path) -> None:
    try:
        src = sqlite3.connect(f"{source.as_uri()}?mode=ro", uri=True)
        try:
            dst = sqlite3.connect(target)
            try:
                src.backup(dst)
            finally:
                dst.close()
        finally:
            src.close()
    except sqlite3.Error as exc:
        raise StoreError(f"cannot copy {source} to {target} before upgrading: {exc}") from exc


# --- writing a new revision (developers) --------------------------------------------------


def new_revision(
    message: str, *, url: str, migrations: Path | None = None, rev_id: str | None = None
) -> Path:
    """Write the next revision, autogenerated from the difference between ``schema.py`` and
    a scratch store at ``url`` (upgraded to head first). Returns the new file.

    Revision ids are 4-digit sequence numbers. Read the file before committing it: check
    that changes to existing tables use ``op.batch_alter_table`` and that server defaults
    render for both SQLite and PostgreSQL (e.g. ``sa.true()``, not ``sa.text('1')``).
    """
    location = (migrations or migrations_dir()).resolve()
    rev_id = rev_id or f"{int(head_revision(location)) + 1:04d}"
    engine = make_engine(url)
    try:
        upgrade_store(engine, migrations=location, backup=False)
        cfg = alembic_config(location)
        with migration_tx(engine) as conn:
            cfg.attributes["connection"] = conn
            script = command.revision(cfg, message, autogenerate=True, rev_id=rev_id)
    finally:
        engine.dispose()
    _scripts.cache_clear()
    scripts = script if isinstance(script, list) else [script]
    assert scripts and scripts[0] is not None
    return Path(scripts[0].path)


# --- command line (developers) ------------------------------------------------------------


def _parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="python -m qcfit.store.migrate",
        description="Write the next store migration, autogenerated from qcfit/store/schema.py.",
    )
    commands = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")
    rev = commands.add_parser(
        "revision", help="autogenerate the next revision into the migrations folder",
        description="Autogenerate the next revision from the difference between schema.py "
                    "and a scratch store upgraded to the newest revision; prints its path.",
    )
    rev.add_argument("-m", "--message", required=True, metavar="MSG",
                     help="what changed (the revision's title and file name)")
    rev.add_argument("--url", metavar="URL",
                     help="scratch store to compare against (default: a temporary SQLite file)")
    return parser


def _main(argv: Sequence[str] | None = None) -> int:
    args = _parser().parse_args(argv)
    try:
        if args.url is not None:
            path = new_revision(args.message, url=args.url)
        else:
            with tempfile.TemporaryDirectory(prefix="qcfit-revision-") as scratch:
                url = f"sqlite:///{Path(scratch) / 'scratch.sqlite'}"
                path = new_revision(args.message, url=url)
    except QcfitError as exc:
        print(f"Error: {exc}", file=sys.stderr)
        return exc.exit_code
    print(f"wrote {path}")
    print("review it before committing (batch mode for changed tables, portable defaults)")
    return 0


if __name__ == "__main__":
    sys.exit(_main())

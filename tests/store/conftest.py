"""Store fixtures: one real store per test, on SQLite and (when configured) PostgreSQL.

``store_url`` is parametrized ``sqlite`` (a fresh file in ``tmp_path``) and ``postgresql``
(a fresh schema in the database named by ``QCFIT_TEST_PG_URL``, made the connection's
``search_path`` and dropped afterwards). Without that variable the PostgreSQL cases are
skipped. ``.ci/start-postgres`` starts a server and sets the variable.
"""

from __future__ import annotations

import os
import uuid
from collections.abc import Iterator
from pathlib import Path

import pytest
import sqlalchemy as sa
from sqlalchemy.engine import Engine, make_url

from qcfit.store.engine import make_engine
from qcfit.store.migrate import upgrade_store

# Read once at import: the shared autouse fixture clears QCFIT_* variables for each test.
PG_URL = os.environ.get("QCFIT_TEST_PG_URL")
PG_SKIP_REASON = "QCFIT_TEST_PG_URL not set (source .ci/start-postgres to run PostgreSQL tests)"


def _pg_admin() -> Engine:
    assert PG_URL is not None
    url = make_url(PG_URL)
    if url.drivername == "postgresql":
        url = url.set(drivername="postgresql+psycopg")
    return sa.create_engine(url, isolation_level="AUTOCOMMIT", poolclass=sa.NullPool)


@pytest.fixture(scope="session")
def pg_admin() -> Iterator[Engine | None]:
    """Engine on the test PostgreSQL database (autocommit), or None when not configured."""
    if PG_URL is None:
        yield None
        return
    engine = _pg_admin()
    yield engine
    engine.dispose()


def new_pg_schema_url(admin: Engine) -> tuple[str, str]:
    """A fresh schema in the test database and a URL whose search_path starts there."""
    schema = f"t_{uuid.uuid4().hex[:16]}"
    with admin.connect() as conn:
        conn.exec_driver_sql(f'CREATE SCHEMA "{schema}"')
    url = make_url(PG_URL).update_query_dict({"options": f"-csearch_path={schema}"})
    return url.render_as_string(hide_password=False), schema


def drop_pg_schema(admin: Engine, schema: str) -> None:
    with admin.connect() as conn:
        conn.exec_driver_sql(f'DROP SCHEMA IF EXISTS "{schema}" CASCADE')


@pytest.fixture(
    params=[
        "sqlite",
        pytest.param("postgresql", marks=pytest.mark.postgres),
    ]
)
def store_url(
    request: pytest.FixtureRequest, tmp_path: Path, pg_admin: Engine | None
) -> Iterator[str]:
    """URL of an empty store: a new SQLite file, or a new PostgreSQL schema."""
    if request.param == "sqlite":
        yield f"sqlite:///{tmp_path / 'store.sqlite'}"
        return
    if pg_admin is None:
        pytest.skip(PG_SKIP_REASON)
    url, schema = new_pg_schema_url(pg_admin)
    try:
        yield url
    finally:
        drop_pg_schema(pg_admin, schema)


@pytest.fixture
def store_engine(store_url: str) -> Iterator[Engine]:
    """``make_engine(store_url)`` on an empty store, disposed afterwards."""
    engine = make_engine(store_url)
    try:
        yield engine
    finally:
        engine.dispose()


@pytest.fixture
def migrated_engine(store_engine: Engine) -> Engine:
    """``store_engine`` with the schema at head (no lines or categories yet)."""
    upgrade_store(store_engine)
    return store_engine

"""The same loads against a real PostgreSQL store (skipped unless QCFIT_TEST_PG_URL is set;
``source .ci/start-postgres`` starts a server and sets it)."""

from __future__ import annotations

import datetime as dt
import os
import uuid

import numpy as np
import pytest
import sqlalchemy as sa
from sqlalchemy.engine import make_url

from qcfit.config import load_config
from qcfit.ingest import load_counts_file, load_events_file
from qcfit.store.defects import read_counts, read_events, shift_table, shift_tables
from qcfit.store.engine import make_engine, read_tx
from qcfit.store.migrate import init_store
from qcfit.store.shifts import shift_row

PG_URL = os.environ.get("QCFIT_TEST_PG_URL")  # read at import: a fixture clears QCFIT_* later
NOW = dt.datetime(2026, 12, 1, tzinfo=dt.UTC)

pytestmark = [
    pytest.mark.postgres,
    pytest.mark.skipif(
        PG_URL is None, reason="QCFIT_TEST_PG_URL not set (source .ci/start-postgres)"
    ),
]


@pytest.fixture
def pg_store(tmp_path, plant_config_text, write_config):
    url = make_url(PG_URL)
    if url.drivername == "postgresql":
        url = url.set(drivername="postgresql+psycopg")
    admin = sa.create_engine(url, isolation_level="AUTOCOMMIT", poolclass=sa.NullPool)
    schema = f"t_{uuid.uuid4().hex[:16]}"
    with admin.connect() as conn:
        conn.exec_driver_sql(f'CREATE SCHEMA "{schema}"')
    store_url = url.update_query_dict({"options": f"-csearch_path={schema}"}).render_as_string(
        hide_password=False
    )
    config = load_config(write_config(tmp_path, plant_config_text))
    engine = make_engine(store_url)
    init_store(engine, config, os_user="tester", now=NOW)
    try:
        yield config, engine
    finally:
        engine.dispose()
        with admin.connect() as conn:
            conn.exec_driver_sql(f'DROP SCHEMA IF EXISTS "{schema}" CASCADE')
        admin.dispose()


def test_fall_back_night_round_trip_on_postgresql(pg_store, tmp_path):
    """America/Chicago falls back on 2026-11-01 (US rule, Energy Policy Act of 2005):
    01:30 CDT (06:30Z) and 01:30 CST (07:30Z) are distinct instants and must stay so."""
    config, engine = pg_store
    path = tmp_path / "e.csv"
    path.write_text(
        "timestamp,line,category,quantity\n"
        "2026-11-01T01:30:00-05:00,L1,SCR,1\n"
        "2026-11-01T01:30:00-06:00,L1,SCR,2\n"
        "2026-11-01 05:59:59.5,L2,DNT,1\n",
        encoding="utf-8",
    )
    report = load_events_file(engine, config, path, now=NOW)
    assert report.events_added == 3
    assert load_events_file(engine, config, path, now=NOW).already_loaded
    with read_tx(engine) as conn:
        row = shift_row(conn, "2026-10-31_C")
        events = read_events(conn, [row.row_id])
        counts, units = shift_table(conn, row.row_id, ["L1", "L2"], ["SCR", "DNT"])
        many = shift_tables(conn, [row.row_id], ["L1", "L2"], ["SCR", "DNT"])
        frame = read_counts(conn, tz=config.timezone)
    assert sorted(events["ts_utc"].tolist()) == [
        np.datetime64("2026-11-01T06:30:00", "us"),
        np.datetime64("2026-11-01T07:30:00", "us"),
        np.datetime64("2026-11-01T11:59:59.500000", "us"),
    ]
    assert counts.tolist() == [[3, 0], [0, 1]] and np.isnan(units).all()
    assert many[row.row_id][0].tolist() == counts.tolist() and np.isnan(many[row.row_id][1]).all()
    assert (row.end - row.start) == dt.timedelta(hours=9)
    assert frame["shift_end"].iloc[0].isoformat() == "2026-11-01T06:00:00-06:00"


def test_counts_and_corrections_on_postgresql(pg_store, tmp_path):
    config, engine = pg_store
    first = tmp_path / "c1.csv"
    first.write_text(
        "shift,line,category,count,units_inspected\n2026-01-05_A,L1,SCR,12,4800\n", encoding="utf-8"
    )
    second = tmp_path / "c2.csv"
    second.write_text(
        "shift,line,category,count,units_inspected\n2026-01-05_A,L1,SCR,10,4800\n", encoding="utf-8"
    )
    load_counts_file(engine, config, first, now=NOW)
    report = load_counts_file(engine, config, second, now=NOW)
    assert report.corrections == 1
    with engine.connect() as conn:
        rows = conn.exec_driver_sql(
            "SELECT line, category, old_value, new_value FROM count_correction"
        ).all()
    assert [tuple(r) for r in rows] == [("L1", "SCR", 12, 10)]

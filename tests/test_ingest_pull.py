"""``qcfit pull``: rows from a real second SQLite database go through the same checks."""

from __future__ import annotations

import datetime as dt
import sqlite3

import pytest
from click.testing import CliRunner

from qcfit.cli import main
from qcfit.config import load_config
from qcfit.errors import InputFileError, StoreError
from qcfit.ingest import pull
from qcfit.store.defects import read_counts
from qcfit.store.engine import read_tx

NOW = dt.datetime(2026, 1, 10, 12, tzinfo=dt.UTC)
SINCE = dt.datetime(2026, 1, 5, tzinfo=dt.UTC)
EVENTS_QUERY = (
    "SELECT ts AS timestamp, line_code AS line, defect AS category, n AS quantity "
    "FROM station_defect WHERE datetime(ts) >= :since ORDER BY id"
)


@pytest.fixture
def station_db(tmp_path):
    """The database inspection stations write (ISO text with offsets, as SQLite keeps it)."""
    path = tmp_path / "stations.sqlite"
    with sqlite3.connect(path) as con:
        con.execute(
            "CREATE TABLE station_defect (id INTEGER PRIMARY KEY, ts TEXT, line_code TEXT, defect TEXT, n INTEGER)"
        )
        con.executemany(
            "INSERT INTO station_defect (ts, line_code, defect, n) VALUES (?, ?, ?, ?)",
            [
                ("2026-01-02T07:00:00-06:00", "L1", "SCR", 1),  # before SINCE: not selected
                ("2026-01-05T06:30:00-06:00", "L1", "SCR", 2),
                ("2026-01-05T07:00:00-06:00", "L2", "DNT", 1),
                ("2026-01-05T23:00:00-06:00", "L1", "FL", 3),
            ],
        )
        con.execute(
            "CREATE TABLE shift_total (shift TEXT, line TEXT, category TEXT, count INTEGER, units REAL)"
        )
        con.executemany(
            "INSERT INTO shift_total VALUES (?, ?, ?, ?, ?)",
            [
                ("2026-01-02_A", "L3", "SCR", 9, 100.0),
                ("2026-01-06_A", "L3", "SCR", 4, 1000.0),
                ("2026-01-06_A", "L3", "DNT", 1, 1000.0),
            ],
        )
    return path


@pytest.fixture
def plant_config_text(plant_config_text, station_db):
    """The test plant with a [source] on the station database (overrides the shared fixture)."""
    return (
        plant_config_text
        + f'\n[source]\nurl = "sqlite:///{station_db}"\nquery = "{EVENTS_QUERY}"\nkind = "events"\n'
    )


def cells(store):
    with read_tx(store.engine) as conn:
        frame = read_counts(conn, tz=store.config.timezone)
    return {
        (f"{r.shift_date}_{r.shift_name}", r.line, r.category): int(r.count)
        for r in frame.itertuples(index=False)
    }


def with_query(store, tmp_path, query: str, kind: str):
    text = (
        store.config_path.read_text(encoding="utf-8")
        .replace(EVENTS_QUERY, query)
        .replace('kind = "events"', f'kind = "{kind}"')
    )
    path = tmp_path / "other.toml"
    path.write_text(text, encoding="utf-8")
    return load_config(path)


def test_pull_events_since(plant_store):
    report = pull(
        plant_store.engine, plant_store.config, now=NOW, since=SINCE, os_user="svc", host="h"
    )
    assert (report.rows_read, report.rows_accepted, report.events_added) == (3, 3, 3)
    assert cells(plant_store) == {
        ("2026-01-05_A", "L1", "SCR"): 2,
        ("2026-01-05_A", "L2", "DNT"): 1,
        ("2026-01-05_C", "L1", "FL"): 3,
    }
    again = pull(plant_store.engine, plant_store.config, now=NOW, since=SINCE)
    assert again.already_loaded and again.load_id == report.load_id


def test_overlapping_pulls_do_not_double(plant_store, station_db):
    pull(plant_store.engine, plant_store.config, now=NOW, since=SINCE)
    with sqlite3.connect(station_db) as con:
        con.execute(
            "INSERT INTO station_defect (ts, line_code, defect, n) VALUES ('2026-01-05T08:00:00-06:00', 'L1', 'SCR', 1)"
        )
    report = pull(plant_store.engine, plant_store.config, now=NOW, since=SINCE)
    assert (report.events_added, report.events_unchanged) == (1, 3)
    assert cells(plant_store)[("2026-01-05_A", "L1", "SCR")] == 3


def test_bad_source_rows_are_rejected_with_row_numbers(plant_store, station_db, tmp_path):
    with sqlite3.connect(station_db) as con:
        con.execute(
            "INSERT INTO station_defect (ts, line_code, defect, n) VALUES ('2026-01-06T08:00:00-06:00', 'L7', 'SCR', 1)"
        )
        con.execute(
            "INSERT INTO station_defect (ts, line_code, defect, n) VALUES ('2026-01-06T08:00:00-06:00', 'L1', 'SCR', NULL)"
        )
    before = plant_store.dump()
    with pytest.raises(InputFileError) as err:
        pull(plant_store.engine, plant_store.config, now=NOW, since=SINCE)
    assert [str(b) for b in err.value.bad_rows] == [
        "line 4: unknown line 'L7' (not in [lines] of the config)",
        "line 5: quantity is empty",
    ]
    assert err.value.path.startswith("[source] query result (sqlite:///")
    assert plant_store.dump() == before
    rejects = tmp_path / "pull.rejects.csv"
    report = pull(
        plant_store.engine, plant_store.config, now=NOW, since=SINCE, skip_bad=True, rejects=rejects
    )
    assert (report.rows_accepted, report.rows_rejected) == (3, 2)
    assert rejects.read_text(encoding="utf-8").splitlines()[1] == (
        "4,unknown line 'L7' (not in [lines] of the config),\"2026-01-06T08:00:00-06:00,L7,SCR,1\""
    )


def test_pull_counts_without_since_in_the_query(plant_store, tmp_path):
    config = with_query(
        plant_store,
        tmp_path,
        "SELECT shift, line, category, count, units AS units_inspected FROM shift_total",
        "counts",
    )
    report = pull(plant_store.engine, config, now=NOW, since=SINCE)
    assert report.notes == (
        "1 row(s) of shifts starting before 2026-01-05T00:00:00+00:00 left out",
    )
    assert cells(plant_store) == {
        ("2026-01-06_A", "L3", "SCR"): 4,
        ("2026-01-06_A", "L3", "DNT"): 1,
    }
    assert report.units_written == 1


def test_query_errors_and_unreachable_source(plant_store, tmp_path):
    config = with_query(plant_store, tmp_path, "SELECT * FROM no_such_table", "events")
    with pytest.raises(InputFileError) as err:
        pull(plant_store.engine, config, now=NOW)
    assert str(err.value).endswith("the query failed: no such table: no_such_table")
    text = plant_store.config_path.read_text(encoding="utf-8").replace(
        "stations.sqlite", "missing.sqlite"
    )
    (tmp_path / "gone.toml").write_text(text, encoding="utf-8")
    with pytest.raises(StoreError) as err:
        pull(plant_store.engine, load_config(tmp_path / "gone.toml"), now=NOW)
    assert "missing.sqlite (no such file)" in str(err.value)


def test_pull_command(plant_store):
    result = CliRunner().invoke(
        main, ["--config", str(plant_store.config_path), "pull", "--since", "2026-01-05"]
    )
    assert result.exit_code == 0, result.output
    assert (
        result.stdout.splitlines()[1]
        == "events: 3 added, 0 already stored, 0 restated with a new quantity"
    )
    assert cells(plant_store)[("2026-01-05_C", "L1", "FL")] == 3
    bad = CliRunner().invoke(
        main, ["--config", str(plant_store.config_path), "pull", "--since", "soon"]
    )
    assert (bad.exit_code, bad.stderr) == (
        2,
        "Error: --since: 'soon' is not a date or ISO 8601 time (e.g. 2026-01-05 or 2026-01-05T06:00-06:00)\n",
    )


def test_relative_sqlite_source_is_beside_the_config(plant_store, tmp_path, monkeypatch):
    text = plant_store.config_path.read_text(encoding="utf-8").replace(
        f"sqlite:///{tmp_path}/stations.sqlite", "sqlite:///stations.sqlite"
    )
    assert 'url = "sqlite:///stations.sqlite"' in text
    (tmp_path / "rel.toml").write_text(text, encoding="utf-8")
    monkeypatch.chdir(tmp_path.parent)  # somewhere else: the path must not depend on it
    report = pull(plant_store.engine, load_config(tmp_path / "rel.toml"), now=NOW, since=SINCE)
    assert report.events_added == 3

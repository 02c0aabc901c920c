"""Loading into a real SQLite store: one transaction, idempotence, corrections, audit rows."""

from __future__ import annotations

import datetime as dt
import hashlib
import sqlite3
import sys
from zoneinfo import ZoneInfo

import numpy as np
import pytest

from qcfit.errors import InputFileError, InvalidArgumentError
from qcfit.ingest import load_counts_file, load_events_file
from qcfit.store.defects import read_counts, shift_table, shift_tables
from qcfit.store.engine import read_tx
from qcfit.store.shifts import shift_row, shift_rows_of

NOW = dt.datetime(2026, 12, 1, 12, tzinfo=dt.UTC)
CHICAGO = ZoneInfo("America/Chicago")
WHO = {"os_user": "alice", "host": "qc-pc-1"}


def write(tmp_path, name: str, text: str):
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def cells(store) -> dict[tuple[str, str, str], int]:
    with read_tx(store.engine) as conn:
        frame = read_counts(conn, tz=CHICAGO)
    return {
        (f"{r.shift_date.isoformat()}_{r.shift_name}", r.line, r.category): int(r.count)
        for r in frame.itertuples(index=False)
    }


def query(store, sql: str) -> list[tuple]:
    with sqlite3.connect(store.url.removeprefix("sqlite:///")) as con:
        return con.execute(sql).fetchall()


EVENTS = (
    "timestamp,line,category,quantity\n"
    "2026-01-05T06:30:00-06:00,L1,SCR,2\n"
    "2026-01-05T07:10:00-06:00,L1,DNT,1\n"
    "2026-01-05T15:00:00-06:00,L2,SCR,1\n"
    "2026-01-05 23:59:59,L1,SCR,4\n"
)


def test_events_become_counts_and_raw_rows(plant_store, tmp_path):
    path = write(tmp_path, "e.csv", EVENTS)
    report = load_events_file(plant_store.engine, plant_store.config, path, now=NOW, **WHO)
    assert (report.rows_read, report.rows_accepted, report.rows_rejected) == (4, 4, 0)
    assert report.shifts == ("2026-01-05_A", "2026-01-05_B", "2026-01-05_C")
    assert cells(plant_store) == {
        ("2026-01-05_A", "L1", "DNT"): 1,
        ("2026-01-05_A", "L1", "SCR"): 2,
        ("2026-01-05_B", "L2", "SCR"): 1,
        ("2026-01-05_C", "L1", "SCR"): 4,
    }
    assert query(
        plant_store, "SELECT ts_utc, line, category, quantity FROM defect_event ORDER BY ts_utc"
    ) == [
        ("2026-01-05 12:30:00.000000", "L1", "SCR", 2),
        ("2026-01-05 13:10:00.000000", "L1", "DNT", 1),
        ("2026-01-05 21:00:00.000000", "L2", "SCR", 1),
        ("2026-01-06 05:59:59.000000", "L1", "SCR", 4),
    ]


def test_audit_row_records_hash_user_host_and_time(plant_store, tmp_path):
    path = write(tmp_path, "e.csv", EVENTS + "2026-01-05 09:00,L9,SCR,1\n")
    report = load_events_file(
        plant_store.engine, plant_store.config, path, now=NOW, skip_bad=True, **WHO
    )
    digest = hashlib.sha256(path.read_bytes()).hexdigest()
    assert report.content_hash == digest
    assert query(
        plant_store,
        "SELECT kind, source, content_hash, loaded_utc, os_user, host, rows_accepted, "
        "rows_rejected, corrections FROM load",
    ) == [
        (
            "events",
            str(path.resolve()),
            digest,
            "2026-12-01 12:00:00.000000",
            "alice",
            "qc-pc-1",
            4,
            1,
            0,
        )
    ]


def test_same_file_twice_changes_nothing(plant_store, tmp_path):
    path = write(tmp_path, "e.csv", EVENTS)
    first = load_events_file(plant_store.engine, plant_store.config, path, now=NOW, **WHO)
    before = plant_store.dump()
    again = load_events_file(
        plant_store.engine, plant_store.config, path, now=NOW + dt.timedelta(hours=1), **WHO
    )
    assert again.already_loaded and again.load_id == first.load_id
    assert again.summary() == [
        f"{path}: already loaded (load {first.load_id} at 2026-12-01 12:00 UTC, same content); nothing changed"
    ]
    assert plant_store.dump() == before


def test_two_files_for_one_shift_add_up_and_overlap_does_not_double(plant_store, tmp_path):
    a = write(
        tmp_path,
        "a.csv",
        "timestamp,line,category\n2026-01-05 07:00,L1,SCR\n2026-01-05 08:00,L1,SCR\n",
    )
    b = write(
        tmp_path,
        "b.csv",
        "timestamp,line,category\n2026-01-05 08:00,L1,SCR\n2026-01-05 09:00,L1,SCR\n"
        "2026-01-05 09:30,L1,DNT\n",
    )
    load_events_file(plant_store.engine, plant_store.config, a, now=NOW, **WHO)
    report = load_events_file(plant_store.engine, plant_store.config, b, now=NOW, **WHO)
    assert (report.events_added, report.events_unchanged, report.events_restated) == (2, 1, 0)
    assert (report.corrections, report.cells_written) == (0, 2)  # SCR changed, DNT new
    assert cells(plant_store) == {
        ("2026-01-05_A", "L1", "SCR"): 3,
        ("2026-01-05_A", "L1", "DNT"): 1,
    }
    assert query(plant_store, "SELECT count(*) FROM defect_event") == [(4,)]
    assert query(plant_store, "SELECT count(*) FROM count_correction") == [(0,)]


def test_restated_event_quantity_is_a_correction(plant_store, tmp_path):
    a = write(
        tmp_path,
        "a.csv",
        "timestamp,line,category,quantity\n2026-01-05 07:00,L1,SCR,1\n2026-01-05 08:00,L1,SCR,1\n",
    )
    b = write(tmp_path, "b.csv", "timestamp,line,category,quantity\n2026-01-05 08:00,L1,SCR,5\n")
    load_events_file(plant_store.engine, plant_store.config, a, now=NOW, **WHO)
    report = load_events_file(plant_store.engine, plant_store.config, b, now=NOW, **WHO)
    assert (report.events_added, report.events_restated, report.corrections) == (0, 1, 1)
    assert cells(plant_store) == {("2026-01-05_A", "L1", "SCR"): 6}
    assert query(
        plant_store, "SELECT load_id, line, category, old_value, new_value FROM count_correction"
    ) == [(report.load_id, "L1", "SCR", 2, 6)]
    assert query(plant_store, f"SELECT corrections FROM load WHERE id = {report.load_id}") == [(1,)]


def test_event_withdrawn_by_quantity_zero(plant_store, tmp_path):
    a = write(
        tmp_path,
        "a.csv",
        "timestamp,line,category,quantity\n2026-01-05 07:00,L1,SCR,1\n2026-01-05 08:00,L1,SCR,1\n",
    )
    b = write(tmp_path, "b.csv", "timestamp,line,category,quantity\n2026-01-05 08:00,L1,SCR,0\n")
    load_events_file(plant_store.engine, plant_store.config, a, now=NOW, **WHO)
    report = load_events_file(plant_store.engine, plant_store.config, b, now=NOW, **WHO)
    assert (report.events_restated, report.corrections) == (1, 1)
    assert cells(plant_store) == {("2026-01-05_A", "L1", "SCR"): 1}


COUNTS = (
    "shift,line,category,count,units_inspected\n"
    "2026-01-05_A,L1,SCR,12,4800\n"
    "2026-01-05_A,L1,DNT,0,4800\n"
    "2026-01-05_B,L2,SCR,3,\n"
)


def test_counts_file_with_units(plant_store, tmp_path):
    path = write(tmp_path, "c.csv", COUNTS)
    report = load_counts_file(plant_store.engine, plant_store.config, path, now=NOW, **WHO)
    assert (
        report.rows_accepted,
        report.cells_written,
        report.units_written,
        report.corrections,
    ) == (3, 3, 1, 0)
    assert cells(plant_store) == {
        ("2026-01-05_A", "L1", "SCR"): 12,
        ("2026-01-05_A", "L1", "DNT"): 0,
        ("2026-01-05_B", "L2", "SCR"): 3,
    }
    with read_tx(plant_store.engine) as conn:
        row = shift_row(conn, "2026-01-05_A")
        counts, units = shift_table(conn, row.row_id, ["L1", "L2"], ["SCR", "DNT", "FL"])
        row_b = shift_row(conn, "2026-01-05_B")
        both = shift_tables(conn, [row_b.row_id, row.row_id], ["L1", "L2"], ["SCR", "DNT", "FL"])
    assert counts.tolist() == [[12, 0, 0], [0, 0, 0]]
    # several shifts read at once give what each shift's own read gives
    assert both[row.row_id][0].tolist() == counts.tolist()
    assert both[row_b.row_id][0].tolist() == [[0, 0, 0], [3, 0, 0]]
    assert np.array_equal(both[row.row_id][1], units, equal_nan=True)
    assert np.isnan(both[row_b.row_id][1]).all() and not both[row_b.row_id][0].flags.writeable
    assert units[0] == 4800.0 and np.isnan(units[1])
    assert not counts.flags.writeable and not units.flags.writeable
    assert row.start == dt.datetime(2026, 1, 5, 12, tzinfo=dt.UTC) and row.end == dt.datetime(
        2026, 1, 5, 20, tzinfo=dt.UTC
    )


def test_restated_counts_are_corrections_in_the_audit_trail(plant_store, tmp_path):
    load_counts_file(
        plant_store.engine, plant_store.config, write(tmp_path, "c.csv", COUNTS), now=NOW, **WHO
    )
    fix = write(
        tmp_path,
        "fix.csv",
        "shift,line,category,count,units_inspected\n"
        "2026-01-05_A,L1,SCR,10,5000\n2026-01-05_A,L1,DNT,0,5000\n",
    )
    report = load_counts_file(plant_store.engine, plant_store.config, fix, now=NOW, **WHO)
    assert report.corrections == 2
    assert cells(plant_store)[("2026-01-05_A", "L1", "SCR")] == 10
    assert cells(plant_store)[("2026-01-05_B", "L2", "SCR")] == 3  # not named: left as it was
    assert sorted(
        query(
            plant_store,
            "SELECT load_id, line, category, old_value, new_value FROM count_correction",
        ),
        key=repr,
    ) == sorted(
        [(report.load_id, "L1", "SCR", 12, 10), (report.load_id, "L1", None, 4800, 5000)], key=repr
    )
    assert query(plant_store, f"SELECT corrections FROM load WHERE id = {report.load_id}") == [(2,)]


def test_events_and_counts_do_not_mix_on_one_shift_and_line(plant_store, tmp_path):
    load_counts_file(
        plant_store.engine, plant_store.config, write(tmp_path, "c.csv", COUNTS), now=NOW, **WHO
    )
    before = plant_store.dump()
    ev = write(
        tmp_path,
        "e.csv",
        "timestamp,line,category\n2026-01-05 07:00,L1,SCR\n2026-01-05 07:00,L3,SCR\n",
    )
    with pytest.raises(InputFileError) as err:
        load_events_file(plant_store.engine, plant_store.config, ev, now=NOW, **WHO)
    assert [str(b) for b in err.value.bad_rows] == [
        "line 2: shift 2026-01-05_A line L1 already has per-shift counts (load 1); "
        "events and per-shift counts cannot be mixed for one shift and line"
    ]
    assert plant_store.dump() == before
    load_events_file(plant_store.engine, plant_store.config, ev, now=NOW, skip_bad=True, **WHO)
    counts = write(tmp_path, "c2.csv", "shift,line,category,count\n2026-01-05_A,L3,DNT,1\n")
    with pytest.raises(InputFileError) as err:
        load_counts_file(plant_store.engine, plant_store.config, counts, now=NOW, **WHO)
    assert err.value.bad_rows[0].reason == (
        "shift 2026-01-05_A line L3 has raw defect events (its counts are derived from them); "
        "correct it by loading events, not counts (units inspected alone: qcfit load units)"
    )


def test_skip_bad_loads_good_rows_and_writes_rejects(plant_store, tmp_path):
    path = write(tmp_path, "e.csv", EVENTS + "2026-01-05 09:00,L9,SCR,1\n=cmd(),L1,SCR,1\n")
    report = load_events_file(
        plant_store.engine, plant_store.config, path, now=NOW, skip_bad=True, **WHO
    )
    assert (report.rows_accepted, report.rows_rejected) == (4, 2)
    assert report.rejects_path == str(tmp_path / "e.rejects.csv")
    assert (tmp_path / "e.rejects.csv").read_text(encoding="utf-8") == (
        "line_no,reason,raw\n"
        "6,unknown line 'L9' (not in [lines] of the config),\"2026-01-05 09:00,L9,SCR,1\"\n"
        "7,timestamp '=cmd()' is not an ISO 8601 date and time (e.g. 2026-01-05T06:30:00-06:00 or "
        '2026-01-05 06:30:00),"\'=cmd(),L1,SCR,1"\n'
    )
    assert query(plant_store, "SELECT note FROM load") == [
        (f"rejects: {tmp_path / 'e.rejects.csv'}",)
    ]



@pytest.mark.skipif(sys.platform == "win32", reason="POSIX rename semantics (open file kept)")
def test_rejects_file_is_replaced_whole_not_rewritten_in_place(plant_store, tmp_path):
    folder = tmp_path / "in"
    folder.mkdir()
    # A reader that opened the previous rejects file keeps reading all of it (the new file is
    # renamed over the name, not written into the old one), and no temporary file is left.
    target = folder / "e.rejects.csv"
    target.write_text("line_no,reason,raw\n9,old reason,old row\n", encoding="utf-8")
    target.chmod(0o640)
    path = write(folder, "e.csv", EVENTS + "2026-01-05 09:00,L9,SCR,1\n")
    with target.open(encoding="utf-8") as reader:
        report = load_events_file(
            plant_store.engine, plant_store.config, path, now=NOW, skip_bad=True, **WHO
        )
        assert reader.read() == "line_no,reason,raw\n9,old reason,old row\n"
    assert report.rejects_path == str(target)
    assert target.read_text(encoding="utf-8").splitlines()[1].startswith("6,unknown line 'L9'")
    assert target.stat().st_mode & 0o777 == 0o640  # the replaced file's permissions are kept
    assert sorted(p.name for p in folder.iterdir()) == ["e.csv", "e.rejects.csv"]


def test_rejects_file_that_cannot_be_written_leaves_nothing(plant_store, tmp_path):
    folder = tmp_path / "in"
    folder.mkdir()
    before = plant_store.dump()
    (folder / "e.rejects.csv").mkdir()  # the name is taken by a folder
    (folder / "e.rejects.csv" / "keep").write_text("x", encoding="utf-8")
    path = write(folder, "e.csv", EVENTS + "2026-01-05 09:00,L9,SCR,1\n")
    with pytest.raises(InvalidArgumentError, match="--rejects: cannot write .*e.rejects.csv"):
        load_events_file(
            plant_store.engine, plant_store.config, path, now=NOW, skip_bad=True, **WHO
        )
    assert plant_store.dump() == before
    assert sorted(p.name for p in folder.iterdir()) == ["e.csv", "e.rejects.csv"]


def test_dst_nights_in_the_plant_zone(plant_store, tmp_path):
    """One event per UTC half hour across both 2026 clock changes (America/Chicago: spring
    2026-03-08, autumn 2026-11-01): night shift C lasts 7 h and 9 h, so it holds 14 and 18
    events, and the events' instants survive the store round trip (naive times in the
    repeated hour resolved with ``ambiguous``)."""
    rows = []  # from shift B (19:00 local) to the end of shift C (Sunday: no shift after it)
    for start, n in (
        (dt.datetime(2026, 3, 8, 1, tzinfo=dt.UTC), 20),
        (dt.datetime(2026, 11, 1, 1, tzinfo=dt.UTC), 22),
    ):
        rows += [start + dt.timedelta(minutes=30 * k) for k in range(n)]
    text = "timestamp,line,category\n" + "".join(f"{t.isoformat()},L1,SCR\n" for t in rows)
    load_events_file(
        plant_store.engine, plant_store.config, write(tmp_path, "dst.csv", text), now=NOW, **WHO
    )
    got = cells(plant_store)
    assert got[("2026-03-07_C", "L1", "SCR")] == 14
    assert got[("2026-10-31_C", "L1", "SCR")] == 18
    stored = [r[0] for r in query(plant_store, "SELECT ts_utc FROM defect_event ORDER BY ts_utc")]
    shifts = {
        r
        for r in query(plant_store, "SELECT shift_date, shift_name, start_utc, end_utc FROM shift")
    }
    assert ("2026-10-31", "C", "2026-11-01 03:00:00.000000", "2026-11-01 12:00:00.000000") in shifts
    assert stored == [t.strftime("%Y-%m-%d %H:%M:%S.%f") for t in rows]
    later = write(tmp_path, "naive.csv", "timestamp,line,category\n2026-11-01 01:30,L2,SCR\n")
    load_events_file(
        plant_store.engine, plant_store.config, later, now=NOW, ambiguous="later", **WHO
    )
    assert query(plant_store, "SELECT ts_utc FROM defect_event WHERE line = 'L2'") == [
        ("2026-11-01 07:30:00.000000",)
    ]


def test_read_counts_filters_by_local_start_date_and_line(plant_store, tmp_path):
    load_events_file(
        plant_store.engine, plant_store.config, write(tmp_path, "e.csv", EVENTS), now=NOW, **WHO
    )
    with read_tx(plant_store.engine) as conn:
        frame = read_counts(
            conn, since=dt.date(2026, 1, 5), until=dt.date(2026, 1, 5), lines=["L2"], tz=CHICAGO
        )
        assert read_counts(conn, since=dt.date(2026, 1, 6), tz=CHICAGO).empty
    assert frame.to_dict("records") == [
        {
            "shift_date": dt.date(2026, 1, 5),
            "shift_name": "B",
            "shift_start": dt.datetime(2026, 1, 5, 14, tzinfo=CHICAGO),
            "shift_end": dt.datetime(2026, 1, 5, 22, tzinfo=CHICAGO),
            "line": "L2",
            "category": "SCR",
            "count": 1,
        }
    ]


def test_reading_many_shifts_from_a_store_without_tables_says_so(tmp_path):
    """The count cells are read through the driver's cursor for speed, but the statement runs
    through SQLAlchemy: a database error is still the plain-language store error."""
    from qcfit.errors import SchemaError
    from qcfit.store.engine import make_engine

    engine = make_engine(f"sqlite:///{tmp_path / 'empty.sqlite'}")
    with pytest.raises(SchemaError, match="qcfit init"), read_tx(engine) as conn:
        shift_tables(conn, [1, 2], ["L1"], ["SCR"])
    engine.dispose()


def test_an_error_while_fetching_many_shifts_is_a_store_error(plant_store):
    """The driver's error raised after the statement started (here: an interrupt from a
    progress handler) is translated like any other database error."""
    from qcfit.errors import StoreError

    path = plant_store.config_path.parent / "counts.csv"
    days = [dt.date(2026, 1, 5) + dt.timedelta(days=d) for d in range(40)]
    days = [d for d in days if d.weekday() != 6]  # the test plant makes nothing on Sundays
    rows = "".join(f"{day.isoformat()}_{name},{line},{cat},3,4800\n" for day in days
                   for name in ("A", "B") for line in ("L1", "L2") for cat in ("SCR", "DNT", "FL"))
    path.write_text("shift,line,category,count,units_inspected\n" + rows, encoding="utf-8")
    load_counts_file(plant_store.engine, plant_store.config, path,
                     now=dt.datetime(2026, 3, 1, tzinfo=dt.UTC))
    calls = {"n": 0}

    def interrupt_once_running() -> int:
        calls["n"] += 1
        return 1 if calls["n"] > 10 else 0

    with pytest.raises(StoreError, match="interrupted"), read_tx(plant_store.engine) as conn:
        ids = [r.row_id for r in shift_rows_of(conn, [f"{d.isoformat()}_A" for d in days]).values()]
        raw = conn.connection.driver_connection
        raw.set_progress_handler(interrupt_once_running, 20)
        try:
            shift_tables(conn, ids, ["L1", "L2"], ["SCR", "DNT", "FL"])
        finally:
            raw.set_progress_handler(None, 0)

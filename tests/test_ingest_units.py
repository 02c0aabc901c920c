"""Loading units inspected (``shift,line,units_inspected``) into a real SQLite store: the rate
test of an events-only plant gets its units; bad rows, idempotence, corrections, skip-bad and
the one-transaction rule as for the other file kinds."""

from __future__ import annotations

import datetime as dt
import sqlite3

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from qcfit.calendar import ShiftCalendar
from qcfit.errors import InputFileError, InvalidArgumentError
from qcfit.evaluate import rate_lines
from qcfit.ingest import load_counts_file, load_events_file, load_units_file
from qcfit.model import BaselineRef, CountTable
from qcfit.store.defects import shift_table, unit_cells
from qcfit.store.engine import read_tx
from qcfit.store.shifts import shift_row

NOW = dt.datetime(2026, 12, 1, 12, tzinfo=dt.UTC)
WHO = {"os_user": "alice", "host": "qc-pc-1"}
LINES = ("L1", "L2", "L3", "L4")
CATS = ("SCR", "DNT", "FL", "SH", "BUR", "OTH")

EVENTS = (
    "timestamp,line,category,quantity\n"
    "2026-01-05T06:30:00-06:00,L1,SCR,2\n"
    "2026-01-05T07:10:00-06:00,L1,DNT,1\n"
    "2026-01-05T08:00:00-06:00,L2,SCR,3\n"
    "2026-01-05T15:00:00-06:00,L2,SCR,1\n"
)
UNITS = "shift,line,units_inspected\n2026-01-05_A,L1,4800\n2026-01-05_A,L2,5100\n"


def write(tmp_path, name: str, text: str):
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def query(store, sql: str) -> list[tuple]:
    with sqlite3.connect(store.url.removeprefix("sqlite:///")) as con:
        return con.execute(sql).fetchall()


def table_of(store, shift_id: str) -> tuple[np.ndarray, np.ndarray]:
    with read_tx(store.engine) as conn:
        row = shift_row(conn, shift_id)
        return shift_table(conn, row.row_id, LINES, CATS)


def load_units(store, path, **kw):
    return load_units_file(store.engine, store.config, path, now=NOW, **WHO, **kw)


def load_events(store, tmp_path, text: str = EVENTS):
    return load_events_file(
        store.engine, store.config, write(tmp_path, "e.csv", text), now=NOW, **WHO
    )


# ------------------------------------------------------------------------------ happy paths


def test_units_after_events_give_the_rate_test_its_units(plant_store, tmp_path):
    load_events(plant_store, tmp_path)
    counts, units = table_of(plant_store, "2026-01-05_A")
    assert np.isnan(units).all()  # events alone: no rate test can run
    report = load_units(plant_store, write(tmp_path, "u.csv", UNITS))
    assert (report.kind, report.rows_read, report.rows_accepted, report.rows_rejected) == (
        "units",
        2,
        2,
        0,
    )
    assert (report.units_written, report.units_unchanged, report.corrections) == (2, 0, 0)
    assert report.shifts == ("2026-01-05_A",)
    after, units = table_of(plant_store, "2026-01-05_A")
    assert units[:2].tolist() == [4800.0, 5100.0] and np.isnan(units[2:]).all()
    assert after.tolist() == counts.tolist()  # units are not counts: the cells stay as they were
    assert report.summary() == [
        f"{tmp_path / 'u.csv'}: loaded 2 of 2 row(s) as load 2; 1 shift(s), 2 units inspected "
        "value(s) written, 0 correction(s)"
    ]
    assert query(
        plant_store, "SELECT kind, os_user, host, rows_accepted FROM load ORDER BY id"
    ) == [
        ("events", "alice", "qc-pc-1", 4),
        ("units", "alice", "qc-pc-1", 2),
    ]


def test_rate_test_runs_once_units_are_loaded(plant_store, tmp_path):
    """The evaluation's rate step (qcfit.evaluate.rate_lines) skips lines without units; with
    the units file loaded it tests L1 and L2 against the baseline rate 0.012."""
    config = plant_store.config
    shift = ShiftCalendar.from_config(config).instance(dt.date(2026, 1, 5), "A")
    baseline = BaselineRef(
        1, "plant", dt.date(2026, 1, 5), CATS, (0.3, 0.25, 0.15, 0.12, 0.1, 0.08), 0.012
    )

    def rate_findings():
        counts, units = table_of(plant_store, shift.id)
        table = CountTable(shift, LINES, CATS, counts, units)
        return rate_lines(table, {li: baseline for li in LINES}, config.thresholds)

    load_events(plant_store, tmp_path)
    assert rate_findings() == []
    load_units(plant_store, write(tmp_path, "u.csv", UNITS))
    found = {f.line: f for f in rate_findings()}
    assert sorted(found) == ["L1", "L2"]
    assert found["L1"].n == 3 and found["L1"].details["units"] == 4800.0
    assert found["L1"].details["expected_defects"] == pytest.approx(4800 * 0.012)
    assert found["L2"].n == 3 and found["L2"].details["units"] == 5100.0


def test_units_before_events_and_for_a_line_without_defects(plant_store, tmp_path):
    """Units may come first, and for a line with no defect at all (its rate test then has
    0 defects in its units); events loaded afterwards are not blocked by them."""
    text = UNITS + "2026-01-05_A,L3,3900\n"
    load_units(plant_store, write(tmp_path, "u.csv", text))
    report = load_events(plant_store, tmp_path)
    assert report.rows_rejected == 0
    counts, units = table_of(plant_store, "2026-01-05_A")
    assert units[:3].tolist() == [4800.0, 5100.0, 3900.0]
    assert counts[2].tolist() == [0] * len(CATS)
    assert counts[0].tolist() == [2, 1, 0, 0, 0, 0]


def test_units_for_lines_counted_by_a_counts_file(plant_store, tmp_path):
    counts = write(
        tmp_path,
        "c.csv",
        "shift,line,category,count,units_inspected\n2026-01-05_B,L3,FL,4,\n"
        "2026-01-05_B,L4,FL,1,2000\n",
    )
    load_counts_file(plant_store.engine, plant_store.config, counts, now=NOW, **WHO)
    report = load_units(
        plant_store,
        write(tmp_path, "u.csv", "shift,line,units_inspected\n2026-01-05_B,L3,4100\n"),
    )
    assert (report.units_written, report.corrections) == (1, 0)
    _, units = table_of(plant_store, "2026-01-05_B")
    assert units[2:].tolist() == [4100.0, 2000.0]


def test_a_counts_file_after_events_still_says_where_units_go(plant_store, tmp_path):
    load_events(plant_store, tmp_path)
    path = write(
        tmp_path, "c.csv", "shift,line,category,count,units_inspected\n2026-01-05_A,L1,SCR,2,4800\n"
    )
    with pytest.raises(InputFileError) as err:
        load_counts_file(plant_store.engine, plant_store.config, path, now=NOW, **WHO)
    assert [str(b) for b in err.value.bad_rows] == [
        "line 2: shift 2026-01-05_A line L1 has raw defect events (its counts are derived from "
        "them); correct it by loading events, not counts (units inspected alone: qcfit load units)"
    ]


# --------------------------------------------------------------------------------- bad rows

BAD_CASES = [
    pytest.param("2026-01-05_A,L1,-5\n", "units_inspected '-5' is negative", id="negative"),
    pytest.param(
        "2026-01-05_A,L1,4800.5\n", "units_inspected '4800.5' is not a whole number", id="fraction"
    ),
    pytest.param(
        "2026-01-05_A,L1,4800.0\n",
        "units_inspected '4800.0' must be written as a whole number with digits only (no sign, "
        "decimals or exponent)",
        id="whole-float",
    ),
    pytest.param(
        "2026-01-05_A,L1,1000000001\n",
        "units_inspected 1000000001 is larger than 1,000,000,000 (not a plausible count for one "
        "row: a unit or export error?)",
        id="over-cap",
    ),
    pytest.param("2026-01-05_A,L1,\n", "units_inspected is empty", id="empty"),
    pytest.param("2026-01-05_A,L1,n/a\n", "units_inspected 'n/a' is not a number", id="text"),
    pytest.param(
        "2026-01-05_A,L9,10\n", "unknown line 'L9' (not in [lines] of the config)", id="line"
    ),
    pytest.param(
        "2026-01-05_A,l1,10\n",
        "unknown line 'l1' (codes are case-sensitive: did you mean 'L1'?)",
        id="line-case",
    ),
    pytest.param(
        "05.01.2026_A,L1,10\n",
        "shift '05.01.2026_A' is not a shift id (start date and shift name, e.g. 2026-01-05_A)",
        id="shift-id",
    ),
    pytest.param(
        "2026-12-02_A,L1,10\n",
        "shift '2026-12-02_A' has not started yet (it starts 2026-12-02T06:00:00-06:00)",
        id="future-shift",
    ),
    pytest.param(",L1,10\n", "shift is empty", id="no-shift"),
]


@pytest.mark.parametrize("row,reason", BAD_CASES)
def test_a_bad_row_rejects_the_file_and_leaves_the_store(plant_store, tmp_path, row, reason):
    load_events(plant_store, tmp_path)
    before = plant_store.dump()
    path = write(tmp_path, "u.csv", UNITS + row)
    with pytest.raises(InputFileError) as err:
        load_units(plant_store, path)
    assert [str(b) for b in err.value.bad_rows] == [f"line 4: {reason}"]
    assert err.value.exit_code == 2
    assert plant_store.dump() == before


def test_every_bad_row_is_listed_with_its_line(plant_store, tmp_path):
    before = plant_store.dump()
    path = write(
        tmp_path,
        "u.csv",
        "shift,line,units_inspected\n"
        "2026-01-05_A,L1,4800\n"
        "2026-01-05_A,L1,4800\n"  # same key, same value: still a second statement
        "2026-01-05_A,L2,-1\n"
        "2026-01-05_B,L2,5000,7\n"
        "2026-01-05_B,L1,5000\n"
        "2026-01-05_B, L1,4900\n",
    )
    with pytest.raises(InputFileError) as err:
        load_units(plant_store, path)
    assert str(err.value).splitlines() == [
        f"{path}: 4 bad row(s), nothing was loaded:",
        f"  {path}: line 3: duplicate of line 2 (same shift and line)",
        f"  {path}: line 4: units_inspected '-1' is negative",
        f"  {path}: line 5: expected 3 fields, found 4",
        f"  {path}: line 7: duplicate of line 6 (same shift and line)",
    ]
    assert plant_store.dump() == before


@pytest.mark.parametrize(
    "text,reason",
    [
        pytest.param(
            "shift,line,units\n2026-01-05_A,L1,10\n",
            "line 1 (header): missing column(s) 'units_inspected'; unknown column(s) 'units'; "
            "expected columns shift,line,units_inspected",
            id="column-name",
        ),
        pytest.param(
            "shift,line,category,units_inspected\n2026-01-05_A,L1,SCR,10\n",
            "line 1 (header): unknown column(s) 'category'; expected columns "
            "shift,line,units_inspected",
            id="counts-like",
        ),
        pytest.param(
            "shift,line,units_inspected\n",
            "the file has a header (line 1) but no data rows",
            id="header-only",
        ),
    ],
)
def test_file_level_faults(plant_store, tmp_path, text, reason):
    before = plant_store.dump()
    path = write(tmp_path, "u.csv", text)
    with pytest.raises(InputFileError) as err:
        load_units(plant_store, path)
    assert str(err.value) == f"{path}: {reason}"
    assert plant_store.dump() == before


def test_now_must_be_aware(plant_store, tmp_path):
    with pytest.raises(InvalidArgumentError, match="now: must be a timezone-aware datetime"):
        load_units_file(
            plant_store.engine,
            plant_store.config,
            write(tmp_path, "u.csv", UNITS),
            now=dt.datetime(2026, 12, 1),
        )


# ------------------------------------------------------------ idempotence and corrections


def test_same_file_twice_changes_nothing(plant_store, tmp_path):
    path = write(tmp_path, "u.csv", UNITS)
    first = load_units(plant_store, path)
    before = plant_store.dump()
    again = load_units_file(
        plant_store.engine, plant_store.config, path, now=NOW + dt.timedelta(hours=2)
    )
    assert again.already_loaded and again.load_id == first.load_id
    assert again.summary() == [
        f"{path}: already loaded (load {first.load_id} at 2026-12-01 12:00 UTC, same content); "
        "nothing changed"
    ]
    assert plant_store.dump() == before


def test_other_file_with_the_same_values_writes_only_its_audit_row(plant_store, tmp_path):
    load_units(plant_store, write(tmp_path, "u.csv", UNITS))
    report = load_units(plant_store, write(tmp_path, "u2.csv", UNITS + "\n"))
    assert not report.already_loaded
    assert (report.units_written, report.units_unchanged, report.corrections) == (0, 2, 0)
    assert report.summary()[1:] == [
        "units inspected: 2 value(s) already stored as given",
        "note: 1 blank line(s) ignored",
    ]
    assert query(plant_store, "SELECT count(*) FROM count_correction") == [(0,)]
    assert query(plant_store, "SELECT count(*) FROM units_inspected") == [(2,)]


def test_restated_units_are_a_correction_in_the_audit_trail(plant_store, tmp_path):
    load_events(plant_store, tmp_path)
    first = load_units(plant_store, write(tmp_path, "u.csv", UNITS))
    fix = write(
        tmp_path,
        "fix.csv",
        "shift,line,units_inspected\n2026-01-05_A,L1,4850\n2026-01-05_A,L2,5100\n"
        "2026-01-05_B,L2,5200\n",
    )
    report = load_units(plant_store, fix)
    assert (report.units_written, report.units_unchanged, report.corrections) == (2, 1, 1)
    _, units = table_of(plant_store, "2026-01-05_A")
    assert units[:2].tolist() == [4850.0, 5100.0]
    assert query(
        plant_store,
        "SELECT c.load_id, s.shift_date, s.shift_name, c.line, c.category, c.old_value, "
        "c.new_value FROM count_correction c JOIN shift s ON s.id = c.shift_id",
    ) == [(report.load_id, "2026-01-05", "A", "L1", None, 4800, 4850)]
    assert query(plant_store, "SELECT id, kind, corrections FROM load ORDER BY id") == [
        (1, "events", 0),
        (first.load_id, "units", 0),
        (report.load_id, "units", 1),
    ]
    assert query(
        plant_store, "SELECT line, units, load_id FROM units_inspected ORDER BY shift_id, line"
    ) == [
        ("L1", 4850, report.load_id),
        ("L2", 5100, first.load_id),  # unchanged: keeps the load that stated it first
        ("L2", 5200, report.load_id),
    ]


def test_units_file_corrects_units_a_counts_file_gave(plant_store, tmp_path):
    counts = write(
        tmp_path,
        "c.csv",
        "shift,line,category,count,units_inspected\n2026-01-05_A,L3,SCR,12,4800\n"
        "2026-01-05_A,L3,DNT,0,4800\n",
    )
    load_counts_file(plant_store.engine, plant_store.config, counts, now=NOW, **WHO)
    report = load_units(
        plant_store, write(tmp_path, "u.csv", "shift,line,units_inspected\n2026-01-05_A,L3,4700\n")
    )
    assert report.corrections == 1
    assert query(
        plant_store, "SELECT line, category, old_value, new_value FROM count_correction"
    ) == [("L3", None, 4800, 4700)]


# ------------------------------------------------------------------------------- skip-bad


def test_skip_bad_loads_the_good_rows_and_writes_rejects(plant_store, tmp_path):
    path = write(tmp_path, "u.csv", UNITS + "2026-01-05_A,L3,\n2026-01-05_A,L4,=1+2\n")
    report = load_units(plant_store, path, skip_bad=True)
    assert (report.rows_read, report.rows_accepted, report.rows_rejected) == (4, 2, 2)
    target = tmp_path / "u.rejects.csv"
    assert report.rejects_path == str(target)
    assert target.read_text(encoding="utf-8") == (
        "line_no,reason,raw\n"
        '4,units_inspected is empty,"2026-01-05_A,L3,"\n'
        "5,units_inspected '=1+2' is not a number,\"2026-01-05_A,L4,=1+2\"\n"
    )
    assert report.summary()[1:] == [f"2 bad row(s) written to {target}"]
    assert query(plant_store, "SELECT rows_accepted, rows_rejected, note FROM load") == [
        (2, 2, f"rejects: {target}")
    ]
    _, units = table_of(plant_store, "2026-01-05_A")
    assert units[:2].tolist() == [4800.0, 5100.0] and np.isnan(units[2:]).all()


def test_skip_bad_with_no_good_row_still_rejects(plant_store, tmp_path):
    before = plant_store.dump()
    path = write(tmp_path, "u.csv", "shift,line,units_inspected\n2026-01-05_A,L1,-1\n")
    with pytest.raises(InputFileError):
        load_units(plant_store, path, skip_bad=True)
    assert plant_store.dump() == before
    assert not (tmp_path / "u.rejects.csv").exists()


def test_unwritable_rejects_file_rolls_everything_back(plant_store, tmp_path):
    before = plant_store.dump()
    path = write(tmp_path, "u.csv", UNITS + "2026-01-05_A,L3,-1\n")
    target = tmp_path / "missing" / "r.csv"
    with pytest.raises(InvalidArgumentError, match="--rejects: cannot write"):
        load_units(plant_store, path, skip_bad=True, rejects=target)
    assert plant_store.dump() == before


# ------------------------------------------------------------------------------ invariant

_value = st.integers(min_value=0, max_value=10**9)
_keys = [(f"2026-01-0{d}_{s}", li) for d in (5, 6) for s in "ABC" for li in ("L1", "L2")]


@settings(
    max_examples=15, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(
    first=st.dictionaries(st.sampled_from(_keys), _value, min_size=1),
    second=st.dictionaries(st.sampled_from(_keys), _value, min_size=1),
    order=st.randoms(use_true_random=False),
)
def test_stored_units_are_the_last_statement_and_changes_are_corrections(
    tmp_path_factory, plant_config_text, first, second, order
):
    """After two files (rows in any order) each key holds its last stated value, and the
    corrections are exactly the keys the second file changed (old -> new)."""
    from qcfit.config import load_config
    from qcfit.store.engine import make_engine
    from qcfit.store.migrate import init_store

    folder = tmp_path_factory.mktemp("units")
    config_path = write(folder, "plant.toml", plant_config_text)
    config = load_config(config_path)
    engine = make_engine(f"sqlite:///{folder / 's.sqlite'}")
    try:
        init_store(engine, config, os_user="tester", now=NOW)
        for name, values in (("a.csv", first), ("b.csv", second)):
            rows = [f"{s},{li},{v}\n" for (s, li), v in values.items()]
            order.shuffle(rows)
            path = write(folder, name, "shift,line,units_inspected\n" + "".join(rows))
            report = load_units_file(engine, config, path, now=NOW)
        with read_tx(engine) as conn:
            ids = {s: shift_row(conn, s).row_id for s, _ in first | second}
            stored = unit_cells(conn, ids.values())
        names = {v: k for k, v in ids.items()}
        got = {(names[int(s)], li): int(u) for s, li, u in stored.itertuples(index=False)}
        assert got == first | second
        changed = {k for k in second if k in first and first[k] != second[k]}
        assert report.corrections == len(changed)
        with sqlite3.connect(folder / "s.sqlite") as con:
            rows = con.execute(
                "SELECT s.shift_date || '_' || s.shift_name, c.line, c.old_value, c.new_value "
                "FROM count_correction c JOIN shift s ON s.id = c.shift_id"
            ).fetchall()
        assert sorted(rows) == sorted((s, li, first[(s, li)], second[(s, li)]) for s, li in changed)
    finally:
        engine.dispose()

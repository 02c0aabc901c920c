"""``qcfit load``, ``qcfit counts`` and ``qcfit pull`` in-process (CliRunner, real files).

Every rejected input: exact message, exit code 2, and the store exactly as before (a dump
of every table compared).
"""

from __future__ import annotations

import csv
import io
import json

import pytest
from click.testing import CliRunner

from qcfit.cli import main

GOOD = "timestamp,line,category,quantity\n2026-01-05T06:30:00-06:00,L1,SCR,2\n2026-01-05 07:00,L2,DNT,1\n"


def run(store, *args: str):
    result = CliRunner().invoke(main, ["--config", str(store.config_path), *args])
    return result


def put(tmp_path, name: str, data: str | bytes):
    path = tmp_path / name
    path.write_bytes(data if isinstance(data, bytes) else data.encode("utf-8"))
    return path


HEADER = "timestamp,line,category,quantity\n"
EVENT_CASES = [
    pytest.param(
        HEADER + "2026-01-05 07:00,L9,SCR,1\n",
        ["line 2: unknown line 'L9' (not in [lines] of the config)"],
        id="unknown-line",
    ),
    pytest.param(
        HEADER + "2026-01-05 07:00,L1,XX,1\n",
        ["line 2: unknown category 'XX' (not in [categories] of the config)"],
        id="unknown-category",
    ),
    pytest.param(
        HEADER + "2026-01-05 07:00,L1,SCR,-1\n",
        ["line 2: quantity '-1' is negative"],
        id="negative",
    ),
    pytest.param(
        HEADER + "2026-01-05 07:00,L1,SCR,0.5\n",
        ["line 2: quantity '0.5' is not a whole number"],
        id="fractional",
    ),
    pytest.param(
        HEADER + "2026-01-05 07:00,L1,SCR,1000000000000\n",
        [
            "line 2: quantity 1000000000000 is larger than 1,000,000,000 (not a plausible count for one row: a unit or export error?)"
        ],
        id="ten-to-the-twelve",
    ),
    pytest.param(
        HEADER + "yesterday,L1,SCR,1\n",
        [
            "line 2: timestamp 'yesterday' is not an ISO 8601 date and time (e.g. 2026-01-05T06:30:00-06:00 or 2026-01-05 06:30:00)"
        ],
        id="bad-timestamp",
    ),
    pytest.param(
        HEADER + "2026-11-01 01:30,L1,SCR,1\n",
        [
            "line 2: timestamp '2026-11-01 01:30' occurs twice in America/Chicago (the clocks repeat that hour); give the offset, or load with --ambiguous earlier|later"
        ],
        id="ambiguous",
    ),
    pytest.param(
        HEADER + "2026-01-05 07:00,L1,SCR,1\n2026-01-05T13:00Z,L1,SCR,2\n",
        [
            "line 3: duplicate of line 2 (same timestamp, line and category; put the total in quantity)"
        ],
        id="duplicate-key",
    ),
    pytest.param(
        HEADER + "2026-01-05 07:00,L1,SCR,1\n2026-01-05 08:00,L1\n2026-01-05 09:00,L1,SCR,1,9\n",
        ["line 3: expected 4 fields, found 2", "line 4: expected 4 fields, found 5"],
        id="malformed-fields",
    ),
    pytest.param(
        HEADER + '2026-01-05 07:00,L1,SCR,1\n"2026-01-05 08:00"x,L1,SCR,1\n',
        ["line 3: malformed CSV (',' expected after '\"'); check the quotes on this line"],
        id="malformed-quote",
    ),
    pytest.param(
        (HEADER + "2026-01-05 07:00,Lé,SCR,1\n").encode("cp1252"),
        [
            "line 2: not UTF-8 text (byte 0xE9 at column 19); save the file as UTF-8 (in a spreadsheet: CSV UTF-8)"
        ],
        id="not-utf8",
    ),
]


@pytest.mark.parametrize("content,rows", EVENT_CASES)
def test_bad_event_files_are_rejected_whole(plant_store, tmp_path, content, rows):
    run(plant_store, "load", "events", str(put(tmp_path, "ok.csv", GOOD)))
    before = plant_store.dump()
    path = put(tmp_path, "bad.csv", content)
    result = run(plant_store, "load", "events", str(path))
    assert result.exit_code == 2
    expected = [f"Error: {path}: {len(rows)} bad row(s), nothing was loaded:"] + [
        f"  {path}: {r}" for r in rows
    ]
    assert result.stderr.splitlines() == expected
    assert result.stdout == ""
    assert plant_store.dump() == before


@pytest.mark.parametrize(
    "content,reason",
    [
        pytest.param(b"", "the file is empty (expected a header line and data rows)", id="empty"),
        pytest.param(HEADER, "the file has a header (line 1) but no data rows", id="header-only"),
        pytest.param(
            "timestamp,line\n2026-01-05 07:00,L1\n",
            "line 1 (header): missing column(s) 'category'; expected columns timestamp,line,category[,quantity]",
            id="missing-column",
        ),
    ],
)
def test_bad_files_name_the_reason(plant_store, tmp_path, content, reason):
    before = plant_store.dump()
    path = put(tmp_path, "bad.csv", content)
    result = run(plant_store, "load", "events", str(path))
    assert (result.exit_code, result.stderr) == (2, f"Error: {path}: {reason}\n")
    assert plant_store.dump() == before


def test_missing_file(plant_store, tmp_path):
    result = run(plant_store, "load", "counts", str(tmp_path / "nope.csv"))
    assert (result.exit_code, result.stderr) == (
        2,
        f"Error: {tmp_path / 'nope.csv'}: no such file\n",
    )


def test_bad_counts_file(plant_store, tmp_path):
    before = plant_store.dump()
    path = put(
        tmp_path,
        "c.csv",
        "shift,line,category,count\n2026-01-05_A,L1,SCR,3\n2026-01-05_A,L1,SCR,4\n"
        "2026-01-05_A, L1 ,DNT,1e3\n",
    )
    result = run(plant_store, "load", "counts", str(path))
    assert result.exit_code == 2
    assert result.stderr.splitlines() == [
        f"Error: {path}: 2 bad row(s), nothing was loaded:",
        f"  {path}: line 3: duplicate of line 2 (same shift, line and category)",
        f"  {path}: line 4: count '1e3' must be written as a whole number with digits only (no sign, decimals or exponent)",
    ]
    assert plant_store.dump() == before


def test_accepted_quirks_are_said(plant_store, tmp_path):
    path = put(
        tmp_path, "e.csv", "\ufefftimestamp,line,category\n2026-01-05T13:30:00+01:00, L1 ,SCR\n"
    )
    result = run(plant_store, "load", "events", str(path))
    assert result.exit_code == 0, result.output
    assert result.stdout.splitlines() == [
        f"{path}: loaded 1 of 1 row(s) as load 1; 1 shift(s), 1 count cell(s) written, 0 correction(s)",
        "events: 1 added, 0 already stored, 0 restated with a new quantity",
        "note: a UTF-8 byte-order mark at the start was removed",
        "note: 1 cell(s) had surrounding spaces, which were removed",
        "note: 1 timestamp(s) carried an offset other than America/Chicago's and were converted to plant time",
    ]


def test_second_load_is_reported_and_changes_nothing(plant_store, tmp_path):
    path = put(tmp_path, "e.csv", GOOD)
    assert run(plant_store, "load", "events", str(path)).exit_code == 0
    before = plant_store.dump()
    result = run(plant_store, "load", "events", str(path))
    assert result.exit_code == 0
    assert result.stdout.startswith(f"{path}: already loaded (load 1 at ")
    assert result.stdout.endswith("UTC, same content); nothing changed\n")
    assert plant_store.dump() == before


def test_skip_bad_prints_the_rejects_path(plant_store, tmp_path):
    path = put(tmp_path, "e.csv", GOOD + "2026-01-05 07:00,L9,SCR,1\n")
    target = tmp_path / "out" / "bad-rows.csv"
    target.parent.mkdir()
    result = run(plant_store, "load", "events", str(path), "--skip-bad", "--rejects", str(target))
    assert result.exit_code == 0
    assert f"1 bad row(s) written to {target}" in result.stdout.splitlines()
    rows = list(csv.DictReader(io.StringIO(target.read_text(encoding="utf-8"))))
    assert rows == [
        {
            "line_no": "4",
            "reason": "unknown line 'L9' (not in [lines] of the config)",
            "raw": "2026-01-05 07:00,L9,SCR,1",
        }
    ]


def test_ambiguous_option(plant_store, tmp_path):
    path = put(tmp_path, "e.csv", "timestamp,line,category\n2026-11-01 01:30,L1,SCR\n")
    assert run(plant_store, "load", "events", str(path), "--ambiguous", "earlier").exit_code == 0
    out = json.loads(run(plant_store, "counts", "--format", "json").stdout)
    assert [(r["shift_date"], r["shift_name"], r["count"]) for r in out] == [("2026-10-31", "C", 1)]


def test_counts_formats(plant_store, tmp_path):
    run(plant_store, "load", "events", str(put(tmp_path, "e.csv", GOOD)))
    run(
        plant_store,
        "load",
        "counts",
        str(put(tmp_path, "c.csv", "shift,line,category,count\n2026-01-05_B,L3,FL,4\n")),
    )
    data = json.loads(run(plant_store, "counts", "--format", "json").stdout)
    assert data[0] == {
        "shift_date": "2026-01-05",
        "shift_name": "A",
        "shift_start": "2026-01-05T06:00:00-06:00",
        "shift_end": "2026-01-05T14:00:00-06:00",
        "line": "L1",
        "category": "SCR",
        "count": 2,
    }
    assert [(r["line"], r["category"], r["count"]) for r in data] == [
        ("L1", "SCR", 2),
        ("L2", "DNT", 1),
        ("L3", "FL", 4),
    ]
    table = run(plant_store, "counts").stdout.splitlines()
    assert table == [
        "shift         line  SCR  DNT  FL  total",
        "2026-01-05_A  L1      2    0   0      2",
        "2026-01-05_A  L2      0    1   0      1",
        "2026-01-05_B  L3      0    0   4      4",
    ]
    text = run(
        plant_store,
        "counts",
        "--format",
        "csv",
        "--line",
        "L3",
        "--since",
        "2026-01-05",
        "--until",
        "2026-01-05",
    ).stdout
    assert text == (
        "shift_date,shift_name,shift_start,shift_end,line,category,count\n"
        "2026-01-05,B,2026-01-05T14:00:00-06:00,2026-01-05T22:00:00-06:00,L3,FL,4\n"
    )


def test_counts_csv_neutralises_formula_cells(
    plant_store, tmp_path, write_config, plant_config_text
):
    text = plant_config_text.replace(
        'OTH = "other"', 'OTH = "other"\n"=X" = "formula-like code"'
    ).replace("OTH = 0.08", 'OTH = 0.07, "=X" = 0.01')
    write_config(tmp_path, text)
    assert run(plant_store, "init").exit_code == 0
    run(
        plant_store,
        "load",
        "counts",
        str(put(tmp_path, "c.csv", "shift,line,category,count\n2026-01-05_A,L1,=X,1\n")),
    )
    out = run(plant_store, "counts", "--format", "csv").stdout
    assert out.splitlines()[1].endswith(",L1,'=X,1")


def test_counts_argument_errors(plant_store):
    assert (
        run(plant_store, "counts", "--line", "L9").stderr
        == "Error: --line: unknown line 'L9'; the config has L1, L2, L3, L4\n"
    )
    assert (
        run(plant_store, "counts", "--since", "5.1.2026").stderr
        == "Error: --since: '5.1.2026' is not a date; write it as 2026-01-05\n"
    )
    result = run(plant_store, "counts", "--since", "2026-02-01", "--until", "2026-01-01")
    assert (result.exit_code, result.stderr) == (
        2,
        "Error: --until: 2026-01-01 is before --since 2026-02-01\n",
    )


def test_pull_without_source_section(plant_store):
    result = run(plant_store, "pull")
    assert result.exit_code == 2
    assert result.stderr.splitlines() == [
        f"Error: config {plant_store.config_path} has 1 problem(s):",
        "  source: no [source] section: give url, query and kind to pull from",
    ]


@pytest.mark.parametrize(
    "args",
    [
        ["load", "events"],
        ["load", "counts"],
        ["load", "units"],
        ["counts"],
        ["pull"],
        ["load"],
        ["loads"],
    ],
)
def test_help(args):
    result = CliRunner().invoke(main, [*args, "--help"])
    assert result.exit_code == 0 and "Usage:" in result.output


def test_failure_late_in_the_load_leaves_nothing(plant_store, tmp_path):
    """The rejects file is written inside the load's transaction: when it cannot be written,
    the events, counts, shifts and audit row written before it are rolled back."""
    before = plant_store.dump()
    path = put(tmp_path, "e.csv", GOOD + "2026-01-05 07:00,L9,SCR,1\n")
    target = tmp_path / "no-such-dir" / "rejects.csv"
    result = run(plant_store, "load", "events", str(path), "--skip-bad", "--rejects", str(target))
    assert (result.exit_code, result.stderr) == (
        2,
        f"Error: --rejects: cannot write {target}: No such file or directory\n",
    )
    assert plant_store.dump() == before


def test_loads_shows_the_audit_trail(plant_store, tmp_path):
    path = put(tmp_path, "e.csv", GOOD)
    assert run(plant_store, "loads").stdout == "no loads yet\n"
    run(plant_store, "load", "events", str(path))
    data = json.loads(run(plant_store, "loads", "--format", "json").stdout)
    assert len(data) == 1
    row = data[0]
    assert (row["kind"], row["rows_accepted"], row["rows_rejected"], row["corrections"]) == (
        "events",
        2,
        0,
        0,
    )
    assert row["source"] == str(path.resolve()) and len(row["sha256"]) == 64
    table = run(plant_store, "loads").stdout
    assert "events  2 ok, 0 bad, 0 corr." in table and row["sha256"][:12] in table


# ------------------------------------------------------------------------ qcfit load units

UNITS = "shift,line,units_inspected\n2026-01-05_A,L1,4800\n2026-01-05_A,L2,5100\n"


def _units_of(store) -> list[tuple]:
    import sqlite3

    with sqlite3.connect(store.url.removeprefix("sqlite:///")) as con:
        return con.execute(
            "SELECT s.shift_date || '_' || s.shift_name, u.line, u.units FROM units_inspected u "
            "JOIN shift s ON s.id = u.shift_id ORDER BY 1, 2"
        ).fetchall()


def test_load_units_after_events(plant_store, tmp_path):
    assert run(plant_store, "load", "events", str(put(tmp_path, "e.csv", GOOD))).exit_code == 0
    path = put(tmp_path, "u.csv", UNITS)
    result = run(plant_store, "load", "units", str(path))
    assert (result.exit_code, result.stderr) == (0, "")
    assert result.stdout.splitlines() == [
        f"{path}: loaded 2 of 2 row(s) as load 2; 1 shift(s), 2 units inspected value(s) "
        "written, 0 correction(s)"
    ]
    assert _units_of(plant_store) == [("2026-01-05_A", "L1", 4800), ("2026-01-05_A", "L2", 5100)]
    rows = json.loads(run(plant_store, "loads", "--format", "json").stdout)
    assert [(r["kind"], r["rows_accepted"], r["corrections"]) for r in rows] == [
        ("units", 2, 0),
        ("events", 2, 0),
    ]
    assert "units   2 ok, 0 bad, 0 corr." in run(plant_store, "loads").stdout


def test_load_units_bad_rows_exit_2_and_store_unchanged(plant_store, tmp_path):
    run(plant_store, "load", "events", str(put(tmp_path, "e.csv", GOOD)))
    before = plant_store.dump()
    path = put(
        tmp_path,
        "u.csv",
        UNITS + "2026-01-05_A,L1,4900\n2026-01-05_B,L3,\n2026-01-05_B,L4,12.5\n"
        "2026-01-05_C,L4,-3\n2026-01-05_C,L1,2000000000\n",
    )
    result = run(plant_store, "load", "units", str(path))
    assert result.exit_code == 2
    assert result.stdout == ""
    assert result.stderr.splitlines() == [
        f"Error: {path}: 5 bad row(s), nothing was loaded:",
        f"  {path}: line 4: duplicate of line 2 (same shift and line)",
        f"  {path}: line 5: units_inspected is empty",
        f"  {path}: line 6: units_inspected '12.5' is not a whole number",
        f"  {path}: line 7: units_inspected '-3' is negative",
        f"  {path}: line 8: units_inspected 2000000000 is larger than 1,000,000,000 (not a "
        "plausible count for one row: a unit or export error?)",
    ]
    assert plant_store.dump() == before


def test_load_units_twice_and_a_correction(plant_store, tmp_path):
    path = put(tmp_path, "u.csv", UNITS)
    assert run(plant_store, "load", "units", str(path)).exit_code == 0
    before = plant_store.dump()
    again = run(plant_store, "load", "units", str(path))
    assert again.exit_code == 0
    assert again.stdout.startswith(f"{path}: already loaded (load 1 at ")
    assert again.stdout.endswith("UTC, same content); nothing changed\n")
    assert plant_store.dump() == before
    fix = put(tmp_path, "fix.csv", UNITS.replace("4800", "4750"))
    result = run(plant_store, "load", "units", str(fix))
    assert result.exit_code == 0
    assert result.stdout.splitlines() == [
        f"{fix}: loaded 2 of 2 row(s) as load 2; 1 shift(s), 1 units inspected value(s) "
        "written, 1 correction(s)",
        "units inspected: 1 value(s) already stored as given",
    ]
    assert _units_of(plant_store) == [("2026-01-05_A", "L1", 4750), ("2026-01-05_A", "L2", 5100)]
    rows = json.loads(run(plant_store, "loads", "--format", "json").stdout)
    assert (rows[0]["kind"], rows[0]["corrections"]) == ("units", 1)


def test_load_units_skip_bad(plant_store, tmp_path):
    path = put(tmp_path, "u.csv", UNITS + "2026-01-05_A,L9,100\n")
    result = run(plant_store, "load", "units", str(path), "--skip-bad")
    assert result.exit_code == 0
    target = tmp_path / "u.rejects.csv"
    assert result.stdout.splitlines()[1:] == [f"1 bad row(s) written to {target}"]
    assert list(csv.DictReader(io.StringIO(target.read_text(encoding="utf-8")))) == [
        {
            "line_no": "4",
            "reason": "unknown line 'L9' (not in [lines] of the config)",
            "raw": "2026-01-05_A,L9,100",
        }
    ]
    assert _units_of(plant_store) == [("2026-01-05_A", "L1", 4800), ("2026-01-05_A", "L2", 5100)]

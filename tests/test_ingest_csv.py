"""Reading CSV bytes into text cells: file-level rejections, notes, exact line numbers."""

from __future__ import annotations

import csv
import io

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from qcfit.errors import BadRow, InputFileError
from qcfit.ingest_csv import (
    _read_by_lines,
    _read_fast,
    _read_with_csv_module,
    raw_records,
    read_table,
)

REQ = ("timestamp", "line", "category")
OPT = ("quantity",)


def read(data: bytes):
    return read_table(data, source="f.csv", required=REQ, optional=OPT)


def test_plain_file_gives_cells_and_line_numbers():
    t = read(b"timestamp,line,category\n2026-01-05 06:00,L1,SCR\n2026-01-05 07:00,L2,DNT\n")
    assert t.columns == REQ
    assert t.frame["line"].tolist() == ["L1", "L2"]
    assert t.line_nos.tolist() == [2, 3]
    assert t.bad_rows == () and t.notes == ()
    assert not t.line_nos.flags.writeable


def test_byte_order_mark_is_removed_and_said():
    t = read(b"\xef\xbb\xbftimestamp,line,category\nx,L1,SCR\n")
    assert t.columns == REQ
    assert t.notes == ("a UTF-8 byte-order mark at the start was removed",)


def test_header_names_ignore_case_and_spaces():
    t = read(b" Timestamp , LINE,category ,Quantity\nx,L1,SCR,2\n")
    assert t.columns == REQ + OPT


def test_not_utf8_lists_every_offending_line():
    data = "timestamp,line,category\nx,L1,SCR\nx,Lé,SCR\nx,L1,Dé\n".encode("latin-1")
    with pytest.raises(InputFileError) as err:
        read(data)
    assert [b.line_no for b in err.value.bad_rows] == [3, 4]
    assert "not UTF-8 text (byte 0xE9 at column 4)" in err.value.bad_rows[0].reason


@pytest.mark.parametrize("data", [b"", b"\xef\xbb\xbf", b"\n\n  \n"])
def test_empty_file_is_rejected(data):
    with pytest.raises(InputFileError) as err:
        read(data)
    assert str(err.value) == "f.csv: the file is empty (expected a header line and data rows)"


@pytest.mark.parametrize(
    "data",
    [b"timestamp,line,category\n", b"timestamp,line,category", b'"timestamp",line,category\n\n'],
)
def test_header_only_is_rejected(data):
    with pytest.raises(InputFileError) as err:
        read(data)
    assert str(err.value) == "f.csv: the file has a header (line 1) but no data rows"


@pytest.mark.parametrize(
    "header,reason",
    [
        ("timestamp,line", "missing column(s) 'category'"),
        ("timestamp,line,category,quantiy", "unknown column(s) 'quantiy'"),
        ("timestamp,line,category,line", "column(s) named twice: 'line'"),
    ],
)
def test_header_problems_reject_the_file(header, reason):
    with pytest.raises(InputFileError) as err:
        read(f"{header}\nx,y,z\n".encode())
    assert str(err.value) == (
        f"f.csv: line 1 (header): {reason}; expected columns timestamp,line,category[,quantity]"
    )


def test_wrong_field_counts_are_bad_rows_on_both_paths():
    body = "timestamp,line,category\na,b,c\na,b\n\na,b,c,d,e\na,b,c\n"
    fast = read(body.encode())
    quoted = read(body.replace("a,b,c\n", '"a",b,c\n').encode())  # forces the csv-module path
    expected = (BadRow(3, "expected 3 fields, found 2"), BadRow(5, "expected 3 fields, found 5"))
    assert fast.bad_rows == expected and quoted.bad_rows == expected
    assert fast.line_nos.tolist() == quoted.line_nos.tolist() == [2, 6]
    assert fast.notes == quoted.notes == ("1 blank line(s) ignored",)


@pytest.mark.parametrize("body", ["a,b,c,d,e\n0\n", "0\na,b,c,d,e\n"])
def test_too_long_and_too_short_lines_that_balance_are_both_found(body):
    """Separator totals match the header here, so the whole-file shortcut must notice."""
    t = read(f"timestamp,line,category\n{body}".encode())
    assert sorted(b.reason for b in t.bad_rows) == [
        "expected 3 fields, found 1",
        "expected 3 fields, found 5",
    ]


def test_quoted_field_spanning_lines_keeps_later_line_numbers():
    t = read(b'timestamp,line,category\n"a\nb",L1,SCR\nc,L2,DNT\n')
    assert t.line_nos.tolist() == [2, 4]
    assert t.frame["timestamp"].tolist() == ["a\nb", "c"]


def test_broken_quote_is_a_bad_row():
    t = read(b'timestamp,line,category\nc,L2,DNT\n"a"x,L1,SCR\nd,L3,FL\n')
    assert [b.line_no for b in t.bad_rows] == [3]
    assert t.bad_rows[0].reason.startswith("malformed CSV (")
    assert t.line_nos.tolist() == [2, 4]


def test_crlf_line_ends():
    t = read(b"timestamp,line,category\r\nx,L1,SCR\r\ny,L2,DNT\r\n")
    assert t.frame["category"].tolist() == ["SCR", "DNT"]
    assert t.line_nos.tolist() == [2, 3]


def test_raw_records_give_original_text_for_rejects():
    t = read(b"timestamp,line,category\r\nx,L1,SCR\r\ny,L2\r\n")
    assert raw_records(t, [3]) == {3: "y,L2"}


_cell = st.text(alphabet="abcXYZ0129 -:.+é", max_size=6)


@settings(max_examples=200, deadline=None)
@given(
    rows=st.lists(
        st.one_of(st.lists(_cell, min_size=3, max_size=3), st.lists(_cell, min_size=1, max_size=5)),
        min_size=1,
        max_size=12,
    ),
    blank_every=st.integers(min_value=0, max_value=4),
)
def test_fast_path_agrees_with_csv_module(rows, blank_every):
    """Invariant: without quotes all three readers give the same cells, line numbers and bad rows."""
    lines = ["timestamp,line,category"]
    for i, r in enumerate(rows):
        if blank_every and i % blank_every == 0:
            lines.append("")
        lines.append(",".join(r))
    text = "\n".join(lines) + "\n"
    outcomes = []
    for reader in (_read_fast, _read_by_lines, _read_with_csv_module):
        try:
            t = reader(text, "f.csv", REQ, OPT, [])
            outcomes.append((t.frame.to_dict("list"), t.line_nos.tolist(), t.bad_rows, t.notes))
        except InputFileError as exc:
            outcomes.append(str(exc))
    assert outcomes[0] == outcomes[1] == outcomes[2]


def test_csv_module_path_matches_a_csv_writer_round_trip():
    """Cells with commas, quotes and line breaks come back exactly as written."""
    rows = [["2026-01-05 06:00", 'L"1', "a,b"], ["x", "y\nz", "w"]]
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(REQ)
    w.writerows(rows)
    t = read(buf.getvalue().encode())
    assert t.frame.to_numpy().tolist() == rows
    assert t.line_nos.tolist() == [2, 3]


def test_header_after_blank_lines_is_named_by_its_line():
    with pytest.raises(InputFileError) as err:
        read(b"\n\ntimestamp,line,category\n")
    assert str(err.value) == "f.csv: the file has a header (line 3) but no data rows"
    t = read(b"\n \ntimestamp,line,category\nx,L1,SCR\n")
    assert t.line_nos.tolist() == [4] and t.notes == ("2 blank line(s) ignored",)

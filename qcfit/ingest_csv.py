"""Reading a CSV file into a table of text cells, with exact line numbers.

The rules (what is rejected as a whole file, what is accepted and reported as a note):

* The bytes must be UTF-8. A file in another encoding is rejected as a whole, naming every
  line that is not valid UTF-8 (skipping those lines would silently drop any row whose codes
  use accented letters). A UTF-8 byte-order mark is accepted and removed (a note says so).
* An empty file (nothing but a BOM or white space) and a file with a header but no data row
  are rejected.
* The first non-blank line is the header. Column names are matched without surrounding
  spaces and case-insensitively. A missing required column, an unknown column or a column
  named twice rejects the file.
* Blank lines are ignored (a note says how many). Every other line is a record: a record
  with more or fewer fields than the header, or with a broken quote, is a bad row.
* Cells are kept as text; what a cell must contain is checked by :mod:`qcfit.ingest_rows`.

Line numbers are 1-based physical lines of the file (the header is line 1 when the file
starts with it); a quoted field that spans lines gives the line its record starts on.

Speed: a file without any double quote goes to pandas' C parser in one piece when its
separator total is exactly what the header needs on every line (the parser itself refuses
a line with too many fields); otherwise it is split and checked line by line first. A file
with quotes goes through the ``csv`` module (exact for quoted separators and line breaks;
about 3 s more per million rows).
"""

from __future__ import annotations

import codecs
import csv
import io
import logging
import warnings
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd

from qcfit.errors import BadRow, InputFileError

log = logging.getLogger(__name__)

DELIMITER = ","


@dataclass(frozen=True, slots=True)
class RawTable:
    """A CSV file split into text cells.

    ``frame`` has one ``str`` column per header column (named by the normalised header) and
    one row per record that has the right number of fields; ``line_nos`` (int64, same
    length, read-only) is the line each of those records starts on. ``bad_rows`` are the
    records that could not be split into the header's fields. ``text`` is the decoded file
    (:func:`raw_records` takes the original text of rejected records from it).
    """

    source: str
    columns: tuple[str, ...]
    frame: pd.DataFrame
    line_nos: np.ndarray
    bad_rows: tuple[BadRow, ...]
    notes: tuple[str, ...]
    text: str

    @property
    def records(self) -> int:
        """Records in the file (good and structurally bad), blank lines not counted."""
        return len(self.frame) + len(self.bad_rows)


def decode_utf8(data: bytes, source: str) -> tuple[str, list[str]]:
    """Decode ``data`` as UTF-8; return the text and notes. Raises InputFileError.

    Every line holding bytes that are not UTF-8 is listed (line number and column of the
    first bad byte of that line).
    """
    notes: list[str] = []
    if data.startswith(codecs.BOM_UTF8):
        data = data[len(codecs.BOM_UTF8) :]
        notes.append("a UTF-8 byte-order mark at the start was removed")
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError:
        raise InputFileError(source, _non_utf8_lines(data)) from None
    if not text.strip():
        raise InputFileError(
            source, reason="the file is empty (expected a header line and data rows)"
        )
    return text, notes


def _non_utf8_lines(data: bytes) -> list[BadRow]:
    bad = []
    for number, line in enumerate(data.split(b"\n"), start=1):
        try:
            line.decode("utf-8")
        except UnicodeDecodeError as exc:
            byte = line[exc.start]
            bad.append(
                BadRow(
                    number,
                    f"not UTF-8 text (byte 0x{byte:02X} at column {exc.start + 1}); "
                    "save the file as UTF-8 (in a spreadsheet: CSV UTF-8)",
                )
            )
    return bad


def read_table(
    data: bytes,
    *,
    source: str,
    required: Sequence[str],
    optional: Sequence[str] = (),
) -> RawTable:
    """Split CSV bytes into a :class:`RawTable`; raises InputFileError for file-level faults.

    ``required``/``optional`` are the lower-case column names the format knows.
    """
    text, notes = decode_utf8(data, source)
    if '"' in text or not _plain_line_ends(text):
        return _read_with_csv_module(text, source, required, optional, notes)
    return _read_fast(text, source, required, optional, notes)


def _plain_line_ends(text: str) -> bool:
    """True when every carriage return is part of a CRLF pair (so lines split on LF)."""
    cr = text.count("\r")
    return cr == 0 or cr == text.count("\r\n")


def _header(
    fields: Sequence[str],
    line_no: int,
    source: str,
    required: Sequence[str],
    optional: Sequence[str],
) -> tuple[str, ...]:
    names = tuple(f.strip().lower() for f in fields)
    known = tuple(required) + tuple(optional)
    expected = ",".join(required) + "".join(f"[,{o}]" for o in optional)
    problems = []
    missing = [c for c in required if c not in names]
    if missing:
        problems.append(f"missing column(s) {', '.join(repr(m) for m in missing)}")
    unknown = [n for n in names if n not in known]
    if unknown:
        problems.append(f"unknown column(s) {', '.join(repr(u) for u in unknown)}")
    twice = sorted({n for n in names if names.count(n) > 1 and n in known})
    if twice:
        problems.append(f"column(s) named twice: {', '.join(repr(t) for t in twice)}")
    if problems:
        raise InputFileError(
            source,
            reason=f"line {line_no} (header): {'; '.join(problems)}; expected columns {expected}",
        )
    return names


def _first_content_line(lines: Sequence[str]) -> int:
    for i, line in enumerate(lines):
        if line.strip():
            return i
    return len(lines)  # unreachable: decode_utf8 rejected blank files


def _read_fast(text: str, source: str, required, optional, notes: list[str]) -> RawTable:
    """Quote-free text: one record per line. The common case (header on line 1, no blank
    line, as many separators as the header needs on every line) is handed to pandas whole;
    anything else is split line by line first."""
    end = text.find("\n")
    head = (text if end < 0 else text[:end]).rstrip("\r")
    if head.strip():
        body = "" if end < 0 else text[end + 1 :]
        columns = _header(head.split(DELIMITER), 1, source, required, optional)
        frame = _whole_body(body, columns)
        if frame is not None:
            line_nos = np.arange(2, 2 + len(frame), dtype=np.int64)
            return _finish(source, columns, frame, line_nos, [], notes, text, 1)
    return _read_by_lines(text, source, required, optional, notes)


def _whole_body(body: str, columns: Sequence[str]) -> pd.DataFrame | None:
    """The body parsed in one go, or None when it needs the line-by-line path."""
    core = body[:-1] if body.endswith("\n") else body
    if not core:
        return None
    records = core.count("\n") + 1
    # Every line needs exactly len(columns) - 1 separators; a blank line has none. Totals
    # that balance (one line short, another long) are caught by the parser below, which
    # refuses any line with too many fields.
    if core.count(DELIMITER) != (len(columns) - 1) * records:
        return None
    try:  # a line with too many fields offset by one with too few: an error or a warning
        with warnings.catch_warnings():
            warnings.simplefilter("error", pd.errors.ParserWarning)
            frame = _parse(io.StringIO(body), columns)
    except (pd.errors.ParserError, pd.errors.ParserWarning):
        return None
    return frame if len(frame) == records else None


def _parse(handle: io.StringIO, columns: Sequence[str]) -> pd.DataFrame:
    return pd.read_csv(
        handle,
        header=None,
        names=list(columns),
        dtype="str",
        keep_default_na=False,
        na_filter=False,
        skip_blank_lines=False,
        index_col=False,
        engine="c",
        quoting=csv.QUOTE_NONE,
    )


def _read_by_lines(text: str, source: str, required, optional, notes: list[str]) -> RawTable:
    lines = text.split("\n")
    if lines and lines[-1] == "":
        lines.pop()
    lines = [line[:-1] if line.endswith("\r") else line for line in lines]
    first = _first_content_line(lines)
    columns = _header(lines[first].split(DELIMITER), first + 1, source, required, optional)
    body = pd.Series(lines[first + 1 :], dtype="str")
    line_nos = np.arange(first + 2, first + 2 + len(body), dtype=np.int64)
    blank = body.str.strip().eq("").to_numpy()
    fields = body.str.count(DELIMITER).to_numpy() + 1
    wrong = ~blank & (fields != len(columns))
    bad = [
        BadRow(int(n), f"expected {len(columns)} fields, found {int(k)}")
        for n, k in zip(line_nos[wrong], fields[wrong], strict=True)
    ]
    keep = ~blank & ~wrong
    kept = body[keep]
    frame = (
        _parse(io.StringIO("\n".join(kept.tolist())), columns)
        if len(kept)
        else _empty_frame(columns)
    )
    if len(frame) != int(keep.sum()):  # the parser disagreed with the line split: be exact
        return _read_with_csv_module(text, source, required, optional, notes)
    _note_blank(notes, int(blank.sum()) + first)  # blank lines before the header too
    return _finish(source, columns, frame, line_nos[keep], bad, notes, text, first + 1)


def _read_with_csv_module(text: str, source: str, required, optional, notes: list[str]) -> RawTable:
    reader = csv.reader(io.StringIO(text, newline=""), strict=True)
    columns: tuple[str, ...] | None = None
    rows: list[list[str]] = []
    line_nos: list[int] = []
    bad: list[BadRow] = []
    blank = 0
    start = header_line = 1
    while True:
        try:
            record = next(reader)
        except StopIteration:
            break
        except csv.Error as exc:
            bad.append(BadRow(start, f"malformed CSV ({exc}); check the quotes on this line"))
            start = reader.line_num + 1
            continue
        if not record or all(not f.strip() for f in record) and len(record) == 1:
            blank += 1
        elif columns is None:
            columns = _header(record, start, source, required, optional)
            header_line = start
        elif len(record) != len(columns):
            bad.append(BadRow(start, f"expected {len(columns)} fields, found {len(record)}"))
        else:
            rows.append(record)
            line_nos.append(start)
        start = reader.line_num + 1
    if columns is None:  # only malformed lines
        raise (
            InputFileError(source, bad)
            if bad
            else InputFileError(source, reason="the file is empty")
        )
    if rows:
        cells = list(zip(*rows, strict=True))
        frame = pd.DataFrame({c: pd.array(cells[i], dtype="str") for i, c in enumerate(columns)})
    else:
        frame = _empty_frame(columns)
    _note_blank(notes, blank)
    return _finish(
        source, columns, frame, np.asarray(line_nos, dtype=np.int64), bad, notes, text, header_line
    )


def _empty_frame(columns: Sequence[str]) -> pd.DataFrame:
    return pd.DataFrame({c: pd.array([], dtype="str") for c in columns})


def _note_blank(notes: list[str], blank: int) -> None:
    if blank:
        notes.append(f"{blank} blank line(s) ignored")


def _finish(source, columns, frame, line_nos, bad, notes, text, header_line: int) -> RawTable:
    if len(frame) == 0 and not bad:
        raise InputFileError(
            source, reason=f"the file has a header (line {header_line}) but no data rows"
        )
    line_nos = np.asarray(line_nos, dtype=np.int64)
    line_nos.setflags(write=False)
    frame = frame.reset_index(drop=True)
    return RawTable(source, tuple(columns), frame, line_nos, tuple(bad), tuple(notes), text)


def raw_records(table: RawTable, line_nos: Sequence[int]) -> dict[int, str]:
    """The original text of the records starting on ``line_nos`` (for a rejects file).

    A record that spans lines (a quoted field with a line break) is given up to the next
    record's first line.
    """
    wanted = sorted(set(int(n) for n in line_nos))
    if not wanted:
        return {}
    lines = table.text.split("\n")
    out = {}
    for n in wanted:
        if 1 <= n <= len(lines):
            out[n] = lines[n - 1].rstrip("\r")
    return out

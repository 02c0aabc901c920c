"""Checking the cells of an events or counts table (pure: no store, no clock, no files).

Everything here is vectorised (pandas/numpy over whole columns) so a million events take
seconds; reasons are formatted only for the rows that are bad. Every problem of a row is
reported (joined with ``; ``), each row once, in line order.

Rules shared by both formats:

* codes (line, category) must be codes of the config, case-sensitive; surrounding spaces
  in any cell are removed and reported in a note;
* counts and quantities are whole numbers written with digits only, 0 ..
  :data:`MAX_COUNT` (10^9). The cap: one shift x line x category cell above a billion is
  not a count a line can produce in one shift (over 30,000 a second), so it is a unit or
  export error; it also keeps a year of summed cells far inside the range where float64
  (used by the statistics) represents integers exactly (2^53).

Events (``timestamp,line,category[,quantity]``):

* ``timestamp`` is ISO 8601 date and time, ``YYYY-MM-DD`` then ``T`` or a space, then
  ``HH:MM[:SS[.ffffff]]``, then optionally ``Z`` or an offset ``+HH:MM`` / ``+HHMM`` /
  ``+HH`` (see :mod:`qcfit.ingest_time`). With an offset it is converted (any zone's
  offset is accepted; a note counts those that differ from the plant zone's offset at
  that instant). Without an offset it is
  plant-local wall time: a time that does not exist (skipped at a spring change) is a bad
  row; one that occurs twice (autumn change) is a bad row unless ``ambiguous`` is
  ``"earlier"`` or ``"later"`` (the first or second occurrence);
* an event later than the load time plus :data:`CLOCK_SKEW` is a bad row (a wrong date or
  offset), and so is one before :data:`EARLIEST` (1970: a typo such as year 0226, or a
  spreadsheet's zero date) or one that falls in no shift (between shifts, or a
  non-production day);
* the key is (instant, line, category): a second row with the same key is a bad row
  (write the total in ``quantity``);
* ``quantity`` is optional (default 1); when the column is there, every cell needs a value.

Counts (``shift,line,category,count[,units_inspected]``):

* ``shift`` is a shift id, ``YYYY-MM-DD_NAME`` (the plant-local date the shift starts on
  and a shift name of the config, not a non-production day); the shift must have started
  by the load time and not before :data:`EARLIEST`;
* the key is (shift, line, category); a second row with the same key is a bad row;
* ``units_inspected`` (optional) is the units inspected on that line in that shift; it may
  be left empty (unknown), and all non-empty cells of one shift and line must agree.

Units inspected (``shift,line,units_inspected``), a file that only states units:

* ``shift`` and ``line`` as in a counts file; the key is (shift, line), and a second row
  with the same key is a bad row (even with the same value: one statement per key);
* ``units_inspected`` is a whole number 0 .. :data:`MAX_COUNT`; an empty cell is a bad row
  (the file exists only to state units).
"""

from __future__ import annotations

import datetime as dt
import re
from collections.abc import Collection, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Protocol
from zoneinfo import ZoneInfo

import numpy as np
import pandas as pd

from qcfit.errors import BadRow, QcfitError
from qcfit.ingest_csv import RawTable
from qcfit.ingest_time import Ambiguous, ParsedStamps, parse_timestamps
from qcfit.model import ShiftInstance

MAX_COUNT = 10**9
CLOCK_SKEW = dt.timedelta(minutes=15)
EARLIEST = dt.datetime(1970, 1, 1, tzinfo=dt.UTC)  # older: a typo ("0226") or a spreadsheet epoch
EVENT_COLUMNS = ("timestamp", "line", "category")
EVENT_OPTIONAL = ("quantity",)
COUNT_COLUMNS = ("shift", "line", "category", "count")
COUNT_OPTIONAL = ("units_inspected",)
UNIT_COLUMNS = ("shift", "line", "units_inspected")
UNIT_OPTIONAL: tuple[str, ...] = ()
AMBIGUOUS_CHOICES = ("raise", "earlier", "later")

_SHIFT_ID_RE = re.compile(r"(\d{4}-\d\d-\d\d)_(\S+)")
_DIGITS_RE = re.compile(r"\d+")


class Calendar(Protocol):
    """What validation needs of :class:`qcfit.calendar.ShiftCalendar`."""

    tz: ZoneInfo

    def assign(self, ts_utc: np.ndarray) -> tuple[list[ShiftInstance], np.ndarray]: ...

    def instance(self, date: dt.date, name: str) -> ShiftInstance: ...


@dataclass(frozen=True, slots=True)
class EventBatch:
    """Validated events.

    ``events`` columns: ``ts_utc`` (datetime64[us], naive UTC), ``line``, ``category``,
    ``quantity`` (int64), ``line_no`` (int64), ``shift`` (int64 index into ``instances``).
    """

    events: pd.DataFrame
    instances: tuple[ShiftInstance, ...]
    bad_rows: tuple[BadRow, ...]
    notes: tuple[str, ...]
    rows_read: int


@dataclass(frozen=True, slots=True)
class CountBatch:
    """Validated per-shift counts.

    ``counts`` columns: ``shift`` (shift id text), ``line``, ``category``, ``count`` (int64),
    ``line_no``; ``units`` columns: ``shift``, ``line``, ``units`` (int64), ``line_no`` (first
    row giving it). ``instances`` maps every shift id used to its instance.
    """

    counts: pd.DataFrame
    units: pd.DataFrame
    instances: Mapping[str, ShiftInstance]
    bad_rows: tuple[BadRow, ...]
    notes: tuple[str, ...]
    rows_read: int


@dataclass(frozen=True, slots=True)
class UnitBatch:
    """Validated units inspected.

    ``units`` columns: ``shift`` (shift id text), ``line``, ``units`` (int64), ``line_no``
    (int64). ``instances`` maps every shift id used to its instance.
    """

    units: pd.DataFrame
    instances: Mapping[str, ShiftInstance]
    bad_rows: tuple[BadRow, ...]
    notes: tuple[str, ...]
    rows_read: int


@dataclass(slots=True)
class _Problems:
    """Reasons per row position, collected column by column."""

    n: int
    reasons: dict[int, list[str]] = field(default_factory=dict)

    def add(self, mask: np.ndarray, reason) -> None:
        """Add ``reason`` (text, or a function of the row position) where ``mask`` is True."""
        for i in np.flatnonzero(mask):
            text = reason(int(i)) if callable(reason) else reason
            self.reasons.setdefault(int(i), []).append(text)

    def add_by_value(self, col: _Column, reasons: Sequence[str | None]) -> np.ndarray:
        """Add the reason of each row's distinct value (None: fine); return the good mask."""
        has = np.fromiter((r is not None for r in reasons), dtype=bool, count=len(reasons))
        bad = has[col.codes] if len(reasons) else np.zeros(self.n, dtype=bool)
        self.add(bad, lambda i: reasons[col.codes[i]])
        return ~bad

    def bad_mask(self) -> np.ndarray:
        mask = np.zeros(self.n, dtype=bool)
        if self.reasons:
            mask[list(self.reasons)] = True
        return mask

    def rows(self, line_nos: np.ndarray) -> list[BadRow]:
        return [BadRow(int(line_nos[i]), "; ".join(r)) for i, r in sorted(self.reasons.items())]


@dataclass(frozen=True, slots=True)
class _Column:
    """A text column as codes (int64, one per row) into its distinct values after removing
    surrounding spaces; checks then run once per distinct value, not once per row."""

    codes: np.ndarray
    uniques: list[str]
    spaced: int  # cells that had surrounding spaces

    @classmethod
    def of(cls, values: pd.Series) -> _Column:
        codes, raw = pd.factorize(values.to_numpy(dtype=object))
        raw_list = [str(u) for u in raw]
        stripped = [u.strip() for u in raw_list]
        changed = [k for k, (a, b) in enumerate(zip(raw_list, stripped, strict=True)) if a != b]
        if not changed:
            return cls(codes.astype(np.int64), stripped, 0)
        spaced = int(np.bincount(codes, minlength=len(raw_list))[changed].sum())
        merged, uniques = pd.factorize(np.asarray(stripped, dtype=object))
        return cls(merged[codes].astype(np.int64), [str(u) for u in uniques], spaced)

    def values(self) -> np.ndarray:
        """Row values (object array of str)."""
        table = np.empty(len(self.uniques), dtype=object)
        table[:] = self.uniques
        return table[self.codes]


def _check_codes(
    problems: _Problems, col: _Column, known: Collection[str], what: str
) -> np.ndarray:
    """Mark empty and unknown codes; return the mask of good cells."""
    by_fold = {k.casefold(): k for k in known}

    def reason(code: str) -> str | None:
        if not code:
            return f"{what} is empty"
        if code in known:
            return None
        hint = by_fold.get(code.casefold())
        if hint is not None:
            return f"unknown {what} {code!r} (codes are case-sensitive: did you mean {hint!r}?)"
        return f"unknown {what} {code!r} (not in [{_section(what)}] of the config)"

    return problems.add_by_value(col, [reason(u) for u in col.uniques])


def _section(what: str) -> str:
    return "lines" if what == "line" else "categories"


def _whole_numbers(
    problems: _Problems, col: _Column, what: str, *, allow_empty: bool = False
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Digit-only cells as int64 (0 where bad or empty); returns (values, good, non-empty).

    Empty cells are good only with ``allow_empty``.
    """
    values = np.zeros(len(col.uniques), dtype=np.int64)
    reasons: list[str | None] = []
    for k, text in enumerate(col.uniques):
        reasons.append(_number_reason(text, what, allow_empty))
        if reasons[-1] is None and text:
            values[k] = int(text)
    good = problems.add_by_value(col, reasons)
    filled = np.fromiter((bool(u) for u in col.uniques), dtype=bool, count=len(col.uniques))
    return values[col.codes], good, filled[col.codes]


def _number_reason(text: str, what: str, allow_empty: bool) -> str | None:
    if not text:
        return None if allow_empty else f"{what} is empty"
    if _DIGITS_RE.fullmatch(text):
        if len(text) > 10 or int(text) > MAX_COUNT:
            return (
                f"{what} {text} is larger than {MAX_COUNT:,} (not a plausible count for one "
                "row: a unit or export error?)"
            )
        return None
    return f"{what} {text!r} {_number_problem(text)}"


def _number_problem(text: str) -> str:
    try:
        value = float(text)
    except ValueError:
        return "is not a number"
    if value != value or value in (float("inf"), float("-inf")):
        return "is not a number"
    if value < 0:
        return "is negative"
    if not value.is_integer():
        return "is not a whole number"
    return "must be written as a whole number with digits only (no sign, decimals or exponent)"


def _check_timestamps(
    problems: _Problems, values: pd.Series, tz: ZoneInfo, ambiguous: Ambiguous
) -> ParsedStamps:
    """Parse the timestamp column and add a reason for every cell that is not an instant."""
    p = parse_timestamps(values, tz, ambiguous)
    arr = p.text
    problems.add(p.empty, "timestamp is empty")
    problems.add(
        p.malformed,
        lambda i: (
            f"timestamp {arr[i]!r} is not an ISO 8601 date and time "
            "(e.g. 2026-01-05T06:30:00-06:00 or 2026-01-05 06:30:00)"
        ),
    )
    problems.add(p.invalid, lambda i: f"timestamp {arr[i]!r} is not a valid date and time")
    problems.add(
        p.skipped,
        lambda i: (
            f"timestamp {arr[i]!r} does not exist in {tz.key} (the clocks skip that "
            "hour); give the offset"
        ),
    )
    problems.add(
        p.repeated,
        lambda i: (
            f"timestamp {arr[i]!r} occurs twice in {tz.key} (the clocks repeat that "
            "hour); give the offset, or load with --ambiguous earlier|later"
        ),
    )
    return p


def _utc64(ts: dt.datetime) -> np.datetime64:
    if ts.tzinfo is None:
        raise ValueError("now must be timezone-aware")
    return np.datetime64(ts.astimezone(dt.UTC).replace(tzinfo=None), "us")


def _mark_duplicates(
    problems: _Problems, keys: pd.DataFrame, line_nos: np.ndarray, what: str
) -> None:
    """Mark every row whose key repeats an earlier row's key (only among ``keys``' rows)."""
    dup = keys.duplicated(keep=False).to_numpy()
    if not dup.any():
        return
    sub = keys[dup]
    first_pos = sub.groupby(list(sub.columns), sort=False).ngroup().to_numpy()
    positions = np.flatnonzero(dup)
    first_line: dict[int, int] = {}
    for pos, group in zip(positions, first_pos, strict=True):
        index = int(keys.index[pos])
        if group not in first_line:
            first_line[group] = int(line_nos[index])
            continue
        problems.add(
            _one(problems.n, index), f"duplicate of line {first_line[group]} (same {what})"
        )


def _one(n: int, i: int) -> np.ndarray:
    mask = np.zeros(n, dtype=bool)
    mask[i] = True
    return mask


def validate_events(
    table: RawTable,
    *,
    lines: Collection[str],
    categories: Collection[str],
    calendar: Calendar,
    now: dt.datetime,
    ambiguous: Ambiguous = "raise",
) -> EventBatch:
    """Check an events table; good rows become events assigned to shift instances."""
    frame = table.frame
    n = len(frame)
    problems = _Problems(n)
    line_col, cat_col = _Column.of(frame["line"]), _Column.of(frame["category"])
    ok_line = _check_codes(problems, line_col, lines, "line")
    ok_cat = _check_codes(problems, cat_col, categories, "category")
    stamps = _check_timestamps(problems, frame["timestamp"], calendar.tz, ambiguous)
    utc, ok_ts, ts_text = stamps.utc, stamps.good, stamps.text
    spaced = line_col.spaced + cat_col.spaced + stamps.spaced
    if "quantity" in frame:
        q_col = _Column.of(frame["quantity"])
        quantity, ok_q, _ = _whole_numbers(problems, q_col, "quantity")
        spaced += q_col.spaced
    else:
        quantity, ok_q = np.ones(n, dtype=np.int64), np.ones(n, dtype=bool)
    limit = _utc64(now) + np.timedelta64(int(CLOCK_SKEW.total_seconds()), "s")
    future = ok_ts & (utc > limit)
    problems.add(
        future,
        lambda i: (
            f"timestamp {ts_text[i]!r} is later than the time of loading "
            f"({now.astimezone(dt.UTC):%Y-%m-%d %H:%M} UTC); check the date and the offset"
        ),
    )
    too_old = ok_ts & (utc < _utc64(EARLIEST))
    problems.add(
        too_old,
        lambda i: f"timestamp {ts_text[i]!r} is before {EARLIEST:%Y-%m-%d}; check the date",
    )
    placed = ok_ts & ~future & ~too_old
    instances, shift = _assign(calendar, utc, placed)
    nowhere = placed & (shift < 0)
    problems.add(
        nowhere,
        lambda i: (
            f"timestamp {ts_text[i]!r} falls in no shift of the calendar "
            "(between shifts or on a non-production day)"
        ),
    )
    good = ok_line & ok_cat & ok_q & placed & ~nowhere
    keys = pd.DataFrame({"t": utc.view(np.int64), "l": line_col.codes, "c": cat_col.codes})
    _mark_duplicates(
        problems,
        keys[good],
        table.line_nos,
        "timestamp, line and category; put the total in quantity",
    )
    good &= ~problems.bad_mask()
    events = pd.DataFrame(
        {
            "ts_utc": utc[good],
            "line": pd.array(line_col.values()[good], dtype="str"),
            "category": pd.array(cat_col.values()[good], dtype="str"),
            "quantity": quantity[good],
            "line_no": table.line_nos[good],
            "shift": shift[good],
        }
    )
    notes = list(table.notes)
    _note_spaces(notes, spaced)
    converted = int((stamps.other_zone & good).sum())
    if converted:
        notes.append(
            f"{converted} timestamp(s) carried an offset other than {calendar.tz.key}'s and "
            "were converted to plant time"
        )
    bad = sorted(list(table.bad_rows) + problems.rows(table.line_nos), key=lambda b: b.line_no)
    return EventBatch(events, tuple(instances), tuple(bad), tuple(notes), table.records)


def _assign(
    calendar: Calendar, utc: np.ndarray, placed: np.ndarray
) -> tuple[list[ShiftInstance], np.ndarray]:
    shift = np.full(len(utc), -1, dtype=np.int64)
    if not placed.any():
        return [], shift
    instances, index = calendar.assign(utc[placed])
    shift[placed] = np.asarray(index, dtype=np.int64)
    return list(instances), shift


def _note_spaces(notes: list[str], spaced: int) -> None:
    if spaced:
        notes.append(f"{spaced} cell(s) had surrounding spaces, which were removed")


def validate_counts(
    table: RawTable,
    *,
    lines: Collection[str],
    categories: Collection[str],
    calendar: Calendar,
    now: dt.datetime,
) -> CountBatch:
    """Check a per-shift counts table."""
    frame = table.frame
    problems = _Problems(len(frame))
    shift_col, line_col, cat_col, count_col = (_Column.of(frame[c]) for c in COUNT_COLUMNS)
    instances, ok_shift = _check_shifts(problems, shift_col, calendar, now)
    ok_line = _check_codes(problems, line_col, lines, "line")
    ok_cat = _check_codes(problems, cat_col, categories, "category")
    count, ok_count, _ = _whole_numbers(problems, count_col, "count")
    spaced = shift_col.spaced + line_col.spaced + cat_col.spaced + count_col.spaced
    shift_ids, line_codes, cat_codes = shift_col.values(), line_col.values(), cat_col.values()
    good = ok_shift & ok_line & ok_cat & ok_count
    keys = pd.DataFrame({"s": shift_col.codes, "l": line_col.codes, "c": cat_col.codes})
    _mark_duplicates(problems, keys[good], table.line_nos, "shift, line and category")
    units = _empty_units()
    if "units_inspected" in frame:
        units_col = _Column.of(frame["units_inspected"])
        spaced += units_col.spaced
        units = _check_units(
            problems, units_col, shift_ids, line_codes, ok_shift & ok_line, table.line_nos
        )
    good &= ~problems.bad_mask()
    counts = pd.DataFrame(
        {
            "shift": pd.array(shift_ids[good], dtype="str"),
            "line": pd.array(line_codes[good], dtype="str"),
            "category": pd.array(cat_codes[good], dtype="str"),
            "count": count[good],
            "line_no": table.line_nos[good],
        }
    )
    if len(units):
        keep_pairs = set(zip(counts["shift"], counts["line"], strict=True))
        mask = [p in keep_pairs for p in zip(units["shift"], units["line"], strict=True)]
        units = units[np.asarray(mask, dtype=bool)].reset_index(drop=True)
    notes = list(table.notes)
    _note_spaces(notes, spaced)
    bad = sorted(list(table.bad_rows) + problems.rows(table.line_nos), key=lambda b: b.line_no)
    used = {s: instances[s] for s in set(counts["shift"])}
    return CountBatch(counts, units, used, tuple(bad), tuple(notes), table.records)


def validate_units(
    table: RawTable,
    *,
    lines: Collection[str],
    calendar: Calendar,
    now: dt.datetime,
) -> UnitBatch:
    """Check a units-inspected table (``shift,line,units_inspected``)."""
    frame = table.frame
    problems = _Problems(len(frame))
    shift_col, line_col, units_col = (_Column.of(frame[c]) for c in UNIT_COLUMNS)
    instances, ok_shift = _check_shifts(problems, shift_col, calendar, now)
    ok_line = _check_codes(problems, line_col, lines, "line")
    units, ok_units, _ = _whole_numbers(problems, units_col, "units_inspected")
    good = ok_shift & ok_line & ok_units
    keys = pd.DataFrame({"s": shift_col.codes, "l": line_col.codes})
    _mark_duplicates(problems, keys[good], table.line_nos, "shift and line")
    good &= ~problems.bad_mask()
    shift_ids = shift_col.values()
    out = pd.DataFrame(
        {
            "shift": pd.array(shift_ids[good], dtype="str"),
            "line": pd.array(line_col.values()[good], dtype="str"),
            "units": units[good],
            "line_no": table.line_nos[good],
        }
    )
    notes = list(table.notes)
    _note_spaces(notes, shift_col.spaced + line_col.spaced + units_col.spaced)
    bad = sorted(list(table.bad_rows) + problems.rows(table.line_nos), key=lambda b: b.line_no)
    used = {s: instances[s] for s in set(out["shift"])}
    return UnitBatch(out, used, tuple(bad), tuple(notes), table.records)


def _empty_units() -> pd.DataFrame:
    return pd.DataFrame(
        {
            "shift": pd.array([], dtype="str"),
            "line": pd.array([], dtype="str"),
            "units": np.array([], dtype=np.int64),
            "line_no": np.array([], dtype=np.int64),
        }
    )


def _check_shifts(
    problems: _Problems, col: _Column, calendar: Calendar, now: dt.datetime
) -> tuple[dict[str, ShiftInstance], np.ndarray]:
    reasons: list[str | None] = []
    instances: dict[str, ShiftInstance] = {}
    for text in col.uniques:
        reason, inst = _one_shift(text, calendar, now)
        reasons.append(None if inst is not None else reason)
        if inst is not None:
            instances[text] = inst
    return instances, problems.add_by_value(col, reasons)


def _one_shift(text: str, calendar: Calendar, now: dt.datetime) -> tuple[str, ShiftInstance | None]:
    if not text:
        return "shift is empty", None
    match = _SHIFT_ID_RE.fullmatch(text)
    date = None
    if match:
        try:
            date = dt.date.fromisoformat(match.group(1))
        except ValueError:
            date = None
    if match is None or date is None:
        return (
            f"shift {text!r} is not a shift id (start date and shift name, e.g. 2026-01-05_A)",
            None,
        )
    try:
        inst = calendar.instance(date, match.group(2))
    except QcfitError as exc:
        return f"shift {text!r}: {exc}", None
    if inst.start < EARLIEST:
        return f"shift {text!r} is before {EARLIEST:%Y-%m-%d}; check the date", None
    if inst.start > now:
        return f"shift {text!r} has not started yet (it starts {inst.start.isoformat()})", None
    return "", inst


def _check_units(
    problems: _Problems,
    col: _Column,
    shift_ids: np.ndarray,
    line_codes: np.ndarray,
    placed: np.ndarray,
    line_nos: np.ndarray,
) -> pd.DataFrame:
    units, ok, filled = _whole_numbers(problems, col, "units_inspected", allow_empty=True)
    given = ok & placed & filled
    frame = pd.DataFrame(
        {"shift": shift_ids, "line": line_codes, "units": units, "line_no": line_nos}
    )[given]
    first = frame.drop_duplicates(["shift", "line"], keep="first")
    merged = frame.merge(first, on=["shift", "line"], suffixes=("", "_first"))
    differ = merged[merged["units"] != merged["units_first"]]
    pos = {int(n): i for i, n in enumerate(line_nos)}
    for row in differ.itertuples(index=False):
        problems.add(
            _one(problems.n, pos[int(row.line_no)]),
            f"units_inspected {row.units} differs from {row.units_first} on line "
            f"{row.line_no_first} for the same shift and line",
        )
    return first.reset_index(drop=True)

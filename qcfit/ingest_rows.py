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
  ``+HH``. With an offset it is converted (any zone's offset is accepted; a note counts
  those that differ from the plant zone's offset at that instant). Without an offset it is
  plant-local wall time: a time that does not exist (skipped at a spring change) is a bad
  row; one that occurs twice (autumn change) is a bad row unless ``ambiguous`` is
  ``"earlier"`` or ``"later"`` (the first or second occurrence);
* an event later than the load time plus :data:`CLOCK_SKEW` is a bad row (a wrong date or
  offset), and so is one that falls in no shift (between shifts, or a non-production day);
* the key is (instant, line, category): a second row with the same key is a bad row
  (write the total in ``quantity``);
* ``quantity`` is optional (default 1); when the column is there, every cell needs a value.

Counts (``shift,line,category,count[,units_inspected]``):

* ``shift`` is a shift id, ``YYYY-MM-DD_NAME`` (the plant-local date the shift starts on
  and a shift name of the config), and the shift must have started by the load time;
* the key is (shift, line, category); a second row with the same key is a bad row;
* ``units_inspected`` (optional) is the units inspected on that line in that shift; it may
  be left empty (unknown), and all non-empty cells of one shift and line must agree.
"""

from __future__ import annotations

import datetime as dt
import re
from collections.abc import Collection, Iterable, Mapping
from dataclasses import dataclass, field
from typing import Literal, Protocol
from zoneinfo import ZoneInfo

import numpy as np
import pandas as pd

from qcfit.errors import BadRow, QcfitError
from qcfit.ingest_csv import RawTable
from qcfit.model import ShiftInstance

MAX_COUNT = 10**9
CLOCK_SKEW = dt.timedelta(minutes=15)
EVENT_COLUMNS = ("timestamp", "line", "category")
EVENT_OPTIONAL = ("quantity",)
COUNT_COLUMNS = ("shift", "line", "category", "count")
COUNT_OPTIONAL = ("units_inspected",)
Ambiguous = Literal["raise", "earlier", "later"]
AMBIGUOUS_CHOICES = ("raise", "earlier", "later")

_NAIVE_RE = r"\d{4}-\d\d-\d\d[T ]\d\d:\d\d(?::\d\d(?:\.\d{1,9})?)?"
_OFFSET_RE = r"(?:[Zz]|[+-]\d\d(?::?\d\d)?)"
_SHIFT_ID_RE = re.compile(r"(\d{4}-\d\d-\d\d)_(\S+)")
_US = np.timedelta64(1, "us")


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

    def bad_mask(self) -> np.ndarray:
        mask = np.zeros(self.n, dtype=bool)
        if self.reasons:
            mask[list(self.reasons)] = True
        return mask

    def rows(self, line_nos: np.ndarray) -> list[BadRow]:
        return [BadRow(int(line_nos[i]), "; ".join(r)) for i, r in sorted(self.reasons.items())]


def _strip(frame: pd.DataFrame, columns: Iterable[str]) -> tuple[dict[str, pd.Series], int]:
    """Cells without surrounding spaces, and how many cells had them."""
    out, changed = {}, 0
    for c in columns:
        raw = frame[c]
        stripped = raw.str.strip()
        changed += int((stripped.str.len() != raw.str.len()).sum())
        out[c] = stripped
    return out, changed


def _check_codes(problems: _Problems, values: pd.Series, known: Collection[str], what: str) -> np.ndarray:
    """Mark empty and unknown codes; return the mask of good cells."""
    arr = values.to_numpy()
    empty = (values.str.len() == 0).to_numpy()
    unknown = ~empty & ~values.isin(list(known)).to_numpy()
    problems.add(empty, f"{what} is empty")
    by_fold = {k.casefold(): k for k in known}

    def reason(i: int) -> str:
        code = arr[i]
        hint = by_fold.get(code.casefold())
        if hint is not None:
            return f"unknown {what} {code!r} (codes are case-sensitive: did you mean {hint!r}?)"
        return f"unknown {what} {code!r} (not in [{_section(what)}] of the config)"

    problems.add(unknown, reason)
    return ~(empty | unknown)


def _section(what: str) -> str:
    return "lines" if what == "line" else "categories"


def parse_whole_numbers(problems: _Problems, values: pd.Series, what: str, *, allow_empty: bool = False) -> tuple[np.ndarray, np.ndarray]:
    """Parse digit-only cells to int64 (0 where bad or empty); return (values, good mask).

    Empty cells are good only with ``allow_empty`` (then their value is 0 and the second
    returned mask excludes them: use ``values.str.len() > 0`` to tell them apart).
    """
    n = len(values)
    arr = values.to_numpy()
    empty = (values.str.len() == 0).to_numpy()
    digits = values.str.fullmatch(r"\d+").to_numpy(dtype=bool)
    short = digits & (values.str.len() <= 10).to_numpy()
    out = np.zeros(n, dtype=np.int64)
    if short.any():
        out[short] = values[short].astype("int64").to_numpy()
    too_big = (digits & ~short) | (short & (out > MAX_COUNT))
    out[too_big] = 0
    if not allow_empty:
        problems.add(empty, f"{what} is empty")
    problems.add(
        too_big,
        lambda i: f"{what} {arr[i]} is larger than {MAX_COUNT:,} (not a plausible count for one "
        "row: a unit or export error?)",
    )
    other = ~empty & ~digits
    if other.any():
        problems.add(other, lambda i: f"{what} {arr[i]!r} {_number_problem(arr[i])}")
    good = (digits & ~too_big) | (empty & allow_empty)
    return out, good


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


def localize_naive(wall: np.ndarray, tz: ZoneInfo, ambiguous: Ambiguous) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Plant-local naive wall times -> UTC, vectorised and exact for any zone.

    ``wall`` is datetime64[us]. Candidate offsets are the zone's offsets 14 h before and
    after each wall time (the widest UTC offsets); a candidate ``u = wall - offset`` is a
    solution when ``u`` shown in ``tz`` is ``wall`` again. One solution: the instant; none:
    the wall time was skipped (spring change); two: it occurred twice (autumn change) and
    ``ambiguous`` picks the earlier or later instant, or leaves it unresolved.

    Returns (utc datetime64[us] naive UTC, nonexistent mask, unresolved-ambiguous mask).
    """
    w = pd.DatetimeIndex(wall).as_unit("us")
    span = pd.Timedelta(hours=14)
    candidates = []
    for probe in (w - span, w + span):
        offset = _offset_at(probe, tz)
        u = w - offset
        valid = _wall_time(u, tz) == w
        candidates.append((u.to_numpy(), np.asarray(valid)))
    (u1, v1), (u2, v2) = candidates
    v2 = v2 & (u2 != u1)
    n_valid = v1.astype(np.int8) + v2.astype(np.int8)
    utc = np.where(v1, u1, u2)
    both = n_valid == 2
    if ambiguous == "earlier":
        utc = np.where(both, np.minimum(u1, u2), utc)
    elif ambiguous == "later":
        utc = np.where(both, np.maximum(u1, u2), utc)
    unresolved = both if ambiguous == "raise" else np.zeros_like(both)
    return utc.astype("datetime64[us]"), n_valid == 0, unresolved


def _offset_at(utc_naive: pd.DatetimeIndex, tz: ZoneInfo) -> pd.TimedeltaIndex:
    return _wall_time(utc_naive, tz) - utc_naive


def _wall_time(utc_naive: pd.DatetimeIndex, tz: ZoneInfo) -> pd.DatetimeIndex:
    return utc_naive.tz_localize("UTC").tz_convert(tz).tz_localize(None)


def parse_timestamps(problems: _Problems, values: pd.Series, tz: ZoneInfo, ambiguous: Ambiguous) -> tuple[np.ndarray, np.ndarray, int]:
    """ISO 8601 text -> UTC instants (datetime64[us], naive UTC).

    Returns (instants, good mask, how many carried an offset other than the plant zone's).
    """
    n = len(values)
    arr = values.to_numpy()
    utc = np.full(n, np.datetime64("NaT"), dtype="datetime64[us]")
    without = values.str.replace(_OFFSET_RE + "$", "", regex=True)
    has_offset = (without.str.len() != values.str.len()).to_numpy()
    shape_ok = without.str.fullmatch(_NAIVE_RE).to_numpy(dtype=bool)
    empty = (values.str.len() == 0).to_numpy()
    problems.add(empty, "timestamp is empty")
    problems.add(
        ~empty & ~shape_ok,
        lambda i: f"timestamp {arr[i]!r} is not an ISO 8601 date and time "
        "(e.g. 2026-01-05T06:30:00-06:00 or 2026-01-05 06:30:00)",
    )
    wall = pd.to_datetime(without.where(shape_ok, None), format="ISO8601", errors="coerce")
    wall_arr = wall.to_numpy().astype("datetime64[us]")
    invalid = shape_ok & np.isnat(wall_arr)
    problems.add(invalid, lambda i: f"timestamp {arr[i]!r} is not a valid date and time")
    other_zone = 0
    with_off = shape_ok & ~invalid & has_offset
    if with_off.any():
        u = pd.to_datetime(values[with_off], utc=True, format="ISO8601", errors="coerce")
        u_naive = pd.DatetimeIndex(u).tz_localize(None).as_unit("us")
        utc[with_off] = u_naive.to_numpy()
        given = pd.DatetimeIndex(wall_arr[with_off]) - u_naive
        other_zone = int((given != _offset_at(u_naive, tz)).sum())
    naive = shape_ok & ~invalid & ~has_offset
    if naive.any():
        local, gap, twice = localize_naive(wall_arr[naive], tz, ambiguous)
        utc[naive] = local
        idx = np.flatnonzero(naive)
        problems.add(
            _scatter(n, idx, gap),
            lambda i: f"timestamp {arr[i]!r} does not exist in {tz.key} (the clocks skip that "
            "hour); give the offset",
        )
        problems.add(
            _scatter(n, idx, twice),
            lambda i: f"timestamp {arr[i]!r} occurs twice in {tz.key} (the clocks repeat that "
            "hour); give the offset, or load with --ambiguous earlier|later",
        )
        utc[_scatter(n, idx, gap | twice)] = np.datetime64("NaT")
    return utc, ~np.isnat(utc), other_zone


def _scatter(n: int, idx: np.ndarray, sub_mask: np.ndarray) -> np.ndarray:
    mask = np.zeros(n, dtype=bool)
    mask[idx[sub_mask]] = True
    return mask


def _utc64(ts: dt.datetime) -> np.datetime64:
    if ts.tzinfo is None:
        raise ValueError("now must be timezone-aware")
    return np.datetime64(ts.astimezone(dt.UTC).replace(tzinfo=None), "us")


def _mark_duplicates(problems: _Problems, keys: pd.DataFrame, line_nos: np.ndarray, what: str) -> None:
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
        problems.add(_one(problems.n, index), f"duplicate of line {first_line[group]} (same {what})")


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
    cols = ["timestamp", "line", "category"] + (["quantity"] if "quantity" in frame else [])
    cells, spaced = _strip(frame, cols)
    ok_line = _check_codes(problems, cells["line"], lines, "line")
    ok_cat = _check_codes(problems, cells["category"], categories, "category")
    utc, ok_ts, other_zone = parse_timestamps(problems, cells["timestamp"], calendar.tz, ambiguous)
    if "quantity" in cells:
        quantity, ok_q = parse_whole_numbers(problems, cells["quantity"], "quantity")
    else:
        quantity, ok_q = np.ones(n, dtype=np.int64), np.ones(n, dtype=bool)
    limit = _utc64(now) + np.timedelta64(int(CLOCK_SKEW.total_seconds()), "s")
    future = ok_ts & (utc > limit)
    ts_text = cells["timestamp"].to_numpy()
    problems.add(
        future,
        lambda i: f"timestamp {ts_text[i]!r} is later than the time of loading "
        f"({now.astimezone(dt.UTC):%Y-%m-%d %H:%M} UTC); check the date and the offset",
    )
    placed = ok_ts & ~future
    instances, shift = _assign(calendar, utc, placed)
    nowhere = placed & (shift < 0)
    problems.add(
        nowhere,
        lambda i: f"timestamp {ts_text[i]!r} falls in no shift of the calendar "
        "(between shifts or on a non-production day)",
    )
    good = ok_line & ok_cat & ok_q & placed & ~nowhere
    keys = pd.DataFrame({"t": utc, "l": cells["line"].to_numpy(), "c": cells["category"].to_numpy()})
    _mark_duplicates(problems, keys[good], table.line_nos, "timestamp, line and category; put the total in quantity")
    good &= ~problems.bad_mask()
    events = pd.DataFrame(
        {
            "ts_utc": utc[good],
            "line": cells["line"].to_numpy()[good],
            "category": cells["category"].to_numpy()[good],
            "quantity": quantity[good],
            "line_no": table.line_nos[good],
            "shift": shift[good],
        }
    )
    notes = list(table.notes)
    _note_spaces(notes, spaced)
    if other_zone:
        notes.append(
            f"{other_zone} timestamp(s) carried an offset other than {calendar.tz.key}'s and "
            "were converted to plant time"
        )
    bad = sorted(list(table.bad_rows) + problems.rows(table.line_nos), key=lambda b: b.line_no)
    return EventBatch(events, tuple(instances), tuple(bad), tuple(notes), table.records)


def _assign(calendar: Calendar, utc: np.ndarray, placed: np.ndarray) -> tuple[list[ShiftInstance], np.ndarray]:
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
    n = len(frame)
    problems = _Problems(n)
    has_units = "units_inspected" in frame
    cols = list(COUNT_COLUMNS) + (["units_inspected"] if has_units else [])
    cells, spaced = _strip(frame, cols)
    instances, ok_shift = _check_shifts(problems, cells["shift"], calendar, now)
    ok_line = _check_codes(problems, cells["line"], lines, "line")
    ok_cat = _check_codes(problems, cells["category"], categories, "category")
    count, ok_count = parse_whole_numbers(problems, cells["count"], "count")
    shift_ids = cells["shift"].to_numpy()
    line_codes = cells["line"].to_numpy()
    good = ok_shift & ok_line & ok_cat & ok_count
    keys = pd.DataFrame({"s": shift_ids, "l": line_codes, "c": cells["category"].to_numpy()})
    _mark_duplicates(problems, keys[good], table.line_nos, "shift, line and category")
    units = _empty_units()
    if has_units:
        units = _check_units(problems, cells["units_inspected"], shift_ids, line_codes, ok_shift & ok_line, table.line_nos)
    good &= ~problems.bad_mask()
    counts = pd.DataFrame(
        {
            "shift": shift_ids[good],
            "line": line_codes[good],
            "category": cells["category"].to_numpy()[good],
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


def _empty_units() -> pd.DataFrame:
    return pd.DataFrame(
        {
            "shift": pd.array([], dtype="str"),
            "line": pd.array([], dtype="str"),
            "units": np.array([], dtype=np.int64),
            "line_no": np.array([], dtype=np.int64),
        }
    )


def _check_shifts(problems: _Problems, values: pd.Series, calendar: Calendar, now: dt.datetime) -> tuple[dict[str, ShiftInstance], np.ndarray]:
    arr = values.to_numpy()
    reasons: dict[str, str] = {}
    instances: dict[str, ShiftInstance] = {}
    for text in pd.unique(arr):
        reason, inst = _one_shift(str(text), calendar, now)
        if inst is None:
            reasons[text] = reason
        else:
            instances[text] = inst
    bad = values.isin(list(reasons)).to_numpy()
    problems.add(bad, lambda i: reasons[arr[i]])
    return instances, ~bad


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
        return f"shift {text!r} is not a shift id (start date and shift name, e.g. 2026-01-05_A)", None
    try:
        inst = calendar.instance(date, match.group(2))
    except QcfitError as exc:
        return f"shift {text!r}: {exc}", None
    if inst.start > now:
        return f"shift {text!r} has not started yet (it starts {inst.start.isoformat()})", None
    return "", inst


def _check_units(problems: _Problems, values: pd.Series, shift_ids: np.ndarray, line_codes: np.ndarray, placed: np.ndarray, line_nos: np.ndarray) -> pd.DataFrame:
    units, ok = parse_whole_numbers(problems, values, "units_inspected", allow_empty=True)
    given = ok & placed & (values.str.len() > 0).to_numpy()
    frame = pd.DataFrame({"shift": shift_ids, "line": line_codes, "units": units, "line_no": line_nos})[given]
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

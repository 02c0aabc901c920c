"""The plant config file (TOML) -> a frozen, validated :class:`Config`.

``parse_config(mapping)`` is pure and collects every problem before it raises one
:class:`~qcfit.errors.ConfigError`; ``load_config(path)`` reads the file (UTF-8, with or
without a byte-order mark) and adds the file name and the line of a TOML syntax error.
Keys in problems are dotted paths: ``plant.timezone``, ``shift[2].end`` (the 2nd ``[[shift]]``
table, counting from 1), ``baseline.glaze-lines.proportions.SCR``. A key the reference below
does not list is reported as ``unknown key`` (it catches typos), with the closest known key.

Config file reference
=====================

Values are TOML: strings in quotes, numbers bare, dates bare (``2026-01-05``). Times of day
are strings ``"HH:MM"`` or ``"HH:MM:SS"`` (a bare TOML time needs seconds: ``06:00:00``).

``[plant]`` (required)
    ``timezone``  string, required. IANA zone name of the plant, e.g. ``"America/Chicago"``.
        Shift times are local wall-clock times in this zone; the zone database comes from
        the ``tzdata`` package when the system has none (Windows).
    ``name``  string, default ``""``. Plant name shown in reports.
    ``non_production_days``  list of weekday names, default ``[]``. ``"Mon"`` ... ``"Sun"``
        or full names, any case. Shifts that START on such a day do not exist (no
        evaluation; events in them belong to no shift).
    ``holidays``  list of dates, default ``[]``. Same as above for single dates
        (``[2026-12-25, 2027-01-01]``; ``"2026-12-25"`` strings are accepted too).

``[[shift]]`` (one table per shift, at least one)
    ``name``  string, required, unique. Letters, digits, ``-`` and ``_``; with the local start
        date it forms the shift id, e.g. ``2026-01-05_A`` (what ``--shift`` accepts).
    ``start``  time of day, required. Local wall-clock start.
    ``end``  time of day, required. Local wall-clock end (exclusive). ``end <= start`` means
        the shift crosses midnight and ends the next day; ``"24:00"`` is midnight at the end
        of the start day. A shift is named by the date it starts on.
    Shifts must not overlap (on the 24-hour clock); gaps between shifts are allowed (events
    in a gap belong to no shift). Across a DST change a shift lasts its real length: a night
    shift 22:00-06:00 is 7 h in spring and 9 h in autumn. A local start or end that does not
    exist (skipped by a spring change) moves forward to the first valid instant; one that
    occurs twice (autumn) means the first occurrence.

``[lines]`` (required, at least one)
    ``CODE = "display name"``, in the order reports show them. Codes are what data files and
    the store use: non-empty, no surrounding spaces or control characters, at most 64
    characters, not ``*``.

``[categories]`` (required, at least two)
    ``CODE = "display name"`` for each defect category, same rules as lines.

``[store]``
    ``url``  string, default: a SQLite file beside the config named after it
        (``plant.toml`` -> ``plant.sqlite``). Any SQLAlchemy URL, e.g.
        ``"postgresql+psycopg://qc@dbhost/qcfit"``. A relative SQLite path is taken relative
        to the config file's folder, not the working directory.

``[schedule]``
    ``grace_minutes``  number >= 0, default 15. Minutes after a shift's end before it is
        evaluated (late data from inspection stations).
    ``tick_minutes``  number > 0 and <= 1440, default 5. Period of the catch-up tick.

``[source]`` (optional: pull defects from another database)
    ``url``  string, required. SQLAlchemy URL of the other database.
    ``query``  string, required. SQL returning the rows (see the data formats).
    ``kind``  ``"events"`` or ``"counts"``, required. Timestamped events or per-shift counts.
    ``ambiguous``  ``"raise"``, ``"earlier"`` or ``"later"``, default ``"raise"``. How a naive
        local timestamp in the repeated autumn hour is read (``"raise"`` rejects the row).

``[thresholds]`` (all optional; every alarm needs BOTH the level and the effect floor)
    ``alarm_level``  number in (0, 1), default 0.01. Adjusted p-value below this, with the
        effect at or above its floor, gives severity "alarm".
    ``watch_level``  number in (0, 1), >= alarm_level, default 0.05. Same for "watch".
    ``min_effect_w``  number >= 0, default 0.30. Cohen's w floor for a baseline (mix) alarm
        (Cohen's "medium" effect: a shift of 100-300 defects cannot show a smaller change with
        useful power; small lasting changes are the sequential charts' job).
    ``min_effect_v``  number in [0, 1], default 0.15. Cramér's V floor for between-lines
        (V = w / sqrt(min(lines, categories) - 1): 0.15 matches w = 0.30 for five lines).
    ``min_rate_ratio``  number >= 1, default 1.25. Observed / baseline defect rate floor.
    ``multiple_testing``  ``"bh"`` (Benjamini-Hochberg), ``"holm"``, ``"by"``
        (Benjamini-Yekutieli) or ``"none"``, default ``"bh"``; across all tests of one shift.
    ``power``  number in (0, 1), default 0.80. Power against the smallest effect that matters
        needed before "no alarm" is called in control; below it the verdict is
        "too little data to tell".
    ``persistence_k``, ``persistence_m``  integers, 1 <= k <= m <= 100, default 1 and 1.
        Raise only when k of the last m shifts cross.
    ``auto_clear_after``  integer >= 0, default 3. In-control shifts in a row after which an
        open alarm clears itself; 0 = never.
    ``mc_draws``  integer in [100, 10^8], default 10000. Monte Carlo draws for p-values.
    ``seed``  integer in [0, 2^63), default 20260105. Base seed; per-shift seeds derive from it.

``[baseline.NAME]`` (one table per baseline; NAME is yours, e.g. ``[baseline.glaze-lines]``)
    ``lines``  list of line codes, or ``"*"`` for every line; required.
    ``effective``  date, required. The baseline applies to shifts that START on or after it,
        so editing the config never changes the verdict on older shifts. For a line, a
        baseline naming it explicitly beats a ``"*"`` baseline; among those, the latest
        effective date not after the shift's start date wins. Two baselines naming the same
        line (or both ``"*"``) with the same effective date are an error.
    ``proportions``  table ``{CODE = share, ...}``: every plant category, each share > 0,
        summing to 1 within 1e-6.
    ``counts``  table ``{CODE = count, ...}``: instead of ``proportions``, whole defect counts
        (each >= 1) from which the shares are derived.
    ``normalize``  boolean, default false. When true, shares that do not sum to 1 are scaled
        to sum to 1 (with a warning) instead of being an error.
    ``rate``  number > 0, optional. Baseline defects per inspected unit.
    ``note``  string, optional. Free text for auditors (e.g. where the figures came from).
    ``[baseline.NAME.thresholds]``  any ``[thresholds]`` key, overriding it for the lines and
        shifts this baseline covers.
    Each baseline's content (its table, canonically re-rendered) is hashed: the hash is the
    baseline version that evaluations and alarms refer to.

``[sequential]`` (charts accumulating evidence across shifts)
    ``enabled``  boolean, default true.
    ``target_arl``  number > 1, default 370. In-control average run length in shifts.
    ``ewma_lambda``  number in [0, 1], default 0.2. Smoothing weight of the multivariate EWMA
        (smaller remembers longer); 0 turns the EWMA off, leaving the CUSUMs.
    ``concerns``  list of ``{category = "CODE", factor = r}``, default ``[]``: shifts of concern
        ("category CODE up by the factor r"; r > 0 and r != 1, r < 1 means down).

``[report]``
    ``folder``  string, optional. Folder for one HTML report per evaluated shift (relative
        paths are taken from the config file's folder); none written when absent.
    ``keep``  integer >= 1, default 30. Reports kept in the folder (oldest deleted first).

``[notify]`` (optional)
    ``smtp_host``  string, optional. Mail server; with ``mail_from`` and ``mail_to``.
    ``smtp_port``  integer 1-65535, default 25.
    ``mail_from``  string (an address), required when ``smtp_host`` is set.
    ``mail_to``  list of addresses (or one string), required when ``smtp_host`` is set.
    ``command``  list of strings, optional: a program and its arguments, run per new alarm
        with the alarm's JSON on stdin, e.g. ``["/usr/local/bin/page-shift-lead", "--json"]``.
    ``retries``  integer 0-20, default 3. Attempts after a failed send, with backoff.

``[log]``
    ``file``  string, optional. Rotating log file (relative to the config file's folder).
    ``level``  ``"DEBUG"``, ``"INFO"``, ``"WARNING"``, ``"ERROR"``, default ``"INFO"``.
    ``max_bytes``  integer >= 10000, default 10000000. Size at which the file is rotated.
    ``backups``  integer 0-100, default 5. Rotated files kept.

Warnings (the config still loads; they are logged and kept in ``Config.warnings``): shares
scaled by ``normalize = true``, and hours of the day that no shift covers.

Complete example (every key; the values shown are the defaults unless marked)::

    [plant]
    name = "Riverside moulding"          # example value
    timezone = "America/Chicago"         # example value (required)
    non_production_days = ["Sun"]        # example value
    holidays = [2026-12-25, 2027-01-01]  # example value

    [[shift]]
    name = "A"
    start = "06:00"
    end = "14:00"

    [[shift]]
    name = "B"
    start = "14:00"
    end = "22:00"

    [[shift]]
    name = "C"
    start = "22:00"
    end = "06:00"        # crosses midnight; "2026-01-05_C" ends on the 6th

    [lines]
    P1 = "Press line 1"
    P2 = "Press line 2"

    [categories]
    SCR = "scratch"
    FL = "flash"
    SH = "short shot"

    [store]
    url = "sqlite:///qcfit-store.sqlite"   # default: plant.sqlite beside plant.toml

    [schedule]
    grace_minutes = 15
    tick_minutes = 5

    [source]
    url = "sqlite:///stations.sqlite"
    query = "SELECT ts AS timestamp, line, category FROM defect_log"
    kind = "events"
    ambiguous = "raise"

    [thresholds]
    alarm_level = 0.01
    watch_level = 0.05
    min_effect_w = 0.30
    min_effect_v = 0.15
    min_rate_ratio = 1.25
    multiple_testing = "bh"
    power = 0.80
    persistence_k = 1
    persistence_m = 1
    auto_clear_after = 3
    mc_draws = 10000
    seed = 20260105

    [baseline.presses]
    lines = "*"
    effective = 2026-01-05
    proportions = { SCR = 0.50, FL = 0.30, SH = 0.20 }
    rate = 0.012
    note = "agreed at the January quality review"

    [baseline.presses.thresholds]
    min_effect_w = 0.15

    [baseline.press-2-new-mould]
    lines = ["P2"]
    effective = 2026-03-02
    counts = { SCR = 120, FL = 45, SH = 35 }
    normalize = false

    [sequential]
    enabled = true
    target_arl = 370
    ewma_lambda = 0.2
    concerns = [{ category = "FL", factor = 2.0 }]

    [report]
    folder = "reports"                   # example value
    keep = 30

    [notify]
    smtp_host = "mail.plant.local"       # example values from here on
    smtp_port = 25
    mail_from = "qcfit@plant.local"
    mail_to = ["shift-lead@plant.local"]
    command = ["/usr/local/bin/page-shift-lead", "--json"]
    retries = 3

    [log]
    file = "qcfit.log"
    level = "INFO"
    max_bytes = 10000000
    backups = 5
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import difflib
import hashlib
import logging
import math
import re
import tomllib
import zoneinfo
from collections.abc import Callable, Iterator, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Literal

import tomlkit

from qcfit.errors import ConfigError, Problem

log = logging.getLogger(__name__)

__all__ = [
    "BaselineSpec",
    "Concern",
    "Config",
    "FrozenMap",
    "LogSettings",
    "NotifySettings",
    "ReportSettings",
    "ScheduleSettings",
    "SequentialSettings",
    "ShiftSpec",
    "SourceSettings",
    "StoreSettings",
    "Thresholds",
    "baseline_for",
    "canonical_baseline_toml",
    "load_config",
    "parse_config",
    "resolve_path",
    "store_url_for",
    "thresholds_for",
    "timezone_source",
]

PROPORTION_TOLERANCE = 1e-6
MAX_CODE_LENGTH = 64
ALL_LINES = "*"
WEEKDAYS = ("mon", "tue", "wed", "thu", "fri", "sat", "sun")
_CODE_BAD = re.compile(r"[\x00-\x1f\x7f]")
_SHIFT_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_-]*$")
_TIME_TEXT = re.compile(r"^(\d{1,2}):(\d{2})(?::(\d{2}))?$")


class FrozenMap(Mapping):
    """A read-only, hashable mapping that keeps insertion order."""

    __slots__ = ("_data",)

    def __init__(self, data: Mapping | None = None) -> None:
        self._data = dict(data or {})

    def __getitem__(self, key: Any) -> Any:
        return self._data[key]

    def __iter__(self) -> Iterator:
        return iter(self._data)

    def __len__(self) -> int:
        return len(self._data)

    def __hash__(self) -> int:
        return hash(tuple(self._data.items()))

    def __repr__(self) -> str:
        return f"FrozenMap({self._data!r})"


# --------------------------------------------------------------------------- dataclasses

@dataclass(frozen=True, slots=True)
class ShiftSpec:
    """A named shift: local wall-clock start and end; ``end <= start`` crosses midnight."""

    name: str
    start: dt.time
    end: dt.time

    @property
    def minutes(self) -> float:
        """Nominal length on the wall clock, in minutes (the real length varies at DST)."""
        return float(_span_minutes(self.start, self.end))


DEFAULT_STORE_URL: str | None = None


@dataclass(frozen=True, slots=True)
class StoreSettings:
    url: str | None = DEFAULT_STORE_URL


DEFAULT_GRACE_MINUTES = 15.0
DEFAULT_TICK_MINUTES = 5.0


@dataclass(frozen=True, slots=True)
class ScheduleSettings:
    grace_minutes: float = DEFAULT_GRACE_MINUTES
    tick_minutes: float = DEFAULT_TICK_MINUTES


DEFAULT_SOURCE_AMBIGUOUS = "raise"


@dataclass(frozen=True, slots=True)
class SourceSettings:
    url: str
    query: str
    kind: Literal["events", "counts"]
    ambiguous: Literal["raise", "earlier", "later"] = DEFAULT_SOURCE_AMBIGUOUS


DEFAULT_ALARM_LEVEL = 0.01
DEFAULT_WATCH_LEVEL = 0.05
DEFAULT_MIN_EFFECT_W = 0.30
DEFAULT_MIN_EFFECT_V = 0.15
DEFAULT_MIN_RATE_RATIO = 1.25
DEFAULT_MULTIPLE_TESTING = "bh"
DEFAULT_POWER = 0.80
DEFAULT_PERSISTENCE_K = 1
DEFAULT_PERSISTENCE_M = 1
DEFAULT_AUTO_CLEAR_AFTER = 3
DEFAULT_MC_DRAWS = 10_000
DEFAULT_SEED = 20260105
MULTIPLE_TESTING_METHODS = ("bh", "holm", "by", "none")


@dataclass(frozen=True, slots=True)
class Thresholds:
    """``[thresholds]``: when a finding becomes a "watch" or an "alarm" (see module doc)."""

    alarm_level: float = DEFAULT_ALARM_LEVEL
    watch_level: float = DEFAULT_WATCH_LEVEL
    min_effect_w: float = DEFAULT_MIN_EFFECT_W
    min_effect_v: float = DEFAULT_MIN_EFFECT_V
    min_rate_ratio: float = DEFAULT_MIN_RATE_RATIO
    multiple_testing: Literal["bh", "holm", "by", "none"] = DEFAULT_MULTIPLE_TESTING
    power: float = DEFAULT_POWER
    persistence_k: int = DEFAULT_PERSISTENCE_K
    persistence_m: int = DEFAULT_PERSISTENCE_M
    auto_clear_after: int = DEFAULT_AUTO_CLEAR_AFTER
    mc_draws: int = DEFAULT_MC_DRAWS
    seed: int = DEFAULT_SEED


@dataclass(frozen=True, slots=True)
class BaselineSpec:
    """One ``[baseline.NAME]`` table, validated; ``proportions`` cover every plant category
    in the plant's category order and sum to 1."""

    name: str
    lines: tuple[str, ...]  # ("*",) means every line
    effective: dt.date
    proportions: Mapping[str, float]
    rate: float | None
    thresholds: Mapping[str, Any]  # overrides of Thresholds fields (validated, typed)
    toml_text: str  # canonical TOML text of this table
    content_hash: str  # sha256 hex of toml_text
    counts: Mapping[str, int] | None = None  # when the shares were derived from counts
    note: str = ""

    @property
    def all_lines(self) -> bool:
        return self.lines == (ALL_LINES,)

    def covers(self, line: str) -> bool:
        return self.all_lines or line in self.lines


DEFAULT_SEQ_ENABLED = True
DEFAULT_TARGET_ARL = 370.0
DEFAULT_EWMA_LAMBDA = 0.2  # same as qcfit.stats.sequential.DEFAULT_EWMA_LAMBDA


@dataclass(frozen=True, slots=True)
class Concern:
    """A shift of concern for a tuned CUSUM: category ``category`` up by ``factor``."""

    category: str
    factor: float


@dataclass(frozen=True, slots=True)
class SequentialSettings:
    enabled: bool = DEFAULT_SEQ_ENABLED
    target_arl: float = DEFAULT_TARGET_ARL
    ewma_lambda: float = DEFAULT_EWMA_LAMBDA
    concerns: tuple[Concern, ...] = ()


DEFAULT_REPORT_KEEP = 30


@dataclass(frozen=True, slots=True)
class ReportSettings:
    folder: str | None = None
    keep: int = DEFAULT_REPORT_KEEP


DEFAULT_SMTP_PORT = 25
DEFAULT_NOTIFY_RETRIES = 3


@dataclass(frozen=True, slots=True)
class NotifySettings:
    smtp_host: str | None = None
    smtp_port: int = DEFAULT_SMTP_PORT
    mail_from: str | None = None
    mail_to: tuple[str, ...] = ()
    command: tuple[str, ...] | None = None
    retries: int = DEFAULT_NOTIFY_RETRIES


DEFAULT_LOG_LEVEL = "INFO"
DEFAULT_LOG_MAX_BYTES = 10_000_000
DEFAULT_LOG_BACKUPS = 5
LOG_LEVELS = ("DEBUG", "INFO", "WARNING", "ERROR", "CRITICAL")


@dataclass(frozen=True, slots=True)
class LogSettings:
    file: str | None = None
    level: str = DEFAULT_LOG_LEVEL
    max_bytes: int = DEFAULT_LOG_MAX_BYTES
    backups: int = DEFAULT_LOG_BACKUPS


@dataclass(frozen=True, slots=True)
class Config:
    """The whole validated plant config. ``hash`` is the sha256 hex of ``text``."""

    path: Path | None
    text: str
    hash: str
    timezone: zoneinfo.ZoneInfo
    timezone_name: str
    shifts: tuple[ShiftSpec, ...]
    non_production_weekdays: frozenset[int]  # 0 = Monday
    non_production_dates: frozenset[dt.date]
    lines: Mapping[str, str]
    categories: Mapping[str, str]
    store: StoreSettings
    schedule: ScheduleSettings
    source: SourceSettings | None
    thresholds: Thresholds
    baselines: tuple[BaselineSpec, ...]
    sequential: SequentialSettings
    report: ReportSettings
    notify: NotifySettings
    log: LogSettings
    plant_name: str = ""
    warnings: tuple[Problem, ...] = field(default=())  # e.g. proportions normalised


# --------------------------------------------------------------------------- collecting

class _Collector:
    """Gathers problems (errors) and warnings while a mapping is read."""

    def __init__(self) -> None:
        self.problems: list[Problem] = []
        self.warnings: list[Problem] = []

    def add(self, key: str, reason: str) -> None:
        self.problems.append(Problem(key, reason))

    def warn(self, key: str, reason: str) -> None:
        self.warnings.append(Problem(key, reason))


def _show(value: Any) -> str:
    """A value as the user wrote it: strings in double quotes."""
    if isinstance(value, str):
        return '"' + value.replace("\\", "\\\\").replace('"', '\\"') + '"'
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, dict):
        return "a table"
    if isinstance(value, list):
        return "a list"
    return str(value)


def _join(prefix: str, key: str) -> str:
    return f"{prefix}.{key}" if prefix else key


def _table(col: _Collector, parent: Mapping, key: str, prefix: str = "") -> dict | None:
    """The sub-table ``key`` of ``parent``; None when absent; a problem when not a table."""
    if key not in parent:
        return None
    value = parent[key]
    if not isinstance(value, dict):
        col.add(_join(prefix, key), f"must be a table ([{_join(prefix, key)}]), not {_show(value)}")
        return None
    return value


def _unknown(col: _Collector, table: Mapping, allowed: tuple[str, ...], prefix: str) -> None:
    for key in table:
        if key not in allowed:
            hint = difflib.get_close_matches(str(key), allowed, n=1)
            more = f"; did you mean {hint[0]!r}?" if hint else f"; known keys: {', '.join(allowed)}"
            col.add(_join(prefix, str(key)), "unknown key" + more)


Check = Callable[[Any], str | None]


def _real(lo: float | None = None, hi: float | None = None, *, lo_open: bool = False,
          hi_open: bool = False) -> Check:
    def check(value: Any) -> str | None:
        if isinstance(value, bool) or not isinstance(value, int | float):
            return f"must be a number, not {_show(value)}"
        if not math.isfinite(value):
            return f"must be a finite number, not {_show(value)}"
        if lo is not None and (value < lo or (lo_open and value == lo)):
            return f"{_show(value)} must be {'>' if lo_open else '>='} {lo:g}"
        if hi is not None and (value > hi or (hi_open and value == hi)):
            return f"{_show(value)} must be {'<' if hi_open else '<='} {hi:g}"
        return None
    return check


def _integer(lo: int | None = None, hi: int | None = None) -> Check:
    def check(value: Any) -> str | None:
        if isinstance(value, bool) or not isinstance(value, int):
            return f"must be a whole number, not {_show(value)}"
        if lo is not None and value < lo:
            return f"{value} must be >= {lo}"
        if hi is not None and value > hi:
            return f"{value} must be <= {hi}"
        return None
    return check


def _choice(options: tuple[str, ...], *, upper: bool = False) -> Check:
    def check(value: Any) -> str | None:
        text = value.upper() if upper and isinstance(value, str) else value
        if not isinstance(value, str) or text not in options:
            return f"{_show(value)} is not one of {', '.join(repr(o) for o in options)}"
        return None
    return check


def _text(*, empty_ok: bool = False) -> Check:
    def check(value: Any) -> str | None:
        if not isinstance(value, str):
            return f"must be a string, not {_show(value)}"
        if not empty_ok and not value.strip():
            return "must not be empty"
        return None
    return check


def _boolean(value: Any) -> str | None:
    return None if isinstance(value, bool) else f"must be true or false, not {_show(value)}"


def _value(col: _Collector, table: Mapping, key: str, prefix: str, check: Check,
           default: Any = None, *, required: bool = False) -> Any:
    """Read and check one scalar; on a problem record it and return the default."""
    if key not in table:
        if required:
            col.add(_join(prefix, key), "missing")
        return default
    reason = check(table[key])
    if reason:
        col.add(_join(prefix, key), reason)
        return default
    value = table[key]
    return float(value) if isinstance(value, int) and isinstance(default, float) else value


def _read_section(col: _Collector, mapping: Mapping, name: str,
                  fields: dict[str, tuple[Check, Any]]) -> dict[str, Any]:
    """Read a flat section whose keys are all optional scalars with defaults."""
    table = _table(col, mapping, name) or {}
    _unknown(col, table, tuple(fields), name)
    return {k: _value(col, table, k, name, chk, default) for k, (chk, default) in fields.items()}


# --------------------------------------------------------------------------- plant, shifts

def _parse_time(value: Any, *, allow_24: bool) -> dt.time | None:
    if isinstance(value, dt.time) and value.tzinfo is None:
        return value
    if not isinstance(value, str):
        return None
    m = _TIME_TEXT.match(value.strip())
    if not m:
        return None
    hour, minute, second = int(m[1]), int(m[2]), int(m[3] or 0)
    if allow_24 and (hour, minute, second) == (24, 0, 0):
        return dt.time(0, 0)
    if hour > 23 or minute > 59 or second > 59:
        return None
    return dt.time(hour, minute, second)


def _clock_minutes(t: dt.time) -> float:
    return t.hour * 60 + t.minute + t.second / 60 + t.microsecond / 60e6


def _span_minutes(start: dt.time, end: dt.time) -> float:
    """Wall-clock length of a shift in minutes; end <= start crosses midnight."""
    span = (_clock_minutes(end) - _clock_minutes(start)) % 1440
    return span if span > 0 else 1440.0


def _overlap(a: ShiftSpec, b: ShiftSpec) -> bool:
    """Whether two shifts overlap on the 24-hour circle."""
    sa, sb = _clock_minutes(a.start), _clock_minutes(b.start)
    return (sb - sa) % 1440 < _span_minutes(a.start, a.end) or (
        (sa - sb) % 1440 < _span_minutes(b.start, b.end))


def _parse_shift(col: _Collector, raw: Any, key: str) -> ShiftSpec | None:
    if not isinstance(raw, dict):
        col.add(key, f"must be a table with name, start and end, not {_show(raw)}")
        return None
    _unknown(col, raw, ("name", "start", "end"), key)
    name = _value(col, raw, "name", key, _text(), required=True)
    if name is not None and not _SHIFT_NAME.match(name):
        col.add(f"{key}.name", f"{_show(name)}: use letters, digits, '-' and '_' only")
        name = None
    times: dict[str, dt.time | None] = {}
    for part in ("start", "end"):
        if part not in raw:
            col.add(f"{key}.{part}", "missing")
            times[part] = None
            continue
        times[part] = _parse_time(raw[part], allow_24=part == "end")
        if times[part] is None:
            col.add(f"{key}.{part}", f'{_show(raw[part])} is not a time of day; write "HH:MM", e.g. "06:00"')
    if name is None or times["start"] is None or times["end"] is None:
        return None
    return ShiftSpec(name, times["start"], times["end"])


def _parse_shifts(col: _Collector, mapping: Mapping) -> tuple[ShiftSpec, ...]:
    raw = mapping.get("shift")
    if raw is None:
        col.add("shift", 'missing; add one [[shift]] table per shift (name, start, end)')
        return ()
    if isinstance(raw, dict):
        col.add("shift", "write each shift as its own [[shift]] table (double brackets)")
        return ()
    if not isinstance(raw, list) or not raw:
        col.add("shift", "add at least one [[shift]] table (name, start, end)")
        return ()
    shifts: list[tuple[int, ShiftSpec]] = []
    for i, item in enumerate(raw, start=1):
        spec = _parse_shift(col, item, f"shift[{i}]")
        if spec is not None:
            shifts.append((i, spec))
    seen: dict[str, int] = {}
    for i, spec in shifts:
        if spec.name in seen:
            col.add(f"shift[{i}].name", f"{_show(spec.name)} is already the name of shift[{seen[spec.name]}]")
        seen.setdefault(spec.name, i)
    overlaps = False
    for a in range(len(shifts)):
        for b in range(a + 1, len(shifts)):
            (i, x), (j, y) = shifts[a], shifts[b]
            if _overlap(x, y):
                overlaps = True
                col.add(f"shift[{j}]", f"{_fmt_span(y)} overlaps shift[{i}] {_fmt_span(x)}")
    specs = tuple(spec for _, spec in shifts)
    gaps = [] if overlaps else _uncovered(specs)
    if gaps:
        col.warn("shift", f"no shift covers {', '.join(gaps)}; events then belong to no shift")
    return specs


def _clock_text(minutes: float) -> str:
    seconds = round(minutes * 60) % 86400
    h, rest = divmod(seconds, 3600)
    m, sec = divmod(rest, 60)
    return f"{h:02d}:{m:02d}" + (f":{sec:02d}" if sec else "")


def _uncovered(specs: tuple[ShiftSpec, ...]) -> list[str]:
    """Wall-clock spans no shift covers ("22:00-06:00"), for non-overlapping shifts."""
    ordered = sorted(specs, key=lambda s: _clock_minutes(s.start))
    gaps: list[str] = []
    for k, spec in enumerate(ordered):
        end = (_clock_minutes(spec.start) + _span_minutes(spec.start, spec.end)) % 1440
        following = _clock_minutes(ordered[(k + 1) % len(ordered)].start)
        if (following - end) % 1440 > 1e-9:
            gaps.append(f"{_clock_text(end)}-{_clock_text(following)}")
    return gaps


def _fmt_span(s: ShiftSpec) -> str:
    return f"{s.name} {s.start:%H:%M}-{s.end:%H:%M}"


def _parse_timezone(col: _Collector, plant: Mapping) -> tuple[zoneinfo.ZoneInfo | None, str]:
    if "timezone" not in plant:
        col.add("plant.timezone", 'missing; the plant\'s IANA time zone, e.g. timezone = "Europe/Berlin"')
        return None, ""
    name = _value(col, plant, "timezone", "plant", _text())
    if name is None:
        return None, ""
    try:
        return zoneinfo.ZoneInfo(name), name
    except (zoneinfo.ZoneInfoNotFoundError, ValueError, OSError):
        hint = difflib.get_close_matches(name, sorted(zoneinfo.available_timezones()), n=1)
        more = f"; did you mean {hint[0]!r}?" if hint else '; use an IANA name like "Europe/Berlin"'
        col.add("plant.timezone", f"{_show(name)} is not a known time zone{more}")
        return None, name


def _parse_weekdays(col: _Collector, plant: Mapping) -> frozenset[int]:
    raw = plant.get("non_production_days", [])
    if isinstance(raw, str):
        raw = [raw]
    if not isinstance(raw, list):
        col.add("plant.non_production_days", f'must be a list of weekday names like ["Sun"], not {_show(raw)}')
        return frozenset()
    days: set[int] = set()
    for item in raw:
        text = item.strip().lower() if isinstance(item, str) else ""
        match = [i for i, d in enumerate(WEEKDAYS) if len(text) >= 3 and text.startswith(d)
                 and dt.date(2024, 1, 1 + i).strftime("%A").lower().startswith(text)]
        if not match:
            col.add("plant.non_production_days", f"{_show(item)} is not a weekday name (Mon ... Sun)")
        else:
            days.add(match[0])
    return frozenset(days)


def _parse_date(value: Any) -> dt.date | None:
    if isinstance(value, dt.datetime):
        return None
    if isinstance(value, dt.date):
        return value
    if isinstance(value, str):
        try:
            return dt.date.fromisoformat(value.strip())
        except ValueError:
            return None
    return None


def _parse_holidays(col: _Collector, plant: Mapping) -> frozenset[dt.date]:
    raw = plant.get("holidays", [])
    if not isinstance(raw, list):
        col.add("plant.holidays", f"must be a list of dates like [2026-12-25], not {_show(raw)}")
        return frozenset()
    dates: set[dt.date] = set()
    for i, item in enumerate(raw, start=1):
        day = _parse_date(item)
        if day is None:
            col.add(f"plant.holidays[{i}]", f"{_show(item)} is not a date (YYYY-MM-DD)")
        else:
            dates.add(day)
    return frozenset(dates)


def _parse_codes(col: _Collector, mapping: Mapping, section: str, minimum: int) -> FrozenMap:
    table = _table(col, mapping, section)
    if table is None:
        if section not in mapping:
            col.add(section, f"missing; add a [{section}] table of CODE = \"display name\"")
        return FrozenMap()
    if len(table) < minimum:
        col.add(section, f"needs at least {minimum} entr{'y' if minimum == 1 else 'ies'}")
    good: dict[str, str] = {}
    for code, name in table.items():
        key = f"{section}.{code}"
        if code != code.strip() or not code or _CODE_BAD.search(code):
            col.add(key, "a code must not be empty or have surrounding spaces or control characters")
        elif len(code) > MAX_CODE_LENGTH:
            col.add(key, f"a code has at most {MAX_CODE_LENGTH} characters")
        elif code == ALL_LINES:
            col.add(key, '"*" is reserved (it means every line in a baseline)')
        elif not isinstance(name, str):
            col.add(key, f'the display name must be a string, e.g. {code} = "...", not {_show(name)}')
        else:
            good[code] = name.strip() or code
    return FrozenMap(good)


# --------------------------------------------------------------------------- thresholds

THRESHOLD_FIELDS: dict[str, tuple[Check, Any]] = {
    "alarm_level": (_real(0, 1, lo_open=True, hi_open=True), DEFAULT_ALARM_LEVEL),
    "watch_level": (_real(0, 1, lo_open=True, hi_open=True), DEFAULT_WATCH_LEVEL),
    "min_effect_w": (_real(0), DEFAULT_MIN_EFFECT_W),
    "min_effect_v": (_real(0, 1), DEFAULT_MIN_EFFECT_V),
    "min_rate_ratio": (_real(1), DEFAULT_MIN_RATE_RATIO),
    "multiple_testing": (_choice(MULTIPLE_TESTING_METHODS), DEFAULT_MULTIPLE_TESTING),
    "power": (_real(0, 1, lo_open=True, hi_open=True), DEFAULT_POWER),
    "persistence_k": (_integer(1, 100), DEFAULT_PERSISTENCE_K),
    "persistence_m": (_integer(1, 100), DEFAULT_PERSISTENCE_M),
    "auto_clear_after": (_integer(0, 10_000), DEFAULT_AUTO_CLEAR_AFTER),
    "mc_draws": (_integer(100, 100_000_000), DEFAULT_MC_DRAWS),
    "seed": (_integer(0, 2**63 - 1), DEFAULT_SEED),
}


def _cross_check_thresholds(col: _Collector, t: Thresholds, prefix: str) -> None:
    if t.alarm_level > t.watch_level:
        col.add(f"{prefix}.alarm_level",
                f"{t.alarm_level:g} is above watch_level {t.watch_level:g}; the alarm level must be"
                " the stricter (smaller) one")
    if t.persistence_k > t.persistence_m:
        col.add(f"{prefix}.persistence_k",
                f"{t.persistence_k} is more than persistence_m {t.persistence_m} (k of the last m shifts)")


def _parse_thresholds(col: _Collector, mapping: Mapping) -> Thresholds:
    values = _read_section(col, mapping, "thresholds", THRESHOLD_FIELDS)
    result = Thresholds(**values)
    _cross_check_thresholds(col, result, "thresholds")
    return result


def _parse_overrides(col: _Collector, raw: Mapping, prefix: str, base: Thresholds) -> FrozenMap:
    _unknown(col, raw, tuple(THRESHOLD_FIELDS), prefix)
    out: dict[str, Any] = {}
    for key in sorted(k for k in raw if k in THRESHOLD_FIELDS):
        check, default = THRESHOLD_FIELDS[key]
        if check(raw[key]) is None:
            out[key] = _value(col, raw, key, prefix, check, default)
        else:
            _value(col, raw, key, prefix, check, default)
    _cross_check_thresholds(col, dataclasses.replace(base, **out), prefix)
    return FrozenMap(out)


def thresholds_for(config: Config, spec: BaselineSpec | None) -> Thresholds:
    """The plant's ``[thresholds]`` with the baseline's own overrides applied."""
    if spec is None or not spec.thresholds:
        return config.thresholds
    return dataclasses.replace(config.thresholds, **dict(spec.thresholds))


# --------------------------------------------------------------------------- baselines

BASELINE_KEYS = ("lines", "effective", "proportions", "counts", "normalize", "rate", "note",
                 "thresholds")


def _baseline_lines(col: _Collector, raw: Mapping, key: str, lines: Mapping[str, str]
                    ) -> tuple[str, ...] | None:
    value = raw.get("lines")
    if value is None:
        col.add(f"{key}.lines", 'missing; list line codes, e.g. ["L1", "L2"], or "*" for every line')
        return None
    if isinstance(value, str):
        value = [value]
    if not isinstance(value, list) or not value or not all(isinstance(v, str) for v in value):
        col.add(f"{key}.lines", f'must be a non-empty list of line codes or "*", not {_show(value)}')
        return None
    if ALL_LINES in value:
        if len(value) > 1:
            col.add(f"{key}.lines", '"*" already means every line; do not list lines beside it')
            return None
        return (ALL_LINES,)
    ok = True
    for code in value:
        if code not in lines and code.strip() not in lines:
            col.add(f"{key}.lines", f"unknown line {_show(code)} (not in [lines])")
            ok = False
    codes = [c if c in lines else c.strip() for c in value]
    dupes = sorted({c for c in codes if codes.count(c) > 1})
    if dupes:
        col.add(f"{key}.lines", f"line {_show(dupes[0])} is listed twice")
        ok = False
    return tuple(c for c in lines if c in codes) if ok else None


def _shares(col: _Collector, raw: Mapping, key: str, categories: Mapping[str, str]
            ) -> tuple[dict[str, float] | None, dict[str, int] | None]:
    """Validated (proportions, counts) of one baseline; proportions None on any problem."""
    has_p, has_c = "proportions" in raw, "counts" in raw
    if has_p == has_c:
        col.add(key, "give either proportions = {...} or counts = {...}" + (
            ", not both" if has_p else " (one share or count per category)"))
        return None, None
    part = "proportions" if has_p else "counts"
    table = raw[part]
    pkey = f"{key}.{part}"
    if not isinstance(table, dict):
        col.add(pkey, f"must be a table like {{ {next(iter(categories), 'SCR')} = 0.4, ... }}, not {_show(table)}")
        return None, None
    ok = True
    check = _integer(1) if part == "counts" else _real(0, lo_open=True)
    for code, value in table.items():
        if code not in categories:
            col.add(f"{pkey}.{code}", "unknown category (not in [categories])")
            ok = False
            continue
        reason = check(value)
        if reason:
            col.add(f"{pkey}.{code}", reason)
            ok = False
    for code in categories:
        if code not in table:
            col.add(pkey, f"category {code} of the plant is missing from baseline {key.split('.', 1)[1]!r}")
            ok = False
    if not ok:
        return None, None
    if part == "counts":
        total = sum(table.values())
        return {c: table[c] / total for c in categories}, {c: int(table[c]) for c in categories}
    return {c: float(table[c]) for c in categories}, None


def _normalised(col: _Collector, raw: Mapping, key: str, shares: dict[str, float]
                ) -> dict[str, float] | None:
    total = math.fsum(shares.values())
    if abs(total - 1.0) <= PROPORTION_TOLERANCE:
        return shares
    normalize = raw.get("normalize", False)
    if normalize is True:
        col.warn(f"{key}.proportions", f"shares sum to {total:.9g}, not 1; scaled to sum to 1")
        return {c: v / total for c, v in shares.items()}
    col.add(f"{key}.proportions",
            f"shares sum to {total:.9g}, not 1 (within {PROPORTION_TOLERANCE:g}); fix them or set"
            " normalize = true to scale them")
    return None


def canonical_baseline_toml(name: str, table: Mapping[str, Any]) -> str:
    """Deterministic TOML text of one ``[baseline.NAME]`` table: sorted keys, numbers in one
    form, ``normalize = false`` and empty sub-tables dropped, lines sorted."""
    body = tomlkit.table()
    for key in sorted(table):
        value = table[key]
        if key == "normalize" and value is False:
            continue
        if key == "lines":
            items = [value] if isinstance(value, str) else list(value)
            body[key] = ALL_LINES if items == [ALL_LINES] else sorted(v.strip() for v in items)
        elif key in ("proportions", "counts"):
            inline = tomlkit.inline_table()
            for code in sorted(value):
                v = value[code]
                inline[code] = v if key == "counts" else float(v)
            body[key] = inline
        elif key == "thresholds":
            if value:
                sub = tomlkit.table()
                for tk in sorted(value):
                    tv = value[tk]
                    _, default = THRESHOLD_FIELDS.get(tk, (None, None))
                    sub[tk] = float(tv) if isinstance(default, float) else tv
                body[key] = sub
        elif key == "rate":
            body[key] = float(value)
        elif key == "effective":
            body[key] = _parse_date(value) or value
        else:
            body[key] = value
    outer = tomlkit.table(is_super_table=True)
    outer[name] = body
    doc = tomlkit.document()
    doc["baseline"] = outer
    return tomlkit.dumps(doc)


def _parse_baseline(col: _Collector, name: str, raw: Any, cfg: dict[str, Any],
                    slots: list[tuple[str, tuple[str, ...], dt.date]]) -> BaselineSpec | None:
    """The baseline, or None when it has problems; ``(name, lines, effective)`` is appended
    to ``slots`` whenever those two parsed, so overlaps are reported beside other problems."""
    key = f"baseline.{name}"
    if not isinstance(raw, dict):
        col.add(key, f"must be a table: write each baseline as its own [baseline.NAME] table,"
                f" not {_show(raw)}")
        return None
    before = len(col.problems)
    _unknown(col, raw, BASELINE_KEYS, key)
    lines = _baseline_lines(col, raw, key, cfg["lines"])
    effective = None
    if "effective" not in raw:
        col.add(f"{key}.effective", "missing; the first shift date it applies to, e.g. effective = 2026-01-05")
    else:
        effective = _parse_date(raw["effective"])
        if effective is None:
            col.add(f"{key}.effective", f"{_show(raw['effective'])} is not a date (write 2026-01-05)")
    if lines is not None and effective is not None:
        slots.append((name, lines, effective))
    _value(col, raw, "normalize", key, _boolean, False)
    shares, counts = _shares(col, raw, key, cfg["categories"])
    proportions = _normalised(col, raw, key, shares) if shares is not None else None
    rate = _value(col, raw, "rate", key, _real(0, lo_open=True), None)
    note = _value(col, raw, "note", key, _text(empty_ok=True), "")
    overrides = FrozenMap()
    sub = _table(col, raw, "thresholds", key)
    if sub is not None:
        overrides = _parse_overrides(col, sub, f"{key}.thresholds", cfg["thresholds"])
    if len(col.problems) > before or lines is None or effective is None or proportions is None:
        return None
    text = canonical_baseline_toml(name, raw)
    return BaselineSpec(
        name=name, lines=lines, effective=effective, proportions=FrozenMap(proportions),
        rate=None if rate is None else float(rate), thresholds=overrides, toml_text=text,
        content_hash=hashlib.sha256(text.encode("utf-8")).hexdigest(),
        counts=None if counts is None else FrozenMap(counts), note=note,
    )


def _check_overlaps(col: _Collector, slots: list[tuple[str, tuple[str, ...], dt.date]]
                    ) -> None:
    """Two baselines for the same line (or both "*") with the same effective date; every
    baseline whose lines and effective date parsed takes part, whatever else is wrong."""
    seen: dict[tuple[str, dt.date], str] = {}
    for name, lines, effective in slots:
        for line in lines:
            slot = (line, effective)
            if slot in seen:
                what = "every line (\"*\")" if line == ALL_LINES else f"line {line}"
                col.add(f"baseline.{name}.effective",
                        f"{effective.isoformat()} is also the effective date of baseline."
                        f"{seen[slot]} for {what}; give one of them another date")
            else:
                seen[slot] = name


def _parse_baselines(col: _Collector, mapping: Mapping, cfg: dict[str, Any]
                     ) -> tuple[BaselineSpec, ...]:
    table = _table(col, mapping, "baseline") or {}
    slots: list[tuple[str, tuple[str, ...], dt.date]] = []
    specs = [s for n, raw in table.items()
             if (s := _parse_baseline(col, n, raw, cfg, slots)) is not None]
    _check_overlaps(col, slots)
    return tuple(sorted(specs, key=lambda s: (s.effective, s.name)))


def baseline_for(config: Config, line: str, at: dt.date) -> BaselineSpec | None:
    """The baseline in force for ``line`` on shift start date ``at``: among baselines naming
    the line explicitly the latest effective <= at; if none, the same among "*" baselines."""
    for explicit in (True, False):
        found = [s for s in config.baselines
                 if s.effective <= at and (line in s.lines if explicit else s.all_lines)]
        if found:
            return max(found, key=lambda s: s.effective)
    return None


# --------------------------------------------------------------------------- other sections

def _parse_store(col: _Collector, mapping: Mapping) -> StoreSettings:
    return StoreSettings(**_read_section(col, mapping, "store", {"url": (_text(), None)}))


def _parse_schedule(col: _Collector, mapping: Mapping) -> ScheduleSettings:
    return ScheduleSettings(**_read_section(col, mapping, "schedule", {
        "grace_minutes": (_real(0, 1440), DEFAULT_GRACE_MINUTES),
        "tick_minutes": (_real(0, 1440, lo_open=True), DEFAULT_TICK_MINUTES),
    }))


def _parse_source(col: _Collector, mapping: Mapping) -> SourceSettings | None:
    table = _table(col, mapping, "source")
    if table is None:
        return None
    _unknown(col, table, ("url", "query", "kind", "ambiguous"), "source")
    url = _value(col, table, "url", "source", _text(), required=True)
    query = _value(col, table, "query", "source", _text(), required=True)
    kind = _value(col, table, "kind", "source", _choice(("events", "counts")), required=True)
    amb = _value(col, table, "ambiguous", "source", _choice(("raise", "earlier", "later")),
                 DEFAULT_SOURCE_AMBIGUOUS)
    if url is None or query is None or kind is None:
        return None
    return SourceSettings(url=url, query=query, kind=kind, ambiguous=amb)


def _parse_concerns(col: _Collector, raw: Any, categories: Mapping[str, str]
                    ) -> tuple[Concern, ...]:
    if not isinstance(raw, list):
        col.add("sequential.concerns", f'must be a list like [{{category = "SCR", factor = 2.0}}], not {_show(raw)}')
        return ()
    out: list[Concern] = []
    for i, item in enumerate(raw, start=1):
        key = f"sequential.concerns[{i}]"
        if not isinstance(item, dict):
            col.add(key, f"must be a table {{category = ..., factor = ...}}, not {_show(item)}")
            continue
        _unknown(col, item, ("category", "factor"), key)
        cat = _value(col, item, "category", key, _text(), required=True)
        if cat is not None and cat not in categories:
            col.add(f"{key}.category", f"{_show(cat)} is not a category in [categories]")
            cat = None
        factor = _value(col, item, "factor", key, _real(0, lo_open=True), required=True)
        if factor is not None and factor == 1:
            col.add(f"{key}.factor", "1 means no change; use a factor above 1 (up) or below 1 (down)")
            factor = None
        if cat is not None and factor is not None:
            out.append(Concern(cat, float(factor)))
    return tuple(out)


def _parse_sequential(col: _Collector, mapping: Mapping, categories: Mapping[str, str]
                      ) -> SequentialSettings:
    table = _table(col, mapping, "sequential") or {}
    values = _read_section(col, {"sequential": {k: v for k, v in table.items() if k != "concerns"}},
                           "sequential", {
        "enabled": (_boolean, DEFAULT_SEQ_ENABLED),
        "target_arl": (_real(1, lo_open=True), DEFAULT_TARGET_ARL),
        "ewma_lambda": (_real(0, 1), DEFAULT_EWMA_LAMBDA),
    })
    concerns = _parse_concerns(col, table.get("concerns", []), categories)
    return SequentialSettings(concerns=concerns, **values)


def _parse_report(col: _Collector, mapping: Mapping) -> ReportSettings:
    return ReportSettings(**_read_section(col, mapping, "report", {
        "folder": (_text(), None),
        "keep": (_integer(1, 100_000), DEFAULT_REPORT_KEEP),
    }))


def _address(value: Any) -> str | None:
    if not isinstance(value, str) or not re.fullmatch(r"[^@\s<>]+@[^@\s<>]+", value.strip()):
        return f"{_show(value)} is not a mail address (name@host)"
    return None


def _parse_notify(col: _Collector, mapping: Mapping) -> NotifySettings:
    table = dict(_table(col, mapping, "notify") or {})
    mail_to = table.pop("mail_to", [])
    command = table.pop("command", None)
    values = _read_section(col, {"notify": table}, "notify", {
        "smtp_host": (_text(), None),
        "smtp_port": (_integer(1, 65535), DEFAULT_SMTP_PORT),
        "mail_from": (_address, None),
        "retries": (_integer(0, 20), DEFAULT_NOTIFY_RETRIES),
    })
    if isinstance(mail_to, str):
        mail_to = [mail_to]
    good_to: list[str] = []
    if not isinstance(mail_to, list):
        col.add("notify.mail_to", f"must be a list of mail addresses, not {_show(mail_to)}")
    else:
        for i, addr in enumerate(mail_to, start=1):
            reason = _address(addr)
            if reason:
                col.add(f"notify.mail_to[{i}]", reason)
            else:
                good_to.append(addr.strip())
    if command is not None and (not isinstance(command, list) or not command
                                or not all(isinstance(a, str) and a for a in command)):
        col.add("notify.command", 'must be a list of strings: the program and its arguments, e.g.'
                ' ["/usr/local/bin/notify-shift", "--json"]')
        command = None
    if values["smtp_host"] and (not values["mail_from"] or not good_to) and "notify.mail_to" not in {
            p.key for p in col.problems}:
        col.add("notify.smtp_host", "mail needs mail_from and mail_to as well")
    elif (mail_to or values["mail_from"]) and not values["smtp_host"]:
        col.add("notify.smtp_host", "missing; mail_to/mail_from need a mail server")
    return NotifySettings(mail_to=tuple(good_to),
                          command=tuple(command) if command else None, **values)


def _parse_log(col: _Collector, mapping: Mapping) -> LogSettings:
    values = _read_section(col, mapping, "log", {
        "file": (_text(), None),
        "level": (_choice(LOG_LEVELS, upper=True), DEFAULT_LOG_LEVEL),
        "max_bytes": (_integer(10_000), DEFAULT_LOG_MAX_BYTES),
        "backups": (_integer(0, 100), DEFAULT_LOG_BACKUPS),
    })
    values["level"] = values["level"].upper()
    return LogSettings(**values)


# --------------------------------------------------------------------------- entry points

TOP_LEVEL_KEYS = ("plant", "shift", "lines", "categories", "store", "schedule", "source",
                  "thresholds", "baseline", "sequential", "report", "notify", "log")
PLANT_KEYS = ("timezone", "name", "non_production_days", "holidays")


def _canonical_text(mapping: Mapping) -> str:
    try:
        return tomlkit.dumps(_sorted_tree(mapping))
    except Exception:  # noqa: BLE001 - any non-TOML value: fall back to its repr
        return repr(_sorted_tree(mapping))


def _sorted_tree(value: Any) -> Any:
    if isinstance(value, Mapping):
        return {str(k): _sorted_tree(value[k]) for k in sorted(value, key=str)}
    if isinstance(value, list | tuple):
        return [_sorted_tree(v) for v in value]
    return value


def parse_config(mapping: Mapping, *, text: str = "", path: Path | None = None) -> Config:
    """Validate a parsed TOML mapping into a :class:`Config` (pure: no file, clock or env).

    Every problem is collected first; then one ConfigError(problems, path) is raised.
    ``text`` is the file's text (its sha256 is ``Config.hash``); when empty, a canonical
    rendering of ``mapping`` stands in for it.
    """
    col = _Collector()
    if not isinstance(mapping, Mapping):
        raise ConfigError([Problem("file", "the top level must be a table")], _path_str(path))
    _unknown(col, mapping, TOP_LEVEL_KEYS, "")
    plant = _table(col, mapping, "plant")
    if plant is None:
        if "plant" not in mapping:
            col.add("plant", 'missing; add [plant] with timezone = "Area/City"')
        plant = {}
    _unknown(col, plant, PLANT_KEYS, "plant")
    tz, tz_name = _parse_timezone(col, plant) if plant or "plant" in mapping else (None, "")
    cfg: dict[str, Any] = {
        "plant_name": _value(col, plant, "name", "plant", _text(empty_ok=True), ""),
        "non_production_weekdays": _parse_weekdays(col, plant),
        "non_production_dates": _parse_holidays(col, plant),
        "shifts": _parse_shifts(col, mapping),
        "lines": _parse_codes(col, mapping, "lines", 1),
        "categories": _parse_codes(col, mapping, "categories", 2),
        "store": _parse_store(col, mapping),
        "schedule": _parse_schedule(col, mapping),
        "source": _parse_source(col, mapping),
        "thresholds": _parse_thresholds(col, mapping),
        "report": _parse_report(col, mapping),
        "notify": _parse_notify(col, mapping),
        "log": _parse_log(col, mapping),
    }
    cfg["sequential"] = _parse_sequential(col, mapping, cfg["categories"])
    cfg["baselines"] = _parse_baselines(col, mapping, cfg)
    if len(cfg["non_production_weekdays"]) == 7:
        col.add("plant.non_production_days", "every weekday is a non-production day")
    if col.problems or tz is None:
        raise ConfigError(col.problems, _path_str(path))
    text = text or _canonical_text(mapping)
    return Config(
        path=path, text=text, hash=hashlib.sha256(text.encode("utf-8")).hexdigest(),
        timezone=tz, timezone_name=tz_name, warnings=tuple(col.warnings), **cfg,
    )


def _path_str(path: str | Path | None) -> str | None:
    return None if path is None else str(path)


_TOML_WHERE = re.compile(r"\(at line (\d+), column (\d+)\)")
_BARE_TIME = re.compile(r"=\s*\d{1,2}:\d{2}\s*(#.*)?$")


def _syntax_problem(exc: tomllib.TOMLDecodeError, text: str) -> Problem:
    message = str(exc)
    m = _TOML_WHERE.search(message)
    reason = _TOML_WHERE.sub("", message).strip()
    if not m:
        reason = reason.replace("(at end of document)", "").strip()
        last = max(1, len(text.splitlines()))
        return Problem(f"line {last}, end of file", f"{reason} (something opened is never closed?)")
    line_no, col_no = int(m[1]), int(m[2])
    lines = text.splitlines()
    source = lines[line_no - 1] if 0 < line_no <= len(lines) else ""
    if _BARE_TIME.search(source):
        reason += '; write a time of day in quotes ("06:00") or with seconds (06:00:00)'
    if source.strip():
        reason += f": {source.strip()[:80]}"
    return Problem(f"line {line_no}, column {col_no}", reason)


def _read_text(path: Path) -> str:
    try:
        data = path.read_bytes()
    except FileNotFoundError:
        raise ConfigError([Problem("file", "not found")], str(path)) from None
    except IsADirectoryError:
        raise ConfigError([Problem("file", "is a folder, not a file")], str(path)) from None
    except OSError as exc:
        raise ConfigError([Problem("file", f"cannot be read: {exc.strerror or exc}")], str(path)) from exc
    try:
        return data.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        line_no = data[: exc.start].count(b"\n") + 1
        column = exc.start - (data.rfind(b"\n", 0, exc.start) + 1) + 1
        raise ConfigError([Problem(
            f"line {line_no}, column {column}",
            f"byte 0x{data[exc.start]:02x} is not UTF-8; save the file as UTF-8")], str(path)) from exc


def load_config(path: str | Path) -> Config:
    """Read and validate a config file: UTF-8 (a byte-order mark is fine), TOML.

    A missing or unreadable file, bytes that are not UTF-8 and TOML syntax errors are a
    ConfigError naming the file and the line; validation problems name their keys.
    Warnings (e.g. normalised proportions) are logged and kept in ``Config.warnings``.
    """
    path = Path(path)
    text = _read_text(path)
    try:
        mapping = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError([_syntax_problem(exc, text)], str(path)) from exc
    config = parse_config(mapping, text=text, path=path)
    for warning in config.warnings:
        log.warning("config %s: %s", path, warning)
    return config


def resolve_path(config: Config, value: str, config_path: Path | None = None) -> Path:
    """A path from the config (report folder, log file): relative ones are taken from the
    config file's folder, not the working directory."""
    base = config_path or config.path
    candidate = Path(value).expanduser()
    if candidate.is_absolute() or base is None:
        return candidate
    return Path(base).resolve().parent / candidate


def store_url_for(config: Config, config_path: Path) -> str:
    """The store URL: ``[store] url`` if given (a relative SQLite path is taken from the
    config's folder), else ``sqlite:///<config folder>/<config stem>.sqlite``."""
    config_path = Path(config_path)
    url = config.store.url
    if not url:
        target = config_path.resolve().parent / f"{config_path.stem}.sqlite"
        return f"sqlite:///{target.as_posix()}"
    m = re.match(r"^(sqlite(?:\+\w+)?:///)([^?]*)(\?.*)?$", url)
    if not m or not m[2] or m[2] == ":memory:" or m[2].startswith("file:"):
        return url
    file = Path(m[2])
    if file.is_absolute():
        return url
    target = config_path.resolve().parent / file
    return f"{m[1]}{target.as_posix()}{m[3] or ''}"


def timezone_source(name: str) -> str:
    """Where zoneinfo finds ``name``: a system zone folder, or the tzdata package (with its
    version). For the start-up log line."""
    for root in zoneinfo.TZPATH:
        if (Path(root) / name).is_file():
            return f"system time-zone database {root}"
    try:
        from importlib.metadata import version

        return f"tzdata package {version('tzdata')}"
    except Exception:  # noqa: BLE001 - metadata missing: still say where it came from
        return "tzdata package"

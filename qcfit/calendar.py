"""The shift calendar: which shift instance a moment belongs to, and which shifts have ended.

A shift starts on local date D at its local wall-clock ``start``; if ``end <= start`` it
ends on D+1. Boundaries are computed as local wall times, converted to real instants with
the plant's zone, and compared in UTC, so across a daylight-saving change a night shift
22:00-06:00 lasts 7 h (spring) or 9 h (autumn), and every instant belongs to at most one
shift: consecutive shifts share the very same boundary instant (no event lost or counted
twice).

* A local start or end that does not exist (the spring gap) moves forward to the first
  valid instant (the moment of the change).
* One that occurs twice (the repeated autumn hour) means the first occurrence (fold=0).
* Shifts that start on a non-production weekday or date do not exist for ``shift_at``,
  ``assign``, ``instances_between`` and ``ended_by``; ``instance`` refuses them unless asked.
* A shift lying wholly inside a spring gap has no length and is skipped.

``ShiftInstance.start``/``end`` carry the plant's UTC offset of that instant as a fixed-offset
``datetime.timezone``: they print as local time, and subtraction and comparison are exact
(two datetimes sharing one ``ZoneInfo`` object subtract as wall times, which is 8 h across a
DST night, not 7 or 9).
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Iterable, Sequence
from typing import TYPE_CHECKING, Any, Literal
from zoneinfo import ZoneInfo

import numpy as np

from qcfit.errors import InvalidArgumentError, NotFoundError
from qcfit.model import ShiftInstance, parse_shift_id

if TYPE_CHECKING:
    from qcfit.config import Config, ShiftSpec

__all__ = ["ShiftCalendar"]

UTC = dt.UTC
_EPOCH = dt.datetime(1970, 1, 1, tzinfo=UTC)
_US = dt.timedelta(microseconds=1)
_DAY = dt.timedelta(days=1)
_NAT = np.iinfo(np.int64).min
_CACHE_DAYS = 4096


def _to_us(ts: dt.datetime) -> int:
    """Microseconds since 1970-01-01 UTC of an aware datetime."""
    return (ts - _EPOCH) // _US


def _require_aware(ts: Any, argument: str) -> dt.datetime:
    if not isinstance(ts, dt.datetime):
        raise InvalidArgumentError(argument, f"must be a datetime, not {type(ts).__name__}")
    if ts.tzinfo is None or ts.utcoffset() is None:
        raise InvalidArgumentError(
            argument, f"{ts.isoformat()} has no time zone; pass an aware datetime")
    return ts


class ShiftCalendar:
    """Maps instants to shift instances of a plant (see the module docstring)."""

    def __init__(
        self,
        tz: ZoneInfo,
        shifts: Sequence[ShiftSpec],
        non_production_weekdays: Iterable[int] = (),
        non_production_dates: Iterable[dt.date] = (),
    ) -> None:
        _check_shifts(shifts)
        self._tz = tz
        self._shifts = tuple(sorted(shifts, key=lambda s: (s.start, s.name)))
        self._by_name = {s.name: s for s in self._shifts}
        self._weekdays = frozenset(non_production_weekdays)
        self._dates = frozenset(non_production_dates)
        self._days: dict[dt.date, tuple[tuple[ShiftInstance, int, int], ...]] = {}
        self._offsets: dict[dt.timedelta, dt.timezone] = {}

    @classmethod
    def from_config(cls, config: Config) -> ShiftCalendar:
        return cls(config.timezone, config.shifts, config.non_production_weekdays,
                   config.non_production_dates)

    @property
    def tz(self) -> ZoneInfo:
        return self._tz

    @property
    def shifts(self) -> tuple[ShiftSpec, ...]:
        """The shift specs, ordered by local start time."""
        return self._shifts

    def is_production_day(self, date: dt.date) -> bool:
        return date.weekday() not in self._weekdays and date not in self._dates

    # ------------------------------------------------------------------ wall time -> instant

    def _fixed(self, aware: dt.datetime) -> dt.datetime:
        """The same instant with the plant's offset of that moment as a fixed tzinfo."""
        local = aware.astimezone(self._tz)
        offset = local.utcoffset()
        assert offset is not None
        tzinfo = self._offsets.get(offset)
        if tzinfo is None:
            tzinfo = self._offsets.setdefault(offset, dt.timezone(offset))
        return local.replace(tzinfo=tzinfo, fold=0)

    def _wall(self, utc: dt.datetime) -> dt.datetime:
        return utc.astimezone(self._tz).replace(tzinfo=None, fold=0)

    def _candidates(self, naive: dt.datetime) -> tuple[dt.datetime, dt.datetime]:
        """UTC readings of a naive local time with fold=0 and fold=1."""
        first = naive.replace(tzinfo=self._tz, fold=0).astimezone(UTC)
        second = naive.replace(tzinfo=self._tz, fold=1).astimezone(UTC)
        return first, second

    def _first_valid_after(self, naive: dt.datetime, a: dt.datetime, b: dt.datetime) -> dt.datetime:
        """First instant whose local wall time is >= ``naive`` (which lies in a gap)."""
        lo, hi = (a, b) if a < b else (b, a)  # wall(lo) < naive < wall(hi)
        lo_us, hi_us = _to_us(lo), _to_us(hi)
        while hi_us - lo_us > 1:
            mid = (lo_us + hi_us) // 2
            if self._wall(_EPOCH + mid * _US) >= naive:
                hi_us = mid
            else:
                lo_us = mid
        return _EPOCH + hi_us * _US

    def wall_to_instant(self, date: dt.date, time: dt.time) -> dt.datetime:
        """The instant of local wall time ``time`` on ``date`` (gap: forward to the change;
        repeated hour: first occurrence), with a fixed-offset tzinfo."""
        naive = dt.datetime.combine(date, time)
        first, second = self._candidates(naive)
        if self._wall(first) != naive:  # does not exist: skipped by a spring change
            first = self._first_valid_after(naive, first, second)
        return self._fixed(first)

    def localize(
        self,
        naive_local: dt.datetime,
        *,
        ambiguous: Literal["raise", "earlier", "later"] = "raise",
        nonexistent: Literal["raise", "forward"] = "raise",
    ) -> dt.datetime:
        """A naive plant-local time as an aware datetime (fixed plant offset).

        ``ambiguous``: a time in the repeated autumn hour raises InvalidArgumentError, or is
        read as the earlier or later of its two instants. ``nonexistent``: a time in the
        spring gap raises, or moves forward to the moment of the change. An aware input is
        converted to plant time.
        """
        if not isinstance(naive_local, dt.datetime):
            raise InvalidArgumentError("timestamp", f"must be a datetime, not {type(naive_local).__name__}")
        if naive_local.tzinfo is not None:
            return self._fixed(_require_aware(naive_local, "timestamp"))
        naive = naive_local.replace(fold=0)
        first, second = self._candidates(naive)
        if self._wall(first) != naive:
            if nonexistent == "forward":
                return self._fixed(self._first_valid_after(naive, first, second))
            raise InvalidArgumentError("timestamp", (
                f"{naive.isoformat(sep=' ')} does not exist in {self._tz.key}: the clocks skip"
                " that hour at the daylight-saving change; give the UTC offset"))
        if first != second and self._wall(second) == naive:
            if ambiguous == "earlier":
                return self._fixed(min(first, second))
            if ambiguous == "later":
                return self._fixed(max(first, second))
            raise InvalidArgumentError("timestamp", (
                f"{naive.isoformat(sep=' ')} occurs twice in {self._tz.key}: the clocks go back"
                " at the daylight-saving change; give the UTC offset"))
        return self._fixed(first)

    # ------------------------------------------------------------------ instances

    def _build(self, date: dt.date, spec: ShiftSpec) -> ShiftInstance:
        start = self.wall_to_instant(date, spec.start)
        end_date = date + _DAY if spec.end <= spec.start else date
        end = self.wall_to_instant(end_date, spec.end)
        return ShiftInstance(start=start, end=end, date=date, name=spec.name)

    def _day(self, date: dt.date) -> tuple[tuple[ShiftInstance, int, int], ...]:
        """Production instances starting on ``date`` with their UTC [start, end) in us."""
        cached = self._days.get(date)
        if cached is not None:
            return cached
        rows: list[tuple[ShiftInstance, int, int]] = []
        if self.is_production_day(date):
            for spec in self._shifts:
                inst = self._build(date, spec)
                start_us, end_us = _to_us(inst.start), _to_us(inst.end)
                if end_us > start_us:
                    rows.append((inst, start_us, end_us))
        rows.sort(key=lambda r: r[1])
        if len(self._days) >= _CACHE_DAYS:
            self._days.clear()
        result = self._days[date] = tuple(rows)
        return result

    def _local_date(self, ts: dt.datetime) -> dt.date:
        return ts.astimezone(self._tz).date()

    def _rows(self, first: dt.date, last: dt.date) -> list[tuple[ShiftInstance, int, int]]:
        """Instances starting on local dates first-1 ... last+1, sorted by start."""
        rows: list[tuple[ShiftInstance, int, int]] = []
        day = first - _DAY
        while day <= last + _DAY:
            rows.extend(self._day(day))
            day += _DAY
        rows.sort(key=lambda r: r[1])
        return rows

    def instance(self, date: dt.date, name: str, *, include_non_production: bool = False
                 ) -> ShiftInstance:
        """The instance of shift ``name`` starting on local ``date``.

        NotFoundError for an unknown shift name, or (unless ``include_non_production``) a
        non-production day.
        """
        spec = self._by_name.get(name)
        if spec is None:
            known = ", ".join(s.name for s in self._shifts)
            raise NotFoundError("shift", f"{name!r} (the config has shifts {known})")
        if not include_non_production and not self.is_production_day(date):
            raise NotFoundError(
                "shift", f"{date.isoformat()}_{name} ({date:%a} {date.isoformat()} is a non-production day)")
        return self._build(date, spec)

    def from_id(self, shift_id: str, *, include_non_production: bool = False) -> ShiftInstance:
        """The instance named by an id like ``2026-01-05_A`` (InvalidArgumentError if malformed)."""
        date, name = parse_shift_id(shift_id)
        return self.instance(date, name, include_non_production=include_non_production)

    def shift_at(self, ts: dt.datetime) -> ShiftInstance | None:
        """The instance containing the aware instant ``ts`` (start <= ts < end), or None."""
        ts = _require_aware(ts, "ts")
        t_us = _to_us(ts)
        day = self._local_date(ts)
        for inst, start_us, end_us in self._rows(day, day):
            if start_us <= t_us < end_us:
                return inst
        return None

    def instances_between(self, since: dt.datetime, until: dt.datetime) -> list[ShiftInstance]:
        """Production instances whose start lies in [since, until), sorted by start."""
        lo = _to_us(_require_aware(since, "since"))
        hi = _to_us(_require_aware(until, "until"))
        if hi <= lo:
            return []
        rows = self._rows(self._local_date(since), self._local_date(until))
        return [inst for inst, start_us, _ in rows if lo <= start_us < hi]

    def ended_by(self, since: dt.datetime, now: dt.datetime) -> list[ShiftInstance]:
        """Production instances with start >= since and end <= now, sorted by start."""
        now_us = _to_us(_require_aware(now, "now"))
        return [i for i in self.instances_between(since, now) if _to_us(i.end) <= now_us]

    def next_end(self, now: dt.datetime, *, max_days: int = 400) -> ShiftInstance | None:
        """The first instance (by end) that ends after ``now``; None if none within max_days."""
        now_us = _to_us(_require_aware(now, "now"))
        day = self._local_date(now) - _DAY
        for _ in range(max_days + 2):
            later = [(end_us, inst) for inst, _, end_us in self._day(day) if end_us > now_us]
            if later:
                return min(later, key=lambda r: r[0])[1]
            day += _DAY
        return None

    # ------------------------------------------------------------------ vectorized

    def assign(self, ts_utc: Any) -> tuple[list[ShiftInstance], np.ndarray]:
        """Map many instants to shift instances at once.

        ``ts_utc``: numpy ``datetime64`` array (any unit, values are UTC; NaT allowed), or a
        pandas Series/Index or sequence of aware datetimes. Returns ``(instances, index)``:
        the production instances that overlap [min, max] of the input, sorted by start, and a
        read-only int64 array of the input's shape with each instant's position in that
        list, -1 where it falls in no shift (a gap, a non-production day, NaT).
        Cost: O(days) Python work plus O(n log m) searchsorted over m instances.
        """
        us = _as_utc_us(ts_utc)
        valid = us != _NAT
        index = np.full(us.shape, -1, dtype=np.int64)
        if not valid.any():
            index.setflags(write=False)
            return [], index
        lo, hi = int(us[valid].min()), int(us[valid].max())
        first = self._local_date(_EPOCH + lo * _US)
        last = self._local_date(_EPOCH + hi * _US)
        rows = [r for r in self._rows(first, last) if r[2] > lo and r[1] <= hi]
        if rows:
            starts = np.fromiter((r[1] for r in rows), dtype=np.int64, count=len(rows))
            ends = np.fromiter((r[2] for r in rows), dtype=np.int64, count=len(rows))
            pos = np.searchsorted(starts, us, side="right") - 1
            safe = np.clip(pos, 0, len(rows) - 1)
            hit = valid & (pos >= 0) & (us < ends[safe])
            index = np.where(hit, pos, -1).astype(np.int64)
        index.setflags(write=False)
        return [r[0] for r in rows], index


def _clock_arc(spec: ShiftSpec) -> tuple[float, float]:
    """(start, length) of a shift on the 24-hour clock, in seconds; end <= start wraps."""
    start = spec.start.hour * 3600 + spec.start.minute * 60 + spec.start.second
    end = spec.end.hour * 3600 + spec.end.minute * 60 + spec.end.second
    start += spec.start.microsecond / 1e6
    end += spec.end.microsecond / 1e6
    return start, ((end - start) % 86400) or 86400.0


def _check_shifts(shifts: Sequence[ShiftSpec]) -> None:
    """At least one shift, unique names, no two overlapping on the 24-hour clock (a Config
    guarantees this; checked again for calendars built directly)."""
    if not shifts:
        raise InvalidArgumentError("shifts", "a calendar needs at least one shift")
    names = [s.name for s in shifts]
    if len(set(names)) != len(names):
        raise InvalidArgumentError("shifts", f"shift names repeat: {', '.join(names)}")
    arcs = [_clock_arc(s) for s in shifts]
    for i in range(len(arcs)):
        for j in range(i + 1, len(arcs)):
            (a, la), (b, lb) = arcs[i], arcs[j]
            if (b - a) % 86400 < la or (a - b) % 86400 < lb:
                raise InvalidArgumentError(
                    "shifts", f"shift {shifts[j].name} overlaps shift {shifts[i].name}")


def _as_utc_us(values: Any) -> np.ndarray:
    """int64 microseconds since the epoch (UTC); NaT as int64 min."""
    if isinstance(values, np.ndarray) and values.dtype.kind == "M":
        return values.astype("datetime64[us]").view(np.int64)
    import pandas as pd

    try:
        index = pd.DatetimeIndex(pd.to_datetime(values, utc=True))
    except (TypeError, ValueError) as exc:
        raise InvalidArgumentError("ts_utc", f"not a set of timestamps: {exc}") from exc
    return np.asarray(index.as_unit("us").asi8, dtype=np.int64)

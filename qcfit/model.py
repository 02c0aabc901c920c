"""Frozen records shared by the stages (store -> counts -> stats -> findings -> policy).

Times are timezone-aware ``datetime`` objects; the store keeps them as naive UTC.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass

import numpy as np

from qcfit.errors import InvalidArgumentError

SHIFT_ID_SEPARATOR = "_"


@dataclass(frozen=True, slots=True, order=True)
class ShiftInstance:
    """One occurrence of a named shift.

    ``date`` is the plant-local date the shift starts on; ``start``/``end`` are aware
    datetimes (end exclusive). Its id, e.g. ``2026-01-05_A``, is what ``--shift`` accepts.
    """

    start: dt.datetime
    end: dt.datetime
    date: dt.date
    name: str

    @property
    def id(self) -> str:
        return format_shift_id(self.date, self.name)

    @property
    def hours(self) -> float:
        """Real elapsed hours (7 or 9 for a night shift across a DST change)."""
        return (self.end - self.start).total_seconds() / 3600.0


def format_shift_id(date: dt.date, name: str) -> str:
    return f"{date.isoformat()}{SHIFT_ID_SEPARATOR}{name}"


def parse_shift_id(text: str) -> tuple[dt.date, str]:
    """Split ``2026-01-05_A`` into (date, shift name); raises InvalidArgumentError."""
    date_part, sep, name = text.strip().partition(SHIFT_ID_SEPARATOR)
    try:
        date = dt.date.fromisoformat(date_part)
    except ValueError:
        date = None
    if not sep or not name or date is None:
        raise InvalidArgumentError(
            "--shift", f"{text!r} is not a shift id; write the start date and shift name, e.g. 2026-01-05_A"
        )
    return date, name


@dataclass(frozen=True, slots=True)
class BaselineRef:
    """The baseline version a line is held to for one shift (resolved from config + store).

    ``proportions`` follow ``categories`` (the plant's category order) and sum to 1;
    ``rate`` is defects per inspected unit, or None when the baseline sets no rate.
    ``thresholds`` holds this baseline's overrides of the [thresholds] keys.
    """

    version_id: int
    name: str
    effective: dt.date
    categories: tuple[str, ...]
    proportions: tuple[float, ...]
    rate: float | None = None
    thresholds: tuple[tuple[str, float], ...] = ()


@dataclass(frozen=True, slots=True)
class CountTable:
    """One shift's counts: ``counts`` is int64 (lines x categories), ``units`` float64 (lines,)
    with NaN where units inspected are unknown. Arrays are read-only."""

    shift: ShiftInstance
    lines: tuple[str, ...]
    categories: tuple[str, ...]
    counts: np.ndarray
    units: np.ndarray

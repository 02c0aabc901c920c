"""Seeded generator for the demo plant (Quillmoor Moulding Works, invented).

Run ``python sample_lines/generate.py`` (optionally ``--out DIR``). It needs only Python >= 3.11
and numpy, reads nothing, and writes the same bytes on every run:

* ``data/defect_events.csv``  ``timestamp,line,category,quantity``: one row per logged reject
  (a row with quantity 2 is two identical rejects from one shot). Timestamps are ISO 8601
  plant-local wall time WITH the UTC offset (``2026-10-25T02:30:00+02:00``), so the hour that
  repeats when summer time ends is unambiguous.
  Two rejects of one category on one line in the same second are one row with their total
  quantity (the loader treats (instant, line, category) as the row key).
* ``data/shift_counts.csv``  ``shift,line,category,count,units_inspected``: the same rejects
  summed per shift x line x category (zeros included) with the units inspected on that line in
  that shift, the shift named by its id (local start date + shift name, ``2026-10-07_B``).
  This is qcfit's counts format.
* ``data/units_inspected.csv``  ``shift,line,units_inspected``: the same units inspected, one row
  per shift x line, for a plant that loads the raw events (``qcfit load units``); the values
  are those of ``shift_counts.csv``.
* ``data/truth.csv``  per shift x line: the true mix and rate the counts were drawn from, the
  phase (in-control / fault) and the true Cohen's w against the approved baseline mix. It is
  for the tests and the scenario text, not for loading.

The truth: defects per shift ~ Poisson(units x rate), split over the categories by a multinomial
draw with the line's true mix. No over-dispersion is added, so an in-control shift is exactly
what the baseline says. See ``SCENARIO.md`` for the story and the injected faults.
"""

from __future__ import annotations

import argparse
import csv
import datetime as dt
import io
from dataclasses import dataclass
from pathlib import Path
from zoneinfo import ZoneInfo

import numpy as np

SEED = 20260907
TIMEZONE = "Europe/Berlin"
FIRST_DATE = dt.date(2026, 9, 7)  # Monday; first shift 2026-09-07_A
LAST_DATE = dt.date(2026, 11, 21)  # Saturday; last shift 2026-11-21_C ends Sunday 06:00
NON_PRODUCTION_WEEKDAYS = frozenset({6})  # no shift starts on a Sunday
SHIFTS = (  # name, local start, local end (end <= start: crosses midnight)
    ("A", dt.time(6, 0), dt.time(14, 0)),
    ("B", dt.time(14, 0), dt.time(22, 0)),
    ("C", dt.time(22, 0), dt.time(6, 0)),
)
SHIFT_VOLUME = {"A": 1.0, "B": 1.0, "C": 0.92}  # night crew runs fewer presses at full rate

CATEGORIES = ("SS", "FL", "SK", "BM", "CT", "WP", "SP", "WL")
CATEGORY_NAMES = {
    "SS": "short shot",
    "FL": "flash",
    "SK": "sink mark",
    "BM": "burn mark",
    "CT": "contamination / black specks",
    "WP": "warp",
    "SP": "splay",
    "WL": "weld line",
}
# True in-control mixes (the approved baselines in plant.toml carry exactly these numbers).
MIX = {
    "housings": (0.18, 0.14, 0.16, 0.06, 0.12, 0.10, 0.09, 0.15),
    "micro": (0.30, 0.10, 0.05, 0.10, 0.15, 0.05, 0.10, 0.15),
}


@dataclass(frozen=True, slots=True)
class LineSpec:
    group: str  # key of MIX
    units_per_shift: float  # mean units inspected in an 8-hour day shift
    units_sd: float
    rate: float  # in-control defects per inspected unit


LINES = {
    "IM1": LineSpec("housings", 16000, 900, 0.012),
    "IM2": LineSpec("housings", 15000, 900, 0.012),
    "IM3": LineSpec("housings", 17000, 900, 0.012),
    "IM4": LineSpec("housings", 14000, 900, 0.012),
    "IM5": LineSpec("micro", 400, 40, 0.0075),
}

# Fault (a): sudden jump. A worn replacement mould on IM2 flashes; its flash share triples
# (other categories keep their relative sizes) and the defect rate rises. Repaired on the
# Sunday, so the line is back in control from JUMP_CLEARED.
JUMP_LINE, JUMP_CATEGORY = "IM2", "FL"
JUMP_FIRST, JUMP_CLEARED = "2026-10-07_B", "2026-10-12_A"
JUMP_SHARE_FACTOR = 3.0
JUMP_RATE = 0.016

# Fault (b): slow drift. Scale building up in a cooling circuit of IM3's mould: the sink-mark
# share rises linearly by DRIFT_RISE over DRIFT_RAMP_SHIFTS production shifts, then stays there
# to the end of the data. The other categories' per-unit rates stay as they were, so the rate
# rises a little (ratio 1.15 at the end) and the signal is in the mix.
DRIFT_LINE, DRIFT_CATEGORY = "IM3", "SK"
DRIFT_FIRST = "2026-10-19_A"
DRIFT_RAMP_SHIFTS = 54  # three production weeks of 6 days x 3 shifts
DRIFT_RISE = 0.11  # absolute rise of the share (0.16 -> 0.27)

PAIR_PROBABILITY = 0.08  # chance that two rejects of one category are logged as one row


@dataclass(frozen=True, slots=True)
class Shift:
    id: str
    date: dt.date
    name: str
    start_utc: dt.datetime
    end_utc: dt.datetime

    @property
    def hours(self) -> float:
        return (self.end_utc - self.start_utc).total_seconds() / 3600.0


def _utc(day: dt.date, at: dt.time, tz: ZoneInfo) -> dt.datetime:
    return dt.datetime.combine(day, at, tzinfo=tz).astimezone(dt.UTC)


def shift_instances() -> list[Shift]:
    """Every worked shift from FIRST_DATE to LAST_DATE, in time order (fold=0 at DST changes)."""
    tz = ZoneInfo(TIMEZONE)
    shifts = []
    day = FIRST_DATE
    while day <= LAST_DATE:
        if day.weekday() not in NON_PRODUCTION_WEEKDAYS:
            for name, start, end in SHIFTS:
                end_day = day + dt.timedelta(days=1) if end <= start else day
                shifts.append(
                    Shift(f"{day.isoformat()}_{name}", day, name, _utc(day, start, tz),
                          _utc(end_day, end, tz))
                )
        day += dt.timedelta(days=1)
    return shifts


def cohen_w(p: np.ndarray, p0: np.ndarray) -> float:
    """Cohen's w = sqrt(sum (p - p0)^2 / p0) (Cohen 1988, Statistical Power Analysis, ch. 7)."""
    return float(np.sqrt(np.sum((p - p0) ** 2 / p0)))


def _move_share(p0: np.ndarray, k: int, share: float) -> np.ndarray:
    """Set category k's share to ``share``; the others keep their relative sizes."""
    p = p0 * (1.0 - share) / (1.0 - p0[k])
    p[k] = share
    return p


def true_state(line: str, index: int, shifts: list[Shift]) -> tuple[np.ndarray, float, str]:
    """(true mix, true defects per unit, phase) of ``line`` in shift ``shifts[index]``."""
    spec = LINES[line]
    p0 = np.array(MIX[spec.group])
    shift_id = shifts[index].id
    if line == JUMP_LINE and JUMP_FIRST <= shift_id < JUMP_CLEARED:
        k = CATEGORIES.index(JUMP_CATEGORY)
        return _move_share(p0, k, p0[k] * JUMP_SHARE_FACTOR), JUMP_RATE, "jump"
    if line == DRIFT_LINE and shift_id >= DRIFT_FIRST:
        first = next(i for i, s in enumerate(shifts) if s.id == DRIFT_FIRST)
        k = CATEGORIES.index(DRIFT_CATEGORY)
        step = min(index - first + 1, DRIFT_RAMP_SHIFTS)
        share = p0[k] + DRIFT_RISE * step / DRIFT_RAMP_SHIFTS
        rate = spec.rate * (1.0 - p0[k]) / (1.0 - share)  # other categories' rates unchanged
        phase = "drift" if step < DRIFT_RAMP_SHIFTS else "drift-plateau"
        return _move_share(p0, k, share), rate, phase
    return p0, spec.rate, "in-control"


@dataclass(frozen=True, slots=True)
class ShiftDraw:
    units: int
    counts: np.ndarray  # (K,) int64


def draw(rng: np.random.Generator, shift: Shift, line: str, p: np.ndarray, rate: float) -> ShiftDraw:
    spec = LINES[line]
    mean_units = spec.units_per_shift * SHIFT_VOLUME[shift.name] * shift.hours / 8.0
    units = max(0, int(round(rng.normal(mean_units, spec.units_sd))))
    n = int(rng.poisson(units * rate))
    return ShiftDraw(units, rng.multinomial(n, p).astype(np.int64))


def _event_rows(rng: np.random.Generator, shift: Shift, line: str, counts: np.ndarray) -> list:
    """Split counts into logged rows (quantity 1 or 2) at uniform random seconds in the shift;
    rows of one category landing on the same second are merged (quantities summed)."""
    seconds = int((shift.end_utc - shift.start_utc).total_seconds())
    merged: dict[tuple[int, str, str], int] = {}
    for k, count in enumerate(counts.tolist()):
        pairs = int(rng.binomial(count // 2, PAIR_PROBABILITY)) if count >= 2 else 0
        quantities = [2] * pairs + [1] * (count - 2 * pairs)
        offsets = rng.integers(0, seconds, size=len(quantities))
        for offset, quantity in zip(offsets.tolist(), quantities, strict=True):
            key = (offset, line, CATEGORIES[k])
            merged[key] = merged.get(key, 0) + quantity
    return [(*key, quantity) for key, quantity in merged.items()]


def _local_iso(ts_utc: dt.datetime, tz: ZoneInfo) -> str:
    return ts_utc.astimezone(tz).isoformat(timespec="seconds")


def generate(out: Path) -> dict[str, Path]:
    """Write the four data files into ``out`` (created if needed); return their paths."""
    tz = ZoneInfo(TIMEZONE)
    rng = np.random.default_rng(SEED)
    shifts = shift_instances()
    events = io.StringIO(newline="")
    counts = io.StringIO(newline="")
    units = io.StringIO(newline="")
    truth = io.StringIO(newline="")
    ev, co, un, tr = (csv.writer(f, lineterminator="\n") for f in (events, counts, units, truth))
    ev.writerow(["timestamp", "line", "category", "quantity"])
    co.writerow(["shift", "line", "category", "count", "units_inspected"])
    un.writerow(["shift", "line", "units_inspected"])
    tr.writerow(["shift", "line", "phase", "units_inspected", "true_rate", "expected_defects",
                 "defects", "true_cohen_w", *(f"true_share_{c}" for c in CATEGORIES)])
    for index, shift in enumerate(shifts):
        rows = []
        for line in LINES:
            p, rate, phase = true_state(line, index, shifts)
            got = draw(rng, shift, line, p, rate)
            rows.extend(_event_rows(rng, shift, line, got.counts))
            co.writerows([shift.id, line, c, int(x), got.units]
                         for c, x in zip(CATEGORIES, got.counts, strict=True))
            un.writerow([shift.id, line, got.units])
            p0 = np.array(MIX[LINES[line].group])
            tr.writerow([shift.id, line, phase, got.units, f"{rate:.6f}",
                         f"{got.units * rate:.2f}", int(got.counts.sum()),
                         f"{cohen_w(p, p0):.4f}", *(f"{x:.5f}" for x in p)])
        rows.sort()
        for offset, line, category, quantity in rows:
            stamp = _local_iso(shift.start_utc + dt.timedelta(seconds=offset), tz)
            ev.writerow([stamp, line, category, quantity])
    out.mkdir(parents=True, exist_ok=True)
    paths = {
        "events": out / "defect_events.csv",
        "counts": out / "shift_counts.csv",
        "units": out / "units_inspected.csv",
        "truth": out / "truth.csv",
    }
    buffers = {"events": events, "counts": counts, "units": units, "truth": truth}
    for key, buffer in buffers.items():
        paths[key].write_bytes(buffer.getvalue().encode("utf-8"))
    return paths


def drift_w_at(step: int) -> float:
    """True Cohen's w of the drift line ``step`` production shifts into the drift (1-based)."""
    p0 = np.array(MIX[LINES[DRIFT_LINE].group])
    k = CATEGORIES.index(DRIFT_CATEGORY)
    share = p0[k] + DRIFT_RISE * min(step, DRIFT_RAMP_SHIFTS) / DRIFT_RAMP_SHIFTS
    return cohen_w(_move_share(p0, k, share), p0)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", type=Path, default=Path(__file__).resolve().parent / "data",
                        help="folder for the CSV files (default: sample_lines/data)")
    args = parser.parse_args(argv)
    for path in generate(args.out).values():
        print(f"wrote {path} ({path.stat().st_size:,} bytes)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

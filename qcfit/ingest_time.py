"""Parsing timestamp cells (pure, vectorised): ISO 8601 text -> UTC instants.

Grammar accepted (checked on the cells' code points, a million cells in well under a
second): ``YYYY-MM-DD``, ``T`` or a space, ``HH:MM``, then only digits, ``:`` and ``.``
(seconds, fractions), then optionally ``Z``/``z``, ``+HH:MM``, ``+HHMM`` or ``+HH`` (or
``-``). Whether the digits make a real date and time is left to pandas' ISO 8601 parser.
Surrounding spaces are removed (and counted).

A cell with an offset is an instant. A cell without one is plant-local wall time, resolved
with :func:`localize_naive` (exact for any zone; skipped and repeated hours reported).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal
from zoneinfo import ZoneInfo

import numpy as np
import pandas as pd

Ambiguous = Literal["raise", "earlier", "later"]
MAX_TS_LENGTH = 64  # longer cells cannot be timestamps (the longest valid form has 35 characters)
MIN_TS_LENGTH = 16  # YYYY-MM-DDTHH:MM


@dataclass(frozen=True, slots=True)
class ParsedStamps:
    """Per-cell outcome (all arrays length n): ``utc`` (datetime64[us] naive UTC, NaT where
    not good), masks ``empty``, ``malformed`` (not the grammar), ``invalid`` (no such date or
    time), ``skipped`` (naive, in a spring gap), ``repeated`` (naive, in an autumn repeated
    hour, left unresolved), ``other_zone`` (offset differs from the plant zone's at that
    instant); ``text`` the cells without surrounding spaces; ``spaced`` how many had them."""

    utc: np.ndarray
    empty: np.ndarray
    malformed: np.ndarray
    invalid: np.ndarray
    skipped: np.ndarray
    repeated: np.ndarray
    other_zone: np.ndarray
    text: np.ndarray
    spaced: int

    @property
    def good(self) -> np.ndarray:
        return ~np.isnat(self.utc)


def localize_naive(
    wall: np.ndarray, tz: ZoneInfo, ambiguous: Ambiguous
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
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


@dataclass(frozen=True, slots=True)
class _Stamps:
    """Timestamp cells as a code-point matrix (n, width) with lengths, spaces removed."""

    text: np.ndarray  # object array of stripped cells
    chars: np.ndarray  # uint32 (n, width >= 16); 0 past the end of a cell
    length: np.ndarray  # int64 (n,)
    spaced: int

    @classmethod
    def of(cls, values: pd.Series) -> _Stamps:
        text = values.to_numpy(dtype=object).copy()
        length = np.fromiter(map(len, text), dtype=np.int64, count=len(text))
        long = length > MAX_TS_LENGTH
        spaced = 0
        for i in np.flatnonzero(long):  # rare: strip now, so padding cannot hide a timestamp
            stripped = text[i].strip()
            spaced += stripped != text[i]
            text[i], length[i] = stripped, len(stripped)
        chars = _char_matrix(text, length)
        edge = _is_space(chars[:, 0]) | _is_space(
            chars[np.arange(len(text)), np.maximum(length - 1, 0)]
        )
        if edge.any():
            spaced += int(edge.sum())
            for i in np.flatnonzero(edge):
                text[i] = text[i].strip()
                length[i] = len(text[i])
            chars = _char_matrix(text, length)
        return cls(text, chars, length, spaced)

    def at(self, pos: np.ndarray) -> np.ndarray:
        """Code point at per-row position ``pos`` (0 where out of range)."""
        width = self.chars.shape[1]
        flat = np.arange(len(pos), dtype=np.int64) * width + np.clip(pos, 0, width - 1)
        got = self.chars.reshape(-1)[flat] if len(pos) else np.zeros(0, dtype=np.uint32)
        return np.where((pos >= 0) & (pos < width), got, 0)


def _char_matrix(text: np.ndarray, length: np.ndarray) -> np.ndarray:
    n = len(text)
    usable = np.where(length <= MAX_TS_LENGTH, text, "")
    fixed = usable.astype(str) if n else np.array([], dtype="U1")
    width = fixed.dtype.itemsize // 4
    if width < MIN_TS_LENGTH:
        width = MIN_TS_LENGTH
        fixed = fixed.astype(f"U{width}")
    return fixed.view(np.uint32).reshape(n, width)


def _is_space(c: np.ndarray) -> np.ndarray:
    return (c == 32) | (c == 9)


def _is_digit(c: np.ndarray) -> np.ndarray:
    return (c >= 48) & (c <= 57)


def _iso_shape(st: _Stamps) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(well formed, has an offset, offset in minutes) from the code points.

    Grammar: ``YYYY-MM-DD`` ``T``/space ``HH:MM``, then digits, ``:`` and ``.`` only, then
    optionally ``Z``/``z``, ``+HH:MM``, ``+HHMM`` or ``+HH`` (or ``-``). Whether the digits
    make a real date and time is left to the parser.
    """
    c, L = st.chars, st.length
    ok = (L >= MIN_TS_LENGTH) & (L <= MAX_TS_LENGTH)
    for k in (0, 1, 2, 3, 5, 6, 8, 9, 11, 12, 14, 15):
        ok &= _is_digit(c[:, k])
    ok &= (
        (c[:, 4] == 45) & (c[:, 7] == 45) & (c[:, 13] == 58) & ((c[:, 10] == 84) | (c[:, 10] == 32))
    )
    last = st.at(L - 1)
    zulu = (last == 90) | (last == 122)
    sign6, sign5, sign3 = (
        np.isin(st.at(L - k), (43, 45)) & (L - k >= MIN_TS_LENGTH) for k in (6, 5, 3)
    )
    colon6 = sign6 & (st.at(L - 3) == 58)
    d = {k: _is_digit(st.at(L - k)) for k in (1, 2, 4, 5)}
    form6 = colon6 & d[5] & d[4] & d[2] & d[1]
    form5 = sign5 & ~form6 & d[4] & _is_digit(st.at(L - 3)) & d[2] & d[1]
    form3 = sign3 & ~form6 & ~form5 & d[2] & d[1]
    off_len = np.select([zulu, form6, form5, form3], [1, 6, 5, 3], 0)
    has_offset = off_len > 0
    rest = c[:, MIN_TS_LENGTH:]  # what follows HH:MM
    j = np.arange(MIN_TS_LENGTH, c.shape[1])[None, :]
    tail = j < (L - off_len)[:, None]
    stray = tail & ~(_is_digit(rest) | (rest == 58) | (rest == 46))
    ok &= ~stray.any(axis=1)
    minutes = _offset_minutes(st, L, off_len)
    return ok, has_offset, minutes


def _offset_minutes(st: _Stamps, L: np.ndarray, off_len: np.ndarray) -> np.ndarray:
    start = L - off_len

    def digit(pos: np.ndarray) -> np.ndarray:
        return st.at(pos).astype(np.int64) - 48

    hours = digit(start + 1) * 10 + digit(start + 2)
    mins = np.select(
        [off_len == 6, off_len == 5],
        [digit(start + 4) * 10 + digit(start + 5), digit(start + 3) * 10 + digit(start + 4)],
        0,
    )
    sign = np.where(st.at(start) == 45, -1, 1)
    return np.where(np.isin(off_len, (3, 5, 6)), sign * (hours * 60 + mins), 0)


def parse_timestamps(values: pd.Series, tz: ZoneInfo, ambiguous: Ambiguous) -> ParsedStamps:
    """ISO 8601 text cells -> UTC instants, with the reason masks of :class:`ParsedStamps`."""
    n = len(values)
    st = _Stamps.of(values)
    utc = np.full(n, np.datetime64("NaT"), dtype="datetime64[us]")
    shape_ok, has_offset, minutes = _iso_shape(st)
    empty = st.length == 0
    parsed = pd.to_datetime(
        pd.Series(np.where(shape_ok, st.text, None), dtype=object),
        utc=True,
        format="ISO8601",
        errors="coerce",
    )
    stamps = pd.DatetimeIndex(parsed).tz_localize(None).as_unit("us").to_numpy()
    invalid = shape_ok & np.isnat(stamps)
    other_zone = np.zeros(n, dtype=bool)
    with_off = shape_ok & ~invalid & has_offset
    if with_off.any():
        utc[with_off] = stamps[with_off]
        plant = _offset_at(pd.DatetimeIndex(stamps[with_off]), tz).to_numpy() // np.timedelta64(
            1, "m"
        )
        other_zone[with_off] = minutes[with_off] != plant
    naive = shape_ok & ~invalid & ~has_offset
    skipped = np.zeros(n, dtype=bool)
    repeated = np.zeros(n, dtype=bool)
    if naive.any():
        local, gap, twice = localize_naive(stamps[naive], tz, ambiguous)
        idx = np.flatnonzero(naive)
        utc[idx] = np.where(gap | twice, np.datetime64("NaT"), local)
        skipped[idx[gap]] = True
        repeated[idx[twice]] = True
    return ParsedStamps(
        utc, empty, ~empty & ~shape_ok, invalid, skipped, repeated, other_zone, st.text, st.spaced
    )

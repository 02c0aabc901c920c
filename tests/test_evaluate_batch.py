"""Several shifts at once (evaluate_tables) give, bit for bit, what each shift gives alone
(evaluate_table): baseline fits, rate, between lines, each line vs the rest of its shift."""

from __future__ import annotations

import dataclasses
import datetime as dt

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from qcfit import evaluate as ev
from qcfit.config import Thresholds
from qcfit.errors import InvalidArgumentError
from qcfit.model import BaselineRef, CountTable, ShiftInstance

UTC = dt.UTC
CATS = ("SCR", "DNT", "FL", "SH", "BUR", "OTH")
PROPS = (0.30, 0.25, 0.15, 0.12, 0.10, 0.08)
LIMITS = Thresholds(min_effect_w=0.10, min_effect_v=0.10, alarm_level=0.01, watch_level=0.05,
                    power=0.80, mc_draws=2_000)
PLANT = BaselineRef(3, "plant", dt.date(2026, 1, 5), CATS, PROPS, rate=0.012)
FLASHY = BaselineRef(4, "flashy", dt.date(2026, 1, 5), CATS, (0.26, 0.22, 0.24, 0.11, 0.10, 0.07),
                     rate=0.02, thresholds=(("alarm_level", 0.005), ("min_effect_w", 0.2)))
NO_RATE = BaselineRef(5, "no-rate", dt.date(2026, 1, 5), CATS, (0.2, 0.2, 0.2, 0.2, 0.1, 0.1))
NO_OTH = BaselineRef(6, "no-oth", dt.date(2025, 1, 1), CATS[:5], (0.3, 0.3, 0.2, 0.1, 0.1))
ZERO_OTH = BaselineRef(7, "zero-oth", dt.date(2026, 1, 5), CATS, (0.35, 0.25, 0.15, 0.15, 0.1, 0.0))
BROKEN = BaselineRef(8, "broken", dt.date(2026, 1, 1), CATS, PROPS[:5])  # its test raises
POOL = (PLANT, FLASHY, NO_RATE, NO_OTH, ZERO_OTH, BROKEN, None)


def shift(day: int) -> ShiftInstance:
    start = dt.datetime(2026, 1, day, 6, tzinfo=UTC)
    return ShiftInstance(start, start + dt.timedelta(hours=8), start.date(), "A")


def table(day: int, counts, units=None, cats=CATS) -> CountTable:
    c = np.array(counts, dtype=np.int64)
    u = np.array(units if units is not None else [np.nan] * len(c), dtype=float)
    c.setflags(write=False)
    u.setflags(write=False)
    return CountTable(shift(day), tuple(f"L{i}" for i in range(len(c))), cats, c, u)


def exact(x):
    """A comparable form that tells floats apart bit for bit (and NaN equal to NaN)."""
    if isinstance(x, float):
        return ("float", x.hex())
    if dataclasses.is_dataclass(x):
        return (type(x).__name__,
                tuple((f.name, exact(getattr(x, f.name))) for f in dataclasses.fields(x)))
    if isinstance(x, tuple | list):
        return (type(x).__name__, tuple(exact(v) for v in x))
    if isinstance(x, dict):
        return ("dict", tuple((k, exact(v)) for k, v in x.items()))
    return (type(x).__name__, x)


def assert_same_as_alone(tables, baselines, seeds, extras=None, thresholds=LIMITS):
    together = ev.evaluate_tables(tables, baselines, thresholds, seeds=seeds, extras=extras)
    alone = [ev.evaluate_table(t, b, thresholds, seed=s, extra=x)
             for t, b, s, x in zip(tables, baselines, seeds,
                                   extras if extras is not None else [()] * len(tables),
                                   strict=True)]
    assert exact(together) == exact(alone)
    return together


def test_mixed_shifts_equal_each_shift_alone():
    rng = np.random.default_rng(20260105)
    big = rng.multinomial(400, PROPS, size=5).tolist()
    tables = [
        # different baselines per line, a line without baseline, a line without defects,
        # missing, zero and known units
        table(5, [*big[:3], [0] * 6, [30, 25, 15, 12, 10, 3]], [900, np.nan, 0, 50, 700]),
        # sparse: Cochran's rule fails, so exact / Monte Carlo p-values
        table(6, [[3, 2, 1, 1, 0, 1], [6, 4, 3, 4, 2, 1], [1, 0, 0, 0, 0, 0], [2, 1, 0, 0, 1, 0]],
              [100, 200, 300, 400]),
        # one category without defects in the shift (5 columns tested between lines)
        table(7, [[60, 50, 30, 20, 20, 0], [70, 40, 35, 25, 15, 0], [55, 45, 25, 30, 18, 0]]),
        # one line with defects: no between-lines or line-vs-rest test
        table(8, [[30, 25, 15, 12, 10, 8], [0] * 6]),
        table(9, big[3:], [1200.0, 1500.0]),
    ]
    lines = [("L0", "L1", "L2", "L3", "L4"), ("L0", "L1", "L2", "L3"), ("L0", "L1", "L2"),
             ("L0", "L1"), ("L0", "L1")]
    chosen = [
        {"L0": PLANT, "L1": FLASHY, "L2": NO_RATE, "L3": PLANT, "L4": ZERO_OTH},
        {"L0": PLANT, "L1": NO_OTH, "L2": None, "L3": FLASHY},
        {"L0": NO_OTH, "L1": PLANT, "L2": BROKEN},
        {"L0": PLANT, "L1": PLANT},
        {"L0": FLASHY, "L1": None},
    ]
    assert [set(b) for b in chosen] == [set(ln) for ln in lines]
    found = assert_same_as_alone(tables, chosen, seeds=[11, 12, 13, 14, 15])
    verdicts = {f.verdict for shift_found in found for f in shift_found}
    assert {ev.NO_BASELINE, ev.UNKNOWN_CATEGORY, ev.IMPOSSIBLE, ev.FAULT, ev.NOT_TESTED,
            ev.TESTED, ev.TOO_LITTLE_DATA} <= verdicts
    methods = {f.method for shift_found in found for f in shift_found}
    assert {"asymptotic", "exact"} <= methods  # the sparse shift left the asymptotic test
    fault = next(f for f in found[2] if f.verdict == ev.FAULT)
    assert (fault.kind, fault.line) == (ev.KIND_BASELINE, "L2") and "ValueError" in fault.reason


def test_extras_are_appended_to_their_own_shift():
    t1 = table(5, [[30, 25, 15, 12, 10, 8], [31, 24, 16, 11, 10, 8]])
    t2 = table(6, [[40, 20, 15, 12, 10, 8], [31, 24, 16, 11, 10, 8]])
    mark = ev.Finding(kind=ev.KIND_SEQUENTIAL, line="L1", verdict=ev.NOT_TESTED, reason="x")
    found = assert_same_as_alone([t1, t2], [{"L0": PLANT, "L1": PLANT}] * 2, seeds=[1, 2],
                                 extras=[[mark], ()])
    assert found[0][-1] is mark and mark not in found[1]
    once = ev.evaluate_tables([t1, t2], [{"L0": PLANT, "L1": PLANT}] * 2, LIMITS, seeds=[1, 2],
                              extras=[iter([mark]), (f for f in ())])  # iterables read once
    assert exact(once) == exact(found)


def test_shifts_with_different_category_sets():
    other = CATS[:5]
    props = BaselineRef(9, "five", dt.date(2026, 1, 5), other, (0.3, 0.3, 0.2, 0.1, 0.1), 0.01)
    t1 = table(5, [[30, 25, 15, 12, 10, 8], [31, 24, 16, 11, 10, 8]], [800, 900])
    t2 = table(6, [[30, 25, 15, 12, 10], [31, 24, 16, 11, 9]], [800, 900], cats=other)
    assert_same_as_alone([t1, t2, t1], [{"L0": PLANT, "L1": FLASHY}, {"L0": props, "L1": props},
                                        {"L0": FLASHY, "L1": PLANT}], seeds=[1, 2, 3])


def test_a_step_that_fails_for_all_shifts_falls_back_to_each_shift_alone(caplog):
    # a count above 2**53 makes the stats layer refuse the shift's arrays: alone, the shift's
    # tests fail line by line into fault findings; together, the whole chunk is retried
    # shift by shift and gives the same findings
    huge = table(6, [[2**53 + 2, 25, 15, 12, 10, 8], [31, 24, 16, 11, 10, 8]])
    good = table(5, [[30, 25, 15, 12, 10, 8], [31, 24, 16, 11, 10, 8]], [800, 900])
    found = assert_same_as_alone([good, huge], [{"L0": PLANT, "L1": PLANT}] * 2, seeds=[1, 2])
    assert any(f.verdict == ev.FAULT for f in found[1])
    assert not any(f.verdict == ev.FAULT for f in found[0])
    assert "evaluating them one by one" in caplog.text


def test_arguments_must_match_in_length_and_tables_are_checked():
    t = table(5, [[30, 25, 15, 12, 10, 8]])
    with pytest.raises(InvalidArgumentError):
        ev.evaluate_tables([t, t], [{"L0": PLANT}], LIMITS, seeds=[1, 2])
    with pytest.raises(InvalidArgumentError, match="table.units"):
        ev.evaluate_tables([dataclasses.replace(t, units=np.ones(3))], [{"L0": PLANT}], LIMITS,
                           seeds=[1])
    assert ev.evaluate_tables([], [], LIMITS, seeds=[]) == []


@st.composite
def shifts(draw):
    count = draw(st.integers(1, 4))
    tables, baselines, seeds = [], [], []
    for k in range(count):
        n_lines = draw(st.integers(1, 6))
        scale = draw(st.sampled_from([0, 3, 20, 150]))
        counts = [[draw(st.integers(0, scale)) for _ in CATS] for _ in range(n_lines)]
        units = [draw(st.sampled_from([np.nan, 0.0, 250.0, 4000.0])) for _ in range(n_lines)]
        tables.append(table(5 + k, counts, units))
        baselines.append({f"L{i}": draw(st.sampled_from(POOL)) for i in range(n_lines)})
        seeds.append(draw(st.integers(0, 2**63 - 1)))
    return tables, baselines, seeds


@settings(derandomize=True, max_examples=40, deadline=None)
@given(shifts())
def test_together_equals_alone_on_generated_shifts(chunk):
    tables, baselines, seeds = chunk
    assert_same_as_alone(tables, baselines, seeds)

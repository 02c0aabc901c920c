"""Baselines: version in force per shift, versions in the store, the Phase I fit study,
the TOML block and adding it to the config file."""

from __future__ import annotations

import datetime as dt
import tomllib
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats as sps

from qcfit.baseline_write import add_baseline_block
from qcfit.baselines import (
    _g2_splits,
    baseline_in_force,
    baselines_in_force,
    block_proportions,
    poisson_rate_interval,
    version_diff,
)
from qcfit.calendar import ShiftCalendar
from qcfit.config import load_config, parse_config
from qcfit.errors import BaselineError, ConfigError, InvalidArgumentError, NotFoundError
from qcfit.store.baselines import (
    count_versions,
    get_version,
    list_versions,
    read_window,
    sync_baseline_versions,
    versions_named,
)
from qcfit.store.engine import make_engine, read_tx, write_tx
from qcfit.store.migrate import init_store

NOW = dt.datetime(2026, 1, 2, 8, 0, tzinfo=dt.UTC)
CATS = ("SCR", "DNT", "FL", "SH", "BUR", "OTH")

# Two explicit baselines for L1 (changed on Monday 2026-03-02) and a "*" one for the rest.
CHANGE_BASELINES = """
[baseline.l1-winter]
lines = ["L1"]
effective = 2026-01-05
proportions = { SCR = 0.40, DNT = 0.20, FL = 0.15, SH = 0.10, BUR = 0.10, OTH = 0.05 }
rate = 0.010

[baseline.l1-spring]
lines = ["L1"]
effective = 2026-03-02
proportions = { OTH = 0.05, SCR = 0.30, DNT = 0.30, FL = 0.15, SH = 0.10, BUR = 0.10 }

[baseline.l1-spring.thresholds]
min_effect_w = 0.2
"""


def _config(text: str):
    return parse_config(tomllib.loads(text), text=text)


@pytest.fixture
def change_config(plant_config_text):
    return _config(plant_config_text + CHANGE_BASELINES)


@pytest.fixture
def store(tmp_path, plant_config_text):
    """A fresh initialised SQLite store in tmp_path (the plant config's lines/categories)."""
    engine = make_engine(f"sqlite:///{tmp_path / 'plant.sqlite'}")
    init_store(engine, _config(plant_config_text), os_user="tester", now=NOW)
    yield engine
    engine.dispose()


def _sync(engine, config, now=NOW):
    with write_tx(engine) as conn:
        return sync_baseline_versions(conn, config, os_user="tester", now=now)


# --------------------------------------------------------------------------- in force


def test_baseline_in_force_changes_at_the_effective_date(store, change_config):
    versions = _sync(store, change_config)
    cal = ShiftCalendar.from_config(change_config)
    # Night shift C of Saturday 2026-02-28 (Sunday is non-production) and of ... the last shift
    # that STARTS before 2026-03-02 is 2026-02-28_C; it ends on Sunday morning.
    before = cal.instance(dt.date(2026, 2, 28), "C")
    first_after = cal.instance(dt.date(2026, 3, 2), "A")
    old = baseline_in_force(change_config, versions, "L1", before)
    new = baseline_in_force(change_config, versions, "L1", first_after)
    assert (old.name, new.name) == ("l1-winter", "l1-spring")
    assert old.version_id != new.version_id
    assert {old.version_id, new.version_id} <= set(versions.values())
    # proportions follow the plant's category order, whatever order the table was written in
    assert old.categories == new.categories == CATS
    assert new.proportions == (0.30, 0.30, 0.15, 0.10, 0.10, 0.05)
    assert old.rate == 0.010 and new.rate is None
    assert dict(new.thresholds) == {"min_effect_w": 0.2}


def test_night_shift_crossing_into_the_effective_date_keeps_the_old_baseline(store, plant_config_text):
    # effective on a Tuesday: Monday's night shift C ends on Tuesday 06:00 but STARTS on Monday
    text = plant_config_text + CHANGE_BASELINES.replace("2026-03-02", "2026-03-03")
    config = _config(text)
    versions = _sync(store, config)
    cal = ShiftCalendar.from_config(config)
    night = cal.instance(dt.date(2026, 3, 2), "C")
    assert night.end.date() == dt.date(2026, 3, 3)
    assert baseline_in_force(config, versions, "L1", night).name == "l1-winter"
    assert baseline_in_force(config, versions, "L1", cal.instance(dt.date(2026, 3, 3), "A")).name == "l1-spring"


def test_other_lines_use_the_star_baseline_and_nothing_applies_before_any(store, change_config):
    versions = _sync(store, change_config)
    cal = ShiftCalendar.from_config(change_config)
    shift = cal.instance(dt.date(2026, 3, 2), "B")
    refs = baselines_in_force(change_config, versions, ["L1", "L2"], shift)
    assert refs["L1"].name == "l1-spring" and refs["L2"].name == "plant"
    early = cal.instance(dt.date(2026, 1, 2), "A")  # before every effective date
    assert baseline_in_force(change_config, versions, "L2", early) is None


def test_baseline_without_a_version_is_an_error_naming_it(change_config):
    cal = ShiftCalendar.from_config(change_config)
    with pytest.raises(BaselineError, match=r"baseline\.l1-spring: .*no version"):
        baseline_in_force(change_config, {}, "L1", cal.instance(dt.date(2026, 3, 2), "A"))


# --------------------------------------------------------------------------- versions in the store


def test_sync_is_idempotent_and_records_content_user_and_time(store, change_config):
    first = _sync(store, change_config)
    again = _sync(store, change_config, now=NOW + dt.timedelta(days=3))
    assert first == again and len(first) == 3
    with read_tx(store) as conn:
        rows = list_versions(conn)
        assert count_versions(conn) == 3
    spring = next(r for r in rows if r.name == "l1-spring")
    assert spring.first_seen == NOW and spring.os_user == "tester"
    assert spring.lines == ("L1",) and spring.effective == dt.date(2026, 3, 2)
    assert list(spring.proportions) == list(CATS)  # plant order
    assert dict(spring.thresholds) == {"min_effect_w": 0.2}
    assert "[baseline.l1-spring]" in spring.toml_text


def test_an_edited_baseline_is_a_new_version_and_the_old_one_stays(store, plant_config_text):
    v1 = _sync(store, _config(plant_config_text))
    edited = _config(plant_config_text.replace("rate = 0.012", "rate = 0.011"))
    v2 = _sync(store, edited, now=NOW + dt.timedelta(days=1))
    assert set(v1.values()).isdisjoint(v2.values())
    with read_tx(store) as conn:
        named = versions_named(conn, "plant")
        assert [r.rate for r in named] == [0.012, 0.011]
        assert get_version(conn, v1[next(iter(v1))]).rate == 0.012
        with pytest.raises(NotFoundError, match="no baseline version 999"):
            get_version(conn, 999)


def test_version_diff_per_category_and_cohen_w(store, change_config):
    versions = _sync(store, change_config)
    with read_tx(store) as conn:
        rows = {r.name: r for r in list_versions(conn)}
    d = version_diff(rows["l1-winter"], rows["l1-spring"])
    by = {c["code"]: c for c in d["categories"]}
    assert by["SCR"]["change"] == pytest.approx(-0.10) and by["DNT"]["change"] == pytest.approx(0.10)
    assert by["SCR"]["relative"] == pytest.approx(-0.25)
    # w = sqrt(0.1^2/0.4 + 0.1^2/0.2) (Cohen 1988, ch. 7 definition), by hand: 0.273861
    assert d["cohen_w"] == pytest.approx(0.2738612788, abs=1e-9)
    assert d["rate"] == {"old": 0.010, "new": None}
    assert len(versions) == 3


# --------------------------------------------------------------------------- fit window from the store


def _put_counts(engine, config, rows, units=()):
    """Write shift rows, defect counts and units straight into the store's tables."""
    from sqlalchemy import insert, select

    from qcfit.store.engine import to_utc_naive
    from qcfit.store.schema import defect_count, shift, units_inspected

    cal = ShiftCalendar.from_config(config)
    ids = {}
    with write_tx(engine) as conn:
        for sid in sorted({r[0] for r in rows} | {u[0] for u in units}):
            inst = cal.from_id(sid)
            found = conn.execute(select(shift.c.id).where(shift.c.shift_date == inst.date,
                                                          shift.c.shift_name == inst.name)).first()
            if found is None:
                found_id = conn.execute(insert(shift).values(
                    shift_date=inst.date, shift_name=inst.name, start_utc=to_utc_naive(inst.start),
                    end_utc=to_utc_naive(inst.end))).inserted_primary_key[0]
            else:
                found_id = found.id
            ids[sid] = found_id
        if rows:
            conn.execute(insert(defect_count), [
                {"shift_id": ids[s], "line": ln, "category": c, "count": n} for s, ln, c, n in rows])
        if units:
            conn.execute(insert(units_inspected), [
                {"shift_id": ids[s], "line": ln, "units": u} for s, ln, u in units])


def test_read_window_sums_lines_per_shift_and_marks_unknown_units(store, plant_config_text):
    config = _config(plant_config_text)
    _put_counts(store, config, [
        ("2026-01-05_A", "L1", "SCR", 3), ("2026-01-05_A", "L2", "SCR", 2),
        ("2026-01-05_A", "L1", "OTH", 1), ("2026-01-05_B", "L1", "DNT", 4),
        ("2026-01-05_B", "L2", "FL", 5), ("2026-01-06_A", "L3", "SCR", 9),
        ("2026-01-07_A", "L1", "SCR", 1),
    ], units=[("2026-01-05_A", "L1", 100), ("2026-01-05_A", "L2", 50),
              ("2026-01-05_B", "L1", 80), ("2026-01-06_B", "L1", 70)])
    with read_tx(store) as conn:
        win = read_window(conn, lines=["L1", "L2"], since=dt.date(2026, 1, 5),
                          until=dt.date(2026, 1, 6), categories=list(CATS))
    # 01-06_A has only L3 data; 01-06_B has units but no defects (a zero-defect shift)
    assert win.shift_ids == ("2026-01-05_A", "2026-01-05_B", "2026-01-06_B")
    assert win.counts.tolist() == [[5, 0, 0, 0, 0, 1], [0, 4, 5, 0, 0, 0], [0] * 6]
    # 05_B: L2 had defects but no units row -> unknown
    assert win.units[0] == 150 and np.isnan(win.units[1]) and win.units[2] == 70
    assert not win.counts.flags.writeable and not win.other_categories


# --------------------------------------------------------------------------- pure helpers


@settings(max_examples=60, deadline=None)
@given(st.lists(st.integers(0, 10**7), min_size=2, max_size=12).filter(lambda c: sum(c) > 0))
def test_block_proportions_sum_to_one_exactly_and_are_positive(counts):
    cats = [f"C{i}" for i in range(len(counts))]
    shares = block_proportions(counts, cats)
    units = [round(v * 1e6) for v in shares.values()]
    assert sum(units) == 10**6 and min(units) >= 1
    assert abs(sum(shares.values()) - 1.0) < 1e-9  # config tolerance is 1e-6
    base = np.asarray(counts, float) + (0.5 if 0 in counts else 0.0)
    # each share within one unit of the 6th decimal of the exact share (or the 1e-6 floor)
    assert np.allclose(list(shares.values()), base / base.sum(), atol=1.5e-6 * len(counts))


def test_g2_of_every_split_matches_scipy():
    rng = np.random.default_rng(7)
    table = rng.multinomial(40, [0.4, 0.3, 0.2, 0.1], size=9)
    ours = _g2_splits(table)
    for s in range(1, 9):
        two = np.vstack([table[:s].sum(axis=0), table[s:].sum(axis=0)])
        # scipy as reference library: G^2 without Yates correction
        ref = sps.chi2_contingency(two, correction=False, lambda_="log-likelihood")[0]
        assert ours[s - 1] == pytest.approx(ref, rel=1e-10)


@pytest.mark.parametrize("d,u", [(0, 1.0), (1, 1.0), (10, 1.0), (37, 5210.0), (812, 61234.5)])
def test_poisson_rate_interval_matches_statsmodels_exact(d, u):
    from statsmodels.stats.rates import confint_poisson

    lo, hi = poisson_rate_interval(d, u, 0.95)
    # statsmodels (reference library) "exact-c": Garwood's central interval
    ref = confint_poisson(d, u, method="exact-c", alpha=0.05)
    assert lo == pytest.approx(float(ref[0]), abs=1e-12) and hi == pytest.approx(float(ref[1]), rel=1e-10)


def test_poisson_rate_interval_table_values():
    # Garwood (1936) limits as tabulated for 95% two-sided (values from memory, and they are
    # chi2.ppf(0.975, 2)/2 = 3.689 and chi2.ppf(0.025, 20)/2 = 4.795, chi2.ppf(0.975, 22)/2 = 18.39)
    assert poisson_rate_interval(0, 1.0) == (0.0, pytest.approx(3.689, abs=5e-4))
    lo, hi = poisson_rate_interval(10, 1.0)
    assert lo == pytest.approx(4.795, abs=5e-4) and hi == pytest.approx(18.39, abs=5e-3)
    with pytest.raises(InvalidArgumentError, match="units"):
        poisson_rate_interval(3, 0.0)


# --------------------------------------------------------------------------- writing the block


BLOCK = """\
# a fitted block
[baseline.l1-fit]
lines = ["L1"]
effective = 2026-04-06
note = "fitted"

[baseline.l1-fit.proportions]
SCR = 0.3
DNT = 0.25
FL = 0.15
SH = 0.12
BUR = 0.1
OTH = 0.08
"""


def test_write_keeps_every_byte_and_comment_and_keeps_a_backup(tmp_path, plant_config_text, write_config):
    text = "# plant config, hand written\n" + plant_config_text.replace(
        "[thresholds]", "# tuned in 2025\n[thresholds]  # see SOP 12")
    path = write_config(tmp_path, text)
    res = add_baseline_block(path, BLOCK, name="l1-fit", now=NOW)
    new = path.read_text(encoding="utf-8")
    assert new.startswith(text) and new.endswith(BLOCK)
    assert res.backup.read_text(encoding="utf-8") == text
    assert res.backup.name == "plant.toml.20260102T080000Z.bak"
    config = load_config(path)
    assert [b.name for b in config.baselines if b.name == "l1-fit"] == ["l1-fit"]
    assert config.hash == res.new_hash
    assert not list(tmp_path.glob(".plant.toml.*.tmp"))


def test_write_keeps_bom_and_crlf(tmp_path, plant_config_text):
    path = tmp_path / "plant.toml"
    old = b"\xef\xbb\xbf" + plant_config_text.replace("\n", "\r\n").encode()
    path.write_bytes(old)
    add_baseline_block(path, BLOCK, name="l1-fit", now=NOW)
    data = path.read_bytes()
    assert data.startswith(old) and b"\n" not in data.replace(b"\r\n", b"")
    assert any(b.name == "l1-fit" for b in load_config(path).baselines)


def _untouched(tmp_path: Path, path: Path, before: bytes) -> None:
    assert path.read_bytes() == before
    assert sorted(p.name for p in tmp_path.iterdir()) == [path.name]


def test_write_refuses_a_name_in_use_and_writes_nothing(tmp_path, plant_config_text, write_config):
    path = write_config(tmp_path, plant_config_text)
    before = path.read_bytes()
    with pytest.raises(BaselineError, match=r"--name: a baseline named 'plant' is already in"):
        add_baseline_block(path, BLOCK.replace("l1-fit", "plant"), name="plant", now=NOW)
    _untouched(tmp_path, path, before)


def test_write_refuses_an_overlapping_effective_date_and_writes_nothing(tmp_path, plant_config_text, write_config):
    path = write_config(tmp_path, plant_config_text)
    before = path.read_bytes()
    clash = BLOCK.replace('lines = ["L1"]', 'lines = "*"').replace("2026-04-06", "2026-01-05")
    with pytest.raises(ConfigError, match=r"baseline\.l1-fit\.effective: .*also the effective date"):
        add_baseline_block(path, clash, name="l1-fit", now=NOW)
    _untouched(tmp_path, path, before)


def test_write_refuses_a_file_changed_since_it_was_read(tmp_path, plant_config_text, write_config):
    path = write_config(tmp_path, plant_config_text)
    before = path.read_bytes()
    with pytest.raises(BaselineError, match="changed since it was read"):
        add_baseline_block(path, BLOCK, name="l1-fit", now=NOW, expected_hash="0" * 64)
    _untouched(tmp_path, path, before)

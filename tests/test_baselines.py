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
    DEFAULT_MIN_SHIFTS,
    FitSettings,
    _g2_splits,
    arl_warning,
    baseline_block,
    baseline_in_force,
    baselines_in_force,
    block_proportions,
    fit_study,
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


# --------------------------------------------------------------------------- the Phase I study

P0 = np.array([0.30, 0.25, 0.15, 0.12, 0.10, 0.08])  # invented in-control mix (CATS order)


def _window(seed: int, m: int = 150, rate: float = 0.012, mean_units: float = 16000.0,
            p: np.ndarray = P0) -> tuple[np.ndarray, np.ndarray, list[str]]:
    """m in-control shifts: units ~ Normal, defects ~ Poisson(units x rate), mix multinomial."""
    rng = np.random.default_rng(seed)
    units = np.round(rng.normal(mean_units, 0.05 * mean_units, m))
    n = rng.poisson(units * rate)
    counts = np.array([rng.multinomial(k, p) for k in n])
    start = dt.date(2026, 1, 5)
    ids = [f"{start + dt.timedelta(days=i // 3)}_{'ABC'[i % 3]}" for i in range(m)]
    return counts, units, ids


def test_in_control_window_is_stable_and_its_intervals_cover_the_truth(plant_config_text):
    counts, units, ids = _window(seed=11)
    study = fit_study(counts, units, shift_ids=ids, categories=CATS)
    assert study.verdict == "stable" and not study.flags and study.cap_reached is False
    assert [r.flagged for r in study.rounds] == [()]
    p = study.proportions
    assert np.all((np.array(p.lower) <= P0) & (P0 <= np.array(p.upper)))
    assert p.defects == counts.sum() and sum(p.proportions) == pytest.approx(1.0)
    assert study.rate.lower <= 0.012 <= study.rate.upper and study.rate.shifts == 150
    assert study.homogeneity.stable and 0.8 < study.homogeneity.dispersion < 1.2
    assert study.change_point.stable and study.power.enough and study.power.more_shifts == 0
    # the block pastes into the plant config as a valid baseline (shares sum to 1 within 1e-6)
    block = baseline_block(study, name="l1-fitted", lines=["L1"], effective=dt.date(2026, 4, 6),
                           window=(dt.date(2026, 1, 5), dt.date(2026, 2, 23)))
    config = _config(plant_config_text + "\n" + block)
    spec = next(b for b in config.baselines if b.name == "l1-fitted")
    assert spec.lines == ("L1",) and spec.effective == dt.date(2026, 4, 6)
    assert np.allclose([spec.proportions[c] for c in CATS], p.proportions, atol=1e-6)
    assert spec.rate == pytest.approx(study.rate.rate, rel=1e-3)
    assert "0 shift(s) excluded; stable" in spec.note


def _with_odd_shift(seed: int = 12):
    counts, units, ids = _window(seed=seed)
    rng = np.random.default_rng(seed + 100)
    odd = np.array([0.15, 0.45, 0.15, 0.10, 0.10, 0.05])  # dent doubles at scratch's cost
    counts[40] = rng.multinomial(counts[40].sum(), odd)
    return counts, units, ids


def test_an_odd_shift_is_listed_with_its_reason_and_kept_unless_asked():
    counts, units, ids = _with_odd_shift()
    study = fit_study(counts, units, shift_ids=ids, categories=CATS)
    assert [(f.shift_id, f.kind, f.excluded) for f in study.flags] == [(ids[40], "mix", False)]
    reason = study.flags[0].reason
    assert "DNT up" in reason and "SCR down" in reason and "adjusted p" in reason
    assert study.verdict == "not stable" and len(study.kept_shifts) == 150


def test_exclude_outliers_removes_them_and_repeats_the_study():
    counts, units, ids = _with_odd_shift()
    study = fit_study(counts, units, shift_ids=ids, categories=CATS,
                      settings=FitSettings(exclude_outliers=True))
    assert [f.shift_id for f in study.excluded] == [ids[40]]
    assert [(r.round, r.shifts, r.flagged) for r in study.rounds] == [
        (1, 150, (ids[40],)), (2, 149, ())]
    assert ids[40] not in study.kept_shifts and study.verdict == "stable"
    assert study.proportions.defects == counts.sum() - counts[40].sum()


def test_a_shift_with_an_odd_defect_rate_is_flagged_as_rate():
    counts, units, ids = _window(seed=13)
    rng = np.random.default_rng(5)
    counts[7] = rng.multinomial(int(counts[7].sum() * 2), P0)  # twice the defects, same mix
    study = fit_study(counts, units, shift_ids=ids, categories=CATS)
    assert [(f.shift_id, f.kind) for f in study.flags] == [(ids[7], "rate")]
    assert study.flags[0].effect_size == pytest.approx(2.0, rel=0.1)
    assert f"defect rate {study.flags[0].effect_size:.2f} x the pooled window" in study.flags[0].reason


def test_a_lasting_change_in_the_window_is_found_by_the_change_point_scan():
    counts, units, ids = _window(seed=14, m=120)
    rng = np.random.default_rng(6)
    later = np.array([0.25, 0.25, 0.20, 0.12, 0.10, 0.08])  # w = 0.16 against P0, from shift 80
    counts[80:] = [rng.multinomial(k, later) for k in counts[80:].sum(axis=1)]
    study = fit_study(counts, units, shift_ids=ids, categories=CATS)
    cp = study.change_point
    assert not cp.stable and cp.pvalue <= 0.002
    assert abs(ids.index(cp.split_shift_id) - 80) <= 3
    assert cp.after[0] < cp.before[0] and study.verdict == "not stable"


def test_exclusion_repeats_in_rounds_and_stops_at_the_cap():
    # 8 shifts far off and 8 a little off in the same direction: the far ones mask the others
    counts, units, ids = _window(seed=16, m=60)
    rng = np.random.default_rng(16)
    mild = np.array([0.18, 0.40, 0.15, 0.12, 0.08, 0.07])
    strong = np.array([0.10, 0.55, 0.15, 0.10, 0.06, 0.04])
    counts[44:52] = [rng.multinomial(k, mild) for k in counts[44:52].sum(axis=1)]
    counts[52:] = [rng.multinomial(k, strong) for k in counts[52:].sum(axis=1)]
    capped = fit_study(counts, units, shift_ids=ids, categories=CATS,
                       settings=FitSettings(exclude_outliers=True, max_rounds=1))
    assert capped.cap_reached and len(capped.rounds) == 1
    still = [f for f in capped.flags if not f.excluded]
    assert still and all(44 <= ids.index(f.shift_id) < 52 for f in still)
    assert any("stopped after 1 exclusion rounds" in w for w in capped.warnings)
    full = fit_study(counts, units, shift_ids=ids, categories=CATS,
                     settings=FitSettings(exclude_outliers=True))
    assert not full.cap_reached and len(full.rounds) >= 3 and full.rounds[-1].flagged == ()
    assert {ids[i] for i in range(52, 60)} <= {f.shift_id for f in full.excluded}
    assert all(f.excluded for f in full.flags)


def test_every_shift_excluded_is_an_error_naming_the_option():
    counts = np.array([[50, 0, 0, 0, 0, 0], [0, 50, 0, 0, 0, 0]] * 3)
    ids = [f"2026-01-0{i + 5}_A" for i in range(6)]
    with pytest.raises(BaselineError, match=r"--exclude-outliers: every shift in the window stood out"):
        fit_study(counts, None, shift_ids=ids, categories=CATS,
                  settings=FitSettings(exclude_outliers=True))


@pytest.mark.parametrize("counts,match", [
    (np.zeros((0, 6)), r"--from/--to: the history window holds no shifts"),
    (np.zeros((3, 6)), r"--from/--to: the 3 shift\(s\) in the window hold no defects"),
])
def test_empty_windows_are_errors_naming_the_window(counts, match):
    with pytest.raises(BaselineError, match=match):
        fit_study(counts, None, shift_ids=[f"2026-01-0{i + 5}_A" for i in range(len(counts))],
                  categories=CATS)


def test_bad_counts_name_the_argument():
    counts = np.ones((2, 6))
    counts[1, 2] = np.nan
    with pytest.raises(InvalidArgumentError, match=r"counts: .*at \[1, 2\]"):
        fit_study(counts, None, shift_ids=["a", "b"], categories=CATS)
    with pytest.raises(InvalidArgumentError, match="shift_ids"):
        fit_study(np.ones((2, 6)), None, shift_ids=["a"], categories=CATS)
    with pytest.raises(InvalidArgumentError, match="--method"):
        fit_study(np.ones((2, 6)), None, shift_ids=["a", "b"], categories=CATS,
                  settings=FitSettings(method="wald"))


def test_short_window_warns_about_false_alarms_and_counts_the_shifts_needed():
    from qcfit.stats import chisq_power, sample_size_for_power

    counts, units, ids = _window(seed=16, m=10, mean_units=1500)  # ~18 defects a shift
    study = fit_study(counts, units, shift_ids=ids, categories=CATS)
    pw = study.power
    needed = sample_size_for_power(0.10, 5, 0.01, 0.80)
    assert pw.defects_needed == needed and pw.defects == counts.sum() < needed
    assert pw.power == pytest.approx(chisq_power(0.10, 5, counts.sum(), 0.01))
    assert pw.more_shifts == int(np.ceil((needed - counts.sum()) / (counts.sum() / 10)))
    assert not pw.enough and study.verdict in ("stable, too few defects", "not stable")
    assert any(w.startswith("only 10 shift(s)") for w in study.warnings)  # 10 < 100 shifts
    assert any(f"about {pw.more_shifts} more shift(s)" in w for w in study.warnings)


def test_false_alarm_warning_fires_below_min_shifts_only():
    # The short-window warning is about the number of kept shifts against min_shifts
    # (default DEFAULT_MIN_SHIFTS; "aim for 100" is common practice, no source).
    counts, units, ids = _window(seed=16, m=10, mean_units=1500)
    for min_shifts, fires in ((11, True), (10, False), (DEFAULT_MIN_SHIFTS, True)):
        study = fit_study(counts, units, shift_ids=ids, categories=CATS,
                          settings=FitSettings(min_shifts=min_shifts))
        assert len(study.kept_shifts) == 10
        short = [w for w in study.warnings if w == arl_warning(10)]
        assert len(short) == (1 if fires else 0), (min_shifts, study.warnings)
    assert DEFAULT_MIN_SHIFTS == 100 and str(DEFAULT_MIN_SHIFTS) in arl_warning(10)


def test_a_category_without_defects_gets_a_positive_share_in_the_block():
    counts, units, ids = _window(seed=17, m=30, p=np.array([0.4, 0.3, 0.15, 0.1, 0.05, 0.0]))
    study = fit_study(counts, units, shift_ids=ids, categories=CATS,
                      settings=FitSettings(method="goodman"))
    assert study.proportions.counts[-1] == 0 and study.proportions.lower[-1] == 0.0
    assert any("no defects in OTH" in w for w in study.warnings)
    shares = block_proportions(study.proportions.counts, CATS)
    assert shares["OTH"] > 0 and sum(round(v * 1e6) for v in shares.values()) == 10**6


def test_goodman_option_and_json_form_and_determinism():
    import json

    from qcfit.stats import multinomial_intervals

    counts, units, ids = _window(seed=18, m=40)
    units[3] = np.nan  # unknown units: that shift counts in the mix, not in the rate
    a = fit_study(counts, units, shift_ids=ids, categories=CATS,
                  settings=FitSettings(method="goodman"))
    b = fit_study(counts, units, shift_ids=ids, categories=CATS,
                  settings=FitSettings(method="goodman"))
    ref = multinomial_intervals(counts.sum(axis=0), 0.95, method="goodman")
    assert np.allclose(np.c_[a.proportions.lower, a.proportions.upper], ref)
    assert a.rate.shifts == 39 and any("39 of 40" in w for w in a.warnings)
    text = json.dumps(a.to_dict(), allow_nan=False)
    assert text == json.dumps(b.to_dict(), allow_nan=False)
    data = json.loads(text)
    assert data["proportions"]["by_category"]["SCR"]["lower"] == a.proportions.lower[0]
    assert set(data) >= {"verdict", "excluded", "standing_out", "homogeneity", "rate", "power"}


def test_evaluations_record_the_baseline_version_in_force_at_each_shift(tmp_path, plant_config_text):
    """Through the service: two shifts either side of L1's baseline change are tested against
    different versions, and each finding row names the version it used."""
    from sqlalchemy import select

    from qcfit.service import evaluate_shift
    from qcfit.store.schema import evaluation, finding, shift

    config = _config(plant_config_text + CHANGE_BASELINES)
    engine = make_engine(f"sqlite:///{tmp_path / 'plant.sqlite'}")
    init_store(engine, config, os_user="tester", now=NOW)
    rows = [(sid, ln, c, n) for sid in ("2026-02-28_C", "2026-03-02_A") for ln in ("L1", "L2")
            for c, n in zip(CATS, (60, 50, 30, 24, 20, 16), strict=True)]
    _put_counts(engine, config, rows)
    cal = ShiftCalendar.from_config(config)
    now = dt.datetime(2026, 3, 3, tzinfo=dt.UTC)
    for sid in ("2026-02-28_C", "2026-03-02_A"):
        summary = evaluate_shift(engine, config, cal.from_id(sid), now=now)
        assert summary.status == "ok", summary
    versions = _sync(engine, config)
    by_name = {spec.name: versions[spec.content_hash] for spec in config.baselines}
    with read_tx(engine) as conn:
        used = conn.execute(
            select(shift.c.shift_date, finding.c.line, finding.c.baseline_version_id)
            .join(evaluation, evaluation.c.id == finding.c.evaluation_id)
            .join(shift, shift.c.id == evaluation.c.shift_id)
            .where(finding.c.kind == "baseline")).all()
    got = {(r.shift_date.isoformat(), r.line): r.baseline_version_id for r in used}
    assert got[("2026-02-28", "L1")] == by_name["l1-winter"]
    assert got[("2026-03-02", "L1")] == by_name["l1-spring"]
    assert got[("2026-02-28", "L2")] == got[("2026-03-02", "L2")] == by_name["plant"]
    engine.dispose()


@settings(max_examples=8, deadline=None)
@given(seed=st.integers(0, 10**6), perm=st.permutations(range(6)))
def test_relabelling_categories_relabels_the_estimates(seed, perm):
    counts, units, ids = _window(seed=seed, m=12, mean_units=3000)
    perm = list(perm)
    a = fit_study(counts, units, shift_ids=ids, categories=CATS,
                  settings=FitSettings(method="goodman", permutations=99))
    b = fit_study(counts[:, perm], units, shift_ids=ids, categories=[CATS[i] for i in perm],
                  settings=FitSettings(method="goodman", permutations=99))
    for field in ("counts", "proportions", "lower", "upper"):
        assert np.allclose(np.asarray(getattr(b.proportions, field)),
                           np.asarray(getattr(a.proportions, field))[perm])
    assert b.rate == a.rate and b.power == a.power
    assert b.homogeneity.statistic == pytest.approx(a.homogeneity.statistic)

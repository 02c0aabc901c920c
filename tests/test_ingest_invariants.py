"""Invariants of event loading (hypothesis, real SQLite stores copied from one template):
however events are split into files, overlapping or repeated, the stored counts equal the
sums over the distinct events, and loading a file again changes nothing."""

from __future__ import annotations

import datetime as dt
import sqlite3
from collections import Counter

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from qcfit.config import load_config
from qcfit.ingest import load_events_file
from qcfit.store.defects import read_counts
from qcfit.store.engine import make_engine, read_tx
from qcfit.store.migrate import init_store

NOW = dt.datetime(2026, 12, 1, tzinfo=dt.UTC)
START = dt.datetime(2026, 1, 5, 12, tzinfo=dt.UTC)  # Monday 06:00 in Chicago, shift A


def _make_template(folder, text):
    path = folder / "plant.toml"
    path.write_text(text, encoding="utf-8")
    config = load_config(path)
    engine = make_engine(f"sqlite:///{folder / 'template.sqlite'}")
    init_store(engine, config, os_user="tester", now=NOW)
    engine.dispose()
    return config, folder / "template.sqlite"


def _copy(src, dst):
    with sqlite3.connect(src) as a, sqlite3.connect(dst) as b:
        a.backup(b)


_event = st.tuples(
    st.integers(min_value=0, max_value=5 * 24 * 60 - 1),  # minute after START (Mon..Sat)
    st.sampled_from(["L1", "L2"]),
    st.sampled_from(["SCR", "DNT", "FL"]),
    st.integers(min_value=1, max_value=3),
)


@settings(
    max_examples=20, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(
    events=st.lists(_event, min_size=1, max_size=40, unique_by=lambda e: e[:3]),
    files=st.lists(
        st.lists(st.integers(min_value=0, max_value=39), max_size=25), min_size=1, max_size=4
    ),
    repeat=st.integers(min_value=0, max_value=3),
)
def test_counts_equal_sums_over_distinct_events(
    tmp_path_factory, plant_config_text, events, files, repeat
):
    folder = tmp_path_factory.mktemp("inv")
    config, template = _make_template_cached(tmp_path_factory, plant_config_text)
    db = folder / "store.sqlite"
    _copy(template, db)
    engine = make_engine(f"sqlite:///{db}")
    try:
        loaded: set[int] = set()
        paths = []
        for k, picks in enumerate(files):
            chosen = sorted({p % len(events) for p in picks}) or [0]
            path = folder / f"f{k}.csv"
            path.write_text(
                "timestamp,line,category,quantity\n"
                + "".join(
                    f"{(START + dt.timedelta(minutes=events[i][0])).isoformat()},{events[i][1]},{events[i][2]},{events[i][3]}\n"
                    for i in chosen
                ),
                encoding="utf-8",
            )
            load_events_file(engine, config, path, now=NOW)
            loaded.update(chosen)
            paths.append(path)
        with read_tx(engine) as conn:
            before = read_counts(conn, tz=config.timezone)
        again = load_events_file(engine, config, paths[repeat % len(paths)], now=NOW)
        with read_tx(engine) as conn:
            after = read_counts(conn, tz=config.timezone)
    finally:
        engine.dispose()
    assert again.already_loaded
    assert after.equals(before)
    expected: Counter = Counter()
    for i in loaded:
        minute, line, cat, qty = events[i]
        local = (START + dt.timedelta(minutes=minute)).astimezone(config.timezone)
        shift_date = local.date() if local.hour >= 6 else local.date() - dt.timedelta(days=1)
        name = "A" if 6 <= local.hour < 14 else "B" if 14 <= local.hour < 22 else "C"
        expected[(shift_date, name, line, cat)] += qty
    got = {
        (r.shift_date, r.shift_name, r.line, r.category): int(r.count)
        for r in after.itertuples(index=False)
    }
    assert got == dict(expected)


_TEMPLATES: dict[str, tuple] = {}


def _make_template_cached(tmp_path_factory, text):
    if text not in _TEMPLATES:
        _TEMPLATES[text] = _make_template(tmp_path_factory.mktemp("template"), text)
    return _TEMPLATES[text]

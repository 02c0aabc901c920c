"""The shift report on real temp SQLite stores: what it reads, what the page says, escaping,
no external references, atomic writes that keep the last N, and the ``qcfit report`` command.

The plant here is a 4-line test plant (invented figures); shifts are loaded through the counts
CSV path and evaluated by the real service, so the report reads what production writes.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import hashlib
import logging
import math
import re
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats as sps
from sqlalchemy import insert

from qcfit import service
from qcfit.calendar import ShiftCalendar
from qcfit.cli import main as cli_main
from qcfit.config import load_config, parse_config
from qcfit.errors import InvalidArgumentError, NotFoundError
from qcfit.ingest import load_counts_file
from qcfit.report import plots
from qcfit.report.data import ReportData, gather, poisson_upper_limit
from qcfit.report.render import CAUTIONS, detail_lines, render_html, too_little_lines
from qcfit.report.write import (
    prune,
    report_folder,
    report_name,
    write_after_evaluation,
    write_atomic,
    write_shift_report,
)
from qcfit.store.engine import make_engine, read_tx, write_tx
from qcfit.store.migrate import init_store
from qcfit.store.reportdata import alarm_events, alarms_of_shift
from qcfit.store.schema import chart_state
from qcfit.store.shifts import shift_row

T0 = dt.datetime(2026, 3, 1, tzinfo=dt.UTC)
SEED = 20260301
CATS = ("SCR", "DNT", "FL", "SH", "BUR", "OTH")
PROPS = np.array([0.30, 0.25, 0.15, 0.12, 0.10, 0.08])
JUMP = np.array([0.20, 0.17, 0.40, 0.09, 0.08, 0.06])  # flash up: a mould change


def plant_text(categories: dict[str, str] | None = None, lines: dict[str, str] | None = None,
               folder: str = "reports", keep: int = 30) -> str:
    """A 4-line plant (Europe/Berlin, shifts A/B/C, one baseline); invented figures."""
    cats = categories or {"SCR": "scratch", "DNT": "dent", "FL": "flash", "SH": "short shot",
                          "BUR": "burr", "OTH": "other"}
    lns = lines or {"P1": "Press 1", "P2": "Press 2", "P3": "Press 3", "P4": "Bench cell"}
    props = ", ".join(f'"{c}" = {p}' for c, p in zip(cats, PROPS, strict=True))
    return "\n".join([
        '[plant]\nname = "Test works"\ntimezone = "Europe/Berlin"\nnon_production_days = ["Sun"]',
        '[[shift]]\nname = "A"\nstart = "06:00"\nend = "14:00"',
        '[[shift]]\nname = "B"\nstart = "14:00"\nend = "22:00"',
        '[[shift]]\nname = "C"\nstart = "22:00"\nend = "06:00"',
        "[lines]\n" + "\n".join(f"{_toml_key(k)} = {_toml_str(v)}" for k, v in lns.items()),
        "[categories]\n" + "\n".join(f"{_toml_key(k)} = {_toml_str(v)}" for k, v in cats.items()),
        "[thresholds]\nmin_effect_w = 0.3\nmin_effect_v = 0.3\nmc_draws = 2000",
        f'[baseline.plant]\nlines = "*"\neffective = 2026-03-02\nrate = 0.012\n'
        f"proportions = {{ {props} }}",
        f'[report]\nfolder = "{folder}"\nkeep = {keep}',
    ]) + "\n"


def _toml_str(s: str) -> str:
    return '"' + s.replace("\\", "\\\\").replace('"', '\\"') + '"'


def _toml_key(s: str) -> str:
    return s if re.fullmatch(r"[A-Za-z0-9_-]+", s) else _toml_str(s)


def build_plant(folder: Path, text: str | None = None, *, shifts: int = 8, seed: int = SEED,
                jump_from: int = 6):
    """Config, engine and evaluated shift ids: P1-P3 ~240 defects a shift, P4 ~6 (too little
    data), P2's flash share jumps from shift ``jump_from`` (0-based) on."""
    path = folder / "plant.toml"
    path.write_text(text or plant_text(), encoding="utf-8")
    config = load_config(path)
    engine = make_engine(f"sqlite:///{folder / 'plant.sqlite'}")
    init_store(engine, config, os_user="test", now=T0)
    cal = ShiftCalendar.from_config(config)
    start = dt.datetime(2026, 3, 2, 6, tzinfo=config.timezone)
    instances = cal.instances_between(start, start + dt.timedelta(days=5))[:shifts]
    rng = np.random.default_rng(seed)
    cats = list(config.categories)
    rows = ["shift,line,category,count,units_inspected"]
    for s_i, inst in enumerate(instances):
        for line in config.lines:
            units = 500 if line == list(config.lines)[3] else int(rng.integers(19_000, 21_000))
            p = JUMP if (line == list(config.lines)[1] and s_i >= jump_from) else PROPS
            counts = rng.multinomial(rng.poisson(units * 0.012), p)
            rows += [f"{inst.id},{_csv(line)},{_csv(c)},{int(n)},{units}"
                     for c, n in zip(cats, counts, strict=True)]
    data = folder / "counts.csv"
    data.write_text("\n".join(rows) + "\n", encoding="utf-8")
    after = instances[-1].end + dt.timedelta(hours=1)
    load_counts_file(engine, config, data, now=after, os_user="test")
    results = service.evaluate_shifts(engine, config, instances, now=after)
    assert all(r.ok for r in results), [r.error for r in results]
    return config, engine, [s.id for s in instances]


def _csv(value: str) -> str:
    return '"' + value.replace('"', '""') + '"' if any(c in value for c in ',"') else value


NOW = dt.datetime(2026, 3, 9, 12, tzinfo=dt.UTC)


@pytest.fixture(scope="module")
def plant(tmp_path_factory):
    folder = tmp_path_factory.mktemp("report_plant")
    config, engine, ids = build_plant(folder)
    yield config, engine, ids, folder
    engine.dispose()


@pytest.fixture(scope="module")
def jump_data(plant) -> ReportData:
    config, engine, ids, _ = plant
    return gather(engine, config, ids[6], now=NOW)


@pytest.fixture(scope="module")
def jump_html(jump_data) -> str:
    return render_html(jump_data)


# --------------------------------------------------------------------------- gathering


def test_gather_reads_the_shift_its_evaluation_and_history(plant, jump_data):
    config, engine, ids, _ = plant
    d = jump_data
    assert d.shift.id == ids[6]
    assert d.evaluation.status == "ok"
    assert d.evaluation.config_hash == config.hash
    assert d.evaluation.seed == service.shift_seed(config.thresholds.seed, ids[6])
    assert [h.id for h in d.history] == ids[:7]  # oldest first, ends with the shift
    assert all(len(h.rate) == 7 and len(h.mix_adjusted_p) == 7 for h in d.line_history)
    assert d.lines == tuple(config.lines.items())
    assert d.shift.start.tzinfo is not None and d.shift.start.utcoffset() == dt.timedelta(hours=1)


def test_counts_units_and_findings_match_the_store(plant, jump_data):
    config, engine, ids, folder = plant
    rows = (folder / "counts.csv").read_text().splitlines()[1:]
    mine = [r.split(",") for r in rows if r.startswith(ids[6] + ",")]
    expect = {(ln, c): int(n) for _, ln, c, n, _ in mine}
    cats = list(config.categories)
    for i, (line, _) in enumerate(jump_data.lines):
        assert jump_data.counts[i] == tuple(expect[(line, c)] for c in cats)
        f = jump_data.finding("baseline", line)
        assert f is not None and f.observed == tuple(float(x) for x in jump_data.counts[i])
    units = {ln: float(u) for _, ln, _, _, u in mine}
    assert jump_data.units == tuple(units[ln] for ln, _ in jump_data.lines)


def test_history_rate_is_defects_over_units(plant, jump_data):
    config, engine, ids, folder = plant
    rows = [r.split(",") for r in (folder / "counts.csv").read_text().splitlines()[1:]]
    p1 = {}
    for sid, ln, _, n, u in rows:
        if ln == "P1":
            d, _u = p1.get(sid, (0, 0))
            p1[sid] = (d + int(n), int(u))
    h = next(h for h in jump_data.line_history if h.line == "P1")
    for i, sid in enumerate(ids[:7]):
        d, u = p1[sid]
        assert h.rate[i] == pytest.approx(d / u, rel=1e-12)
        assert h.rate_baseline[i] == pytest.approx(0.012)


def test_the_jump_is_a_new_alarm_on_p2_and_p4_has_too_little_data(jump_data):
    new = [a for a in jump_data.alarms if a.role == "new"]
    assert any(a.line == "P2" and a.kind == "baseline" and a.severity == "alarm" for a in new)
    mix = next(a for a in new if a.line == "P2" and a.kind == "baseline")
    assert mix.categories[0].code == "FL" and mix.categories[0].direction == "up"
    assert [c for c, _ in too_little_lines(jump_data)] == ["P4"]
    assert jump_data.alarms[0].line == "P2"  # what to look at first sorts first


def test_a_report_of_an_older_shift_says_what_that_shift_showed(plant):
    """The alarm row holds the latest shift's figures; the report of the shift that opened it
    shows the open event's words and that shift's residuals."""
    config, engine, ids, _ = plant
    first = gather(engine, config, ids[6], now=NOW)
    second = gather(engine, config, ids[7], now=NOW)
    a1 = next(a for a in first.alarms if a.line == "P2" and a.kind == "baseline")
    a2 = next(a for a in second.alarms if a.line == "P2" and a.kind == "baseline")
    assert a1.id == a2.id and a1.role == "new" and a2.role == "continues"
    with read_tx(engine) as conn:
        events = [e for e in alarm_events(conn, [a1.id])]
    notes = {e["action"]: e["note"] for e in events}
    assert a1.summary == notes["open"] and a2.summary == notes["update"]
    f1 = first.finding("baseline", "P2")
    assert a1.categories[0].adjusted_residual == pytest.approx(f1.top[0].adjusted_residual)


def test_alarms_of_shift_lists_earlier_open_alarms(plant):
    config, engine, ids, _ = plant
    with read_tx(engine) as conn:
        row = shift_row(conn, ids[7])
        rows = alarms_of_shift(conn, row.row_id, row.start.replace(tzinfo=None))
        before = alarms_of_shift(conn, shift_row(conn, ids[5]).row_id,
                                 shift_row(conn, ids[5]).start.replace(tzinfo=None))
    assert any(r["line"] == "P2" and r["events"] for r in rows)
    assert not any(r["line"] == "P2" and r["kind"] == "baseline" for r in before)


def test_unknown_or_unevaluated_shift_is_not_found(plant):
    config, engine, ids, _ = plant
    with pytest.raises(NotFoundError, match="no shift 2026-03-20_A"):
        gather(engine, config, "2026-03-20_A", now=NOW)
    with pytest.raises(InvalidArgumentError, match="not a shift id"):
        gather(engine, config, "yesterday", now=NOW)
    with pytest.raises(InvalidArgumentError, match="aware"):
        gather(engine, config, ids[0], now=dt.datetime(2026, 3, 9))


def test_latest_evaluated_shift_is_the_default(plant):
    config, engine, ids, _ = plant
    assert gather(engine, config, None, now=NOW).shift.id == ids[-1]


def test_report_data_is_frozen(jump_data):
    with pytest.raises(dataclasses.FrozenInstanceError):
        jump_data.plant_name = "x"  # type: ignore[misc]


# --------------------------------------------------------------------------- rate limit


def test_poisson_upper_limit_is_the_exact_critical_count():
    # For Poisson(10): P(X >= 18) = 0.0143 and P(X >= 19) = 0.0072 (scipy.stats.poisson as the
    # reference library), so at alpha 0.01 the critical count is 19.
    assert float(poisson_upper_limit(np.array([10.0]), 0.01)[0]) == 19.0
    assert sps.poisson.sf(17, 10) > 0.01 > sps.poisson.sf(18, 10)
    assert math.isnan(float(poisson_upper_limit(np.array([0.0]), 0.01)[0]))


@settings(max_examples=60, deadline=None)
@given(mu=st.floats(0.05, 5000.0), alpha=st.sampled_from([0.001, 0.01, 0.05, 0.1]))
def test_poisson_upper_limit_property(mu, alpha):
    """c is the smallest count with P(X >= c | mu) <= alpha (checked with scipy)."""
    c = float(poisson_upper_limit(np.array([mu]), alpha)[0])
    assert c == int(c) and c >= 1
    assert sps.poisson.sf(c - 1, mu) <= alpha * (1 + 1e-9)
    assert sps.poisson.sf(c - 2, mu) > alpha * (1 - 1e-9)


# --------------------------------------------------------------------------- the page


def _h2(html: str) -> list[str]:
    import html as html_lib

    return [html_lib.unescape(t) for t in re.findall(r"<h2>(.*?)</h2>", html)]


def test_page_sections_come_in_the_agreed_order(jump_html):
    titles = _h2(jump_html)
    order = ["Alarms", "Lines at a glance", "Each line's mix", "Where the mix differs",
             "Mix test over the last", "Defect rate over the last", "Sequential charts",
             "Defects by category"]
    positions = [next(i for i, t in enumerate(titles) if t.startswith(o)) for o in order]
    assert positions == sorted(positions)
    assert jump_html.index('class="headline') < jump_html.index("<h2>Alarms</h2>")


def test_headline_counts_alarms_names_lines_and_too_little_data(jump_data, jump_html):
    n_alarm = sum(1 for a in jump_data.alarms if a.role in ("new", "continues")
                  and a.severity == "alarm")
    head = jump_html[jump_html.index('class="headline'):jump_html.index("<h2>Alarms</h2>")]
    assert f"{n_alarm} alarm" in head and "P2" in head
    assert "Look first at" in head and "flash" in head
    assert "Too little data to tell" in head and 'title="Bench cell">P4</b> mix and rate' in head
    assert "is below 0.80" in head


def test_footer_has_config_hash_baseline_version_and_cautions(jump_data, jump_html):
    foot = jump_html[jump_html.index("<footer>"):]
    assert jump_data.evaluation.config_hash[:16] in foot
    (b,) = jump_data.baselines
    assert f"plant (version {b.id}, effective 2026-03-02" in foot
    for text in CAUTIONS:
        assert render_escape(text) in foot
    assert "decision aid" in foot and "does not certify conformity" in foot


def render_escape(text: str) -> str:
    import html

    return html.escape(text, quote=True)


def test_every_chart_is_inline_svg_with_axis_labels(jump_data, jump_html):
    svgs = re.findall(r"<svg\b.*?</svg>", jump_html, flags=re.S)
    # mix, residual map, mix test, rate, Pareto, and the sequential charts when stored
    assert len(svgs) == 5 + bool(jump_data.charts)
    for label in ("defects (count)", "adjusted residual", "adjusted p", "effect size w",
                  "defects per", "100 units (%)", "cumulative share (%)"):
        assert label in jump_html, label
    assert "<?xml" not in jump_html and "<!DOCTYPE svg" not in jump_html


def test_the_page_makes_no_external_reference(jump_html):
    assert "Content-Security-Policy" in jump_html and "default-src 'none'" in jump_html
    low = jump_html.lower()
    assert "<script" not in low and "<link" not in low and "@import" not in low
    assert not re.search(r"(src|href)\s*=\s*[\"']?(https?:|//)", low)
    assert not re.search(r"url\((?!#)", low)  # only in-document references (clip paths)
    assert not re.search(r"xlink:href=\"(?!#)", low)


def test_residual_map_writes_each_residual(jump_data, jump_html):
    f = jump_data.finding("baseline", "P2")
    j = list(f.categories).index("FL")
    assert f">{f.residuals[j]:+.1f}<" in jump_html


def test_rendering_is_deterministic(jump_data):
    assert render_html(jump_data) == render_html(jump_data)


def test_sequential_section_is_a_note_without_chart_rows(jump_data):
    html = render_html(dataclasses.replace(jump_data, charts=()))
    assert "No sequential chart values are stored" in html
    assert "Sequential charts over the last" not in html


def test_failed_evaluation_page_says_so(jump_data):
    failed = dataclasses.replace(
        jump_data, evaluation=dataclasses.replace(jump_data.evaluation, status="failed",
                                                  error="ValueError: <b>boom</b>"))
    html = render_html(failed)
    assert "evaluation failed" in html and "&lt;b&gt;boom&lt;/b&gt;" in html
    assert "<svg" not in html


# --------------------------------------------------------------------------- escaping


HOSTILE_CAT = "<script>alert(1)</script>"
HOSTILE_LINE = 'Press "7" & <b>bold</b>'


@pytest.fixture(scope="module")
def hostile(tmp_path_factory):
    folder = tmp_path_factory.mktemp("hostile")
    cats = {HOSTILE_CAT: HOSTILE_CAT, "DNT": "dent $\\frac{$ x", "FL": "a $\\alpha$ b",
            "SH": "short shot", "BUR": "burr", "OTH": "other"}
    lines = {"P1": HOSTILE_LINE, "P2": "Press 2", "P3": "Press 3", "P4": "Bench cell"}
    config, engine, ids = build_plant(folder, plant_text(cats, lines), shifts=7)
    yield config, engine, ids
    engine.dispose()


def test_names_from_config_render_as_text(hostile):
    config, engine, ids = hostile
    html = render_html(gather(engine, config, ids[-1], now=NOW))
    assert "<script" not in html.lower()
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in html
    assert "<b>bold</b>" not in html and "&lt;b&gt;bold&lt;/b&gt;" in html
    assert "&amp; " in html


def test_dollar_signs_stay_text_in_charts(hostile):
    """A $...$ in a name is shown as typed, not as mathtext (and a broken one does not crash)."""
    config, engine, ids = hostile
    html = render_html(gather(engine, config, ids[-1], now=NOW))
    svg = "".join(re.findall(r"<svg\b.*?</svg>", html, flags=re.S))
    assert "a $\\alpha$ b" in svg and "$\\frac{$" in svg


@settings(max_examples=80, deadline=None)
@given(st.text(max_size=60))
def test_safe_never_leaves_an_unescaped_dollar(text):
    out = plots.safe(text, 200)
    assert re.search(r"(?<!\\)\$", out) is None
    assert all(ch.isprintable() for ch in out)


# --------------------------------------------------------------------------- sequential rows


def test_sequential_charts_are_drawn_when_rows_exist(tmp_path):
    text = plant_text() + "[sequential]\nenabled = false\n"
    config, engine, ids = build_plant(tmp_path, text, shifts=6, jump_from=99)
    assert gather(engine, config, ids[-1], now=NOW).charts == ()
    with write_tx(engine) as conn:
        for k, sid in enumerate(ids):
            row = shift_row(conn, sid).row_id
            for chart, stat in (("ewma", 2.0 + k), ("<i>concern</i> FL up x2", 0.5 * k)):
                conn.execute(insert(chart_state).values(
                    line="P1", chart=chart, shift_id=row, baseline_version_id=None,
                    state={}, statistic=stat, threshold=10.0))
    d = gather(engine, config, ids[-1], now=NOW)
    assert {c.chart for c in d.charts} == {"ewma", "<i>concern</i> FL up x2"}
    ewma = next(c for c in d.charts if c.chart == "ewma")
    assert ewma.statistic == tuple(2.0 + k for k in range(6))
    html = render_html(d)
    assert "Sequential charts over the last 6 shifts" in html
    assert "statistic /" in html and "&lt;i&gt;concern&lt;/i&gt; FL up x2" in html
    assert "No sequential chart values" not in html
    engine.dispose()


# --------------------------------------------------------------------------- many lines


def test_a_large_plant_draws_the_flagged_lines_and_maps_all(tmp_path):
    lines = {f"L{i:02d}": f"Line {i}" for i in range(12)}
    text = plant_text(lines=lines)
    config, engine, ids = build_plant(tmp_path, text, shifts=7, jump_from=6)
    d = gather(engine, config, ids[-1], now=NOW)
    shown = detail_lines(d, limit=8)
    assert len(shown) == 8 and "L01" in shown  # L01 carries the jump (second line)
    html = render_html(d)
    assert "Showing 8 of 12 lines" in html
    assert all(f"L{i:02d}" in html for i in range(12))
    engine.dispose()


# --------------------------------------------------------------------------- writing


def test_write_atomic_replaces_whole_and_leaves_no_temp(tmp_path):
    target = tmp_path / "r.html"
    target.write_text("old", encoding="utf-8")
    write_atomic(target, "new \u00e9")
    assert target.read_text(encoding="utf-8") == "new \u00e9"
    assert [p.name for p in tmp_path.iterdir()] == ["r.html"]
    with pytest.raises(InvalidArgumentError, match="does not exist"):
        write_atomic(tmp_path / "missing" / "r.html", "x")
    (tmp_path / "taken").mkdir()
    with pytest.raises(InvalidArgumentError, match="cannot write .*taken"):
        write_atomic(tmp_path / "taken", "x")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["r.html", "taken"]  # no temp left


def test_prune_keeps_the_newest_by_shift_order_not_by_name(tmp_path):
    text = plant_text().replace('name = "A"', 'name = "day"').replace('name = "B"',
                                                                       'name = "afternoon"')
    text = text.replace('name = "C"', 'name = "night"')
    (tmp_path / "p.toml").write_text(text, encoding="utf-8")
    config = load_config(tmp_path / "p.toml")
    names = ["2026-03-02_day", "2026-03-02_afternoon", "2026-03-02_night", "2026-03-03_day"]
    for n in names:
        (tmp_path / report_name(n)).write_text(n, encoding="utf-8")
    (tmp_path / "notes.html").write_text("keep me", encoding="utf-8")
    gone = prune(tmp_path, 2, config)
    assert sorted(p.name for p in gone) == sorted([report_name(names[0]), report_name(names[1])])
    left = sorted(p.name for p in tmp_path.iterdir() if p.suffix == ".html")
    assert left == sorted(["notes.html", report_name(names[2]), report_name(names[3])])


def test_write_shift_report_into_the_folder_keeps_last_n(tmp_path):
    config, engine, ids = build_plant(tmp_path, plant_text(keep=3), shifts=6, jump_from=99)
    for sid in ids:
        path = write_shift_report(engine, config, sid, now=NOW)
        assert path.name == report_name(sid)
    folder = report_folder(config)
    assert folder == tmp_path / "reports"
    assert sorted(p.name for p in folder.iterdir()) == sorted(report_name(s) for s in ids[-3:])
    page = (folder / report_name(ids[-1])).read_text(encoding="utf-8")
    assert page == render_html(gather(engine, config, ids[-1], now=NOW))
    engine.dispose()


def test_write_after_evaluation_contains_failures(tmp_path, caplog):
    config, engine, ids = build_plant(tmp_path, shifts=6, jump_from=99)
    with caplog.at_level(logging.ERROR, logger="qcfit.report.write"):
        written = write_after_evaluation(engine, config, [ids[-1], "2026-04-01_A"], now=NOW)
    assert [p.name for p in written] == [report_name(ids[-1])]
    assert "report of shift 2026-04-01_A not written" in caplog.text
    no_folder = dataclasses.replace(config, report=dataclasses.replace(config.report, folder=None))
    assert write_after_evaluation(engine, no_folder, [ids[-1]], now=NOW) == []
    engine.dispose()


# --------------------------------------------------------------------------- the command


def test_cli_report_shift_out_prints_the_path(plant, tmp_path):
    config, engine, ids, folder = plant
    out = tmp_path / "one.html"
    result = CliRunner().invoke(cli_main, ["--config", str(folder / "plant.toml"), "report",
                                           "--shift", ids[6], "--out", str(out)])
    assert result.exit_code == 0, result.output
    assert result.output.strip() == str(out.resolve())
    assert out.read_text(encoding="utf-8").startswith("<!DOCTYPE html>")


def test_cli_report_last_goes_into_the_report_folder(plant):
    config, engine, ids, folder = plant
    result = CliRunner().invoke(cli_main, ["--config", str(folder / "plant.toml"), "report"])
    assert result.exit_code == 0, result.output
    path = Path(result.output.strip())
    assert path == (folder / "reports" / report_name(ids[-1])).resolve() and path.exists()


def test_cli_report_without_folder_writes_to_the_current_folder(tmp_path, monkeypatch):
    text = plant_text().replace('[report]\nfolder = "reports"\n', "[report]\n")
    config, engine, ids = build_plant(tmp_path, text, shifts=6, jump_from=99)
    engine.dispose()
    cwd = tmp_path / "here"
    cwd.mkdir()
    monkeypatch.chdir(cwd)
    result = CliRunner().invoke(cli_main, ["--config", str(tmp_path / "plant.toml"), "report",
                                           "--last"])
    assert result.exit_code == 0, result.output
    assert Path(result.output.strip()) == (cwd / report_name(ids[-1])).resolve()


@pytest.mark.parametrize("args,message", [
    (["--shift", "2026-03-02_A", "--last"], "Error: --last: use either --shift or --last"),
    (["--shift", "2026-04-20_A"], "Error: no shift 2026-04-20_A in the store"),
    (["--shift", "someday"], "Error: --shift: 'someday' is not a shift id"),
])
def test_cli_report_bad_usage_exits_2(plant, args, message):
    config, engine, ids, folder = plant
    result = CliRunner().invoke(cli_main, ["--config", str(folder / "plant.toml"), "report",
                                           *args])
    assert result.exit_code == 2
    assert message in result.output


def test_cli_report_out_in_missing_folder_exits_2(plant, tmp_path):
    config, engine, ids, folder = plant
    result = CliRunner().invoke(cli_main, ["--config", str(folder / "plant.toml"), "report",
                                           "--out", str(tmp_path / "nope" / "r.html")])
    assert result.exit_code == 2
    assert "Error: --out: folder" in result.output and "does not exist" in result.output


def test_cli_report_help():
    result = CliRunner().invoke(cli_main, ["report", "--help"])
    assert result.exit_code == 0
    assert "--shift" in result.output and "--last" in result.output and "--out" in result.output


def test_hash_of_config_is_in_the_page_written_by_the_cli(plant, tmp_path):
    config, engine, ids, folder = plant
    out = tmp_path / "x.html"
    CliRunner().invoke(cli_main, ["--config", str(folder / "plant.toml"), "report", "--shift",
                                  ids[0], "--out", str(out)])
    text = (folder / "plant.toml").read_bytes().decode("utf-8")
    assert hashlib.sha256(text.encode("utf-8")).hexdigest()[:16] in out.read_text("utf-8")


def test_parse_config_report_folder_none_means_no_folder(plant_config_text):
    import tomllib

    config = parse_config(tomllib.loads(plant_config_text), text=plant_config_text)
    assert report_folder(config) is None


def test_a_failed_evaluation_gets_a_page_that_says_so(tmp_path):
    """A shift whose only evaluation failed (as the service records it) still has a report."""
    from qcfit.store.engine import to_utc_naive
    from qcfit.store.evaluations import insert_evaluation
    from qcfit.store.shifts import ensure_shifts

    config, engine, ids = build_plant(tmp_path, shifts=6, jump_from=99)
    cal = ShiftCalendar.from_config(config)
    failed = cal.from_id(ids[-1]).end  # the next shift starts where the last one ended
    nxt = cal.shift_at(failed)
    with write_tx(engine) as conn:
        row = ensure_shifts(conn, [nxt])[nxt.id]
        insert_evaluation(conn, {
            "shift_id": row, "status": "failed", "started_utc": to_utc_naive(nxt.end),
            "finished_utc": to_utc_naive(nxt.end), "error": "StoreError: disk <full>",
            "config_hash": config.hash, "code_version": "test", "seed": 1, "is_current": True,
            "superseded_utc": None})
    d = gather(engine, config, nxt.id, now=NOW)
    assert d.evaluation.status == "failed" and d.findings == ()
    assert [h.id for h in d.history][-2:] == [ids[-1], nxt.id]
    html = render_html(d)
    assert "evaluation failed" in html and "disk &lt;full&gt;" in html
    engine.dispose()


def test_a_shift_without_counts_says_nothing_could_be_tested(tmp_path):
    config, engine, ids = build_plant(tmp_path, shifts=6, jump_from=99)
    cal = ShiftCalendar.from_config(config)
    empty = cal.shift_at(cal.from_id(ids[-1]).end)
    (s,) = service.evaluate_shifts(engine, config, [empty], now=empty.end + dt.timedelta(hours=1))
    assert s.ok
    html = render_html(gather(engine, config, empty.id, now=NOW))
    assert "No counts were loaded for this shift" in html
    engine.dispose()


def test_a_service_fault_is_placed_on_the_service_not_on_a_line(jump_data):
    fault = dataclasses.replace(jump_data.alarms[0], id=99, kind="service-fault", line=None,
                                role="new", summary="evaluation failed: StoreError: locked")
    html = render_html(dataclasses.replace(jump_data, alarms=(fault, *jump_data.alarms)))
    assert "<td><b>qcfit service</b></td>" in html
    assert "Look first at</span> <b>qcfit service</b>, service fault" in html


def test_write_after_a_catch_up_writes_only_the_newest_keep(tmp_path):
    config, engine, ids = build_plant(tmp_path, plant_text(keep=2), shifts=6, jump_from=99)
    written = write_after_evaluation(engine, config, list(reversed(ids)), now=NOW)
    assert [p.name for p in written] == [report_name(ids[-2]), report_name(ids[-1])]
    assert sorted(p.name for p in (tmp_path / "reports").iterdir()) == sorted(
        report_name(s) for s in ids[-2:])
    engine.dispose()


def test_title_gives_real_hours_of_a_dst_night(jump_data):
    """EU summer time ends on the last Sunday of October at 01:00 UTC (Directive 2000/84/EC):
    on 2026-10-25, so a 22:00-06:00 Berlin night shift starting the 24th lasts 9 hours."""
    from zoneinfo import ZoneInfo

    berlin = ZoneInfo("Europe/Berlin")
    night = dataclasses.replace(
        jump_data.shift, start=dt.datetime(2026, 10, 24, 22, tzinfo=berlin),
        end=dt.datetime(2026, 10, 25, 6, tzinfo=berlin))
    html = render_html(dataclasses.replace(jump_data, shift=night))
    assert "22:00 \u2013 06:00 (+1 d) Europe/Berlin, 9 h" in html
    assert "14:00 Europe/Berlin, 8 h" in render_html(jump_data)


def test_a_line_without_baseline_and_a_plant_without_units_still_render(tmp_path):
    text = plant_text().replace('lines = "*"', 'lines = ["P1", "P2", "P3"]')
    path = tmp_path / "plant.toml"
    path.write_text(text, encoding="utf-8")
    config = load_config(path)
    engine = make_engine(f"sqlite:///{tmp_path / 'plant.sqlite'}")
    init_store(engine, config, os_user="test", now=T0)
    shift = ShiftCalendar.from_config(config).from_id("2026-03-03_A")
    rows = ["shift,line,category,count"] + [
        f"{shift.id},{ln},{c},{n}" for ln in config.lines for c, n in zip(CATS, (9, 7, 4, 3, 2, 1),
                                                                         strict=True)]
    (tmp_path / "c.csv").write_text("\n".join(rows) + "\n", encoding="utf-8")
    after = shift.end + dt.timedelta(hours=1)
    load_counts_file(engine, config, tmp_path / "c.csv", now=after, os_user="test")
    service.evaluate_shifts(engine, config, [shift], now=after)
    d = gather(engine, config, shift.id, now=NOW, history=1)
    assert d.finding("baseline", "P4").verdict == "no-baseline"
    assert all(math.isnan(u) for u in d.units) and len(d.history) == 1
    html = render_html(d)
    assert "no baseline" in html and "no units inspected recorded" in html
    engine.dispose()


def test_acknowledgement_note_and_person_are_shown_escaped(tmp_path):
    from qcfit import alarmlog

    config, engine, ids = build_plant(tmp_path, shifts=7, jump_from=6)
    alarm = next(a for a in gather(engine, config, ids[-1], now=NOW).alarms if a.line == "P2")
    alarmlog.acknowledge(engine, alarm.id, by="ana", note="mould <b>swapped</b> & checked",
                         now=NOW)
    html = render_html(gather(engine, config, ids[-1], now=NOW))
    assert "acknowledged by ana: \u201cmould &lt;b&gt;swapped&lt;/b&gt; &amp; checked\u201d" in html
    engine.dispose()


def test_glance_has_a_sequential_column_when_the_charts_ran(jump_data, jump_html):
    seq = [f for f in jump_data.findings if f.kind == "sequential"]
    if not seq:
        pytest.skip("this build stores no sequential findings")
    assert "<th>sequential charts</th>" in jump_html
    assert re.search(r"\d+% of limit|\d+\.\d\u00d7 limit", jump_html)
    no_seq = dataclasses.replace(jump_data, findings=tuple(
        f for f in jump_data.findings if f.kind != "sequential"))
    assert "<th>sequential charts</th>" not in render_html(no_seq)


def test_an_open_service_fault_without_a_shift_is_listed(tmp_path):
    from qcfit.store.alarms import insert_alarm

    config, engine, ids = build_plant(tmp_path, shifts=6, jump_from=99)
    naive = NOW.replace(tzinfo=None)
    with write_tx(engine) as conn:
        insert_alarm(conn, {
            "kind": "service-fault", "line": None, "line_key": "", "first_shift_id": None,
            "last_shift_id": None, "shift_key": 0, "baseline_version_id": None,
            "baseline_key": 0, "severity": "alarm", "state": "open",
            "summary": "store unreachable: <disk>", "opened_utc": naive, "updated_utc": naive})
    d = gather(engine, config, ids[-1], now=NOW)
    (fault,) = [a for a in d.alarms if a.kind == "service-fault"]
    assert fault.role == "earlier" and fault.first_shift is None
    html = render_html(d)
    assert "<td><b>qcfit service</b></td>" in html and "store unreachable: &lt;disk&gt;" in html
    engine.dispose()

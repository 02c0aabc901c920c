"""``qcfit baseline list | show | diff | fit`` in-process (CliRunner, real config and store files).

Counts go in through ``qcfit load counts``; every rejected fit names its argument, exits 2
and leaves the config file and the store as they were.
"""

from __future__ import annotations

import csv
import datetime as dt
import io
import json
import shutil
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

from qcfit.cli import main
from qcfit.config import load_config

REPO = Path(__file__).resolve().parents[1]
CATS = ("SCR", "DNT", "FL", "SH", "BUR", "OTH")
P_L1 = np.array([0.30, 0.25, 0.15, 0.12, 0.10, 0.08])  # invented, as the test plant's baseline


def run(config_path: Path, *args: str):
    return CliRunner().invoke(main, ["--config", str(config_path), *args])


def _shift_ids(first: dt.date, days: int) -> list[str]:
    out = []
    day = first
    while len(out) < 3 * days:
        if day.weekday() != 6:  # the test plant does not work on Sundays
            out += [f"{day.isoformat()}_{name}" for name in "ABC"]
        day += dt.timedelta(days=1)
    return out


def _counts_csv(path: Path, *, seed: int, days: int = 40, lines=("L1", "L2"), odd=None) -> list[str]:
    """Seeded per-shift counts (with units inspected) for ``lines``; ``odd`` = (shift index,
    mix) replaces one shift's mix on L1. Returns the shift ids written."""
    rng = np.random.default_rng(seed)
    ids = _shift_ids(dt.date(2026, 1, 5), days)
    buf = io.StringIO()
    out = csv.writer(buf, lineterminator="\n")
    out.writerow(["shift", "line", "category", "count", "units_inspected"])
    for i, sid in enumerate(ids):
        for line in lines:
            units = int(rng.normal(15000, 700))
            mix = odd[1] if odd and line == "L1" and i == odd[0] else P_L1
            counts = rng.multinomial(rng.poisson(units * 0.012), mix)
            for code, n in zip(CATS, counts, strict=True):
                out.writerow([sid, line, code, int(n), units])
    path.write_text(buf.getvalue(), encoding="utf-8")
    return ids


@pytest.fixture
def loaded(plant_store, tmp_path):
    """The test plant's store with 40 days x 3 shifts of counts for L1 and L2 (shift 30 of L1
    odd: dents double at the cost of scratches)."""
    ids = _counts_csv(tmp_path / "counts.csv", seed=3,
                      odd=(30, np.array([0.12, 0.50, 0.15, 0.10, 0.08, 0.05])))
    result = run(plant_store.config_path, "load", "counts", str(tmp_path / "counts.csv"))
    assert result.exit_code == 0, result.output
    plant_store.ids = ids
    return plant_store


def _unchanged(store, before_config: bytes, before_dump) -> None:
    assert store.config_path.read_bytes() == before_config
    assert store.dump() == before_dump
    assert not list(store.config_path.parent.glob("*.bak"))


# --------------------------------------------------------------------------- fit


def test_fit_prints_the_study_and_a_block_that_pastes(loaded):
    result = run(loaded.config_path, "baseline", "fit", "--line", "L1", "--from", "2026-01-05",
                 "--to", "2026-02-20", "--effective", "2026-03-02")
    assert result.exit_code == 0, result.output
    out = result.stdout
    assert "Phase I fit of L1 from 2026-01-05 to 2026-02-20: 120 shifts in the window" in out
    assert "Verdict: not stable" in out  # the odd shift stands out and is kept
    assert f"{loaded.ids[30]} (kept): mix differs from the rest of the window" in out
    block = out[out.index("# Phase I fit of L1"):]
    text = loaded.config_path.read_text(encoding="utf-8") + "\n" + block
    Path(loaded.config_path).write_text(text, encoding="utf-8")
    spec = next(b for b in load_config(loaded.config_path).baselines if b.name == "L1-2026-03-02")
    assert spec.lines == ("L1",) and spec.effective == dt.date(2026, 3, 2) and spec.rate > 0


def test_fit_json_excludes_outliers_and_covers_the_true_mix(loaded):
    result = run(loaded.config_path, "baseline", "fit", "--line", "L1", "--from", "2026-01-05",
                 "--to", "2026-02-20", "--exclude-outliers", "--format", "json")
    assert result.exit_code == 0, result.output
    data = json.loads(result.stdout)
    assert [f["shift_id"] for f in data["excluded"]] == [loaded.ids[30]]
    assert data["verdict"] == "stable" and data["kept_shifts"] == 119
    assert [r["flagged"] for r in data["rounds"]] == [[loaded.ids[30]], []]
    cats = data["proportions"]["by_category"]
    assert all(cats[c]["lower"] <= p <= cats[c]["upper"] for c, p in zip(CATS, P_L1, strict=True))
    assert data["rate"]["lower"] <= 0.012 <= data["rate"]["upper"]
    assert data["toml"].startswith("# Phase I fit of L1") and data["written"] is None


def test_fit_several_lines_with_goodman(loaded):
    result = run(loaded.config_path, "baseline", "fit", "--lines", "L1,L2", "--from",
                 "2026-01-05", "--to", "2026-01-31", "--method", "goodman", "--format", "json",
                 "--name", "glaze", "--effective", "2026-03-02")
    assert result.exit_code == 0, result.output
    data = json.loads(result.stdout)
    assert data["lines"] == ["L1", "L2"] and data["proportions"]["method"] == "goodman"
    assert '[baseline.glaze]\nlines = ["L1", "L2"]' in data["toml"]
    assert data["window_shifts"] == 72  # 24 working days (Sundays off) x 3 shifts
    assert any(w.startswith("only ") for w in data["warnings"])  # < 100 shifts kept


def test_fit_write_adds_the_block_keeps_a_backup_and_records_a_version(loaded):
    before = loaded.config_path.read_text(encoding="utf-8")
    result = run(loaded.config_path, "baseline", "fit", "--line", "L1", "--from", "2026-01-05",
                 "--to", "2026-02-20", "--exclude-outliers", "--write", "--name", "l1-2026",
                 "--effective", "2026-03-02")
    assert result.exit_code == 0, result.output
    after = loaded.config_path.read_text(encoding="utf-8")
    assert after.startswith(before) and "[baseline.l1-2026]" in after[len(before):]
    backups = list(loaded.config_path.parent.glob("plant.toml.*.bak"))
    assert len(backups) == 1 and backups[0].read_text(encoding="utf-8") == before
    assert f"Added [baseline.l1-2026] to {loaded.config_path}" in result.stdout
    listed = run(loaded.config_path, "baseline", "list", "--format", "json")
    rows = {r["name"]: r for r in json.loads(listed.stdout)}
    assert rows["l1-2026"]["in_config"] and rows["l1-2026"]["effective"] == "2026-03-02"
    # the same name again: refused, nothing written
    again = run(loaded.config_path, "baseline", "fit", "--line", "L1", "--from", "2026-01-05",
                "--to", "2026-02-20", "--write", "--name", "l1-2026")
    assert again.exit_code == 2
    assert "Error: --name: a baseline named 'l1-2026' is already in" in again.stderr
    assert loaded.config_path.read_text(encoding="utf-8") == after
    assert len(list(loaded.config_path.parent.glob("plant.toml.*.bak"))) == 1


def test_fit_write_refuses_an_overlapping_effective_date(loaded):
    before, dump = loaded.config_path.read_bytes(), loaded.dump()
    result = run(loaded.config_path, "baseline", "fit", "--line", "*", "--from", "2026-01-05",
                 "--to", "2026-01-31", "--write", "--effective", "2026-01-05")
    assert result.exit_code == 2
    assert 'is also the effective date of baseline.plant for every line ("*")' in result.stderr
    _unchanged(loaded, before, dump)


@pytest.mark.parametrize("args,message", [
    (["--line", "L9"], "Error: --line: unknown line 'L9'; the config has L1, L2, L3, L4"),
    ([], "Error: --line: give the line to fit"),
    (["--line", "L1", "--from", "2026-02-01", "--to", "2026-01-05"],
     "Error: --from: 2026-02-01 is after --to 2026-01-05"),
    (["--line", "L3", "--from", "2026-01-05", "--to", "2026-02-20"],
     "Error: --from/--to: no shifts with data for L3 from 2026-01-05 to 2026-02-20 (an empty history window)"),
    (["--line", "L1", "--from", "2025-06-01", "--to", "2025-06-30"],
     "Error: --from/--to: no shifts with data for L1 from 2025-06-01 to 2025-06-30"),
])
def test_fit_bad_arguments_are_named_and_nothing_is_written(loaded, args, message):
    before, dump = loaded.config_path.read_bytes(), loaded.dump()
    full = ["baseline", "fit", *args]
    if "--from" not in args:
        full += ["--from", "2026-01-05", "--to", "2026-02-20"]
    result = run(loaded.config_path, *full, "--write")
    assert result.exit_code == 2, result.output
    assert message in result.stderr
    _unchanged(loaded, before, dump)


def test_fit_refuses_a_window_with_categories_no_longer_in_the_config(loaded):
    text = loaded.config_path.read_text(encoding="utf-8")
    text = text.replace('OTH = "other"\n', "").replace("BUR = 0.10, OTH = 0.08", "BUR = 0.18")
    loaded.config_path.write_text(text, encoding="utf-8")
    result = run(loaded.config_path, "baseline", "fit", "--line", "L1", "--from", "2026-01-05",
                 "--to", "2026-01-10")
    assert result.exit_code == 2
    assert "Error: --from/--to: the window holds defects in categories that are not in the config: OTH (" in result.stderr


def test_fit_on_a_store_that_was_never_initialised(tmp_path, plant_config_text, write_config):
    path = write_config(tmp_path, plant_config_text)
    result = run(path, "baseline", "fit", "--line", "L1", "--from", "2026-01-05", "--to", "2026-01-10")
    assert result.exit_code == 1 and "Error: store not initialised: run `qcfit init`" in result.stderr


# --------------------------------------------------------------------------- list / show / diff


def test_list_show_and_diff_across_an_edited_baseline(plant_store):
    path = plant_store.config_path
    first = run(path, "baseline", "list")
    assert first.exit_code == 0, first.output
    assert first.stdout.splitlines()[0].split() == [
        "ID", "NAME", "EFFECTIVE", "LINES", "RATE", "FIRST", "SEEN", "(UTC)", "BY", "IN", "CONFIG"]
    assert first.stdout.splitlines()[1].split()[:5] == ["1", "plant", "2026-01-05", "*", "0.012"]
    text = path.read_text(encoding="utf-8").replace(
        "proportions = { SCR = 0.30, DNT = 0.25,", "proportions = { SCR = 0.25, DNT = 0.30,")
    path.write_text(text.replace("rate = 0.012", "rate = 0.010"), encoding="utf-8")
    listed = json.loads(run(path, "baseline", "list", "--format", "json").stdout)
    assert [(r["id"], r["in_config"]) for r in listed] == [(1, False), (2, True)]
    shown = run(path, "baseline", "show", "plant")
    assert shown.exit_code == 0
    assert shown.stdout.index("version 2 of baseline plant (in the config)") < \
        shown.stdout.index("version 1 of baseline plant (no longer in the config)")
    assert "rate = 0.01\n" in shown.stdout and "[baseline.plant]" in shown.stdout
    diff = run(path, "baseline", "diff", "1", "2")
    assert diff.exit_code == 0, diff.output
    lines = diff.stdout.splitlines()
    assert lines[0] == "version 1 (plant, effective 2026-01-05) -> version 2 (plant, effective 2026-01-05)"
    assert lines[2].split() == ["SCR", "0.3000", "0.2500", "-0.0500", "-16.7%"]
    assert lines[3].split() == ["DNT", "0.2500", "0.3000", "+0.0500", "+20.0%"]
    # Cohen's w = sqrt(0.05^2/0.30 + 0.05^2/0.25) = 0.135401 (by hand, Cohen 1988 ch. 7 formula)
    assert "Cohen's w of V2's mix against V1's: 0.1354" in diff.stdout
    assert "rate: 0.012 -> 0.01" in diff.stdout
    data = json.loads(run(path, "baseline", "diff", "1", "2", "--format", "json").stdout)
    assert data["cohen_w"] == pytest.approx(0.1354006401, abs=1e-9)


def test_show_and_diff_of_unknown_baselines(plant_store):
    path = plant_store.config_path
    result = run(path, "baseline", "show", "nope")
    assert result.exit_code == 2 and "Error: no baseline 'nope' (see qcfit baseline list)" in result.stderr
    result = run(path, "baseline", "diff", "1", "7")
    assert result.exit_code == 2 and "Error: no baseline version 7" in result.stderr


@pytest.mark.parametrize("cmd", [["baseline"], ["baseline", "list"], ["baseline", "show"],
                                 ["baseline", "diff"], ["baseline", "fit"]])
def test_every_baseline_command_has_help(cmd):
    result = CliRunner().invoke(main, [*cmd, "--help"])
    assert result.exit_code == 0 and "Usage:" in result.output


# --------------------------------------------------------------------------- the demo plant


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    """The demo plant's config and per-shift counts loaded into a fresh store."""
    folder = tmp_path_factory.mktemp("demo")
    config = folder / "plant.toml"
    shutil.copy(REPO / "sample_lines" / "plant.toml", config)
    assert run(config, "init").exit_code == 0
    result = run(config, "load", "counts", str(REPO / "sample_lines" / "data" / "shift_counts.csv"))
    assert result.exit_code == 0, result.output
    return config


def _truth(line: str) -> list[dict[str, str]]:
    with open(REPO / "sample_lines" / "data" / "truth.csv", encoding="utf-8", newline="") as fh:
        return [r for r in csv.DictReader(fh) if r["line"] == line]


def _fit(config: Path, *args: str) -> dict:
    result = run(config, "baseline", "fit", "--from", "2026-09-07", "--to", "2026-11-21",
                 "--format", "json", *args)
    assert result.exit_code == 0, result.output
    return json.loads(result.stdout)


@pytest.mark.slow
def test_demo_healthy_line_fit_covers_the_generators_mix(demo):
    data = _fit(demo, "--line", "IM1")
    assert data["verdict"] == "stable" and not data["standing_out"]
    truth = _truth("IM1")[0]
    for code, c in data["proportions"]["by_category"].items():
        assert c["lower"] <= float(truth[f"true_share_{code}"]) <= c["upper"], code
    assert data["rate"]["lower"] <= float(truth["true_rate"]) <= data["rate"]["upper"]
    # the plant's approved baseline carries the generator's true mix: the fit is close to it
    current = data["current_baseline"]
    assert current["name"] == "housings" and current["cohen_w"] < 0.03
    assert current["rate_ratio"] == pytest.approx(1.0, abs=0.02)


@pytest.mark.slow
def test_demo_sudden_jump_shifts_are_the_ones_excluded(demo):
    data = _fit(demo, "--line", "IM2", "--exclude-outliers")
    jump = [r["shift"] for r in _truth("IM2") if r["phase"] == "jump"]
    assert sorted(f["shift_id"] for f in data["excluded"]) == sorted(jump)
    assert all("FL up" in f["reason"] for f in data["excluded"])
    assert data["verdict"] == "stable"


@pytest.mark.slow
def test_demo_slow_drift_is_found_as_a_lasting_change(demo):
    data = _fit(demo, "--line", "IM3")
    drift = [r["shift"] for r in _truth("IM3") if r["phase"].startswith("drift")]
    cp = data["change_point"]
    assert data["verdict"] == "not stable" and not cp["stable"]
    assert cp["split_shift_id"] in drift  # the split falls inside the drift
    assert not data["homogeneity"]["stable"]
    assert any(w.startswith(f"the mix changed around shift {cp['split_shift_id']}")
               for w in data["warnings"])

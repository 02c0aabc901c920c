"""One shift evaluated on each store backend gives the same stored findings (the finding rows
are written with the driver's own executemany and JSON text, see qcfit.store.evaluations)."""

from __future__ import annotations

import math

import numpy as np

from qcfit import service
from qcfit.calendar import ShiftCalendar
from qcfit.config import load_config
from qcfit.store.engine import make_engine, read_tx
from qcfit.store.evaluations import findings_of
from qcfit.store.migrate import init_store
from tests.test_service import LINES, T0, flash_jump, healthy, load_counts, plant_text


def _close(a, b) -> bool:
    if isinstance(a, float) or isinstance(b, float):
        return a is not None and b is not None and math.isclose(a, b, rel_tol=1e-12)
    return a == b


def test_stored_findings_read_back_as_written(store_url, tmp_path, plant_config_text) -> None:
    path = tmp_path / "plant.toml"
    path.write_text(plant_text(plant_config_text, min_effect_w=0.3, mc_draws=2000), encoding="utf-8")
    config = load_config(path)
    engine = make_engine(store_url)
    try:
        init_store(engine, config, os_user="test", now=T0)
        shift = ShiftCalendar.from_config(config).from_id("2026-01-05_A")
        rng = np.random.default_rng(7)
        counts = {ln: healthy(300, rng) for ln in LINES[1:]} | {"L1": flash_jump(300, rng)}
        load_counts(engine, shift, counts, units={ln: 20_000 for ln in LINES})
        summary = service.evaluate_shift(engine, config, shift, now=T0)
        assert summary.ok, summary.error
        with read_tx(engine) as conn:
            stored = findings_of(conn, summary.evaluation_id)
    finally:
        engine.dispose()
    kinds = {(f["kind"], f["line"]) for f in stored}
    assert ("baseline", "L1") in kinds and ("between-lines", None) in kinds
    assert len(stored) == summary.findings
    mix = next(f for f in stored if f["kind"] == "baseline" and f["line"] == "L1")
    assert mix["verdict"] == "alarm"  # the flash jump of L1
    assert mix["top_categories"][0]["code"] == "FL" and mix["top_categories"][0]["direction"] == "up"
    details = mix["details"]
    assert details["categories"] == ["SCR", "DNT", "FL", "SH", "BUR", "OTH"]
    assert details["observed"] == [float(v) for v in counts["L1"]]
    assert all(isinstance(v, float) for v in details["expected"] + details["adjusted_residuals"])
    # the between-lines statistic read back is the float written (no rounding on the way)
    between = next(f for f in stored if f["kind"] == "between-lines")
    assert _close(between["statistic"], float(between["statistic"])) and between["dof"] == 15


def test_finding_values_follow_the_finding_table_columns() -> None:
    from qcfit.store.evaluations import FINDING_COLUMNS

    assert service._VALUE_ORDER == FINDING_COLUMNS

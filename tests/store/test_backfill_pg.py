"""Helper processes on PostgreSQL: each helper opens its own connection with the run's URL
(its search_path included); the store ends up as after a run in one process."""

from __future__ import annotations

from pathlib import Path

import pytest
from conftest import PG_SKIP_REASON, drop_pg_schema, new_pg_schema_url
from test_backfill import backfilled, count_prepared, patient  # noqa: F401 - autouse fixture
from test_service import plant_text


def test_helpers_on_postgresql_leave_the_store_as_one_process(tmp_path: Path, pg_admin,
                                                               plant_config_text: str,
                                                               monkeypatch) -> None:
    if pg_admin is None:
        pytest.skip(PG_SKIP_REASON)
    prepared = count_prepared(monkeypatch)
    text = plant_text(plant_config_text, min_effect_w=0.3, min_effect_v=0.3, mc_draws=2000)
    stores = {}
    for helpers in (0, 1):
        url, schema = new_pg_schema_url(pg_admin)
        try:
            stores[helpers] = backfilled(tmp_path / f"h{helpers}", text, helpers, url=url)
        finally:
            drop_pg_schema(pg_admin, schema)
    assert len(prepared) >= 6  # at least two chunks came from the helper
    assert stores[0]["finding"] and stores[0]["alarm"] and stores[0]["chart_state"]
    for table, rows in stores[0].items():
        assert stores[1][table] == rows, table

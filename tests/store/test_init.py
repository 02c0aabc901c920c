"""init_store and `qcfit init`: create or upgrade, sync lines/categories, record the config."""

from __future__ import annotations

import atexit
import dataclasses
import datetime as dt
import functools
import json
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

import pytest
import sqlalchemy as sa
from click.testing import CliRunner
from hypothesis import given, settings
from hypothesis import strategies as st

from qcfit.cli import main
from qcfit.config import load_config
from qcfit.errors import InvalidArgumentError, SchemaError, StoreError
from qcfit.store import schema as s
from qcfit.store.engine import from_utc_naive, make_engine, read_tx, write_tx
from qcfit.store.migrate import head_revision, init_store, migrations_dir, upgrade_store
from qcfit.store.reference import (
    read_categories,
    read_lines,
    record_config_version,
    sync_reference,
)

NOW = dt.datetime(2026, 1, 5, 6, 0, tzinfo=dt.UTC)
LATER = NOW + dt.timedelta(days=3)


def edited(text: str, old: str, new: str) -> str:
    assert old in text
    return text.replace(old, new)


def snapshot(engine: sa.Engine) -> dict[str, list[tuple]]:
    """Every row of every table (alembic_version too), sorted: the store's whole content."""
    with read_tx(engine) as conn:
        names = sorted(sa.inspect(conn).get_table_names())
        return {
            name: sorted(
                (tuple(map(repr, row)) for row in conn.execute(sa.text(f'SELECT * FROM "{name}"'))),
            )
            for name in names
        }


@pytest.fixture
def config_path(tmp_path: Path, write_config, plant_config_text: str) -> Path:
    return write_config(tmp_path, plant_config_text)


def test_first_init_creates_everything(store_engine: sa.Engine, config_path: Path) -> None:
    config = load_config(config_path)
    report = init_store(store_engine, config, os_user="qa-lead", now=NOW)
    assert report.schema.created and report.schema.to_revision == head_revision()
    assert report.reference.lines_added == ("L1", "L2", "L3", "L4")
    assert report.reference.categories_added == ("SCR", "DNT", "FL", "SH", "BUR", "OTH")
    assert report.config_version_new and report.changed
    with read_tx(store_engine) as conn:
        assert read_lines(conn) == {f"L{i}": f"Line {i}" for i in range(1, 5)}
        assert read_categories(conn)["SH"] == "short shot"
        row = conn.execute(sa.select(s.config_version)).one()
    assert row.id == report.config_version_id
    assert (row.content_hash, row.toml_text, row.os_user) == (config.hash, config.text, "qa-lead")
    assert row.source == str(config_path)
    assert from_utc_naive(row.first_seen_utc) == NOW


def test_init_twice_changes_nothing(store_engine: sa.Engine, config_path: Path) -> None:
    config = load_config(config_path)
    first = init_store(store_engine, config, os_user="qa", now=NOW)
    before = snapshot(store_engine)
    again = init_store(store_engine, config, os_user="someone else", now=LATER)
    assert not again.changed
    assert again.config_version_id == first.config_version_id
    assert again.schema.from_revision == again.schema.to_revision == head_revision()
    assert snapshot(store_engine) == before


def test_lines_leaving_the_config_become_inactive(
    store_engine: sa.Engine, tmp_path: Path, write_config, plant_config_text: str
) -> None:
    init_store(store_engine, load_config(write_config(tmp_path, plant_config_text)), now=NOW)
    text = edited(plant_config_text, 'L4 = "Line 4"\n', "")
    text = edited(text, 'L2 = "Line 2"', 'L2 = "Press line 2"')
    text = edited(text, 'L3 = "Line 3"', 'L3 = "Line 3"\nL5 = "Line 5"')
    text = edited(text, 'OTH = "other"\n', "")
    text = edited(text, 'BUR = "burr"', 'BUR = "burr (edge)"')
    text = text.replace(", OTH = 0.08", ", OTH = 0.0").replace(
        "BUR = 0.10, OTH = 0.0", "BUR = 0.18"
    )
    changed = load_config(write_config(tmp_path, text, "changed.toml"))
    report = init_store(store_engine, changed, now=LATER).reference
    assert report.lines_added == ("L5",)
    assert report.lines_renamed == (("L2", "Line 2", "Press line 2"),)
    assert report.lines_deactivated == ("L4",)
    assert report.categories_renamed == (("BUR", "burr", "burr (edge)"),)
    assert report.categories_not_in_config == ("OTH",)
    with read_tx(store_engine) as conn:
        assert list(read_lines(conn)) == ["L1", "L2", "L3", "L5"]
        assert read_lines(conn, active_only=False)["L4"] == "Line 4"  # kept, not deleted
        assert "OTH" in read_categories(conn)
        assert conn.execute(sa.select(sa.func.count()).select_from(s.config_version)).scalar() == 2
    # and L4 comes back when the config names it again
    back = init_store(store_engine, load_config(tmp_path / "plant.toml"), now=LATER)
    assert back.reference.lines_reactivated == ("L4",)
    assert back.reference.lines_deactivated == ("L5",)
    assert not back.config_version_new  # that text was recorded the first time


def test_failed_init_on_a_new_store_leaves_no_tables(
    store_engine: sa.Engine, config_path: Path
) -> None:
    # Injected failure in the last step (recording the config: content_hash NOT NULL):
    # the schema and the line/category rows made before it are rolled back too.
    broken = dataclasses.replace(load_config(config_path), hash=None)
    with pytest.raises(StoreError, match="constraint violated"):
        init_store(store_engine, broken, now=NOW)
    assert snapshot(store_engine) == {}


def test_failed_init_leaves_the_store_as_it_was(
    store_engine: sa.Engine, tmp_path: Path, write_config, plant_config_text: str
) -> None:
    init_store(store_engine, load_config(write_config(tmp_path, plant_config_text)), now=NOW)
    before = snapshot(store_engine)
    text = edited(plant_config_text, 'L4 = "Line 4"\n', 'L9 = "Line 9"\n')
    changed = load_config(write_config(tmp_path, text, "changed.toml"))
    with pytest.raises(StoreError, match="constraint violated"):
        init_store(store_engine, dataclasses.replace(changed, hash=None), now=LATER)
    assert snapshot(store_engine) == before
    # a failing migration during init: nothing of the sync is kept either
    folder = tmp_path / "migrations"
    shutil.copytree(migrations_dir(), folder, ignore=shutil.ignore_patterns("__pycache__"))
    (folder / "versions" / "0002_broken.py").write_text(
        'revision = "0002"\ndown_revision = "0001"\nbranch_labels = None\ndepends_on = None\n'
        "def upgrade():\n    raise RuntimeError('broken revision')\n",
        encoding="utf-8",
    )
    with pytest.raises(SchemaError, match="broken revision; nothing was changed"):
        init_store(store_engine, changed, now=LATER, migrations=folder)
    assert snapshot(store_engine) == before


def _baseline_rows(engine: sa.Engine) -> list[tuple]:
    with read_tx(engine) as conn:
        rows = conn.execute(
            sa.select(s.baseline_version.c.name, s.baseline_version.c.content_hash,
                      s.baseline_version.c.first_seen_utc, s.baseline_version.c.os_user)
            .order_by(s.baseline_version.c.id)
        ).all()
    return [(r.name, r.content_hash, from_utc_naive(r.first_seen_utc), r.os_user) for r in rows]


def test_init_records_the_baseline_versions(
    store_engine: sa.Engine, tmp_path: Path, write_config, plant_config_text: str
) -> None:
    config = load_config(write_config(tmp_path, plant_config_text))
    (plant,) = config.baselines
    first = init_store(store_engine, config, os_user="qa-lead", now=NOW)
    assert _baseline_rows(store_engine) == [("plant", plant.content_hash, NOW, "qa-lead")]
    assert dict(first.baseline_versions) == {plant.content_hash: 1}
    assert first.baseline_versions_new == 1
    # a new content of the baseline is a new version, first seen at the init that met it
    text = edited(plant_config_text, "rate = 0.012", "rate = 0.015")
    changed = load_config(write_config(tmp_path, text, "changed.toml"))
    (newer,) = changed.baselines
    again = init_store(store_engine, changed, os_user="qa", now=LATER)
    assert again.changed and again.baseline_versions_new == 1
    assert not again.reference.changed
    assert _baseline_rows(store_engine) == [
        ("plant", plant.content_hash, NOW, "qa-lead"),
        ("plant", newer.content_hash, LATER, "qa"),
    ]
    # the first content again: known, nothing recorded, and the config text is known too
    back = init_store(store_engine, config, os_user="qa", now=LATER + dt.timedelta(days=1))
    assert dict(back.baseline_versions) == {plant.content_hash: 1}
    assert back.baseline_versions_new == 0 and not back.changed
    assert len(_baseline_rows(store_engine)) == 2


def test_failed_baseline_record_rolls_back_the_whole_init(
    store_engine: sa.Engine, config_path: Path
) -> None:
    # Injected failure in the baseline step (content_hash NOT NULL): schema, lines,
    # categories and the config version made before it in the same transaction go too.
    config = load_config(config_path)
    broken = dataclasses.replace(
        config, baselines=(dataclasses.replace(config.baselines[0], content_hash=None),)
    )
    with pytest.raises(StoreError, match="constraint violated"):
        init_store(store_engine, broken, now=NOW)
    assert snapshot(store_engine) == {}


def test_record_config_version_needs_an_aware_time(
    migrated_engine: sa.Engine, config_path: Path
) -> None:
    config = load_config(config_path)
    with pytest.raises(InvalidArgumentError, match="naive datetime"):
        with write_tx(migrated_engine) as conn:
            record_config_version(conn, config, "qa", dt.datetime(2026, 1, 5))
    with write_tx(migrated_engine) as conn:
        first = record_config_version(conn, config, "qa", NOW)
        assert record_config_version(conn, config, "qa", LATER) == first


# --- the command --------------------------------------------------------------------------


def invoke(*args: str):
    return CliRunner().invoke(main, list(args))


def test_cli_init_reports_then_is_a_no_op(config_path: Path) -> None:
    store = config_path.with_suffix(".sqlite")
    first = invoke("--config", str(config_path), "init")
    assert first.exit_code == 0, first.output
    assert first.stdout.splitlines() == [
        f"store: sqlite:///{store}",
        f"schema: created at revision {head_revision()}",
        "lines added: L1, L2, L3, L4",
        "categories added: SCR, DNT, FL, SH, BUR, OTH",
        "config: recorded as version 1",
    ]
    assert store.is_file()
    # init recorded the baseline, at the time it recorded the config: "first seen" is the
    # init, not a later listing
    engine = make_engine(f"sqlite:///{store}")
    with read_tx(engine) as conn:
        config_seen = conn.execute(sa.select(s.config_version.c.first_seen_utc)).scalar_one()
    ((name, _, seen, _),) = _baseline_rows(engine)
    engine.dispose()
    assert (name, seen) == ("plant", from_utc_naive(config_seen))
    listed = invoke("--config", str(config_path), "baseline", "list", "--format", "json")
    assert listed.exit_code == 0, listed.output
    assert [dt.datetime.fromisoformat(r["first_seen_utc"]) for r in json.loads(listed.stdout)] == [
        seen]
    second = invoke("--config", str(config_path), "init")
    assert second.exit_code == 0, second.output
    assert second.stdout.splitlines()[1:] == [
        f"schema: already at revision {head_revision()} (newest)",
        "config: unchanged (version 1)",
        "nothing to change: the store already matches the config",
    ]


def test_cli_init_against_any_store_url(store_url: str, config_path: Path) -> None:
    result = invoke("--config", str(config_path), "--store", store_url, "init")
    assert result.exit_code == 0, result.output
    assert "lines added: L1, L2, L3, L4" in result.stdout
    removed = config_path.read_text(encoding="utf-8").replace('L3 = "Line 3"\n', "")
    config_path.write_text(removed, encoding="utf-8")
    again = invoke("--config", str(config_path), "--store", store_url, "init")
    assert again.exit_code == 0, again.output
    assert "lines marked inactive (not in the config; history kept): L3" in again.stdout
    assert "config: recorded as version 2" in again.stdout


def test_cli_bad_config_writes_nothing(tmp_path: Path, write_config, plant_config_text) -> None:
    path = write_config(tmp_path, edited(plant_config_text, 'end = "14:00"', 'end = "25:00"'))
    result = invoke("--config", str(path), "init")
    assert result.exit_code == 2
    assert result.stderr.startswith("Error: config ")
    assert "shift[1].end" in result.stderr
    assert list(tmp_path.iterdir()) == [path]


def test_cli_store_made_by_a_newer_qcfit(config_path: Path) -> None:
    assert invoke("--config", str(config_path), "init").exit_code == 0
    engine = make_engine(f"sqlite:///{config_path.with_suffix('.sqlite')}")
    with engine.begin() as conn:
        conn.exec_driver_sql("UPDATE alembic_version SET version_num = 'ffff0099'")
    engine.dispose()
    result = invoke("--config", str(config_path), "init")
    assert result.exit_code == 1
    assert result.stderr.strip() == (
        "Error: store was made by a newer qcfit (revision ffff0099)"
    )


def test_cli_store_directory_missing(tmp_path: Path, write_config, plant_config_text) -> None:
    text = plant_config_text + '\n[store]\nurl = "sqlite:///gone/plant.sqlite"\n'
    path = write_config(tmp_path, text)
    result = invoke("--config", str(path), "init")
    assert result.exit_code == 1
    assert result.stderr.strip() == (
        f"Error: store: cannot open store file {tmp_path / 'gone' / 'plant.sqlite'}: "
        f"directory {tmp_path / 'gone'} does not exist"
    )


def test_init_runs_from_the_root_directory(config_path: Path) -> None:
    # A service manager starts programs in "/": migrations and store must not depend on it.
    run = subprocess.run(
        [sys.executable, "-m", "qcfit", "--config", str(config_path), "init"],
        cwd="/",
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert run.returncode == 0, run.stderr
    assert f"schema: created at revision {head_revision()}" in run.stdout
    assert config_path.with_suffix(".sqlite").is_file()


CODES = st.sampled_from(["L1", "L2", "L3", "PRESS-7", "Ω"])
NAMES = st.sampled_from(["Line", "Press", "Glaze", "line 2"])
CONFIGS = st.lists(st.dictionaries(CODES, NAMES, max_size=5), min_size=1, max_size=5)


@functools.lru_cache(maxsize=1)
def _migrated_template() -> Path:
    """An empty store at head, made once and copied for each hypothesis example."""
    folder = tempfile.mkdtemp(prefix="qcfit-template-")
    atexit.register(shutil.rmtree, folder, True)
    path = Path(folder) / "store.sqlite"
    engine = make_engine(f"sqlite:///{path}")
    upgrade_store(engine)
    engine.dispose()  # the last close checkpoints the WAL into the file
    return path


@settings(max_examples=40, deadline=None)
@given(history=CONFIGS, categories=st.lists(st.dictionaries(CODES, NAMES, max_size=5), max_size=4))
def test_sync_invariants_over_a_config_history(history, categories) -> None:
    # Whatever sequence of configs init sees: the active lines are exactly the last config's,
    # every line or category ever named is still there, and names follow the last mention.
    cat_history = (categories + [{}] * len(history))[: len(history)]
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / "s.sqlite"
        shutil.copyfile(_migrated_template(), path)
        engine = make_engine(f"sqlite:///{path}")
        with write_tx(engine) as conn:
            for lines, cats in zip(history, cat_history, strict=True):
                sync_reference(conn, lines, cats)
            active = read_lines(conn)
            every = read_lines(conn, active_only=False)
            stored_cats = read_categories(conn)
        engine.dispose()
    assert active == dict(sorted(history[-1].items()))
    assert set(every) == set().union(*history)
    last_name = {code: name for lines in history for code, name in lines.items()}
    assert every == dict(sorted(last_name.items()))
    last_cat = {code: name for cats in cat_history for code, name in cats.items()}
    assert stored_cats == dict(sorted(last_cat.items()))

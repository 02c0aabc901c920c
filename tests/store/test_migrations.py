"""Alembic migrations: they build exactly schema.py, run atomically and keep child rows.

Extra revisions used here (a batch table rebuild, an injected failure, an orphan row) are
written into a copy of the migrations folder in ``tmp_path``; the shipped folder is never
touched.
"""

from __future__ import annotations

import datetime as dt
import shutil
import sqlite3
import subprocess
import sys
import textwrap
import tomllib
from pathlib import Path

import pytest
import sqlalchemy as sa
from alembic import command
from alembic.autogenerate import compare_metadata
from alembic.runtime.migration import MigrationContext

import qcfit
from qcfit.errors import SchemaError
from qcfit.store import schema as s
from qcfit.store.engine import make_engine, read_tx, write_tx
from qcfit.store.migrate import (
    alembic_config,
    check_schema,
    current_revision,
    head_revision,
    migrations_dir,
    new_revision,
    upgrade_store,
)

REPO = Path(qcfit.__file__).resolve().parent.parent
T0 = dt.datetime(2026, 1, 5, 12, 0)  # naive UTC, as stored


def _sqlite_empty_string_default(ctx, insp_col, meta_col, insp_default, meta_default, rendered):
    # Alembic's SQLite comparison strips quotes only from non-empty literals, so a correct
    # DEFAULT '' reads back as "('')" against "" (a false difference). Everything else is
    # left to Alembic's own comparison (return None).
    if insp_default in ("''", "('')") and rendered in ("", "''"):
        return False
    return None


def _diff(conn: sa.Connection) -> list:
    ctx = MigrationContext.configure(
        conn,
        opts={"compare_type": True, "compare_server_default": _sqlite_empty_string_default},
    )
    return compare_metadata(ctx, s.metadata)


def test_migrations_build_exactly_the_schema(migrated_engine: sa.Engine) -> None:
    with read_tx(migrated_engine) as conn:
        assert _diff(conn) == []
        assert current_revision(conn) == head_revision()


def test_the_comparison_sees_a_difference(migrated_engine: sa.Engine) -> None:
    # Control for the test above: a column the migrations lack is reported.
    with write_tx(migrated_engine) as conn:
        conn.exec_driver_sql("ALTER TABLE category ADD COLUMN colour VARCHAR(20)")
    with read_tx(migrated_engine) as conn:
        diff = _diff(conn)
    assert [d[0] for d in diff] == ["remove_column"]
    assert diff[0][3].name == "colour"


def test_upgrade_is_idempotent_and_check_passes(store_engine: sa.Engine) -> None:
    first = upgrade_store(store_engine)
    assert (first.from_revision, first.to_revision, first.created) == (None, head_revision(), True)
    second = upgrade_store(store_engine)
    assert (second.from_revision, second.changed, second.backup) == (head_revision(), False, None)
    check_schema(store_engine)


def test_migrations_folder_found_from_any_working_directory() -> None:
    code = "from qcfit.store.migrate import migrations_dir; print(migrations_dir())"
    run = subprocess.run(
        [sys.executable, "-c", code], cwd="/", capture_output=True, text=True, timeout=60
    )
    assert run.returncode == 0, run.stderr
    assert Path(run.stdout.strip()) == REPO / "migrations"
    assert migrations_dir() == REPO / "migrations"


def test_wheel_data_files_cover_the_migrations_folder() -> None:
    # The wheel ships migrations/ as <prefix>/share/qcfit/migrations (pyproject data-files).
    pyproject = tomllib.loads((REPO / "pyproject.toml").read_text(encoding="utf-8"))
    mapping = pyproject["tool"]["setuptools"]["data-files"]
    shipped = {
        (Path(target) / f.name).relative_to("share/qcfit")
        for target, patterns in mapping.items()
        for pattern in patterns
        for f in REPO.glob(pattern)
    }
    present = {
        f.relative_to(REPO)
        for f in (REPO / "migrations").rglob("*")
        if f.is_file() and "__pycache__" not in f.parts
    }
    assert shipped == present


# --- a populated store and extra revisions ------------------------------------------------


def populate(engine: sa.Engine) -> None:
    """A small store with rows in every table that has foreign keys."""
    with write_tx(engine) as conn:
        conn.execute(sa.insert(s.line), [{"code": "L1", "name": "Line 1", "active": True}])
        conn.execute(sa.insert(s.category), [{"code": c, "name": c} for c in ("SCR", "DNT")])
        conn.execute(
            sa.insert(s.shift),
            [
                {
                    "id": i,
                    "shift_date": dt.date(2026, 1, 5 + i),
                    "shift_name": "A",
                    "start_utc": T0 + dt.timedelta(days=i),
                    "end_utc": T0 + dt.timedelta(days=i, hours=8),
                }
                for i in (1, 2)
            ],
        )
        conn.execute(
            sa.insert(s.load),
            {
                "id": 1,
                "kind": "counts",
                "source": "f.csv",
                "content_hash": "0" * 64,
                "loaded_utc": T0,
                "os_user": "qa",
                "rows_accepted": 4,
                "rows_rejected": 0,
            },
        )
        conn.execute(
            sa.insert(s.defect_count),
            [
                {"shift_id": i, "line": "L1", "category": c, "count": 3, "load_id": 1}
                for i in (1, 2)
                for c in ("SCR", "DNT")
            ],
        )
        conn.execute(
            sa.insert(s.units_inspected),
            [{"shift_id": i, "line": "L1", "units": 500, "load_id": 1} for i in (1, 2)],
        )
        conn.execute(
            sa.insert(s.defect_event),
            [
                {
                    "ts_utc": T0 + dt.timedelta(days=1, hours=1),
                    "shift_id": 1,
                    "line": "L1",
                    "category": "SCR",
                    "quantity": 1,
                    "load_id": 1,
                }
            ],
        )
        conn.execute(
            sa.insert(s.evaluation),
            [
                {
                    "id": i,
                    "shift_id": i,
                    "status": "ok",
                    "started_utc": T0,
                    "finished_utc": T0,
                    "config_hash": "c" * 64,
                    "code_version": "0.1.0",
                    "seed": 7,
                    "is_current": True,
                }
                for i in (1, 2)
            ],
        )
        conn.execute(
            sa.insert(s.finding),
            [
                {"evaluation_id": i, "kind": "baseline", "line": "L1", "verdict": "in-control"}
                for i in (1, 2)
                for _ in range(3)
            ],
        )
        conn.execute(
            sa.insert(s.alarm),
            {
                "id": 1,
                "kind": "baseline",
                "line": "L1",
                "line_key": "L1",
                "first_shift_id": 1,
                "last_shift_id": 2,
                "shift_key": 1,
                "baseline_key": 0,
                "severity": "alarm",
                "state": "open",
                "summary": "SCR up",
                "opened_utc": T0,
                "updated_utc": T0,
            },
        )
        conn.execute(
            sa.insert(s.alarm_event),
            {
                "alarm_id": 1,
                "at_utc": T0,
                "action": "open",
                "by": "qcfit",
                "to_state": "open",
                "shift_id": 1,
            },
        )


def row_counts(engine: sa.Engine) -> dict[str, int]:
    with read_tx(engine) as conn:
        return {
            name: conn.execute(sa.select(sa.func.count()).select_from(table)).scalar_one()
            for name, table in s.metadata.tables.items()
        }


def columns(engine: sa.Engine, table: str) -> list[str]:
    with read_tx(engine) as conn:
        return [c["name"] for c in sa.inspect(conn).get_columns(table)]


def tables(engine: sa.Engine) -> set[str]:
    with read_tx(engine) as conn:
        return set(sa.inspect(conn).get_table_names())


def migrations_with(tmp_path: Path, name: str, body: str) -> Path:
    """A copy of the migrations folder with one more revision, 0002, whose upgrade() is body."""
    folder = tmp_path / "migrations"
    shutil.copytree(migrations_dir(), folder, ignore=shutil.ignore_patterns("__pycache__"))
    script = f'''\
"""{name}"""
import sqlalchemy as sa
from alembic import op

revision = "0002"
down_revision = "0001"
branch_labels = None
depends_on = None


def upgrade():
{textwrap.indent(textwrap.dedent(body), "    ")}


def downgrade():
    pass
'''
    (folder / "versions" / "0002_test.py").write_text(script, encoding="utf-8")
    return folder


REBUILD_PARENTS = """
sqlite = op.get_bind().dialect.name == "sqlite"
# On SQLite this copies each table, drops the old one and renames the copy.
with op.batch_alter_table("evaluation", recreate="always" if sqlite else "auto") as b:
    b.add_column(sa.Column("note", sa.Text(), nullable=True))
with op.batch_alter_table("shift", recreate="always" if sqlite else "auto") as b:
    b.add_column(sa.Column("note", sa.Text(), nullable=True))
"""


def test_upgrade_of_a_populated_store_keeps_child_rows(
    tmp_path: Path, migrated_engine: sa.Engine
) -> None:
    populate(migrated_engine)
    before = row_counts(migrated_engine)
    folder = migrations_with(tmp_path, "rebuild parents", REBUILD_PARENTS)
    report = upgrade_store(migrated_engine, migrations=folder)
    assert (report.from_revision, report.to_revision) == ("0001", "0002")
    assert row_counts(migrated_engine) == before
    assert before["finding"] == 6 and before["defect_count"] == 4
    assert "note" in columns(migrated_engine, "evaluation")
    if migrated_engine.dialect.name == "sqlite":
        with read_tx(migrated_engine) as conn:
            assert conn.exec_driver_sql("PRAGMA foreign_key_check").all() == []
            assert conn.exec_driver_sql("PRAGMA foreign_keys").scalar_one() == 1


def test_control_same_rebuild_with_foreign_keys_on_loses_children(tmp_path: Path) -> None:
    # Control: the stock way (foreign keys ON while a batch rebuild drops the parent)
    # cascade-deletes the findings. This is what upgrade_store prevents.
    engine = make_engine(f"sqlite:///{tmp_path / 's.sqlite'}")
    upgrade_store(engine)
    populate(engine)
    body = """
with op.batch_alter_table("evaluation", recreate="always") as b:
    b.add_column(sa.Column("note", sa.Text(), nullable=True))
"""
    cfg = alembic_config(migrations_with(tmp_path, "rebuild evaluation", body))
    with engine.begin() as conn:
        cfg.attributes["connection"] = conn
        command.upgrade(cfg, "head")
    assert row_counts(engine)["finding"] == 0
    engine.dispose()


FAILING = """
sqlite = op.get_bind().dialect.name == "sqlite"
op.create_table("scratch", sa.Column("id", sa.Integer, primary_key=True))
with op.batch_alter_table("line", recreate="always" if sqlite else "auto") as b:
    b.add_column(sa.Column("plant", sa.String(20), nullable=True))
op.execute("UPDATE line SET name = 'renamed by a broken migration'")
raise RuntimeError("injected failure")
"""


def test_failing_migration_changes_nothing(tmp_path: Path, migrated_engine: sa.Engine) -> None:
    populate(migrated_engine)
    before_counts = row_counts(migrated_engine)
    before_tables = tables(migrated_engine)
    before_columns = columns(migrated_engine, "line")
    folder = migrations_with(tmp_path, "broken", FAILING)
    with pytest.raises(
        SchemaError, match="upgrade from revision 0001 failed: RuntimeError: injected"
    ):
        upgrade_store(migrated_engine, migrations=folder)
    assert tables(migrated_engine) == before_tables
    assert "scratch" not in tables(migrated_engine)
    assert columns(migrated_engine, "line") == before_columns
    assert row_counts(migrated_engine) == before_counts
    with read_tx(migrated_engine) as conn:
        assert current_revision(conn) == "0001"
        assert conn.execute(sa.select(s.line.c.name)).scalar_one() == "Line 1"
    # and the store still upgrades once the broken revision is fixed
    fixed = migrations_with(
        tmp_path / "fixed",
        "fixed",
        "op.create_table('scratch', sa.Column('id', sa.Integer, primary_key=True))",
    )
    assert upgrade_store(migrated_engine, migrations=fixed).to_revision == "0002"


def test_migration_that_orphans_rows_is_rolled_back(tmp_path: Path) -> None:
    engine = make_engine(f"sqlite:///{tmp_path / 's.sqlite'}")
    upgrade_store(engine)
    populate(engine)
    body = "op.execute(\"INSERT INTO defect_count (shift_id, line, category, count) VALUES (99, 'L1', 'SCR', 1)\")"
    folder = migrations_with(tmp_path, "orphan", body)
    with pytest.raises(
        SchemaError, match=r"leave 1 row\(s\) with a broken reference \(defect_count"
    ):
        upgrade_store(engine, migrations=folder)
    with read_tx(engine) as conn:
        assert current_revision(conn) == "0001"
    assert row_counts(engine)["defect_count"] == 4
    engine.dispose()


def test_sqlite_upgrade_keeps_a_copy_of_the_old_store(tmp_path: Path) -> None:
    path = tmp_path / "s.sqlite"
    engine = make_engine(f"sqlite:///{path}")
    upgrade_store(engine)
    populate(engine)
    report = upgrade_store(engine, migrations=migrations_with(tmp_path, "rebuild", REBUILD_PARENTS))
    assert report.backup == tmp_path / "s.sqlite.rev-0001.bak"
    copy = sqlite3.connect(report.backup)
    try:
        assert copy.execute("SELECT version_num FROM alembic_version").fetchone() == ("0001",)
        assert copy.execute("SELECT count(*) FROM finding").fetchone() == (6,)
    finally:
        copy.close()
    again = upgrade_store(
        engine, migrations=migrations_with(tmp_path / "again", "r", REBUILD_PARENTS)
    )
    assert (again.changed, again.backup) == (False, None)  # staying put copies nothing
    engine.dispose()


def test_check_schema_names_the_problem(tmp_path: Path, store_engine: sa.Engine) -> None:
    with pytest.raises(SchemaError, match=r"store not initialised: run `qcfit init`"):
        check_schema(store_engine)
    upgrade_store(store_engine)
    check_schema(store_engine)
    newer = migrations_with(tmp_path, "newer", "pass")
    with pytest.raises(
        SchemaError, match="at schema revision 0001, this qcfit needs 0002: run `qcfit init`"
    ):
        check_schema(store_engine, migrations=newer)
    with write_tx(store_engine) as conn:
        conn.exec_driver_sql("UPDATE alembic_version SET version_num = '9999'")
    with pytest.raises(SchemaError, match=r"store was made by a newer qcfit \(revision 9999\)"):
        check_schema(store_engine)
    with pytest.raises(SchemaError, match=r"newer qcfit \(revision 9999\)"):
        upgrade_store(store_engine)


def test_check_schema_does_not_create_a_missing_file(tmp_path: Path) -> None:
    path = tmp_path / "typo.sqlite"
    engine = make_engine(f"sqlite:///{path}")
    with pytest.raises(SchemaError, match="store not initialised"):
        check_schema(engine)
    assert not path.exists()
    engine.dispose()


def test_tables_without_a_revision_are_refused(store_engine: sa.Engine) -> None:
    s.metadata.create_all(store_engine, tables=[s.line, s.category])
    with pytest.raises(
        SchemaError, match=r"has qcfit tables but no schema revision \(category, line\)"
    ):
        upgrade_store(store_engine)


def test_new_revision_writes_the_next_script(tmp_path: Path) -> None:
    folder = tmp_path / "migrations"
    shutil.copytree(migrations_dir(), folder, ignore=shutil.ignore_patterns("__pycache__"))
    path = new_revision(
        "nothing yet", url=f"sqlite:///{tmp_path / 'scratch.sqlite'}", migrations=folder
    )
    assert path.parent == folder / "versions"
    body = path.read_text(encoding="utf-8")
    assert "revision: str = '0002'" in body
    assert "down_revision: str | Sequence[str] | None = '0001'" in body
    # schema.py and the migrations agree, so the new revision has nothing to do
    upgrade = body.split("def upgrade() -> None:")[1].split("def downgrade")[0]
    assert "op." not in upgrade and "pass" in upgrade
    engine = make_engine(f"sqlite:///{tmp_path / 'store.sqlite'}")
    assert upgrade_store(engine, migrations=folder).to_revision == "0002"
    engine.dispose()


def _source_copy(tmp_path: Path) -> Path:
    """A copy of the source tree (package, migrations, pyproject.toml): ``python -m`` run in
    it imports the copy, whose migrations folder is the one beside it."""
    root = tmp_path / "src"
    skip = shutil.ignore_patterns("__pycache__")
    shutil.copytree(REPO / "qcfit", root / "qcfit", ignore=skip)
    shutil.copytree(REPO / "migrations", root / "migrations", ignore=skip)
    shutil.copy2(REPO / "pyproject.toml", root / "pyproject.toml")
    return root


def _run_module(cwd: Path, *args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [sys.executable, "-m", "qcfit.store.migrate", *args],
        cwd=cwd, capture_output=True, text=True, timeout=120, check=False,
    )


def test_documented_revision_command_writes_into_the_tree_it_runs_from(tmp_path: Path) -> None:
    # The command DEVELOPERS.md gives, word for word, run in a copy of the source tree.
    shipped = sorted(p.name for p in (REPO / "migrations" / "versions").glob("*.py"))
    root = _source_copy(tmp_path)
    done = _run_module(root, "revision", "-m", "what changed")
    assert done.returncode == 0, done.stderr
    new = root / "migrations" / "versions" / "0002_what_changed.py"
    assert f"wrote {new}" in done.stdout
    body = new.read_text(encoding="utf-8")
    assert "what changed" in body and "down_revision: str | Sequence[str] | None = '0001'" in body
    # schema.py and the migrations agree, so the revision has nothing to do
    assert "op." not in body.split("def upgrade() -> None:")[1].split("def downgrade")[0]
    assert sorted(p.name for p in (REPO / "migrations" / "versions").glob("*.py")) == shipped
    assert not list(root.glob("*.sqlite"))  # the default scratch store is a temporary file


def test_revision_command_with_url_and_its_errors(tmp_path: Path) -> None:
    root = _source_copy(tmp_path)
    scratch = tmp_path / "scratch.sqlite"
    done = _run_module(root, "revision", "-m", "add a column", "--url", f"sqlite:///{scratch}")
    assert done.returncode == 0, done.stderr
    assert (root / "migrations" / "versions" / "0002_add_a_column.py").is_file()
    assert scratch.is_file()  # the named scratch store is kept, at head
    missing = _run_module(root, "revision")
    assert missing.returncode == 2 and "-m/--message" in missing.stderr
    bad = _run_module(root, "revision", "-m", "x", "--url", f"sqlite:///{tmp_path}/no/such.db")
    assert bad.returncode == 1
    assert bad.stderr.startswith("Error: ") and "does not exist" in bad.stderr
    assert sorted(p.name for p in (root / "migrations" / "versions").glob("*.py")) == [
        "0001_initial.py", "0002_add_a_column.py"]

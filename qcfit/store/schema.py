"""Store tables: the single source of truth (``migrations/env.py`` imports ``metadata``).

Conventions other plant systems can rely on when they write into the store directly:

* every ``*_utc`` column is a naive UTC timestamp (no offset stored);
* ``shift.shift_date`` is the plant-local date the shift starts on, ``shift_name`` the
  name from the config's ``[[shift]]`` table; together they are the shift id ``2026-01-05_A``;
* codes (``line.code``, ``category.code``) are the config's codes, case-sensitive;
* JSON columns hold plain JSON (lists, objects, numbers, strings).
"""

from __future__ import annotations

from sqlalchemy import (
    JSON,
    BigInteger,
    Boolean,
    CheckConstraint,
    Column,
    Date,
    DateTime,
    Float,
    ForeignKey,
    Index,
    Integer,
    MetaData,
    String,
    Table,
    Text,
    UniqueConstraint,
    text,
    true,
)

NAMING = {
    "ix": "ix_%(column_0_label)s",
    "uq": "uq_%(table_name)s_%(column_0_name)s",
    "ck": "ck_%(table_name)s_%(constraint_name)s",
    "fk": "fk_%(table_name)s_%(column_0_name)s_%(referred_table_name)s",
    "pk": "pk_%(table_name)s",
}
metadata = MetaData(naming_convention=NAMING)

CODE = 64

line = Table(
    "line",
    metadata,
    Column("code", String(CODE), primary_key=True),
    Column("name", String(200), nullable=False),
    # true() renders 1 on SQLite and true on PostgreSQL (a bare 1 is refused there)
    Column("active", Boolean, nullable=False, server_default=true()),
)

category = Table(
    "category",
    metadata,
    Column("code", String(CODE), primary_key=True),
    Column("name", String(200), nullable=False),
)

shift = Table(
    "shift",
    metadata,
    Column("id", Integer, primary_key=True, autoincrement=True),
    Column("shift_date", Date, nullable=False),
    Column("shift_name", String(CODE), nullable=False),
    Column("start_utc", DateTime, nullable=False),
    Column("end_utc", DateTime, nullable=False),
    UniqueConstraint("shift_date", "shift_name"),
    CheckConstraint("end_utc > start_utc", name="ends_after_start"),
    Index("ix_shift_start_utc", "start_utc"),
)

load = Table(
    "load",
    metadata,
    Column("id", Integer, primary_key=True, autoincrement=True),
    Column("kind", String(16), nullable=False),  # events | counts | units | pull
    Column("source", Text, nullable=False),  # file path or source name
    Column("content_hash", String(64), nullable=False),  # sha256 of the bytes loaded
    Column("loaded_utc", DateTime, nullable=False),
    Column("os_user", String(128), nullable=False),
    Column("host", String(255), nullable=False, server_default=""),
    Column("rows_accepted", Integer, nullable=False),
    Column("rows_rejected", Integer, nullable=False),
    Column("corrections", Integer, nullable=False, server_default=text("0")),
    Column("note", Text),
    Index("ix_load_content_hash", "content_hash"),
)

defect_count = Table(
    "defect_count",
    metadata,
    Column("shift_id", Integer, ForeignKey("shift.id"), primary_key=True),
    Column("line", String(CODE), ForeignKey("line.code"), primary_key=True),
    Column("category", String(CODE), ForeignKey("category.code"), primary_key=True),
    Column("count", BigInteger, nullable=False),
    Column("load_id", Integer, ForeignKey("load.id"), nullable=True),
    CheckConstraint("count >= 0", name="count_not_negative"),
)

units_inspected = Table(
    "units_inspected",
    metadata,
    Column("shift_id", Integer, ForeignKey("shift.id"), primary_key=True),
    Column("line", String(CODE), ForeignKey("line.code"), primary_key=True),
    Column("units", BigInteger, nullable=False),
    Column("load_id", Integer, ForeignKey("load.id"), nullable=True),
    CheckConstraint("units >= 0", name="units_not_negative"),
)

defect_event = Table(
    "defect_event",
    metadata,
    Column("id", Integer, primary_key=True, autoincrement=True),
    Column("ts_utc", DateTime, nullable=False),
    Column("shift_id", Integer, ForeignKey("shift.id"), nullable=False),
    Column("line", String(CODE), ForeignKey("line.code"), nullable=False),
    Column("category", String(CODE), ForeignKey("category.code"), nullable=False),
    Column("quantity", BigInteger, nullable=False, server_default=text("1")),
    Column("load_id", Integer, ForeignKey("load.id"), nullable=False),
    Index("ix_defect_event_shift", "shift_id", "line"),
)

count_correction = Table(
    "count_correction",
    metadata,
    Column("id", Integer, primary_key=True, autoincrement=True),
    Column("load_id", Integer, ForeignKey("load.id"), nullable=False),
    Column("shift_id", Integer, ForeignKey("shift.id"), nullable=False),
    Column("line", String(CODE), nullable=False),
    Column("category", String(CODE), nullable=True),  # NULL: units inspected corrected
    Column("old_value", BigInteger, nullable=False),
    Column("new_value", BigInteger, nullable=False),
)

config_version = Table(
    "config_version",
    metadata,
    Column("id", Integer, primary_key=True, autoincrement=True),
    Column("content_hash", String(64), nullable=False, unique=True),
    Column("toml_text", Text, nullable=False),
    Column("source", Text, nullable=False, server_default=""),
    Column("first_seen_utc", DateTime, nullable=False),
    Column("os_user", String(128), nullable=False),
)

baseline_version = Table(
    "baseline_version",
    metadata,
    Column("id", Integer, primary_key=True, autoincrement=True),
    Column("name", String(200), nullable=False),
    Column("content_hash", String(64), nullable=False, unique=True),
    Column("toml_text", Text, nullable=False),
    Column("lines", JSON, nullable=False),  # list of line codes, or ["*"]
    Column("effective", Date, nullable=False),
    Column("proportions", JSON, nullable=False),  # {category code: proportion}
    Column("rate", Float, nullable=True),  # defects per inspected unit
    Column("thresholds", JSON, nullable=True),  # per-baseline threshold overrides
    Column("first_seen_utc", DateTime, nullable=False),
    Column("os_user", String(128), nullable=False),
)

evaluation = Table(
    "evaluation",
    metadata,
    Column("id", Integer, primary_key=True, autoincrement=True),
    Column("shift_id", Integer, ForeignKey("shift.id"), nullable=False),
    Column("status", String(16), nullable=False),  # ok | failed
    Column("started_utc", DateTime, nullable=False),
    Column("finished_utc", DateTime, nullable=False),
    Column("error", Text, nullable=True),
    Column("config_hash", String(64), nullable=False),
    Column("code_version", String(64), nullable=False),
    Column("seed", BigInteger, nullable=False),
    Column("is_current", Boolean, nullable=False),
    Column("superseded_utc", DateTime, nullable=True),
    Index(
        "uq_evaluation_current",
        "shift_id",
        unique=True,
        sqlite_where=text("is_current = 1"),
        postgresql_where=text("is_current"),
    ),
)

finding = Table(
    "finding",
    metadata,
    Column("id", Integer, primary_key=True, autoincrement=True),
    Column("evaluation_id", Integer, ForeignKey("evaluation.id", ondelete="CASCADE"), nullable=False),
    Column("kind", String(24), nullable=False),  # baseline | between-lines | line-vs-rest | rate | sequential
    Column("line", String(CODE), nullable=True),  # NULL for plant-wide tests
    Column("baseline_version_id", Integer, ForeignKey("baseline_version.id"), nullable=True),
    Column("verdict", String(24), nullable=False),  # see qcfit.evaluate
    Column("statistic", Float, nullable=True),
    Column("dof", Integer, nullable=True),
    Column("pvalue", Float, nullable=True),
    Column("adjusted_pvalue", Float, nullable=True),
    Column("effect_size", Float, nullable=True),
    Column("method", String(24), nullable=True),
    Column("method_reason", Text, nullable=True),
    Column("n", BigInteger, nullable=True),
    Column("min_expected", Float, nullable=True),
    Column("power", Float, nullable=True),
    Column("top_categories", JSON, nullable=True),  # [{code, direction, adjusted_residual}]
    Column("details", JSON, nullable=True),  # observed, expected, residuals, reason
    Index("ix_finding_evaluation", "evaluation_id"),
)

alarm = Table(
    "alarm",
    metadata,
    Column("id", Integer, primary_key=True, autoincrement=True),
    Column("kind", String(24), nullable=False),  # baseline | between-lines | rate | sequential | service-fault
    Column("line", String(CODE), nullable=True),  # NULL for plant-wide alarms
    Column("line_key", String(CODE), nullable=False),  # line code, or "" (keeps the key unique)
    Column("first_shift_id", Integer, ForeignKey("shift.id"), nullable=True),
    Column("last_shift_id", Integer, ForeignKey("shift.id"), nullable=True),
    Column("shift_key", Integer, nullable=False),  # first_shift_id, or 0 for faults with no shift
    Column("baseline_version_id", Integer, ForeignKey("baseline_version.id"), nullable=True),
    Column("baseline_key", Integer, nullable=False),  # baseline_version_id, or 0
    Column("severity", String(16), nullable=False),  # watch | alarm
    Column("state", String(16), nullable=False),  # open | acknowledged | cleared
    Column("shift_count", Integer, nullable=False, server_default=text("1")),
    Column("in_control_streak", Integer, nullable=False, server_default=text("0")),
    Column("pvalue", Float, nullable=True),
    Column("adjusted_pvalue", Float, nullable=True),
    Column("effect_size", Float, nullable=True),
    Column("categories", JSON, nullable=True),  # [{code, direction, adjusted_residual}]
    Column("summary", Text, nullable=False),  # what changed, in words
    Column("details", JSON, nullable=True),
    Column("opened_utc", DateTime, nullable=False),
    Column("updated_utc", DateTime, nullable=False),
    UniqueConstraint("shift_key", "line_key", "kind", "baseline_key", name="uq_alarm_key"),
    Index("ix_alarm_state", "state"),
)

alarm_event = Table(
    "alarm_event",
    metadata,
    Column("id", Integer, primary_key=True, autoincrement=True),
    Column("alarm_id", Integer, ForeignKey("alarm.id"), nullable=False),
    Column("at_utc", DateTime, nullable=False),
    Column("action", String(24), nullable=False),  # open | update | acknowledge | clear | auto-clear
    Column("by", String(128), nullable=False),
    Column("note", Text, nullable=True),
    Column("from_state", String(16), nullable=True),
    Column("to_state", String(16), nullable=False),
    Column("shift_id", Integer, ForeignKey("shift.id"), nullable=True),
    Index("ix_alarm_event_alarm", "alarm_id"),
)

chart_state = Table(
    "chart_state",
    metadata,
    Column("line", String(CODE), ForeignKey("line.code"), primary_key=True),
    Column("chart", String(64), primary_key=True),
    Column("shift_id", Integer, ForeignKey("shift.id"), primary_key=True),
    Column("baseline_version_id", Integer, ForeignKey("baseline_version.id"), nullable=True),
    Column("state", JSON, nullable=False),  # chart values after this shift
    Column("statistic", Float, nullable=True),
    Column("threshold", Float, nullable=True),
)

chart_calibration = Table(
    "chart_calibration",
    metadata,
    Column("key", String(64), primary_key=True),  # hash of baseline version, settings, n profile
    Column("chart", String(64), nullable=False),
    Column("threshold", Float, nullable=False),
    Column("target_arl", Float, nullable=False),
    Column("details", JSON, nullable=True),
    Column("created_utc", DateTime, nullable=False),
)

heartbeat = Table(
    "heartbeat",
    metadata,
    Column("id", Integer, primary_key=True),  # always 1
    Column("pid", Integer, nullable=False),
    Column("host", String(255), nullable=False),
    Column("started_utc", DateTime, nullable=False),
    Column("beat_utc", DateTime, nullable=False),
    Column("last_wake_utc", DateTime, nullable=True),
    Column("next_wake_utc", DateTime, nullable=True),
    Column("config_hash", String(64), nullable=True),
    Column("status", String(32), nullable=False),
)

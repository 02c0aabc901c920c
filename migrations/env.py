"""Alembic environment of the qcfit store (no alembic.ini: see qcfit.store.migrate).

``qcfit.store.migrate`` builds the Alembic ``Config`` in code with an absolute
``script_location`` and hands over a Connection that is already inside its one
transaction (``BEGIN IMMEDIATE`` with foreign keys off on SQLite), so a failing
migration leaves schema and version unchanged.
"""

from __future__ import annotations

from alembic import context

from qcfit.store.migrate import configure_context
from qcfit.store.schema import metadata

if context.is_offline_mode():
    raise SystemExit("qcfit migrations run online only (no --sql mode)")
connection = context.config.attributes.get("connection")
if connection is None:
    raise SystemExit(
        "qcfit migrations run through qcfit.store.migrate (`qcfit init`); "
        "see qcfit.store.migrate.new_revision for writing one"
    )
configure_context(context, connection, metadata)
with context.begin_transaction():
    context.run_migrations()

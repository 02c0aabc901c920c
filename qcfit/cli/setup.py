"""``qcfit init``: create or upgrade the store and bring it in step with the config."""

from __future__ import annotations

import datetime as dt
import getpass

import click

from qcfit.cli import app, main
from qcfit.store.migrate import InitReport, init_store


@main.command("init")
@click.pass_context
def init_command(ctx: click.Context) -> None:
    """Create or upgrade the store, then sync lines and categories from the config.

    Safe to run again: with an unchanged config it changes nothing. Lines no longer in the
    config are marked inactive (their history stays); categories are never removed. Before
    a SQLite store is upgraded, a copy is saved beside it (FILE.rev-OLD.bak). Everything is
    one transaction: if anything fails, the store is left as it was.
    """
    a = app(ctx)
    config = a.config()
    report = init_store(a.engine(), config, os_user=_os_user(), now=dt.datetime.now(dt.UTC))
    for text in describe(report):
        click.echo(text)


def describe(report: InitReport) -> list[str]:
    """The lines ``qcfit init`` prints for ``report``."""
    out = [f"store: {report.store}"]
    schema = report.schema
    if schema.created:
        out.append(f"schema: created at revision {schema.to_revision}")
    elif schema.changed:
        out.append(f"schema: upgraded from revision {schema.from_revision} to {schema.to_revision}")
    else:
        out.append(f"schema: already at revision {schema.to_revision} (newest)")
    if schema.backup is not None:
        out.append(f"schema: copy of the store before the upgrade: {schema.backup}")
    ref = report.reference
    out += _listed("lines added", ref.lines_added)
    out += _listed(
        "lines renamed", [f"{c} ({old!r} -> {new!r})" for c, old, new in ref.lines_renamed]
    )
    out += _listed("lines active again", ref.lines_reactivated)
    out += _listed("lines marked inactive (not in the config; history kept)", ref.lines_deactivated)
    out += _listed("categories added", ref.categories_added)
    out += _listed(
        "categories renamed",
        [f"{c} ({old!r} -> {new!r})" for c, old, new in ref.categories_renamed],
    )
    out += _listed("categories kept but not in the config", ref.categories_not_in_config)
    short = f"version {report.config_version_id}"
    if report.config_version_new:
        out.append(f"config: recorded as {short}")
    else:
        out.append(f"config: unchanged ({short})")
    if not report.changed:
        out.append("nothing to change: the store already matches the config")
    return out


def _listed(label: str, items: object) -> list[str]:
    items = list(items)  # type: ignore[call-overload]
    return [f"{label}: {', '.join(map(str, items))}"] if items else []


def _os_user() -> str:
    try:
        return getpass.getuser()
    except (KeyError, OSError):  # no user name in the environment or the password database
        return "unknown"

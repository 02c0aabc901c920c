"""``qcfit report [--shift ID | --last] [--out FILE]``: write a shift's HTML report."""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import click

from qcfit.cli import app, main
from qcfit.errors import InvalidArgumentError


@main.command("report")
@click.option("--shift", "shift_id", metavar="ID", help="The shift, e.g. 2026-01-05_A.")
@click.option("--last", is_flag=True, help="The latest evaluated shift (the default).")
@click.option("--out", "out", metavar="FILE", type=click.Path(dir_okay=False),
              help="Write the page here (default: the [report] folder, else the current folder).")
@click.option("--history", default=30, show_default=True, metavar="N",
              type=click.IntRange(1, 1000), help="Shifts shown in the over-time charts.")
@click.pass_context
def report_command(ctx: click.Context, shift_id: str | None, last: bool, out: str | None,
                   history: int) -> None:
    """Write one evaluated shift's report: a self-contained HTML page (opens offline in any
    browser, prints on A4) and print its path.

    Without --out the page goes into the config's [report] folder (keeping the last [report]
    keep pages there) or, when none is configured, into the current folder.
    """
    if shift_id and last:
        raise InvalidArgumentError("--last", "use either --shift or --last, not both")
    a = app(ctx)
    config = a.config()
    engine = a.engine()
    from qcfit.report.data import report_shift_id
    from qcfit.report.write import report_folder, report_name, write_shift_report
    from qcfit.store.migrate import check_schema

    check_schema(engine)
    now = dt.datetime.now(dt.UTC)
    if out is None and report_folder(config) is None:
        out = str(Path.cwd() / report_name(report_shift_id(engine, shift_id)))
    path = write_shift_report(engine, config, shift_id, now=now, out=out, history=history)
    click.echo(str(Path(path).resolve()))

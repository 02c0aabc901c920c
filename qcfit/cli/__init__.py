"""Command-line shell: ``qcfit [--config FILE] [--store URL] COMMAND ...``.

Each command builds what it needs, calls one library function and formats the answer.
Commands live in one module per area (``qcfit.cli.<area>``), each with its own owner;
this module holds the group, the shared context and the one wrapper that turns a
:class:`~qcfit.errors.QcfitError` into ``Error: ...`` on stderr with its exit code.
Nothing in the library imports this package.
"""

from __future__ import annotations

import importlib
import logging
import sys
from pathlib import Path
from typing import Any

import click

from qcfit.errors import EXIT_FAILURE, QcfitError

# Areas whose modules register commands on ``main`` when imported.
COMMAND_MODULES: tuple[str, ...] = (
    "qcfit.cli.setup",
    "qcfit.cli.baseline",
    "qcfit.cli.data",
    "qcfit.cli.evaluate",
    "qcfit.cli.alarms",
    "qcfit.cli.service",
    "qcfit.cli.report",
)

DEFAULT_CONFIG_NAME = "qcfit.toml"


class AppContext:
    """What every command may need, built lazily so ``--help`` touches no file."""

    def __init__(self, config_path: str | None, store_url: str | None) -> None:
        self.config_path = Path(config_path) if config_path else Path(DEFAULT_CONFIG_NAME)
        self.store_url_override = store_url
        self._config: Any = None
        self._engine: Any = None

    def config(self) -> Any:
        if self._config is None:
            from qcfit.config import load_config

            self._config = load_config(self.config_path)
        return self._config

    def store_url(self) -> str:
        if self.store_url_override:
            return self.store_url_override
        from qcfit.config import store_url_for

        return store_url_for(self.config(), self.config_path)

    def engine(self) -> Any:
        if self._engine is None:
            from qcfit.store.engine import make_engine

            self._engine = make_engine(self.store_url())
        return self._engine

    def close(self) -> None:
        if self._engine is not None:
            self._engine.dispose()
            self._engine = None


class QcfitGroup(click.Group):
    """A click group that maps qcfit errors to a message and an exit code."""

    def invoke(self, ctx: click.Context) -> Any:
        try:
            return super().invoke(ctx)
        except QcfitError as exc:
            click.echo(f"Error: {exc}", err=True)
            ctx.exit(exc.exit_code)
        finally:
            obj = ctx.obj
            if isinstance(obj, AppContext):
                obj.close()


@click.group(cls=QcfitGroup, context_settings={"help_option_names": ["-h", "--help"]})
@click.option(
    "--config",
    "config_path",
    envvar="QCFIT_CONFIG",
    type=click.Path(dir_okay=False),
    default=None,
    help=f"Plant config file (TOML). Default: $QCFIT_CONFIG or ./{DEFAULT_CONFIG_NAME}.",
)
@click.option(
    "--store",
    "store_url",
    envvar="QCFIT_STORE",
    default=None,
    help="SQLAlchemy URL of the store; overrides [store] url in the config.",
)
@click.option("-v", "--verbose", count=True, help="More log output (repeat for debug).")
@click.version_option(package_name="qcfit")
@click.pass_context
def main(ctx: click.Context, config_path: str | None, store_url: str | None, verbose: int) -> None:
    """qcfit: shift-by-shift check of each line's defect-category mix and defect rate."""
    level = logging.WARNING - 10 * min(verbose, 2)
    logging.basicConfig(level=level, format="%(asctime)s %(levelname)s %(name)s: %(message)s")
    ctx.obj = AppContext(config_path, store_url)


def app(ctx: click.Context) -> AppContext:
    """The shared context of the current command."""
    obj = ctx.find_root().obj
    assert isinstance(obj, AppContext)
    return obj


def _register() -> None:
    for name in COMMAND_MODULES:
        importlib.import_module(name)


def run(argv: list[str] | None = None) -> int:
    """Run the CLI and return its exit code (used by ``main`` and the tests)."""
    try:
        result = main.main(args=argv, standalone_mode=False)
    except click.exceptions.Exit as exc:
        return exc.exit_code
    except click.ClickException as exc:
        exc.show()
        return exc.exit_code
    except click.exceptions.Abort:
        click.echo("Aborted.", err=True)
        return EXIT_FAILURE
    # Without standalone mode click returns the code a command exited with (ctx.exit(code)).
    return result if isinstance(result, int) else 0


_register()

if __name__ == "__main__":  # pragma: no cover
    sys.exit(run())

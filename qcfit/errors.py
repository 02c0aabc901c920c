"""The one exception tree of qcfit.

Every error a plant engineer can see is a :class:`QcfitError`. Each class carries
structured fields, builds its own message from them, and has the process exit code
the CLI uses (0 success, 1 store or internal failure, 2 bad usage, config or input data)::

    QcfitError (exit 1)
    ├── ConfigError (exit 2)          problems: list[Problem(key, reason)]
    ├── InputFileError (exit 2)       path, bad_rows: list[BadRow(line_no, reason)]
    ├── InvalidArgumentError (exit 2) argument, reason   (also a ValueError)
    ├── NotFoundError (exit 2)        what, key
    ├── BaselineError (exit 2)        key, reason         (fit window empty, overlap, ...)
    ├── StoreError (exit 1)           reason               (database unreachable, locked, ...)
    │   └── SchemaError (exit 1)      store not initialised or from a newer qcfit
    ├── AlreadyRunningError (exit 1)  holder                (another service holds the store)
    └── EvaluationError (exit 1)      shift, reason

Foreign exceptions (sqlalchemy, pandas, tomllib) are translated where they arise, with
``raise ... from exc``, so the original stays in the traceback for a developer.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass

EXIT_OK = 0
EXIT_FAILURE = 1
EXIT_BAD_INPUT = 2


class QcfitError(Exception):
    """Base of every qcfit error; ``exit_code`` is what the CLI exits with."""

    exit_code: int = EXIT_FAILURE


@dataclass(frozen=True, slots=True)
class Problem:
    """One problem in a config: the dotted key (``shift[2].end``) and the reason."""

    key: str
    reason: str

    def __str__(self) -> str:
        return f"{self.key}: {self.reason}"


class ConfigError(QcfitError):
    """The config file has one or more problems; all are reported at once."""

    exit_code = EXIT_BAD_INPUT

    def __init__(self, problems: Iterable[Problem], path: str | None = None) -> None:
        self.problems = list(problems)
        self.path = path
        where = f"config {path}" if path else "config"
        lines = [f"{where} has {len(self.problems)} problem(s):"]
        lines += [f"  {p}" for p in self.problems]
        super().__init__("\n".join(lines))


@dataclass(frozen=True, slots=True)
class BadRow:
    """One rejected input row: 1-based line number in the file (header is line 1)."""

    line_no: int
    reason: str

    def __str__(self) -> str:
        return f"line {self.line_no}: {self.reason}"


class InputFileError(QcfitError):
    """An input file (CSV, pull query result) was rejected; nothing was written."""

    exit_code = EXIT_BAD_INPUT
    max_listed = 50

    def __init__(self, path: str, bad_rows: Iterable[BadRow] = (), reason: str | None = None) -> None:
        self.path = str(path)
        self.bad_rows = list(bad_rows)
        self.reason = reason
        if reason is not None:
            msg = f"{self.path}: {reason}"
        else:
            msg = f"{self.path}: {len(self.bad_rows)} bad row(s), nothing was loaded:"
        lines = [msg] + [f"  {self.path}: {b}" for b in self.bad_rows[: self.max_listed]]
        if len(self.bad_rows) > self.max_listed:
            lines.append(f"  ... and {len(self.bad_rows) - self.max_listed} more")
        super().__init__("\n".join(lines))


class InvalidArgumentError(QcfitError, ValueError):
    """A function argument is invalid; the message names the argument."""

    exit_code = EXIT_BAD_INPUT

    def __init__(self, argument: str, reason: str) -> None:
        self.argument = argument
        self.reason = reason
        super().__init__(f"{argument}: {reason}")


class NotFoundError(QcfitError):
    """Something asked for by name or id does not exist (a shift, an alarm, a baseline)."""

    exit_code = EXIT_BAD_INPUT

    def __init__(self, what: str, key: object) -> None:
        self.what = what
        self.key = key
        super().__init__(f"no {what} {key!s}")


class BaselineError(QcfitError):
    """A baseline cannot be set or fitted as asked (names the config key or argument)."""

    exit_code = EXIT_BAD_INPUT

    def __init__(self, key: str, reason: str) -> None:
        self.key = key
        self.reason = reason
        super().__init__(f"{key}: {reason}")


class StoreError(QcfitError):
    """The store could not be read or written; any transaction in flight was rolled back."""

    exit_code = EXIT_FAILURE

    def __init__(self, reason: str) -> None:
        self.reason = reason
        super().__init__(f"store: {reason}")


class SchemaError(StoreError):
    """The store is not initialised (run ``qcfit init``) or was made by a newer qcfit."""

    def __init__(self, reason: str) -> None:
        super().__init__(reason)
        self.args = (reason,)

    def __str__(self) -> str:
        return self.reason


class AlreadyRunningError(QcfitError):
    """Another qcfit service already holds this store."""

    exit_code = EXIT_FAILURE

    def __init__(self, holder: str) -> None:
        self.holder = holder
        super().__init__(f"already running: {holder}")


class EvaluationError(QcfitError):
    """Evaluating a shift failed; the evaluation was recorded as failed."""

    exit_code = EXIT_FAILURE

    def __init__(self, shift: str, reason: str) -> None:
        self.shift = shift
        self.reason = reason
        super().__init__(f"shift {shift}: {reason}")

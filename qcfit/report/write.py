"""Writing shift reports: one HTML file per evaluated shift, atomically, keeping the last N.

:func:`write_shift_report` reads one shift (:func:`~qcfit.report.data.gather`), renders it and
writes it to ``out`` or into the config's ``[report] folder`` as ``shift-<shift id>.html``,
then deletes the oldest reports there beyond ``[report] keep``. A file is written to a
temporary name in the same folder, flushed to disk and renamed over the target, so a reader
(or a crash) never sees half a page.

:func:`write_after_evaluation` is what the service calls after each catch-up, with the shifts
it evaluated: it does nothing when no folder is configured, and a failure is logged and
skipped, never raised (a report must not fail an evaluation that is already committed).
"""

from __future__ import annotations

import contextlib
import datetime as dt
import logging
import os
import re
import tempfile
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from qcfit.errors import InvalidArgumentError
from qcfit.report.data import DEFAULT_HISTORY, gather
from qcfit.report.render import render_html

log = logging.getLogger(__name__)

PREFIX = "shift-"
SUFFIX = ".html"
_NAME = re.compile(r"^shift-(\d{4}-\d{2}-\d{2})_(.+)\.html$")


def report_name(shift_id: str) -> str:
    """File name of a shift's report: ``shift-2026-10-07_B.html``."""
    return f"{PREFIX}{shift_id}{SUFFIX}"


def report_folder(config: Any) -> Path | None:
    """The config's ``[report] folder`` (relative to the config file's folder), or None."""
    folder = getattr(config.report, "folder", None)
    if not folder:
        return None
    path = Path(folder).expanduser()
    if not path.is_absolute() and getattr(config, "path", None) is not None:
        path = Path(config.path).resolve().parent / path
    return path


def write_atomic(path: str | Path, text: str) -> Path:
    """Write ``text`` (UTF-8) to ``path`` via a temporary file in the same folder and a rename;
    the folder must exist. Returns the path."""
    target = Path(path)
    folder = target.parent
    if not folder.is_dir():
        raise InvalidArgumentError("--out", f"folder {folder} does not exist")
    try:
        fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=folder)
    except OSError as exc:
        raise InvalidArgumentError("--out", f"cannot write in {folder}: {exc.strerror or exc}"
                                   ) from exc
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(text.encode("utf-8"))
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, target)
    except BaseException as exc:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        if isinstance(exc, OSError):
            raise InvalidArgumentError("--out", f"cannot write {target}: "
                                       f"{exc.strerror or exc}") from exc
        raise
    _sync_folder(folder)
    return target


def _sync_folder(folder: Path) -> None:
    """Make the rename durable where the OS allows opening a folder (POSIX)."""
    if os.name != "posix":
        return
    with contextlib.suppress(OSError):
        fd = os.open(folder, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)


def _order(config: Any) -> dict[str, int]:
    specs = sorted(config.shifts, key=lambda s: s.start)
    return {s.name: i for i, s in enumerate(specs)}


def _shift_key(shift_id: str, order: dict[str, int]) -> tuple:
    date, _, name = shift_id.partition("_")
    return (date, order.get(name, len(order)), name)


def prune(folder: str | Path, keep: int, config: Any) -> list[Path]:
    """Delete the oldest ``shift-*.html`` reports in ``folder`` beyond the newest ``keep``
    (ordered by shift date, then the shift's start time in the config); other files are left
    alone. Returns the deleted paths."""
    if keep < 1:
        raise InvalidArgumentError("report.keep", f"must be at least 1, not {keep}")
    order = _order(config)
    found = []
    for path in Path(folder).iterdir():
        m = _NAME.match(path.name)
        if m and path.is_file():
            found.append(((m.group(1), order.get(m.group(2), len(order)), m.group(2)), path))
    found.sort()
    doomed = [p for _, p in found[: max(0, len(found) - keep)]]
    for path in doomed:
        with contextlib.suppress(FileNotFoundError):
            path.unlink()
    return doomed


def write_shift_report(engine: Any, config: Any, shift_id: str | None = None, *,
                       now: dt.datetime, out: str | Path | None = None,
                       folder: str | Path | None = None, keep: int | None = None,
                       history: int = DEFAULT_HISTORY) -> Path:
    """Write one shift's report and return its path.

    ``shift_id`` None means the latest evaluated shift. With ``out`` the page goes exactly
    there; otherwise into ``folder`` (default: the config's ``[report] folder``) as
    :func:`report_name`, and the folder is pruned to ``keep`` reports (default
    ``[report] keep``). With neither ``out`` nor a folder, InvalidArgumentError.
    """
    data = gather(engine, config, shift_id, now=now, history=history)
    text = render_html(data)
    if out is not None:
        return write_atomic(out, text)
    target = Path(folder) if folder is not None else report_folder(config)
    if target is None:
        raise InvalidArgumentError("--out", "the config has no [report] folder: pass --out FILE")
    target.mkdir(parents=True, exist_ok=True)
    path = write_atomic(target / report_name(data.shift.id), text)
    prune(target, keep if keep is not None else int(config.report.keep), config)
    return path


CATCH_UP_REPORTS = 6  # two days at three shifts: what a handover after an outage looks at


def write_after_evaluation(engine: Any, config: Any, shift_ids: Sequence[str], *,
                           now: dt.datetime) -> list[Path]:
    """Write the reports of freshly evaluated shifts into ``[report] folder`` (nothing when
    none is configured). Only the newest ``min([report] keep, CATCH_UP_REPORTS)`` of them are
    written: a catch-up after an outage should not spend minutes drawing pages of shifts long
    past (``qcfit report --shift ID`` makes any of them on demand). Failures are logged, never
    raised. Returns the paths written."""
    folder = report_folder(config)
    if folder is None:
        return []
    order = _order(config)
    newest = sorted(dict.fromkeys(shift_ids), key=lambda sid: _shift_key(sid, order))
    written = []
    for shift_id in newest[-max(1, min(int(config.report.keep), CATCH_UP_REPORTS)):]:
        try:
            written.append(write_shift_report(engine, config, shift_id, now=now, folder=folder))
        except Exception as exc:  # a report must never fail a committed evaluation
            log.error("report of shift %s not written: %s: %s", shift_id, type(exc).__name__, exc)
    return written

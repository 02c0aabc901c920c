"""Add a fitted ``[baseline.NAME]`` block to the config file (``qcfit baseline fit --write``).

The block is appended at the end of the file, so every byte already there (comments, layout,
key order, a byte-order mark, CRLF line ends) stays as it was. Before anything is written the
new text is checked three ways: tomlkit reads it back (the file stays editable by tools that
keep comments), the new table reads back as exactly the block that was meant, and the whole
file passes the config validation (``parse_config``: a name already in use or two baselines
for one line with the same effective date are refused there). Only then a backup copy of the
old file is written beside it (``plant.toml.20260105T063000Z.bak``) and the file is replaced
atomically (a temporary file in the same folder, flushed to disk, then ``os.replace``), so a
crash leaves either the old or the new file, never half of one.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import logging
import os
import shutil
import tempfile
import tomllib
from dataclasses import dataclass
from pathlib import Path

import tomlkit
from tomlkit.exceptions import TOMLKitError

from qcfit.errors import BaselineError

log = logging.getLogger(__name__)

__all__ = ["WriteResult", "add_baseline_block"]

BOM = b"\xef\xbb\xbf"


@dataclass(frozen=True, slots=True)
class WriteResult:
    path: Path
    backup: Path
    name: str
    old_hash: str  # sha256 hex of the old text (as Config.hash)
    new_hash: str


def add_baseline_block(
    path: str | Path, block: str, *, name: str, now: dt.datetime,
    expected_hash: str | None = None,
) -> WriteResult:
    """Append ``block`` (one ``[baseline.NAME]`` table, with sub-tables) to the config at
    ``path``, after a backup copy of the old file named with ``now`` (aware).

    ``expected_hash``: the sha256 of the text the caller loaded; when the file has changed
    since, nothing is written. Raises BaselineError (key ``--write``) or ConfigError with
    nothing written.
    """
    path = Path(path)
    raw = _read(path)
    bom = raw.startswith(BOM)
    text = raw[len(BOM):].decode("utf-8") if bom else raw.decode("utf-8")
    if expected_hash is not None and _sha(text) != expected_hash:
        raise BaselineError("--write", f"{path} changed since it was read; run the command again")
    new_text = _joined(text, block)
    _check(path, text, new_text, name)
    backup = _backup(path, now)
    _replace(path, (BOM if bom else b"") + new_text.encode("utf-8"))
    log.info("added [baseline.%s] to %s (backup %s)", name, path, backup)
    return WriteResult(path, backup, name, _sha(text), _sha(new_text))


def _read(path: Path) -> bytes:
    try:
        return path.read_bytes()
    except OSError as exc:
        raise BaselineError("--write", f"cannot read {path}: {exc.strerror or exc}") from exc


def _sha(text: str) -> str:
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def _joined(text: str, block: str) -> str:
    newline = "\r\n" if "\r\n" in text else "\n"
    body = block.replace("\r\n", "\n").rstrip("\n").replace("\n", newline) + newline
    if not text:
        return body
    if not text.endswith(("\n", "\r")):
        text += newline
    return text + newline + body


def _check(path: Path, old_text: str, new_text: str, name: str) -> None:
    """Refuse (nothing written) unless the new text reads back as the old plus the block."""
    try:
        old_doc = tomlkit.parse(old_text).unwrap()
    except TOMLKitError as exc:
        raise BaselineError("--write", f"{path} is not valid TOML ({exc})") from exc
    old_baselines = old_doc.get("baseline", {})
    if not isinstance(old_baselines, dict):
        raise BaselineError("--write", f"{path}: 'baseline' is not a table; paste the block by hand")
    if name in old_baselines:
        raise BaselineError("--name", f"a baseline named {name!r} is already in {path}")
    try:
        new_doc = tomlkit.parse(new_text).unwrap()
        block_doc = tomllib.loads(new_text[len(old_text):])
    except (TOMLKitError, tomllib.TOMLDecodeError) as exc:
        raise BaselineError("--write", f"the block cannot be added to {path} as TOML ({exc}); "
                                       "paste it by hand") from exc
    expected = dict(old_doc)
    expected["baseline"] = {**old_baselines, name: block_doc["baseline"][name]}
    if new_doc != expected:
        raise BaselineError("--write", f"appending the block would change other keys of {path}; "
                                       "paste it by hand")
    from qcfit.config import parse_config

    parse_config(tomllib.loads(new_text), text=new_text, path=path)


def _backup(path: Path, now: dt.datetime) -> Path:
    stamp = now.astimezone(dt.UTC).strftime("%Y%m%dT%H%M%SZ")
    target = path.with_name(f"{path.name}.{stamp}.bak")
    n = 1
    while target.exists():
        target = path.with_name(f"{path.name}.{stamp}-{n}.bak")
        n += 1
    try:
        shutil.copy2(path, target)
    except OSError as exc:
        raise BaselineError("--write", f"cannot write the backup {target}: "
                                       f"{exc.strerror or exc}; nothing was changed") from exc
    return target


def _replace(path: Path, data: bytes) -> None:
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        shutil.copymode(path, tmp)
        os.replace(tmp, path)
    except OSError as exc:
        Path(tmp).unlink(missing_ok=True)
        raise BaselineError("--write", f"cannot replace {path}: {exc.strerror or exc}") from exc
    _sync_dir(path.parent)


def _sync_dir(folder: Path) -> None:
    if os.name != "posix":
        return
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)

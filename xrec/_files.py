"""Atomic file writes: the blend file, the HTML report and the embedding cache's entries."""

from __future__ import annotations

import contextlib
import os
import secrets
import tempfile
from pathlib import Path


def write_text_atomic(path: str | os.PathLike, text: str) -> Path:
    """Write ``text`` (UTF-8, ``\\n`` line ends) to ``path`` so that readers see the old file or the new one.

    The text goes to a temporary file in the same folder, is flushed to disk, and then
    replaces ``path`` in one rename; on any failure the temporary file is removed and
    ``path`` is untouched. A replaced file keeps its permission bits; a new one gets
    the mode a plain ``open()`` would give it.
    """
    path = Path(path)
    folder = path.parent if str(path.parent) else Path(".")
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=folder)
    try:
        # fdopen first, so the descriptor is closed whatever fails after this point
        with os.fdopen(fd, "w", encoding="utf-8", newline="\n") as fh:
            os.fchmod(fh.fileno(), _mode_for(path))  # mkstemp makes the file private (0600)
            fh.write(text)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        try:
            os.unlink(tmp)
        except FileNotFoundError:
            pass
        raise
    return path


def write_bytes_atomic(path: Path, data: bytes) -> None:
    """Write ``data`` to ``path`` so that readers never see a partial file.

    The bytes go to a hidden temporary file beside ``path`` (named after the process and a
    random token, so concurrent writers never share one) and replace ``path`` in one rename.
    """
    tmp = path.with_name(f".{path.name}.{os.getpid()}.{secrets.token_hex(4)}.tmp")
    try:
        with open(tmp, "wb") as fh:
            fh.write(data)
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise


def _mode_for(path: Path) -> int:
    try:
        return path.stat().st_mode & 0o777
    except FileNotFoundError:
        umask = os.umask(0)
        os.umask(umask)
        return 0o666 & ~umask

"""The one atomic writer for every file xrec writes, and the sweep of temporary files a crash left.

Writing
-------
:func:`write_bytes_atomic` (and :func:`write_text_atomic` on top of it) writes to a
temporary file in the destination's folder, named ``.<name>.<pid>.<8 hex>.tmp``, flushes it
to disk (``fsync``), renames it over the destination (``os.replace``) and then flushes the
folder, so that after a crash (even ``kill -9`` or a power cut) a reader finds the old file
or the new one, never a part. Cache entries pass ``durable=False`` (no ``fsync``: they carry
their own digest and are recomputed when damaged, and an ``fsync`` per entry costs ~8 ms).

Sweeping
--------
A process killed between the temporary write and the rename leaves its temporary file.
:func:`sweep_temp_files` removes, in one folder (not below it), only files named by the
pattern above, and only when they are stale: older than :data:`MIN_AGE` seconds and
written by a process that is no longer running on this machine (the pid in the name), or
older than :data:`MAX_AGE` whatever the pid (the pid may be reused, or belong to another
machine sharing the folder). Every write sweeps its destination folder first; the
embedding cache sweeps its folders when it is opened.
"""

from __future__ import annotations

import contextlib
import os
import re
import secrets
import time
from pathlib import Path

#: A temporary file younger than this (seconds) is never removed: its writer may still be busy.
MIN_AGE = 15 * 60
#: A temporary file older than this (seconds) is removed even when its pid is running.
MAX_AGE = 24 * 60 * 60
_TEMP_NAME = re.compile(r"^\.(?P<name>.+)\.(?P<pid>[0-9]+)\.(?P<token>[0-9a-f]{8})\.tmp$")


def temp_name(path: Path) -> Path:
    """The temporary file a write of ``path`` goes through: ``.<name>.<pid>.<8 hex>.tmp`` beside it."""
    return path.with_name(f".{path.name}.{os.getpid()}.{secrets.token_hex(4)}.tmp")


def write_bytes_atomic(path: str | os.PathLike, data: bytes, *, durable: bool = True, sweep: bool = True) -> Path:
    """Write ``data`` to ``path`` so that readers see the old file or the new one, and return ``path``.

    Parameters
    ----------
    path
        Destination; its folder must exist.
    data
        The whole content.
    durable
        ``fsync`` the file before the rename and the folder after it (default). ``False``
        keeps the rename atomic but lets the operating system choose when to write to disk.
    sweep
        First remove stale temporary files of earlier crashed writes from the folder
        (see :func:`sweep_temp_files`).

    A replaced file keeps its permission bits; a new one gets the mode a plain ``open()``
    would give it. On any failure the temporary file is removed and ``path`` is untouched.
    """
    path = Path(path)
    folder = path.parent if str(path.parent) else Path(".")
    if sweep:
        sweep_temp_files(folder)
    tmp = temp_name(path)
    mode = _mode_for(path)
    try:
        fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
        with open(fd, "wb") as fh:  # closes the descriptor whatever fails after this point
            os.fchmod(fh.fileno(), mode)
            fh.write(data)
            fh.flush()
            if durable:
                os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)
        raise
    if durable:
        _sync_folder(folder)
    return path


def write_text_atomic(path: str | os.PathLike, text: str, *, durable: bool = True, sweep: bool = True) -> Path:
    """:func:`write_bytes_atomic` of ``text`` encoded as UTF-8 (line ends written as given)."""
    if not isinstance(text, str):
        raise TypeError(f"text must be str, got {type(text).__name__}")
    return write_bytes_atomic(path, text.encode("utf-8"), durable=durable, sweep=sweep)


def sweep_temp_files(folder: str | os.PathLike, *, min_age: float = MIN_AGE, max_age: float = MAX_AGE) -> list[Path]:
    """Remove stale temporary files of xrec's writer from ``folder`` (not below it); return them.

    Only names of the form ``.<name>.<pid>.<8 hex>.tmp`` are considered; such a file is
    removed when it is older than ``min_age`` seconds and its pid is not a running process
    of this machine, or when it is older than ``max_age``. A folder that cannot be listed,
    and files that vanish or cannot be removed meanwhile, are skipped silently.
    """
    removed: list[Path] = []
    now = time.time()
    try:
        entries = list(os.scandir(folder))
    except OSError:
        return removed
    for entry in entries:
        m = _TEMP_NAME.match(entry.name)
        if m is None:
            continue
        try:
            if not entry.is_file(follow_symlinks=False):
                continue
            age = now - entry.stat(follow_symlinks=False).st_mtime
        except OSError:
            continue
        if age < min_age or (age < max_age and _running(int(m.group("pid")))):
            continue
        with contextlib.suppress(OSError):
            os.unlink(entry.path)
            removed.append(Path(entry.path))
    return removed


def _running(pid: int) -> bool:
    """Whether a process ``pid`` exists on this machine (permission to signal it or not)."""
    if pid <= 0:
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    except OverflowError:
        return False
    return True


def _sync_folder(folder: Path) -> None:
    """``fsync`` a folder so a rename in it survives a power cut (best effort: some file systems refuse)."""
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


def _mode_for(path: Path) -> int:
    try:
        return path.stat().st_mode & 0o777
    except FileNotFoundError:
        umask = os.umask(0)
        os.umask(umask)
        return 0o666 & ~umask


def read_text_file(path: str | os.PathLike, what: str) -> str:
    """The UTF-8 text of a file xrec reads (a spec, a blend file), or a :class:`ConfigError` naming it.

    ``what`` names the kind of file in the message (``"spec"``, ``"blend file"``). Bytes that
    are not UTF-8 are reported with their offset; a missing file, a folder or an unreadable
    file raise :class:`ConfigError` too. A leading UTF-8 byte-order mark (some editors write one)
    is dropped.
    """
    from xrec.errors import ConfigError

    path = Path(path)
    try:
        data = path.read_bytes()
    except FileNotFoundError:
        raise ConfigError(f"{what} not found: {path}") from None
    except IsADirectoryError:
        raise ConfigError(f"{what} {path} is a folder, not a file") from None
    except OSError as exc:
        raise ConfigError(f"{what} {path} cannot be read: {exc.strerror or exc}") from exc
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = data.count(b"\n", 0, exc.start) + 1
        raise ConfigError(
            f"{what} {path} is not UTF-8 text: line {line}, byte {data[exc.start]:#04x} at offset {exc.start} "
            f"({exc.reason}); save it as UTF-8"
        ) from None
    return text.removeprefix("\ufeff")

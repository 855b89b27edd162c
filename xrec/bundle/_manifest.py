"""The bundle folder on disk: an all-or-nothing writer and a reader that checks every byte.

Writing goes to a temporary folder beside the target (``.NAME.*.partial``): every file is
written and fsynced, the manifest last, the folder fsynced, and only then does the folder
take the target's name, in one rename (an existing bundle is swapped out atomically where
the system offers ``renameat2(RENAME_EXCHANGE)``, else renamed aside first). A writer
killed at any point leaves either the previous bundle or the new complete one under the
target name; a leftover ``.partial`` folder has no manifest, or one listing files it may
lack, so it never loads (the next write of the same bundle removes leftovers older than an hour).

Reading lists every file under the folder, refuses one the manifest does not list (an
extra file), one it lists that is absent (a missing file) and one whose SHA-256 differs
(a changed file), each naming the file; contents are hashed and parsed from the same bytes
(the blend file is then read by :func:`xrec.blendfile.read_blend` and compared with them).
"""

from __future__ import annotations

import ctypes
import ctypes.util
import hashlib
import json
import os
import shutil
import tempfile
from pathlib import Path, PurePosixPath
from typing import Any

from xrec.errors import BundleError, ConfigError

MANIFEST = "manifest.json"
FORMAT = "xrec-bundle"
FORMAT_VERSION = 1


def sha256_hex(data: bytes) -> str:
    """SHA-256 of ``data`` as 64 hex digits."""
    return hashlib.sha256(data).hexdigest()


class FolderWriter:
    """Collects a bundle's files in a temporary folder beside ``target``; :meth:`commit` publishes it.

    Parameters
    ----------
    target
        The bundle folder to create or replace. Its parent must exist; an existing
        ``target`` must be a bundle folder (it holds ``manifest.json``) or empty.
    """

    def __init__(self, target: str | os.PathLike) -> None:
        self.target = Path(target)
        parent = self.target.parent if str(self.target.parent) else Path(".")
        if not parent.is_dir():
            raise ConfigError(f"bundle: folder {str(parent)!r} does not exist")
        if self.target.exists():
            if not self.target.is_dir():
                raise ConfigError(f"bundle: {str(self.target)!r} exists and is not a folder")
            if not (self.target / MANIFEST).is_file() and any(self.target.iterdir()):
                raise ConfigError(f"bundle: {str(self.target)!r} is a folder that is neither empty nor a bundle; not replacing it")
        sweep_stale(self.target)
        self.tmp = Path(tempfile.mkdtemp(prefix=f".{self.target.name}.", suffix=".partial", dir=parent))
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(self.tmp, 0o777 & ~umask)  # mkdtemp makes the folder private; a bundle is a plain folder
        self.files: dict[str, dict[str, Any]] = {}

    def write(self, name: str, data: bytes) -> None:
        """Write one file (``name`` relative, ``/``-separated) and record its SHA-256 and size."""
        _check_name(name)
        path = self.tmp / name
        path.parent.mkdir(parents=True, exist_ok=True)
        with open(path, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        self.files[name] = {"sha256": sha256_hex(data), "bytes": len(data)}

    def commit(self, manifest: dict[str, Any]) -> Path:
        """Write the manifest (with the file list) last, fsync, and move the folder into place."""
        manifest = {**manifest, "files": dict(sorted(self.files.items()))}
        data = json.dumps(manifest, indent=1, sort_keys=False, allow_nan=False).encode("utf-8") + b"\n"
        path = self.tmp / MANIFEST
        with open(path, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        for folder in sorted({(self.tmp / n).parent for n in self.files} | {self.tmp}, key=lambda p: -len(p.parts)):
            _fsync_dir(folder)
        if self.target.exists():
            if _exchange(self.tmp, self.target):
                _discard(self.tmp)  # now holds the previous bundle
            else:
                aside = Path(tempfile.mkdtemp(prefix=f".{self.target.name}.", suffix=".old", dir=self.target.parent))
                os.rename(self.target, aside / "bundle")
                os.rename(self.tmp, self.target)
                _discard(aside / "bundle")
                shutil.rmtree(aside, ignore_errors=True)
        else:
            os.rename(self.tmp, self.target)
        _fsync_dir(self.target.parent if str(self.target.parent) else Path("."))
        return self.target

    def abort(self) -> None:
        """Remove the temporary folder (after a failure)."""
        shutil.rmtree(self.tmp, ignore_errors=True)


#: Temporary folders of a bundle's writers older than this (seconds) are left by killed writers.
STALE_AFTER = 3600.0


def sweep_stale(target: str | os.PathLike, *, older_than: float = STALE_AFTER) -> list[Path]:
    """Remove the temporary folders killed writers of ``target`` left beside it; returns them.

    Only ``.NAME.*.partial`` and ``.NAME.*.old`` folders not modified for ``older_than``
    seconds are removed, so a writer still at work is never disturbed.
    """
    import time

    target = Path(target)
    parent = target.parent if str(target.parent) else Path(".")
    removed = []
    try:
        entries = list(parent.iterdir())
    except OSError:
        return removed
    now = time.time()
    for entry in entries:
        name = entry.name
        if not (name.startswith(f".{target.name}.") and name.endswith((".partial", ".old"))):
            continue
        try:
            if entry.is_dir() and not entry.is_symlink() and now - entry.stat().st_mtime > older_than:
                shutil.rmtree(entry, ignore_errors=True)
                removed.append(entry)
        except OSError:
            continue
    return removed


def read_verified(folder: str | os.PathLike) -> tuple[dict[str, Any], dict[str, bytes], str]:
    """Read a bundle folder and check it against its manifest.

    Returns
    -------
    manifest, contents, identity
        The parsed manifest, every listed file's bytes by name, and the SHA-256 of the
        manifest's bytes (which pins every file through their checksums).

    Raises
    ------
    BundleError
        Naming the file: no manifest, a malformed one, an extra, missing or changed file.
    """
    folder = Path(folder)
    if not folder.is_dir():
        raise BundleError(f"bundle {str(folder)!r}: not a folder")
    try:
        raw = (folder / MANIFEST).read_bytes()
    except FileNotFoundError:
        raise BundleError(f"{MANIFEST}: missing in {str(folder)!r} (not a bundle, or one whose writing did not finish)") from None
    try:
        manifest = json.loads(raw.decode("utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise BundleError(f"{MANIFEST}: not valid JSON ({exc})") from None
    if not isinstance(manifest, dict) or manifest.get("format") != FORMAT:
        raise BundleError(f"{MANIFEST}: format must be {FORMAT!r} (is this an xrec bundle?)")
    if manifest.get("format_version") != FORMAT_VERSION:
        raise BundleError(f"{MANIFEST}: unsupported format_version {manifest.get('format_version')!r}; this xrec reads {FORMAT_VERSION}")
    listed = manifest.get("files")
    if not isinstance(listed, dict) or not all(isinstance(v, dict) and isinstance(v.get("sha256"), str) for v in listed.values()):
        raise BundleError(f"{MANIFEST}: 'files' must map each file name to its sha256")
    for name in listed:
        try:
            _check_name(name)
        except ConfigError as exc:
            raise BundleError(f"{MANIFEST}: {exc}") from None
    present = set()
    for root, dirs, names in os.walk(folder):
        dirs.sort()
        for n in names:
            rel = (Path(root) / n).relative_to(folder).as_posix()
            if rel != MANIFEST:
                present.add(rel)
    extra = sorted(present - set(listed))
    if extra:
        raise BundleError(f"{extra[0]}: extra file, not listed in the bundle's manifest")
    missing = sorted(set(listed) - present)
    if missing:
        raise BundleError(f"{missing[0]}: listed in the bundle's manifest but missing")
    contents = {}
    for name, entry in listed.items():
        data = (folder / name).read_bytes()
        if sha256_hex(data) != entry["sha256"]:
            raise BundleError(f"{name}: SHA-256 differs from the manifest (the file was changed or is corrupt)")
        contents[name] = data
    return manifest, contents, sha256_hex(raw)


def _check_name(name: str) -> None:
    parts = PurePosixPath(name).parts
    if not name or name.startswith("/") or "\\" in name or any(p in ("", ".", "..") for p in parts) or name == MANIFEST:
        raise ConfigError(f"file name {name!r}: must be a plain relative path inside the bundle")


def _discard(folder: Path) -> None:
    """Remove a replaced bundle, its manifest first so that no half-deleted copy ever verifies."""
    try:
        os.unlink(folder / MANIFEST)
    except FileNotFoundError:
        pass
    shutil.rmtree(folder, ignore_errors=True)


def _fsync_dir(folder: Path) -> None:
    fd = os.open(folder, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _exchange(a: Path, b: Path) -> bool:
    """Swap two paths atomically (Linux ``renameat2`` with ``RENAME_EXCHANGE``); False where unsupported."""
    libc_name = ctypes.util.find_library("c")
    if not libc_name:
        return False
    libc = ctypes.CDLL(libc_name, use_errno=True)
    fn = getattr(libc, "renameat2", None)
    if fn is None:
        return False
    at_fdcwd, rename_exchange = -100, 2
    fn.argtypes = [ctypes.c_int, ctypes.c_char_p, ctypes.c_int, ctypes.c_char_p, ctypes.c_uint]
    ok = fn(at_fdcwd, os.fsencode(a), at_fdcwd, os.fsencode(b), rename_exchange) == 0
    return ok

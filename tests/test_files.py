"""Atomic text writes: all or nothing, ordinary permissions, no leaked descriptors."""

from __future__ import annotations

import os
from pathlib import Path

import pytest

from xrec import _files
from xrec._files import write_text_atomic


def _open_descriptors() -> int:
    return len(os.listdir("/proc/self/fd"))


def test_writes_text_with_unix_line_ends(tmp_path: Path) -> None:
    out = write_text_atomic(tmp_path / "a.toml", "x = 1\r\ny = 2\n")
    assert out == tmp_path / "a.toml"
    assert out.read_bytes() == b"x = 1\r\ny = 2\n"  # newline="\n": text is written as given
    assert [p.name for p in tmp_path.iterdir()] == ["a.toml"]


def test_new_file_gets_the_umask_mode_and_a_replaced_file_keeps_its_own(tmp_path: Path) -> None:
    umask = os.umask(0o022)
    try:
        fresh = write_text_atomic(tmp_path / "fresh.txt", "hello")
    finally:
        os.umask(umask)
    # what open() gives a new file: 0o666 minus the umask (POSIX open(2); common practice, no source)
    assert fresh.stat().st_mode & 0o777 == 0o644
    kept = tmp_path / "kept.txt"
    kept.write_text("old")
    kept.chmod(0o600)
    write_text_atomic(kept, "new")
    assert kept.read_text() == "new" and kept.stat().st_mode & 0o777 == 0o600


@pytest.mark.skipif(not os.path.isdir("/proc/self/fd"), reason="needs /proc to count descriptors")
@pytest.mark.parametrize("fail_at", ["fchmod", "write"])
def test_a_failure_leaves_the_old_file_no_temporary_and_no_open_descriptor(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, fail_at: str
) -> None:
    target = tmp_path / "blend.toml"
    target.write_text("old")
    if fail_at == "fchmod":

        def refuse(fd: int, mode: int) -> None:
            raise PermissionError("fchmod refused")

        monkeypatch.setattr(_files.os, "fchmod", refuse)
        text, error = "new", PermissionError
    else:
        text, error = 42, TypeError  # type: ignore[assignment]  # a write that fails midway
    before = _open_descriptors()
    with pytest.raises(error):
        if fail_at == "write":
            _files.write_bytes_atomic(target, text)  # type: ignore[arg-type]
        else:
            write_text_atomic(target, text)
    assert _open_descriptors() == before
    assert target.read_text() == "old"
    assert [p.name for p in tmp_path.iterdir()] == ["blend.toml"]


# --- a writer killed between the temporary write and the rename -------------------------------------

_KILLED_WRITER = """
import os, signal, sys
from xrec import _files

def killed_here(src, dst):  # SIGKILL between the temporary write and the rename
    os.kill(os.getpid(), signal.SIGKILL)

_files.os.replace = killed_here
_files.write_text_atomic(sys.argv[1], "new")
"""


def _killed_write(target: Path) -> int:
    import subprocess
    import sys

    root = Path(__file__).resolve().parents[1]  # run this checkout's xrec
    done = subprocess.run([sys.executable, "-c", _KILLED_WRITER, str(target)], cwd=root, capture_output=True, timeout=120)
    return done.returncode


def test_sigkill_between_write_and_rename_keeps_the_old_file_and_the_next_write_sweeps_the_leftover(tmp_path: Path) -> None:
    import signal
    import time

    target = tmp_path / "blend.toml"
    target.write_text("old")
    assert _killed_write(target) == -signal.SIGKILL
    assert target.read_text() == "old"
    leftovers = [p for p in tmp_path.iterdir() if p != target]
    assert len(leftovers) == 1 and leftovers[0].name.startswith(".blend.toml.") and leftovers[0].read_text() == "new"
    # Fresh leftovers are kept (their writer might still be busy) ...
    write_text_atomic(tmp_path / "other.txt", "x")
    assert leftovers[0].exists()
    # ... and removed once older than MIN_AGE, their writer's pid being gone.
    old = time.time() - _files.MIN_AGE - 1
    os.utime(leftovers[0], (old, old))
    write_text_atomic(tmp_path / "other.txt", "y")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["blend.toml", "other.txt"]


def test_sweep_keeps_live_writers_foreign_files_and_subfolders(tmp_path: Path) -> None:
    import time

    hour_ago = time.time() - 3600
    live = tmp_path / f".a.toml.{os.getpid()}.0123abcd.tmp"  # this process is running
    dead = tmp_path / ".a.toml.999999999.0123abcd.tmp"  # beyond any pid_max: no such process
    ancient_live = tmp_path / f".b.toml.{os.getpid()}.89abcdef.tmp"
    foreign = [tmp_path / ".a.toml.tmp", tmp_path / "notes.12.0123abcd.tmp", tmp_path / ".a.toml.12.0123ABCD.tmp"]
    sub = tmp_path / ".c.toml.999999999.0123abcd.tmp"
    for p in (live, dead, *foreign):
        p.write_text("x")
        os.utime(p, (hour_ago, hour_ago))
    ancient_live.write_text("x")
    two_days = time.time() - 2 * _files.MAX_AGE
    os.utime(ancient_live, (two_days, two_days))
    sub.mkdir()
    os.utime(sub, (hour_ago, hour_ago))
    removed = _files.sweep_temp_files(tmp_path)
    assert sorted(p.name for p in removed) == sorted([dead.name, ancient_live.name])
    assert live.exists() and sub.is_dir() and all(p.exists() for p in foreign)
    assert _files.sweep_temp_files(tmp_path / "missing") == []


def test_durable_write_syncs_the_file_and_its_folder(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    synced: list[str] = []
    real = os.fsync

    def spy(fd: int) -> None:
        synced.append(os.readlink(f"/proc/self/fd/{fd}") if os.path.isdir("/proc/self/fd") else str(fd))
        real(fd)

    monkeypatch.setattr(_files.os, "fsync", spy)
    write_text_atomic(tmp_path / "r.html", "<p>")
    assert len(synced) == 2 and synced[1] == str(tmp_path)
    synced.clear()
    _files.write_bytes_atomic(tmp_path / "e.vec", b"\0", durable=False)
    assert synced == []


# --- reading text files ---------------------------------------------------------------------------


def test_read_text_file_names_the_file_and_the_line_of_a_byte_that_is_not_utf8(tmp_path: Path) -> None:
    from xrec.errors import ConfigError

    bad = tmp_path / "spec.toml"
    bad.write_bytes('name = "ok"\ntitle = "café"\n'.encode("latin-1"))  # é is 0xe9 in Latin-1
    # Reference: Python's own decoder puts the first bad byte at the same offset.
    with pytest.raises(UnicodeDecodeError) as ref:
        bad.read_bytes().decode("utf-8")
    with pytest.raises(ConfigError, match=rf"spec {bad} is not UTF-8 text: line 2, byte 0xe9 at offset {ref.value.start}"):
        _files.read_text_file(bad, "spec")
    with pytest.raises(ConfigError, match="spec not found"):
        _files.read_text_file(tmp_path / "missing.toml", "spec")
    with pytest.raises(ConfigError, match="is a folder"):
        _files.read_text_file(tmp_path, "spec")
    bom = tmp_path / "bom.toml"
    bom.write_bytes(b"\xef\xbb\xbfx = 1\n")  # the UTF-8 byte-order mark (Unicode standard, section 23.8; from memory)
    assert _files.read_text_file(bom, "spec") == "x = 1\n"


def test_spec_that_is_not_utf8_is_a_config_error(tmp_path: Path) -> None:
    from xrec.errors import ConfigError
    from xrec.spec import load_spec

    bad = tmp_path / "bad.toml"
    bad.write_bytes(b'[data]\ndataset = "demo_shop"\n# \xff\n[sources.p]\nkind = "popularity"\n')
    with pytest.raises(ConfigError, match=r"spec .*bad\.toml is not UTF-8 text: line 3"):
        load_spec(bad)


# A bundle is written as a whole folder: files go into a private staging folder (each fsynced),
# the folder is fsynced and renamed into place, and stale staging folders are swept; per-file
# renames would not make the folder atomic, so that writer is the one exception.
_FOLDER_WRITERS = {Path("bundle/_manifest.py")}


def test_every_file_xrec_writes_goes_through_the_one_writer() -> None:
    import re

    writes = re.compile(r"\.write_text\(|\.write_bytes\(|os\.replace\(|os\.rename\(|\bopen\([^)]*[\"'][wax]b?\+?[\"']|"
                        r"\.to_csv\(|\.to_parquet\(|np\.save|tempfile\.mkstemp|save_file\(")
    root = Path(__file__).resolve().parents[1] / "xrec"
    found = [
        f"{path.relative_to(root)}:{n}: {line.strip()}"
        for path in sorted(root.rglob("*.py"))
        if path.name != "_files.py" and path.relative_to(root) not in _FOLDER_WRITERS
        for n, line in enumerate(path.read_text(encoding="utf-8").splitlines(), 1)
        if writes.search(line) and not line.lstrip().startswith("#")
    ]
    assert found == [], "write through xrec._files.write_bytes_atomic / write_text_atomic:\n" + "\n".join(found)

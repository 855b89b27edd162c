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
        write_text_atomic(target, text)  # type: ignore[arg-type]
    assert _open_descriptors() == before
    assert target.read_text() == "old"
    assert [p.name for p in tmp_path.iterdir()] == ["blend.toml"]

"""Run ``xrec serve`` in a child process and wait until it answers (for tests, benchmarks, notebooks)."""

from __future__ import annotations

import os
import socket
import subprocess
import sys
import time
import urllib.request
from collections.abc import Iterator, Mapping
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

from xrec.errors import XrecError

__all__ = ["ChildService", "free_port", "serving"]


def free_port(host: str = "127.0.0.1") -> int:
    """A TCP port that was free on ``host`` a moment ago (the OS picks it)."""
    with socket.socket() as s:
        s.bind((host, 0))
        return s.getsockname()[1]


@dataclass(frozen=True)
class ChildService:
    """A running ``xrec serve`` child: its process and the base URL it answers on."""

    process: subprocess.Popen
    url: str


def _wait_healthy(process: subprocess.Popen, url: str, timeout: float) -> None:
    # The standard library's client: httpx is only a test dependency.
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if process.poll() is not None:
            err = process.stderr.read().decode(errors="replace") if process.stderr else ""
            raise XrecError(f"xrec serve exited with code {process.returncode} before answering: {err.strip()[-2000:]}")
        try:
            with urllib.request.urlopen(f"{url}/health", timeout=1) as answer:
                if answer.status == 200:
                    return
        except OSError:  # refused while starting (URLError is an OSError), or a timeout
            time.sleep(0.1)
    raise XrecError(f"xrec serve did not answer {url}/health within {timeout:g} s")


@contextmanager
def serving(
    bundle: str | os.PathLike,
    *,
    host: str = "127.0.0.1",
    port: int | None = None,
    startup_timeout: float = 60.0,
    env: Mapping[str, str] | None = None,
    cwd: str | os.PathLike | None = None,
) -> Iterator[ChildService]:
    """Start ``python -m xrec.cli serve BUNDLE`` and yield once ``GET /health`` answers 200.

    The child is terminated (and waited for) when the block ends, also on errors.

    Parameters
    ----------
    bundle
        The bundle folder to serve.
    host, port
        Address to bind; ``port=None`` takes a free one (:func:`free_port`).
    startup_timeout
        Seconds to wait for the first healthy answer before raising
        :class:`~xrec.errors.XrecError` (which quotes the child's error output if it exited).
    env, cwd
        Environment and working folder of the child (default: this process's).
    """
    port = free_port(host) if port is None else port
    process = subprocess.Popen(
        [sys.executable, "-m", "xrec.cli", "serve", str(Path(bundle)), "--host", host, "--port", str(port)],
        cwd=cwd, env=None if env is None else dict(env), stdout=subprocess.DEVNULL, stderr=subprocess.PIPE,
    )
    url = f"http://{host}:{port}"
    try:
        _wait_healthy(process, url, startup_timeout)
        yield ChildService(process, url)
    finally:
        process.terminate()
        try:
            process.wait(10)
        except subprocess.TimeoutExpired:
            process.kill()
            process.wait(10)
        if process.stderr:
            process.stderr.close()

"""A background worker that runs one job at most once per burst of requests.

The weight mixer's slider handlers run on the kernel's main thread, once per value the
front end sends. If each handler re-evaluated the blend itself, a dragged slider would queue
dozens of evaluations in the kernel and the chart would trail the mouse by seconds. Instead a
handler only records the newest value and calls :meth:`LatestOnly.request`, which returns at
once; one worker thread runs the job whenever a request is waiting. Requests that arrive while
the job runs collapse into a single pending one, and the job reads the newest recorded
values when it starts. So, however fast values arrive: at most one evaluation runs and at most
one waits, and the last evaluation always sees the last value.
"""

from __future__ import annotations

import threading
from collections.abc import Callable


class LatestOnly:
    """Run ``job`` on one daemon thread, coalescing requests that pile up while it runs.

    Parameters
    ----------
    job
        Called with no arguments on the worker thread; it must read the newest state itself.
        Exceptions are passed to ``on_error`` (the thread keeps serving).
    on_error
        Called with the exception when ``job`` raises.
    name
        Name of the worker thread (shows in debuggers).
    """

    def __init__(self, job: Callable[[], None], on_error: Callable[[BaseException], None], name: str = "xrec-latest-only") -> None:
        self._job = job
        self._on_error = on_error
        self._name = name
        self._cond = threading.Condition()
        self._requested = False
        self._busy = False
        self._thread: threading.Thread | None = None
        self.runs = 0

    def request(self) -> None:
        """Ask for one run of the job (returns at once; merged with a run already waiting)."""
        with self._cond:
            self._requested = True
            if self._thread is None:
                self._thread = threading.Thread(target=self._serve, name=self._name, daemon=True)
                self._thread.start()
            self._cond.notify_all()

    def on_worker(self) -> bool:
        """Whether the caller runs on the worker thread (inside the job or its callbacks)."""
        return self._thread is not None and threading.current_thread() is self._thread

    def wait(self, timeout: float | None = None) -> bool:
        """Block until no run is waiting or running; ``False`` on timeout. A no-op on the worker itself."""
        if self.on_worker():
            return True
        with self._cond:
            return self._cond.wait_for(lambda: not self._requested and not self._busy, timeout)

    def _serve(self) -> None:
        while True:
            with self._cond:
                self._cond.wait_for(lambda: self._requested)
                self._requested = False
                self._busy = True
            try:
                self._job()
            except Exception as exc:  # report and keep serving: the next request may succeed
                self._on_error(exc)
            finally:
                with self._cond:
                    self.runs += 1
                    self._busy = False
                    self._cond.notify_all()


class Listeners:
    """Callbacks called with one argument, in the order added; one that raises is reported, the rest still run.

    Parameters
    ----------
    report
        Called with a message naming the callback and its error.
    """

    def __init__(self, report: Callable[[str], None]) -> None:
        self._report = report
        self._callbacks: list[Callable[[object], None]] = []

    def add(self, callback: Callable[[object], None]) -> None:
        """Register ``callback`` (a :class:`~xrec.errors.ConfigError` if it cannot be called)."""
        from xrec.errors import ConfigError

        if not callable(callback):
            raise ConfigError(f"on_change needs a callable, got {type(callback).__name__}")
        self._callbacks.append(callback)

    def call(self, value: object) -> None:
        """Call every callback with ``value``."""
        for callback in list(self._callbacks):
            try:
                callback(value)
            except Exception as exc:  # a listener's bug must not break its caller
                name = getattr(callback, "__qualname__", repr(callback))
                self._report(f"on_change callback {name} failed: {type(exc).__name__}: {exc}")

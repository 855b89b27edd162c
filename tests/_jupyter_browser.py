"""A JupyterLab server and a headless Chromium page for the browser test and its benchmark.

:class:`LabServer` starts JupyterLab on 127.0.0.1 (a free port, a random token, a private
root folder, settings and runtime folders of its own, no update or news checks) and stops
every process it started, kernels included, by process id. :func:`launch_chromium` drives
Debian's ``/usr/bin/chromium`` through Playwright (no browser download). :class:`NotebookPage`
opens a notebook, runs all its cells through JupyterLab's own command
(``notebook:run-all-cells``, reached through ``window.jupyterapp``, which the server exposes),
waits for the kernel, and reads the cells' outputs from the notebook model. The in-page probe
(:data:`PROBE_JS`) times a key press until the mixer's chart and the gallery are redrawn.

Used by ``tests/test_browser.py`` and ``benchmarks/bench_browser.py``.
"""

from __future__ import annotations

import json
import os
import secrets
import shutil
import signal
import socket
import subprocess
import sys
import time
import urllib.error
import urllib.request
from pathlib import Path
from typing import Any

CHROMIUM = "/usr/bin/chromium"
CHROMIUM_ARGS = [
    "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run", "--disable-background-networking",
    "--disable-component-update", "--disable-sync", "--disable-dev-shm-usage",
]  # fmt: skip

# DOM hooks agreed between the notebook widgets and this test.
MIXER = ".xrec-mixer"
CHART = ".xrec-mixer-chart"
GALLERY = ".xrec-gallery"
EXPLORER = ".xrec-explorer"

# JupyterLab settings for the test's own settings folder: render every cell (no windowing, so
# the cells below the fold exist in the page) and never ask about news or updates.
_SETTINGS = {
    "@jupyterlab/notebook-extension/tracker.jupyterlab-settings": {"windowingMode": "none"},
    "@jupyterlab/apputils-extension/notification.jupyterlab-settings": {"fetchNews": "false", "checkForUpdates": False},
}


def free_port() -> int:
    """A TCP port of 127.0.0.1 nobody listens on now."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as sock:
        sock.bind(("127.0.0.1", 0))
        return int(sock.getsockname()[1])


class LabServer:
    """JupyterLab on 127.0.0.1 serving ``root``, started by :meth:`start`, stopped by :meth:`stop`.

    Parameters
    ----------
    root
        Folder the server serves (notebooks are opened relative to it).
    home
        Folder for the server's settings, runtime files, log and the kernel's ``TMPDIR``.
    env
        Extra environment variables for the server and its kernels.
    """

    def __init__(self, root: Path, home: Path, env: dict[str, str] | None = None) -> None:
        self.root = Path(root)
        self.home = Path(home)
        self.extra_env = dict(env or {})
        self.port = free_port()
        self.token = secrets.token_hex(16)
        self.process: subprocess.Popen | None = None
        self.log_path = self.home / "jupyterlab.log"
        self.tmp = self.home / "tmp"
        self._pids: set[int] = set()
        self._stopped = False

    @property
    def base_url(self) -> str:
        return f"http://127.0.0.1:{self.port}"

    def url(self, path: str) -> str:
        """Address of a page or API path, with the token."""
        sep = "&" if "?" in path else "?"
        return f"{self.base_url}/{path.lstrip('/')}{sep}token={self.token}"

    def api(self, method: str, path: str, body: Any = None, timeout: float = 10.0) -> Any:
        """Call the server's REST API; the parsed JSON answer (``None`` when empty)."""
        data = None if body is None else json.dumps(body).encode()
        req = urllib.request.Request(self.url(path), data=data, method=method, headers={"Content-Type": "application/json"})
        with urllib.request.urlopen(req, timeout=timeout) as resp:
            text = resp.read().decode()
        return json.loads(text) if text.strip() else None

    def start(self, timeout: float = 90.0) -> LabServer:
        """Start the server and wait until ``/api/status`` answers."""
        settings = self.home / "lab-settings"
        for rel, values in _SETTINGS.items():
            path = settings / rel
            path.parent.mkdir(parents=True, exist_ok=True)
            path.write_text(json.dumps(values))
        for sub in ("config", "runtime", "ipython", "workspaces"):
            (self.home / sub).mkdir(parents=True, exist_ok=True)
        # No news feed (a null URL cannot be given on the command line).
        (self.home / "config" / "jupyter_lab_config.json").write_text(json.dumps({"LabApp": {"news_url": None}}))
        self.tmp.mkdir(parents=True, exist_ok=True)
        env = dict(os.environ)
        repo = str(Path(__file__).resolve().parent.parent)
        env.update(
            JUPYTER_CONFIG_DIR=str(self.home / "config"),
            JUPYTER_RUNTIME_DIR=str(self.home / "runtime"),
            IPYTHONDIR=str(self.home / "ipython"),
            TMPDIR=str(self.tmp),  # the notebook's tempfile.mkdtemp() output folder lands here
            # The kernel imports this checkout's xrec, whatever the editable install points at.
            PYTHONPATH=os.pathsep.join(p for p in (repo, env.get("PYTHONPATH", "")) if p),
        )
        env.update(self.extra_env)
        cmd = [
            sys.executable, "-m", "jupyterlab",
            "--ServerApp.ip=127.0.0.1", f"--ServerApp.port={self.port}", "--ServerApp.port_retries=0",
            f"--IdentityProvider.token={self.token}", "--ServerApp.open_browser=False", "--allow-root",
            f"--ServerApp.root_dir={self.root}",
            "--LabApp.expose_app_in_browser=True",
            "--LabApp.check_for_updates_class=jupyterlab.NeverCheckForUpdate",
            "--LabApp.extension_manager=readonly",
            f"--LabApp.user_settings_dir={settings}", f"--LabApp.workspaces_dir={self.home / 'workspaces'}",
        ]  # fmt: skip
        log = open(self.log_path, "wb")  # noqa: SIM115 (closed in stop)
        self._log = log
        self.process = subprocess.Popen(cmd, cwd=self.root, env=env, stdout=log, stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL, start_new_session=True)
        deadline = time.monotonic() + timeout
        while True:
            if self.process.poll() is not None:
                raise RuntimeError(f"JupyterLab exited with code {self.process.returncode}:\n{self.log_tail()}")
            try:
                self.api("GET", "api/status", timeout=2.0)
                return self
            except (urllib.error.URLError, ConnectionError, OSError):
                if time.monotonic() > deadline:
                    raise RuntimeError(f"JupyterLab did not answer on {self.base_url} within {timeout:.0f} s:\n{self.log_tail()}") from None
                time.sleep(0.25)

    def log_tail(self, chars: int = 4000) -> str:
        """The end of the server's log (for failure messages)."""
        try:
            return self.log_path.read_text(errors="replace")[-chars:]
        except OSError:
            return "(no log)"

    def remember_children(self) -> None:
        """Record the ids of the server's child processes (kernels run in sessions of their own)."""
        import psutil

        if self.process is None or self.process.poll() is not None:
            return
        try:
            self._pids.update(p.pid for p in psutil.Process(self.process.pid).children(recursive=True))
        except psutil.Error:
            pass

    def stop(self) -> None:
        """Shut kernels down through the API, stop the server, then end any process left, by id."""
        import psutil

        if self.process is None or self._stopped:
            return
        self._stopped = True
        self.remember_children()
        if self.process.poll() is None:
            try:
                for kernel in self.api("GET", "api/kernels", timeout=5.0) or []:
                    self.api("DELETE", f"api/kernels/{kernel['id']}", timeout=15.0)
                self.api("POST", "api/shutdown", timeout=5.0)
                self.process.wait(timeout=15.0)
            except (OSError, urllib.error.URLError, subprocess.TimeoutExpired, ValueError):
                pass
        if self.process.poll() is None:
            os.killpg(self.process.pid, signal.SIGTERM)
            try:
                self.process.wait(timeout=10.0)
            except subprocess.TimeoutExpired:
                os.killpg(self.process.pid, signal.SIGKILL)
                self.process.wait(timeout=10.0)
        left = []
        for pid in self._pids:
            try:
                proc = psutil.Process(pid)
                proc.terminate()
                left.append(proc)
            except psutil.Error:
                pass
        _gone, alive = psutil.wait_procs(left, timeout=10.0)
        for proc in alive:
            try:
                proc.kill()
            except psutil.Error:
                pass
        self._log.close()

    def alive_pids(self) -> list[int]:
        """Ids of the processes this server started that still run (empty after :meth:`stop`)."""
        import psutil

        pids = set(self._pids) | ({self.process.pid} if self.process else set())
        return sorted(p for p in pids if psutil.pid_exists(p) and psutil.Process(p).status() != psutil.STATUS_ZOMBIE)


def copy_notebook(source: Path, root: Path) -> Path:
    """Copy a notebook into the server's root folder; the copy's path."""
    root.mkdir(parents=True, exist_ok=True)
    target = root / source.name
    shutil.copyfile(source, target)
    return target


def launch_chromium(playwright: Any, executable: str = CHROMIUM) -> Any:
    """Headless Debian Chromium through Playwright (``executable_path``: no browser download)."""
    return playwright.chromium.launch(executable_path=executable, args=CHROMIUM_ARGS, headless=True)


# JS run in the page: the current notebook panel through the exposed application.
_PANEL = "(() => { const app = window.jupyterapp; const w = app && app.shell.currentWidget; return w && w.content && w.sessionContext ? w : null; })()"


class NotebookPage:
    """One notebook opened in JupyterLab in a Playwright page."""

    def __init__(self, page: Any, server: LabServer, notebook: str) -> None:
        self.page = page
        self.server = server
        self.notebook = notebook

    def open(self, timeout: float = 120.0) -> NotebookPage:
        """Load ``lab/tree/<notebook>`` and wait until its kernel is idle."""
        self.page.goto(self.server.url(f"lab/tree/{self.notebook}"), timeout=timeout * 1000)
        self.page.wait_for_function(
            f"(() => {{ const p = {_PANEL}; const k = p && p.sessionContext.session && p.sessionContext.session.kernel;"
            " return !!(k && k.status === 'idle' && p.content.widgets.length > 0); })()",
            timeout=timeout * 1000,
            polling=250,
        )
        self.server.remember_children()
        return self

    def run_all(self, timeout: float = 600.0) -> float:
        """Run every cell (JupyterLab's ``notebook:run-all-cells``); seconds until the kernel is idle after the run.

        The run ends when every code cell has an execution count, or earlier when a cell
        failed (JupyterLab then does not run the cells below it).
        """
        started = time.monotonic()
        self.page.evaluate("window.jupyterapp.commands.execute('notebook:run-all-cells')")
        self.page.wait_for_function(
            f"(() => {{ const p = {_PANEL}; if (!p) return false; const k = p.sessionContext.session.kernel;"
            " const code = p.content.widgets.filter(c => c.model.type === 'code');"
            " if (k.status !== 'idle' || code.some(c => c.promptNode.textContent.indexOf('*') >= 0)) return false;"
            # Run All stops at a failing cell: then the cells below it never get a count.
            " return code.every(c => c.model.executionCount !== null)"
            "   || code.some(c => c.model.outputs.toJSON().some(o => o.output_type === 'error')); })()",
            timeout=timeout * 1000,
            polling=500,
        )
        self.server.remember_children()
        return time.monotonic() - started

    def cells(self) -> list[dict]:
        """Every cell as the notebook model holds it: type, source, execution count, outputs (nbformat JSON)."""
        return self.page.evaluate(
            f"(() => {{ const p = {_PANEL}; return p.content.widgets.map(c => ({{type: c.model.type, source: c.model.sharedModel.getSource(),"
            " count: c.model.type === 'code' ? c.model.executionCount : null,"
            " outputs: c.model.type === 'code' ? c.model.outputs.toJSON() : []})); })()"
        )


def cell_errors(cells: list[dict]) -> list[str]:
    """Error outputs and tracebacks written to stderr, as ``cell N: ...`` lines."""
    found = []
    for i, cell in enumerate(cells):
        for out in cell["outputs"]:
            if out.get("output_type") == "error":
                found.append(f"cell {i}: {out.get('ename')}: {out.get('evalue')}")
            elif out.get("output_type") == "stream" and out.get("name") == "stderr":
                text = "".join(out.get("text", ""))
                if "Traceback" in text:
                    found.append(f"cell {i}: traceback on stderr: {text[-500:]}")
    return found


# In-page latency probe. install(): listens (capturing) for key presses and records
# performance.now() at each; a MutationObserver on the document notes the first moment after a
# key press at which the chart container holds a newly drawn chart (a canvas or svg that was
# not there at the press, or an svg whose markup changed) and at which a gallery's
# data-revision passed its value at the press; also the first change of any kind inside the
# chart container (chart_dom_ms: the kernel's new output arrived, drawing not yet done).
# Results: window.__xrecProbe.moves.
PROBE_JS = """
(sel) => {
  const chartSel = sel.chart, gallerySel = sel.gallery;
  // A vega svg is appended empty when the view starts and filled when it has run: count it
  // once it holds marks (vega's groups carry "role-" classes). A canvas cannot be inspected
  // that way and counts when it is there.
  const drawn = (root) => root ? Array.from(root.querySelectorAll('canvas, svg.marks'))
    .filter(e => e.tagName !== 'svg' || e.querySelector('[class*="role-"]')) : [];
  const chartRoot = () => document.querySelector(chartSel);
  const revision = () => Math.max(-1, ...Array.from(document.querySelectorAll(gallerySel + '[data-revision]')).map(e => Number(e.getAttribute('data-revision'))));
  const svgText = (root) => drawn(root).map(e => e.tagName === 'svg' ? e.innerHTML : '').join('');
  const probe = {moves: [], current: null};
  const check = (records) => {
    const m = probe.current;
    if (!m) return;
    const now = performance.now();
    if (m.chart_dom_ms === null) {
      const root = chartRoot();
      if (root && records.some(r => root.contains(r.target))) m.chart_dom_ms = now - m.t0;
    }
    if (m.chart_ms === null) {
      const root = chartRoot();
      const els = drawn(root);
      if (els.some(e => !m.before.has(e)) || (els.length && svgText(root) !== m.svg)) m.chart_ms = now - m.t0;
    }
    if (m.gallery_ms === null && m.rev0 !== null && revision() > m.rev0) m.gallery_ms = now - m.t0;
  };
  document.addEventListener('keydown', (ev) => {
    if (!ev.key.startsWith('Arrow')) return;
    const root = chartRoot();
    const rev = revision();
    probe.current = {key: ev.key, t0: performance.now(), before: new Set(drawn(root)), svg: svgText(root),
                     rev0: rev >= 0 ? rev : null, chart_dom_ms: null, chart_ms: null, gallery_ms: null};
    probe.moves.push(probe.current);
  }, true);
  new MutationObserver(check).observe(document.body, {subtree: true, childList: true, attributes: true, characterData: true});
  window.__xrecProbe = probe;
  return true;
}
"""


def install_probe(page: Any) -> None:
    """Install :data:`PROBE_JS` in the page (once)."""
    page.evaluate(PROBE_JS, {"chart": CHART, "gallery": GALLERY})


def probe_moves(page: Any) -> list[dict]:
    """The probe's moves so far: ``key``, ``chart_ms``, ``gallery_ms`` (``None`` until seen)."""
    moves = page.evaluate("window.__xrecProbe.moves.map(m => ({key: m.key, chart_dom_ms: m.chart_dom_ms, chart_ms: m.chart_ms, gallery_ms: m.gallery_ms, rev0: m.rev0}))")
    for move in moves:
        for key in ("chart_dom_ms", "chart_ms", "gallery_ms"):
            if move[key] is not None:
                move[key] = round(move[key], 1)
    return moves


def press_and_wait(page: Any, handle: Any, key: str, *, gallery: bool, timeout: float = 30.0) -> dict:
    """Press ``key`` on a focused slider handle and wait until the chart (and gallery) were redrawn."""
    n = page.evaluate("window.__xrecProbe.moves.length")
    handle.press(key)
    cond = "m.chart_ms !== null" + (" && m.gallery_ms !== null" if gallery else "")
    page.wait_for_function(
        f"(() => {{ const m = window.__xrecProbe.moves[{n}]; return !!(m && {cond}); }})()", timeout=timeout * 1000, polling="raf"
    )
    return probe_moves(page)[n]


def summary(values: list[float | None]) -> dict:
    """Median and max of a list of milliseconds (``None`` entries dropped), rounded to 0.1 ms."""
    import statistics

    vals = [v for v in values if v is not None]
    if not vals:
        return {"n": 0, "median_ms": None, "max_ms": None}
    return {"n": len(vals), "median_ms": round(statistics.median(vals), 1), "max_ms": round(max(vals), 1)}


def kernel_value(page: Any, expression: str, timeout: float = 30.0) -> str:
    """``repr`` of ``expression`` evaluated silently in the notebook's kernel (no new execution count)."""
    reply = page.evaluate(
        f"""async (expr) => {{
          const p = {_PANEL};
          const future = p.sessionContext.session.kernel.requestExecute(
            {{code: '', silent: true, store_history: false, user_expressions: {{v: expr}}}});
          const msg = await future.done;
          return msg.content.user_expressions.v;
        }}""",
        expression,
    )
    if reply.get("status") != "ok":
        raise RuntimeError(f"kernel could not evaluate {expression!r}: {reply.get('ename')}: {reply.get('evalue')}")
    return reply["data"]["text/plain"]


def slider_handle(page: Any, name: str) -> Any:
    """The keyboard-focusable handle of the mixer's slider labelled ``name``."""
    slider = page.locator(f"{MIXER} .widget-slider").filter(has=page.locator(".widget-label").get_by_text(name, exact=True))
    return slider.first.locator(".noUi-handle").first


def time_slider_moves(page: Any, name: str, moves: int, *, gallery: bool, kernel_seconds: str | None = None) -> dict:
    """Move slider ``name`` by ``moves`` arrow-key presses, each awaited; the latencies seen in the page.

    Each press goes one step right (left when the slider is near its top). With
    ``kernel_seconds`` (a kernel expression such as ``"mixer.last_seconds_"``) each move also
    records the seconds the kernel spent on it.

    Returns
    -------
    dict
        ``start`` and ``end`` (the handle's ``aria-valuenow``), ``per_move`` (``chart_ms``,
        ``gallery_ms``, ``chart_dom_ms``, ``kernel_ms``), and ``chart``, ``gallery``,
        ``chart_dom``, ``kernel`` summaries.
    """
    handle = slider_handle(page, name)
    handle.scroll_into_view_if_needed()
    start = float(handle.get_attribute("aria-valuenow"))
    key = "ArrowRight" if start < 0.9 else "ArrowLeft"
    install_probe(page)
    handle.focus()
    per_move = []
    for _ in range(moves):
        move = press_and_wait(page, handle, key, gallery=gallery)
        if kernel_seconds:
            move["kernel_ms"] = round(1000 * float(kernel_value(page, kernel_seconds)), 1)
        per_move.append(move)
    return {
        "start": start,
        "end": float(handle.get_attribute("aria-valuenow")),
        "per_move": per_move,
        "chart": summary([m["chart_ms"] for m in per_move]),
        "gallery": summary([m["gallery_ms"] for m in per_move]),
        "kernel": summary([m.get("kernel_ms") for m in per_move]),
        "chart_dom": summary([m["chart_dom_ms"] for m in per_move]),
    }


def page_tracebacks(page: Any) -> list[str]:
    """Tracebacks shown anywhere in the page, widget output areas included (the model holds only cell outputs)."""
    return page.evaluate(
        "Array.from(document.querySelectorAll('.jp-OutputArea-output[data-mime-type=\"application/vnd.jupyter.stderr\"],"
        " .jp-OutputArea-output[data-mime-type=\"application/vnd.jupyter.error\"]'))"
        ".map(e => e.innerText).filter(t => /Traceback|Error:/.test(t)).map(t => t.slice(-600))"
    )

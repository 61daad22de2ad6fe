"""Fixtures for the browser suite: a real JupyterLab server and headless Chromium (Playwright).

The server runs on a copy of ``example_notebooks/`` in a temporary folder, so the repository's
notebooks stay output-free.  Kernels write their connection files into the server's runtime folder;
``KernelProbe`` reads them to run code in the *same* kernel the page is driving, which lets a test
compare what the page shows with what the Study holds.
"""
from __future__ import annotations

import contextlib
import json
import os
import pathlib
import re
import shutil
import socket
import subprocess
import sys
import tempfile
import time
import urllib.error
import urllib.request

import pytest

ROOT = pathlib.Path(__file__).resolve().parents[2]
NOTEBOOKS = ROOT / "example_notebooks"
ARTIFACTS = ROOT / "tests" / "artifacts"

# Flags that keep Chromium quiet and self-contained in a container (see the project's stack notes).
CHROMIUM_ARGS = [
    "--no-sandbox",
    "--disable-gpu",
    "--disable-quic",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--disable-dev-shm-usage",
]

VISIBLE = ".jp-NotebookPanel:not(.lm-mod-hidden)"


def pytest_collection_modifyitems(config, items):
    here = pathlib.Path(__file__).parent
    for item in items:
        if here in pathlib.Path(str(item.fspath)).parents:
            item.add_marker(pytest.mark.e2e)


# ---------------------------------------------------------------------------------------------
# the server
# ---------------------------------------------------------------------------------------------
def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class LabServer:
    """A running ``jupyter lab`` on a temporary root folder."""

    def __init__(self, root: pathlib.Path, runtime: pathlib.Path, port: int, proc, log_path):
        self.root = root
        self.runtime = runtime
        self.port = port
        self.proc = proc
        self.log_path = log_path
        self.url = f"http://127.0.0.1:{port}"

    def api(self, path: str, method: str = "GET", body=None):
        """Call the server's REST API; returns decoded JSON (or None for an empty reply)."""
        data = None if body is None else json.dumps(body).encode()
        req = urllib.request.Request(self.url + path, data=data, method=method,
                                     headers={"Content-Type": "application/json"})
        with urllib.request.urlopen(req, timeout=10) as r:
            raw = r.read()
        return json.loads(raw) if raw else None

    def delete_sessions(self) -> None:
        """Shut every kernel session down, so each test starts from fresh kernels."""
        for s in self.api("/api/sessions") or []:
            with contextlib.suppress(urllib.error.URLError):
                self.api(f"/api/sessions/{s['id']}", method="DELETE")

    def kernel_for(self, notebook: str, *, timeout: float = 60) -> str:
        """Id of the kernel of the session whose path is ``notebook``."""
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            for s in self.api("/api/sessions") or []:
                if s.get("path", "").endswith(notebook) and s.get("kernel"):
                    return s["kernel"]["id"]
            time.sleep(0.3)
        raise AssertionError(f"no kernel session for {notebook} after {timeout} s")

    def probe(self, notebook: str) -> "KernelProbe":
        """A client on the kernel that runs ``notebook`` (same process, same variables)."""
        kid = self.kernel_for(notebook)
        cf = self.runtime / f"kernel-{kid}.json"
        deadline = time.monotonic() + 30
        while not cf.exists() and time.monotonic() < deadline:
            time.sleep(0.2)
        if not cf.exists():
            raise AssertionError(f"kernel connection file {cf.name} did not appear")
        return KernelProbe(cf)

    def log_tail(self, n: int = 40) -> str:
        try:
            return "\n".join(self.log_path.read_text(errors="replace").splitlines()[-n:])
        except OSError:
            return ""


class KernelProbe:
    """Run short snippets in a live kernel and return what they print."""

    def __init__(self, connection_file: pathlib.Path):
        from jupyter_client import BlockingKernelClient

        self.client = BlockingKernelClient(connection_file=str(connection_file))
        self.client.load_connection_file()
        self.client.start_channels()
        self.client.wait_for_ready(timeout=30)

    def run(self, code: str, *, timeout: float = 120) -> str:
        """Execute ``code``; returns its stdout; raises with the traceback if it failed."""
        out: list[str] = []
        err: list[str] = []

        def hook(msg):
            kind = msg["header"]["msg_type"]
            c = msg["content"]
            if kind == "stream":
                (out if c["name"] == "stdout" else err).append(c["text"])
            elif kind == "error":
                err.append("\n".join(c.get("traceback", [])) or c.get("evalue", ""))

        reply = self.client.execute_interactive(code, timeout=timeout, output_hook=hook,
                                                store_history=False)
        if reply["content"]["status"] != "ok":
            raise AssertionError("kernel code failed:\n" + _strip_ansi("".join(err)))
        return "".join(out)

    def json(self, expr: str, *, timeout: float = 120):
        """Evaluate a Python expression in the kernel and return it through JSON."""
        text = self.run(f"import json as _j; print('@@' + _j.dumps({expr}, default=str))",
                        timeout=timeout)
        line = [ln for ln in text.splitlines() if ln.startswith("@@")][-1]
        return json.loads(line[2:])

    def close(self) -> None:
        self.client.stop_channels()


def _strip_ansi(text: str) -> str:
    return re.sub(r"\x1b\[[0-9;]*m", "", text)


@pytest.fixture(scope="session")
def lab(tmp_path_factory):
    """A JupyterLab server on a temporary copy of the example notebooks."""
    base = tmp_path_factory.mktemp("lab")
    root = base / "root"
    shutil.copytree(NOTEBOOKS, root, ignore=shutil.ignore_patterns(".ipynb_checkpoints", "*.json"))
    runtime = base / "runtime"
    settings = base / "settings"
    runtime.mkdir()
    # No news poll and no first-run toasts: they would cover the page in screenshots.
    plugin = settings / "@jupyterlab" / "apputils-extension"
    plugin.mkdir(parents=True)
    (plugin / "notification.jupyterlab-settings").write_text(
        json.dumps({"fetchNews": "false", "checkForUpdates": False}))
    # keep every cell in the DOM: with windowing, cells out of view are detached and unlocatable
    nb_plugin = settings / "@jupyterlab" / "notebook-extension"
    nb_plugin.mkdir(parents=True)
    (nb_plugin / "tracker.jupyterlab-settings").write_text(json.dumps({"windowingMode": "none"}))
    env = dict(os.environ)
    env.update(JUPYTER_RUNTIME_DIR=str(runtime), JUPYTERLAB_SETTINGS_DIR=str(settings),
               JUPYTERLAB_WORKSPACES_DIR=str(base / "workspaces"), PYTHONUNBUFFERED="1")
    # the kernel imports the project from this checkout even without an install
    env["PYTHONPATH"] = os.pathsep.join(filter(None, [str(ROOT), env.get("PYTHONPATH")]))
    port = _free_port()
    log_path = base / "lab.log"
    log = open(log_path, "wb")
    cmd = [sys.executable, "-m", "jupyter", "lab", "--ip=127.0.0.1", f"--port={port}",
           "--no-browser", "--allow-root", "--IdentityProvider.token=",
           "--ServerApp.password=", "--ServerApp.disable_check_xsrf=True",
           f"--ServerApp.root_dir={root}", "--LabApp.news_url=", "--ServerApp.open_browser=False"]
    proc = subprocess.Popen(cmd, stdout=log, stderr=subprocess.STDOUT, env=env, cwd=str(root))
    server = LabServer(root, runtime, port, proc, log_path)
    deadline = time.monotonic() + 90
    while True:
        if proc.poll() is not None:
            log.close()
            pytest.fail("jupyter lab exited at start:\n" + server.log_tail())
        try:
            server.api("/api/status")
            break
        except (urllib.error.URLError, ConnectionError, OSError):
            if time.monotonic() > deadline:
                proc.terminate()
                pytest.fail("jupyter lab did not answer /api/status in 90 s:\n" + server.log_tail())
            time.sleep(0.3)
    yield server
    with contextlib.suppress(Exception):
        server.delete_sessions()
    proc.terminate()
    try:
        proc.wait(timeout=15)
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.wait(timeout=5)
    log.close()


# ---------------------------------------------------------------------------------------------
# the browser
# ---------------------------------------------------------------------------------------------
def chromium_path() -> str:
    path = shutil.which("chromium") or shutil.which("chromium-browser")
    if not path and os.path.exists("/usr/bin/chromium"):
        path = "/usr/bin/chromium"
    if not path:
        pytest.fail("The browser suite needs Chromium: install it with `apt-get install -y "
                    "chromium` (Debian/Ubuntu) so that `chromium` is on PATH. Playwright's own "
                    "browser download is not used.", pytrace=False)
    return path


@pytest.fixture(scope="session")
def browser_context():
    """A headless Chromium context (persistent profile in a temporary folder)."""
    exe = chromium_path()
    from playwright.sync_api import sync_playwright

    profile = tempfile.mkdtemp(prefix="afterfit-chromium-")
    with sync_playwright() as p:
        ctx = p.chromium.launch_persistent_context(
            user_data_dir=profile, executable_path=exe, headless=True, args=CHROMIUM_ARGS,
            viewport={"width": 1500, "height": 1100})
        ctx.set_default_timeout(30_000)
        try:
            yield ctx
        finally:
            ctx.close()
    shutil.rmtree(profile, ignore_errors=True)


@pytest.hookimpl(wrapper=True, tryfirst=True)
def pytest_runtest_makereport(item, call):
    report = yield
    if report.when == "call" and report.failed:
        args = [getattr(v, "page", v) for v in getattr(item, "funcargs", {}).values()]
        pages = [v for v in args if hasattr(v, "screenshot")]
        for pg in pages[:1]:
            with contextlib.suppress(Exception):
                shot(pg, f"FAILED-{item.name}")
    return report


@pytest.fixture
def page(browser_context, lab):
    """A fresh page; kernels of earlier tests are shut down first."""
    lab.delete_sessions()
    pg = browser_context.new_page()
    errors: list[str] = []
    pg.on("pageerror", lambda e: errors.append(str(e)))
    pg.page_errors = errors  # type: ignore[attr-defined]
    yield pg
    pg.close()
    lab.delete_sessions()


# ---------------------------------------------------------------------------------------------
# helpers used by the tests
# ---------------------------------------------------------------------------------------------
def shot(page, name: str) -> pathlib.Path:
    """Save a full-page screenshot as tests/artifacts/<name>.png and return its path."""
    ARTIFACTS.mkdir(parents=True, exist_ok=True)
    path = ARTIFACTS / f"{name}.png"
    page.screenshot(path=str(path), full_page=False)
    return path


def open_notebook(page, lab, name: str, *, timeout: float = 90_000):
    """Open ``name`` in a reset workspace, close the file browser, wait for an idle kernel."""
    page.goto(f"{lab.url}/lab/tree/{name}?reset", timeout=timeout)
    page.wait_for_selector(f"{VISIBLE} .jp-Cell", timeout=timeout)
    dismiss_toasts(page)
    wait_idle(page, timeout=timeout)
    # more room for the workbench in screenshots
    if page.locator("#jp-left-stack:not(.lm-mod-hidden)").count():
        page.locator(f"{VISIBLE} .jp-Notebook").first.click(position={"x": 5, "y": 5})
        page.keyboard.press("Control+b")


def dismiss_toasts(page) -> None:
    for btn in page.locator(".jp-toast-button:has-text('No'), .Toastify__close-button").all():
        with contextlib.suppress(Exception):
            btn.click(timeout=1000)


def kernel_status(page) -> str:
    """The kernel status text from the status bar (e.g. 'Python 3 (ipykernel) | Idle')."""
    loc = page.locator(".jp-StatusBar-TextItem:has-text('|')")
    with contextlib.suppress(Exception):
        return loc.first.inner_text(timeout=1000)
    return ""


def wait_idle(page, *, timeout: float = 120_000, settle: float = 0.6) -> None:
    """Wait until the status bar reads Idle and no cell shows a pending ``[*]`` prompt."""
    deadline = time.monotonic() + timeout / 1000
    stable_since = None
    while time.monotonic() < deadline:
        status = kernel_status(page)
        busy = page.locator(f"{VISIBLE} .jp-InputPrompt:has-text('[*]')").count()
        if status.strip().endswith("Idle") and busy == 0:
            stable_since = stable_since or time.monotonic()
            if time.monotonic() - stable_since >= settle:
                return
        else:
            stable_since = None
        time.sleep(0.2)
    raise AssertionError(f"kernel not idle after {timeout / 1000:.0f} s (status {status!r})")


def run_all(page, *, timeout: float = 180_000) -> None:
    """Run > Run All Cells, then wait for the kernel to finish."""
    page.locator(f"{VISIBLE} .jp-Notebook").first.click(position={"x": 5, "y": 5})
    page.locator(".lm-MenuBar-itemLabel:text-is('Run')").click()
    page.locator(".lm-Menu-itemLabel:text-is('Run All Cells')").click()
    # give the kernel a moment to pick the cells up before polling for idle
    page.wait_for_timeout(800)
    wait_idle(page, timeout=timeout)


def cell_errors(page) -> list[str]:
    """Text of any traceback shown in the visible notebook."""
    return [t.inner_text() for t in page.locator(f"{VISIBLE} .jp-RenderedText[data-mime-type="
                                                 "'application/vnd.jupyter.stderr']").all()
            if "Traceback" in t.inner_text() or "Error" in t.inner_text()]


def cells(page):
    return page.locator(f"{VISIBLE} .jp-Notebook .jp-Cell")


def reports(request):
    """A per-session list where tests leave figures (e.g. latencies) for the terminal summary."""
    return request.config.stash.setdefault(_REPORT_KEY, [])


_REPORT_KEY = pytest.StashKey[list]()


def pytest_terminal_summary(terminalreporter, exitstatus, config):
    lines = config.stash.get(_REPORT_KEY, [])
    if lines:
        terminalreporter.section("afterfit browser measurements")
        for ln in lines:
            terminalreporter.write_line(ln)

"""Helpers for the browser suite: the JupyterLab server, a client on a kernel, page actions.

The fixtures that start the server and the browser are in ``conftest.py``; this module holds what
the tests call directly (imported by name, so it has a name no other test folder uses).
"""
from __future__ import annotations

import contextlib
import json
import os
import pathlib
import re
import shutil
import socket
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

# ---------------------------------------------------------------------------------------------
def free_port() -> int:
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

def chromium_path() -> str:
    path = shutil.which("chromium") or shutil.which("chromium-browser")
    if not path and os.path.exists("/usr/bin/chromium"):
        path = "/usr/bin/chromium"
    if not path:
        pytest.fail("The browser suite needs Chromium: install it with `apt-get install -y "
                    "chromium` (Debian/Ubuntu) so that `chromium` is on PATH. Playwright's own "
                    "browser download is not used.", pytrace=False)
    return path


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
    return request.config.stash.setdefault(REPORT_KEY, [])


REPORT_KEY = pytest.StashKey[list]()


def until(fn, *, timeout: float = 60, what: str = "condition"):
    """Poll ``fn`` until it returns something true (returned), or fail after ``timeout`` s."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        value = fn()
        if value:
            return value
        time.sleep(0.3)
    raise AssertionError(f"timed out after {timeout:.0f} s waiting for {what}")


def settle(probe, name: str = "w", *, timeout: float = 120) -> None:
    """Wait until the kernel's Explorer ``name`` has no queued action and stopped refreshing."""
    deadline = time.monotonic() + timeout
    last = None
    while time.monotonic() < deadline:
        busy, count = probe.json(f"[{name}.busy, {name}.refresh_count]")
        if not busy and count == last:
            return
        last = count if not busy else None
        time.sleep(0.6)
    raise AssertionError(f"the Explorer was still busy after {timeout} s")


# ---------------------------------------------------------------------------------------------
# generated notebooks and workbench actions shared by the scenario tests
# ---------------------------------------------------------------------------------------------
KERNELSPEC = {"kernelspec": {"name": "python3", "display_name": "Python 3 (ipykernel)",
                             "language": "python"}}


def write_notebook(lab, name: str, *sources: str) -> str:
    """Write a notebook of code cells ``sources`` into the server's root; returns ``name``."""
    import nbformat

    nb = nbformat.v4.new_notebook(metadata=KERNELSPEC)
    nb.cells = [nbformat.v4.new_code_cell(s) for s in sources]
    nbformat.write(nb, str(lab.root / name))
    return name


def code_cell(page, marker: str):
    """The visible notebook's first code cell whose source contains ``marker``."""
    editor = page.locator(".jp-InputArea-editor", has_text=marker)
    return page.locator(f"{VISIBLE} .jp-CodeCell", has=editor).first


def brush(page, figure, *, x=(0.45, 0.70), y=(0.20, 0.80)) -> None:
    """Drag a brush over a bqplot figure, from/to fractions of its plot area (0 = left/top)."""
    figure.scroll_into_view_if_needed()
    box = figure.locator("rect.overlay").first.bounding_box()
    assert box, "the panel has no brush overlay"
    page.mouse.move(box["x"] + x[0] * box["width"], box["y"] + y[0] * box["height"])
    page.mouse.down()
    page.mouse.move(box["x"] + x[1] * box["width"], box["y"] + y[1] * box["height"], steps=12)
    page.mouse.up()


def rows_in_brush(probe, key: str, name: str = "w") -> list[int]:
    """Rows inside panel ``key``'s brushed range, from the Study's fit and data (not the grid's
    drawn arrays, which may be a sample)."""
    column = None if key == "fitted" else key[4:]
    probe.run(f"""
_p = {name}.grid.panels[{key!r}]
_x0, _x1 = sorted(float(v) for v in _p.brush.selected_x)
_y0, _y1 = sorted(float(v) for v in _p.brush.selected_y)
_f = {name}.study.fit
_x = _f.fitted if {column!r} is None else {name}.study.data.loc[_f.resid.index, {column!r}]
_m = (_x >= _x0) & (_x <= _x1) & (_f.resid >= _y0) & (_f.resid <= _y1)
""")
    return probe.json("sorted(int(i) for i in _f.resid.index[_m.to_numpy()])")


def strip_terms(workbench) -> list[str]:
    """The terms on the workbench's model strip, as the page shows them."""
    return [t.get_attribute("data-term")
            for t in workbench.locator(".afterfit-strip .afterfit-term").all()]


def drag_chip(workbench, selector: str = ".afterfit-chip") -> str:
    """Drag the first tray chip matching ``selector`` onto the model strip; returns its term."""
    chip = workbench.locator(selector).first
    if not chip.count():
        pytest.fail(f"no candidate chip matches {selector!r} in the tray")
    term = chip.get_attribute("data-term")
    chip.scroll_into_view_if_needed()
    chip.drag_to(workbench.locator(".afterfit-strip").first)
    return term


def saved_sources(path, n: int):
    """The cells' sources of the notebook file at ``path`` once it has ``n`` cells, else None."""
    import nbformat

    try:
        nb = nbformat.read(str(path), as_version=4)
    except Exception:  # mid-write
        return None
    return [c.source for c in nb.cells] if len(nb.cells) == n else None


def parse_series(text: str) -> dict:
    """``{name: value}`` from a printed pandas Series of floats (the ``dtype:`` line skipped)."""
    out = {}
    for line in text.strip().splitlines():
        if line.startswith("dtype:"):
            continue
        name, _, value = line.rstrip().rpartition(" ")
        try:
            out[name.strip()] = float(value)
        except ValueError:
            continue
    return out

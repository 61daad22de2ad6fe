"""Fixtures for the browser suite: a real JupyterLab server and headless Chromium (Playwright).

The server runs on a copy of ``example_notebooks/`` in a temporary folder, so the repository's
notebooks stay output-free.  Kernels write their connection files into the server's runtime folder;
``harness.KernelProbe`` reads them to run code in the *same* kernel the page is driving, which lets
a test compare what the page shows with what the Study holds.
"""
from __future__ import annotations

import contextlib
import json
import os
import pathlib
import shutil
import subprocess
import sys
import tempfile
import time
import urllib.error

import pytest

from harness import (CHROMIUM_ARGS, NOTEBOOKS, REPORT_KEY, ROOT, LabServer, free_port,
                     chromium_path, shot)


def pytest_collection_modifyitems(config, items):
    here = pathlib.Path(__file__).parent
    for item in items:
        if here in pathlib.Path(str(item.fspath)).parents:
            item.add_marker(pytest.mark.e2e)


# ---------------------------------------------------------------------------------------------
# the server

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
    port = free_port()
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

def pytest_terminal_summary(terminalreporter, exitstatus, config):
    lines = config.stash.get(REPORT_KEY, [])
    if lines:
        terminalreporter.section("afterfit browser measurements")
        for ln in lines:
            terminalreporter.write_line(ln)

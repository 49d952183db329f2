"""Fixtures for the browser tests: one JupyterLab server and one headless chromium per session.

The server runs on 127.0.0.1 with a free port, a random token and temporary Jupyter config, data and
runtime folders, so nothing of the user's own Jupyter set-up leaks in. Chromium is Debian's (found on
PATH); Playwright never downloads a browser. JupyterLab is loaded once; each test opens its own
notebook in it. The browser cannot leave the machine (its proxy is a closed loopback port, which
loopback addresses bypass) and every attempt to reach another host is recorded, so the whole suite
runs offline, as in a secure data enclave.
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
import threading
import time
import urllib.error
import urllib.request
from dataclasses import dataclass, field
from pathlib import Path

import pytest

from .helpers import is_loopback

ARTIFACTS = Path(__file__).parent / "artifacts"

CHROMIUM_FLAGS = [
    "--no-sandbox",
    "--disable-gpu",
    "--disable-quic",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
]

def _unavailable(reason: str):
    """Skip, or fail when the environment demands a browser (STRATAGEM_REQUIRE_BROWSER=1)."""
    if os.environ.get("STRATAGEM_REQUIRE_BROWSER") == "1":
        pytest.fail(f"{reason} (STRATAGEM_REQUIRE_BROWSER=1 makes this a failure)", pytrace=False)
    pytest.skip(reason)


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@dataclass
class LabServer:
    """A running JupyterLab: its base URL, token, served folder and process."""

    url: str
    token: str
    root: Path
    process: subprocess.Popen
    log: Path

    def api(self, path: str, method: str = "GET"):
        req = urllib.request.Request(
            f"{self.url}{path}", method=method, headers={"Authorization": f"token {self.token}"}
        )
        with urllib.request.urlopen(req, timeout=10) as resp:
            body = resp.read()
        return json.loads(body) if body else None

    def shutdown_kernels(self) -> None:
        """Delete every session (and so its kernel): keeps the 2-core machine free between tests."""
        try:
            for session in self.api("/api/sessions"):
                self.api(f"/api/sessions/{session['id']}", method="DELETE")
        except (urllib.error.URLError, OSError):
            pass


@pytest.fixture(scope="session")
def chromium_path() -> str:
    path = shutil.which("chromium") or shutil.which("chromium-browser")
    if not path:
        _unavailable("Debian's chromium is not on PATH; install it with `apt-get install -y chromium`")
    try:
        import playwright.sync_api  # noqa: F401
    except ImportError:
        _unavailable("playwright for Python is not installed; `pip install playwright` (no browser download)")
    try:
        import jupyterlab  # noqa: F401
    except ImportError:
        _unavailable("jupyterlab is not installed")
    return path


@pytest.fixture(scope="session")
def lab_server(chromium_path, tmp_path_factory) -> LabServer:
    base = tmp_path_factory.mktemp("jupyter")
    root = base / "root"
    root.mkdir()
    env = dict(os.environ)
    for name in ("config", "data", "runtime"):
        (base / name).mkdir()
        env[f"JUPYTER_{name.upper()}_DIR"] = str(base / name)
    labconfig = base / "config" / "labconfig"
    labconfig.mkdir()
    (labconfig / "page_config.json").write_text(
        json.dumps({"disabledExtensions": {"@jupyterlab/apputils-extension:announcements": True}})
    )
    env.pop("JUPYTER_TOKEN", None)
    port, token = _free_port(), secrets.token_hex(24)
    log = base / "lab.log"
    cmd = [
        sys.executable, "-m", "jupyter", "lab", "--allow-root", "--no-browser",
        "--ip=127.0.0.1", f"--port={port}", "--ServerApp.port_retries=0",
        f"--IdentityProvider.token={token}", f"--ServerApp.root_dir={root}",
        "--LabApp.expose_app_in_browser=True", "--LabApp.news_url=None",
        "--LabApp.check_for_updates_class=jupyterlab.NeverCheckForUpdate",
    ]
    with open(log, "wb") as out:
        proc = subprocess.Popen(cmd, env=env, cwd=root, stdout=out, stderr=subprocess.STDOUT,
                                start_new_session=True)
    server = LabServer(f"http://127.0.0.1:{port}", token, root, proc, log)
    try:
        deadline = time.monotonic() + 60
        while True:
            if proc.poll() is not None:
                pytest.fail(f"JupyterLab exited with code {proc.returncode}:\n{log.read_text()[-3000:]}")
            try:
                server.api("/api/status")
                break
            except (urllib.error.URLError, OSError, ValueError):
                if time.monotonic() > deadline:
                    pytest.fail(f"JupyterLab did not answer within 60 s:\n{log.read_text()[-3000:]}")
                time.sleep(0.25)
        yield server
    finally:
        # The server was started in its own process group: stop it (and its kernels) by that id.
        try:
            os.killpg(proc.pid, signal.SIGTERM)
            proc.wait(timeout=15)
        except (ProcessLookupError, subprocess.TimeoutExpired):
            try:
                os.killpg(proc.pid, signal.SIGKILL)
            except ProcessLookupError:
                pass
            proc.wait(timeout=5)


@dataclass
class NetworkLog:
    """Requests the browser made (or tried to make) to non-loopback hosts."""

    requests: list[str] = field(default_factory=list)
    websockets: list[str] = field(default_factory=list)

    def mark(self) -> tuple[int, int]:
        return len(self.requests), len(self.websockets)

    def since(self, mark: tuple[int, int]) -> list[str]:
        return self.requests[mark[0]:] + self.websockets[mark[1]:]


@pytest.fixture(scope="session")
def network_log() -> NetworkLog:
    return NetworkLog()


@pytest.fixture(scope="session")
def browser_context(chromium_path, lab_server, network_log, tmp_path_factory):
    """One chromium for the session, with no way out: its proxy is a closed loopback port (loopback
    itself bypasses proxies), and every attempt to reach another host is recorded."""
    from playwright.sync_api import sync_playwright

    user_dir = tmp_path_factory.mktemp("chromium")
    with sync_playwright() as p:
        context = p.chromium.launch_persistent_context(
            str(user_dir),
            executable_path=chromium_path,
            headless=True,
            # Chromium's own proxy flags: Playwright's proxy option would also proxy loopback.
            args=CHROMIUM_FLAGS + [f"--proxy-server=http://127.0.0.1:{_free_port()}",
                                   "--proxy-bypass-list=127.0.0.1;localhost;[::1]"],
            viewport={"width": 1400, "height": 1000},
        )

        def on_request(request):
            if not is_loopback(request.url):
                network_log.requests.append(request.url)

        context.on("request", on_request)
        context.on("page", lambda page: page.on(
            "websocket",
            lambda ws: None if is_loopback(ws.url) else network_log.websockets.append(ws.url),
        ))
        try:
            yield context
        finally:
            context.close()


def _start_lab(page, server) -> None:
    page.goto(f"{server.url}/lab/workspaces/e2e?reset&token={server.token}")
    page.wait_for_function("() => window.jupyterapp && window.jupyterapp.shell && "
                           "document.querySelector('.jp-LabShell') !== null", timeout=90_000)
    page.wait_for_function("() => window.jupyterapp.serviceManager.isReady", timeout=60_000)
    # Give notebooks the window's width (the file browser would take a fifth of it).
    page.evaluate("() => window.jupyterapp.shell.collapseLeft()")


@pytest.fixture(scope="session")
def lab_page(browser_context, lab_server):
    """JupyterLab loaded once for the session; tests open their notebooks in it."""
    pg = browser_context.new_page()
    pg.set_default_timeout(30_000)
    console: list[str] = []
    pg.on("console", lambda m: console.append(f"{m.type}: {m.text}") if m.type == "error" else None)
    pg.on("pageerror", lambda e: console.append(f"pageerror: {e}"))
    pg.sg_console = console  # read by tests to explain a failure
    _start_lab(pg, lab_server)
    yield pg
    pg.close()


@pytest.fixture
def page(lab_page, lab_server, request):
    """The session's JupyterLab page, with no document open; after the test its documents are
    closed and its kernels shut down (in the background, so the next test need not wait)."""
    yield lab_page
    failed = getattr(request.node, "rep_call", None) is not None and request.node.rep_call.failed
    if failed:
        ARTIFACTS.mkdir(exist_ok=True)
        shot = ARTIFACTS / f"failed-{request.node.name}.png"
        try:
            lab_page.screenshot(path=str(shot))
            print(f"\nscreenshot of the failure: {shot}\nbrowser errors: {lab_page.sg_console[-10:]}")
        except Exception:  # noqa: BLE001 - a screenshot is a courtesy, never the failure
            pass
    try:
        lab_page.unroute_all(behavior="ignoreErrors")
        lab_page.evaluate("() => { for (const w of Array.from(window.jupyterapp.shell.widgets('main')))"
                          " w.dispose(); }")
    except Exception:  # noqa: BLE001 - a broken page is rebuilt below
        failed = True
    threading.Thread(target=lab_server.shutdown_kernels, daemon=True).start()
    if failed:
        _start_lab(lab_page, lab_server)


@pytest.hookimpl(hookwrapper=True, tryfirst=True)
def pytest_runtest_makereport(item, call):
    outcome = yield
    rep = outcome.get_result()
    setattr(item, f"rep_{rep.when}", rep)


@pytest.fixture(scope="session")
def artifacts() -> Path:
    ARTIFACTS.mkdir(exist_ok=True)
    return ARTIFACTS

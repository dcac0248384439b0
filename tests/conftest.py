"""Shared fixtures: a Streamlit server for the page and a headless Debian Chromium (browser tests).

Browser tests are marked ``@pytest.mark.browser``; they are skipped with a
reason when ``/usr/bin/chromium`` or Playwright is missing.  The server is
started with our own interpreter on a port the OS picks (``--server.port 0``)
on 127.0.0.1, its own records database (``SURFACES_DB``) and limits folder
(``SURFACES_HOME``) in a temporary folder, and stopped by its pid only.
"""

from __future__ import annotations

import os
import re
import subprocess
import sys
import time
import urllib.request
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
CHROMIUM = Path("/usr/bin/chromium")
CHROMIUM_ARGS = [
    "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
    "--disable-background-networking", "--disable-component-update", "--disable-sync",
    "--disable-dev-shm-usage",
]  # fmt: skip
READY = ('[data-testid="stApp"][data-test-connection-state="CONNECTED"]'
         '[data-test-script-state="notRunning"]')


def _stop(proc: subprocess.Popen) -> None:
    """Stop only the process we started."""
    if proc.poll() is None:
        proc.terminate()
        try:
            proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait(timeout=10)


def start_streamlit(app: Path, log: Path, *, env: dict, timeout: float = 90.0):
    """Start ``streamlit run app`` on 127.0.0.1 and a free port; returns (process, url)."""
    cmd = [sys.executable, "-m", "streamlit", "run", str(app),
           "--server.headless", "true", "--server.port", "0", "--server.address", "127.0.0.1",
           "--browser.gatherUsageStats", "false", "--server.fileWatcherType", "none",
           "--server.maxUploadSize", "60", "--client.toolbarMode", "minimal"]  # fmt: skip
    with log.open("w") as fh:
        proc = subprocess.Popen(cmd, cwd=ROOT, stdout=fh, stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL,
                                env=env)
    deadline, url = time.monotonic() + timeout, None
    while time.monotonic() < deadline:
        if proc.poll() is not None:
            raise RuntimeError(f"streamlit exited {proc.returncode}:\n{log.read_text()}")
        if url is None and (m := re.search(r"URL: (http://127\.0\.0\.1:\d+)", log.read_text())):
            url = m.group(1)
        if url:
            try:
                if urllib.request.urlopen(url + "/_stcore/health", timeout=2).read() == b"ok":
                    return proc, url
            except OSError:
                pass
        time.sleep(0.1)
    _stop(proc)
    raise TimeoutError(log.read_text())


@pytest.fixture(scope="session")
def page_home(tmp_path_factory) -> Path:
    """A folder holding the page server's records database and limit sets."""
    return tmp_path_factory.mktemp("page_home")


@pytest.fixture(scope="session")
def streamlit_url(tmp_path_factory, page_home):
    if not CHROMIUM.exists():
        pytest.skip(f"{CHROMIUM} is not installed (Debian package 'chromium'); browser tests need it")
    env = dict(os.environ, SURFACES_DB=str(page_home / "records.sqlite3"), SURFACES_HOME=str(page_home))
    proc, url = start_streamlit(ROOT / "ui" / "app.py", tmp_path_factory.mktemp("st") / "streamlit.log", env=env)
    try:
        yield url
    finally:
        _stop(proc)


@pytest.fixture(scope="session")
def browser():
    if not CHROMIUM.exists():
        pytest.skip(f"{CHROMIUM} is not installed (Debian package 'chromium'); browser tests need it")
    sync_api = pytest.importorskip("playwright.sync_api", reason="the Python package 'playwright' is not installed")
    sync_api.expect.set_options(timeout=30_000)
    with sync_api.sync_playwright() as p:
        b = p.chromium.launch(executable_path=str(CHROMIUM), headless=True, args=CHROMIUM_ARGS)
        yield b
        b.close()


@pytest.fixture
def page(browser, streamlit_url):
    """A fresh browser context (a new page session) on the running page, after its first run."""
    ctx = browser.new_context(viewport={"width": 1400, "height": 1000}, accept_downloads=True)
    pg = ctx.new_page()
    pg.set_default_timeout(60_000)
    pg.goto(streamlit_url, wait_until="domcontentloaded")
    pg.wait_for_selector(READY)
    yield pg
    ctx.close()


@pytest.fixture(scope="session")
def screenshot_dir(tmp_path_factory) -> Path:
    """``$SURFACES_SCREENSHOTS`` or a temporary folder."""
    env = os.environ.get("SURFACES_SCREENSHOTS")
    d = Path(env) if env else tmp_path_factory.mktemp("screenshots")
    d.mkdir(parents=True, exist_ok=True)
    return d


def full_screenshot(page, path: Path, width: int = 1400) -> None:
    """Screenshot of the whole page once the run is over: the main area scrolls, not the document."""
    from playwright.sync_api import expect

    expect(page.get_by_test_id("stApp")).to_have_attribute("data-test-script-state", "notRunning")
    expect(page.locator('[data-stale="true"]')).to_have_count(0)
    h = page.evaluate("document.querySelector('[data-testid=stMain]').scrollHeight")
    page.set_viewport_size({"width": width, "height": max(600, min(int(h) + 40, 16000))})
    page.screenshot(path=str(path))

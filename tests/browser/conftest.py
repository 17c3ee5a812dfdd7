"""The operator page in a real browser: Debian's chromium driven by Playwright, against a real
``phaseward serve`` on a free loopback port with a data directory of its own.

The browser tests skip, saying why, only when /usr/bin/chromium or the playwright package is
missing; CI installs both. Playwright's own browser downloads are never used.
"""

from __future__ import annotations

import importlib.util
import os
import socket
import subprocess
import sys
import time
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING

import httpx
import pytest

if TYPE_CHECKING:
    from playwright.sync_api import Page, Playwright

CHROMIUM = Path("/usr/bin/chromium")
CHROMIUM_ARGS = [
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-quic",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
]
ARTIFACTS = Path(__file__).resolve().parents[2] / "test-artifacts"


@pytest.hookimpl(wrapper=True)
def pytest_runtest_makereport(item: pytest.Item, call: pytest.CallInfo[None]) -> Iterator[None]:
    """Keep each phase's report on the test, so the page fixture knows whether it failed."""
    report = yield
    setattr(item, f"report_{call.when}", report)
    return report


def missing_browser() -> str | None:
    """Why the browser tests cannot run here, or None."""
    if not CHROMIUM.exists():
        return f"needs Debian's chromium at {CHROMIUM} (apt-get install -y chromium)"
    if importlib.util.find_spec("playwright") is None:
        return "needs the playwright package (pip install playwright; no 'playwright install')"
    return None


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port: int = s.getsockname()[1]
        return port


@pytest.fixture
def server(tmp_path: Path) -> Iterator[str]:
    """Base URL of a real ``phaseward serve`` with a fresh SQLite database."""
    port = free_port()
    data = tmp_path / "data"
    data.mkdir()
    env = os.environ | {
        "PHASEWARD_DATA_DIR": str(data),
        "PHASEWARD_PORT": str(port),
        "PHASEWARD_HOST": "127.0.0.1",
        "PHASEWARD_LOG_LEVEL": "warning",
        "PHASEWARD_AUTH_MODE": "open",
        "PHASEWARD_FUTURE_SKEW_S": "1e8",  # invented test data is dated 2027
    }
    env.pop("PHASEWARD_DATABASE_URL", None)
    proc = subprocess.Popen([sys.executable, "-m", "phaseward.cli", "serve"], env=env)
    base = f"http://127.0.0.1:{port}"
    try:
        deadline = time.monotonic() + 30
        while True:
            try:
                if httpx.get(f"{base}/healthz", timeout=1).status_code == 200:
                    break
            except httpx.TransportError:
                pass
            assert proc.poll() is None, "server exited"
            assert time.monotonic() < deadline, "server did not come up"
            time.sleep(0.1)
        yield base
    finally:
        proc.terminate()
        proc.wait(timeout=20)


@pytest.fixture
def api(server: str) -> Iterator[httpx.Client]:
    with httpx.Client(base_url=server, timeout=30) as client:
        yield client


@pytest.fixture
def playwright() -> Iterator[Playwright]:
    """Playwright's driver, per test: its event loop must not outlive the test (the service
    tests run their own loops)."""
    reason = missing_browser()
    if reason is not None:
        pytest.skip(reason)
    from playwright.sync_api import sync_playwright

    with sync_playwright() as p:
        yield p


@dataclass
class Watched:
    """What the page did besides rendering: every request, console errors, script errors."""

    requests: list[str] = field(default_factory=list)
    console_errors: list[str] = field(default_factory=list)
    page_errors: list[str] = field(default_factory=list)

    def console(self, kind: str, text: str) -> None:
        if kind == "error":
            self.console_errors.append(text)


@pytest.fixture
def watched() -> Watched:
    return Watched()


@pytest.fixture
def artifacts() -> Path:
    """Where screenshots go (gitignored; CI may keep them)."""
    ARTIFACTS.mkdir(exist_ok=True)
    return ARTIFACTS


@pytest.fixture
def page(
    playwright: Playwright, tmp_path: Path, watched: Watched, request: pytest.FixtureRequest
) -> Iterator[Page]:
    """A page in a fresh Chromium profile (its own user-data-dir), watched for errors; when
    the test fails, its last view is saved to test-artifacts/ for the CI log."""
    profile = tmp_path / "chromium-profile"
    context = playwright.chromium.launch_persistent_context(
        str(profile),
        executable_path=str(CHROMIUM),
        headless=True,
        args=CHROMIUM_ARGS,
        viewport={"width": 1360, "height": 900},
        locale="en-GB",
        timezone_id="UTC",
    )
    try:
        page = context.new_page()
        page.set_default_timeout(15_000)
        page.on("request", lambda r: watched.requests.append(r.url))
        page.on("console", lambda m: watched.console(m.type, m.text))
        page.on("pageerror", lambda e: watched.page_errors.append(str(e)))
        yield page
        report = getattr(request.node, "report_call", None)
        if report is not None and report.failed:
            ARTIFACTS.mkdir(exist_ok=True)
            name = "".join(c if c.isalnum() or c in "-_" else "_" for c in request.node.name)
            page.screenshot(path=str(ARTIFACTS / f"failed-{name}.png"), full_page=True)
    finally:
        context.close()

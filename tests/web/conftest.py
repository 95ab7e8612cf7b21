"""Browser tests of the web pages: the real app on loopback, a real store, a real Chromium.

The store is a SQLite file filled the way production fills it: the fixture sample is ingested
with ``store.events.ingest`` and the windows are closed by the real pipeline
(``close_due_windows(..., drain=True)``); nothing is written into the store by hand. The app
runs under uvicorn in a thread; Debian's headless Chromium is driven through chromedriver.
"""

from __future__ import annotations

import json
import os
import socket
import threading
import time
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

import pytest

from rolewatch.clock import now_micros

ROOT = Path(__file__).resolve().parents[2]
SAMPLE = ROOT / "fixtures" / "sample" / "events.ndjson"
SCREENSHOTS = ROOT / "artifacts" / "screenshots"
CHROMIUM = "/usr/bin/chromium"
CHROMEDRIVER = "/usr/bin/chromedriver"
# An account id that is also HTML: pages must show it as text (Jinja2 autoescape).
HOSTILE_ACCOUNT = '<img src=x onerror="document.title=1">&amp;'

pytestmark = pytest.mark.browser


def _browser_missing() -> str | None:
    for path in (CHROMIUM, CHROMEDRIVER):
        if not (os.path.exists(path) and os.access(path, os.X_OK)):
            return f"{path} is missing: install Debian's chromium and chromium-driver packages"
    try:
        import selenium  # noqa: F401
    except ImportError:
        return "selenium is not installed: pip install -e '.[test]'"
    return None


@pytest.fixture(scope="session")
def browser_ready():
    reason = _browser_missing()
    if reason:
        if os.environ.get("ROLEWATCH_REQUIRE_BROWSER") == "1":
            pytest.fail(f"ROLEWATCH_REQUIRE_BROWSER=1 but {reason}")
        pytest.skip(reason)


@dataclass
class Site:
    """The running app: its base URL, settings, store engine and one key per scope."""

    url: str
    settings: object
    engine: object
    keys: dict


def _free_socket() -> socket.socket:
    sock = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
    sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
    sock.bind(("127.0.0.1", 0))
    return sock


@contextmanager
def serve(app, sock: socket.socket | None = None) -> Iterator[str]:
    """Serve ``app`` with uvicorn on a loopback socket in a thread; yields its base URL."""
    import uvicorn

    sock = sock or _free_socket()
    server = uvicorn.Server(uvicorn.Config(app, log_level="warning", lifespan="on"))
    thread = threading.Thread(target=server.run, kwargs={"sockets": [sock]}, daemon=True)
    thread.start()
    deadline = time.monotonic() + 30
    while not server.started:
        if time.monotonic() > deadline or not thread.is_alive():
            raise RuntimeError("the app did not start within 30 s")
        time.sleep(0.05)
    try:
        yield f"http://127.0.0.1:{sock.getsockname()[1]}"
    finally:
        server.should_exit = True
        thread.join(timeout=15)
        sock.close()


@pytest.fixture(scope="session")
def site(browser_ready, tmp_path_factory):
    """The sample scenario ingested, its windows closed, and the app served on loopback."""
    from rolewatch.api.app import create_app
    from rolewatch.config import load_settings
    from rolewatch.pipeline.closer import close_due_windows
    from rolewatch.store.db import open_store
    from rolewatch.store.events import ingest
    from rolewatch.store.keys import create_key

    sock = _free_socket()
    port = sock.getsockname()[1]
    url = f"http://127.0.0.1:{port}"
    database = tmp_path_factory.mktemp("web") / "rolewatch.db"
    settings = load_settings(
        database_url=f"sqlite:///{database}",
        window_period="7d",
        window_span="7d",
        training_windows=4,
        public_url=url,
        log_json=False,
        log_level="WARNING",
    )
    engine = open_store(settings)
    with open(SAMPLE, encoding="utf-8") as handle:
        events = [json.loads(line) for line in handle if line.strip()]
    now_us = now_micros()
    result = ingest(engine, settings, events, now_us)
    assert not result.rejected, result.rejected[:3]
    close_due_windows(engine, settings, now_us=now_micros(), drain=True)
    # One event after the last closed window, from an account whose id is markup.
    late = ingest(
        engine,
        settings,
        [
            {
                "id": "web-hostile-1",
                "time": "2026-03-12T10:00:00Z",
                "actor": HOSTILE_ACCOUNT,
                "target": "m-00001",
                "kind": "purchase",
                "weight": 3,
            }
        ],
        now_micros(),
    )
    assert late.accepted == 1
    keys = {
        scope: create_key(engine, [scope], label=f"web test {scope}", now_us=now_us)[1]
        for scope in ("ingest", "read", "admin")
    }

    with serve(create_app(settings, run_jobs=False), sock) as served_url:
        assert served_url == url
        yield Site(url, settings, engine, keys)
    engine.dispose()


@pytest.fixture(scope="session")
def driver(browser_ready, tmp_path_factory):
    """One headless Chromium for the session (Debian's binary and driver; nothing downloaded)."""
    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service

    options = webdriver.ChromeOptions()
    options.binary_location = CHROMIUM
    for argument in (
        "--headless",
        "--no-sandbox",
        "--disable-gpu",
        "--disable-quic",
        "--no-first-run",
        "--disable-background-networking",
        "--disable-component-update",
        "--disable-sync",
        "--disable-dev-shm-usage",
        "--window-size=1280,900",
        f"--user-data-dir={tmp_path_factory.mktemp('chromium-profile')}",
    ):
        options.add_argument(argument)
    options.set_capability("goog:loggingPrefs", {"browser": "ALL"})
    browser = webdriver.Chrome(service=Service(CHROMEDRIVER), options=options)
    browser.set_page_load_timeout(60)
    yield browser
    browser.quit()


@pytest.fixture
def page(driver, site):
    """The browser, signed out, with its console log drained; fails the test on console errors."""
    driver.delete_all_cookies()
    driver.set_window_size(1280, 900)
    driver.get_log("browser")
    yield driver
    severe = [entry for entry in driver.get_log("browser") if entry["level"] == "SEVERE"]
    assert not severe, f"browser console errors: {severe}"


def sign_in(driver, site, scope: str = "read") -> None:
    """Sign in through the form with a key of ``scope``."""
    from selenium.webdriver.common.by import By

    driver.get(f"{site.url}/signin")
    driver.find_element(By.ID, "key").send_keys(site.keys[scope])
    driver.find_element(By.CSS_SELECTOR, "form[action='/signin'] button[type=submit]").click()
    wait_for(lambda: "/signin" not in driver.current_url, "sign-in did not leave the form")


def wait_for(condition, message: str, timeout: float = 10.0):
    """Poll ``condition`` until it returns a truthy value (then return it) or fail."""
    from selenium.common.exceptions import NoSuchElementException, StaleElementReferenceException

    deadline = time.monotonic() + timeout
    while True:
        try:
            value = condition()
        except (NoSuchElementException, StaleElementReferenceException):
            value = None  # the page is still changing
        if value:
            return value
        if time.monotonic() > deadline:
            raise AssertionError(message)
        time.sleep(0.05)


def screenshot(driver, name: str) -> Path:
    """Save a full-height screenshot at laptop width to artifacts/screenshots/<name>.png."""
    SCREENSHOTS.mkdir(parents=True, exist_ok=True)
    height = driver.execute_script("return document.documentElement.scrollHeight")
    driver.set_window_size(1280, max(900, min(int(height) + 140, 6000)))
    path = SCREENSHOTS / f"{name}.png"
    driver.save_screenshot(str(path))
    driver.set_window_size(1280, 900)
    return path


def api_get(site, path: str, scope: str = "read"):
    """GET a JSON document from the REST API of the same running app."""
    import httpx

    response = httpx.get(
        f"{site.url}{path}", headers={"Authorization": f"Bearer {site.keys[scope]}"}
    )
    response.raise_for_status()
    return response.json()

"""Browser tests: Debian's Chromium, headless, driven through its own ChromeDriver (Selenium
from PyPI; nothing is downloaded). ``make test`` installs the two Debian packages where it can
(root with apt-get); elsewhere these tests show as skipped with the reason.

The demo service runs as ``make run`` starts it (``python -m service.demo_server``) on a free
loopback port, with the demo responses posted by its ingest key and re-screened against a
reference sample by its admin key, as the README's walk-through does."""

from __future__ import annotations

import json
import os
import subprocess
import sys
import time
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import httpx
import pytest

from tests.service.live_server import HOST, START_SECONDS, STOP_SECONDS, free_port

CHROMIUM = os.environ.get("HEEDFUL_CHROMIUM", "/usr/bin/chromium")
CHROMEDRIVER = os.environ.get("HEEDFUL_CHROMEDRIVER", "/usr/bin/chromedriver")
NO_BROWSER = (
    f"browser tests need Debian's chromium and chromium-driver ({CHROMIUM}, {CHROMEDRIVER}); "
    "`make test` installs them when run as root with apt-get, or: apt-get install chromium "
    "chromium-driver"
)
#: Where the README's screenshots go when HEEDFUL_SCREENSHOTS=1 (`make screenshots`).
DOCS = Path(__file__).resolve().parents[2] / "docs"


def _have_browser() -> bool:
    return all(Path(p).exists() and os.access(p, os.X_OK) for p in (CHROMIUM, CHROMEDRIVER))


@dataclass
class Demo:
    url: str
    survey: str
    keys: dict[str, str]
    folder: Path

    def api(self, role: str = "analyst") -> httpx.Client:
        return httpx.Client(
            base_url=self.url, timeout=30,
            headers={"Authorization": f"Bearer {self.keys[role]}"},
        )


@pytest.fixture(scope="module")
def demo(tmp_path_factory) -> Iterator[Demo]:
    """The demo service as `make run` starts it, with the demo responses posted."""
    if not _have_browser():
        pytest.skip(NO_BROWSER)
    folder = tmp_path_factory.mktemp("demo")
    port = free_port()
    log = folder / "server.log"
    with log.open("ab") as out:
        process = subprocess.Popen(
            [sys.executable, "-m", "service.demo_server", "--host", HOST, "--port", str(port),
             "--out", str(folder / "demo")],
            stdout=out, stderr=subprocess.STDOUT, cwd=folder,
            env={**os.environ, "HEEDFUL_LOG_LEVEL": "warning",
                 "HEEDFUL_JOB_FOLDER": str(folder / "jobs")},
        )
    url = f"http://{HOST}:{port}"
    try:
        deadline = time.monotonic() + START_SECONDS
        with httpx.Client(base_url=url, timeout=5) as client:
            while True:
                assert process.poll() is None, log.read_text(errors="replace")
                try:
                    if client.get("/healthz").status_code == 200:
                        break
                except httpx.TransportError:
                    pass
                assert time.monotonic() < deadline, "the demo service did not start"
                time.sleep(0.1)
        out_dir = folder / "demo"
        keys = {
            role: (out_dir / f"{role}.key").read_text().strip()
            for role in ("admin", "ingest", "analyst")
        }
        survey = json.loads((out_dir / "instrument.json").read_text())["survey"]
        demo = Demo(url, survey, keys, out_dir)
        with demo.api("ingest") as client:
            reply = client.post(
                f"/v1/surveys/{survey}/responses",
                content=(out_dir / "responses.json").read_bytes(),
                headers={"Content-Type": "application/json"},
            )
            assert reply.status_code == 201, reply.status_code
        with demo.api("admin") as client:  # a reference sample: careless scores, the default order
            assert client.post(f"/v1/surveys/{survey}/rescreen").status_code == 200
        yield demo
    finally:
        if process.poll() is None:
            process.terminate()
            try:
                process.wait(timeout=STOP_SECONDS)
            except subprocess.TimeoutExpired:
                process.kill()
                process.wait(timeout=STOP_SECONDS)


@pytest.fixture(scope="module")
def browser(demo) -> Iterator[object]:
    """Headless Chromium (a fresh profile) driven through Debian's ChromeDriver."""
    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service

    os.environ.setdefault("SE_OFFLINE", "true")  # never let Selenium look for a driver online
    options = webdriver.ChromeOptions()
    options.binary_location = CHROMIUM
    for argument in (
        "--headless=new", "--no-sandbox", "--disable-gpu", "--disable-dev-shm-usage",
        "--window-size=1440,1100", "--force-device-scale-factor=1", "--lang=en-GB",
        "--disable-extensions", "--no-first-run", "--disable-background-networking",
        "--disable-component-update", "--disable-sync",
    ):
        options.add_argument(argument)
    driver = webdriver.Chrome(options=options, service=Service(executable_path=CHROMEDRIVER))
    driver.set_page_load_timeout(60)
    try:
        yield driver
    finally:
        driver.quit()


def screenshot(driver, name: str, tmp_path: Path) -> Path:
    """A PNG of the whole page: into docs/ when HEEDFUL_SCREENSHOTS=1, else beside the test."""
    folder = DOCS if os.environ.get("HEEDFUL_SCREENSHOTS") == "1" else tmp_path
    path = folder / f"{name}.png"
    height = driver.execute_script("return document.documentElement.scrollHeight")
    driver.set_window_size(1440, min(max(int(height) + 140, 800), 2400))
    assert driver.save_screenshot(str(path)), path
    driver.set_window_size(1440, 1100)
    return path


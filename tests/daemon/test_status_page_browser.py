"""The status page in headless Chromium, served by a real HTTP side on 127.0.0.1.

Needs Debian's ``chromium`` (and ``chromium-driver`` for the layout test); the tests skip
with the reason when they are absent.  Chromium runs as root in CI, hence ``--no-sandbox``;
its host resolver maps every name except 127.0.0.1 to "not found", so it cannot reach the
network even by accident.  Set ``MAILWEIR_SCREENSHOT_DIR`` to keep the screenshots for a look.
"""

from __future__ import annotations

import asyncio
import base64
import contextlib
import datetime as dt
import os
import shutil
import socket
import struct
from collections.abc import AsyncIterator
from html.parser import HTMLParser
from pathlib import Path
from typing import Any

import aiohttp
import pytest

from mailweir.daemon.feedback_types import FeedbackOutcome, FeedbackRequest, FeedbackStatus
from mailweir.daemon.http_side import HttpSide
from mailweir.daemon.metrics import Metrics
from mailweir.daemon.settings import PolicySettings
from mailweir.daemon.status_page import StatusPage
from mailweir.store import ModelStore
from mailweir.store.verdicts import FeedbackChannel, FeedbackKind, FeedbackRecord, VerdictRecord

pytestmark = pytest.mark.slow

CHROMIUM = os.environ.get("MAILWEIR_TEST_CHROMIUM") or shutil.which("chromium")
CHROMEDRIVER = shutil.which("chromedriver")
NEEDS_CHROMIUM = pytest.mark.skipif(
    CHROMIUM is None, reason="chromium not installed (Debian package: chromium)"
)
NEEDS_DRIVER = pytest.mark.skipif(
    CHROMIUM is None or CHROMEDRIVER is None,
    reason="chromium / chromedriver not installed (Debian packages: chromium chromium-driver)",
)
BROWSER_TIMEOUT = 90.0
CHROMIUM_FLAGS = [
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-quic",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--disable-dev-shm-usage",
    "--hide-scrollbars",
    "--host-resolver-rules=MAP * ~NOTFOUND, EXCLUDE 127.0.0.1",
]
NOW = dt.datetime.now(dt.UTC).timestamp()


def fill(store: ModelStore) -> None:
    """Two weeks of invented traffic with a few corrections, hour by hour."""
    records, corrections = [], []
    for hour in range(14 * 24):
        for n, (band, score) in enumerate(
            [("ham", 0.02), ("ham", 0.3), ("spam", 0.995), ("suspect", 0.7), ("ham", 0.01)]
        ):
            if (hour + n) % 7 == 0:
                continue  # uneven days
            tid = f"h{hour:04d}n{n}"
            records.append(
                VerdictRecord(tid, NOW - hour * 3600 - n, 1, 4096, score, band, "tag", None)
            )
            if band == "suspect" and hour % 11 == 0:
                corrections.append((FeedbackKind.FALSE_POSITIVE, tid))
            if band == "ham" and score > 0.2 and hour % 17 == 0:
                corrections.append((FeedbackKind.FALSE_NEGATIVE, tid))
    store.record_verdicts(records)
    for kind, tid in corrections:
        store.record_feedback(FeedbackRecord(kind, FeedbackChannel.MAIL, NOW - 1, tid))


async def no_feedback(request: FeedbackRequest) -> FeedbackOutcome:
    return FeedbackOutcome(FeedbackStatus.REFUSED)


@pytest.fixture
async def page_url(tmp_path: Path) -> AsyncIterator[str]:
    store = ModelStore.open(str(tmp_path / "model.sqlite3"))
    fill(store)
    policy = PolicySettings(quarantine_mailbox="quarantine@harbourlane.example")
    page = StatusPage(store.engine, lambda: policy)

    async def ok() -> bool:
        return True

    http = HttpSide(
        Metrics(), token="", feedback=no_feedback, page=page.render, ready_checks={"smtp": ok}
    )
    await http.start("127.0.0.1", 0)
    try:
        yield f"http://127.0.0.1:{http.port}/"
    finally:
        await http.stop()
        store.close()


async def run_chromium(*args: str) -> bytes:
    """Run chromium without blocking the loop that serves the page; bounded by a timeout."""
    assert CHROMIUM is not None
    proc = await asyncio.create_subprocess_exec(
        CHROMIUM,
        *CHROMIUM_FLAGS,
        *args,
        stdout=asyncio.subprocess.PIPE,
        stderr=asyncio.subprocess.DEVNULL,
    )
    try:
        out, _ = await asyncio.wait_for(proc.communicate(), BROWSER_TIMEOUT)
    except TimeoutError:
        proc.kill()
        await proc.wait()
        raise
    assert proc.returncode == 0, f"chromium exited with {proc.returncode}"
    return out


class Dom(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.title = ""
        self.in_title = False
        self.bars: list[float] = []
        self.points = 0
        self.svgs = 0

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        a = dict(attrs)
        self.in_title = tag == "title" and self.svgs == 0
        if tag == "svg":
            self.svgs += 1
        elif tag == "rect" and a.get("class") == "bar":
            self.bars.append(float(a.get("height") or 0))
        elif tag == "circle" and a.get("class") == "point":
            self.points += 1

    def handle_data(self, data: str) -> None:
        if self.in_title and not self.title:
            self.title = data

    def handle_endtag(self, tag: str) -> None:
        self.in_title = False


def png_size(path: Path) -> tuple[int, int]:
    data = path.read_bytes()
    assert data[:8] == b"\x89PNG\r\n\x1a\n", "not a PNG"
    width, height = struct.unpack(">II", data[16:24])  # IHDR follows the signature
    return width, height


def keep(path: Path) -> None:
    target = os.environ.get("MAILWEIR_SCREENSHOT_DIR")
    if target:
        shutil.copy(path, Path(target) / path.name)


@NEEDS_CHROMIUM
async def test_status_page_browser_dom_has_charts_with_data(page_url: str, tmp_path: Path) -> None:
    out = await run_chromium(f"--user-data-dir={tmp_path / 'profile'}", "--dump-dom", page_url)
    dom = Dom()
    dom.feed(out.decode("utf-8"))
    assert dom.title == "mailweir status"
    assert dom.svgs == 3
    assert dom.bars and all(h > 0 for h in dom.bars)
    assert len(dom.bars) >= 14 * 3  # three bands a day at least, plus the histogram
    assert dom.points >= 14  # a rate point per day for each line


@NEEDS_CHROMIUM
@pytest.mark.parametrize(("width", "height"), [(390, 2400), (1280, 1500)])
async def test_status_page_browser_screenshot(
    page_url: str, tmp_path: Path, width: int, height: int
) -> None:
    shot = tmp_path / f"status-{width}.png"
    await run_chromium(
        f"--user-data-dir={tmp_path / 'profile'}",
        f"--window-size={width},{height}",
        f"--screenshot={shot}",
        page_url,
    )
    keep(shot)
    assert png_size(shot) == (width, height)
    assert shot.stat().st_size > 20_000  # a blank page compresses to a few KB


# -- layout, through chromedriver's WebDriver protocol on 127.0.0.1 ------------------------

LAYOUT_SCRIPT = """
const box = (e) => e.getBoundingClientRect();
return {
  title: document.title,
  innerWidth: window.innerWidth,
  scrollWidth: document.documentElement.scrollWidth,
  svgRight: Math.max(...[...document.querySelectorAll('svg')].map((s) => box(s).right)),
  svgWidths: [...document.querySelectorAll('svg')].map((s) => box(s).width),
  barHeights: [...document.querySelectorAll('rect.bar')].map((r) => box(r).height),
  fontPx: parseFloat(getComputedStyle(document.body).fontSize),
};
"""


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


@contextlib.asynccontextmanager
async def webdriver(tmp_path: Path) -> AsyncIterator[str]:
    assert CHROMEDRIVER is not None
    port = free_port()
    proc = await asyncio.create_subprocess_exec(
        CHROMEDRIVER,
        f"--port={port}",
        "--allowed-ips=127.0.0.1",
        stdout=asyncio.subprocess.DEVNULL,
        stderr=asyncio.subprocess.DEVNULL,
    )
    base = f"http://127.0.0.1:{port}"
    try:
        async with aiohttp.ClientSession(timeout=aiohttp.ClientTimeout(total=30)) as s:
            for _ in range(100):  # up to ~10 s for the driver to listen
                with contextlib.suppress(aiohttp.ClientError):
                    async with s.get(base + "/status") as resp:
                        if resp.status == 200 and (await resp.json())["value"]["ready"]:
                            break
                await asyncio.sleep(0.1)
            else:
                pytest.fail("chromedriver did not start")
        yield base
    finally:
        proc.terminate()
        with contextlib.suppress(TimeoutError):
            await asyncio.wait_for(proc.wait(), 10)
        if proc.returncode is None:
            proc.kill()
            await proc.wait()


async def layout(driver: str, url: str, width: int, mobile: bool, tmp: Path) -> dict[str, Any]:
    options: dict[str, Any] = {
        "binary": CHROMIUM,
        "args": [*CHROMIUM_FLAGS, f"--user-data-dir={tmp}", f"--window-size={width},900"],
    }
    if mobile:
        options["mobileEmulation"] = {
            "deviceMetrics": {"width": width, "height": 844, "pixelRatio": 3.0, "touch": True}
        }
    caps = {"capabilities": {"alwaysMatch": {"goog:chromeOptions": options}}}
    timeout = aiohttp.ClientTimeout(total=BROWSER_TIMEOUT)
    async with aiohttp.ClientSession(timeout=timeout) as s:
        async with s.post(driver + "/session", json=caps) as resp:
            body = await resp.json()
            assert resp.status == 200, body
            session = f"{driver}/session/{body['value']['sessionId']}"
        try:
            async with s.post(session + "/url", json={"url": url}) as resp:
                assert resp.status == 200, await resp.text()
            script = {"script": LAYOUT_SCRIPT, "args": []}
            async with s.post(session + "/execute/sync", json=script) as resp:
                result: dict[str, Any] = (await resp.json())["value"]
            async with s.get(session + "/screenshot") as resp:
                shot = tmp / f"layout-{width}.png"
                shot.write_bytes(base64.b64decode((await resp.json())["value"]))
                keep(shot)
        finally:
            async with s.delete(session):
                pass
    return result


@NEEDS_DRIVER
@pytest.mark.parametrize(("width", "mobile"), [(390, True), (1280, False)])
async def test_status_page_browser_layout_fits_the_viewport(
    page_url: str, tmp_path: Path, width: int, mobile: bool
) -> None:
    async with webdriver(tmp_path) as driver:
        result = await layout(driver, page_url, width, mobile, tmp_path)
    assert result["title"] == "mailweir status"
    assert result["innerWidth"] == width
    assert result["scrollWidth"] <= width, "the page scrolls sideways"
    assert result["svgRight"] <= width
    # charts use the width they are given: most of a phone's, at most their own 480 units
    # times the grid's column on a desktop
    assert all(w >= min(width - 60, 400) for w in result["svgWidths"])
    assert sum(1 for h in result["barHeights"] if h > 0) >= 14 * 3
    assert result["fontPx"] >= 14

"""The report as a person sees it: a real headless Chromium opens the static page from disk.

The results folder is real (tests/real_results.py: `harness run`, a scaling, then
`harness report`). Chromium is driven through its DevTools protocol over a pipe
(``--remote-debugging-pipe``: JSON messages ended by a NUL byte on file descriptors 3 and 4),
so no driver package and no network port is needed. The page is opened as ``file://`` with
no server; every request it makes must stay on disk. Checked: every image decodes
(naturalWidth > 0, after the page's lazy images are asked to load), no error reaches the
console (exceptions, console.error, error-level log entries such as a missing file), a run's
anchor scrolls to its card; screenshots are saved in the test's tmp_path. Skipped, with the
reason printed, only where no Chromium is installed (Debian: apt-get install chromium).
"""

from __future__ import annotations

import base64
import json
import os
import select
import shutil
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import pytest
from real_results import real_results

from harness.plot import report

FLAGS = (
    "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
    "--disable-background-networking", "--disable-component-update", "--disable-sync",
    "--remote-debugging-pipe",
)
TIMEOUT_S = 60.0

# Run in the child before the browser: move the two pipe ends to fds 3 and 4 (through fds >= 10,
# so neither end is overwritten while the other moves), then become the browser.
PLACE_PIPES = """
import fcntl, os, sys
ends = [fcntl.fcntl(int(fd), fcntl.F_DUPFD, 10) for fd in sys.argv[1:3]]
for fd in sys.argv[1:3]:
    os.close(int(fd))
for target, end in zip((3, 4), ends):
    os.dup2(end, target)
    os.close(end)
os.execv(sys.argv[3], sys.argv[3:])
"""

# Figures are loading="lazy": a headless window never scrolls to most of them, so ask every
# image to load now and wait until each has decoded (or failed), then report their sizes.
LOAD_EVERY_IMAGE = """
(async () => {
  const images = Array.from(document.images);
  for (const image of images) image.loading = "eager";
  await Promise.all(images.map(image => image.decode().catch(() => null)));
  return images.map(image => ({src: image.getAttribute("src"), width: image.naturalWidth}));
})()
"""


def chromium_binary() -> str | None:
    for name in ("chromium", "chromium-browser"):
        found = shutil.which(name)
        if found:
            return found
    return None


class DevTools:
    """One headless Chromium process and its DevTools protocol over a pipe."""

    def __init__(self, binary: str, profile: Path, log: Path):
        commands_read, self._commands = os.pipe()
        self._replies, replies_write = os.pipe()
        # The browser reads commands on fd 3 and writes replies on fd 4; a tiny launcher puts them there.
        with open(log, "wb") as log_stream:
            self.process = subprocess.Popen(
                [sys.executable, "-c", PLACE_PIPES, str(commands_read), str(replies_write),
                 binary, *FLAGS, f"--user-data-dir={profile}", "about:blank"],
                pass_fds=(commands_read, replies_write), stdin=subprocess.DEVNULL,
                stdout=log_stream, stderr=log_stream,
            )
        os.close(commands_read)
        os.close(replies_write)
        self._pending = b""
        self._last_id = 0
        self.events: list[dict[str, Any]] = []

    def _read_message(self, deadline: float) -> dict[str, Any]:
        while b"\0" not in self._pending:
            left = deadline - time.monotonic()
            ready, _, _ = select.select([self._replies], [], [], max(left, 0.0))
            if not ready:
                raise TimeoutError("no answer from Chromium")
            chunk = os.read(self._replies, 1 << 20)
            if not chunk:
                raise RuntimeError(f"Chromium ended (exit status {self.process.poll()})")
            self._pending += chunk
        message, self._pending = self._pending.split(b"\0", 1)
        return json.loads(message)

    def call(self, method: str, params: dict | None = None, session: str | None = None) -> dict[str, Any]:
        self._last_id += 1
        message: dict[str, Any] = {"id": self._last_id, "method": method, "params": params or {}}
        if session:
            message["sessionId"] = session
        os.write(self._commands, json.dumps(message).encode() + b"\0")
        deadline = time.monotonic() + TIMEOUT_S
        while True:
            reply = self._read_message(deadline)
            if reply.get("id") == self._last_id:
                if "error" in reply:
                    raise RuntimeError(f"{method}: {reply['error']}")
                return reply.get("result", {})
            self.events.append(reply)

    def wait_for(self, method: str, seen_before: int) -> None:
        """Wait for event ``method`` among the events from index ``seen_before`` on."""
        deadline = time.monotonic() + TIMEOUT_S
        while not any(event.get("method") == method for event in self.events[seen_before:]):
            self.events.append(self._read_message(deadline))

    def close(self) -> None:
        try:
            self.call("Browser.close")
        except (RuntimeError, TimeoutError, OSError):
            pass
        try:
            self.process.wait(timeout=10)
        except subprocess.TimeoutExpired:
            self.process.kill()  # our own child, by its handle
            self.process.wait()
        os.close(self._commands)
        os.close(self._replies)


class Page:
    """A tab: open a URL, run a script, take a screenshot, and list what went wrong."""

    def __init__(self, browser: DevTools):
        self.browser = browser
        target = browser.call("Target.createTarget", {"url": "about:blank"})["targetId"]
        self.session = browser.call("Target.attachToTarget", {"targetId": target, "flatten": True})["sessionId"]
        for domain in ("Page", "Runtime", "Log", "Network"):
            self.call(f"{domain}.enable")
        self.call("Emulation.setDeviceMetricsOverride",
                  {"width": 1280, "height": 900, "deviceScaleFactor": 1, "mobile": False})

    def call(self, method: str, params: dict | None = None) -> dict[str, Any]:
        return self.browser.call(method, params, self.session)

    def open(self, url: str) -> int:
        """Navigate and wait for the load event; return the index of the first event of this page."""
        first = len(self.browser.events)
        self.call("Page.navigate", {"url": url})
        self.browser.wait_for("Page.loadEventFired", first)
        return first

    def evaluate(self, expression: str) -> Any:
        result = self.call("Runtime.evaluate", {"expression": expression, "awaitPromise": True, "returnByValue": True})
        assert "exceptionDetails" not in result, result["exceptionDetails"]
        return result["result"].get("value")

    def screenshot(self, path: Path, *, full_page: bool) -> None:
        params: dict[str, Any] = {"format": "png"}
        if full_page:
            size = self.call("Page.getLayoutMetrics")["cssContentSize"]
            params.update(captureBeyondViewport=True,
                          clip={"x": 0, "y": 0, "width": size["width"], "height": size["height"], "scale": 1})
        path.write_bytes(base64.b64decode(self.call("Page.captureScreenshot", params)["data"]))

    def problems(self, since: int) -> list[str]:
        """Console errors (exceptions, console.error, error-level log entries) since event ``since``."""
        found = []
        for event in self.browser.events[since:]:
            if event.get("sessionId") != self.session:
                continue
            method, params = event.get("method"), event.get("params", {})
            if method == "Runtime.exceptionThrown":
                found.append(f"exception: {params['exceptionDetails'].get('text')}")
            elif method == "Runtime.consoleAPICalled" and params.get("type") in ("error", "assert"):
                found.append(f"console.{params['type']}: {params.get('args')}")
            elif method == "Log.entryAdded" and params["entry"].get("level") == "error":
                entry = params["entry"]
                found.append(f"log: {entry.get('text')} {entry.get('url', '')}")
        return found

    def requests(self, since: int) -> list[str]:
        return [
            event["params"]["request"]["url"] for event in self.browser.events[since:]
            if event.get("sessionId") == self.session and event.get("method") == "Network.requestWillBeSent"
        ]


@pytest.fixture
def page(tmp_path):
    binary = chromium_binary()
    if binary is None:
        pytest.skip("no Chromium installed (Debian: apt-get install chromium); the page was not checked in a browser")
    browser = DevTools(binary, tmp_path / "profile", tmp_path / "chromium.log")
    try:
        yield Page(browser)
    finally:
        browser.close()


def check_loaded_page(page: Page, url: str, since: int) -> list[dict[str, Any]]:
    """Every image decoded, no console error, no request off the disk; returns the images."""
    images = page.evaluate(LOAD_EVERY_IMAGE)
    assert images, f"{url}: no images on the page"
    broken = [image["src"] for image in images if image["width"] <= 0]
    assert not broken, f"{url}: images that did not load: {broken}"
    problems = page.problems(since)
    assert not problems, f"{url}: console errors: {problems}"
    elsewhere = [request for request in page.requests(since) if not request.startswith(("file://", "data:"))]
    assert not elsewhere, f"{url}: requests that leave the folder: {elsewhere}"
    return images


def test_the_report_in_a_real_browser(page, tmp_path):
    results = real_results()
    index = results.root / "index.html"
    figures_on_disk = {p.relative_to(results.root).as_posix() for p in results.root.rglob("figures/*.png")}

    since = page.open(index.as_uri())
    images = check_loaded_page(page, index.as_uri(), since)
    shown = {image["src"] for image in images}
    assert f"{results.run_id}/figures/learning_curve.png" in shown
    assert f"{results.scale_folder.name}/figures/scaling.png" in shown
    assert shown <= figures_on_disk
    page.screenshot(tmp_path / "index.png", full_page=True)

    other = sorted(results.root.glob("index-by-*.html"))[0]  # one of the pages sorted another way
    since = page.open(other.as_uri())
    check_loaded_page(page, other.as_uri(), since)

    # A run's card, reached by its anchor as a link from a colleague would: the page scrolls to it.
    # Looked at as loaded, before every lazy figure is made to load: figures above the card have
    # no size until they load, so loading them all moves the card down.
    anchor = report._anchor("run", results.run_id)
    since = page.open(f"{index.as_uri()}#{anchor}")
    where = page.evaluate(
        f"[document.getElementById({json.dumps(anchor)}).getBoundingClientRect().top, window.scrollY, "
        "window.innerHeight, document.documentElement.scrollHeight]"
    )
    top, scrolled, window_height, page_height = where
    at_bottom = scrolled + window_height >= page_height - 2  # a card near the end cannot reach the top
    assert scrolled > 0 and -2 < top < window_height and (abs(top) < 2 or at_bottom), where
    page.screenshot(tmp_path / "run.png", full_page=False)
    check_loaded_page(page, index.as_uri(), since)
    card_text = page.evaluate(f"document.getElementById({json.dumps(anchor)}).textContent")
    started = json.loads((results.root / results.run_id / "manifest.json").read_text())["started"]
    assert started in card_text  # the manifest table shows when the run started

    for name in ("index.png", "run.png"):
        assert (tmp_path / name).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"

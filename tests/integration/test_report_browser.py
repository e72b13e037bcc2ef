"""The demo's HTML report rendered in a real headless Chromium.

Chromium is driven through the DevTools protocol over ``--remote-debugging-pipe`` (file
descriptors 3 and 4, NUL-terminated JSON), so no Python package beyond the standard library
is needed.  The screenshot is saved under ``$PMAP_TEST_ARTIFACTS`` (default: pytest's
temporary directory) and its path printed.
"""

from __future__ import annotations

import base64
import fcntl
import json
import os
import queue
import shutil
import subprocess
import threading
import time
from pathlib import Path
from typing import Any

import pytest

from pmap.report.html import write_field_report

CHROMIUM_CANDIDATES = ("/usr/bin/chromium", "/usr/bin/chromium-browser")
TIMEOUT_S = 20.0


def _chromium() -> str | None:
    for path in CHROMIUM_CANDIDATES:
        if os.access(path, os.X_OK):
            return path
    return shutil.which("chromium")


# A mark, not a skip inside the test, so the demo run is not computed only to be skipped.
pytestmark = pytest.mark.skipif(
    _chromium() is None,
    reason="chromium not installed: apt-get install chromium chromium-driver (Debian) to run "
           "the browser check of the HTML report")


class DevTools:
    """A headless Chromium and one page target, spoken to over the DevTools pipe."""

    def __init__(self, binary: str, profile: Path, log: Path) -> None:
        to_chrome_r, self._to_chrome = os.pipe()
        self._from_chrome, from_chrome_w = os.pipe()
        # Move the child's ends above 10 so the dup2 onto 3 and 4 cannot clobber one another.
        child_r = fcntl.fcntl(to_chrome_r, fcntl.F_DUPFD_CLOEXEC, 10)
        child_w = fcntl.fcntl(from_chrome_w, fcntl.F_DUPFD_CLOEXEC, 10)
        os.close(to_chrome_r)
        os.close(from_chrome_w)

        def wire() -> None:  # runs in the child before exec
            os.dup2(child_r, 3)
            os.dup2(child_w, 4)

        self._log = log.open("wb")
        args = [binary, "--headless=new", "--no-sandbox", "--disable-gpu",
                "--disable-dev-shm-usage", "--remote-debugging-pipe", f"--user-data-dir={profile}",
                "--no-first-run", "--no-default-browser-check", "--disable-extensions",
                "--disable-background-networking", "--disable-component-update",
                "--disable-sync", "--hide-scrollbars", "--mute-audio", "about:blank"]
        self.proc = subprocess.Popen(args, stdin=subprocess.DEVNULL, stdout=self._log,
                                     stderr=subprocess.STDOUT, pass_fds=(3, 4),
                                     preexec_fn=wire, start_new_session=True)
        os.close(child_r)
        os.close(child_w)
        self._next_id = 0
        self._replies: dict[int, queue.Queue] = {}
        self._lock = threading.Lock()
        self.events: list[dict[str, Any]] = []
        self._event = threading.Condition()
        self._reader = threading.Thread(target=self._read, daemon=True)
        self._reader.start()
        self.session: str | None = None

    def _read(self) -> None:
        buffer = b""
        while True:
            try:
                chunk = os.read(self._from_chrome, 1 << 16)
            except OSError:
                chunk = b""
            if not chunk:
                break
            buffer += chunk
            *messages, buffer = buffer.split(b"\0")
            for raw in messages:
                message = json.loads(raw)
                if "id" in message:
                    with self._lock:
                        box = self._replies.get(message["id"])
                    if box is not None:
                        box.put(message)
                else:
                    with self._event:
                        self.events.append(message)
                        self._event.notify_all()
        with self._event:
            self.events.append({"method": "pipe closed"})
            self._event.notify_all()

    def send(self, method: str, params: dict | None = None, *, session: bool = True) -> dict:
        """Send one command and wait for its result (raises on a protocol error)."""
        with self._lock:
            self._next_id += 1
            ident = self._next_id
            box: queue.Queue = queue.Queue()
            self._replies[ident] = box
        message: dict[str, Any] = {"id": ident, "method": method, "params": params or {}}
        if session and self.session:
            message["sessionId"] = self.session
        os.write(self._to_chrome, json.dumps(message).encode() + b"\0")
        try:
            reply = box.get(timeout=TIMEOUT_S)
        except queue.Empty:
            raise TimeoutError(f"no reply to {method} in {TIMEOUT_S} s") from None
        if "error" in reply:
            raise RuntimeError(f"{method}: {reply['error']}")
        return reply.get("result", {})

    def wait_for(self, method: str, timeout: float = TIMEOUT_S) -> dict:
        """The first event named ``method`` (already seen or still to come)."""
        deadline = time.monotonic() + timeout
        with self._event:
            while True:
                for event in self.events:
                    if event.get("method") == method:
                        return event
                    if event.get("method") == "pipe closed":
                        raise RuntimeError("chromium closed the DevTools pipe")
                left = deadline - time.monotonic()
                if left <= 0:
                    raise TimeoutError(f"no {method} event in {timeout} s")
                self._event.wait(left)

    def open_page(self) -> None:
        target = self.send("Target.createTarget", {"url": "about:blank"}, session=False)
        attached = self.send("Target.attachToTarget",
                             {"targetId": target["targetId"], "flatten": True}, session=False)
        self.session = attached["sessionId"]
        for domain in ("Page", "Runtime", "Log", "Network"):
            self.send(f"{domain}.enable")

    def close(self) -> None:
        try:
            self.send("Browser.close", session=False)
        except (OSError, RuntimeError, TimeoutError):
            pass
        try:
            self.proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait(timeout=10)
        for fd in (self._to_chrome, self._from_chrome):
            try:
                os.close(fd)
            except OSError:
                pass
        self._log.close()


def _problems(events: list[dict[str, Any]], page_url: str) -> list[str]:
    """Console errors, uncaught exceptions, error log entries and any request off the page."""
    found = []
    for event in events:
        method, params = event.get("method"), event.get("params", {})
        if method == "Runtime.consoleAPICalled" and params.get("type") in ("error", "assert"):
            found.append("console: " + " ".join(str(a.get("value", a.get("description", "")))
                                                for a in params.get("args", [])))
        elif method == "Runtime.exceptionThrown":
            found.append("exception: " + json.dumps(params.get("exceptionDetails", {}))[:500])
        elif method == "Log.entryAdded" and params.get("entry", {}).get("level") == "error":
            entry = params["entry"]
            found.append(f"log ({entry.get('source')}): {entry.get('text')} {entry.get('url', '')}")
        elif method == "Network.requestWillBeSent":
            url = params.get("request", {}).get("url", "")
            if not (url.startswith("data:") or url == page_url or url == "about:blank"):
                found.append(f"network request: {url[:200]}")
        elif method == "Network.loadingFailed":
            found.append(f"loading failed: {params.get('errorText')}")
    return found


_IMAGES_JS = """JSON.stringify(Array.from(document.images).map(function (img) {
  return {src: img.currentSrc.slice(0, 40), complete: img.complete, width: img.naturalWidth,
          height: img.naturalHeight};
}))"""


def _artifact_dir(tmp_path: Path) -> Path:
    folder = Path(os.environ.get("PMAP_TEST_ARTIFACTS") or tmp_path / "artifacts")
    folder.mkdir(parents=True, exist_ok=True)
    return folder


def test_demo_report_renders_in_chromium(demo_run, tmp_path):
    binary = _chromium()
    assert binary is not None
    _, out = demo_run
    summary = json.loads((out / "summary.json").read_text(encoding="utf-8"))
    report = write_field_report(out, summary, path=tmp_path / "report.html")
    page_url = report.resolve().as_uri()
    artifacts = _artifact_dir(tmp_path)

    started = time.monotonic()
    browser = DevTools(binary, tmp_path / "profile", artifacts / "chromium.log")
    try:
        browser.open_page()
        browser.send("Emulation.setDeviceMetricsOverride",
                     {"width": 1280, "height": 900, "deviceScaleFactor": 1, "mobile": False})
        browser.send("Page.navigate", {"url": page_url})
        browser.wait_for("Page.loadEventFired")
        state = browser.send("Runtime.evaluate", {"expression": _IMAGES_JS,
                                                  "returnByValue": True})
        images = json.loads(state["result"]["value"])
        title = browser.send("Runtime.evaluate", {"expression": "document.title",
                                                  "returnByValue": True})["result"]["value"]
        metrics = browser.send("Page.getLayoutMetrics")
        size = metrics.get("cssContentSize") or metrics["contentSize"]
        height = min(int(size["height"]), 30000)
        scale = min(1.0, 16000 / max(height, 1))
        shot = browser.send("Page.captureScreenshot", {
            "format": "png", "captureBeyondViewport": True,
            "clip": {"x": 0, "y": 0, "width": 1280, "height": height, "scale": scale}})
        problems = _problems(browser.events, page_url)
    finally:
        browser.close()
    elapsed = time.monotonic() - started

    screenshot = artifacts / "report_demo.png"
    screenshot.write_bytes(base64.b64decode(shot["data"]))
    print(f"\nreport screenshot: {screenshot} ({height} CSS px tall, scale {scale:.2f}); "
          f"report: {report}; browser {elapsed:.1f} s")

    assert problems == []
    assert "Long Meadow" in title
    maps = sorted((out / "maps").glob("*.png"))
    assert len(images) >= len(maps) > 0
    broken = [img for img in images if not (img["complete"] and img["width"] > 0)]
    assert broken == []
    assert all(img["src"].startswith("data:image/png;base64,") for img in images)
    assert screenshot.read_bytes().startswith(b"\x89PNG\r\n\x1a\n")

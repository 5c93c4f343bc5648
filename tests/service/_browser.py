"""A headless Chromium driven over the DevTools protocol, for the dashboard tests.

`Browser` starts one Chromium with a private profile and talks to it over its
DevTools websocket; `Tab` is one page in it (navigate, evaluate, wait,
screenshot to ``tests/screenshots/``).
"""

from __future__ import annotations

import base64
import contextlib
import json
import shutil
import subprocess
import tempfile
import time
from pathlib import Path
from typing import Any

from websockets.sync.client import connect

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")
SCREENSHOTS = Path(__file__).resolve().parents[1] / "screenshots"
WAIT_S = 60.0
"""Longest wait for a page to reach an expected state, in seconds."""
VIEWPORT = (1280, 900)
"""Browser window width and height in CSS pixels."""


class Browser:
    """A headless Chromium and one DevTools websocket to it."""

    def __init__(self, binary: str) -> None:
        self.profile = tempfile.mkdtemp(prefix="fixq-chromium-")
        self._closing = contextlib.ExitStack()
        self.process = subprocess.Popen(
            [binary, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
             "--disable-background-networking", "--disable-component-update", "--disable-sync",
             "--disable-default-apps", "--disable-extensions", "--mute-audio", "--hide-scrollbars",
             f"--user-data-dir={self.profile}", "--remote-debugging-port=0",
             f"--window-size={VIEWPORT[0]},{VIEWPORT[1]}", "about:blank"],
            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, start_new_session=True,
        )  # fmt: skip
        port_file = Path(self.profile) / "DevToolsActivePort"
        deadline = time.monotonic() + WAIT_S
        while not port_file.exists() or len(port_file.read_text().splitlines()) < 2:
            if time.monotonic() > deadline or self.process.poll() is not None:
                self.close()
                raise RuntimeError("Chromium did not open its DevTools port")
            time.sleep(0.05)
        port, path = port_file.read_text().splitlines()[:2]
        self.socket = self._closing.enter_context(
            connect(f"ws://127.0.0.1:{port}{path}", max_size=None, open_timeout=10)
        )
        self.last_id = 0
        self.events: list[dict[str, Any]] = []

    def send(self, method: str, params: dict[str, Any] | None = None, session: str | None = None) -> dict[str, Any]:
        self.last_id += 1
        message: dict[str, Any] = {"id": self.last_id, "method": method, "params": params or {}}
        if session:
            message["sessionId"] = session
        self.socket.send(json.dumps(message))
        deadline = time.monotonic() + WAIT_S
        while True:
            reply = json.loads(self.socket.recv(timeout=max(0.01, deadline - time.monotonic())))
            if reply.get("id") == self.last_id:
                if "error" in reply:
                    raise RuntimeError(f"{method}: {reply['error']}")
                return reply.get("result", {})
            self.events.append(reply)

    def pump(self, seconds: float) -> None:
        """Collect events for ``seconds``."""
        deadline = time.monotonic() + seconds
        while (left := deadline - time.monotonic()) > 0:
            try:
                self.events.append(json.loads(self.socket.recv(timeout=left)))
            except TimeoutError:
                return

    def close(self) -> None:
        self._closing.close()
        if self.process.poll() is None:
            self.process.terminate()
            try:
                self.process.wait(10)
            except subprocess.TimeoutExpired:
                self.process.kill()
                self.process.wait()
        shutil.rmtree(self.profile, ignore_errors=True)


class Tab:
    """One page of the browser, with its console and network events."""

    def __init__(self, browser: Browser) -> None:
        self.browser = browser
        self.target = browser.send("Target.createTarget", {"url": "about:blank"})["targetId"]
        self.session = browser.send("Target.attachToTarget", {"targetId": self.target, "flatten": True})["sessionId"]
        for domain in ("Page", "Runtime", "Network", "Log"):
            self.send(f"{domain}.enable")
        self._viewport(VIEWPORT[1])

    def close(self) -> None:
        self.browser.send("Target.closeTarget", {"targetId": self.target})

    def front(self) -> None:
        """Make this the visible tab: hidden tabs get no animation frames and slowed timers."""
        self.send("Page.bringToFront")

    def send(self, method: str, params: dict[str, Any] | None = None) -> dict[str, Any]:
        return self.browser.send(method, params, self.session)

    def _viewport(self, height: int) -> None:
        self.send(
            "Emulation.setDeviceMetricsOverride",
            {"width": VIEWPORT[0], "height": height, "deviceScaleFactor": 1, "mobile": False},
        )

    def goto(self, url: str) -> None:
        self.send("Page.navigate", {"url": url})

    def evaluate(self, expression: str) -> Any:
        reply = self.send("Runtime.evaluate", {"expression": expression, "returnByValue": True, "awaitPromise": True})
        if "exceptionDetails" in reply:
            raise RuntimeError(reply["exceptionDetails"].get("exception", {}).get("description", "script error"))
        return reply["result"].get("value")

    def wait_for(self, expression: str, timeout_s: float = WAIT_S) -> Any:
        """Poll a JavaScript expression until it is truthy; its value."""
        deadline = time.monotonic() + timeout_s
        last_error = None
        while time.monotonic() < deadline:
            try:
                value = self.evaluate(expression)
                if value:
                    return value
            except RuntimeError as error:  # the page is still loading
                last_error = error
            self.browser.pump(0.15)
        shot = self.screenshot("timed-out")
        text = self.evaluate("document.body ? document.body.innerText.slice(0, 2000) : ''")
        raise AssertionError(
            f"timed out waiting for {expression} (last error: {last_error}); screenshot {shot}\n"
            f"problems: {self.problems()}\npage text:\n{text}"
        )

    def mine(self, method: str) -> list[dict[str, Any]]:
        return [
            e["params"] for e in self.browser.events if e.get("sessionId") == self.session and e.get("method") == method
        ]

    def problems(self) -> list[str]:
        """Console errors, uncaught exceptions, failed requests and HTTP errors seen on this tab."""
        found = [f"console.{p['type']}: {[a.get('value', a.get('description')) for a in p['args']]}"
                 for p in self.mine("Runtime.consoleAPICalled") if p["type"] in ("error", "assert")]  # fmt: skip
        found += [
            f"exception: {p['exceptionDetails'].get('exception', {}).get('description')}"
            for p in self.mine("Runtime.exceptionThrown")
        ]
        found += [
            f"log: {p['entry']['text']} {p['entry'].get('url', '')}"
            for p in self.mine("Log.entryAdded")
            if p["entry"]["level"] == "error"
        ]
        # A request the page itself abandons (an EventSource it closed) is "canceled", not failed.
        found += [
            f"failed: {p['errorText']} ({p.get('type')})"
            for p in self.mine("Network.loadingFailed")
            if not p.get("canceled")
        ]
        found += [
            f"HTTP {p['response']['status']}: {p['response']['url']}"
            for p in self.mine("Network.responseReceived")
            if p["response"]["status"] >= 400
        ]
        return found

    def requested(self) -> list[tuple[str, str]]:
        return [(p["request"]["url"], p.get("type", "")) for p in self.mine("Network.requestWillBeSent")]

    def screenshot(self, name: str) -> Path:
        self.browser.pump(0.3)
        height = int(self.send("Page.getLayoutMetrics")["cssContentSize"]["height"])
        self._viewport(max(height, VIEWPORT[1]))
        self.browser.pump(0.3)
        data = self.send("Page.captureScreenshot", {"format": "png"})["data"]
        self._viewport(VIEWPORT[1])
        SCREENSHOTS.mkdir(parents=True, exist_ok=True)
        path = SCREENSHOTS / f"{name}.png"
        path.write_bytes(base64.b64decode(data))
        return path

"""Headless Chromium driven over its DevTools protocol (CDP), for tests that look at a page.

Debian's chromium is started with a remote-debugging port on loopback; websocket-client talks
CDP to its page target: navigate, evaluate JavaScript, take a screenshot. Tests that use it
skip with the reason when /usr/bin/chromium is missing.
"""

from __future__ import annotations

import base64
import itertools
import json
import shutil
import subprocess
import time
import urllib.request
from pathlib import Path
from typing import Any

import websocket

CHROMIUM = "/usr/bin/chromium"


def chromium_missing() -> str | None:
    """Why the browser tests cannot run here, or None."""
    if not Path(CHROMIUM).is_file() and shutil.which("chromium") is None:
        return "chromium is not installed (apt-get install chromium); the live-page browser tests need it"
    return None


class Browser:
    def __init__(self, profile: Path, width: int = 1920, height: int = 1080) -> None:
        self.profile = Path(profile)
        binary = CHROMIUM if Path(CHROMIUM).is_file() else shutil.which("chromium") or CHROMIUM
        self.process = subprocess.Popen(
            [binary, "--headless", "--no-sandbox", "--disable-gpu", "--no-first-run",
             "--disable-background-networking", "--disable-component-update", "--disable-sync",
             "--disable-extensions", "--remote-debugging-address=127.0.0.1", "--remote-debugging-port=0",
             f"--user-data-dir={self.profile}", f"--window-size={width},{height}", "about:blank"],
            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        self._ids = itertools.count(1)
        self.socket = self._connect()
        self.call("Emulation.setDeviceMetricsOverride",
                  {"width": width, "height": height, "deviceScaleFactor": 1, "mobile": False})
        self.call("Page.enable")
        self.call("Runtime.enable")

    def _connect(self, timeout: float = 30.0) -> websocket.WebSocket:
        port_file = self.profile / "DevToolsActivePort"
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if self.process.poll() is not None:
                raise RuntimeError(f"chromium exited with {self.process.returncode}")
            if port_file.is_file() and port_file.read_text().strip():
                port = int(port_file.read_text().split()[0])
                try:
                    with urllib.request.urlopen(f"http://127.0.0.1:{port}/json/list", timeout=5) as reply:
                        targets = json.load(reply)
                except OSError:
                    targets = []
                pages = [t for t in targets if t.get("type") == "page"]
                if pages:
                    return websocket.create_connection(pages[0]["webSocketDebuggerUrl"], timeout=30,
                                                       suppress_origin=True)
            time.sleep(0.1)
        raise RuntimeError("chromium's DevTools port did not come up")

    def call(self, method: str, params: dict[str, Any] | None = None) -> dict[str, Any]:
        """Send one CDP command and return its result (events that arrive meanwhile are skipped)."""
        number = next(self._ids)
        self.socket.send(json.dumps({"id": number, "method": method, "params": params or {}}))
        while True:
            message = json.loads(self.socket.recv())
            if message.get("id") == number:
                if "error" in message:
                    raise RuntimeError(f"{method}: {message['error']}")
                return dict(message.get("result", {}))

    def open(self, url: str) -> None:
        self.call("Page.navigate", {"url": url})

    def evaluate(self, expression: str) -> Any:
        result = self.call("Runtime.evaluate", {"expression": expression, "returnByValue": True})
        if "exceptionDetails" in result:
            raise RuntimeError(f"page script failed: {result['exceptionDetails']}")
        return result["result"].get("value")

    def wait_for(self, expression: str, timeout: float = 30.0) -> Any:
        """The value of `expression` once it is truthy; TimeoutError after `timeout`."""
        deadline = time.monotonic() + timeout
        last = ""
        while time.monotonic() < deadline:
            try:
                value = self.evaluate(expression)
            except RuntimeError as exc:    # the page is still loading
                value, last = None, str(exc)[:300]
            if value:
                return value
            time.sleep(0.1)
        raise TimeoutError(f"page never gave {expression!r} {last}")

    def screenshot(self, path: Path) -> Path:
        data = self.call("Page.captureScreenshot", {"format": "png"})["data"]
        Path(path).write_bytes(base64.b64decode(data))
        return Path(path)

    def close(self) -> None:
        try:
            self.socket.close()
        finally:
            self.process.terminate()
            try:
                self.process.wait(timeout=10)
            except subprocess.TimeoutExpired:
                self.process.kill()
                self.process.wait()

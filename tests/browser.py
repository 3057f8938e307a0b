"""A headless Chromium driven over the DevTools protocol on a pipe (``--remote-debugging-pipe``): no port, no
download, no websocket library. Every wait has a deadline; the browser is stopped by its own process id."""

from __future__ import annotations

import base64
import json
import os
import select
import subprocess
import sys
import tempfile
import time
from typing import Any

from conftest import tool


# puts the two pipe ends on the descriptors the protocol uses, then becomes the browser
_ON_FDS_3_AND_4 = ("import os, sys; os.dup2(int(sys.argv[1]), 3); os.dup2(int(sys.argv[2]), 4); "
                   "os.execv(sys.argv[3], sys.argv[3:])")


class BrowserError(AssertionError):
    pass


class Browser:
    def __init__(self, deadline_s: float = 120.0) -> None:
        self.deadline = time.monotonic() + deadline_s
        self.profile = tempfile.TemporaryDirectory(prefix="stagewatch-browser-")
        to_browser_r, self._to_browser = os.pipe()
        self._from_browser, from_browser_w = os.pipe()
        args = ["--headless", "--remote-debugging-pipe", "--disable-gpu", "--no-first-run",
                "--no-default-browser-check", "--disable-extensions", "--disable-background-networking",
                "--disable-component-update", "--disable-sync", "--hide-scrollbars", "--mute-audio",
                f"--user-data-dir={self.profile.name}", "about:blank"]
        if os.geteuid() == 0:
            args.insert(0, "--no-sandbox")  # Chromium refuses to sandbox as root (CI containers)
        # the protocol pipe must be file descriptors 3 (commands in) and 4 (replies out) of the browser
        self.proc = subprocess.Popen(
            [sys.executable, "-c", _ON_FDS_3_AND_4, str(to_browser_r), str(from_browser_w), tool("chromium"), *args],
            pass_fds=(to_browser_r, from_browser_w), stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL,
            stderr=subprocess.DEVNULL)
        os.close(to_browser_r)
        os.close(from_browser_w)
        self._buffer = b""
        self._next = 0
        self.events: list[dict[str, Any]] = []
        self.session: str | None = None

    # --- protocol --------------------------------------------------------------------------------------------
    def _read_message(self) -> dict[str, Any]:
        while b"\0" not in self._buffer:
            left = self.deadline - time.monotonic()
            if left <= 0:
                raise BrowserError("the browser did not answer before the deadline")
            ready, _, _ = select.select([self._from_browser], [], [], left)
            if not ready:
                continue
            chunk = os.read(self._from_browser, 1 << 20)
            if not chunk:
                raise BrowserError(f"the browser closed the pipe (exit {self.proc.poll()})")
            self._buffer += chunk
        message, self._buffer = self._buffer.split(b"\0", 1)
        return json.loads(message)

    def send(self, method: str, params: dict[str, Any] | None = None, session: bool = True) -> dict[str, Any]:
        self._next += 1
        message: dict[str, Any] = {"id": self._next, "method": method, "params": params or {}}
        if session and self.session:
            message["sessionId"] = self.session
        os.write(self._to_browser, json.dumps(message).encode() + b"\0")
        while True:
            reply = self._read_message()
            if reply.get("id") == self._next:
                if "error" in reply:
                    raise BrowserError(f"{method}: {reply['error']}")
                return reply.get("result", {})
            self.events.append(reply)

    def wait_for(self, method: str) -> dict[str, Any]:
        for event in self.events:
            if event.get("method") == method:
                self.events.remove(event)
                return event
        while True:
            event = self._read_message()
            if event.get("method") == method:
                return event
            self.events.append(event)

    # --- a page ----------------------------------------------------------------------------------------------
    def open(self, url: str, width: int, height: int) -> None:
        target = self.send("Target.createTarget", {"url": "about:blank"}, session=False)["targetId"]
        self.session = self.send("Target.attachToTarget", {"targetId": target, "flatten": True},
                                 session=False)["sessionId"]
        for domain in ("Page", "Runtime", "Log", "Network"):
            self.send(f"{domain}.enable")
        self.size(width, height)
        self.send("Page.navigate", {"url": url})
        self.wait_for("Page.loadEventFired")

    def size(self, width: int, height: int) -> None:
        self.send("Emulation.setDeviceMetricsOverride", {"width": width, "height": height, "deviceScaleFactor": 1,
                                                         "mobile": False})

    def evaluate(self, expression: str) -> Any:
        result = self.send("Runtime.evaluate", {"expression": expression, "returnByValue": True})
        if "exceptionDetails" in result:
            raise BrowserError(str(result["exceptionDetails"]))
        return result["result"].get("value")

    def screenshot(self, width: int, height: int) -> bytes:
        data = self.send("Page.captureScreenshot", {"format": "png", "captureBeyondViewport": True,
                                                    "clip": {"x": 0, "y": 0, "width": width, "height": height,
                                                             "scale": 1}})["data"]
        return base64.b64decode(data)

    def problems(self) -> list[str]:
        """Console errors, uncaught exceptions, failed loads: everything the page reported as wrong."""
        out = []
        for event in self.events:
            method, params = event.get("method"), event.get("params", {})
            if method == "Runtime.exceptionThrown":
                out.append(f"exception: {params.get('exceptionDetails', {}).get('text')}")
            elif method == "Runtime.consoleAPICalled" and params.get("type") in ("error", "assert", "warning"):
                out.append(f"console {params['type']}: {params.get('args')}")
            elif method == "Log.entryAdded" and params.get("entry", {}).get("level") in ("error", "warning"):
                out.append(f"log: {params['entry'].get('text')} {params['entry'].get('url', '')}")
            elif method == "Network.loadingFailed":
                out.append(f"failed load: {params.get('errorText')}")
        return out

    def requests(self) -> list[str]:
        return [e["params"]["request"]["url"] for e in self.events if e.get("method") == "Network.requestWillBeSent"]

    def close(self) -> None:
        try:
            self.send("Browser.close", session=False)
        except (BrowserError, OSError):
            pass
        try:
            self.proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait(timeout=10)
        for fd in (self._to_browser, self._from_browser):
            try:
                os.close(fd)
            except OSError:
                pass
        self.profile.cleanup()

    def __enter__(self) -> "Browser":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

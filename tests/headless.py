"""A small client for headless Chromium over the DevTools protocol, for the page tests.

Chromium is started with ``--remote-debugging-pipe``: it reads protocol messages from file
descriptor 3 and writes to 4, each a JSON object ended by a NUL byte (no WebSocket, no
port, nothing but the standard library). The flags are the ones this machine needs for a
headless browser without network access (see DEVELOPERS.md).
"""

from __future__ import annotations

import base64
import contextlib
import json
import os
import select
import shutil
import subprocess
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

FLAGS = (
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-quic",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--hide-scrollbars",
    "--remote-debugging-pipe",
)
TIMEOUT = 60.0


def chromium() -> str | None:
    """The Chromium executable, or None when it is not installed."""
    return shutil.which("chromium") or shutil.which("chromium-browser")


@dataclass
class PageResult:
    """What loading one page showed.

    Attributes
    ----------
    errors : list of str
        Console errors, uncaught exceptions and log entries of level error (failed loads).
    facts : dict
        The value of the expression evaluated in the page after it loaded.
    screenshot : Path
        The full-page PNG.
    """

    errors: list[str] = field(default_factory=list)
    facts: Any = None
    screenshot: Path | None = None


class Browser:
    """One headless Chromium, driven through the pipe."""

    def __init__(self, executable: str, profile: Path) -> None:
        to_browser, self._send = os.pipe()
        self._receive, from_browser = os.pipe()

        def wire() -> None:  # in the child: the pipe ends on fds 3 and 4
            os.dup2(to_browser, 3)
            os.dup2(from_browser, 4)

        # The child closes every other descriptor after wire() runs, so 3 and 4 are kept.
        self.process = subprocess.Popen(
            [executable, *FLAGS, f"--user-data-dir={profile}", "about:blank"],
            preexec_fn=wire,  # the test starts no threads that could race with it
            pass_fds=(3, 4),
            stdin=subprocess.DEVNULL,
            stdout=subprocess.DEVNULL,
            stderr=subprocess.DEVNULL,
        )
        os.close(to_browser)
        os.close(from_browser)
        self._buffer = b""
        self._next_id = 0
        self.events: list[dict[str, Any]] = []

    def close(self) -> None:
        """Ask the browser to quit, and make sure it did."""
        with contextlib.suppress(OSError, RuntimeError, TimeoutError):
            self.call("Browser.close")
        try:
            self.process.wait(timeout=10)
        except subprocess.TimeoutExpired:
            self.process.kill()
            self.process.wait()
        os.close(self._send)
        os.close(self._receive)

    def call(self, method: str, session: str | None = None, **params: Any) -> dict[str, Any]:
        """Send one command and wait for its answer (events on the way are kept)."""
        self._next_id += 1
        message: dict[str, Any] = {"id": self._next_id, "method": method, "params": params}
        if session:
            message["sessionId"] = session
        os.write(self._send, json.dumps(message).encode() + b"\0")
        while True:
            reply = self._read()
            if reply.get("id") == self._next_id:
                if "error" in reply:
                    raise RuntimeError(f"{method}: {reply['error']}")
                result: dict[str, Any] = reply.get("result", {})
                return result
            self.events.append(reply)

    def wait_for(self, method: str, session: str) -> dict[str, Any]:
        """Wait for an event of a session (those already received count)."""
        while True:
            for event in self.events:
                if event.get("method") == method and event.get("sessionId") == session:
                    return event
            self.events.append(self._read())

    def _read(self) -> dict[str, Any]:
        deadline = time.monotonic() + TIMEOUT
        while b"\0" not in self._buffer:
            left = deadline - time.monotonic()
            if left <= 0 or not select.select([self._receive], [], [], left)[0]:
                raise TimeoutError("no answer from chromium")
            chunk = os.read(self._receive, 1 << 20)
            if not chunk:
                raise RuntimeError("chromium closed the pipe")
            self._buffer += chunk
        message, self._buffer = self._buffer.split(b"\0", 1)
        loaded: dict[str, Any] = json.loads(message)
        return loaded

    def load(self, url: str, screenshot: Path, expression: str, width: int = 1200) -> PageResult:
        """Open ``url``, wait for its load event, evaluate ``expression`` and take a
        full-page screenshot; report what went wrong on the page."""
        target = self.call("Target.createTarget", url="about:blank")["targetId"]
        session = self.call("Target.attachToTarget", targetId=target, flatten=True)["sessionId"]
        for domain in ("Runtime", "Log", "Page"):
            self.call(f"{domain}.enable", session)
        self.call(
            "Emulation.setDeviceMetricsOverride",
            session,
            width=width,
            height=900,
            deviceScaleFactor=1,
            mobile=False,
        )
        self.call("Page.navigate", session, url=url)
        self.wait_for("Page.loadEventFired", session)
        value = self.call("Runtime.evaluate", session, expression=expression, returnByValue=True)
        size = self.call("Page.getLayoutMetrics", session)["cssContentSize"]
        shot = self.call(
            "Page.captureScreenshot",
            session,
            format="png",
            captureBeyondViewport=True,
            clip={"x": 0, "y": 0, "width": width, "height": size["height"], "scale": 1},
        )
        screenshot.write_bytes(base64.b64decode(shot["data"]))
        result = PageResult(self._errors(session), value["result"].get("value"), screenshot)
        self.call("Target.closeTarget", targetId=target)
        return result

    def _errors(self, session: str) -> list[str]:
        found = []
        for event in self.events:
            if event.get("sessionId") != session:
                continue
            method, params = event.get("method"), event.get("params", {})
            if method == "Runtime.consoleAPICalled" and params.get("type") in ("error", "assert"):
                found.append("console: " + " ".join(str(a.get("value")) for a in params["args"]))
            elif method == "Runtime.exceptionThrown":
                found.append("exception: " + params["exceptionDetails"].get("text", ""))
            elif method == "Log.entryAdded" and params["entry"].get("level") == "error":
                found.append("log: " + params["entry"].get("text", ""))
        return found

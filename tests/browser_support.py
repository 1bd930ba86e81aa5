"""Headless Chromium driven over the DevTools protocol on a pipe (--remote-debugging-pipe): no port, no network.

Chromium reads commands from its file descriptor 3 and writes replies and
events to 4, each a JSON text ended by a NUL byte. A small Python program
puts the two pipes on those numbers and then runs Chromium in its place. Every wait has a
timeout, and :meth:`Browser.close` kills and reaps the process whatever state
it is in.
"""

from __future__ import annotations

import base64
import json
import os
import select
import shutil
import subprocess
import sys
import tempfile
import time
from typing import Any

CHROMIUM = shutil.which("chromium")  # Debian package: /usr/bin/chromium

FLAGS = (
    "--headless", "--no-sandbox", "--disable-gpu", "--disable-dev-shm-usage",
    # WebGL in software (SwiftShader) for the interactive map's scattergl points
    "--enable-unsafe-swiftshader",
    "--disable-background-networking", "--disable-component-update", "--disable-sync", "--no-first-run",
    "--disable-extensions", "--hide-scrollbars", "--mute-audio",
    # no name resolves: a page that tried to reach a server would fail to
    "--host-resolver-rules=MAP * ~NOTFOUND",
)
#: argv: the pipe Chromium reads, the pipe it writes, then Chromium's command line; moved to 3 and 4 by way
#: of numbers above 9, so that neither overwrites the other
_ON_3_AND_4 = ("import fcntl, os, sys; r, w = (fcntl.fcntl(int(a), fcntl.F_DUPFD, 10) for a in sys.argv[1:3]); "
               "os.dup2(r, 3); os.dup2(w, 4); os.execv(sys.argv[3], sys.argv[3:])")


class Browser:
    """One headless Chromium; :meth:`open` a page, then :meth:`evaluate`, :meth:`click`, :meth:`pdf` on it."""

    def __init__(self, timeout_s: float = 30.0):
        assert CHROMIUM is not None
        self.timeout_s = timeout_s
        self.profile = tempfile.mkdtemp(prefix="geopress-chromium-")
        to_chromium, self._w = os.pipe()
        self._r, from_chromium = os.pipe()
        args = [CHROMIUM, *FLAGS, "--remote-debugging-pipe", f"--user-data-dir={self.profile}", "about:blank"]
        try:
            self.proc = subprocess.Popen(
                [sys.executable, "-c", _ON_3_AND_4, str(to_chromium), str(from_chromium), *args],
                pass_fds=(to_chromium, from_chromium), stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL,
                stderr=subprocess.DEVNULL)
        finally:
            os.close(to_chromium)
            os.close(from_chromium)
        self._buf = b""
        self._id = 0
        self.events: list[dict[str, Any]] = []
        self.session: str | None = None

    # -- protocol
    def _recv(self, deadline: float) -> dict[str, Any]:
        while b"\0" not in self._buf:
            left = deadline - time.monotonic()
            if left <= 0:
                raise TimeoutError("Chromium did not answer in time")
            ready, _, _ = select.select([self._r], [], [], left)
            if ready:
                chunk = os.read(self._r, 1 << 20)
                if not chunk:
                    raise EOFError("Chromium closed its pipe")
                self._buf += chunk
        message, _, self._buf = self._buf.partition(b"\0")
        return json.loads(message)

    def send(self, method: str, params: dict[str, Any] | None = None, *, page: bool = True) -> dict[str, Any]:
        """Send one command (to the open page's session unless ``page=False``) and return its result."""
        self._id += 1
        msg: dict[str, Any] = {"id": self._id, "method": method, "params": params or {}}
        if page and self.session:
            msg["sessionId"] = self.session
        os.write(self._w, json.dumps(msg).encode() + b"\0")
        deadline = time.monotonic() + self.timeout_s
        while True:
            reply = self._recv(deadline)
            if reply.get("id") == self._id:
                if "error" in reply:
                    raise RuntimeError(f"{method}: {reply['error']}")
                return reply.get("result", {})
            self.events.append(reply)

    def wait_event(self, method: str) -> dict[str, Any]:
        deadline = time.monotonic() + self.timeout_s
        while True:
            for e in self.events:
                if e.get("method") == method:
                    return e
            self.events.append(self._recv(deadline))

    # -- page
    def open(self, url: str, *, width: int = 1400, height: int = 1000, offline: bool = True) -> None:
        """Open ``url`` in a new tab of ``width`` x ``height`` CSS px, the network emulated offline, and wait for load."""
        target = self.send("Target.createTarget", {"url": "about:blank"}, page=False)["targetId"]
        self.session = self.send("Target.attachToTarget", {"targetId": target, "flatten": True},
                                 page=False)["sessionId"]
        self.events.clear()
        self.send("Page.enable")
        self.send("Network.enable")
        if offline:
            self.send("Network.emulateNetworkConditions",
                      {"offline": True, "latency": 0, "downloadThroughput": -1, "uploadThroughput": -1})
        self.send("Emulation.setDeviceMetricsOverride",
                  {"width": width, "height": height, "deviceScaleFactor": 1, "mobile": False})
        self.send("Page.navigate", {"url": url})
        self.wait_event("Page.loadEventFired")

    def requests(self) -> list[str]:
        """The URL of every request the page made so far."""
        return [e["params"]["request"]["url"] for e in self.events if e.get("method") == "Network.requestWillBeSent"]

    def evaluate(self, expression: str) -> Any:
        """The value of a JavaScript expression in the page (promises awaited); a thrown error fails."""
        r = self.send("Runtime.evaluate", {"expression": expression, "returnByValue": True, "awaitPromise": True})
        if "exceptionDetails" in r:
            raise RuntimeError(f"page script failed: {r['exceptionDetails']}")
        return r["result"].get("value")

    def wait_for(self, expression: str) -> Any:
        """Poll ``expression`` until it is truthy; its value."""
        deadline = time.monotonic() + self.timeout_s
        while time.monotonic() < deadline:
            value = self.evaluate(expression)
            if value:
                return value
            time.sleep(0.1)
        raise TimeoutError(f"never true in the page: {expression}")

    def click(self, x: float, y: float) -> None:
        """A real left click at viewport CSS px (x, y): the mouse moves there, presses and releases."""
        for kind in ("mouseMoved", "mousePressed", "mouseReleased"):
            self.send("Input.dispatchMouseEvent",
                      {"type": kind, "x": x, "y": y, "button": "left" if kind != "mouseMoved" else "none",
                       "clickCount": 0 if kind == "mouseMoved" else 1})

    def pdf(self) -> bytes:
        """The page printed to PDF as Chromium's print dialog would (US Letter, backgrounds, no header or footer)."""
        r = self.send("Page.printToPDF", {"printBackground": True, "displayHeaderFooter": False,
                                          "paperWidth": 8.5, "paperHeight": 11.0, "preferCSSPageSize": True})
        return base64.b64decode(r["data"])

    def close(self) -> None:
        try:
            self.send("Browser.close", page=False)
        except (OSError, EOFError, TimeoutError, RuntimeError):
            pass
        try:
            self.proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait(timeout=10)
        for fd in (self._r, self._w):
            try:
                os.close(fd)
            except OSError:
                pass
        shutil.rmtree(self.profile, ignore_errors=True)

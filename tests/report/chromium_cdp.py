"""A minimal driver for headless Chromium over the Chrome DevTools Protocol, standard library only.

Chromium is started with ``--remote-debugging-pipe``: it reads protocol commands from file
descriptor 3 and writes replies and events to descriptor 4, each message one JSON object
followed by a NUL byte (the transport Chromium documents for ``--remote-debugging-pipe``;
the same one Puppeteer's ``pipe: true`` mode uses). No network port, no websocket, no
third-party package. Commands and event names are those of the protocol's stable domains
(Target, Page, Runtime, Log, Emulation).

The browser is Debian's ``chromium`` package (``apt-get install -y chromium``); nothing here
downloads a browser.
"""

from __future__ import annotations

import base64
import contextlib
import fcntl
import json
import os
import select
import shutil
import subprocess
import tempfile
import time
from pathlib import Path
from typing import Any

CHROMIUM_CANDIDATES = ("/usr/bin/chromium", "chromium", "chromium-browser")


def _high(fd: int) -> int:
    """A close-on-exec duplicate of ``fd`` numbered 10 or above; ``fd`` itself is closed."""
    moved = fcntl.fcntl(fd, fcntl.F_DUPFD_CLOEXEC, 10)
    os.close(fd)
    return moved


def find_chromium() -> str | None:
    """Path of a Chromium binary, or None (``TILTAUDIT_CHROMIUM`` may name one)."""
    named = os.environ.get("TILTAUDIT_CHROMIUM")
    if named:
        return named if Path(named).exists() or shutil.which(named) else None
    for candidate in CHROMIUM_CANDIDATES:
        found = shutil.which(candidate) or (candidate if Path(candidate).exists() else None)
        if found:
            return found
    return None


class BrowserError(RuntimeError):
    """The browser failed to start, answered with an error, or timed out."""


class Chromium:
    """One headless Chromium process with one page; use as a context manager."""

    def __init__(self, binary: str, *, timeout: float = 60.0) -> None:
        self.binary = binary
        self.timeout = timeout
        self.events: list[dict[str, Any]] = []
        self._next_id = 0
        self._buffer = b""
        self._profile = tempfile.TemporaryDirectory(prefix="tiltaudit-chromium-")
        self.session: str | None = None

    def __enter__(self) -> Chromium:
        # Both pipe ends the child needs are first moved above fd 10, so that placing them
        # on fds 3 and 4 never overwrites one with the other and always clears close-on-exec
        # (dup2 onto the same number would leave the flag set).
        cmd_read, self._cmd_write = (_high(fd) for fd in os.pipe())
        self._res_read, res_write = (_high(fd) for fd in os.pipe())

        def wire_fds() -> None:  # runs in the child before exec: fds 3 and 4 are the pipe
            os.dup2(cmd_read, 3)
            os.dup2(res_write, 4)

        args = [
            self.binary,
            "--headless",
            "--remote-debugging-pipe",
            f"--user-data-dir={self._profile.name}",
            "--no-first-run",
            "--no-default-browser-check",
            "--disable-gpu",
            "--disable-extensions",
            "--disable-background-networking",
            "--disable-component-update",
            "--disable-sync",
            "--disable-dev-shm-usage",
            "--hide-scrollbars",
            "--mute-audio",
        ]
        # Chromium's sandbox refuses to start as root and in containers without user
        # namespaces (common in CI); the pages loaded here are local files of our own.
        args += ["--no-sandbox", "about:blank"]
        self._proc = subprocess.Popen(  # fixed argument list, no shell
            args,
            stdin=subprocess.DEVNULL,
            stdout=subprocess.DEVNULL,
            stderr=subprocess.PIPE,
            preexec_fn=wire_fds,  # single-threaded test process
            close_fds=False,
        )
        os.close(cmd_read)
        os.close(res_write)
        target = self.call("Target.createTarget", {"url": "about:blank"})["targetId"]
        attached = self.call("Target.attachToTarget", {"targetId": target, "flatten": True})
        self.session = attached["sessionId"]
        for domain in ("Page", "Runtime", "Log"):
            self.call(f"{domain}.enable")
        return self

    def __exit__(self, *exc: object) -> None:
        try:
            if self._proc.poll() is None:
                self.call("Browser.close", session=False)
        except (BrowserError, OSError):
            pass
        finally:
            try:
                self._proc.wait(timeout=10)
            except subprocess.TimeoutExpired:
                self._proc.kill()  # our own child, by its handle
                self._proc.wait(timeout=10)
            for fd in (self._cmd_write, self._res_read):
                with contextlib.suppress(OSError):
                    os.close(fd)
            if self._proc.stderr is not None:
                self._proc.stderr.close()
            self._profile.cleanup()

    # -- transport ---------------------------------------------------------------------

    def _send(self, message: dict[str, Any]) -> None:
        os.write(self._cmd_write, json.dumps(message).encode("utf-8") + b"\0")

    def _receive(self, deadline: float) -> dict[str, Any]:
        while b"\0" not in self._buffer:
            left = deadline - time.monotonic()
            if left <= 0:
                raise BrowserError("timed out waiting for Chromium")
            ready, _, _ = select.select([self._res_read], [], [], left)
            if not ready:
                continue
            chunk = os.read(self._res_read, 1 << 20)
            if not chunk:
                err = self._proc.stderr.read().decode(errors="replace") if self._proc.stderr else ""
                raise BrowserError(f"Chromium closed the protocol pipe: {err[-2000:]}")
            self._buffer += chunk
        raw, self._buffer = self._buffer.split(b"\0", 1)
        return json.loads(raw)

    def call(
        self, method: str, params: dict[str, Any] | None = None, *, session: bool = True
    ) -> dict[str, Any]:
        """Send one command and return its result; events that arrive meanwhile are kept."""
        self._next_id += 1
        message: dict[str, Any] = {"id": self._next_id, "method": method, "params": params or {}}
        if session and self.session is not None:
            message["sessionId"] = self.session
        self._send(message)
        deadline = time.monotonic() + self.timeout
        while True:
            reply = self._receive(deadline)
            if reply.get("id") == self._next_id:
                if "error" in reply:
                    raise BrowserError(f"{method}: {reply['error']}")
                return reply.get("result", {})
            if "method" in reply:
                self.events.append(reply)

    def wait_for(self, event: str) -> dict[str, Any]:
        """Wait for the next event of that name (or return one already received)."""
        for i, seen in enumerate(self.events):
            if seen.get("method") == event:
                return self.events.pop(i)
        deadline = time.monotonic() + self.timeout
        while True:
            message = self._receive(deadline)
            if message.get("method") == event:
                return message
            if "method" in message:
                self.events.append(message)

    # -- page helpers --------------------------------------------------------------------

    def open(self, path: Path, *, width: int = 1280, height: int = 900) -> None:
        """Load a local file and wait for its load event."""
        self.call(
            "Emulation.setDeviceMetricsOverride",
            {"width": width, "height": height, "deviceScaleFactor": 1, "mobile": False},
        )
        self.events.clear()
        self.call("Page.navigate", {"url": path.resolve().as_uri()})
        self.wait_for("Page.loadEventFired")

    def evaluate(self, expression: str) -> Any:
        """Evaluate JavaScript in the page and return its JSON value."""
        result = self.call(
            "Runtime.evaluate",
            {"expression": expression, "returnByValue": True, "awaitPromise": True},
        )
        if "exceptionDetails" in result:
            raise BrowserError(f"evaluate failed: {result['exceptionDetails']}")
        return result["result"].get("value")

    def problems(self) -> list[str]:
        """Console errors and warnings, uncaught exceptions, log errors and dialogs so far."""
        self.call("Runtime.evaluate", {"expression": "0"})  # flush pending events
        found = []
        for event in self.events:
            method, params = event.get("method"), event.get("params", {})
            if method == "Runtime.consoleAPICalled" and params.get("type") in (
                "error",
                "warning",
                "assert",
            ):
                found.append(f"console.{params['type']}: {params.get('args')}")
            elif method == "Runtime.exceptionThrown":
                found.append(f"exception: {params.get('exceptionDetails')}")
            elif method == "Log.entryAdded" and params.get("entry", {}).get("level") in (
                "error",
                "warning",
            ):
                found.append(f"log: {params['entry']}")
            elif method == "Page.javascriptDialogOpening":
                found.append(f"dialog opened: {params.get('message')!r}")
        return found

    def screenshot(self, path: Path, *, clip: dict[str, float] | None = None) -> bytes:
        """A PNG of the page (``clip`` in CSS pixels, beyond the viewport if needed)."""
        params: dict[str, Any] = {"format": "png", "captureBeyondViewport": True}
        if clip is not None:
            params["clip"] = {**clip, "scale": 1}
        data = base64.b64decode(self.call("Page.captureScreenshot", params)["data"])
        path.write_bytes(data)
        return data

    def print_pdf(self) -> bytes:
        """The page printed to PDF with its print style sheet (A4)."""
        result = self.call(
            "Page.printToPDF",
            {
                "paperWidth": 8.27,
                "paperHeight": 11.69,
                "printBackground": True,
                "preferCSSPageSize": True,
            },
        )
        return base64.b64decode(result["data"])

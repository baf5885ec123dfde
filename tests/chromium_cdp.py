"""Drive a real headless Chromium over the DevTools protocol on a pipe (test helper).

``--remote-debugging-pipe`` makes Chromium read protocol messages from fd 3 and write them
to fd 4, each a JSON object followed by a NUL byte; no port is opened.  The helper loads a
page, records console errors and uncaught exceptions, waits for a condition, and takes a
screenshot.  Every wait has a deadline and the browser is killed on exit, so a test using
it cannot hang.
"""

from __future__ import annotations

import base64
import fcntl
import json
import os
import queue
import shutil
import subprocess
import tempfile
import threading
import time
from pathlib import Path
from typing import Any

CHROMIUM = shutil.which("chromium") or "/usr/bin/chromium"
FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync",
         "--disable-extensions", "--mute-audio", "--hide-scrollbars"]


class CDPError(RuntimeError):
    pass


class Browser:
    """One headless Chromium; use as a context manager."""

    def __init__(self, *, timeout: float = 60.0) -> None:
        self.timeout = timeout
        self.profile = tempfile.mkdtemp(prefix="shiftwatch-chromium-")
        to_r, self._to_w = os.pipe()
        self._from_r, from_w = os.pipe()
        # move the child's ends above 9 so bash's "3<&N 4>&M" cannot clobber one with the
        # other (fds 3 and 4 may be the pipe ends themselves); dash refuses fds above 9
        for_child = []
        for fd in (to_r, from_w):
            high = fcntl.fcntl(fd, fcntl.F_DUPFD_CLOEXEC, 10)
            os.close(fd)
            for_child.append(high)
        to_r, from_w = for_child
        bash = shutil.which("bash") or "/bin/bash"
        cmd = [bash, "-c", f'exec "$@" 3<&{to_r} 4>&{from_w}', "bash", CHROMIUM, *FLAGS,
               f"--user-data-dir={self.profile}", "--remote-debugging-pipe", "about:blank"]
        self._log = open(Path(self.profile) / "stderr.log", "w+b")  # noqa: SIM115
        self.proc = subprocess.Popen(cmd, stdin=subprocess.DEVNULL, stdout=self._log,
                                     stderr=self._log, pass_fds=(to_r, from_w))
        os.close(to_r)
        os.close(from_w)
        self._id = 0
        self._replies: dict[int, queue.Queue] = {}
        self.events: list[dict[str, Any]] = []
        self._lock = threading.Lock()
        self._reader = threading.Thread(target=self._read, daemon=True)
        self._reader.start()

    def _read(self) -> None:
        buf = b""
        while True:
            try:
                chunk = os.read(self._from_r, 1 << 16)
            except OSError:
                return
            if not chunk:
                return
            buf += chunk
            while b"\0" in buf:
                raw, buf = buf.split(b"\0", 1)
                msg = json.loads(raw)
                if "id" in msg:
                    with self._lock:
                        q = self._replies.get(msg["id"])
                    if q is not None:
                        q.put(msg)
                else:
                    with self._lock:
                        self.events.append(msg)

    def call(self, method: str, params: dict[str, Any] | None = None, *,
             session: str | None = None, timeout: float | None = None) -> dict[str, Any]:
        """Send one command and wait for its reply (CDPError on error or timeout)."""
        with self._lock:
            self._id += 1
            mid = self._id
            q: queue.Queue = queue.Queue()
            self._replies[mid] = q
        msg: dict[str, Any] = {"id": mid, "method": method, "params": params or {}}
        if session:
            msg["sessionId"] = session
        os.write(self._to_w, json.dumps(msg).encode() + b"\0")
        try:
            reply = q.get(timeout=timeout or self.timeout)
        except queue.Empty:
            raise CDPError(f"{method}: no reply within {timeout or self.timeout} s") from None
        if "error" in reply:
            raise CDPError(f"{method}: {reply['error']}")
        return reply.get("result", {})

    def wait_event(self, method: str, *, session: str, timeout: float) -> dict[str, Any]:
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            with self._lock:
                for ev in self.events:
                    if ev.get("method") == method and ev.get("sessionId") == session:
                        return ev
            time.sleep(0.05)
        raise CDPError(f"no {method} within {timeout} s")

    def open(self, url: str, *, width: int = 1280, height: int = 1600,
             load_timeout: float = 30.0) -> str:
        """Open ``url`` in a new tab; return its session id once the load event fired."""
        target = self.call("Target.createTarget", {"url": "about:blank"})["targetId"]
        session = self.call("Target.attachToTarget",
                            {"targetId": target, "flatten": True})["sessionId"]
        for domain in ("Runtime.enable", "Log.enable", "Page.enable"):
            self.call(domain, session=session)
        self.call("Emulation.setDeviceMetricsOverride",
                  {"width": width, "height": height, "deviceScaleFactor": 1,
                   "mobile": False}, session=session)
        self.call("Page.navigate", {"url": url}, session=session)
        self.wait_event("Page.loadEventFired", session=session, timeout=load_timeout)
        return session

    def evaluate(self, expression: str, *, session: str) -> Any:
        res = self.call("Runtime.evaluate", {"expression": expression, "returnByValue": True,
                                             "awaitPromise": True}, session=session)
        if "exceptionDetails" in res:
            raise CDPError(f"evaluate failed: {res['exceptionDetails']}")
        return res["result"].get("value")

    def wait_for(self, expression: str, *, session: str, timeout: float) -> Any:
        """Poll a JavaScript expression until it is truthy; return its value."""
        deadline = time.monotonic() + timeout
        value = None
        while time.monotonic() < deadline:
            value = self.evaluate(expression, session=session)
            if value:
                return value
            time.sleep(0.25)
        raise CDPError(f"{expression!r} still {value!r} after {timeout} s")

    def screenshot(self, path: Path, *, session: str, full_page: bool = True) -> Path:
        params: dict[str, Any] = {"format": "png"}
        if full_page:
            params["captureBeyondViewport"] = True
        data = self.call("Page.captureScreenshot", params, session=session)["data"]
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_bytes(base64.b64decode(data))
        return path

    def console_errors(self, session: str) -> list[str]:
        """Console errors, failed asserts, uncaught exceptions and error log entries."""
        out = []
        with self._lock:
            events = [e for e in self.events if e.get("sessionId") == session]
        for ev in events:
            m, p = ev.get("method"), ev.get("params", {})
            if m == "Runtime.consoleAPICalled" and p.get("type") in ("error", "assert"):
                out.append("console." + p["type"] + ": " + " ".join(
                    str(a.get("value", a.get("description", ""))) for a in p.get("args", [])))
            elif m == "Runtime.exceptionThrown":
                d = p.get("exceptionDetails", {})
                out.append("uncaught: " + str(d.get("exception", {}).get("description")
                                              or d.get("text")))
            elif m == "Log.entryAdded" and p.get("entry", {}).get("level") == "error":
                e = p["entry"]
                out.append(f"log ({e.get('source')}): {e.get('text')} {e.get('url', '')}")
        return out

    def close(self) -> None:
        try:
            if self.proc.poll() is None:
                try:
                    self.call("Browser.close", timeout=5)
                except (CDPError, OSError):
                    pass
                try:
                    self.proc.wait(timeout=10)
                except subprocess.TimeoutExpired:
                    self.proc.kill()
                    self.proc.wait(timeout=10)
        finally:
            for fd in (self._to_w, self._from_r):
                try:
                    os.close(fd)
                except OSError:
                    pass
            self._log.close()
            shutil.rmtree(self.profile, ignore_errors=True)

    def __enter__(self) -> Browser:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def pixel_spread(path: Path) -> tuple[float, int]:
    """Standard deviation of grey levels (0-255) and number of distinct colours of a PNG."""
    import numpy as np
    from PIL import Image

    with Image.open(path) as im:
        rgb = np.asarray(im.convert("RGB"))
    grey = rgb.astype(float).mean(axis=2)
    colours = len(np.unique(rgb.reshape(-1, 3)[:: max(1, rgb.size // 3 // 200000)], axis=0))
    return float(grey.std()), colours

"""A real TensorBoard server on loopback for tests: start it, read its port, query its API."""

from __future__ import annotations

import json
import queue
import re
import subprocess
import sys
import threading
import time
import urllib.parse
import urllib.request
from pathlib import Path


def start_tensorboard(logdir: Path | str, *, timeout: float = 60.0) -> tuple[subprocess.Popen, int]:
    """Start ``tensorboard --logdir LOGDIR --host 127.0.0.1 --port 0`` and return the
    process and the port it prints; the caller kills the process."""
    exe = Path(sys.executable).with_name("tensorboard")
    proc = subprocess.Popen(
        [str(exe), "--logdir", str(logdir), "--host", "127.0.0.1", "--port", "0"],
        stdout=subprocess.DEVNULL,
        stderr=subprocess.PIPE,
        text=True,
    )
    lines: queue.Queue[str] = queue.Queue()
    threading.Thread(target=lambda: [lines.put(x) for x in proc.stderr], daemon=True).start()
    deadline, seen = time.monotonic() + timeout, []
    while time.monotonic() < deadline:
        try:
            line = lines.get(timeout=0.5)
        except queue.Empty:
            if proc.poll() is not None:
                break
            continue
        seen.append(line)
        found = re.search(r"http://127\.0\.0\.1:(\d+)/", line)
        if found:
            return proc, int(found.group(1))
    proc.kill()
    raise AssertionError("TensorBoard did not print its address:\n" + "".join(seen))


def get_json(port: int, path: str, **params: str):
    """GET ``http://127.0.0.1:PORT/PATH?params`` from the server and decode the JSON."""
    url = f"http://127.0.0.1:{port}/{path}"
    if params:
        url += "?" + urllib.parse.urlencode(params)
    with urllib.request.urlopen(url, timeout=10) as response:
        return json.loads(response.read().decode())


def stop_tensorboard(proc: subprocess.Popen) -> None:
    """Terminate the server; kill it if it does not exit within 15 s."""
    proc.terminate()
    try:
        proc.wait(timeout=15)
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.wait(timeout=15)

"""Real headless Chromium: the report renders, and TensorBoard's custom-scalars page draws.

Screenshots are kept under ``test-artifacts/`` (git-ignored).  Every browser and server
call has a deadline (tests/chromium_cdp.py) and each test a pytest-timeout, so nothing
here can hang.  Chromium is Debian's ``chromium`` package (``.ci/run`` installs it).
"""

from __future__ import annotations

import math
import time
from pathlib import Path

import pytest
from chromium_cdp import CHROMIUM, Browser, pixel_spread
from eventlog_factory import Scenario, write_log
from tensorboard_server import start_tensorboard, stop_tensorboard

from shiftwatch.cli import main
from shiftwatch.cli.render import Html, page

ARTIFACTS = Path(__file__).resolve().parents[1] / "test-artifacts"


def _not_blank(shot: Path) -> None:
    spread, colours = pixel_spread(shot)
    assert spread > 15 and colours > 40, (shot, spread, colours)


@pytest.fixture(scope="module")
def browser():
    assert Path(CHROMIUM).exists(), "Debian's chromium package is needed: apt-get install chromium"
    with Browser(timeout=60) as b:
        yield b


@pytest.mark.timeout(180)
def test_report_renders_in_chromium_without_console_errors(browser, tmp_path):
    d = tmp_path / "run"
    write_log(d, Scenario(layers=[("stem.conv", "Conv2d", 3), ("<img src=x onerror=alert(1)>",
                                                               "Linear", 4),
                                  ("block1.conv", "Conv2d", 8), ("head.fc", "Linear", 10)],
                          shifts={"block1.conv": (400, 1.0)}, collapse={"head.fc": 650},
                          samples=80, seed=9))
    out = tmp_path / "report.html"
    assert main(["report", str(d), "-o", str(out), "--curves", "4"]) == 0
    s = browser.open(out.as_uri())
    sizes = browser.evaluate(
        "Array.from(document.images).map(i => [i.complete, i.naturalWidth, i.naturalHeight])",
        session=s)
    assert len(sizes) == 2 + 4 and all(c and w > 300 and h > 150 for c, w, h in sizes)
    # the layer named like markup is text, not an element; no handler ran
    assert browser.evaluate("document.querySelectorAll('img:not(.plot)').length", session=s) == 0
    assert "<img src=x onerror=alert(1)>" in browser.evaluate(
        "document.getElementById('layers').innerText", session=s)
    # the filter box works: typing a layer name hides the other rows
    shown = browser.evaluate(
        "(() => { const b = document.querySelector('input[data-filter=layers]');"
        " b.value = 'stem'; b.dispatchEvent(new Event('input'));"
        " return Array.from(document.querySelectorAll('#layers tbody tr'))"
        ".filter(r => !r.hidden).map(r => r.cells[1].innerText); })()", session=s)
    assert shown == ["stem.conv"]
    shot = browser.screenshot(ARTIFACTS / "report.png", session=s)
    _not_blank(shot)
    assert browser.console_errors(s) == []


@pytest.mark.timeout(120)
def test_console_error_and_blocked_fetch_are_detected(browser, tmp_path):
    """The checks above can fail: a console error and an uncaught exception are caught, and
    on a report page an outside image and an injected script are refused by its
    Content-Security-Policy, which the browser reports."""
    plain = tmp_path / "plain.html"
    plain.write_text("<!DOCTYPE html><html><body><p>x</p><script>console.error('boom');"
                     "throw new Error('kaput');</script></body></html>")
    s = browser.open(plain.as_uri())
    time.sleep(0.3)
    errors = "\n".join(browser.console_errors(s))
    assert "boom" in errors and "kaput" in errors
    bad = tmp_path / "bad.html"
    bad.write_text(page("bad", "negative control", [Html(
        '<img src="http://127.0.0.1:9/x.png"><script>document.title = "ran";</script>')]))
    s = browser.open(bad.as_uri())
    time.sleep(0.3)
    errors = browser.console_errors(s)
    assert any("Content Security Policy" in e and "127.0.0.1:9" in e for e in errors)
    assert any("Content Security Policy" in e and "script" in e for e in errors)
    assert browser.evaluate("document.title", session=s) == "bad"  # the script did not run


def _tensorboard_logdir(root: Path) -> Path:
    """Event files with a custom-scalars layout, written with PyTorch's SummaryWriter."""
    from torch.utils.tensorboard import SummaryWriter

    run = root / "demo"
    w = SummaryWriter(str(run))
    w.add_custom_scalars({"shift / noise": {
        "vs reference": ["Multiline", [r"shift/reference/.*"]],
        "vs previous": ["Multiline", [r"shift/previous/.*"]]}})
    for step in range(0, 300, 10):
        for layer in ("stem.conv", "head.fc"):
            jump = 20.0 if layer == "head.fc" and step >= 150 else 0.0
            w.add_scalar(f"shift/reference/{layer}", 1 + 0.3 * math.sin(step / 17) + jump, step)
            w.add_scalar(f"shift/previous/{layer}", 1 + 0.3 * math.cos(step / 13), step)
    w.close()
    return root


_DEEP_TEXT = """(() => { const out = [];
  const walk = n => { if (n.shadowRoot) walk(n.shadowRoot);
    for (const c of n.childNodes) {
      if (c.nodeType === 3) out.push(c.textContent); else walk(c); } };
  walk(document.body); return out.join(' '); })()"""


@pytest.mark.timeout(180)
def test_tensorboard_custom_scalars_page(browser, tmp_path):
    logdir = _tensorboard_logdir(tmp_path / "tb")
    tb, port = start_tensorboard(logdir)
    try:
        s = browser.open(f"http://127.0.0.1:{port}/#custom_scalars", load_timeout=60)
        # charts draw after the layout and the scalars are fetched; wait for their text
        text = browser.wait_for(
            f"(t => t.includes('vs reference') && t.includes('vs previous') && t) ({_DEEP_TEXT})",
            session=s, timeout=60)
        assert "shift / noise" in text
        time.sleep(1.0)  # let the line charts finish drawing
        shot = browser.screenshot(ARTIFACTS / "tensorboard_custom_scalars.png", session=s,
                                  full_page=False)
        _not_blank(shot)
        uncaught = [e for e in browser.console_errors(s) if e.startswith("uncaught")]
        assert uncaught == []
    finally:
        stop_tensorboard(tb)

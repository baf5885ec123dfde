"""``shiftwatch report``: one self-contained, escaped HTML file with real matplotlib images."""

from __future__ import annotations

import base64
import io
import subprocess
import sys
import xml.etree.ElementTree as ET
from html.parser import HTMLParser
from pathlib import Path

import pytest
from eventlog_factory import Scenario, default_rules, write_log
from PIL import Image

from shiftwatch.cli import main

NASTY = ["<script>alert(1)</script>", 'q"uote&<b>', "cost$5$"]


class Page(HTMLParser):
    """Collects tags with attributes and the text, as a browser's parser sees them."""

    def __init__(self, text: str) -> None:
        super().__init__(convert_charrefs=True)
        self.tags: list[tuple[str, dict[str, str]]] = []
        self.text: list[str] = []
        self._in_script = False
        self.feed(text)

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))
        self._in_script = tag == "script"

    def handle_endtag(self, tag):
        self._in_script = False

    def handle_data(self, data):
        if not self._in_script:
            self.text.append(data)


@pytest.fixture(scope="module")
def run_dir(tmp_path_factory):
    d = tmp_path_factory.mktemp("rep")
    layers = [("stem.conv", "Conv2d", 3)] + [(n, "Linear", 4) for n in NASTY] + [
        ("block1.conv", "Conv2d", 8), ("head.fc", "Linear", 10)]
    write_log(d, Scenario(layers=layers, shifts={"block1.conv": (400, 1.0)},
                          collapse={"head.fc": 600}, nonfinite={"stem.conv": 500}, samples=80,
                          rules=default_rules() + [{
                              "name": "psi-raw", "metric": "psi", "against": "reference",
                              "view": "layer", "threshold": 0.25, "units": "raw",
                              "layers": ["block1.*"], "patience": 1, "cooldown": 20,
                              "severity": "warn", "phase": "train"}], seed=5))
    return d


@pytest.fixture(scope="module")
def png_report(run_dir, tmp_path_factory):
    out = tmp_path_factory.mktemp("out") / "report.html"
    assert main(["report", str(run_dir), "-o", str(out), "--title", "<i>T</i> & co",
                 "--curves", "4"]) == 0
    return out


def test_report_is_self_contained(png_report):
    page = Page(png_report.read_text(encoding="utf-8"))
    for tag, attrs in page.tags:
        for key in ("src", "href", "action", "data", "poster"):
            value = attrs.get(key)
            assert value is None or value.startswith("data:image/"), (tag, key, value)
        assert tag not in ("link", "iframe", "object", "embed")
    csp = [a["content"] for t, a in page.tags if t == "meta"
           and a.get("http-equiv") == "Content-Security-Policy"]
    assert csp and "default-src 'none'" in csp[0] and "img-src data:" in csp[0]
    imgs = [a["src"] for t, a in page.tags if t == "img"]
    assert len(imgs) >= 2 + 3  # two heatmaps (train, val) and curves
    for src in imgs:
        head, data = src.split(",", 1)
        assert head == "data:image/png;base64"
        with Image.open(io.BytesIO(base64.b64decode(data))) as im:  # PIL decodes it
            im.load()
            assert im.size[0] > 300 and im.size[1] > 150


def test_user_text_is_escaped(png_report):
    raw = png_report.read_text(encoding="utf-8")
    page = Page(raw)
    assert [t for t, _ in page.tags].count("script") == 1  # only the page's own filter script
    assert "b" not in [t for t, _ in page.tags] and "i" not in [t for t, _ in page.tags]
    text = "".join(page.text)
    for name in NASTY:
        assert name in text  # shown literally, as text
    assert "<i>T</i> & co" in text
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in raw


def test_sections_alert_table_and_settings(png_report):
    text = "".join(Page(png_report.read_text(encoding="utf-8")).text)
    for heading in ("Run", "Shift / noise, layers x steps", "Layers by peak shift",
                    "Curves of", "Alerts", "Run settings", "Rules", "Watched layers"):
        assert heading in text
    assert "sudden-shift" in text and "collapsed-input" in text and "psi-raw" in text
    assert "every_n_steps" in text and "reference_steps" in text


def _svg_texts(src: str) -> list[str]:
    root = ET.fromstring(base64.b64decode(src.split(",", 1)[1]))
    return ["".join(e.itertext()) for e in root.iter() if e.tag.endswith("text")]


def test_svg_curves_carry_thresholds_and_alert_markers(run_dir, tmp_path):
    out = tmp_path / "r.html"
    assert main(["report", str(run_dir), "-o", str(out), "--format", "svg", "--curves", "3"]) == 0
    page = Page(out.read_text(encoding="utf-8"))
    srcs = [a["src"] for t, a in page.tags if t == "img"]
    assert all(s.startswith("data:image/svg+xml;base64,") for s in srcs)
    by_alt = {a["alt"]: a["src"] for t, a in page.tags if t == "img"}
    curve = _svg_texts(by_alt["curves of layer block1.conv"])
    assert "threshold 6: sudden-shift (fail)" in curve
    assert "threshold 0.25: psi-raw (warn)" in curve  # raw-unit rule: its own panel
    assert "alert (colour: severity)" in curve
    heat = _svg_texts(by_alt["heatmap of shift / noise, train phase"])
    assert "fail alert" in heat and any(n in heat for n in NASTY[:1])  # literal layer name
    assert "cost$5$" in heat  # '$' is not read as math text
    head = _svg_texts(by_alt["curves of layer head.fc"])
    assert "threshold 1e-06: collapsed-input (fail)" in head  # std panel for the collapse
    assert len(srcs) == 2 + 3


def test_output_never_clobbers_user_files(run_dir, tmp_path, capsys):
    log = Path(run_dir) / "events.jsonl"
    before = log.read_bytes()
    assert main(["report", str(run_dir), "-o", str(log)]) == 2
    assert "event log being read" in capsys.readouterr().err
    notes = tmp_path / "notes.txt"
    notes.write_text("my notes")
    assert main(["report", str(run_dir), "-o", str(notes)]) == 2
    assert "not an HTML page" in capsys.readouterr().err
    assert main(["report", str(run_dir), "-o", str(tmp_path)]) == 2
    assert main(["report", str(run_dir), "-o", str(tmp_path / "no" / "r.html")]) == 2
    assert log.read_bytes() == before and notes.read_text() == "my notes"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["notes.txt"]  # no temp files left


def _run_python(code: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                          timeout=120)


def test_missing_matplotlib_names_the_extra(run_dir, tmp_path):
    # a None entry in sys.modules makes "import matplotlib" raise ImportError, as when the
    # package is not installed
    code = (f"import sys; sys.modules['matplotlib'] = None\n"
            f"from shiftwatch.cli import main\n"
            f"print('summary', main(['summary', {str(run_dir)!r}]))\n"
            f"sys.exit(main(['report', {str(run_dir)!r}, '-o', {str(tmp_path / 'r.html')!r}]))")
    p = _run_python(code)
    assert p.returncode == 2, p.stderr
    assert "summary 0" in p.stdout
    assert "pip install 'shiftwatch[plot]'" in p.stderr
    assert not (tmp_path / "r.html").exists()


def test_cli_imports_no_plotting_library():
    p = _run_python("import sys\nfrom shiftwatch.cli import build_parser\nbuild_parser()\n"
                    "import shiftwatch.cli.report_cmd\n"
                    "print(sorted(m for m in ('matplotlib', 'tensorboard', 'lightning') "
                    "if m in sys.modules))")
    assert p.returncode == 0, p.stderr
    assert p.stdout.strip() == "[]"

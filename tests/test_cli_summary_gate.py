"""``shiftwatch summary`` and ``shiftwatch gate`` on synthetic runs (tests/eventlog_factory.py).

Expected values come from what the writer put into the log (its Truth) and from loading
the whole log with the standard library, never from the reader under test.
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from eventlog_factory import Scenario, default_rules, load_naive, write_log

from shiftwatch.cli import main
from shiftwatch.cli.gate_cmd import gate

SCRIPT = Path(sys.executable).with_name("shiftwatch")  # the installed console script


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    root = tmp_path_factory.mktemp("runs")
    shifted = write_log(root / "shifted", Scenario(shifts={"block1.conv": (400, 1.0)},
                                                   samples=70, seed=1))
    clean = write_log(root / "clean", Scenario(samples=70, seed=2))
    drift_rule = [r for r in default_rules() if r["name"] == "slow-drift"]
    warn_only = write_log(root / "warn", Scenario(shifts={"head.fc": (300, 0.6)}, samples=70,
                                                  rules=drift_rule, seed=4))
    return {"shifted": shifted, "clean": clean, "warn": warn_only}


def _json(capsys) -> dict:
    return json.loads(capsys.readouterr().out)


def test_summary_ranks_the_shifted_layer_first_with_its_first_alert(runs, capsys):
    truth = runs["shifted"]
    assert not any(a["layer"] != "block1.conv" for a in truth.alerts)  # the scenario is clean
    assert main(["summary", str(truth.path.parent), "--json"]) == 0
    s = _json(capsys)
    top = s["layers"][0]
    assert top["name"] == "block1.conv"
    # peak = the largest ratio over all metrics vs reference, recomputed from the whole log
    best = max((e["ratio"], rec["step"], m) for rec in load_naive(truth.path)
               if rec["kind"] == "step" and rec["phase"] == "train"
               for m, e in (rec["layers"]["block1.conv"]["vs_reference"] or {}).items())
    assert (top["peak"]["ratio"], top["peak"]["step"], top["peak"]["metric"]) == best
    first = truth.alerts[0]
    assert top["first_alert"]["step"] == first["step"] == 400
    assert top["first_alert"]["rule"] == first["rule"]
    assert s["alerts"]["first"]["layer"] == "block1.conv"
    fails = sum(a["severity"] == "fail" for a in truth.alerts)
    warns = sum(a["severity"] == "warn" for a in truth.alerts)
    assert top["alerts"] == {"warn": warns, "fail": fails}
    assert s["steps"]["train"] == {"first": 30, "last": 30 + 10 * 69, "samples": 70}
    assert s["complete"] and s["end"]["step"] == truth.last_step
    # ranks are in decreasing peak order; peaks of unshifted layers sit near noise level
    ratios = [lay["peak"]["ratio"] for lay in s["layers"]]
    assert ratios == sorted(ratios, reverse=True)
    assert all(r < 8 for r in ratios[1:])


def test_summary_text_shows_table_first_alert_and_steps(runs, capsys):
    assert main(["summary", str(runs["shifted"].path.parent), "--top", "2"]) == 0
    out = capsys.readouterr().out
    assert "first alert: step 400 [train] block1.conv: sudden-shift (fail)" in out
    assert "train steps 30..720 (70 samples)" in out
    rows = [ln for ln in out.splitlines() if ln[:1].isdigit()]
    assert len(rows) == 2 and rows[0].split()[1] == "block1.conv"
    assert "2 more layers" in out


def test_summary_metric_and_against_options_select_other_numbers(runs, capsys):
    path = runs["shifted"].path
    assert main(["summary", str(path), "--json", "--metric", "mean_shift",
                 "--against", "previous", "--phase", "val"]) == 0
    s = _json(capsys)
    vals = [(rec["layers"]["block1.conv"]["vs_previous"] or {}).get("mean_shift", {})
            for rec in load_naive(path) if rec["kind"] == "step" and rec["phase"] == "val"]
    expect = max(v["ratio"] for v in vals if v)
    lay = next(x for x in s["layers"] if x["name"] == "block1.conv")
    assert lay["peak"]["metric"] == "mean_shift" and lay["peak"]["ratio"] == expect
    assert s["view"] == {"phase": "val", "against": "previous", "metric": "mean_shift"}


def test_gate_fails_on_a_shifted_run_and_passes_a_clean_one(runs, capsys):
    assert main(["gate", str(runs["shifted"].path.parent), "--fail-on", "fail"]) == 1
    out = capsys.readouterr().out
    assert out.startswith("gate FAILED")
    assert "step 400 [train] block1.conv: sudden-shift (fail)" in out
    assert runs["clean"].alerts == []
    for level in ("warn", "fail"):
        assert main(["gate", str(runs["clean"].path.parent), "--fail-on", level]) == 0
        assert capsys.readouterr().out.startswith("gate passed")


def test_gate_severity_levels(runs, capsys):
    warn = runs["warn"]
    assert warn.alerts and {a["severity"] for a in warn.alerts} == {"warn"}
    assert main(["gate", str(warn.path.parent), "--fail-on", "fail"]) == 0
    assert main(["gate", str(warn.path.parent), "--fail-on", "warn", "--json"]) == 1
    lines = capsys.readouterr().out
    verdict = json.loads(lines[lines.index("{", lines.index("gate passed")):])
    assert verdict["passed"] is False and verdict["alerts"] == len(warn.alerts)


def test_gate_decision_rules():
    assert gate({}, None, fail_on="fail") == (True, 0)
    assert gate({"warn": 3}, None, fail_on="fail") == (True, 0)
    assert gate({"warn": 3}, None, fail_on="warn") == (False, 3)
    assert gate({"info": 1}, None, fail_on="warn") == (False, 1)  # unknown counts as warn
    assert gate({"info": 1}, None, fail_on="fail") == (True, 0)
    # the end record counts alerts whose records are missing: the larger count decides
    assert gate({"fail": 1}, {"fail": 2, "warn": 0}, fail_on="fail") == (False, 2)


def test_gate_trusts_the_end_record_when_alert_lines_are_missing(tmp_path, capsys):
    truth = write_log(tmp_path, Scenario(shifts={"stem.conv": (300, 1.0)}, samples=40))
    kept = [ln for ln in truth.path.read_text().splitlines() if '"kind":"alert"' not in ln]
    truth.path.write_text("\n".join(kept) + "\n")
    assert main(["gate", str(tmp_path)]) == 1
    out = capsys.readouterr().out
    assert "gate FAILED" in out and "end record counts" in out


def test_gate_require_end(tmp_path, capsys):
    write_log(tmp_path, Scenario(samples=20, end=False))
    assert main(["gate", str(tmp_path)]) == 0
    assert main(["gate", str(tmp_path), "--require-end"]) == 2
    assert "no end record" in capsys.readouterr().err


def test_console_script_exit_codes(runs, tmp_path):
    """The installed ``shiftwatch`` script, as a pipeline runs it: 1, 0, 2."""
    assert SCRIPT.exists()
    for target, expect in ((runs["shifted"].path.parent, 1), (runs["clean"].path.parent, 0),
                           (tmp_path, 2)):
        p = subprocess.run([str(SCRIPT), "gate", str(target), "--fail-on", "warn"],
                           capture_output=True, text=True, timeout=120)
        assert p.returncode == expect, (target, p.stdout[-2000:], p.stderr[-2000:])
        if expect == 2:
            assert "no event log" in p.stderr


def test_summary_of_channel_and_entry_rules(tmp_path, capsys):
    """A shift on the entry layer fires the <entry> rule; the head layer's channel rule fires."""
    truth = write_log(tmp_path, Scenario(shifts={"stem.conv": (200, 1.0), "head.fc": (500, 1.5)},
                                         samples=60, seed=7))
    rules = {(a["layer"], a["rule"]) for a in truth.alerts}
    assert ("stem.conv", "entry-shift") in rules and ("head.fc", "head-channels") in rules
    assert main(["summary", str(tmp_path), "--json"]) == 0
    s = _json(capsys)
    head = next(x for x in s["layers"] if x["name"] == "head.fc")
    ch = head["metrics"]["reference"]["mean_shift"]["channels"]
    expect = max(rec["layers"]["head.fc"]["channels"]["vs_reference"]["mean_shift"]["max_ratio"]
                 for rec in load_naive(truth.path)
                 if rec["kind"] == "step" and rec["phase"] == "train"
                 and rec["layers"]["head.fc"].get("channels"))
    assert ch["peak_max_ratio"] == expect
    assert head["first_alert"]["step"] == min(a["step"] for a in truth.alerts
                                              if a["layer"] == "head.fc")
    assert np.isfinite(head["layer_stats"]["std_min"])

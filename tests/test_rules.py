"""Rules: validation, TOML loading, patience/cooldown counters, alert records."""

from __future__ import annotations

import numpy as np
import pytest

from shiftwatch import ConfigError, Rule, default_rules, load_rules, rules_from_toml
from shiftwatch.divergence import METRICS, MOMENT_METRICS
from shiftwatch.judge import Judge, Observation
from shiftwatch.rules import ENTRY

LAYERS = ("conv1", "bn1", "fc")


def obs(step, ratio_by_layer, *, against="reference", metric="mean_shift", phase="train",
        nonfinite=(0, 0, 0), std=(1.0, 1.0, 1.0), channel_ratio=None):
    """An observation where ``metric`` vs ``against`` has the given ratios (value =
    ratio * 0.1, noise = 0.1); every other metric is unavailable (NaN)."""
    L = len(LAYERS)
    value = np.full((len(METRICS), L), np.nan)
    noise = np.full((len(METRICS), L), np.nan)
    ratio = np.full((len(METRICS), L), np.nan)
    m = METRICS.index(metric)
    ratio[m] = ratio_by_layer
    noise[m] = 0.1
    value[m] = ratio[m] * 0.1
    cr = np.full((len(MOMENT_METRICS), L), np.nan)
    if channel_ratio is not None:
        cr[MOMENT_METRICS.index(metric)] = channel_ratio
    ch = {"max_ratio": cr, "worst": np.full(cr.shape, 2), "worst_value": cr * 0.1,
          "worst_noise": np.full(cr.shape, 0.1), "max_value": cr * 0.1,
          "argmax_value": np.full(cr.shape, 2)}
    return Observation(step=step, phase=phase, layers=LAYERS, present=np.ones(L, bool),
                       nonfinite=np.asarray(nonfinite, float), std=np.asarray(std, float),
                       value={against: value}, noise={against: noise},
                       ratio={against: ratio}, channel={against: ch})


def judge(*rules, entry=("conv1",)):
    j = Judge(rules)
    j.bind(LAYERS, entry)
    return j


def test_rule_validation_names_key_and_allowed_values():
    with pytest.raises(ConfigError, match=r"'against' must be one of 'previous', 'reference'"):
        Rule("mean_shift", threshold=5, against="ref")
    with pytest.raises(ConfigError, match=r"'metric' must be one of 'mean_shift'.*'collapse'"):
        Rule("kl", threshold=1)
    with pytest.raises(ConfigError, match="'threshold' must be a finite number"):
        Rule("js", threshold=float("nan"))
    with pytest.raises(ConfigError, match="'patience' must be an integer >= 1"):
        Rule("js", threshold=1, patience=0)
    with pytest.raises(ConfigError, match="'severity' must be one of 'warn', 'fail'"):
        Rule("js", threshold=1, severity="error")
    with pytest.raises(ConfigError, match="view 'channels' needs a moment metric"):
        Rule("js", threshold=1, view="channels")
    with pytest.raises(ConfigError, match="'layers' must be a glob"):
        Rule("js", threshold=1, layers=[])
    r = Rule("nonfinite", threshold=1)
    assert r.against is None and r.units == "raw" and r.name == "nonfinite"
    assert Rule("w1", threshold=3, against="previous").name == "w1-vs-previous"


def test_toml_rules_load_and_validate(tmp_path):
    path = tmp_path / "rules.toml"
    path.write_text(
        'use_defaults = false\n'
        '[[rule]]\nname = "fc-drift"\nmetric = "w1"\nthreshold = 8.0\nlayers = ["fc*"]\n'
        'patience = 2\ncooldown = 3\nseverity = "fail"\n'
        '[[rule]]\nmetric = "collapse"\nthreshold = 1e-5\n'
    )
    rules = load_rules(path)
    assert [r.name for r in rules] == ["fc-drift", "collapse"]
    assert rules[0] == Rule("w1", threshold=8.0, layers=("fc*",), patience=2, cooldown=3,
                            severity="fail", name="fc-drift")
    with_defaults = rules_from_toml('[[rule]]\nmetric = "js"\nthreshold = 4\n')
    assert [r.name for r in with_defaults][: len(default_rules())] == [
        r.name for r in default_rules()]
    assert Rule.from_dict(rules[0].to_dict()) == rules[0]  # to_dict is the TOML table


@pytest.mark.parametrize(
    ("text", "match"),
    [
        ('[[rule]]\nmetric = "js"\nthreshold = 4\ntreshold = 5\n',
         r"rule 1: unknown key 'treshold'; allowed keys: metric, threshold, min_raw, against"),
        ('[[rule]]\nmetric = "js"\nthreshold = 4\nagainst = "past"\n',
         r"rule 1: 'against' must be one of 'previous', 'reference', 'train' \(got 'past'\)"),
        ('[[rule]]\nname = "x"\nmetric = "js"\nthreshold = "high"\n',
         r"rule 1 \('x'\): 'threshold' must be a finite number"),
        ('[[rule]]\nthreshold = 4\n', r"rule 1: 'metric' is required"),
        ('rules = []\n', r"unknown top-level key 'rules'; allowed keys: use_defaults, rule"),
        ('use_defaults = "no"\n', r"'use_defaults' must be true or false"),
        ('use_defaults = false\n', r"no rules"),
        ('[[rule]\n', r"not valid TOML"),
    ],
)
def test_toml_errors_name_the_key(text, match, tmp_path):
    path = tmp_path / "bad.toml"
    path.write_text(text)
    with pytest.raises(ConfigError, match=match) as info:
        load_rules(path)
    assert str(path) in str(info.value)


def test_missing_rules_file():
    with pytest.raises(ConfigError, match="cannot be read"):
        load_rules("/nonexistent/rules.toml")


def test_patience_and_cooldown():
    j = judge(Rule("mean_shift", threshold=5, patience=2, cooldown=2, name="r"))
    fired = []
    ratios = [6, 6, 6, 6, 6, 1, 6, 6]  # conv1 only; the others stay at 0
    for step, r in enumerate(ratios):
        alerts = j.evaluate(obs(step, [r, 0, 0]))
        fired += [a.step for a in alerts]
    # step 1: second in a row; 2 and 3 quiet (cooldown 2 samples); 4 fires again;
    # step 5 resets the streak, so 6 waits and 7 fires (cooldown since 4 has passed)
    assert fired == [1, 4, 7]


def test_layers_entry_phase_and_direction():
    j = judge(
        Rule("mean_shift", threshold=5, layers=(ENTRY,), name="entry"),
        Rule("mean_shift", threshold=5, layers=("fc",), phase="val", name="val-only"),
        Rule("collapse", threshold=1e-6, name="collapse"),
    )
    alerts = j.evaluate(obs(0, [9, 9, 9], std=(1.0, 0.0, 1.0)))
    assert sorted((a.rule, a.layer) for a in alerts) == [("collapse", "bn1"), ("entry", "conv1")]
    alerts = j.evaluate(obs(1, [9, 9, 9], phase="val"))
    assert [(a.rule, a.layer) for a in alerts] == [("val-only", "fc")]


def test_channel_view_reports_worst_channel():
    j = judge(Rule("mean_shift", threshold=5, view="channels", name="ch"))
    (a,) = j.evaluate(obs(3, [1, 1, 1], channel_ratio=[1, 7, 1]))
    assert (a.layer, a.channel, a.value) == ("bn1", 2, 7)
    assert a.raw == pytest.approx(0.7) and a.noise == pytest.approx(0.1)
    assert "channel 2" in a.message


def test_min_raw_keeps_tiny_but_clear_shifts_quiet():
    j = judge(Rule("mean_shift", threshold=5, min_raw=0.75, name="big"))
    # ratios 9 and 6: raw values (ratio * 0.1) 0.9 and 0.6; only the first is large enough
    assert [a.layer for a in j.evaluate(obs(0, [9, 6, 0]))] == ["conv1"]
    with pytest.raises(ConfigError, match="'min_raw' must be a finite number >= 0"):
        Rule("js", threshold=1, min_raw=-1)
    with pytest.raises(ConfigError, match="'min_raw' does not apply to metric 'nonfinite'"):
        Rule("nonfinite", threshold=1, min_raw=1)


def test_unavailable_metric_never_fires():
    j = judge(Rule("mean_shift", threshold=5, against="previous", name="p"))
    assert j.evaluate(obs(0, [9, 9, 9], against="reference")) == []


def test_rule_patterns_must_match_watched_layers():
    j = Judge([Rule("js", threshold=1, layers=("conv_1",), name="x")])
    msg = r"rule 'x': 'layers' pattern 'conv_1' matches no watched layer.*'conv1'"
    with pytest.raises(ConfigError, match=msg):
        j.bind(LAYERS)
    with pytest.raises(ConfigError, match="rule names must be unique"):
        Judge([Rule("js", threshold=1), Rule("js", threshold=2)])


def test_alert_record_has_documented_keys():
    j = judge(Rule("mean_shift", threshold=5, severity="fail", name="r"))
    (a,) = j.evaluate(obs(12, [8, 0, 0]))
    rec = a.to_record()
    # keys required by the issue and README.md
    for key in ("kind", "step", "layer", "metric", "value", "threshold", "severity", "phase",
                "against", "view", "units", "raw", "noise", "rule", "action", "message"):
        assert key in rec
    assert rec["kind"] == "alert" and rec["value"] == 8 and rec["threshold"] == 5
    assert rec["message"] == (
        "step 12 [train] conv1: mean_shift vs reference = 8 x noise (raw 0.8) >= 5 "
        "(fail, rule r)")


def test_judge_state_round_trip():
    rules = [Rule("mean_shift", threshold=5, patience=3, name="slow")]
    a = judge(*rules)
    for step in range(2):
        assert a.evaluate(obs(step, [6, 0, 0])) == []
    b = judge(*rules)
    b.load_state_dict(a.state_dict())
    assert [x.step for x in b.evaluate(obs(2, [6, 0, 0]))] == [2]  # third in a row

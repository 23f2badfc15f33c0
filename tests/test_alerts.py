"""config/alerts.yml: checked and unit-tested by Debian's promtool.

`promtool check rules` validates the rule file (syntax, PromQL, templates);
`promtool test rules tests/alerts_test.yml` replays the series written there
and compares the alerts that fire, with their rendered annotations. The
other tests keep the rules, their tests and gateway.metrics consistent with
each other, reading the exporter's output with prometheus_client's parser.
"""
from __future__ import annotations

import os
import re
import shutil
import subprocess
from pathlib import Path

import pytest
from prometheus_client.parser import text_string_to_metric_families

from gateway.metrics import Exporter
from test_metrics import make_snapshot

TESTS = Path(__file__).resolve().parent
ROOT = TESTS.parent
RULES = ROOT / "config" / "alerts.yml"
RULE_TESTS = TESTS / "alerts_test.yml"


def promtool() -> str:
    """Path of Debian's promtool; skip without it, but fail under CI so a missing install cannot hide."""
    path = shutil.which("promtool") or ("/usr/bin/promtool" if os.access("/usr/bin/promtool", os.X_OK) else None)
    if path is None:
        if os.environ.get("CI"):
            pytest.fail("promtool is not installed (Debian package 'prometheus'); CI must run this check")
        pytest.skip("promtool is not installed (Debian package 'prometheus')")
    return path


def run(args: list[str], cwd: Path) -> subprocess.CompletedProcess:
    return subprocess.run(args, cwd=cwd, capture_output=True, text=True, timeout=120)


def rule_blocks() -> dict[str, str]:
    """alert name -> the text of its rule (the file is plain block YAML)."""
    text = RULES.read_text()
    parts = re.split(r"^\s*- alert:\s*", text, flags=re.M)[1:]
    return {p.split("\n", 1)[0].strip(): p for p in parts}


def test_promtool_check_rules():
    # Reference check: promtool parses the file as Prometheus would load it.
    res = run([promtool(), "check", "rules", str(RULES.relative_to(ROOT))], cwd=ROOT)
    assert res.returncode == 0, f"promtool check rules failed:\n{res.stdout}{res.stderr}"
    assert f"SUCCESS: {len(rule_blocks())} rules found" in res.stdout, res.stdout


def test_promtool_test_rules():
    # Reference check: promtool evaluates every rule against the series in
    # alerts_test.yml; rule_files there is relative to the tests directory.
    res = run([promtool(), "test", "rules", RULE_TESTS.name], cwd=TESTS)
    assert res.returncode == 0, f"promtool test rules failed:\n{res.stdout}{res.stderr}"
    assert "SUCCESS" in res.stdout, res.stdout


def test_promtool_test_rules_fails_on_a_wrong_expectation(tmp_path):
    """The unit tests are not vacuous: the same run with one expected value changed must fail."""
    text = RULE_TESTS.read_text().replace("../config/alerts.yml", str(RULES))
    assert 'summary: "3 stripes have' in text
    (tmp_path / "wrong_test.yml").write_text(text.replace('summary: "3 stripes have', 'summary: "4 stripes have'))
    res = run([promtool(), "test", "rules", "wrong_test.yml"], cwd=tmp_path)
    assert res.returncode != 0 and "ShoalStripesCritical" in res.stdout + res.stderr, res.stdout + res.stderr


def test_every_rule_has_a_firing_test_case():
    """One test per rule: each alert name in the rules appears in a case that expects it to fire."""
    firing, quiet = set(), set()
    current = None
    for line in RULE_TESTS.read_text().splitlines():
        m = re.match(r"\s*(?:- )?alertname:\s*(\w+)", line)
        if m:
            current = m.group(1)
            quiet.add(current)
        elif current and re.match(r"\s*exp_alerts:", line):
            firing.add(current)
    assert firing == set(rule_blocks())
    assert quiet == set(rule_blocks())


@pytest.mark.parametrize("alert", sorted(rule_blocks()))
def test_rule_has_severity_summary_and_runbook(alert):
    block = rule_blocks()[alert]
    assert re.search(r"^\s+severity: (critical|warning)$", block, re.M), block
    assert re.search(r"^\s+summary: ", block, re.M), block
    runbook = re.search(r"^\s+runbook: >-\n((?:\s{12}.*\n?)+)", block, re.M)
    assert runbook, block
    assert "`shoal " in runbook.group(1), "the runbook names a shoal command"
    assert re.search(r"^\s+for: \d+[smh]$", block, re.M), "every rule states its for: duration"


def exported() -> dict[str, set[str]]:
    """Sample name -> its label names, for a full snapshot, as prometheus_client's parser reads them."""
    e = Exporter()
    e.update(make_snapshot(step=1, d2_state="stalled"))
    out: dict[str, set[str]] = {}
    for fam in text_string_to_metric_families(e.render().decode()):
        for s in fam.samples:
            out.setdefault(s.name, set()).update(s.labels)
    return out


def test_rules_use_only_exported_metrics():
    names = set(re.findall(r"\bshoal_[a-z_]+", RULES.read_text()))
    assert names, "the rules name no shoal metric"
    missing = names - set(exported())
    assert not missing, f"rules use metrics gateway.metrics does not export: {sorted(missing)}"


def test_rule_test_series_look_like_the_exporter_output():
    """The series replayed in alerts_test.yml carry the names and labels the exporter produces
    (plus job and instance, which Prometheus adds at scrape time)."""
    have = exported()
    series = re.findall(r"series: '(\w+)\{([^}]*)\}'", RULE_TESTS.read_text())
    assert series
    for name, labels in series:
        assert name in have, name
        keys = set(re.findall(r"(\w+)=", labels)) - {"job", "instance"}
        assert keys == have[name], (name, keys, have[name])

"""The Prometheus rules in deploy/prometheus: promtool accepts them, their unit tests pass, every
alert is tested both firing and silent, and they read only metrics keepset really exports."""

from __future__ import annotations

import re
import shutil
import subprocess
from pathlib import Path
from typing import Any

import pytest
import yaml
from test_dashboard import exported_sample_names, promql_metric_names

ROOT = Path(__file__).resolve().parents[1]
RULES = ROOT / "deploy" / "prometheus" / "keepset-rules.yml"
RULE_TESTS = ROOT / "deploy" / "prometheus" / "tests" / "keepset-rules.test.yml"
INSTALL = "deploy/prometheus/install-prometheus.sh"
SEVERITIES = {"page", "ticket", "info"}
# level:metric:operations, with keepset's prefix on the metric part.
RECORD_NAME = re.compile(r"[a-z]+(?:_[a-z]+)*:keepset_[a-z0-9_]+:[a-z0-9_]+")


def promtool() -> str:
    path = shutil.which("promtool")
    if path is None:
        # CI installs it; a skip here would let the rules go unchecked without anyone noticing.
        pytest.fail(f"promtool is not installed; run {INSTALL} (it uses apt-get)")
    return path


def run_promtool(*args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [promtool(), *args], capture_output=True, text=True, timeout=120, cwd=ROOT
    )


def rule_groups() -> list[dict[str, Any]]:
    groups: list[dict[str, Any]] = yaml.safe_load(RULES.read_text())["groups"]
    return groups


def alerts() -> list[dict[str, Any]]:
    return [rule for group in rule_groups() for rule in group["rules"] if "alert" in rule]


def test_promtool_accepts_the_rules() -> None:
    done = run_promtool("check", "rules", str(RULES))
    assert done.returncode == 0, done.stdout + done.stderr
    count = sum(len(group["rules"]) for group in rule_groups())
    assert f"SUCCESS: {count} rules found" in done.stdout, done.stdout


def test_rule_unit_tests_pass() -> None:
    done = run_promtool("test", "rules", str(RULE_TESTS))
    assert done.returncode == 0, done.stdout + done.stderr
    assert "SUCCESS" in done.stdout, done.stdout


def test_unit_tests_cover_every_alert_firing_and_silent() -> None:
    spec = yaml.safe_load(RULE_TESTS.read_text())
    assert [(RULE_TESTS.parent / f).resolve() for f in spec["rule_files"]] == [RULES.resolve()]
    firing: set[str] = set()
    silent: set[str] = set()
    for case in spec["tests"]:
        for check in case.get("alert_rule_test", []):
            (firing if check.get("exp_alerts") else silent).add(check["alertname"])
    names = {alert["alert"] for alert in alerts()}
    assert names, "no alerts in the rules file"
    assert names - firing == set(), "alerts never tested firing"
    assert names - silent == set(), "alerts never tested silent"
    assert (firing | silent) - names == set(), "tests of alerts that do not exist"


def test_alerts_carry_severity_summary_and_description() -> None:
    for alert in alerts():
        assert alert["alert"].startswith("Keepset"), alert["alert"]
        assert alert["labels"]["severity"] in SEVERITIES, alert["alert"]
        annotations = alert["annotations"]
        assert annotations["summary"].strip(), alert["alert"]
        assert "Check first" in annotations["description"], alert["alert"]


def test_rules_read_exported_metrics_and_earlier_records() -> None:
    exported = exported_sample_names()
    # A recording rule that reads one recorded later in its own group sees the previous
    # evaluation's value, so every record must be defined before it is used.
    defined: set[str] = set()
    problems: list[str] = []
    for group in rule_groups():
        for rule in group["rules"]:
            name = rule.get("record") or rule["alert"]
            for metric in promql_metric_names(rule["expr"]):
                if ":" in metric and metric not in defined:
                    problems.append(f"{name}: {metric} is not recorded before this rule")
                if ":" not in metric and metric not in exported:
                    problems.append(f"{name}: keepset does not export {metric}")
            if "record" in rule:
                assert RECORD_NAME.fullmatch(rule["record"]), rule["record"]
                assert rule["record"] not in defined, f"{rule['record']} recorded twice"
                defined.add(rule["record"])
    assert not problems, "\n".join(problems)

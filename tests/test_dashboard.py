"""The Grafana dashboard in deploy/grafana: well formed, imported with a datasource input, and
every query reads only metrics keepset exports or recording rules keepset-rules.yml defines."""

from __future__ import annotations

import importlib
import json
import re
import shutil
import subprocess
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
import yaml
from prometheus_client import REGISTRY

ROOT = Path(__file__).resolve().parents[1]
DASHBOARD = ROOT / "deploy" / "grafana" / "keepset-dashboard.json"
RULES = ROOT / "deploy" / "prometheus" / "keepset-rules.yml"
INSTALL_HINT = "run deploy/prometheus/install-prometheus.sh (CI does)"

# Grafana fills these in itself; any other $name must be a templating variable.
GRAFANA_BUILTINS = {"__rate_interval", "__interval", "__range", "__all"}
# Values a variable may take, for turning a panel query into plain PromQL.
SAMPLE_VALUES = {
    "__rate_interval": "1m",
    "__interval": "30s",
    "__range": "6h",
    "job": "keepset",
    "policy": "box-office",
    "version": "1",
    "client": "usher-desk",
    "endpoint": "/v1/pick",
}

_STRING = re.compile(r'"(?:[^"\\]|\\.)*"|\'(?:[^\'\\]|\\.)*\'|`[^`]*`')
_MATCHERS = re.compile(r"\{[^{}]*\}")
_RANGE = re.compile(r"\[[^\]]*\]")
_LABEL_LIST = re.compile(r"\b(?:by|without|on|ignoring|group_left|group_right)\s*\([^)]*\)")
_VARIABLE = re.compile(r"\$\{?(\w+)\}?")
_DURATION = re.compile(r"\b\d+(?:\.\d+)?(?:ms|[smhdwy])\b")
_NUMBER = re.compile(r"\b\d+(?:\.\d+)?(?:[eE][+-]?\d+)?\b")
_IDENTIFIER = re.compile(r"[A-Za-z_:][A-Za-z0-9_:]*")
_KEYWORDS = {
    "and",
    "or",
    "unless",
    "by",
    "without",
    "on",
    "ignoring",
    "group_left",
    "group_right",
    "offset",
    "bool",
    "inf",
    "nan",
}


def promql_metric_names(expr: str) -> set[str]:
    """Metric names a PromQL expression (Grafana variables allowed) selects.

    Strings, label matchers, ranges, label lists of by/on/..., durations and numbers are
    removed first, so what is left as an identifier is either a function or aggregation
    (followed by an opening parenthesis), a keyword, or a metric name.
    """
    text = _STRING.sub(" ", expr)
    text = _MATCHERS.sub(" ", text)
    text = _RANGE.sub(" ", text)
    text = _LABEL_LIST.sub(" ", text)
    text = _VARIABLE.sub(" ", text)
    text = _DURATION.sub(" ", text)
    text = _NUMBER.sub(" ", text)
    names: set[str] = set()
    for match in _IDENTIFIER.finditer(text):
        word = match.group(0)
        if word.lower() in _KEYWORDS or text[match.end() :].lstrip().startswith("("):
            continue
        names.add(word)
    return names


def exported_sample_names() -> set[str]:
    """Sample names keepset's /metrics can carry, from the metric families it defines."""
    # service.app imports every module that defines a metric, service.metrics included.
    importlib.import_module("service.app")
    suffixes = {
        "counter": ("_total",),
        "histogram": ("_bucket", "_count", "_sum"),
        "summary": ("", "_count", "_sum"),
        "gauge": ("",),
        "info": ("_info",),
        "stateset": ("",),
        "unknown": ("",),
    }
    names: set[str] = set()
    for family in REGISTRY.collect():
        if family.name.startswith("keepset_"):
            names.update(family.name + suffix for suffix in suffixes[family.type])
    return names


def recorded_names() -> set[str]:
    groups = yaml.safe_load(RULES.read_text())["groups"]
    return {rule["record"] for group in groups for rule in group["rules"] if "record" in rule}


def load_dashboard() -> dict[str, Any]:
    data: dict[str, Any] = json.loads(DASHBOARD.read_text())
    return data


def all_panels(panels: list[dict[str, Any]]) -> Iterator[dict[str, Any]]:
    for panel in panels:
        yield panel
        yield from all_panels(panel.get("panels", []))


def panel_queries(dashboard: dict[str, Any]) -> list[tuple[str, str]]:
    """(panel title, expression) for every target of every panel."""
    return [
        (panel["title"], target["expr"])
        for panel in all_panels(dashboard["panels"])
        for target in panel.get("targets", [])
    ]


def variable_metric(query: str) -> str:
    match = re.fullmatch(r"label_values\(\s*([A-Za-z_:][\w:]*)\s*(?:\{.*\})?\s*,\s*\w+\s*\)", query)
    assert match, f"templating query is not label_values(metric{{...}}, label): {query}"
    return match.group(1)


def substitute(expr: str) -> str:
    """A panel query as the plain PromQL Grafana would send, with sample variable values."""
    return _VARIABLE.sub(lambda m: SAMPLE_VALUES[m.group(1)], expr)


def test_extractor_finds_metric_names_and_nothing_else() -> None:
    expr = (
        'histogram_quantile(0.99, sum by (job, le) (rate(keepset_a_bucket{code=~"5..", '
        'x="by (y)"}[$__rate_interval] offset 5m))) / on (job) group_left '
        "level:keepset_b:rate5m > 1e-3 and bool keepset_c"
    )
    assert promql_metric_names(expr) == {"keepset_a_bucket", "level:keepset_b:rate5m", "keepset_c"}


def test_dashboard_is_importable_with_a_prometheus_input() -> None:
    dashboard = load_dashboard()
    inputs = {item["name"]: item for item in dashboard["__inputs"]}
    assert inputs["DS_PROMETHEUS"]["type"] == "datasource"
    assert inputs["DS_PROMETHEUS"]["pluginId"] == "prometheus"
    panels = list(all_panels(dashboard["panels"]))
    ids = [panel["id"] for panel in panels]
    assert len(ids) == len(set(ids)), "panel ids must be unique"
    for panel in panels:
        if panel["type"] == "row":
            continue
        assert panel["datasource"] == {"type": "prometheus", "uid": "${DS_PROMETHEUS}"}, panel
        assert panel["targets"], f"panel {panel['title']!r} has no query"
        for target in panel["targets"]:
            assert target["datasource"]["uid"] == "${DS_PROMETHEUS}", panel["title"]
    variables = {v["name"]: v for v in dashboard["templating"]["list"]}
    assert {"policy", "version"} <= set(variables)
    for variable in variables.values():
        assert variable["datasource"]["uid"] == "${DS_PROMETHEUS}", variable["name"]


def test_dashboard_has_the_panels_operators_need() -> None:
    queries = " ".join(expr for _, expr in panel_queries(load_dashboard()))
    for needle in (
        "histogram_quantile(0.5, sum by (policy, version, le) (rate(keepset_kept_tokens_bucket",
        "histogram_quantile(0.9, sum by (policy, version, le) (rate(keepset_kept_tokens_bucket",
        "keepset_entropy_nats_bucket",
        "sum by (policy, version, reason) (rate(keepset_fallbacks_total",
        "keepset_arm_weight",
        "histogram_quantile(0.99, sum by (le) (rate(keepset_request_duration_seconds_bucket",
        'code=~"5.."',
        "keepset_collapse_active",
        "max by (client, policy, version) (keepset_guard_active",
        "keepset_guard_transitions_total",
    ):
        assert needle in queries, needle
    heatmaps = [p for p in all_panels(load_dashboard()["panels"]) if p["type"] == "heatmap"]
    assert heatmaps and all(t.get("format") == "heatmap" for p in heatmaps for t in p["targets"])


def test_dashboard_variables_are_defined() -> None:
    dashboard = load_dashboard()
    defined = {v["name"] for v in dashboard["templating"]["list"]} | GRAFANA_BUILTINS
    texts = [expr for _, expr in panel_queries(dashboard)]
    texts += [p["title"] for p in all_panels(dashboard["panels"])]
    texts += [v["definition"] for v in dashboard["templating"]["list"]]
    for text in texts:
        for name in _VARIABLE.findall(text):
            if name == "DS_PROMETHEUS":
                continue
            assert name in defined, f"${name} in {text!r} is not a dashboard variable"


def test_every_dashboard_metric_is_exported_or_recorded() -> None:
    dashboard = load_dashboard()
    exported = exported_sample_names()
    recorded = recorded_names()
    used: dict[str, str] = {}
    for title, expr in panel_queries(dashboard):
        for name in promql_metric_names(expr):
            used.setdefault(name, title)
    for variable in dashboard["templating"]["list"]:
        used.setdefault(variable_metric(variable["definition"]), f"variable {variable['name']}")
    assert used, "no metric names found: the extractor is broken"
    missing = {
        name: where
        for name, where in used.items()
        if name not in (recorded if ":" in name else exported)
    }
    assert not missing, (
        f"not exported by keepset or recorded in {RULES.name}: {missing}; exported: "
        f"{sorted(exported)}"
    )


def test_every_dashboard_query_parses(tmp_path: Path) -> None:
    # promtool parses a rule's expression with the same PromQL parser as the server, so each
    # panel query (variables filled in) becomes a throwaway recording rule to check.
    promtool = shutil.which("promtool")
    if promtool is None:
        pytest.fail(f"promtool is not installed; {INSTALL_HINT}")
    queries = panel_queries(load_dashboard())
    rules = {
        "groups": [
            {
                "name": "dashboard",
                "rules": [
                    {"record": f"dashboard:query_{i}:check", "expr": substitute(expr)}
                    for i, (_, expr) in enumerate(queries)
                ],
            }
        ]
    }
    path = tmp_path / "dashboard-queries.yml"
    path.write_text(yaml.safe_dump(rules))
    done = subprocess.run(
        [promtool, "check", "rules", str(path)], capture_output=True, text=True, timeout=60
    )
    assert done.returncode == 0, done.stdout + done.stderr
    assert f"SUCCESS: {len(queries)} rules found" in done.stdout, done.stdout

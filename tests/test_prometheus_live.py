"""End to end: a real Prometheus on 127.0.0.1 scrapes a real ``keepset serve`` every second with
a shortened copy of deploy/prometheus/keepset-rules.yml; collapsing traffic makes
KeepsetKeptSetCollapse fire and healthy traffic, run as long, does not."""

from __future__ import annotations

import re
import shutil
import subprocess
import threading
import time
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import httpx
import numpy as np
import pytest
import yaml
from conftest import Server, auth, free_port, start_server, stop_server
from test_dashboard import load_dashboard, panel_queries, promql_metric_names, substitute

ROOT = Path(__file__).resolve().parents[1]
RULES = ROOT / "deploy" / "prometheus" / "keepset-rules.yml"
ALERT = "KeepsetKeptSetCollapse"
VOCAB = 1000
ROWS = 4
# The copy's rate windows and `for:` durations. 10 s holds about ten 1 s scrapes, enough for
# rate() to be steady; 2 s of `for` still exercises pending before firing.
WINDOW = "10s"
FOR = "2s"
FIRE_DEADLINE_S = 45.0


def shortened_rules(target: Path) -> Path:
    """A copy of the rules with every range selector and `for:` shortened.

    Every window in the rules file is a plain `[<n><unit>]` selector (its header says so), so a
    regex over each expression rewrites them all; thresholds, including the traffic floors, stay
    as they are, so the copy makes the same decisions on a shorter clock.
    """
    data = yaml.safe_load(RULES.read_text())
    rewritten = 0
    for group in data["groups"]:
        for rule in group["rules"]:
            rule["expr"], n = re.subn(r"\[\d+[smhdwy]\]", f"[{WINDOW}]", rule["expr"])
            rewritten += n
            if "for" in rule:
                rule["for"] = FOR
    assert rewritten >= 5, "the rules file has no windows to shorten: the rewrite is stale"
    target.write_text(yaml.safe_dump(data, sort_keys=False))
    return target


class Prometheus:
    def __init__(self, base_url: str, process: subprocess.Popen[bytes], log: Path):
        self.base_url = base_url
        self.process = process
        self.log = log

    def log_tail(self) -> str:
        return self.log.read_text(errors="replace")[-3000:]

    def query(self, promql: str) -> list[dict[str, Any]]:
        reply = httpx.get(f"{self.base_url}/api/v1/query", params={"query": promql}, timeout=5)
        body = reply.json()
        assert reply.status_code == 200 and body["status"] == "success", (promql, body)
        result: list[dict[str, Any]] = body["data"]["result"]
        return result

    def alerts(self, name: str) -> list[dict[str, Any]]:
        reply = httpx.get(f"{self.base_url}/api/v1/alerts", timeout=5)
        reply.raise_for_status()
        return [a for a in reply.json()["data"]["alerts"] if a["labels"]["alertname"] == name]


@pytest.fixture
def keepset(registry: Path) -> Iterator[Server]:
    server = start_server(registry, workers=2, KEEPSET_RELOAD_POLL_SECONDS="0")
    try:
        yield server
    finally:
        stop_server(server)


@pytest.fixture
def prometheus(tmp_path: Path, keepset: Server) -> Iterator[Prometheus]:
    binary = shutil.which("prometheus")
    if binary is None:
        pytest.fail("prometheus is not installed; run deploy/prometheus/install-prometheus.sh")
    rules = shortened_rules(tmp_path / "rules.yml")
    config = {
        "global": {"scrape_interval": "1s", "scrape_timeout": "1s", "evaluation_interval": "1s"},
        "rule_files": [str(rules)],
        "scrape_configs": [
            {
                "job_name": "keepset",
                "static_configs": [{"targets": [keepset.base_url.removeprefix("http://")]}],
            }
        ],
    }
    config_path = tmp_path / "prometheus.yml"
    config_path.write_text(yaml.safe_dump(config))
    port = free_port()
    log = tmp_path / "prometheus.log"
    with log.open("wb") as sink:
        process = subprocess.Popen(
            [
                binary,
                f"--config.file={config_path}",
                f"--storage.tsdb.path={tmp_path / 'tsdb'}",
                f"--web.listen-address=127.0.0.1:{port}",
                "--log.level=warn",
            ],
            stdout=sink,
            stderr=subprocess.STDOUT,
        )
    running = Prometheus(f"http://127.0.0.1:{port}", process, log)
    try:
        deadline = time.monotonic() + 20
        while True:
            assert process.poll() is None, f"prometheus exited:\n{running.log_tail()}"
            assert time.monotonic() < deadline, f"prometheus not ready:\n{running.log_tail()}"
            try:
                if httpx.get(f"{running.base_url}/-/ready", timeout=1).status_code == 200:
                    break
            except httpx.HTTPError:
                pass
            time.sleep(0.2)
        yield running
    finally:
        process.terminate()
        try:
            process.wait(timeout=10)
        except subprocess.TimeoutExpired:
            process.kill()
            process.wait()


class Traffic(threading.Thread):
    """Picks for usher-desk (box-office@1) and surtitle-booth (surtitles@1), until stopped.

    box-office's logits are healthy or collapsing as ``collapse`` says; surtitles' always
    healthy. Each answer's kept sizes are checked, so the test knows what the rules saw.
    """

    def __init__(self, base_url: str, max_requests: int, max_seconds: float):
        super().__init__(daemon=True)
        self.base_url = base_url
        self.max_requests = max_requests
        self.max_seconds = max_seconds
        self.collapse = False
        self.stopping = threading.Event()
        self.error: BaseException | None = None
        self.sent = 0
        self.rng = np.random.default_rng(5)

    def healthy(self) -> list[list[float]]:
        rows: list[list[float]] = (self.rng.standard_normal((ROWS, VOCAB)) * 0.1).round(4).tolist()
        return rows

    def collapsing(self) -> list[list[float]]:
        # One token 20 nats ahead: at temperature 0.4 nothing else is within min_p 0.2 of it.
        array = np.zeros((ROWS, VOCAB))
        array[np.arange(ROWS), self.rng.integers(0, VOCAB, ROWS)] = 20.0
        rows: list[list[float]] = array.tolist()
        return rows

    def pick(self, http: httpx.Client, who: str, collapse: bool) -> None:
        logits = self.collapsing() if collapse else self.healthy()
        reply = http.post("/v1/pick", json={"logits": logits}, headers=auth(who))
        assert reply.status_code == 200, reply.text
        kept = [row["kept"] for row in reply.json()["rows"]]
        assert all(k == 1 for k in kept) if collapse else all(k > 1 for k in kept), (who, kept)
        self.sent += 1

    def run(self) -> None:
        deadline = time.monotonic() + self.max_seconds
        try:
            with httpx.Client(base_url=self.base_url, timeout=10) as http:
                while (
                    not self.stopping.is_set()
                    and self.sent < self.max_requests
                    and time.monotonic() < deadline
                ):
                    self.pick(http, "usher-desk", self.collapse)
                    self.pick(http, "surtitle-booth", False)
                    self.stopping.wait(0.05)
        except BaseException as exc:
            self.error = exc

    def check(self) -> None:
        if self.error is not None:
            raise AssertionError(f"traffic failed: {self.error!r}") from self.error
        assert self.is_alive(), "traffic stopped early (request or time budget spent)"


def wait_for(
    what: str, probe: Callable[[], object], traffic: Traffic, prometheus: Prometheus, seconds: float
) -> float:
    """Poll ``probe`` until it is true; return how long that took."""
    started = time.monotonic()
    while not probe():
        traffic.check()
        assert time.monotonic() - started < seconds, (
            f"{what} not within {seconds} s\n{prometheus.log_tail()}"
        )
        time.sleep(0.5)
    return time.monotonic() - started


def test_collapse_alert_fires_on_collapsing_traffic_only(
    keepset: Server, prometheus: Prometheus
) -> None:
    box = 'policy="box-office", version="1"'
    traffic = Traffic(keepset.base_url, max_requests=3000, max_seconds=120)
    traffic.start()
    try:
        # The healthy phase only counts once the rules see box-office above the traffic floor,
        # with a ratio of 0: before that a silent alert would prove nothing.
        wait_for(
            "box-office rows above the collapse alert's traffic floor",
            lambda: prometheus.query(
                f"policy_version:keepset_kept_tokens_served:rate5m{{{box}}} > 0.2"
                f" and on (job, policy, version) policy_version:keepset_kept_one:ratio_rate5m == 0"
            ),
            traffic,
            prometheus,
            seconds=20,
        )
        healthy_from = time.monotonic()
        # Healthy for two windows plus `for`; collapse below fires in about one window plus
        # `for`, and the test checks that it did take less than this phase lasted.
        while time.monotonic() - healthy_from < 2 * 10 + 2:
            traffic.check()
            active = prometheus.alerts(ALERT)
            assert active == [], f"{ALERT} active on healthy traffic: {active}"
            time.sleep(0.5)
        healthy_seconds = time.monotonic() - healthy_from

        traffic.collapse = True

        def box_office_firing() -> bool:
            for alert in prometheus.alerts(ALERT):
                assert alert["labels"]["policy"] == "box-office", alert  # never surtitles
                if alert["state"] == "firing":
                    return True
            return False

        fire_seconds = wait_for(
            f"{ALERT} firing for box-office@1",
            box_office_firing,
            traffic,
            prometheus,
            seconds=FIRE_DEADLINE_S,
        )
        assert fire_seconds < healthy_seconds, (
            f"collapse took {fire_seconds:.1f} s to fire, but healthy traffic ran only "
            f"{healthy_seconds:.1f} s: the healthy phase proves nothing"
        )
        [alert] = [a for a in prometheus.alerts(ALERT) if a["state"] == "firing"]
        assert alert["labels"] == {
            "alertname": ALERT,
            "job": "keepset",
            "policy": "box-office",
            "version": "1",
            "severity": "ticket",
        }
        assert float(alert["value"]) > 0.9
        assert "box-office@1 keeps a single token" in alert["annotations"]["summary"]
        assert prometheus.query(f'ALERTS{{alertname="{ALERT}", alertstate="firing", {box}}}')
        surtitles = 'policy="surtitles", version="1"'
        [row] = prometheus.query(f"policy_version:keepset_kept_one:ratio_rate5m{{{surtitles}}}")
        assert float(row["value"][1]) == 0.0

        check_dashboard_queries(prometheus)
    finally:
        traffic.stopping.set()
        traffic.join(timeout=15)


def check_dashboard_queries(prometheus: Prometheus) -> None:
    """Every dashboard query runs on the live server; those over metrics this traffic fed
    return data, so their label names and aggregations match what keepset exposes."""
    fed = {
        "keepset_kept_tokens_bucket",
        "keepset_entropy_nats_bucket",
        "keepset_rows_total",
        "keepset_request_duration_seconds_bucket",
        "keepset_request_duration_seconds_count",
        "policy_version:keepset_kept_one:ratio_rate5m",
    }
    empty = []
    for title, expr in panel_queries(load_dashboard()):
        # The sample variable values name usher-desk and box-office@1, which the traffic fed.
        promql = substitute(expr)
        result = prometheus.query(promql)
        if promql_metric_names(expr) <= fed and not result:
            empty.append((title, promql))
    assert not empty, f"dashboard queries without data: {empty}"

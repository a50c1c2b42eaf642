"""Watching policies: the collapse watch on scripted sequences and live traffic, the chi-square
p-value of the sample-ratio check against SciPy, and both kept consistent over two workers."""

from __future__ import annotations

import logging
import os
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path

import httpx
import numpy as np
import pytest
from conftest import Server, auth, in_process, start_server, stop_server
from fastapi.testclient import TestClient
from prometheus_client import REGISTRY
from scipy.stats import chi2, chisquare

from service.ratio import chi2_sf, sample_ratio
from service.watch import CollapseWatch

# One dominant logit: prompt-book's chain (top_k 200, typical 0.95) keeps exactly one token.
COLLAPSING = [40.0] + [0.0] * 999
# Flat-ish logits: hundreds of survivors.
HEALTHY = (np.random.default_rng(0).standard_normal(1000) * 0.1).tolist()


# -- the watch itself ------------------------------------------------------------------------


def test_watch_turns_on_and_off_at_the_right_steps() -> None:
    watch = CollapseWatch(window=10, min_steps=4)
    # Three collapsed rows: not enough to decide.
    assert watch.observe("p", 1, [1, 1, 1], floor=2) is None
    # The fourth decides: median 1 < 2.
    on = watch.observe("p", 1, [1], floor=2)
    assert on is not None and on.active and on.median == 1 and on.rows == 4
    assert watch.observe("p", 1, [1, 1], floor=2) is None  # stays on, no new transition
    # [1]*6 + [5]*4 fills the window of 10 with median 1 still; the next 5 slides a 1 out:
    # [1]*5 + [5]*5 has median (1 + 5) / 2 = 3 >= 2, which recovers it.
    assert watch.observe("p", 1, [5, 5, 5, 5], floor=2) is None
    off = watch.observe("p", 1, [5], floor=2)
    assert off is not None and not off.active and off.median == 3 and off.rows == 10
    # The window slides: ten more collapsed rows push every healthy one out.
    back = watch.observe("p", 1, [1] * 10, floor=2)
    assert back is not None and back.active and back.rows == 10
    assert watch.active() == {("p", 1)}
    # Versions are watched separately.
    assert watch.observe("p", 2, [9] * 10, floor=2) is None
    assert watch.active() == {("p", 1)}


def test_watch_refuses_a_minimum_larger_than_the_window() -> None:
    with pytest.raises(ValueError):
        CollapseWatch(window=5, min_steps=6)


# -- the sample-ratio check ------------------------------------------------------------------


@pytest.mark.parametrize("dof", [1, 2, 3, 4, 7, 20, 99])
def test_chi_square_p_value_matches_scipy(dof: int) -> None:
    """Reference: scipy.stats.chi2.sf (the chi-square survival function)."""
    for x in [1e-8, 0.01, 0.3, 1.0, dof - 0.5, dof + 0.5, 2.0 * dof, 30.0, 150.0, 700.0]:
        if x <= 0:
            continue
        expected = float(chi2.sf(x, dof))
        assert chi2_sf(x, dof) == pytest.approx(expected, rel=1e-10, abs=1e-300), (x, dof)


def test_sample_ratio_matches_scipy_chisquare() -> None:
    """Reference: scipy.stats.chisquare with expected counts from the weights."""
    rng = np.random.default_rng(5)
    for weights in ([70, 30], [90, 10], [50, 25, 25], [1, 1, 1, 1, 1]):
        shares = np.array(weights) / sum(weights)
        for total in (10, 1000, 20_000):
            observed = rng.multinomial(total, shares).tolist()
            ours = sample_ratio(observed, weights)
            reference = chisquare(observed, shares * total)
            assert ours is not None
            assert ours.statistic == pytest.approx(float(reference.statistic), rel=1e-9)
            assert ours.p_value == pytest.approx(float(reference.pvalue), rel=1e-8, abs=1e-300)
    assert sample_ratio([10], [100]) is None  # one arm: nothing to compare
    assert sample_ratio([0, 0], [70, 30]) is None  # no traffic yet
    check = sample_ratio([7200, 2800], [70, 30])  # 2 % off on 10 000 requests
    assert check is not None and check.p_value < 1e-4


# -- in the service ----------------------------------------------------------------------------


@pytest.fixture
def client(registry: Path) -> Iterator[TestClient]:
    with in_process(registry, collapse_window=40, collapse_min_steps=20) as test_client:
        yield test_client


def gauge(policy: str, version: int) -> float | None:
    return REGISTRY.get_sample_value(
        "keepset_collapse_active", {"policy": policy, "version": str(version)}
    )


def test_collapse_watch_on_live_picks(client: TestClient, caplog: pytest.LogCaptureFixture) -> None:
    """prompt-book@3 promises a median kept size of at least 2 (policies/prompt-book/3.yaml)."""

    def send(logits: list[float], rows: int) -> None:
        body = {"logits": [logits] * rows, "routing_key": "scene-1"}  # sticky: one version
        r = client.post("/v1/pick", json=body, headers=auth("prompt-book-app"))
        assert r.status_code == 200, r.text
        assert r.json()["version"] == 3

    caplog.set_level(logging.INFO, logger="keepset")
    send(HEALTHY, 20)
    assert gauge("prompt-book", 3) in (None, 0.0)
    send(COLLAPSING, 19)  # window 20 healthy + 19 collapsed: median still healthy
    assert gauge("prompt-book", 3) in (None, 0.0)
    send(COLLAPSING, 2)  # 21 of 40 collapsed: the median drops to 1
    assert gauge("prompt-book", 3) == 1.0
    send(COLLAPSING, 30)
    warnings = [r for r in caplog.records if "collapsed" in r.getMessage()]
    assert len(warnings) == 1 and warnings[0].levelno == logging.WARNING
    assert "policy=prompt-book version=3" in warnings[0].getMessage()
    send(HEALTHY, 21)  # 21 of the last 40 healthy again
    assert gauge("prompt-book", 3) == 0.0
    assert any("recovered" in r.getMessage() for r in caplog.records)


def test_routes_report_the_split_with_a_p_value(client: TestClient) -> None:
    before = client.get("/v1/routes", headers=auth("stage-manager")).json()
    start = before["clients"]["prompt-book-app"]["split"]["requests"]
    for key in range(300):
        body = {"logits": [HEALTHY], "routing_key": f"reader-{key}"}
        assert client.post("/v1/pick", json=body, headers=auth("prompt-book-app")).is_success
    routes = client.get("/v1/routes", headers=auth("stage-manager")).json()
    split = routes["clients"]["prompt-book-app"]["split"]
    counts = {arm: split["requests"][arm] - start[arm] for arm in ("control", "candidate")}
    assert sum(counts.values()) == 300
    assert split["expected_share"] == {"control": 0.9, "candidate": 0.1}
    observed = [split["requests"]["control"], split["requests"]["candidate"]]
    reference = chisquare(observed, np.array([0.9, 0.1]) * sum(observed))
    assert split["p_value"] == pytest.approx(float(reference.pvalue), rel=1e-8)
    assert routes["clients"]["usher-desk"]["split"]["p_value"] is None  # a single arm
    weights = REGISTRY.get_sample_value(
        "keepset_arm_weight", {"client": "prompt-book-app", "arm": "candidate"}
    )
    assert weights == 0.1


# -- several workers ---------------------------------------------------------------------------


def scrape_value(server: Server, name: str, **labels: str) -> float:
    text = httpx.get(f"{server.base_url}/metrics", timeout=5).text
    total = 0.0
    for line in text.splitlines():
        if line.startswith(name + "{") and all(f'{k}="{v}"' in line for k, v in labels.items()):
            total += float(line.rsplit(" ", 1)[1])
    return total


def test_watch_and_split_agree_across_two_workers(registry: Path) -> None:
    server = start_server(
        registry, workers=2, KEEPSET_COLLAPSE_WINDOW="20", KEEPSET_COLLAPSE_MIN_STEPS="10"
    )
    try:
        url = f"{server.base_url}/v1/pick"
        # New connections each time, so both workers take requests; every one collapses.
        for _ in range(40):
            body = {"logits": [COLLAPSING] * 4, "routing_key": "scene-1"}
            r = httpx.post(url, json=body, headers=auth("prompt-book-app"), timeout=10)
            assert r.status_code == 200 and r.json()["version"] == 3, r.text
        assert scrape_value(server, "keepset_collapse_active", policy="prompt-book") == 1
        kept_one = scrape_value(
            server, "keepset_kept_tokens_bucket", policy="prompt-book", role="served", le="1.0"
        )
        assert kept_one == 160
        assignments = scrape_value(server, "keepset_assignments_total", client="prompt-book-app")
        assert assignments == 40
        routes = httpx.get(
            f"{server.base_url}/v1/routes", headers=auth("stage-manager"), timeout=5
        ).json()
        assert sum(routes["clients"]["prompt-book-app"]["split"]["requests"].values()) == 40
        # Healthy traffic clears the alarm in every worker that saw the collapse.
        deadline = time.monotonic() + 20
        while scrape_value(server, "keepset_collapse_active", policy="prompt-book") != 0:
            assert time.monotonic() < deadline, "the collapse gauge did not clear"
            body = {"logits": [HEALTHY] * 8, "routing_key": "scene-1"}
            assert httpx.post(url, json=body, headers=auth("prompt-book-app"), timeout=10)
    finally:
        stop_server(server)


def test_a_dead_workers_collapse_gauge_is_forgotten(tmp_path: Path) -> None:
    """Multiprocess metrics: a worker's collapse gauge counts while it lives and is dropped once
    it is gone (uvicorn restarts dead workers silently), while its counters stay."""
    env = {**os.environ, "PROMETHEUS_MULTIPROC_DIR": str(tmp_path)}
    worker = subprocess.Popen(
        [
            sys.executable,
            "-c",
            "from service import metrics\n"
            "metrics.COLLAPSE_ACTIVE.labels('prompt-book', '3').set(1)\n"
            "metrics.ROWS.labels('prompt-book-app', 'prompt-book', '3', 'control').inc(3)\n"
            "print('set', flush=True)\n"
            "input()\n",
        ],
        env=env,
        stdin=subprocess.PIPE,
        stdout=subprocess.PIPE,
        text=True,
    )

    def scrape() -> str:
        reader = "from service import metrics; print(metrics.exposition()[0].decode())"
        done = subprocess.run(
            [sys.executable, "-c", reader], env=env, capture_output=True, text=True, timeout=60
        )
        assert done.returncode == 0, done.stderr
        return done.stdout

    gauge = 'keepset_collapse_active{policy="prompt-book",version="3"} 1.0'
    rows = 'keepset_rows_total{arm="control",client="prompt-book-app",policy="prompt-book",'
    try:
        assert worker.stdout is not None and worker.stdout.readline().strip() == "set"
        alive = scrape()
        assert gauge in alive and rows in alive
    finally:
        worker.communicate("\n", timeout=30)
    gone = scrape()
    assert gauge not in gone
    assert rows + 'version="3"} 3.0' in gone


def test_batch_observation_equals_one_by_one() -> None:
    # observe_all updates each bucket hit once; the exposition must be the one that
    # prometheus_client's own observe() gives value by value (NaN, bounds and +Inf included).
    from prometheus_client import CollectorRegistry, Histogram, generate_latest

    from service.metrics import observe_all

    values = [0.0, 1.0, 1.5, 2.0, 2.0, 7.5, 1e9, float("nan"), 3.25, 0.5, 2.0000001]
    texts = []
    for batch in (True, False):
        registry = CollectorRegistry()
        hist = Histogram("h", "h", ["p"], buckets=[0.5, 1, 2, 4, 8], registry=registry)
        child = hist.labels("x")
        if batch:
            observe_all(child, values)
        else:
            for v in values:
                child.observe(v)
        lines = generate_latest(registry).decode().splitlines()
        texts.append("\n".join(line for line in lines if "_created" not in line))
    text = texts[0]
    assert text == texts[1]
    assert 'h_bucket{le="2.0",p="x"} 6.0' in text and 'h_count{p="x"} 10.0' in text


def test_window_median_is_numpys() -> None:
    # The watch's median of a window (odd and even counts, repeats) against numpy's.
    from collections import deque

    from service.watch import _median

    rng = np.random.default_rng(8)
    for n in (1, 2, 3, 10, 199, 200):
        values = deque(int(v) for v in rng.integers(0, 60, n))
        assert _median(values) == float(np.median(list(values)))

"""Outcomes end to end: request ids and their proof, the store, ``POST /v1/outcome`` and its
problems, and the experiment report on a real two-worker ``keepset serve`` (summed across
workers, kept across a restart with the same secret and store), its CLI and the Python client."""

from __future__ import annotations

import asyncio
import base64
import hashlib
import hmac
import json
import os
import random
import shutil
import struct
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import httpx
import numpy as np
import pytest
from conftest import (
    DEMO_KEYS,
    ROOT,
    assert_problem,
    auth,
    in_process,
    start_server,
    stop_server,
    wait_ready,
)
from fastapi.testclient import TestClient
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy import stats

from service.client import AsyncClient, Client, KeepsetError
from service.outcomes import Outcome, OutcomeStore
from service.registry import load_registry
from service.request_ids import RequestIds
from service.routing import choose_arm

BOOK = "prompt-book-app"
ADMIN = "stage-manager"
LOGITS = [0.5, 1.5, 1.0, -1.0]


# -- request ids -------------------------------------------------------------------------------


def test_request_id_round_trip_and_its_proof() -> None:
    ids = RequestIds("a secret")
    token = ids.mint(BOOK, "prompt-book", 4, "candidate", now=1_800_000_000)
    assert len(token) < 100 and token.isascii()
    assert base64.urlsafe_b64decode(token + "=" * (-len(token) % 4))  # URL-safe, unpadded
    issued = ids.verify(BOOK, token)
    assert issued is not None
    assert (issued.issued, issued.policy, issued.version, issued.arm) == (
        1_800_000_000,
        "prompt-book",
        4,
        "candidate",
    )
    assert ids.verify("usher-desk", token) is None  # another client's id
    assert RequestIds("another secret").verify(BOOK, token) is None  # another start's secret
    # Any single changed character is refused (the MAC covers every byte of the payload).
    alphabet = "AQgw_-"
    for i in range(len(token)):
        changed = alphabet[(alphabet.find(token[i]) + 1) % len(alphabet)]
        if changed != token[i]:
            assert ids.verify(BOOK, token[:i] + changed + token[i + 1 :]) is None, i
    for junk in ["", "x", "!!!!", token[:-4], token + "AAAA", "é" * 20, "A" * 600]:
        assert ids.verify(BOOK, junk) is None
    assert ids.mint(BOOK, "prompt-book", 4, "candidate") != ids.mint(
        BOOK, "prompt-book", 4, "candidate"
    )  # the nonce


def test_request_id_macs_are_the_documented_ones() -> None:
    """The MAC of a minted id is keyed BLAKE2b-128 (RFC 7693) over the framed client and the
    payload, computed here with hashlib from the layout in request_ids' docstring; an id of
    the earlier format, its MAC truncated HMAC-SHA256 (RFC 2104) made here with hmac, still
    verifies; a secret longer than a BLAKE2b key works."""
    secret = "a secret"
    framed = len(BOOK).to_bytes(2, "big") + BOOK.encode()
    token = RequestIds(secret).mint(BOOK, "prompt-book", 4, "candidate", now=1_800_000_000)
    raw = base64.urlsafe_b64decode(token + "=" * (-len(token) % 4))
    payload, mac = raw[:-16], raw[-16:]
    assert payload[0] == 2
    expected = hashlib.blake2b(
        framed + payload, key=secret.encode(), digest_size=16, person=b"keepset req id"
    )
    assert mac == expected.digest()

    # Format 1: format byte, u32 issued, 8-byte nonce, u32 version, u8 + policy, u16 + arm.
    old = struct.pack(">BI8sI", 1, 1_700_000_000, b"12345678", 3)
    old += bytes([len("surtitles")]) + b"surtitles" + (7).to_bytes(2, "big") + b"control"
    context = b"keepset request id\x00"
    old_mac = hmac.new(secret.encode(), context + framed + old, hashlib.sha256).digest()[:16]
    old_id = base64.urlsafe_b64encode(old + old_mac).rstrip(b"=").decode()
    issued = RequestIds(secret).verify(BOOK, old_id)
    assert issued is not None
    assert (issued.issued, issued.policy, issued.version, issued.arm) == (
        1_700_000_000,
        "surtitles",
        3,
        "control",
    )
    assert RequestIds("another secret").verify(BOOK, old_id) is None

    long_secret = "k" * 200
    long_token = RequestIds(long_secret).mint(BOOK, "prompt-book", 4, "candidate")
    assert RequestIds(long_secret).verify(BOOK, long_token) is not None
    assert RequestIds("k" * 199).verify(BOOK, long_token) is None


def test_routes_outcome_labels_are_checked() -> None:
    from service.routing import parse_routes

    known = {("box-office", 1)}
    arms = [{"policy": "box-office@1", "weight": 1}]
    good, refused = parse_routes(
        {"clients": {"a": {"arms": arms, "outcomes": {"labels": ["accepted", "no_show-2"]}}}},
        known,
    )
    assert not refused and good["a"].outcome_labels == ("accepted", "no_show-2")
    bad_blocks: list[Any] = [
        {"labels": []},
        {"labels": ["Accepted"]},
        {"labels": ["a", "a"]},
        {"labels": "accepted"},
        {"labels": ["ok"], "extra": 1},
        ["accepted"],
        {"labels": ["x" * 40]},
    ]
    for block in bad_blocks:
        routes, refused = parse_routes({"clients": {"a": {"arms": arms, "outcomes": block}}}, known)
        assert not routes and len(refused) == 1 and "outcomes" in refused[0].reason, block


# -- the store ---------------------------------------------------------------------------------


def _outcome(i: int, arm: str, value: float | None, label: str | None) -> Outcome:
    return Outcome(f"id-{arm}-{i}", BOOK, "prompt-book", 3, arm, value, label, 0, 0.0)


def test_store_moments_keep_their_digits_and_refuse_duplicates(tmp_path: Path) -> None:
    """Reference: numpy's mean and var(ddof=1). Values near 1e9 with a spread of 1: the
    one-pass sum(x^2) - n mean^2 would lose every digit of the variance."""
    from service.outcomes import DuplicateOutcome

    rng = np.random.default_rng(4)
    values = 1e9 + rng.normal(0, 1, size=500)
    store = OutcomeStore(tmp_path / "o.sqlite3")
    for i, v in enumerate(values):
        store.add(_outcome(i, "control", float(v), "accepted" if i % 4 else "rejected"))
    store.add(_outcome(0, "candidate", None, "accepted"))
    with pytest.raises(DuplicateOutcome):
        store.add(_outcome(3, "control", 1.0, None))
    got = store.by_arm()
    control = got[(BOOK, "control")]
    assert control.outcomes == 500 and control.values.n == 500
    assert control.values.mean == pytest.approx(float(values.mean()), rel=1e-15)
    assert control.values.variance == pytest.approx(float(values.var(ddof=1)), rel=1e-6)
    assert control.labels == {"accepted": 375, "rejected": 125}
    candidate = got[(BOOK, "candidate")]
    assert (candidate.outcomes, candidate.values.n, candidate.labels) == (1, 0, {"accepted": 1})
    store.close()


# -- the endpoint, in process ------------------------------------------------------------------


@pytest.fixture
def app(registry: Path) -> Iterator[TestClient]:
    with in_process(registry) as client:
        yield client


def _pick(client: Any, who: str = BOOK, routing_key: str | None = None) -> dict[str, Any]:
    body: dict[str, Any] = {"logits": LOGITS}
    if routing_key is not None:
        body["routing_key"] = routing_key
    response = client.post("/v1/pick", json=body, headers=auth(who))
    assert response.status_code == 200, response.text
    answer: dict[str, Any] = response.json()
    return answer


def _report(client: Any, body: Any, who: str = BOOK) -> Any:
    return client.post("/v1/outcome", json=body, headers=auth(who))


def test_outcome_is_recorded_once(app: TestClient) -> None:
    picked = _pick(app)
    response = _report(
        app, {"request_id": picked["request_id"], "value": 0.75, "label": "accepted"}
    )
    assert response.status_code == 201, response.text
    recorded = response.json()
    assert {k: recorded[k] for k in ("client", "policy", "version", "arm", "value", "label")} == {
        "client": BOOK,
        "policy": picked["policy"],
        "version": picked["version"],
        "arm": picked["arm"],
        "value": 0.75,
        "label": "accepted",
    }
    again = _report(app, {"request_id": picked["request_id"], "value": 0.1})
    assert_problem(again, 409, "already recorded")
    outcomes = app.get("/v1/routes", headers=auth(ADMIN)).json()["clients"][BOOK]["outcomes"]
    assert outcomes["arms"][picked["arm"]]["outcomes"] == 1
    assert outcomes["arms"][picked["arm"]]["value"]["mean"] == 0.75
    metrics = app.get("/metrics").text
    assert f'keepset_outcomes_total{{arm="{picked["arm"]}",client="{BOOK}"}} 1.0' in metrics
    assert 'endpoint="/v1/outcome"' in metrics


def test_outcome_problems(app: TestClient, registry: Path) -> None:
    rid = _pick(app)["request_id"]
    usher_rid = _pick(app, "usher-desk")["request_id"]
    h = {**auth(BOOK), "Content-Type": "application/json"}
    # Another client's id, a changed id and an id of another app (secret) are all unknown.
    assert_problem(_report(app, {"request_id": usher_rid, "value": 1}), 404, "no request")
    assert_problem(_report(app, {"request_id": rid, "value": 1}, "usher-desk"), 404, "no request")
    tampered = rid[:20] + ("A" if rid[20] != "A" else "B") + rid[21:]
    assert_problem(_report(app, {"request_id": tampered, "value": 1}), 404)
    foreign = RequestIds("elsewhere").mint(BOOK, "prompt-book", 3, "control")
    assert_problem(_report(app, {"request_id": foreign, "value": 1}), 404)
    # Malformed bodies: 400; the media type: 415; keys: 401 and 403.
    for raw in [
        b"{",
        b"[1]",
        b'{"value": 1}',
        b'{"request_id": "%s"}',
        b'{"request_id": "%s", "value": "1"}',
        b'{"request_id": "%s", "value": true}',
        b'{"request_id": "%s", "label": 3}',
        b'{"request_id": "%s", "value": 1, "extra": 2}',
    ]:
        body = raw.replace(b"%s", rid.encode())
        assert_problem(app.post("/v1/outcome", content=body, headers=h), 400)
    assert_problem(
        app.post("/v1/outcome", content=b"x", headers={**auth(BOOK), "Content-Type": "text/plain"}),
        415,
    )
    assert_problem(app.post("/v1/outcome", json={"request_id": rid, "value": 1}), 401)
    assert_problem(_report(app, {"request_id": rid, "value": 1}, ADMIN), 403)
    # Values JSON cannot hold finitely, and labels the route does not declare: 422.
    for raw in [b'{"request_id": "%s", "value": 1e400}', b'{"request_id": "%s", "value": NaN}']:
        body = raw.replace(b"%s", rid.encode())
        assert_problem(app.post("/v1/outcome", content=body, headers=h), 422, "finite")
    assert_problem(_report(app, {"request_id": rid, "label": "maybe"}), 422, "accepted, rejected")
    assert_problem(
        _report(app, {"request_id": usher_rid, "label": "accepted"}, "usher-desk"),
        422,
        "declares no outcome labels",
    )
    # None of the refusals recorded anything: the id still takes its one outcome.
    assert _report(app, {"request_id": rid, "label": "rejected"}).status_code == 201
    assert _report(app, {"request_id": usher_rid, "value": 2.5}, "usher-desk").status_code == 201


def test_outcome_for_an_old_request_is_gone(app: TestClient) -> None:
    ids: RequestIds = app.app.state.live.request_ids  # type: ignore[attr-defined]
    eight_days_ago = time.time() - 8 * 24 * 3600
    old = ids.mint(BOOK, "prompt-book", 3, "control", now=eight_days_ago)
    assert_problem(_report(app, {"request_id": old, "value": 1}), 410, "KEEPSET_OUTCOME_MAX_AGE")
    recent = ids.mint(BOOK, "prompt-book", 3, "control", now=time.time() - 6 * 24 * 3600)
    assert _report(app, {"request_id": recent, "value": 1}).status_code == 201


def test_continuations_take_outcomes_plain_and_streamed(app: TestClient) -> None:
    assert wait_ready(app) == 200
    plain = app.post(
        "/v1/continue", json={"prompt": "Enter the porter,", "budget": 3}, headers=auth(BOOK)
    )
    assert plain.status_code == 200, plain.text
    with app.stream(
        "POST",
        "/v1/continue",
        json={"prompt": "Enter the porter,", "budget": 3, "stream": True},
        headers=auth(BOOK),
    ) as streamed:
        events = streamed.read().decode().split("\n\n")
    start = next(e for e in events if e.startswith("event: start"))
    streamed_id = json.loads(start.split("data: ", 1)[1])["request_id"]
    for rid in (plain.json()["request_id"], streamed_id):
        assert _report(app, {"request_id": rid, "label": "accepted"}).status_code == 201


# -- a real two-worker server ------------------------------------------------------------------


def _keys_for_arms(registry: Path, per_arm: dict[str, int]) -> dict[str, list[str]]:
    """Routing keys that land on each arm, found with the service's own sticky hash."""
    route = load_registry(registry).routes[BOOK]
    labels = [arm.public_label(i) for i, arm in enumerate(route.arms)]
    found: dict[str, list[str]] = {label: [] for label in per_arm}
    i = 0
    while any(len(found[label]) < n for label, n in per_arm.items()):
        key = f"patron-{i}"
        label = labels[choose_arm(BOOK, key, route.arms, random.Random(0))]
        if len(found[label]) < per_arm[label]:
            found[label].append(key)
        i += 1
    return found


def _fresh_post(base: str, path: str, body: dict[str, Any], who: str) -> httpx.Response:
    # A new connection each time: uvicorn's workers accept connections in turn, so the
    # requests spread over both workers.
    return httpx.post(f"{base}{path}", json=body, headers=auth(who), timeout=30)


def _routes(base: str) -> dict[str, Any]:
    response = httpx.get(f"{base}/v1/routes", headers=auth(ADMIN), timeout=30)
    assert response.status_code == 200, response.text
    clients: dict[str, Any] = response.json()["clients"]
    return clients


def test_report_sums_workers_and_survives_a_restart(registry: Path, tmp_path: Path) -> None:
    db = tmp_path / "outcomes.sqlite3"
    env = {"KEEPSET_REQUEST_SECRET": "lantern-row-test-secret", "KEEPSET_OUTCOMES_DB": str(db)}
    keys = _keys_for_arms(registry, {"control": 24, "candidate": 16})
    rng = np.random.default_rng(12)
    planted = {"control": 10.0, "candidate": 11.0}
    posted: dict[str, list[float]] = {"control": [], "candidate": []}
    labels: dict[str, list[str]] = {"control": [], "candidate": []}
    pending: list[str] = []
    server = start_server(registry, workers=2, **env)
    try:
        base = server.base_url
        for arm, arm_keys in keys.items():
            for i, key in enumerate(arm_keys):
                picked = _fresh_post(base, "/v1/pick", {"logits": LOGITS, "routing_key": key}, BOOK)
                assert picked.status_code == 200 and picked.json()["arm"] == arm
                rid = picked.json()["request_id"]
                if i % 4 == 3:
                    pending.append(rid)  # reported after the restart
                    continue
                value = float(rng.normal(planted[arm], 1.0))
                label = (
                    "accepted"
                    if rng.uniform() < (0.4 if arm == "control" else 0.7)
                    else ("rejected")
                )
                body = {"request_id": rid, "value": value, "label": label}
                assert _fresh_post(base, "/v1/outcome", body, BOOK).status_code == 201
                posted[arm].append(value)
                labels[arm].append(label)
        # A duplicate on whichever worker answers, and another client's use of an id.
        rid = pending[0]
        first = _fresh_post(base, "/v1/outcome", {"request_id": rid, "value": 1.0}, BOOK)
        assert first.status_code == 201
        posted[first.json()["arm"]].append(1.0)
        pending.pop(0)
        for _ in range(3):
            again = _fresh_post(base, "/v1/outcome", {"request_id": rid, "value": 1.0}, BOOK)
            assert_problem(again, 409)
        assert_problem(
            _fresh_post(base, "/v1/outcome", {"request_id": rid, "value": 1.0}, "usher-desk"), 404
        )
        report = _routes(base)[BOOK]
        _check_report(report, posted, labels, requests={"control": 24, "candidate": 16})
        _check_cli(base, report)
        _check_python_client(base)
    finally:
        stop_server(server)

    # The same secret and store: earlier ids still take outcomes, earlier outcomes still count;
    # requests are counted since this start.
    server = start_server(registry, workers=1, **env)
    try:
        base = server.base_url
        for rid in pending:
            answer = _fresh_post(base, "/v1/outcome", {"request_id": rid, "value": 5.0}, BOOK)
            assert answer.status_code == 201, answer.text
            posted[answer.json()["arm"]].append(5.0)
        report = _routes(base)[BOOK]
        assert report["outcomes"]["since"] == "KEEPSET_OUTCOMES_DB"
        _check_report(report, posted, labels, requests={"control": 0, "candidate": 0})
    finally:
        stop_server(server)

    # A fresh secret (none set): ids from before are unknown.
    server = start_server(registry, workers=1, KEEPSET_OUTCOMES_DB=str(db))
    try:
        stale = _fresh_post(
            server.base_url, "/v1/outcome", {"request_id": pending[0], "value": 1.0}, BOOK
        )
        assert_problem(stale, 404)
    finally:
        stop_server(server)


def _check_report(
    report: dict[str, Any],
    posted: dict[str, list[float]],
    labels: dict[str, list[str]],
    requests: dict[str, int],
) -> None:
    """Everything the report says against the posted numbers, and its tests against SciPy."""
    outcomes = report["outcomes"]
    assert outcomes["control"] == "control" and outcomes["labels"] == ["accepted", "rejected"]
    for arm in ("control", "candidate"):
        got = outcomes["arms"][arm]
        values = np.array(posted[arm])
        assert got["requests"] == requests[arm] == report["split"]["requests"][arm]
        assert got["outcomes"] == len(values)
        assert got["value"]["n"] == len(values)
        assert got["value"]["mean"] == pytest.approx(float(values.mean()), rel=1e-12)
        low, high = stats.t.interval(
            0.95, len(values) - 1, loc=values.mean(), scale=stats.sem(values)
        )
        assert got["value"]["ci95"] == pytest.approx([low, high], rel=1e-9)
        assert got["labelled"] == len(labels[arm])
        assert got["labels"]["accepted"]["count"] == labels[arm].count("accepted")
    a, c = np.array(posted["candidate"]), np.array(posted["control"])
    welch = outcomes["versus_control"]["candidate"]["value"]
    reference = stats.ttest_ind(a, c, equal_var=False)
    assert welch["statistic"] == pytest.approx(float(reference.statistic), rel=1e-9)
    assert welch["p_value"] == pytest.approx(float(reference.pvalue), rel=1e-9)
    assert welch["test"] == "welch_t"
    share = outcomes["versus_control"]["candidate"]["labels"]["accepted"]
    table = np.array(
        [
            [labels["candidate"].count("accepted"), labels["candidate"].count("rejected")],
            [labels["control"].count("accepted"), labels["control"].count("rejected")],
        ]
    )
    statistic, p_value, _, _ = stats.chi2_contingency(table, correction=False)
    assert share["statistic"] == pytest.approx(float(statistic), rel=1e-9)
    assert share["p_value"] == pytest.approx(float(p_value), rel=1e-9)


def _check_cli(base: str, report: dict[str, Any]) -> None:
    command = [sys.executable, "-m", "service.cli", "experiment", "report", "--url", base]
    env = {**os.environ, "KEEPSET_ADMIN_KEY": DEMO_KEYS[ADMIN]}
    text = subprocess.run(
        [*command, "--client", BOOK], env=env, capture_output=True, text=True, check=True
    ).stdout
    assert text.startswith(BOOK) and "candidate" in text and "prompt-book@4" in text
    p_value = report["outcomes"]["versus_control"]["candidate"]["value"]["p_value"]
    assert (f"{p_value:.2g}" if p_value >= 1e-4 else f"{p_value:.1e}") in text
    as_json = subprocess.run(
        [*command, "--json"], env=env, capture_output=True, text=True, check=True
    ).stdout
    assert json.loads(as_json)["clients"][BOOK]["outcomes"] == report["outcomes"]
    refused = subprocess.run(
        [*command, "--key", DEMO_KEYS[BOOK]], capture_output=True, text=True, check=False
    )
    assert refused.returncode == 1 and "403" in refused.stderr


def _check_python_client(base: str) -> None:
    with Client(base, key=DEMO_KEYS["usher-desk"]) as usher:
        picked = usher.pick(np.array(LOGITS, dtype=np.float32))
        recorded = usher.outcome(picked.request_id, value=3.0)
        assert (recorded.arm, recorded.value, recorded.label) == (picked.arm, 3.0, None)
        with pytest.raises(KeepsetError) as refused:
            usher.outcome(picked.request_id, value=3.0)
        assert refused.value.status == 409

    async def run() -> None:
        # Another client than the report's, whose numbers the test checks after a restart.
        async with AsyncClient(base, key=DEMO_KEYS["usher-desk"]) as usher:
            picked = await usher.pick(np.array(LOGITS, dtype=np.float32))
            recorded = await usher.outcome(picked.request_id, value=4.0)
            assert (recorded.arm, recorded.value) == (picked.arm, 4.0)

    asyncio.run(run())


_JSON = st.recursive(
    st.none() | st.booleans() | st.integers(-(2**70), 2**70) | st.floats() | st.text(max_size=20),
    lambda inner: st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=8), inner),
    max_leaves=12,
)


@pytest.fixture(scope="module")
def fuzz_app(tmp_path_factory: pytest.TempPathFactory) -> Iterator[TestClient]:
    registry = Path(tmp_path_factory.mktemp("outcome-fuzz")) / "policies"
    shutil.copytree(ROOT / "policies", registry)
    with in_process(registry) as client:
        yield client


@settings(
    max_examples=200,
    deadline=None,
    derandomize=True,
    suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow],
)
@given(
    fields=st.fixed_dictionaries(
        {},
        optional={
            "request_id": st.one_of(st.just("REAL"), st.text(max_size=80), _JSON),
            "value": st.one_of(st.floats(), st.integers(-(2**70), 2**70), _JSON),
            "label": st.one_of(st.sampled_from(["accepted", "rejected", "other"]), _JSON),
            "extra": _JSON,
        },
    )
)
def test_fuzzed_outcome_bodies_get_a_problem_or_are_recorded(
    fuzz_app: TestClient, fields: dict[str, Any]
) -> None:
    if fields.get("request_id") == "REAL":
        fields["request_id"] = _pick(fuzz_app)["request_id"]
    # The standard encoder writes NaN and Infinity, as many clients' encoders do.
    body = json.dumps(fields).encode()
    response = fuzz_app.post(
        "/v1/outcome", content=body, headers={**auth(BOOK), "Content-Type": "application/json"}
    )
    if response.status_code == 201:
        return
    assert response.status_code in (400, 404, 409, 422), response.text
    assert_problem(response, response.status_code)

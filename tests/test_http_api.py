"""Every bad-input class gets its documented status and an RFC 9457 problem document; tested
in process (the same app object that ``keepset serve`` runs)."""

from __future__ import annotations

import base64
import io
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from conftest import ROOT, assert_problem, auth, in_process
from fastapi.testclient import TestClient
from prometheus_client import REGISTRY

from service.app import create_app
from service.settings import Settings


def npy_bytes(array: np.ndarray) -> bytes:
    buffer = io.BytesIO()
    np.save(buffer, array)
    return buffer.getvalue()


@pytest.fixture
def client(registry: Path) -> Iterator[TestClient]:
    limits = {"max_rows": 4, "max_vocab": 1000, "max_body_bytes": 200_000}
    with in_process(registry, **limits) as test_client:
        yield test_client


def pick_json(client: TestClient, body: Any, who: str = "usher-desk") -> Any:
    return client.post("/v1/pick", json=body, headers=auth(who))


def pick_npy(client: TestClient, data: bytes, who: str = "usher-desk", **params: Any) -> Any:
    headers = {**auth(who), "Content-Type": "application/x-npy"}
    return client.post("/v1/pick", content=data, params=params, headers=headers)


GOOD = {"logits": [[0.0, 1.0, 2.0, 0.5]]}


def test_good_request_answers(client: TestClient) -> None:
    r = pick_json(client, {**GOOD, "seed": 1})
    assert r.status_code == 200 and r.json()["seed"] == 1


def test_picks_are_counted_and_other_methods_reach_the_router(client: TestClient) -> None:
    """POST /v1/pick takes a lane past the router and counts its rows after the answer is
    sent; the count is there by the time the caller has the answer."""
    labels = {"client": "usher-desk", "policy": "box-office", "version": "1", "arm": "0"}
    before = REGISTRY.get_sample_value("keepset_rows_total", labels) or 0.0
    rows = [[0.0, 1.0, 2.0, 0.5], [3.0, 1.0, 2.0, 0.5], [0.0, 0.0, 0.0, 9.0]]
    assert pick_json(client, {"logits": rows, "seed": 4}).status_code == 200
    assert REGISTRY.get_sample_value("keepset_rows_total", labels) == before + 3
    assert_problem(client.get("/v1/pick", headers=auth("usher-desk")), 405)
    assert_problem(client.post("/v1/pick", json=GOOD), 401, "Bearer")


def test_a_crash_in_a_hot_path_is_a_500_problem_and_reaches_the_server(
    registry: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """The hot paths skip the framework's server-error middleware, so they answer a crash as it
    would: a 500 problem document, and the error goes on to the server, which logs it."""

    def broken(*args: Any) -> None:
        raise RuntimeError("a bug")

    monkeypatch.setattr("service.app.route_of", broken)
    settings = Settings(
        policies=registry, keys=ROOT / "deploy" / "demo-keys.yaml", reload_poll_seconds=0
    )
    with TestClient(create_app(settings), raise_server_exceptions=False) as quiet:
        for path, body in (("/v1/pick", GOOD), ("/v1/continue", {"prompt": "The lights"})):
            answer = quiet.post(path, json=body, headers=auth("usher-desk"))
            assert_problem(answer, 500, "log")
            assert answer.json()["type"].endswith("internal")
    with TestClient(create_app(settings)) as loud, pytest.raises(RuntimeError, match="a bug"):
        loud.post("/v1/pick", json=GOOD, headers=auth("usher-desk"))


def test_under_a_root_path_a_pick_takes_the_framework_route(registry: Path) -> None:
    """An app served under a root path skips the hot paths; the framework's route answers the
    same, and counts the rows once the answer is sent, as the lane does."""
    settings = Settings(
        policies=registry, keys=ROOT / "deploy" / "demo-keys.yaml", reload_poll_seconds=0
    )
    labels = {"client": "usher-desk", "policy": "box-office", "version": "1", "arm": "0"}
    body = {**GOOD, "seed": 5}
    with TestClient(create_app(settings)) as plain:
        lane = plain.post("/v1/pick", json=body, headers=auth("usher-desk"))
    before = REGISTRY.get_sample_value("keepset_rows_total", labels) or 0.0
    with TestClient(create_app(settings), root_path="/sidecar") as nested:
        routed = nested.post("/sidecar/v1/pick", json=body, headers=auth("usher-desk"))
    assert routed.status_code == 200 and routed.headers["content-type"] == "application/json"
    # The entropy is a float32 sum, whose last digits differ between the compiled kernel and
    # the numpy path (an app may answer before its kernel is ready); the rest is exact.
    [lane_row], [routed_row] = lane.json()["rows"], routed.json()["rows"]
    assert routed_row.pop("entropy") == pytest.approx(lane_row.pop("entropy"), rel=1e-6)
    assert routed_row == lane_row
    assert REGISTRY.get_sample_value("keepset_rows_total", labels) == before + 1


def test_malformed_json(client: TestClient) -> None:
    r = client.post(
        "/v1/pick",
        content=b"{not json",
        headers={**auth("usher-desk"), "Content-Type": "application/json"},
    )
    assert_problem(r, 400, "not JSON")


def test_unknown_field_and_both_forms(client: TestClient) -> None:
    assert_problem(pick_json(client, {**GOOD, "temperature": 1}), 400, "temperature")
    assert_problem(pick_json(client, {}), 400, "exactly one")
    both = {**GOOD, "logits_npy": base64.b64encode(npy_bytes(np.zeros(3, np.float32))).decode()}
    assert_problem(pick_json(client, both), 400, "exactly one")


def test_wrong_media_type(client: TestClient) -> None:
    r = client.post(
        "/v1/pick", content=b"1,2,3", headers={**auth("usher-desk"), "Content-Type": "text/csv"}
    )
    assert_problem(r, 415, "text/csv")


def test_bad_npy_and_wrong_dtype(client: TestClient) -> None:
    assert_problem(pick_npy(client, b"\x93NUMPY garbage"), 400)
    truncated = npy_bytes(np.zeros((2, 10), np.float32))[:-8]
    assert_problem(pick_npy(client, truncated), 400, "data bytes")
    assert_problem(pick_npy(client, npy_bytes(np.zeros(5, np.float64))), 415, "float32 or float16")
    assert_problem(pick_npy(client, npy_bytes(np.zeros(5, np.int32))), 415)
    assert_problem(pick_npy(client, npy_bytes(np.zeros((2, 2, 2), np.float32))), 400, "shape")
    # A header naming no dtype numpy knows (found by tests/test_npy.py's fuzzing; was a 500).
    good = npy_bytes(np.zeros(4, np.float32))
    assert_problem(pick_npy(client, good.replace(b"'<f4'", b"'<f3'")), 400, "no valid dtype")


def test_npy_float16_and_base64_form(client: TestClient) -> None:
    logits = np.array([[0.0, 3.0, 1.0]], np.float16)
    assert pick_npy(client, npy_bytes(logits), seed=4).status_code == 200
    encoded = base64.b64encode(npy_bytes(logits.astype(np.float32))).decode()
    r = pick_json(client, {"logits_npy": encoded, "seed": 4})
    assert r.status_code == 200
    assert assert_problem(pick_json(client, {"logits_npy": "***"}), 400, "base64")


def test_ragged_rows(client: TestClient) -> None:
    assert_problem(pick_json(client, {"logits": [[1.0, 2.0], [3.0]]}), 400, "equal-length")


def test_nan_only_row(client: TestClient) -> None:
    r = client.post(
        "/v1/pick",
        content=b'{"logits": [[NaN, NaN]]}',
        headers={**auth("usher-desk"), "Content-Type": "application/json"},
    )
    assert_problem(r, 422, "no finite logit")
    assert_problem(pick_json(client, {"logits": [[None, None]]}), 422, "no finite logit")


def test_banned_id_beyond_vocabulary(client: TestClient, registry: Path) -> None:
    from service.registry import load_registry

    snapshot = load_registry(registry)
    assert snapshot.valid
    # programme-desk's policy penalises the history; an id beyond V is refused.
    r = pick_json(client, {"logits": [[0.0, 1.0]], "history": [[5]]}, who="programme-desk")
    assert_problem(r, 422, "outside")


def test_limits(client: TestClient) -> None:
    assert_problem(pick_json(client, {"logits": [[0.0, 1.0]] * 5}), 413, "KEEPSET_MAX_ROWS")
    assert_problem(pick_json(client, {"logits": [[0.0] * 1001]}), 413, "KEEPSET_MAX_VOCAB")
    big = npy_bytes(np.zeros((4, 60_000), np.float32))
    assert_problem(pick_npy(client, big), 413, "KEEPSET_MAX_BODY_BYTES")


def test_keys_and_clients(client: TestClient) -> None:
    assert_problem(client.post("/v1/pick", json=GOOD), 401, "Bearer")
    assert_problem(
        client.post("/v1/pick", json=GOOD, headers={"Authorization": "Bearer nope"}), 401
    )
    assert_problem(
        client.post("/v1/pick", json=GOOD, headers=auth("stage-manager")), 403, "admin keys"
    )
    assert_problem(client.get("/v1/routes", headers=auth("usher-desk")), 403, "admin")
    assert_problem(client.post("/v1/registry/reload", headers=auth("usher-desk")), 403)
    assert client.get("/v1/routes", headers=auth("stage-manager")).status_code == 200


def test_unknown_client(registry: Path, tmp_path: Path) -> None:
    from service.keys import add_key

    keys = tmp_path / "keys.yaml"
    key = add_key(keys, "stagehand")
    settings = Settings(policies=registry, keys=keys, reload_poll_seconds=0)
    with TestClient(create_app(settings)) as c:
        r = c.post("/v1/pick", json=GOOD, headers={"Authorization": f"Bearer {key}"})
        assert_problem(r, 403, "no route")


def test_adjust_reject_and_clamp(client: TestClient) -> None:
    # prompt-book@3 rejects, @4 clamps; routing keys pick the arm deterministically.
    seen = {}
    for i in range(200):
        r = pick_json(
            client,
            {**GOOD, "routing_key": f"r{i}", "adjust": {"temperature": 1.5}},
            who="prompt-book-app",
        )
        seen.setdefault(r.status_code, r)
        if len(seen) == 2:
            break
    assert_problem(seen[422], 422, "outside the allowed range")
    assert seen[200].json()["clamped"] == ["temperature"]
    r = pick_json(client, {**GOOD, "adjust": {"top_k": 3}}, who="usher-desk")
    body = assert_problem(r, 422, "not adjustable")
    assert body["field"] == "top_k"


def test_overload_answers_429(client: TestClient) -> None:
    live = client.app.state.live  # type: ignore[attr-defined]
    live.in_flight = live.settings.max_in_flight
    try:
        r = pick_json(client, GOOD)
    finally:
        live.in_flight = 0
    assert_problem(r, 429)
    assert r.headers["Retry-After"] == "1"


def test_policy_listing(client: TestClient) -> None:
    names = {
        p["name"] for p in client.get("/v1/policies", headers=auth("usher-desk")).json()["policies"]
    }
    assert {"prompt-book", "box-office", "surtitles", "program-notes"} <= names
    versions = client.get("/v1/policies/prompt-book", headers=auth("usher-desk")).json()
    assert [v["version"] for v in versions["versions"]] == [1, 2, 3, 4, 5]
    assert_problem(client.get("/v1/policies/nothing", headers=auth("usher-desk")), 404)
    assert_problem(client.get("/v1/policies/prompt-book/9", headers=auth("usher-desk")), 404)
    assert_problem(client.get("/v1/nowhere"), 404)


def test_readiness_and_docs(client: TestClient) -> None:
    assert client.get("/healthz").json() == {"status": "ok"}
    # Ready once the model has loaded in the background (picks are served meanwhile).
    deadline = time.monotonic() + 30
    while (ready := client.get("/readyz")).status_code != 200:
        assert_problem(ready, 503, "loading")
        assert time.monotonic() < deadline
        time.sleep(0.05)
    documented = client.get("/openapi.json")
    assert documented.status_code == 200
    # POST /v1/pick skips the router (a lane); it must stay in the documentation all the same.
    assert {"/v1/pick", "/v1/continue", "/v1/outcome"} <= set(documented.json()["paths"])
    live = client.app.state.live  # type: ignore[attr-defined]
    live.draining = True
    assert_problem(client.get("/readyz"), 503, "draining")
    live.draining = False

"""Never a 500 for bad input: random and half-valid bodies, query strings and headers against the
in-process app. Every answer must be a success or a problem document with a 4xx status."""

from __future__ import annotations

import io
import json
import shutil
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from conftest import ROOT, auth, in_process
from fastapi.testclient import TestClient
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

JSON = st.recursive(
    st.none()
    | st.booleans()
    | st.integers(-(2**70), 2**70)
    | st.floats(allow_nan=False, allow_infinity=False)
    | st.text(max_size=20),
    lambda inner: st.lists(inner, max_size=6) | st.dictionaries(st.text(max_size=10), inner),
    max_leaves=30,
)
NUMBERS = st.one_of(st.floats(-1e6, 1e6), st.integers(-1000, 1000), st.none(), st.text(max_size=3))
# np.save of three float32 zeros: numpy itself writes the valid body the query fuzz rides on.
_buffer = io.BytesIO()
np.save(_buffer, np.zeros(3, np.float32))
THREE_ZEROS = _buffer.getvalue()
FUZZ = settings(
    max_examples=250,
    deadline=None,
    derandomize=True,
    suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow],
)


@pytest.fixture(scope="module")
def client(tmp_path_factory: pytest.TempPathFactory) -> Iterator[TestClient]:
    registry = Path(tmp_path_factory.mktemp("fuzz")) / "policies"
    shutil.copytree(ROOT / "policies", registry)
    with in_process(registry, max_rows=8, max_vocab=5000, max_body_bytes=100_000) as app:
        yield app


def assert_handled(response: Any) -> None:
    assert response.status_code < 500, response.text
    if response.status_code >= 400:
        assert response.headers["content-type"].startswith("application/problem+json")
        problem = response.json()
        assert problem["status"] == response.status_code and problem["detail"]


pick_fields = st.fixed_dictionaries(
    {},
    optional={
        "logits": st.one_of(
            JSON, st.lists(NUMBERS, max_size=8), st.lists(st.lists(NUMBERS, max_size=6), max_size=4)
        ),
        "logits_npy": st.one_of(st.text(max_size=40), st.binary(max_size=40).map(bytes.hex)),
        "history": JSON,
        "seed": JSON,
        "routing_key": JSON,
        "adjust": st.one_of(JSON, st.dictionaries(st.sampled_from(["temperature", "top_p"]), JSON)),
    },
)


@FUZZ
@given(body=pick_fields, who=st.sampled_from(["usher-desk", "prompt-book-app", "surtitle-booth"]))
def test_pick_json_bodies(client: TestClient, body: dict[str, Any], who: str) -> None:
    assert_handled(client.post("/v1/pick", json=body, headers=auth(who)))


npy_like = st.builds(
    lambda cut, flips, tail: _damaged(cut, flips, tail),
    st.integers(0, 140),
    st.lists(st.tuples(st.integers(0, 139), st.integers(0, 255)), max_size=3),
    st.binary(max_size=8),
)


def _damaged(cut: int, flips: list[tuple[int, int]], tail: bytes) -> bytes:
    data = bytearray(THREE_ZEROS)
    for at, value in flips:
        data[at % len(data)] = value
    return bytes(data[: len(data) - cut]) + tail


@FUZZ
@given(
    raw=st.one_of(st.binary(max_size=200), npy_like),
    media=st.sampled_from(["application/json", "application/x-npy", "text/plain"]),
)
def test_pick_raw_bodies(client: TestClient, raw: bytes, media: str) -> None:
    headers = {**auth("usher-desk"), "Content-Type": media}
    assert_handled(client.post("/v1/pick", content=raw, headers=headers))


@FUZZ
@given(
    params=st.dictionaries(
        st.sampled_from(["seed", "routing_key", "history", "temperature", "top_k", "x"]),
        st.text(max_size=12),
    )
)
def test_pick_npy_query_strings(client: TestClient, params: dict[str, str]) -> None:
    body = THREE_ZEROS
    headers = {**auth("prompt-book-app"), "Content-Type": "application/x-npy"}
    assert_handled(client.post("/v1/pick", content=body, params=params, headers=headers))


continue_fields = st.fixed_dictionaries(
    {},
    optional={
        "prompt": st.one_of(st.text(max_size=60), JSON),
        "budget": st.one_of(st.integers(-5, 5), JSON),
        "seed": JSON,
        "routing_key": JSON,
        "adjust": st.one_of(JSON, st.dictionaries(st.sampled_from(["temperature"]), JSON)),
        "stream": JSON,
    },
)


@FUZZ
@given(body=continue_fields)
def test_continue_bodies(client: TestClient, body: dict[str, Any]) -> None:
    if isinstance(body.get("budget"), int) and not isinstance(body["budget"], bool):
        body["budget"] = min(body["budget"], 3)  # keep the generation short
    response = client.post("/v1/continue", json=body, headers=auth("usher-desk"))
    assert_handled(response)


@FUZZ
@given(header=st.text(max_size=40))
def test_authorization_headers(client: TestClient, header: str) -> None:
    try:
        headers = {"Authorization": header}
        response = client.get("/v1/policies", headers=headers)
    except (UnicodeEncodeError, ValueError):  # httpx refuses to send such a header at all
        return
    assert_handled(response)


def test_the_fuzzed_npy_body_is_valid_itself(client: TestClient) -> None:
    """The query-string fuzz must reach the query parsing, so its body has to be good."""
    r = client.post(
        "/v1/pick",
        content=THREE_ZEROS,
        headers={**auth("usher-desk"), "Content-Type": "application/x-npy"},
    )
    assert r.status_code == 200, r.text
    assert json.loads(r.text)["tokens"][0] in (0, 1, 2)

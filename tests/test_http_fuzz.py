"""Never a 500 for bad input: random and half-valid bodies, query strings and headers against the
in-process app, shared-memory descriptors against real small segment files, and raw bfloat16
bodies. Every answer must be a success or a problem document with a 4xx status."""

from __future__ import annotations

import base64
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

from service.dtypes import bfloat16_to_float32
from service.npy import to_npy

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


# Real small segment files the shared-memory fuzz names (besides names that do not exist).
SEGMENTS = ["f32-3x7", "bf16-raw", "empty", "odd-bytes", "a-dir", "link-out"]


def _segments(folder: Path) -> None:
    rng = np.random.default_rng(0)
    (folder / "f32-3x7").write_bytes(rng.standard_normal((3, 7)).astype("<f4").tobytes())
    (folder / "bf16-raw").write_bytes(rng.integers(0, 2**16, 40, dtype=np.uint16).tobytes())
    (folder / "empty").write_bytes(b"")
    (folder / "odd-bytes").write_bytes(b"\x01" * 13)
    (folder / "a-dir").mkdir()
    (folder.parent / "outside").write_bytes(bytes(64))
    (folder / "link-out").symlink_to(folder.parent / "outside")


@pytest.fixture(scope="module")
def client(tmp_path_factory: pytest.TempPathFactory) -> Iterator[TestClient]:
    registry = Path(tmp_path_factory.mktemp("fuzz")) / "policies"
    shutil.copytree(ROOT / "policies", registry)
    shm_dir = registry.parent / "shm"
    shm_dir.mkdir()
    _segments(shm_dir)
    limits = {"max_rows": 8, "max_vocab": 5000, "max_body_bytes": 100_000}
    with in_process(registry, shm_dir=shm_dir, **limits) as app:
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


shm_descriptors = st.fixed_dictionaries(
    {},
    optional={
        "segment": st.one_of(
            st.sampled_from(SEGMENTS),
            st.sampled_from(["../outside", "/etc/passwd", ".", "..", "", "f32-3x7/", "a\x00b"]),
            st.text(max_size=12),
            JSON,
        ),
        "offset": st.one_of(st.integers(-8, 200), st.integers(-(2**70), 2**70), JSON),
        "shape": st.one_of(
            st.lists(st.integers(-2, 12), max_size=3),
            st.lists(st.integers(-(2**70), 2**70), max_size=3),
            JSON,
        ),
        "dtype": st.one_of(st.sampled_from(["float32", "float16", "bfloat16"]), JSON),
        "extra": JSON,
    },
)


@FUZZ
@given(
    shm=shm_descriptors,
    fields=st.fixed_dictionaries({}, optional={"seed": JSON, "history": JSON, "logits": JSON}),
)
def test_pick_shm_descriptors(
    client: TestClient, shm: dict[str, Any], fields: dict[str, Any]
) -> None:
    body = {"logits_shm": shm, **fields}
    assert_handled(client.post("/v1/pick", json=body, headers=auth("prompt-book-app")))


@FUZZ
@given(
    bits=st.lists(st.integers(0, 2**16 - 1), min_size=1, max_size=24),
    rows=st.integers(1, 3),
    as_json=st.booleans(),
)
def test_pick_bfloat16_bodies(
    client: TestClient, bits: list[int], rows: int, as_json: bool
) -> None:
    raw = np.array(bits, np.uint16)
    if raw.size % rows == 0:
        raw = raw.reshape(rows, -1)
    if as_json:
        encoded = base64.b64encode(to_npy(raw)).decode()
        body = {"logits_npy": encoded, "logits_dtype": "bfloat16", "seed": 1}
        response = client.post("/v1/pick", json=body, headers=auth("usher-desk"))
    else:
        headers = {**auth("usher-desk"), "Content-Type": "application/x-npy"}
        params = {"dtype": "bfloat16", "seed": "1"}
        response = client.post("/v1/pick", content=to_npy(raw), params=params, headers=headers)
    assert_handled(response)
    finite = np.isfinite(bfloat16_to_float32(raw).reshape(raw.shape[0] if raw.ndim == 2 else 1, -1))
    # Every row with a finite entry is decided; a row without one is the documented 422.
    assert response.status_code == (200 if finite.any(axis=1).all() else 422), response.text


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

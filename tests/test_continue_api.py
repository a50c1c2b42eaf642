"""``POST /v1/continue`` in process: the contract, replay, the policy really applied at every
step (checked against a full recomputation with the model and SciPy's softmax and entropy),
streaming, metrics and every error class."""

from __future__ import annotations

import asyncio
import dataclasses
import json
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import orjson
import pytest
from conftest import assert_problem, auth, in_process
from fastapi.testclient import TestClient
from prometheus_client import REGISTRY
from scipy.special import log_softmax, softmax
from scipy.stats import entropy

from service.app import _event_stream
from service.model import BUNDLED, Model
from service.prompting import PromptRun, StepRecord
from service.registry import load_registry
from service.sampling import final_distribution, parse_chain

PROMPT = "KING. Good morrow, my lords. What news from the north, and"


def wait_ready(client: TestClient) -> None:
    deadline = time.monotonic() + 30
    while client.get("/readyz").status_code != 200:
        assert time.monotonic() < deadline, client.get("/readyz").text
        time.sleep(0.05)


@pytest.fixture(scope="module")
def model() -> Model:
    return Model(BUNDLED, threads=1)


@pytest.fixture
def client(registry: Path) -> Iterator[TestClient]:
    with in_process(registry) as test_client:
        wait_ready(test_client)
        yield test_client


def go(client: TestClient, body: dict[str, Any], who: str = "prompt-book-app") -> Any:
    return client.post("/v1/continue", json=body, headers=auth(who))


def test_answer_has_the_contract_fields(client: TestClient) -> None:
    r = go(client, {"prompt": PROMPT, "seed": 5, "routing_key": "act-1"})
    assert r.status_code == 200, r.text
    body = r.json()
    assert body["client"] == "prompt-book-app" and body["policy"] == "prompt-book"
    assert body["version"] in (3, 4) and body["arm"] in ("control", "candidate")
    assert body["seed"] == 5 and body["finish"] in ("budget", "end", "stop")
    assert len(body["tokens"]) == len(body["steps"]) >= 1
    assert body["text"] == "".join(s["text"] for s in body["steps"])
    step_keys = {"token", "text", "prob", "logprob", "entropy", "kept", "kept_mass", "fallback"}
    for step, token in zip(body["steps"], body["tokens"], strict=True):
        assert set(step) == step_keys and step["token"] == token
        assert 0 < step["prob"] <= 1 and step["kept"] >= 1 and 0 < step["kept_mass"] <= 1
    if body["finish"] == "stop":
        assert "\n\n" not in body["text"]  # prompt-book stops at a blank line, never emitting it


def test_same_seed_replays_and_other_seeds_differ(client: TestClient) -> None:
    first = go(client, {"prompt": PROMPT, "seed": 11, "routing_key": "act-2"}).json()
    again = go(client, {"prompt": PROMPT, "seed": 11, "routing_key": "act-2"}).json()
    assert again["tokens"] == first["tokens"] and again["text"] == first["text"]
    others = {
        tuple(go(client, {"prompt": PROMPT, "seed": s, "routing_key": "act-2"}).json()["tokens"])
        for s in (12, 13, 14)
    }
    assert len(others | {tuple(first["tokens"])}) >= 3


def test_every_step_follows_the_policy(client: TestClient, registry: Path, model: Model) -> None:
    """Recompute each step's logits with the model (no cache) and check the served token lies in
    the policy's kept set, and that the diagnostics match SciPy's softmax and entropy of the raw
    logits (DESIGN.md §1: entropy and logprob describe the raw model at T = 1)."""
    body = go(client, {"prompt": PROMPT, "seed": 21, "routing_key": "act-3", "budget": 24}).json()
    chain = load_registry(registry).chain(("prompt-book", body["version"]))
    ids = model.text_ids(PROMPT)
    generated = body["tokens"]
    logits, _ = model.forward(np.asarray([ids + generated], np.int64), model.empty_cache())
    for t, step in enumerate(body["steps"]):
        row = logits[0, len(ids) - 1 + t].astype(np.float64)
        history = [ids[1:] + generated[:t]]  # the start marker is not part of the history
        dist = final_distribution(chain, row.astype(np.float32), history)[0]
        assert dist[step["token"]] > 0, f"step {t}: token outside the kept set"
        assert step["kept"] == int(np.count_nonzero(dist))
        assert step["prob"] == pytest.approx(dist[step["token"]], rel=1e-3)
        assert step["logprob"] == pytest.approx(log_softmax(row)[step["token"]], abs=1e-3)
        assert step["entropy"] == pytest.approx(entropy(softmax(row)), abs=1e-3)


def test_budget_is_capped_by_the_policy(client: TestClient) -> None:
    capped = go(client, {"prompt": PROMPT, "budget": 10_000}, who="usher-desk").json()
    assert capped["budget"] == 64  # box-office@1's budget
    assert len(capped["tokens"]) <= 64
    short = go(client, {"prompt": PROMPT, "budget": 3, "seed": 1}, who="usher-desk").json()
    assert short["budget"] == 3 and len(short["tokens"]) <= 3


def test_adjust_within_range_refused_or_clamped_outside(client: TestClient) -> None:
    # Sticky keys pick the arm: scene-1 lands on prompt-book@3 (rejects out-of-range values),
    # scene-9 on @4 (clamps them).
    reject = {"prompt": PROMPT, "budget": 4, "routing_key": "scene-1"}
    clamp = {"prompt": PROMPT, "budget": 4, "routing_key": "scene-9"}
    ok = go(client, {**reject, "adjust": {"temperature": 0.6}})
    assert ok.status_code == 200 and ok.json()["version"] == 3, ok.text
    assert_problem(go(client, {**reject, "adjust": {"temperature": 3.0}}), 422, "0.5")
    assert_problem(go(client, {**reject, "adjust": {"top_p": 0.5}}), 422)
    clamped = go(client, {**clamp, "adjust": {"temperature": 3.0}})
    assert clamped.status_code == 200 and clamped.json()["version"] == 4, clamped.text
    assert clamped.json()["clamped"] == ["temperature"]


def test_streaming_sends_one_step_event_per_token(client: TestClient) -> None:
    events: list[tuple[str, Any]] = []
    with client.stream(
        "POST",
        "/v1/continue",
        json={"prompt": PROMPT, "seed": 5, "routing_key": "act-1", "stream": True},
        headers=auth("prompt-book-app"),
    ) as r:
        assert r.status_code == 200
        assert r.headers["content-type"].startswith("text/event-stream")
        for block in r.read().decode().split("\n\n"):
            if block.strip():
                fields = dict(line.split(": ", 1) for line in block.splitlines())
                events.append((fields["event"], json.loads(fields["data"])))
    kinds = [e for e, _ in events]
    assert kinds[0] == "start" and kinds[-1] == "done" and set(kinds[1:-1]) == {"step"}
    done = events[-1][1]
    steps = [d for e, d in events if e == "step"]
    assert [s["token"] for s in steps] == done["tokens"]
    assert "".join(s["text"] for s in steps) == done["text"]
    plain = go(client, {"prompt": PROMPT, "seed": 5, "routing_key": "act-1"}).json()
    assert plain["tokens"] == done["tokens"] and plain["finish"] == done["finish"]


def _stream_chunks(model: Model, flush_seconds: float) -> list[bytes]:
    """The chunks of a 40-step stream as the app writes them (the end token banned)."""
    chain = parse_chain([{"ban": [0]}, {"temperature": 1.0}])
    run = PromptRun(model, chain, PROMPT, budget=40, seed=8)

    async def collect() -> list[bytes]:
        return [chunk async for chunk in _event_stream({"seed": 8}, run, flush_seconds)]

    return asyncio.run(collect())


def test_streamed_steps_go_out_at_most_once_per_flush_interval(model: Model) -> None:
    # 40 steps take tens of milliseconds: with a one-second interval the first step goes out
    # alone, at once, and the other 39 in one write when the run ends.
    chunks = _stream_chunks(model, flush_seconds=1.0)
    steps_per_chunk = [chunk.count(b"event: step\n") for chunk in chunks]
    assert steps_per_chunk == [0, 1, 39, 0], steps_per_chunk
    assert chunks[0].startswith(b"event: start\n") and chunks[-1].startswith(b"event: done\n")
    # Interval 0: every step is handed over as made; the events are the same.
    every = _stream_chunks(model, flush_seconds=0.0)
    assert b"".join(every) == b"".join(chunks)
    assert sum(chunk.count(b"event: step\n") for chunk in every) == 40


def metric(name: str, **labels: str) -> float:
    return REGISTRY.get_sample_value(name, labels) or 0.0


def test_steps_are_counted_like_pick_rows(client: TestClient) -> None:
    labels = {"client": "usher-desk", "policy": "box-office", "version": "1", "arm": "0"}
    before = metric("keepset_rows_total", **labels)
    kept_before = metric(
        "keepset_kept_tokens_count", policy="box-office", version="1", role="served"
    )
    body = go(client, {"prompt": PROMPT, "budget": 9, "seed": 2}, who="usher-desk").json()
    steps = len(body["steps"])
    assert metric("keepset_rows_total", **labels) == before + steps
    kept_after = metric(
        "keepset_kept_tokens_count", policy="box-office", version="1", role="served"
    )
    assert kept_after == kept_before + steps


def test_shadow_policy_sees_every_step(client: TestClient) -> None:
    shadow = {"policy": "prompt-book", "version": "5", "role": "shadow"}
    before = metric("keepset_kept_tokens_count", **shadow)
    body = go(client, {"prompt": PROMPT, "budget": 6, "seed": 3}).json()
    assert metric("keepset_kept_tokens_count", **shadow) == before + len(body["steps"])


def test_bad_requests(client: TestClient) -> None:
    assert_problem(go(client, {"prompt": "word " * 400}), 413, "context is 256 tokens")
    streamed = {"prompt": "word " * 400, "stream": True}
    assert_problem(go(client, streamed), 413, "context is 256 tokens")
    assert_problem(go(client, {"prompt": 3}), 400, "prompt")
    assert_problem(go(client, {"prompt": "x", "budget": 0}), 400, "budget")
    assert_problem(go(client, {"prompt": "x", "colour": "red"}), 400, "colour")
    assert_problem(go(client, {}), 400, "prompt")
    bad_json = client.post(
        "/v1/continue",
        content=b'{"prompt": ',
        headers={**auth("prompt-book-app"), "Content-Type": "application/json"},
    )
    assert_problem(bad_json, 400, "JSON")
    wrong_type = client.post(
        "/v1/continue",
        content=b"hello",
        headers={**auth("usher-desk"), "Content-Type": "text/plain"},
    )
    assert_problem(wrong_type, 415)
    assert_problem(client.post("/v1/continue", json={"prompt": "x"}), 401)
    assert_problem(go(client, {"prompt": "x"}, who="stage-manager"), 403)


def test_broken_model_folder_is_not_ready_but_picks_still_work(
    registry: Path, tmp_path: Path
) -> None:
    broken = tmp_path / "model"
    broken.mkdir()
    (broken / "model.json").write_text("{}")
    with in_process(registry, model=broken) as client:
        deadline = time.monotonic() + 10
        while "loading" in client.get("/readyz").text and time.monotonic() < deadline:
            time.sleep(0.05)
        problem = assert_problem(client.get("/readyz"), 503, "model not loaded")
        assert "missing model.onnx" in problem["detail"]
        assert_problem(go(client, {"prompt": "x"}), 503, "model.onnx")
        pick = client.post("/v1/pick", json={"logits": [1.0, 2.0]}, headers=auth("usher-desk"))
        assert pick.status_code == 200


def test_stopping_while_the_model_loads_waits_for_the_load(registry: Path) -> None:
    """An app stopped a moment after it started must wait for the model's loading thread (a
    cancel cannot stop it): an onnxruntime thread still starting at interpreter exit aborts the
    process ("terminate called without an active exception")."""
    with in_process(registry) as client:
        assert client.get("/healthz").status_code == 200
        live = client.app.state.live  # type: ignore[attr-defined]
        assert live.model is None  # stopped long before a load could finish
    assert live.model is not None and live.model_problem is None


def test_step_record_is_written_as_its_fields() -> None:
    """The answers' per-step objects are StepRecords written by orjson: every field, by name
    and in order, with JSON's values (checked against the standard library's encoder)."""
    record = StepRecord(7, 'a"é', 0.5, -0.69, 1.2, 12, 0.9, None)
    written = orjson.dumps(record)
    assert json.loads(written) == dataclasses.asdict(record)
    assert list(json.loads(written)) == [f.name for f in dataclasses.fields(StepRecord)]

"""The prompt path end to end on a real ``keepset serve`` on 127.0.0.1: plain and streamed
continuations read with a real HTTP client, a disconnect that stops the model, and a broken
model folder that keeps readiness at 503 with the reason."""

from __future__ import annotations

import asyncio
import json
import subprocess
import sys
import time
from collections.abc import Iterator
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from typing import Any

import httpx
import pytest
from conftest import Server, auth, start_server, stop_server

from service.client import AsyncClient, Client, KeepsetError

# A policy that never ends on its own: the end token is banned and there is no stop text, so
# only the budget (or a client that goes away) ends a continuation.
LONG_TAKE_BUDGET = 60_000
LONG_TAKE = f"""\
name: long-take
version: 1
owner: test-rig
summary: Never ends by itself; for the disconnect test.
chain:
  - ban: [0]
  - temperature: 1.0
min_keep: 1
fallback: greedy
budget: {LONG_TAKE_BUDGET}
stop: []
expect:
  kept_median_min: 1
"""


def sse_events(lines: Iterator[str]) -> Iterator[tuple[str, dict[str, Any]]]:
    """Parse Server-Sent Events (event + one data line each, blank line between)."""
    event, data = "message", ""
    for line in lines:
        if line.startswith("event: "):
            event = line[len("event: ") :]
        elif line.startswith("data: "):
            data = line[len("data: ") :]
        elif not line and data:
            yield event, json.loads(data)
            event, data = "message", ""


def rows_total(server: Server, policy: str) -> float:
    text = httpx.get(f"{server.base_url}/metrics", timeout=5).text
    return sum(
        float(line.rsplit(" ", 1)[1])
        for line in text.splitlines()
        if line.startswith("keepset_rows_total{") and f'policy="{policy}"' in line
    )


def settled_rows(server: Server, before: float, deadline: float) -> float:
    """Rows long-take served since ``before``, once the count stops growing. The server counts
    a continuation's steps when it has ended, so the count is 0 while the model still runs."""
    counted = -1.0
    while time.monotonic() < deadline:
        time.sleep(0.5)
        now = rows_total(server, "long-take") - before
        if now == counted and now > 0:
            break
        counted = now
    return counted


def route_usher_desk_to_long_take(registry: Path) -> None:
    """Publish long-take@1 in ``registry`` and route usher-desk to it."""
    (registry / "long-take").mkdir()
    (registry / "long-take" / "1.yaml").write_text(LONG_TAKE)
    publish = [sys.executable, "-m", "service.cli", "policy", "publish", str(registry)]
    subprocess.run([*publish, "long-take"], check=True, capture_output=True)
    routes = (registry / "routes.yaml").read_text()
    (registry / "routes.yaml").write_text(routes.replace("box-office@1", "long-take@1"))


@pytest.fixture
def long_take_server(registry: Path) -> Iterator[Server]:
    route_usher_desk_to_long_take(registry)
    running = start_server(registry, workers=2)
    yield running
    stop_server(running)


def test_plain_and_streamed_continuations(long_take_server: Server) -> None:
    url = f"{long_take_server.base_url}/v1/continue"
    body = {"prompt": "Enter the porter, with a lantern.", "seed": 4, "budget": 40}
    plain = httpx.post(url, json=body, headers=auth("usher-desk"), timeout=30)
    assert plain.status_code == 200, plain.text
    answer = plain.json()
    assert answer["policy"] == "long-take" and answer["finish"] == "budget"
    assert len(answer["tokens"]) == 40 and answer["text"]
    with httpx.stream(
        "POST", url, json={**body, "stream": True}, headers=auth("usher-desk"), timeout=30
    ) as r:
        assert r.status_code == 200
        assert r.headers["content-type"].startswith("text/event-stream")
        events = list(sse_events(r.iter_lines()))
    assert [e for e, _ in events] == ["start"] + ["step"] * 40 + ["done"]
    done = events[-1][1]
    assert done["tokens"] == answer["tokens"] and done["text"] == answer["text"]
    assert "".join(d["text"] for e, d in events if e == "step") == answer["text"]


def test_concurrent_continuations_replay_exactly(long_take_server: Server) -> None:
    """Six continuations at once share the workers' model sessions; each must equal the same
    request made alone (nothing leaks between concurrent decode loops)."""
    url = f"{long_take_server.base_url}/v1/continue"

    def ask(seed: int) -> list[int]:
        body = {"prompt": "Enter two watchmen, with a lantern.", "seed": seed, "budget": 48}
        r = httpx.post(url, json=body, headers=auth("usher-desk"), timeout=60)
        assert r.status_code == 200, r.text
        tokens: list[int] = r.json()["tokens"]
        return tokens

    with ThreadPoolExecutor(6) as pool:
        together = list(pool.map(ask, range(6)))
    alone = [ask(seed) for seed in range(6)]
    assert together == alone
    assert len({tuple(t) for t in alone}) == 6  # temperature 1: different seeds, different text


def test_python_client_continues_and_streams(long_take_server: Server) -> None:
    base = long_take_server.base_url
    with Client(base, key="demo-usher-desk-key", timeout=30) as client:
        reply = client.continue_prompt("Enter the porter.", seed=9, budget=20)
        assert reply.policy == "long-take" and len(reply.steps) == 20 == len(reply.tokens)
        streamed = list(client.stream_prompt("Enter the porter.", seed=9, budget=20))
        assert [s.token for s in streamed] == reply.tokens
        assert "".join(s.text for s in streamed) == reply.text
        with pytest.raises(KeepsetError) as refused:
            client.continue_prompt("word " * 400)
        assert refused.value.status == 413

    async def from_asyncio() -> tuple[list[int], list[int]]:
        async with AsyncClient(base, key="demo-usher-desk-key", timeout=30) as client:
            plain = await client.continue_prompt("Enter the porter.", seed=9, budget=20)
            steps = [
                s.token async for s in client.stream_prompt("Enter the porter.", seed=9, budget=20)
            ]
            return plain.tokens, steps

    plain_tokens, streamed_tokens = asyncio.run(from_asyncio())
    assert plain_tokens == streamed_tokens == reply.tokens


def test_a_client_that_goes_away_stops_the_generation(long_take_server: Server) -> None:
    url = f"{long_take_server.base_url}/v1/continue"
    body = {"prompt": "Thunder. Enter three watchmen.", "stream": True}
    before = rows_total(long_take_server, "long-take")
    with httpx.stream("POST", url, json=body, headers=auth("usher-desk"), timeout=30) as r:
        steps = 0
        for event, _ in sse_events(r.iter_lines()):
            steps += event == "step"
            if steps == 3:
                break  # leaving the block closes the connection mid-stream
    # It stopped far short of the budget (tens of seconds of work, which would not even have
    # ended, and so not been counted, within the deadline).
    counted = settled_rows(long_take_server, before, deadline=time.monotonic() + 10)
    assert 3 <= counted < LONG_TAKE_BUDGET // 10, counted


def test_a_plain_request_whose_client_goes_away_stops_too(long_take_server: Server) -> None:
    url = f"{long_take_server.base_url}/v1/continue"
    before = rows_total(long_take_server, "long-take")
    started = time.monotonic()
    with pytest.raises(httpx.ReadTimeout):  # the client gives up and closes the connection
        httpx.post(url, json={"prompt": "Alarum within."}, headers=auth("usher-desk"), timeout=0.5)
    counted = settled_rows(long_take_server, before, deadline=started + 10)
    # About half a second of work, not the budget (tens of seconds).
    assert 1 <= counted < LONG_TAKE_BUDGET // 10, counted
    text = httpx.get(f"{long_take_server.base_url}/metrics", timeout=5).text
    assert 'code="499",endpoint="/v1/continue"' in text


def test_broken_model_folder_keeps_readiness_at_503(registry: Path, tmp_path: Path) -> None:
    empty = tmp_path / "no-model-here"
    empty.mkdir()
    server = start_server(registry, workers=1, wait_ready=False, KEEPSET_MODEL=str(empty))
    try:
        deadline = time.monotonic() + 20
        while True:
            ready = httpx.get(f"{server.base_url}/readyz", timeout=5)
            if "loading" not in ready.text or time.monotonic() > deadline:
                break
            time.sleep(0.1)
        assert ready.status_code == 503
        assert ready.headers["content-type"].startswith("application/problem+json")
        assert "model not loaded" in ready.json()["detail"]
        assert "missing model.onnx, tokenizer.json, model.json" in ready.json()["detail"]
        continued = httpx.post(
            f"{server.base_url}/v1/continue",
            json={"prompt": "x"},
            headers=auth("usher-desk"),
            timeout=5,
        )
        assert continued.status_code == 503
        assert "model.onnx" in server.log_text()  # the operator sees why in the log too
    finally:
        stop_server(server)

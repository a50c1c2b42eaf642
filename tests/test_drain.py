"""Graceful drain on a real two-worker ``keepset serve``: after SIGTERM readiness is 503 at once,
new requests get 503 with Retry-After, liveness stays 200, every stream in flight ends with its
``done`` event (also one that outlasts the drain), and the process exits within the drain plus
the shutdown time."""

from __future__ import annotations

import signal
import threading
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import httpx
import pytest
from conftest import Server, assert_problem, auth, start_server, stop_server
from test_continue_server import LONG_TAKE_BUDGET, route_usher_desk_to_long_take, sse_events

DRAIN_SECONDS = 2.0
SHUTDOWN_SECONDS = 20.0
# The long stream is sized from the measured token rate to run about this long on its own, so it
# outlasts the drain on a fast machine and still ends well within the shutdown time on a slow one.
LONG_STREAM_SECONDS = 6.0


@pytest.fixture
def draining_server(registry: Path) -> Iterator[Server]:
    route_usher_desk_to_long_take(registry)
    running = start_server(
        registry,
        workers=2,
        KEEPSET_DRAIN_SECONDS=str(DRAIN_SECONDS),
        KEEPSET_SHUTDOWN_SECONDS=str(SHUTDOWN_SECONDS),
    )
    yield running
    if running.process.poll() is None:
        stop_server(running)


def _stream(base: str, budget: int, started: threading.Event, out: dict[str, Any]) -> None:
    body = {"prompt": "Enter the porter, with a lantern.", "seed": budget, "budget": budget}
    body["stream"] = True
    steps = 0
    try:
        with httpx.stream(
            "POST", f"{base}/v1/continue", json=body, headers=auth("usher-desk"), timeout=60
        ) as response:
            out["status"] = response.status_code
            for event, data in sse_events(response.iter_lines()):
                if event == "step":
                    steps += 1
                    started.set()
                elif event == "done":
                    out["done"] = data
                    out["done_at"] = time.monotonic()
    except httpx.HTTPError as exc:
        out["error"] = repr(exc)
    out["steps"] = steps
    started.set()


def _tokens_per_second(base: str) -> float:
    """The rate of one streamed continuation on this machine (model and policy of the test)."""
    out: dict[str, Any] = {}
    began = time.monotonic()
    _stream(base, 400, threading.Event(), out)
    assert out.get("steps") == 400, out
    return 400 / (time.monotonic() - began)


def test_sigterm_drains_then_exits(draining_server: Server) -> None:
    base = draining_server.base_url
    # Short streams end within the drain; the long one outlasts it and must still end whole.
    rate = _tokens_per_second(base)
    # Half a second of work each, alone: long enough that none ends before all four have started.
    short_budget = max(120, int(rate * 0.5))
    long_budget = min(int(rate * LONG_STREAM_SECONDS), LONG_TAKE_BUDGET)
    budgets = [short_budget] * 3 + [long_budget]
    results: list[dict[str, Any]] = [{} for _ in budgets]
    started = [threading.Event() for _ in budgets]
    threads = [
        threading.Thread(target=_stream, args=(base, b, s, r))
        for b, s, r in zip(budgets, started, results, strict=True)
    ]
    for thread in threads:
        thread.start()
    for event in started:
        assert event.wait(30), "a stream never started"
    assert not any("done" in r for r in results), "streams ended before SIGTERM; budgets too small"

    sigterm_at = time.monotonic()
    draining_server.process.send_signal(signal.SIGTERM)
    # Readiness goes to 503 at once on both workers (each connection may reach either).
    deadline = sigterm_at + 1.0
    ready_codes: list[int] = []
    while time.monotonic() < deadline:
        ready_codes.append(httpx.get(f"{base}/readyz", timeout=2).status_code)
        if ready_codes[-3:] == [503, 503, 503]:
            break
    assert ready_codes[-3:] == [503, 503, 503], ready_codes
    assert httpx.get(f"{base}/healthz", timeout=2).status_code == 200
    refused = httpx.post(
        f"{base}/v1/pick", json={"logits": [0.0, 1.0]}, headers=auth("usher-desk"), timeout=5
    )
    assert_problem(refused, 503, "shutting down")
    assert refused.headers["retry-after"] == "1"

    for thread in threads:
        thread.join(SHUTDOWN_SECONDS + DRAIN_SECONDS + 10)
    for budget, result in zip(budgets, results, strict=True):
        assert "error" not in result, result
        assert result["status"] == 200
        done = result["done"]  # dropped: 0; every stream ends with its done event
        assert done["finish"] == "budget" and len(done["tokens"]) == budget == result["steps"]
    assert results[-1]["done_at"] > sigterm_at + DRAIN_SECONDS  # it did outlast the drain

    draining_server.process.wait(SHUTDOWN_SECONDS + DRAIN_SECONDS + 10)
    exited_after = time.monotonic() - sigterm_at
    assert exited_after < DRAIN_SECONDS + SHUTDOWN_SECONDS + 5, exited_after
    assert "draining for 2 s" in draining_server.log_text()
    # Nothing listens any more.
    with pytest.raises(httpx.ConnectError):
        httpx.get(f"{base}/healthz", timeout=2)

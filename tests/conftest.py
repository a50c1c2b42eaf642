"""Shared fixtures: a registry copy per test, the demo keys, an in-process app and a real
``keepset serve`` on 127.0.0.1."""

from __future__ import annotations

import os
import shutil
import socket
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import httpx
import pytest
from fastapi.testclient import TestClient

from service.app import create_app
from service.sampling import warm_up
from service.settings import Settings

ROOT = Path(__file__).resolve().parents[1]
DEMO_KEYS = {
    "prompt-book-app": "demo-prompt-book-app-key",
    "usher-desk": "demo-usher-desk-key",
    "surtitle-booth": "demo-surtitle-booth-key",
    "programme-desk": "demo-programme-desk-key",
    "stage-manager": "demo-stage-manager-key",
}


def auth(who: str) -> dict[str, str]:
    return {"Authorization": f"Bearer {DEMO_KEYS[who]}"}


def in_process(registry: Path, **settings: Any) -> TestClient:
    """The app on a registry folder with the demo keys and no file polling, in process (use it
    as a context manager so start-up and shutdown run)."""
    options: dict[str, Any] = {
        "keys": ROOT / "deploy" / "demo-keys.yaml",
        "reload_poll_seconds": 0,
        **settings,
    }
    return TestClient(create_app(Settings(policies=registry, **options)))


# A server loads the sampling kernel from numba's cache, which the session fixture below fills
# before any test runs; the margin covers a slow machine, not a compile.
SERVER_READY_SECONDS = 60


@pytest.fixture(scope="session", autouse=True)
def compiled_kernel() -> None:
    """Compile the sampling kernel once, in this process, before any test: it fills numba's
    on-disk cache beside the module, so every app and server the tests start loads it in about
    a second instead of compiling for about 30 s each (a fresh clone has no cache)."""
    warm_up()


def wait_ready(client: TestClient, within: float = 60.0) -> int:
    """Poll /readyz until it answers 200 (model loaded, kernel compiled) or time runs out; the
    last status. Tests that compare answers exactly wait for it: before the kernel is ready
    picks take the numpy path, whose diagnostics differ in the last bits."""
    deadline = time.monotonic() + within
    while True:
        status = client.get("/readyz").status_code
        if status == 200 or time.monotonic() > deadline:
            return status
        time.sleep(0.05)


def assert_same_pick(a: dict[str, Any], b: dict[str, Any]) -> None:
    """Two /v1/pick answers for the same request: equal, except that the float diagnostics
    may differ in the last digits when one came from a worker whose compiled kernel was still
    warming up (the numpy path sums the raw softmax in float32, the kernel in float64 chunks).
    Tokens, kept sizes and fallbacks are always exact."""
    a, b = dict(a), dict(b)
    a.pop("request_id", None)
    b.pop("request_id", None)
    rows_a, rows_b = a.pop("rows"), b.pop("rows")
    assert a == b
    for ra, rb in zip(rows_a, rows_b, strict=True):
        assert (ra["token"], ra["kept"], ra["fallback"]) == (
            rb["token"],
            rb["kept"],
            rb["fallback"],
        )
        for field in ("prob", "logprob", "entropy", "kept_mass"):
            assert ra[field] == pytest.approx(rb[field], rel=1e-5, abs=1e-7), field


def assert_problem(response: Any, status: int, needle: str = "") -> dict[str, Any]:
    """An RFC 9457 problem document with this status whose detail mentions ``needle``."""
    assert response.status_code == status, response.text
    assert response.headers["content-type"].startswith("application/problem+json")
    body: dict[str, Any] = response.json()
    assert {"type", "title", "status", "detail"} <= set(body)
    assert body["status"] == status and body["type"].startswith("urn:keepset:problem:")
    assert needle in body["detail"], body
    return body


@pytest.fixture
def registry(tmp_path: Path) -> Path:
    """A private copy of the demo registry that a test may change."""
    target = tmp_path / "policies"
    shutil.copytree(ROOT / "policies", target)
    return target


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


class Server:
    def __init__(
        self,
        base_url: str,
        process: subprocess.Popen[bytes],
        policies: Path,
        log: Path,
        uds: Path | None = None,
    ):
        self.base_url = base_url
        self.process = process
        self.policies = policies
        self.log = log
        self.uds = uds

    def log_text(self) -> str:
        return self.log.read_text(encoding="utf-8", errors="replace")


def start_server(
    policies: Path,
    workers: int = 2,
    *,
    wait_ready: bool = True,
    uds: Path | None = None,
    **env: str,
) -> Server:
    """``keepset serve`` on a free loopback port, and on the Unix socket ``uds`` if given;
    returns once /readyz answers 200 on each (or, with ``wait_ready=False``, once it answers
    at all)."""
    port = free_port()
    environment = {
        **os.environ,
        "KEEPSET_POLICIES": str(policies),
        "KEEPSET_KEYS": str(ROOT / "deploy" / "demo-keys.yaml"),
        "KEEPSET_PORT": str(port),
        "KEEPSET_HOST": "127.0.0.1",
        "KEEPSET_WORKERS": str(workers),
        "KEEPSET_LOG_LEVEL": "warning",
        "KEEPSET_DRAIN_SECONDS": "0",  # test_drain sets its own; others need no drain to stop
        **({"KEEPSET_UDS": str(uds)} if uds is not None else {}),
        **env,
    }
    # The log goes to a file, not a pipe: a pipe nobody reads would block a chatty server.
    log = policies.parent / f"keepset-{port}.log"
    with log.open("wb") as sink:
        process = subprocess.Popen(
            [sys.executable, "-m", "service.cli", "serve"],
            env=environment,
            stdout=sink,
            stderr=subprocess.STDOUT,
        )
    base = f"http://127.0.0.1:{port}"
    server = Server(base, process, policies, log, uds)
    deadline = time.monotonic() + SERVER_READY_SECONDS
    while time.monotonic() < deadline:
        if process.poll() is not None:
            raise RuntimeError(f"keepset serve exited: {server.log_text()}")
        try:
            statuses = [httpx.get(f"{base}/readyz", timeout=1).status_code]
            if uds is not None:
                with httpx.Client(transport=httpx.HTTPTransport(uds=str(uds))) as over_uds:
                    statuses.append(over_uds.get(f"{base}/readyz", timeout=1).status_code)
            if all(s == 200 for s in statuses) or not wait_ready:
                return server
        except httpx.HTTPError:
            pass
        time.sleep(0.2)
    process.kill()
    raise RuntimeError(f"keepset serve did not become ready within {SERVER_READY_SECONDS} s")


def stop_server(server: Server) -> None:
    server.process.terminate()
    try:
        server.process.wait(timeout=15)
    except subprocess.TimeoutExpired:
        server.process.kill()
        server.process.wait()


@pytest.fixture
def server(registry: Path) -> Iterator[Server]:
    """A real keepset serve with two workers on loopback, on a private registry copy."""
    running = start_server(registry, workers=2, KEEPSET_RELOAD_POLL_SECONDS="0.5")
    yield running
    stop_server(running)

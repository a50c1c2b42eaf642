"""End to end against a real ``keepset serve`` (two uvicorn workers) on 127.0.0.1."""

from __future__ import annotations

import hashlib
import io
import re
import threading
from pathlib import Path

import httpx
import numpy as np
from conftest import Server, auth

from service.client import Client, KeepsetError
from service.sampling import final_distribution


def npy_bytes(array: np.ndarray) -> bytes:
    buffer = io.BytesIO()
    np.save(buffer, array)
    return buffer.getvalue()


def scrape(server: Server) -> str:
    return httpx.get(f"{server.base_url}/metrics", timeout=5).text


def sample_value(text: str, name: str, **labels: str) -> float:
    total = 0.0
    for line in text.splitlines():
        if not line.startswith(name + "{") and not line.startswith(name + " "):
            continue
        if all(f'{k}="{v}"' in line for k, v in labels.items()):
            total += float(line.rsplit(" ", 1)[1])
    return total


def test_json_and_npy_picks_agree_and_replay(server: Server) -> None:
    rng = np.random.default_rng(3)
    logits = rng.standard_normal((3, 5000)).astype(np.float32)
    body = {"logits": logits.tolist(), "seed": 11, "routing_key": "scene-7"}
    a = httpx.post(
        f"{server.base_url}/v1/pick", json=body, headers=auth("prompt-book-app"), timeout=10
    )
    assert a.status_code == 200, a.text
    b = httpx.post(
        f"{server.base_url}/v1/pick",
        params={"seed": 11, "routing_key": "scene-7"},
        content=npy_bytes(logits),
        headers={**auth("prompt-book-app"), "Content-Type": "application/x-npy"},
        timeout=10,
    )
    assert b.status_code == 200, b.text
    ja, jb = a.json(), b.json()
    assert ja["tokens"] == jb["tokens"] and ja["arm"] == jb["arm"] and ja["seed"] == 11
    assert ja["policy"] == "prompt-book" and len(ja["rows"]) == 3
    # The token is inside the kept set of the version that was served.
    from service.registry import load_registry

    chain = load_registry(server.policies).chain(("prompt-book", ja["version"]))
    dist = final_distribution(chain, logits)
    for row, token in enumerate(ja["tokens"]):
        assert dist[row, token] > 0
        assert ja["rows"][row]["kept"] == int(np.count_nonzero(dist[row]))


def test_python_client_and_errors(server: Server) -> None:
    logits = np.random.default_rng(4).standard_normal((2, 300)).astype(np.float32)
    with Client(server.base_url, key="demo-surtitle-booth-key") as client:
        reply = client.pick(logits, seed=5, adjust={"top_p": 0.6})
        assert reply.policy == "surtitles" and len(reply.tokens) == 2
        try:
            client.pick(logits, adjust={"top_p": 0.99})
        except KeepsetError as exc:
            assert exc.status == 422 and exc.problem["field"] == "top_p"
        else:
            raise AssertionError("an out-of-range adjust was accepted")
    with Client(server.base_url, key="not-a-key") as client:
        try:
            client.pick(logits)
        except KeepsetError as exc:
            assert exc.status == 401
        else:
            raise AssertionError("a bad key was accepted")


def test_metrics_with_two_workers_match_responses(server: Server) -> None:
    rng = np.random.default_rng(8)
    kept: list[int] = []
    for i in range(40):  # enough requests that both workers answer some
        logits = rng.standard_normal((2, 400)).astype(np.float32) * rng.uniform(0.2, 4)
        r = httpx.post(
            f"{server.base_url}/v1/pick",
            json={"logits": logits.tolist(), "seed": i},
            headers=auth("usher-desk"),
            timeout=10,
        )
        assert r.status_code == 200
        kept += [row["kept"] for row in r.json()["rows"]]
    nan_row = [[float("nan")] * 3 + [1.0, 2.0]]
    r = httpx.post(
        f"{server.base_url}/v1/pick",
        content=b'{"logits": [[NaN, NaN, NaN, 1.0, 2.0]]}',
        headers={**auth("usher-desk"), "Content-Type": "application/json"},
        timeout=10,
    )
    assert r.status_code == 200 and r.json()["rows"][0]["fallback"] == "non_finite", nan_row
    text = scrape(server)
    labels = {"policy": "box-office", "version": "1", "role": "served"}
    assert sample_value(text, "keepset_kept_tokens_count", **labels) == len(kept) + 1
    for bound in (1, 2, 3, 5, 8, 13, 21):
        expected = sum(k <= bound for k in kept) + 1  # the NaN row keeps 1
        got = sample_value(text, "keepset_kept_tokens_bucket", le=f"{float(bound)}", **labels)
        assert got == expected, (bound, got, expected)
    assert (
        sample_value(
            text, "keepset_fallbacks_total", policy="box-office", version="1", reason="non_finite"
        )
        == 1
    )
    assert sample_value(text, "keepset_rows_total", client="usher-desk") == len(kept) + 1


def test_shadow_policy_is_measured_not_served(server: Server) -> None:
    logits = np.random.default_rng(9).standard_normal((1, 800)).astype(np.float32)
    for key in range(10):
        r = httpx.post(
            f"{server.base_url}/v1/pick",
            json={"logits": logits.tolist(), "routing_key": f"k{key}"},
            headers=auth("prompt-book-app"),
            timeout=10,
        )
        assert r.status_code == 200 and r.json()["version"] in (3, 4)
    text = scrape(server)
    shadow = sample_value(
        text, "keepset_kept_tokens_count", policy="prompt-book", version="5", role="shadow"
    )
    assert shadow == 10


def test_reload_under_traffic_keeps_last_good(server: Server) -> None:
    """50 reloads, some with a broken or tampered file, while picks keep coming."""
    failures: list[str] = []
    done = threading.Event()
    count = [0]
    logits = np.random.default_rng(1).standard_normal((1, 200)).astype(np.float32).tolist()

    def traffic() -> None:
        with httpx.Client(timeout=10) as http:
            while not done.is_set() and count[0] < 2000:
                r = http.post(
                    f"{server.base_url}/v1/pick",
                    json={"logits": logits},
                    headers=auth("programme-desk"),
                )
                count[0] += 1
                if r.status_code != 200:
                    failures.append(f"{r.status_code} {r.text}")

    worker = threading.Thread(target=traffic)
    worker.start()
    policy_file: Path = server.policies / "program-notes" / "1.yaml"
    original = policy_file.read_bytes()
    outcomes = []
    try:
        with httpx.Client(timeout=10) as admin:
            for i in range(50):
                if i % 3 == 1:
                    policy_file.write_bytes(original.replace(b"top_k: 40", b"top_k: 41"))
                elif i % 3 == 2:
                    (server.policies / "program-notes" / "2.yaml").write_text("name: [broken")
                r = admin.post(
                    f"{server.base_url}/v1/registry/reload", headers=auth("stage-manager")
                )
                outcomes.append(r.json()["outcome"])
                policy_file.write_bytes(original)
                (server.policies / "program-notes" / "2.yaml").unlink(missing_ok=True)
    finally:
        done.set()
        worker.join()
    assert not failures, failures[:3]
    assert count[0] > 0
    assert outcomes.count("kept_last_good") == 33 and outcomes.count("loaded") == 17
    text = scrape(server)
    assert sample_value(text, "keepset_registry_reloads_total", outcome="kept_last_good") >= 33
    r = httpx.get(f"{server.base_url}/v1/policies/program-notes/1", headers=auth("programme-desk"))
    assert r.json()["sha256"] == hashlib.sha256(original).hexdigest()


def test_metrics_names_follow_the_design(server: Server) -> None:
    httpx.post(
        f"{server.base_url}/v1/pick",
        json={"logits": [[1.0, 2.0, 3.0]]},
        headers=auth("usher-desk"),
        timeout=10,
    )
    text = scrape(server)
    for name in (
        "keepset_kept_tokens_bucket",
        "keepset_entropy_nats_bucket",
        "keepset_rows_total",
        "keepset_request_duration_seconds_bucket",
    ):
        assert re.search(rf"^{name}\{{", text, re.M), name


def test_async_client(server: Server) -> None:
    import asyncio

    from service.client import AsyncClient

    async def go() -> list[int]:
        async with AsyncClient(server.base_url, key="demo-usher-desk-key") as client:
            replies = await asyncio.gather(
                *(client.pick(np.zeros((1, 50), np.float32), seed=s) for s in range(8))
            )
        return [r.tokens[0] for r in replies]

    tokens = asyncio.run(go())
    # All-equal logits under box-office (top_k 20): tokens come from the 20 lowest ids.
    assert len(tokens) == 8 and all(0 <= t < 20 for t in tokens)

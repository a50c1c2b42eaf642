"""The collapse guard: its state machine on a scripted watch and clock, then in the service (in
process with an injected clock, and on a real two-worker server under concurrent traffic), on
the prompt path with the bundled model, and the routes.yaml refusals.

The crafted rows are checked against the published rule they rely on: min-p (Nguyen et al.
2024) keeps token i only if p_i >= m * max p. Row COLLAPSING is one logit of 3 and 999 of 0;
under prompt-book@4 (temperature 0.9, then min_p 0.05) every other token has
p_i / max p = exp(-3 / 0.9) = 0.036 < 0.05, so exactly one token is kept, below that version's
expect.kept_median_min of 2; prompt-book@3 (typical 0.95 after top_k 200) keeps many."""

from __future__ import annotations

import hashlib
import json
import logging
import time
from collections.abc import Iterator
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from typing import Any

import httpx
import numpy as np
import pytest
import yaml
from conftest import assert_problem, auth, in_process, start_server, stop_server, wait_ready
from fastapi.testclient import TestClient
from prometheus_client import REGISTRY

from service.collapse_guard import CollapseGuard, may_release
from service.fallback_serving import fallback_chain
from service.model import BUNDLED, Model
from service.policy import apply_adjust
from service.prompting import PromptRun
from service.registry import load_registry
from service.routing import GuardSpec, Route, parse_routes, stable_point
from service.sampling import pick
from service.watch import CollapseWatch

CLIENT = "prompt-book-app"
COLLAPSING = [3.0] + [0.0] * 999
HEALTHY = (np.random.default_rng(0).standard_normal(1000) * 0.1).tolist()
# Routing keys whose stable point lands in the candidate arm (the last 10 of 100).
CANDIDATE_KEYS = [
    k for k in (f"reader-{i}" for i in range(400)) if stable_point(CLIENT, k, 100) >= 90
]


def guarded_routes(
    registry: Path, guard: dict[str, Any], arms: list[dict[str, Any]] | None = None
) -> None:
    """Give prompt-book-app a guard in the registry copy's routes.yaml."""
    path = registry / "routes.yaml"
    routes = yaml.safe_load(path.read_text())
    if arms is not None:
        routes["clients"][CLIENT]["arms"] = arms
    routes["clients"][CLIENT]["guard"] = guard
    path.write_text(yaml.safe_dump(routes, sort_keys=False))


def publish(registry: Path, policy: dict[str, Any]) -> None:
    """Write a policy file and its lock entry, as `keepset policy publish` would."""
    path = registry / policy["name"] / f"{policy['version']}.yaml"
    path.write_text(yaml.safe_dump(policy, sort_keys=False))
    digest = hashlib.sha256(path.read_bytes()).hexdigest()
    with open(registry / "published.lock", "a") as lock:
        lock.write(f"{policy['name']} {policy['version']} {digest}\n")


# -- the state machine ---------------------------------------------------------------------------


def test_release_needs_recovery_margin_and_hold() -> None:
    base: dict[str, Any] = {
        "collapsed": False,
        "floor": 2.0,
        "margin": 1.0,
        "engaged_at": 10.0,
        "hold_seconds": 5.0,
    }
    assert may_release(median=3.0, now=15.0, **base)
    assert not may_release(median=2.5, now=15.0, **base)  # at the floor, not floor + margin
    assert not may_release(median=3.0, now=14.9, **base)  # hold not over
    assert not may_release(median=None, now=99.0, **base)  # the window cannot judge yet
    collapsed: dict[str, Any] = {**base, "collapsed": True}
    assert not may_release(**collapsed, median=9.0, now=99.0)


def test_guard_engages_holds_and_releases_on_a_scripted_watch() -> None:
    now = [100.0]
    guard = CollapseGuard(clock=lambda: now[0])
    watch = CollapseWatch(window=10, min_steps=4)
    spec = GuardSpec(fallback=("prompt-book", 3), hold_seconds=5.0, recover_margin=1.0)
    version = ("prompt-book", 4)

    def step(kept: list[int]) -> Any:
        watch.observe(*version, kept, floor=2)
        return guard.update(CLIENT, version, spec, 2.0, watch)

    assert step([1, 1, 1]) is None  # three rows: the watch has not decided
    on = step([1])  # median of [1, 1, 1, 1] is 1 < 2
    assert on is not None and on.engaged and on.reason == "collapsed"
    assert (on.median, on.rows, on.recover_at) == (1.0, 4, 3.0)
    assert guard.engaged(CLIENT, version)
    # Window [1]*4 + [2]*6: median 2, so the watch has recovered (2 >= 2), but the guard asks for
    # floor + margin = 3.
    now[0] = 200.0
    assert step([2] * 6) is None and not watch.active() and guard.engaged(CLIENT, version)
    # [2]*6 + [9]*4 after the window slid: median (2 + 2) / 2 = 2; [2]*4 + [9]*6: median 9.
    assert step([9] * 4) is None
    off = step([9, 9])
    assert off is not None and not off.engaged and off.reason == "recovered"
    assert (off.median, off.rows, off.held_seconds) == (9.0, 10, 100.0)
    # Engaged again at t=300; recovered at once, but the hold keeps it until t=305.
    now[0] = 300.0
    assert step([1] * 10) is not None
    now[0] = 304.9
    assert step([9] * 10) is None and guard.engaged(CLIENT, version)
    now[0] = 305.0
    again = guard.update(CLIENT, version, spec, 2.0, watch)
    assert again is not None and again.held_seconds == pytest.approx(5.0)
    # A version without a promise is never watched, so never guarded.
    assert guard.update(CLIENT, ("prompt-book", 1), spec, None, watch) is None


def test_a_changed_route_releases_its_guard_and_the_fallback_collapse_is_seen_once() -> None:
    guard = CollapseGuard(clock=lambda: 0.0)
    watch = CollapseWatch(window=4, min_steps=4)
    watch.observe("prompt-book", 4, [1] * 4, floor=2)
    spec = GuardSpec(fallback=("prompt-book", 3))
    assert guard.update(CLIENT, ("prompt-book", 4), spec, 2.0, watch) is not None
    assert guard.first_fallback_collapse(CLIENT, ("prompt-book", 4))
    assert not guard.first_fallback_collapse(CLIENT, ("prompt-book", 4))
    known = {("prompt-book", 3), ("prompt-book", 4)}
    arms = [{"policy": "prompt-book@3"}, {"policy": "prompt-book@4"}]
    guarded, _ = parse_routes(
        {"clients": {CLIENT: {"arms": arms, "guard": {"fallback": "prompt-book@3"}}}}, known
    )
    assert guard.forget_unrouted(guarded) == []  # still guarded by this route
    plain: dict[str, Route] = {CLIENT: Route(CLIENT, guarded[CLIENT].arms)}
    gone = guard.forget_unrouted(plain)
    assert [(c.version, c.engaged, c.reason) for c in gone] == [
        (("prompt-book", 4), False, "unrouted")
    ]
    assert not guard.engaged(CLIENT, ("prompt-book", 4))


def test_the_fallback_takes_the_adjustments_it_allows(registry: Path) -> None:
    snapshot = load_registry(registry)
    notes = snapshot.policy(("program-notes", 1))  # temperature adjustable in [0.3, 1.0]
    chain, clamped, ignored = fallback_chain(
        notes, snapshot.chain(("program-notes", 1)), {"temperature": 1.1, "min_p": 0.1}
    )
    assert clamped == ["temperature"] and ignored == ["min_p"]
    temperatures = [s.number for s in chain.stages if s.method == "temperature"]
    assert temperatures == [1.0]
    same, clamped, ignored = fallback_chain(notes, snapshot.chain(("program-notes", 1)), {})
    assert same == snapshot.chain(("program-notes", 1)) and clamped == ignored == []


def test_routes_refuse_bad_guards_one_client_at_a_time(registry: Path) -> None:
    cases = {
        "prompt-book-app": {"fallback": "prompt-book@9"},
        "usher-desk": {"fallback": "box-office@1", "hold_seconds": -1},
        "surtitle-booth": {"fallback": "surtitles@1", "recover_margin": True},
        "programme-desk": {"fallback": "program-notes@1", "hold": 3},
    }
    routes = yaml.safe_load((registry / "routes.yaml").read_text())
    for client, guard in cases.items():
        routes["clients"][client]["guard"] = guard
    routes["clients"]["box-office-too"] = {
        "arms": [{"policy": "box-office@1"}],
        "guard": {"fallback": "program-notes@1", "hold_seconds": 2.5},
    }
    (registry / "routes.yaml").write_text(yaml.safe_dump(routes))
    snapshot = load_registry(registry)
    lines = "\n".join(snapshot.problem_lines())
    assert "clients.prompt-book-app: guard.fallback: prompt-book@9 is not a loaded" in lines
    assert "clients.usher-desk: guard.hold_seconds: expected a number >= 0, got -1" in lines
    assert "clients.surtitle-booth: guard.recover_margin: expected a number >= 0, got True" in lines
    assert "clients.programme-desk: guard: expected {fallback: name@version" in lines
    assert set(snapshot.routes) == {"box-office-too"}
    assert snapshot.routes["box-office-too"].guard == GuardSpec(("program-notes", 1), 2.5, 0.0)


# -- in process, with an injected clock ------------------------------------------------------


def sample(name: str, **labels: str) -> float:
    return REGISTRY.get_sample_value(name, labels) or 0.0


@pytest.fixture
def guarded_client(registry: Path) -> Iterator[TestClient]:
    guarded_routes(registry, {"fallback": "prompt-book@3", "hold_seconds": 5, "recover_margin": 1})
    with in_process(registry, collapse_window=20, collapse_min_steps=10) as client:
        assert wait_ready(client) == 200
        yield client


def test_guard_in_process_engages_holds_and_releases(
    guarded_client: TestClient, registry: Path, caplog: pytest.LogCaptureFixture
) -> None:
    caplog.set_level(logging.INFO, logger="keepset")
    now = [1000.0]
    guarded_client.app.state.live.collapse_guard.clock = lambda: now[0]  # type: ignore[attr-defined]
    snapshot = load_registry(registry)
    key = CANDIDATE_KEYS[0]
    active = {"client": CLIENT, "policy": "prompt-book", "version": "4"}
    shadow = {"policy": "prompt-book", "version": "4", "role": "shadow"}

    def send(row: list[float], seed: int, **extra: Any) -> Any:
        body = {"logits": [row], "routing_key": key, "seed": seed, **extra}
        r = guarded_client.post("/v1/pick", json=body, headers=auth(CLIENT))
        assert r.status_code == 200, r.text
        return r.json()

    for seed in range(10):  # the watch decides at its 10th row: median 1 < 2
        body = send(COLLAPSING, seed)
        assert body["version"] == 4 and "guarded" not in body and body["rows"][0]["kept"] == 1
    assert sample("keepset_guard_active", **active) == 1
    engaged = [r for r in caplog.records if "collapse guard: engaged" in r.getMessage()]
    assert len(engaged) == 1 and engaged[0].levelno == logging.WARNING
    assert (
        "client=prompt-book-app policy=prompt-book version=4 fallback=prompt-book@3 "
        "reason=collapsed median_kept=1 kept_median_min=2 recover_at=3 rows=10"
    ) in engaged[0].getMessage()

    shadow_before = sample("keepset_kept_tokens_count", **shadow)
    p3 = snapshot.chain(("prompt-book", 3))
    for seed in range(10, 15):
        body = send(COLLAPSING, seed)
        assert (body["policy"], body["version"], body["arm"]) == ("prompt-book", 3, "candidate")
        assert body["guarded"] is True and body["guarded_from"] == "prompt-book@4"
        reference = pick(p3, np.array(COLLAPSING, dtype=np.float32), seed=seed)
        assert body["tokens"] == reference.tokens.tolist()
        assert body["rows"][0]["kept"] == int(reference.kept[0]) > 1
    # The guarded version is still evaluated on every guarded row, as a shadow.
    assert sample("keepset_kept_tokens_count", **shadow) == shadow_before + 5

    # The caller's adjustments were written for prompt-book@4: prompt-book@3 takes temperature
    # (in its range) and has no min_p stage; an adjustment @4 refuses is still refused.
    body = send(COLLAPSING, 15, adjust={"temperature": 1.1, "min_p": 0.1})
    assert body["guarded"] is True and body["adjust_ignored"] == ["min_p"]
    adjusted, _ = apply_adjust(snapshot.policy(("prompt-book", 3)), {"temperature": 1.1}, p3)
    reference = pick(adjusted, np.array(COLLAPSING, dtype=np.float32), seed=15)
    assert body["tokens"] == reference.tokens.tolist()
    refused = guarded_client.post(
        "/v1/pick",
        json={"logits": [COLLAPSING], "routing_key": key, "adjust": {"top_k": 5}},
        headers=auth(CLIENT),
    )
    assert_problem(refused, 422, "top_k is not adjustable in prompt-book@4")

    # Healthy rows: the watch on prompt-book@4 (fed by the guarded evaluations) recovers, but
    # the hold of 5 s has not passed on the injected clock.
    for seed in range(20, 40):
        assert send(HEALTHY, seed)["guarded"] is True
    collapse = {"policy": "prompt-book", "version": "4"}
    assert sample("keepset_collapse_active", **collapse) == 0
    assert sample("keepset_guard_active", **active) == 1
    now[0] += 5.0
    body = send(HEALTHY, 40)
    assert body["version"] == 4 and "guarded" not in body and "guarded_from" not in body
    reference = pick(snapshot.chain(("prompt-book", 4)), np.array(HEALTHY, np.float32), seed=40)
    assert body["tokens"] == reference.tokens.tolist()
    assert sample("keepset_guard_active", **active) == 0
    for to in ("engaged", "released"):
        assert sample("keepset_guard_transitions_total", **active, to=to) == 1
    released = [r for r in caplog.records if "collapse guard: released" in r.getMessage()]
    assert len(released) == 1 and released[0].levelno == logging.INFO
    assert "median_kept=200 kept_median_min=2 recover_at=3 rows=20" in released[0].getMessage()
    assert "held_seconds=5.000" in released[0].getMessage()
    guard = guarded_client.get("/v1/routes", headers=auth("stage-manager")).json()
    assert guard["clients"][CLIENT]["guard"] == {
        "fallback": "prompt-book@3",
        "hold_seconds": 5.0,
        "recover_margin": 1.0,
    }


# -- a real two-worker server under concurrent traffic --------------------------------------------


DURATION = "keepset_request_duration_seconds_count"


def metric_values(server_url: str, name: str, **labels: str) -> list[float]:
    text = httpx.get(f"{server_url}/metrics", timeout=10).text
    return [
        float(line.rsplit(" ", 1)[1])
        for line in text.splitlines()
        if line.startswith(name + "{") and all(f'{k}="{v}"' in line for k, v in labels.items())
    ]


def test_guard_switches_on_two_workers_without_losing_a_request(registry: Path) -> None:
    hold = 1.0
    guarded_routes(
        registry, {"fallback": "prompt-book@3", "hold_seconds": hold, "recover_margin": 1}
    )
    min_steps = 10
    server = start_server(
        registry,
        workers=2,
        KEEPSET_COLLAPSE_WINDOW="20",
        KEEPSET_COLLAPSE_MIN_STEPS=str(min_steps),
        KEEPSET_RELOAD_POLL_SECONDS="0",
    )
    snapshot = load_registry(registry)
    chains = {v: snapshot.chain(("prompt-book", v)) for v in (3, 4)}
    labels = {"client": CLIENT, "policy": "prompt-book", "version": "4"}
    url = f"{server.base_url}/v1/pick"

    def send(args: tuple[int, list[float]]) -> tuple[int, dict[str, Any]]:
        seed, row = args
        key = CANDIDATE_KEYS[seed % len(CANDIDATE_KEYS)]
        body = {"logits": [row], "routing_key": key, "seed": seed}
        # A new connection per request, so both workers take a share.
        r = httpx.post(url, json=body, headers=auth(CLIENT), timeout=30)
        assert r.status_code == 200, r.text
        return seed, r.json()

    def burst(first: int, count: int, row: list[float]) -> list[tuple[int, dict[str, Any]]]:
        with ThreadPoolExecutor(8) as pool:
            answers = list(pool.map(send, [(s, row) for s in range(first, first + count)]))
        assert len(answers) == count  # none lost
        for seed, body in answers:
            version = body["version"]
            assert body["arm"] == "candidate" and body["policy"] == "prompt-book"
            if body.get("guarded"):
                assert version == 3 and body["guarded_from"] == "prompt-book@4"
            else:
                assert version == 4 and "guarded_from" not in body
            reference = pick(chains[version], np.array(row, dtype=np.float32), seed=seed)
            assert body["tokens"] == reference.tokens.tolist(), (seed, version)
        return answers

    def transitions(to: str) -> float:
        return sum(
            metric_values(server.base_url, "keepset_guard_transitions_total", **labels, to=to)
        )

    try:
        answers: list[tuple[int, dict[str, Any]]] = []
        while transitions("engaged") < 2:
            assert len(answers) < 800, "the guard did not engage on both workers"
            answers += burst(len(answers), 80, COLLAPSING)
        unguarded = [b for _, b in answers if not b.get("guarded")]
        # Each worker serves exactly min_steps collapsed rows before its watch fires; every
        # later request on it is guarded.
        assert len(unguarded) == 2 * min_steps
        assert all(b["rows"][0]["kept"] == 1 for b in unguarded)
        assert max(metric_values(server.base_url, "keepset_guard_active", **labels)) == 1
        rows_fallback = metric_values(
            server.base_url, "keepset_rows_total", **{**labels, "version": "3"}, arm="candidate"
        )
        assert sum(rows_fallback) == len(answers) - 2 * min_steps

        # Healthy traffic: the guarded evaluations refill the window, the hold passes, and
        # both workers hand the route back to prompt-book@4.
        started = time.monotonic()
        first = 10_000
        while transitions("released") < 2:
            assert time.monotonic() - started < 60, "the guard was not released on both workers"
            burst(first, 40, HEALTHY)
            first += 40
        after = burst(first, 40, HEALTHY)
        assert all(b["version"] == 4 and "guarded" not in b for _, b in after)
        assert max(metric_values(server.base_url, "keepset_guard_active", **labels)) == 0
        assert transitions("engaged") == 2
        # Every request is counted by status once its answer (and after-answer work) is done:
        # all of them, and none with a 5xx.
        sent = len(answers) + first - 10_000 + 40
        deadline = time.monotonic() + 10
        while sum(answered := metric_values(server.base_url, DURATION, endpoint="/v1/pick")) < sent:
            assert time.monotonic() < deadline, (sum(answered), sent)
            time.sleep(0.1)
        assert sum(answered) == sent
        assert (
            sum(metric_values(server.base_url, DURATION, endpoint="/v1/pick", code="200")) == sent
        )
        engaged_lines = [
            line for line in server.log_text().splitlines() if "collapse guard: engaged" in line
        ]
        assert len(engaged_lines) == 2, server.log_text()
    finally:
        stop_server(server)


# -- the prompt path -------------------------------------------------------------------------------


def test_guard_on_the_prompt_path(registry: Path) -> None:
    """A greedy version keeps one token at every step (below its promise of 2); the guard
    continues the prompt with prompt-book@3, exactly as a run of that chain with the same seed."""
    greedy = yaml.safe_load((registry / "prompt-book" / "3.yaml").read_text())
    greedy.update(
        version=6,
        summary="Greedy drafts, to watch the collapse guard at work.",
        chain=[{"greedy": True}],
        adjustable={},
        stop=[],
    )
    publish(registry, greedy)
    guarded_routes(
        registry,
        {"fallback": "prompt-book@3", "hold_seconds": 0},
        arms=[{"policy": "prompt-book@6", "weight": 100, "label": "candidate"}],
    )
    prompt = "Enter the ghost of the prompter, with a lantern."
    shadow = {"policy": "prompt-book", "version": "6", "role": "shadow"}
    with in_process(registry, collapse_window=8, collapse_min_steps=4) as client:
        assert wait_ready(client) == 200

        def go(**extra: Any) -> Any:
            body = {"prompt": prompt, "budget": 6, "seed": 21, **extra}
            return client.post("/v1/continue", json=body, headers=auth(CLIENT))

        first = go().json()
        assert first["version"] == 6 and "guarded" not in first
        assert [s["kept"] for s in first["steps"]] == [1] * len(first["steps"])
        assert len(first["steps"]) >= 4  # enough for the watch to decide
        before = sample("keepset_kept_tokens_count", **shadow)
        second = go().json()
        assert (second["version"], second["guarded"], second["guarded_from"]) == (
            3,
            True,
            "prompt-book@6",
        )
        policy3 = load_registry(registry)
        run = PromptRun(
            Model(BUNDLED, threads=1),
            policy3.chain(("prompt-book", 3)),
            prompt,
            budget=6,
            seed=21,
            stop=policy3.policy(("prompt-book", 3)).stop,
        )
        steps = list(run)
        assert second["tokens"] == [s.token for s in steps] and second["text"] == run.text
        # The greedy version was evaluated on each generated step's logits after the answer.
        assert sample("keepset_kept_tokens_count", **shadow) == before + len(steps)

        events: list[tuple[str, Any]] = []
        with client.stream(
            "POST",
            "/v1/continue",
            json={"prompt": prompt, "budget": 6, "seed": 21, "stream": True},
            headers=auth(CLIENT),
        ) as r:
            assert r.status_code == 200
            for block in r.read().decode().split("\n\n"):
                if block.strip():
                    fields = dict(line.split(": ", 1) for line in block.splitlines())
                    events.append((fields["event"], json.loads(fields["data"])))
        start, done = events[0][1], events[-1][1]
        for event in (start, done):
            assert (event["version"], event["guarded"], event["guarded_from"]) == (
                3,
                True,
                "prompt-book@6",
            )
        assert done["tokens"] == second["tokens"]


def test_a_collapsed_fallback_keeps_serving_and_is_counted(
    registry: Path, caplog: pytest.LogCaptureFixture
) -> None:
    """One logit of 5: prompt-book@4 keeps one token (exp(-5/0.9) = 0.004 < 0.05, min-p) and so
    does program-notes@1 (temperature 0.7, top_k 40, then top_p 0.9: of the 40 survivors the top
    token alone has mass 1 / (1 + 39 exp(-5/0.7)) = 0.97 >= 0.9, Holtzman et al. 2020), whose
    promise is 2 as well."""
    caplog.set_level(logging.INFO, logger="keepset")
    guarded_routes(
        registry,
        {"fallback": "program-notes@1", "hold_seconds": 0},
        arms=[{"policy": "prompt-book@4", "weight": 100, "label": "candidate"}],
    )
    row = [5.0] + [0.0] * 999
    counted = {"client": CLIENT, "policy": "program-notes", "version": "1"}
    with in_process(registry, collapse_window=10, collapse_min_steps=10) as client:
        before = sample("keepset_guard_fallback_collapsed_total", **counted)
        answers = [
            client.post("/v1/pick", json={"logits": [row]}, headers=auth(CLIENT)).json()
            for _ in range(25)
        ]
    # 10 rows collapse prompt-book@4; the next 10 go to program-notes@1 and collapse it; the
    # last 5 are still answered by it, each counted.
    assert [a["version"] for a in answers] == [4] * 10 + [1] * 15
    assert all(a["guarded_from"] == "prompt-book@4" for a in answers[10:])
    assert all(a["rows"][0]["kept"] == 1 for a in answers)
    assert sample("keepset_guard_fallback_collapsed_total", **counted) == before + 5
    warned = [r for r in caplog.records if "fallback collapsed too" in r.getMessage()]
    assert len(warned) == 1 and "fallback=program-notes@1" in warned[0].getMessage()


def test_rows_the_fallback_cannot_take_are_served_unguarded(registry: Path) -> None:
    """A fallback that bans token 1500 cannot pick on a vocabulary of 1000 (DESIGN.md: a 422
    for the request); the guard leaves those rows to the routed version instead."""
    notes = yaml.safe_load((registry / "program-notes" / "1.yaml").read_text())
    notes.update(version=2, chain=[*notes["chain"], {"ban": [1500]}])
    publish(registry, notes)
    guarded_routes(
        registry,
        {"fallback": "program-notes@2", "hold_seconds": 0},
        arms=[{"policy": "prompt-book@4", "weight": 100, "label": "candidate"}],
    )
    with in_process(registry, collapse_window=4, collapse_min_steps=4) as client:

        def send(vocab: int) -> Any:
            body = {"logits": [[3.0] + [0.0] * (vocab - 1)], "seed": 1}
            r = client.post("/v1/pick", json=body, headers=auth(CLIENT))
            assert r.status_code == 200, r.text
            return r.json()

        assert [send(1000)["version"] for _ in range(4)] == [4] * 4  # now collapsed
        narrow, wide = send(1000), send(2000)
    assert narrow["version"] == 4 and "guarded" not in narrow
    assert (wide["policy"], wide["version"], wide["guarded"]) == ("program-notes", 2, True)

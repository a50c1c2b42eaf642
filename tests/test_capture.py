"""Capture of served rows: every row of picks (JSON, .npy and shared-memory bodies) and every step
of continuations on a real ``keepset serve``, checked column by column against the answers and
replayed through the sampler to the same tokens; the sampling rate against the binomial
distribution; the per-client disk bound; restarts; a full queue and a failing disk; the
routes.yaml rule and the setting."""

from __future__ import annotations

import json
import logging
import os
import re
import time
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import httpx
import numpy as np
import numpy.typing as npt
import pytest
import yaml
from conftest import Server, auth, in_process, start_server, stop_server
from prometheus_client import REGISTRY
from scipy.stats import binom

from service.app import create_app
from service.capture import Capture, Origin
from service.model import Model
from service.model.runner import BUNDLED
from service.npy import to_npy
from service.registry import load_registry
from service.routing import CaptureRule
from service.sampling import pick
from service.settings import Settings
from service.shards import SOURCE_CONTINUE, SOURCE_PICK, SUFFIX, read_shard, shard_files

V = 300
EVERY_ROW = {"rate": 1.0, "max_mb": 50}


def with_capture(registry: Path, rules: dict[str, dict[str, Any]]) -> None:
    """Add capture rules to clients of the registry copy's routes.yaml."""
    path = registry / "routes.yaml"
    data = yaml.safe_load(path.read_text())
    for client, rule in rules.items():
        data["clients"][client]["capture"] = rule
    path.write_text(yaml.safe_dump(data))


def half_exact(shape: tuple[int, ...], seed: int) -> npt.NDArray[np.float32]:
    """float32 logits that float16 holds exactly, so that a captured row is the served row."""
    rng = np.random.default_rng(seed)
    return (rng.standard_normal(shape) * 3).astype(np.float16).astype(np.float32)


@dataclass
class Row:
    """One captured row, flattened from its shard."""

    file: Path
    client: str
    logits: npt.NDArray[np.float16]
    history: list[int]
    seed: int
    stream: int
    source: int
    request_id: str
    policy: str
    arm: str
    version: int
    token: int
    kept: int
    entropy: float
    kept_mass: float
    prob: float
    logprob: float
    fallback: str
    time: float


def captured(folder: Path) -> list[Row]:
    """Every row of every shard under ``folder``; read_shard checks each file whole."""
    rows = []
    for path in shard_files(folder):
        shard = read_shard(path)
        assert shard.client == path.parent.name
        for i in range(shard.rows):
            rows.append(
                Row(
                    file=path,
                    client=shard.client,
                    logits=shard.logits[i],
                    history=shard.history_of(i),
                    seed=int(shard.seed[i]),
                    stream=int(shard.stream[i]),
                    source=int(shard.source[i]),
                    request_id=str(shard.request_id[i]),
                    policy=str(shard.policy[i]),
                    arm=str(shard.arm[i]),
                    version=int(shard.version[i]),
                    token=int(shard.token[i]),
                    kept=int(shard.kept[i]),
                    entropy=float(shard.entropy[i]),
                    kept_mass=float(shard.kept_mass[i]),
                    prob=float(shard.prob[i]),
                    logprob=float(shard.logprob[i]),
                    fallback=str(shard.fallback[i]),
                    time=float(shard.time[i]),
                )
            )
    return rows


def leftovers(folder: Path) -> list[Path]:
    """Anything under ``folder`` that is not a finished shard (temporary files, strays)."""
    return [
        p
        for p in folder.rglob("*")
        if p.is_file() and (p.name.startswith(".") or not p.name.endswith(SUFFIX))
    ]


def metric(server: Server, name: str, **labels: str) -> float:
    """The sum of a metric's samples whose labels include ``labels``."""
    text = httpx.get(f"{server.base_url}/metrics", timeout=5).text
    total = 0.0
    for line in text.splitlines():
        if line.startswith(name + "{") and all(f'{k}="{v}"' in line for k, v in labels.items()):
            total += float(line.rsplit(" ", 1)[1])
    return total


@pytest.fixture
def capture_dir(tmp_path: Path) -> Path:
    folder = tmp_path / "capture"
    folder.mkdir()
    return folder


def json_pick(server: Server, client: str, **body: Any) -> dict[str, Any]:
    r = httpx.post(f"{server.base_url}/v1/pick", json=body, headers=auth(client), timeout=30)
    assert r.status_code == 200, r.text
    answer: dict[str, Any] = r.json()
    return answer


def npy_pick(
    server: Server, client: str, logits: np.ndarray, params: dict[str, Any]
) -> dict[str, Any]:
    headers = {**auth(client), "Content-Type": "application/x-npy"}
    r = httpx.post(
        f"{server.base_url}/v1/pick", content=to_npy(logits), params=params, headers=headers
    )
    assert r.status_code == 200, r.text
    answer: dict[str, Any] = r.json()
    return answer


# -- every row, column by column, replayed ---------------------------------------------------


@dataclass
class Sent:
    client: str
    logits: npt.NDArray[np.float32]
    history: list[list[int]]
    answer: dict[str, Any]


def send_picks(server: Server, shm_dir: Path) -> list[Sent]:
    """Picks of every body kind: JSON (both arms of prompt-book-app, rows that fall back), .npy
    (usher-desk) and shared memory, from several threads so that both workers serve some."""
    rng = np.random.default_rng(11)

    def json_one(i: int) -> Sent:
        logits = half_exact((3, V), 100 + i)
        if i % 5 == 0:
            logits[1, 7] = np.nan  # the row falls back (non_finite): its reason is captured
        history = [rng.integers(0, V, size=int(n)).tolist() for n in (0, 4, 9)]
        body = [[None if np.isnan(x) else float(x) for x in row] for row in logits]
        answer = json_pick(
            server,
            "prompt-book-app",
            logits=body,
            history=history,
            seed=1000 + i,
            routing_key=f"scene-{i}",
        )
        return Sent("prompt-book-app", logits, history, answer)

    def npy_one(i: int) -> Sent:
        logits = half_exact((2, V), 200 + i)
        history = [[3, 1, 4], [1, 5]]
        params = {"seed": 2000 + i, "history": "3,1,4;1,5"}
        return Sent("usher-desk", logits, history, npy_pick(server, "usher-desk", logits, params))

    with ThreadPoolExecutor(8) as pool:
        sent = list(pool.map(json_one, range(40))) + list(pool.map(npy_one, range(16)))

    # Shared memory: the caller rewrites its segment as soon as the answer is in; the capture
    # must hold the rows as they were served.
    logits = half_exact((2, V), 300)
    segment = shm_dir / "scene-cue"
    segment.write_bytes(logits.tobytes())
    answer = json_pick(
        server, "usher-desk", logits_shm={"segment": "scene-cue", "shape": [2, V]}, seed=77
    )
    segment.write_bytes(np.zeros_like(logits).tobytes())
    return [*sent, Sent("usher-desk", logits, [[], []], answer)]


ACT = "ACT I. SCENE 1. A street in the town.\n\nFirst Watchman."


def send_continuations(server: Server) -> list[tuple[str, dict[str, Any]]]:
    """Plain and streamed continuations, one of them ended early by the stop text."""
    url = f"{server.base_url}/v1/continue"
    answers = []
    for prompt, seed, stream in ((ACT, 5, False), (ACT, 6, True), ("Thou art", 7, False)):
        body = {"prompt": prompt, "seed": seed, "budget": 16, "routing_key": "act-1"}
        if stream:
            with httpx.stream(
                "POST", url, json={**body, "stream": True}, headers=auth("prompt-book-app")
            ) as r:
                assert r.status_code == 200
                done = [line for line in r.iter_lines() if line.startswith("data: ")][-1]
            answers.append((prompt, json.loads(done.removeprefix("data: "))))
        else:
            r = httpx.post(url, json=body, headers=auth("prompt-book-app"), timeout=60)
            assert r.status_code == 200, r.text
            answers.append((prompt, r.json()))
    return answers


def test_rate_one_captures_every_served_row_and_replays_it(
    registry: Path, capture_dir: Path, tmp_path: Path
) -> None:
    with_capture(registry, {"prompt-book-app": EVERY_ROW, "usher-desk": EVERY_ROW})
    shm_dir = tmp_path / "segments"
    shm_dir.mkdir()
    server = start_server(
        registry,
        workers=2,
        KEEPSET_CAPTURE_DIR=str(capture_dir),
        KEEPSET_SHM_DIR=str(shm_dir),
        KEEPSET_RELOAD_POLL_SECONDS="0",
    )
    try:
        started = time.time()
        picks = send_picks(server, shm_dir)
        continuations = send_continuations(server)
        # A client without a capture rule: nothing of it is captured.
        json_pick(server, "surtitle-booth", logits=half_exact((2, V), 9).tolist())
        ended = time.time()
    finally:
        stop_server(server)  # the workers write what they hold on the way out

    assert leftovers(capture_dir) == []
    assert sorted(p.name for p in capture_dir.iterdir()) == ["prompt-book-app", "usher-desk"]
    rows = captured(capture_dir)
    by_key = {(r.request_id, r.stream): r for r in rows}
    assert len(by_key) == len(rows)  # no row captured twice
    # Shard names sort by time: <UTC yyyymmddThhmmss>-<pid>-<seq>; both workers wrote some.
    names = [re.fullmatch(r"(\d{8}T\d{6})-(\d+)-(\d{6})\.npz", r.file.name) for r in rows]
    assert all(names)
    assert len({m[2] for m in names if m}) == 2

    snapshot = load_registry(registry)
    pick_rows = [r for r in rows if r.source == SOURCE_PICK]
    assert len(pick_rows) == sum(s.logits.shape[0] for s in picks)  # shadows add none
    fallbacks = 0
    for s in picks:
        answer = s.answer
        for b, served in enumerate(answer["rows"]):
            row = by_key[(answer["request_id"], b)]
            assert row.client == s.client == answer["client"]
            assert np.array_equal(row.logits.astype(np.float32), s.logits[b], equal_nan=True)
            assert row.history == s.history[b]
            assert row.seed == answer["seed"]
            assert (row.policy, row.version, row.arm) == (
                answer["policy"],
                answer["version"],
                answer["arm"],
            )
            assert (row.token, row.kept, row.fallback) == (
                served["token"],
                served["kept"],
                served["fallback"] or "",
            )
            for name in ("prob", "logprob", "entropy", "kept_mass"):
                assert getattr(row, name) == served[name], name
            assert started <= row.time <= ended
            fallbacks += row.fallback == "non_finite"
            # The replay a policy preview does: the shard's row, seed, history and stream
            # through the served version give the served token, bit for bit.
            chain = snapshot.chain((row.policy, row.version))
            again = pick(chain, row.logits, row.seed, [row.history], first_stream=row.stream)
            assert int(again.tokens[0]) == row.token
    assert fallbacks == 8
    assert {r.arm for r in pick_rows if r.client == "prompt-book-app"} == {"control", "candidate"}
    check_continuations(rows, continuations, snapshot)


def check_continuations(
    rows: list[Row], answers: list[tuple[str, dict[str, Any]]], snapshot: Any
) -> None:
    """Every step of both continuations, in order. The steps' float32 logits are recomputed
    here with the same model, fed the served tokens: the captured rows are exactly their float16
    copies, and the captured seed, stream and history replay each served token bit for bit."""
    model = Model(BUNDLED)
    assert {a["finish"] for _, a in answers} == {"budget", "stop"}
    for prompt, answer in answers:
        steps = sorted(
            (r for r in rows if r.request_id == answer["request_id"]), key=lambda r: r.stream
        )
        tokens = answer["tokens"]
        assert len(steps) == len(tokens) > 1
        assert [r.stream for r in steps] == list(range(len(tokens)))
        assert [r.token for r in steps] == tokens
        assert all(r.source == SOURCE_CONTINUE and r.seed == answer["seed"] for r in steps)
        served = (answer["policy"], answer["version"], answer["arm"])
        assert all((r.policy, r.version, r.arm) == served for r in steps)
        for r, earlier in zip(steps[1:], steps, strict=False):
            assert r.history == [*earlier.history, earlier.token]

        recomputed = teacher_forced(model, prompt, tokens)
        chain = snapshot.chain((answer["policy"], answer["version"]))
        for r, (row, history) in zip(steps, recomputed, strict=True):
            assert np.array_equal(r.logits, row.astype(np.float16))
            assert r.history == history
            again = pick(chain, row, r.seed, [r.history], first_stream=r.stream)
            assert int(again.tokens[0]) == r.token
            assert again.kept[0] == r.kept and again.prob[0] == pytest.approx(r.prob)


def teacher_forced(
    model: Model, prompt: str, tokens: list[int]
) -> list[tuple[npt.NDArray[np.float32], list[int]]]:
    """The model's float32 logits and the history (without the start marker, as the penalties
    see it) at each step of ``prompt`` continued with ``tokens``."""
    skip = 0 if model.info.start_id is None else 1
    steps: list[tuple[npt.NDArray[np.float32], list[int]]] = []

    def feed(row: npt.NDArray[np.float32], history: list[int]) -> int:
        steps.append((row, history[skip:]))
        return tokens[len(steps) - 1]

    list(model.generate(prompt, len(tokens), feed, end_id=None))
    return steps


# -- sampling rate, disk bound, restarts ------------------------------------------------------


def test_rate_samples_rows_binomially_and_continuations_whole(
    registry: Path, capture_dir: Path
) -> None:
    """Each pick row is kept with probability ``rate``, independently: the count of N rows is
    Binomial(N, rate) (the definition of a Bernoulli sample), so it falls inside the central
    1 - 1e-6 interval of scipy.stats.binom except once in a million runs. A continuation is
    captured with all its steps or not at all."""
    rate = 0.3
    with_capture(registry, {"usher-desk": {"rate": rate, "max_mb": 50}})
    server = start_server(
        registry, workers=2, KEEPSET_CAPTURE_DIR=str(capture_dir), KEEPSET_MAX_ROWS="50"
    )
    requests, per_request = 40, 50
    try:
        for i in range(requests):
            npy_pick(server, "usher-desk", half_exact((per_request, 16), i), {"seed": i})
        answers = []
        for seed in range(30):
            body = {"prompt": "Row C, seat 12.", "seed": seed, "budget": 3}
            r = httpx.post(
                f"{server.base_url}/v1/continue", json=body, headers=auth("usher-desk"), timeout=60
            )
            assert r.status_code == 200, r.text
            answers.append(r.json())
    finally:
        stop_server(server)
    rows = captured(capture_dir)
    picked = sum(r.source == SOURCE_PICK for r in rows)
    low, high = binom.interval(1 - 1e-6, requests * per_request, rate)
    assert low <= picked <= high, picked
    low, high = binom.interval(1 - 1e-6, len(answers), rate)
    whole = 0
    for answer in answers:
        steps = [r for r in rows if r.request_id == answer["request_id"]]
        assert len(steps) in (0, len(answer["tokens"]))
        whole += bool(steps)
    assert low <= whole <= high


def test_max_mb_bounds_each_client_folder(registry: Path, capture_dir: Path) -> None:
    max_mb = 0.2
    with_capture(registry, {"programme-desk": {"rate": 1.0, "max_mb": max_mb}})
    server = start_server(registry, workers=2, KEEPSET_CAPTURE_DIR=str(capture_dir))
    sent = 0
    try:
        with ThreadPoolExecutor(4) as pool:
            answers = list(
                pool.map(
                    lambda i: json_pick(
                        server,
                        "programme-desk",
                        logits=half_exact((16, 1000), i).tolist(),
                        seed=i,
                    ),
                    range(60),
                )
            )
        sent = sum(len(a["rows"]) for a in answers)
        # Shards are written as they fill (a few rows each under this bound) and the oldest go.
        assert metric(server, "keepset_capture_pruned_shards_total", client="programme-desk") > 0
        assert metric(server, "keepset_capture_rows_total", client="programme-desk") > 0
        on_disk = metric(server, "keepset_capture_bytes", client="programme-desk")
        assert 0 < on_disk <= max_mb * 1e6
    finally:
        stop_server(server)
    folder = capture_dir / "programme-desk"
    sizes = [p.stat().st_size for p in shard_files(folder)]
    assert sizes and all(size <= max_mb * 1e6 for size in sizes)
    assert sum(sizes) <= max_mb * 1e6
    rows = captured(capture_dir)
    assert 0 < len(rows) < sent
    # What is left is the newest: the most recent requests' rows.
    assert max(r.seed for r in rows) >= 50


def test_a_restart_keeps_old_shards_and_clears_crash_leftovers(
    registry: Path, capture_dir: Path
) -> None:
    with_capture(registry, {"usher-desk": EVERY_ROW})
    env = {"KEEPSET_CAPTURE_DIR": str(capture_dir)}

    def serve_some(first_seed: int) -> Server:
        server = start_server(registry, workers=1, **env)
        for seed in range(first_seed, first_seed + 3):
            json_pick(server, "usher-desk", logits=half_exact((2, V), seed).tolist(), seed=seed)
        return server

    stop_server(serve_some(0))
    folder = capture_dir / "usher-desk"
    before = {p: p.read_bytes() for p in shard_files(folder)}
    assert before
    # A crash mid-write leaves a temporary file; a younger one may be another worker's write.
    stale = folder / f".20200101T000000-1-000001{SUFFIX}.1.tmp"
    fresh = folder / f".20200101T000000-2-000001{SUFFIX}.2.tmp"
    stale.write_bytes(b"half a shard")
    fresh.write_bytes(b"being written")
    os.utime(stale, (time.time() - 120, time.time() - 120))

    server = serve_some(10)
    try:
        # The survivors count towards the client's bytes from the start.
        deadline = time.monotonic() + 10
        while metric(server, "keepset_capture_bytes", client="usher-desk") == 0:
            assert time.monotonic() < deadline
            time.sleep(0.1)
        assert metric(server, "keepset_capture_bytes", client="usher-desk") >= sum(
            len(b) for b in before.values()
        )
    finally:
        stop_server(server)
    assert not stale.exists() and fresh.exists()
    for path, data in before.items():
        assert path.read_bytes() == data
    seeds = sorted(r.seed for r in captured(capture_dir))
    assert seeds == sorted([0, 0, 1, 1, 2, 2, 10, 10, 11, 11, 12, 12])


# -- the queue and the disk, unit by unit ------------------------------------------------------


def dropped(client: str, reason: str) -> float:
    value = REGISTRY.get_sample_value(
        "keepset_capture_dropped_rows_total", {"client": client, "reason": reason}
    )
    return value or 0.0


def offer_rows(capture: Capture, client: str, seed: int, rows: int = 4) -> None:
    chain = load_registry(ROOT_POLICIES).chain(("box-office", 1))
    logits = half_exact((rows, 64), seed)
    out = pick(chain, logits, seed)
    origin = Origin(client, f"req-{seed}", "box-office", 1, "0", seed)
    capture.offer_pick(CaptureRule(1.0, 10), origin, logits, None, out)


ROOT_POLICIES = Path(__file__).resolve().parents[1] / "policies"


def test_a_full_queue_drops_and_counts_instead_of_blocking(tmp_path: Path) -> None:
    capture = Capture(tmp_path, queue_batches=2)  # its writer is not running yet
    before = dropped("queue-test", "queue_full")
    started = time.monotonic()
    for seed in range(6):
        offer_rows(capture, "queue-test", seed)
    assert time.monotonic() - started < 2.0  # a blocking put would never have returned
    assert dropped("queue-test", "queue_full") - before == 4 * 4
    capture.start()
    capture.close()
    rows = captured(tmp_path)
    assert sorted({r.request_id for r in rows}) == ["req-0", "req-1"] and len(rows) == 8

    # The queue's byte bound: a batch larger than it is dropped as well.
    small = Capture(tmp_path, queue_bytes=4 * 64 * 2 - 1)
    offer_rows(small, "queue-bytes", 9)
    assert dropped("queue-bytes", "queue_full") == 4


def test_write_errors_are_counted_logged_once_and_never_raised(
    tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    (tmp_path / "disk-test").write_text("a file where the client's folder should be")
    capture = Capture(tmp_path, shard_rows=1)  # one write per row: four failures
    capture.start()
    with caplog.at_level(logging.ERROR, logger="keepset"):
        offer_rows(capture, "disk-test", 1)
        capture.close()
    assert dropped("disk-test", "write_error") == 4
    errors = [r for r in caplog.records if "cannot write a shard" in r.getMessage()]
    assert len(errors) == 1


def test_a_shard_never_exceeds_a_tiny_bound(tmp_path: Path) -> None:
    """Rows split over several shards below max_mb; a row that alone exceeds it is dropped."""
    capture = Capture(tmp_path)
    capture.start()
    chain = load_registry(ROOT_POLICIES).chain(("box-office", 1))
    logits = half_exact((40, 2000), 3)
    out = pick(chain, logits, 3)
    rule = CaptureRule(1.0, 0.06)  # 60 kB: a dozen rows of 4 kB each per shard
    capture.offer_pick(rule, Origin("tiny", "r", "box-office", 1, "0", 3), logits, None, out)
    wide = half_exact((1, 40_000), 4)  # 80 kB of float16 in one row
    wide_out = pick(chain, wide, 4)
    capture.offer_pick(rule, Origin("tiny", "w", "box-office", 1, "0", 4), wide, None, wide_out)
    capture.close()
    # 40 rows were written, in shards of at most 60 kB; the folder keeps the newest that fit.
    assert REGISTRY.get_sample_value("keepset_capture_rows_total", {"client": "tiny"}) == 40
    pruned = REGISTRY.get_sample_value("keepset_capture_pruned_shards_total", {"client": "tiny"})
    sizes = [p.stat().st_size for p in shard_files(tmp_path / "tiny")]
    assert pruned is not None and pruned + len(sizes) >= 40 * 4000 / 60_000
    assert sizes and max(sizes) <= 60_000 and sum(sizes) <= 60_000
    assert dropped("tiny", "too_large") == 1


# -- configuration -----------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("rule", "needle"),
    [
        ({"rate": 0, "max_mb": 1}, "capture.rate: expected a number with 0 < rate <= 1, got 0"),
        ({"rate": 1.5, "max_mb": 1}, "capture.rate"),
        ({"rate": "often", "max_mb": 1}, "capture.rate"),
        ({"rate": True, "max_mb": 1}, "capture.rate"),
        ({"rate": 0.1, "max_mb": 0}, "capture.max_mb: expected a positive number"),
        ({"rate": 0.1, "max_mb": -3}, "capture.max_mb"),
        ({"rate": 0.1, "max_mb": float("inf")}, "capture.max_mb"),
        ({"rate": 0.1}, "capture: expected {rate: 0 < r <= 1, max_mb: n > 0}"),
        ({"rate": 0.1, "max_mb": 1, "folder": "/tmp"}, "both keys and no other"),
        (0.1, "capture: expected"),
    ],
)
def test_bad_capture_rules_are_refused(registry: Path, rule: Any, needle: str) -> None:
    with_capture(registry, {"usher-desk": rule})
    snapshot = load_registry(registry)
    lines = snapshot.problem_lines()
    assert len(lines) == 1 and "clients.usher-desk:" in lines[0] and needle in lines[0], lines
    assert "usher-desk" not in snapshot.routes and "surtitle-booth" in snapshot.routes


def test_a_good_rule_is_parsed(registry: Path) -> None:
    with_capture(registry, {"usher-desk": {"rate": 1, "max_mb": 2.5}})
    snapshot = load_registry(registry)
    assert snapshot.valid
    assert snapshot.routes["usher-desk"].capture == CaptureRule(1.0, 2.5)
    assert snapshot.routes["usher-desk"].capture.max_bytes == 2_500_000
    assert snapshot.routes["surtitle-booth"].capture is None


def test_without_a_capture_folder_nothing_is_written(registry: Path, tmp_path: Path) -> None:
    with_capture(registry, {"usher-desk": EVERY_ROW})
    server = start_server(registry, workers=1, KEEPSET_CAPTURE_DIR="")
    try:
        answer = json_pick(server, "usher-desk", logits=half_exact((2, V), 1).tolist())
        assert len(answer["tokens"]) == 2
    finally:
        stop_server(server)
    log = server.log_text()
    assert log.count("KEEPSET_CAPTURE_DIR is not set: capture is off") == 1, log
    assert [p for p in tmp_path.rglob("*") if p.suffix in (SUFFIX, ".tmp")] == []


def test_the_capture_folder_setting(registry: Path, tmp_path: Path) -> None:
    assert Settings(capture_dir="").capture_dir is None
    not_a_folder = tmp_path / "capture.txt"
    not_a_folder.write_text("")
    for path in (not_a_folder, tmp_path / "missing"):
        with pytest.raises(ValueError, match="KEEPSET_CAPTURE_DIR"):
            create_app(Settings(policies=registry, capture_dir=path))


def test_routes_show_the_capture_rule(registry: Path) -> None:
    routes = (registry / "routes.yaml").read_text()
    (registry / "routes.yaml").write_text(
        routes.replace(
            "arms: [{policy: box-office@1, weight: 100}]",
            "arms: [{policy: box-office@1, weight: 100}]\n    capture: {rate: 0.25, max_mb: 3}",
        )
    )
    with in_process(registry) as client:
        described = client.get("/v1/routes", headers=auth("stage-manager")).json()
    assert described["clients"]["usher-desk"]["capture"] == {"rate": 0.25, "max_mb": 3.0}
    assert "capture" not in described["clients"]["surtitle-booth"]

"""Benchmark of ``POST /v1/pick`` over loopback against the transport floor and in-process pick.

For V in {32 000, 128 256} and 1 and 2 workers it starts, on 127.0.0.1 only: a real
``keepset serve`` with the demo registry, and a bare uvicorn app that only reads the same body
(loadtest/floor_app.py). It reports p50/p99 latency of sequential requests on one keep-alive
connection (.npy body and JSON body), the in-process ``pick`` time for the same logits, and
throughput with several client processes. Every loop is bounded in count and time.

    .venv/bin/python loadtest/bench_http.py [--quick] [--out loadtest/results/http.json]
"""

from __future__ import annotations

import argparse
import http.client
import io
import json
import multiprocessing
import os
import socket
import subprocess
import sys
import time
from collections.abc import Awaitable, Callable
from pathlib import Path
from typing import Any

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
KEY = "demo-usher-desk-key"  # the demo client routed to box-office@1


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


class UnixConnection(http.client.HTTPConnection):
    """http.client over a Unix domain socket."""

    def __init__(self, path: Path, timeout: float = 10):
        super().__init__("localhost", timeout=timeout)
        self.path = path

    def connect(self) -> None:
        self.sock = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
        self.sock.settimeout(self.timeout)
        self.sock.connect(str(self.path))


def wait_ready(
    port: int, path: str, process: subprocess.Popen[bytes], uds: Path | None = None
) -> None:
    # A first start compiles the sampling kernel (about 40 s) before /readyz says ready.
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline:
        if process.poll() is not None:
            raise RuntimeError("server exited")
        try:
            conn = (
                UnixConnection(uds, timeout=1)
                if uds is not None
                else http.client.HTTPConnection("127.0.0.1", port, timeout=1)
            )
            conn.request("GET", path)
            if conn.getresponse().status in (200, 404):
                return
        except OSError:
            time.sleep(0.2)
    raise RuntimeError("server not ready")


def start_keepset(workers: int, **settings: str) -> tuple[subprocess.Popen[bytes], int]:
    """A ``keepset serve`` on a free loopback port; ``settings`` are extra KEEPSET_* values."""
    port = free_port()
    env = {
        **os.environ,
        "KEEPSET_PORT": str(port),
        "KEEPSET_WORKERS": str(workers),
        "KEEPSET_LOG_LEVEL": "warning",
        "KEEPSET_MAX_IN_FLIGHT": "1000",
        **settings,
    }
    proc = subprocess.Popen(
        [sys.executable, "-m", "service.cli", "serve"],
        env=env,
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
    )
    try:
        wait_ready(port, "/readyz", proc)
    except BaseException:  # never leave a server behind
        stop(proc)
        raise
    return proc, port


def start_floor(
    workers: int, uds: Path | None = None, shm_dir: Path | None = None
) -> tuple[subprocess.Popen[bytes], int]:
    """The floor app on a free loopback port, or on the Unix socket ``uds``; ``shm_dir`` is the
    folder it maps segments from."""
    port = free_port()
    where = ["--uds", str(uds)] if uds is not None else ["--host", "127.0.0.1", "--port", str(port)]
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    if shm_dir is not None:
        env["KEEPSET_SHM_DIR"] = str(shm_dir)
    proc = subprocess.Popen(
        [
            sys.executable,
            "-m",
            "uvicorn",
            "floor_app:app",
            "--app-dir",
            str(ROOT / "loadtest"),
            *where,
            "--workers",
            str(workers),
            "--loop",
            "uvloop",
            "--http",
            "httptools",
            "--log-level",
            "warning",
        ],
        env=env,
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
    )
    wait_ready(port, "/", proc, uds)
    return proc, port


def stop(proc: subprocess.Popen[bytes]) -> None:
    proc.terminate()
    try:
        proc.wait(timeout=15)
    except subprocess.TimeoutExpired:
        proc.kill()


def request_once(conn: http.client.HTTPConnection, path: str, body: bytes, media: str) -> None:
    conn.request(
        "POST", path, body=body, headers={"Authorization": f"Bearer {KEY}", "Content-Type": media}
    )
    response = conn.getresponse()
    response.read()
    if response.status != 200:
        raise RuntimeError(f"status {response.status}")


def latency(
    port: int, path: str, body: bytes, media: str, count: int, seconds: float
) -> dict[str, float]:
    conn = http.client.HTTPConnection("127.0.0.1", port, timeout=10)
    for _ in range(20):
        request_once(conn, path, body, media)
    times = []
    start = time.monotonic()
    while len(times) < count and time.monotonic() - start < seconds:
        t0 = time.perf_counter()
        request_once(conn, path, body, media)
        times.append(time.perf_counter() - t0)
    conn.close()
    arr = np.array(times) * 1e3
    return {
        "p50_ms": float(np.percentile(arr, 50)),
        "p99_ms": float(np.percentile(arr, 99)),
        "n": len(times),
    }


def _load_worker(args: tuple[int, str, bytes, str, float]) -> int:
    port, path, body, media, seconds = args
    conn = http.client.HTTPConnection("127.0.0.1", port, timeout=10)
    done = 0
    end = time.monotonic() + seconds
    while time.monotonic() < end and done < 100_000:
        request_once(conn, path, body, media)
        done += 1
    return done


def throughput(
    port: int, path: str, body: bytes, media: str, clients: int, seconds: float
) -> float:
    with multiprocessing.get_context("spawn").Pool(clients) as pool:
        counts = pool.map(_load_worker, [(port, path, body, media, seconds)] * clients)
    return sum(counts) / seconds


def npy_bytes(array: np.ndarray) -> bytes:
    buffer = io.BytesIO()
    np.save(buffer, array)
    return buffer.getvalue()


# Untimed work before every timing. After an idle spell, or work that keeps one core busy and
# the other idle, this VM's CPUs need 10-50 ms of work to come back to full speed: after 30 ms
# asleep, a 32-row pick at V = 128 256 took 2.3, 1.8, 1.8, 1.4 ... ms before settling at 1.2 ms
# six picks later, and a shared-memory step of the same batch 3.5 ms falling to 1.8 ms over
# nine steps; after a client's copies into a segment, in-place steps ran at 2.4 ms for up to
# 45 ms before settling at 1.7. A ratio of two timings is only fair when both start at full
# speed.
WARM_MS = 100.0


def warm_up(step: Callable[[], object], ms: float = WARM_MS) -> None:
    """Run ``step`` untimed until ``ms`` have passed, and at least once."""
    end = time.perf_counter() + ms / 1e3
    step()
    while time.perf_counter() < end:
        step()


async def awarm_up(step: Callable[[], Awaitable[object]], ms: float = WARM_MS) -> None:
    """:func:`warm_up` for a step that is awaited."""
    end = time.perf_counter() + ms / 1e3
    await step()
    while time.perf_counter() < end:
        await step()


def in_process_ms(logits: np.ndarray, count: int = 200) -> float:
    """Median ms of ``pick`` with box-office@1's chain (what KEY is routed to) on ``logits``,
    after :func:`warm_up`."""
    from service.registry import load_registry
    from service.sampling import pick

    chain = load_registry(ROOT / "policies").chain(("box-office", 1))
    warm_up(lambda: pick(chain, logits, seed=1))
    times = []
    for _ in range(count):
        t0 = time.perf_counter()
        pick(chain, logits, seed=1)
        times.append(time.perf_counter() - t0)
    return float(np.median(times) * 1e3)


def row(vocab: int, workers: int, name: str, lat: dict[str, float], rps: float) -> str:
    return (
        f"{vocab:>7} {workers:>7} {name:>10} {lat['p50_ms']:>8.3f} {lat['p99_ms']:>8.3f} "
        f"{rps:>8.0f}"
    )


def write_results(out: Path, results: list[dict[str, Any]]) -> None:
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(json.dumps({"cpus": os.cpu_count(), "results": results}, indent=2) + "\n")
    print(f"wrote {out}")


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true")
    parser.add_argument("--out", type=Path, default=Path("loadtest/results/http.json"))
    args = parser.parse_args()
    vocabs = [32_000] if args.quick else [32_000, 128_256]
    count, seconds, load_seconds = (300, 3.0, 2.0) if args.quick else (2000, 8.0, 5.0)
    results: list[dict[str, Any]] = []
    print(f"{'V':>7} {'workers':>7} {'path':>10} {'p50 ms':>8} {'p99 ms':>8} {'req/s':>8}")
    for vocab in vocabs:
        logits = np.random.default_rng(vocab).standard_normal((1, vocab)).astype(np.float32) * 3
        npy = npy_bytes(logits)
        js = json.dumps({"logits": logits.tolist()}).encode()
        pick_ms = in_process_ms(logits)
        print(f"{vocab:>7} {'-':>7} {'in-process':>10} {pick_ms:>8.3f}")
        results.append({"vocab": vocab, "path": "in-process", "p50_ms": pick_ms})
        for workers in (1, 2):
            clients = 2 * workers
            floor, fport = start_floor(workers)
            try:
                lat = latency(fport, "/", npy, "application/x-npy", count, seconds)
                rps = throughput(fport, "/", npy, "application/x-npy", clients, load_seconds)
            finally:
                stop(floor)
            results.append({"vocab": vocab, "workers": workers, "path": "floor", **lat, "rps": rps})
            print(row(vocab, workers, "floor", lat, rps))
            server, port = start_keepset(workers)
            try:
                for name, body, media in (
                    ("npy", npy, "application/x-npy"),
                    ("json", js, "application/json"),
                ):
                    lat = latency(port, "/v1/pick", body, media, count, seconds)
                    rps = throughput(port, "/v1/pick", body, media, clients, load_seconds)
                    results.append(
                        {"vocab": vocab, "workers": workers, "path": name, **lat, "rps": rps}
                    )
                    print(row(vocab, workers, name, lat, rps))
            finally:
                stop(server)
    write_results(args.out, results)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

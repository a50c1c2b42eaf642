"""Memory and CPU of a real ``keepset serve`` on 127.0.0.1, for the Kubernetes resource figures:
resident memory (VmRSS) of every process of the server idle once ready, and its peak and CPU use
during a short, bounded /v1/pick load (V = 32 000 float32 ``.npy`` rows, one row a request).

    .venv/bin/python loadtest/footprint.py [--workers 2] [--seconds 20] [--clients 2]

Prints one JSON document. Short on purpose: the figures are for sizing requests and limits.
"""

from __future__ import annotations

import argparse
import http.client
import io
import json
import os
import subprocess
import sys
import threading
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
from bench_http import free_port, stop

VOCAB = 32_000
KEY = "demo-usher-desk-key"


def start_keepset(workers: int) -> tuple[subprocess.Popen[bytes], int]:
    """A ``keepset serve`` on a free loopback port, ready; a busy machine can take a minute or
    more to load two workers, so this waits longer than the benchmarks do."""
    port = free_port()
    env = {**os.environ, "KEEPSET_PORT": str(port), "KEEPSET_WORKERS": str(workers)}
    env["KEEPSET_LOG_LEVEL"] = "warning"
    command = [sys.executable, "-m", "service.cli", "serve"]
    proc = subprocess.Popen(command, env=env, stdout=subprocess.DEVNULL)
    deadline = time.monotonic() + 300
    while time.monotonic() < deadline and proc.poll() is None:
        try:
            conn = http.client.HTTPConnection("127.0.0.1", port, timeout=2)
            conn.request("GET", "/readyz")
            if conn.getresponse().status == 200:
                return proc, port
        except OSError:
            pass
        time.sleep(0.5)
    stop(proc)
    raise RuntimeError("keepset did not get ready")


def descendants(pid: int) -> list[int]:
    """Every process under ``pid`` (workers and multiprocessing's helper), depth first."""
    found = []
    for task in Path(f"/proc/{pid}/task").iterdir():
        for text in (task / "children").read_text().split():
            found += [int(text), *descendants(int(text))]
    return found


def rss_mib(pid: int) -> float:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1]) / 1024
    return 0.0


def pss_mib(pid: int) -> float:
    """Proportional set size: shared pages (the libraries every worker maps) split between the
    processes mapping them, so the sum over the server is close to what its cgroup is charged,
    where the sum of RSS counts those pages once per process."""
    for line in Path(f"/proc/{pid}/smaps_rollup").read_text().splitlines():
        if line.startswith("Pss:"):
            return int(line.split()[1]) / 1024
    return 0.0


def cpu_seconds(pid: int) -> float:
    # Fields 14 and 15 of /proc/<pid>/stat are user and system time in clock ticks; the command
    # name before them is in parentheses and may hold spaces, so split after its closing one.
    fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def snapshot(parent: int, size: Callable[[int], float] = rss_mib) -> dict[int, float]:
    return {pid: size(pid) for pid in [parent, *descendants(parent)]}


def npy_row(seed: int) -> bytes:
    buffer = io.BytesIO()
    np.save(buffer, np.random.default_rng(seed).standard_normal(VOCAB).astype(np.float32))
    return buffer.getvalue()


def client_loop(port: int, body: bytes, until: float, counts: list[int], index: int) -> None:
    conn = http.client.HTTPConnection("127.0.0.1", port, timeout=30)
    headers = {"Authorization": f"Bearer {KEY}", "Content-Type": "application/x-npy"}
    while time.monotonic() < until:
        conn.request("POST", "/v1/pick?seed=7", body=body, headers=headers)
        response = conn.getresponse()
        response.read()
        if response.status == 200:
            counts[index] += 1
    conn.close()


def measure(workers: int, seconds: float, clients: int) -> dict[str, Any]:
    proc, port = start_keepset(workers)
    try:
        time.sleep(3)  # let the workers settle after readiness (model loaded, kernel warm)
        idle = snapshot(proc.pid)
        idle_pss = sum(snapshot(proc.pid, pss_mib).values())
        peak_pss = idle_pss
        pids = list(idle)
        cpu_before = sum(cpu_seconds(p) for p in pids)
        peak = dict(idle)
        counts = [0] * clients
        until = time.monotonic() + seconds
        threads = [
            threading.Thread(target=client_loop, args=(port, npy_row(i), until, counts, i))
            for i in range(clients)
        ]
        started = time.monotonic()
        for thread in threads:
            thread.start()
        while any(t.is_alive() for t in threads):
            for pid, rss in snapshot(proc.pid).items():
                peak[pid] = max(peak.get(pid, 0.0), rss)
            peak_pss = max(peak_pss, sum(snapshot(proc.pid, pss_mib).values()))
            time.sleep(0.5)
        wall = time.monotonic() - started
        cpu = sum(cpu_seconds(p) for p in pids) - cpu_before
        return {
            "workers": workers,
            "load_seconds": round(wall, 1),
            "clients": clients,
            "requests": sum(counts),
            "requests_per_second": round(sum(counts) / wall, 1),
            "cpu_cores_used": round(cpu / wall, 2),
            "idle_rss_mib": {str(p): round(v, 1) for p, v in idle.items()},
            "idle_rss_total_mib": round(sum(idle.values()), 1),
            "peak_rss_mib": {str(p): round(v, 1) for p, v in peak.items()},
            "peak_rss_total_mib": round(sum(peak.values()), 1),
            "idle_pss_total_mib": round(idle_pss, 1),
            "peak_pss_total_mib": round(peak_pss, 1),
        }
    finally:
        stop(proc)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--seconds", type=float, default=20.0)
    parser.add_argument("--clients", type=int, default=2)
    args = parser.parse_args()
    print(json.dumps(measure(args.workers, args.seconds, args.clients), indent=2))


if __name__ == "__main__":
    main()

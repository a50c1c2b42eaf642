"""End-to-end ``/v1/pick`` step time per transport, each against its floor, in one interleaved run.

Transports: TCP with a ``.npy`` body, the Unix socket with a ``.npy`` body, shared memory (the
client copies the batch into its segment, the small JSON goes over the Unix socket), and shared
memory in place (the caller's logits are already in the client's ``shared_logits`` block, as
when a model writes its output there: nothing is copied), the last also from the asyncio
client (``AsyncClient.pick`` awaited step after step). A step is one ``pick`` of keepset's own
client: encoding or writing the segment, the request, the answer. Each transport's floor is the
bare app of loadtest/floor_app.py reached the same way (same client, same body; for shared
memory it maps the segment), so keepset / floor is what keepset adds. "pick" is the in-process
``pick`` of the same batch with the same chain, and step / pick the step's time over it (per
repeat, then the median).

Repeats are interleaved (every size and transport once per repeat); the table gives medians over
repeats of each repeat's median, and the ratios are taken per repeat. Each repeat has a keepset
process of its own (a process's speed differs from another's by a few percent for its whole
life). Servers run on 127.0.0.1 and Unix sockets in a temporary folder only, with one worker
each; everything is bounded.

    .venv/bin/python loadtest/bench_transport.py [--repeats 5] [--steps 8] [--quick]
        [--only 32x128256] [--transports "shm in place"]
"""

from __future__ import annotations

import argparse
import asyncio
import os
import shutil
import statistics
import tempfile
import time
from collections import defaultdict
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
from bench_http import (
    KEY,
    awarm_up,
    in_process_ms,
    start_floor,
    start_keepset,
    stop,
    warm_up,
    write_results,
)

from service.client import AsyncClient, Client, SharedLogits

SIZES = [(1, 32_000), (32, 32_000), (128, 32_000), (1, 128_256), (32, 128_256), (128, 128_256)]
TRANSPORTS = ("tcp .npy", "uds .npy", "shm", "shm in place", "async in place")
MAX_BODY = 96 * 1024 * 1024  # a [128, 128256] float32 .npy is 65.7 MB


def step_ms(client: Client, logits: np.ndarray | SharedLogits, steps: int) -> float:
    # Also warms the connection and the segment's size.
    warm_up(lambda: client.pick(logits, seed=1, routing_key="bench"))
    times = []
    for i in range(steps):
        t0 = time.perf_counter()
        client.pick(logits, seed=i, routing_key="bench")
        times.append(time.perf_counter() - t0)
    return statistics.median(times) * 1e3


def async_step_ms(
    loop: asyncio.AbstractEventLoop, client: AsyncClient, block: SharedLogits, steps: int
) -> float:
    """``step_ms`` for the asyncio client, its steps awaited one after another in ``loop``."""

    async def run() -> float:
        await awarm_up(lambda: client.pick(block, seed=1, routing_key="bench"))
        times = []
        for i in range(steps):
            t0 = time.perf_counter()
            await client.pick(block, seed=i, routing_key="bench")
            times.append(time.perf_counter() - t0)
        return statistics.median(times) * 1e3

    return loop.run_until_complete(run())


def transport_ms(
    loop: asyncio.AbstractEventLoop,
    name: str,
    side: tuple[dict[str, Client], AsyncClient],
    block: SharedLogits,
    logits: np.ndarray,
    steps: int,
) -> float:
    """Median ms of ``steps`` steps of transport ``name`` with one side's clients (keepset's
    or the floor's): the in-place ones from ``block``, the others copying ``logits``."""
    clients, async_client = side
    if name == "async in place":
        return async_step_ms(loop, async_client, block, steps)
    if name == "shm in place":
        return step_ms(clients["shm"], block, steps)
    return step_ms(clients[name], logits, steps)


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=5)
    parser.add_argument("--steps", type=int, default=8)
    parser.add_argument("--quick", action="store_true", help="2 repeats of 3 steps")
    parser.add_argument(
        "--only", nargs="+", metavar="BxV", help="these sizes only, e.g. 32x128256 (all by default)"
    )
    parser.add_argument(
        "--transports", nargs="+", choices=TRANSPORTS, help="these transports only (all by default)"
    )
    parser.add_argument("--out", type=Path, default=Path("loadtest/results/transport.json"))
    args = parser.parse_args()
    repeats, steps = (2, 3) if args.quick else (args.repeats, args.steps)
    sizes = [(b, v) for b, v in SIZES if not args.only or f"{b}x{v}" in args.only]
    transports = [t for t in TRANSPORTS if not args.transports or t in args.transports]
    if not sizes:
        parser.error(f"--only names none of {[f'{b}x{v}' for b, v in SIZES]}")
    # Segments live in memory, as they would in a pod's memory-backed emptyDir.
    memory = "/dev/shm" if Path("/dev/shm").is_dir() else None
    work = Path(tempfile.mkdtemp(prefix="keepset-bench-", dir=memory))
    shm_dir = work / "shm"
    shm_dir.mkdir()
    ks_sock, floor_sock = work / "keepset.sock", work / "floor.sock"

    def start_server() -> tuple[Any, int]:
        return start_keepset(
            1,
            KEEPSET_UDS=str(ks_sock),
            KEEPSET_SHM_DIR=str(shm_dir),
            KEEPSET_MAX_ROWS="128",
            KEEPSET_MAX_BODY_BYTES=str(MAX_BODY),
            KEEPSET_SAMPLING_THREADS="2",  # as the in-process pick it is compared with
        )

    def keepset_clients(port: int) -> tuple[dict[str, Client], AsyncClient]:
        base = f"http://127.0.0.1:{port}"
        return {
            "tcp .npy": Client(base, KEY, timeout=60),
            "uds .npy": Client(base, KEY, timeout=60, uds=ks_sock),
            "shm": Client(base, KEY, timeout=60, uds=ks_sock, shm_dir=shm_dir),
        }, AsyncClient(base, KEY, timeout=60, uds=ks_sock, shm_dir=shm_dir)

    floor_tcp, floor_port = start_floor(1, shm_dir=shm_dir)
    floor_uds, _ = start_floor(1, uds=floor_sock, shm_dir=shm_dir)
    floor_base = f"http://127.0.0.1:{floor_port}"
    floors = {
        "tcp .npy": Client(floor_base, KEY, timeout=60),
        "uds .npy": Client(floor_base, KEY, timeout=60, uds=floor_sock),
        "shm": Client(floor_base, KEY, timeout=60, uds=floor_sock, shm_dir=shm_dir),
    }
    loop = asyncio.new_event_loop()
    async_floor = AsyncClient(floor_base, KEY, timeout=60, uds=floor_sock, shm_dir=shm_dir)
    batches = {
        (b, v): (np.random.default_rng(v + b).standard_normal((b, v)) * 3).astype(np.float32)
        for b, v in sizes
    }
    # The in-place blocks, written once before any timing (the model's own write): one for
    # keepset's steps and one for the floor's.
    blocks: dict[tuple[int, int, int], SharedLogits] = {}
    for (b, v), logits in batches.items():
        for role in (0, 1):
            blocks[(b, v, role)] = floors["shm"].shared_logits(b, v)
            blocks[(b, v, role)].array[:] = logits
    keepset_ms: dict[tuple[Any, ...], list[float]] = defaultdict(list)
    floor_ms: dict[tuple[Any, ...], list[float]] = defaultdict(list)
    ratio: dict[tuple[Any, ...], list[float]] = defaultdict(list)
    over_pick: dict[tuple[Any, ...], list[float]] = defaultdict(list)
    pick_ms: dict[tuple[int, int], list[float]] = defaultdict(list)
    started = time.monotonic()
    try:
        # A fresh keepset process each repeat: a process can run a few percent faster or slower
        # than another for its whole life (where its memory landed), and one server would make
        # every figure that process's.
        for _ in range(repeats):
            keepset, port = start_server()
            ours, async_ours = keepset_clients(port)
            try:
                ks_side, floor_side = (ours, async_ours), (floors, async_floor)
                # Untimed: a new process's first steps map the segments and touch their pages.
                for size, logits in batches.items():
                    for name in transports:
                        transport_ms(loop, name, ks_side, blocks[(*size, 0)], logits, 2)
                for size, logits in batches.items():
                    pick_ms[size].append(in_process_ms(logits, count=max(20, steps)))
                    for name in transports:
                        k = transport_ms(loop, name, ks_side, blocks[(*size, 0)], logits, steps)
                        f = transport_ms(loop, name, floor_side, blocks[(*size, 1)], logits, steps)
                        keepset_ms[(*size, name)].append(k)
                        floor_ms[(*size, name)].append(f)
                        ratio[(*size, name)].append(k / f)
                        over_pick[(*size, name)].append(k / pick_ms[size][-1])
            finally:
                for client in ours.values():
                    client.close()
                loop.run_until_complete(async_ours.aclose())
                stop(keepset)
    finally:
        for block in blocks.values():
            block.close()
        for client in floors.values():
            client.close()
        loop.run_until_complete(async_floor.aclose())
        loop.close()
        for proc in (floor_tcp, floor_uds):
            stop(proc)
        shutil.rmtree(work, ignore_errors=True)

    med: Callable[[list[float]], float] = statistics.median
    print(
        f"{'B':>4} {'V':>7} {'transport':>14} {'keepset ms':>10} {'floor ms':>9} "
        f"{'ratio':>6} {'pick ms':>8} {'step/pick':>9} {'keepset-floor-pick ms':>21}"
    )
    results = []
    for b, v in sizes:
        for name in transports:
            key = (b, v, name)
            k, f, r, p, o = (
                med(keepset_ms[key]),
                med(floor_ms[key]),
                med(ratio[key]),
                med(pick_ms[(b, v)]),
                med(over_pick[key]),
            )
            print(
                f"{b:>4} {v:>7} {name:>14} {k:>10.2f} {f:>9.2f} {r:>6.2f} {p:>8.2f} "
                f"{o:>9.2f} {k - f - p:>21.2f}"
            )
            results.append(
                {
                    "rows": b,
                    "vocab": v,
                    "transport": name,
                    "keepset_ms": k,
                    "floor_ms": f,
                    "ratio": r,
                    "pick_ms": p,
                    "step_over_pick": o,
                    "step_over_pick_per_repeat": over_pick[key],
                }
            )
    print(
        f"{repeats} repeats x {steps} steps, {time.monotonic() - started:.0f} s, "
        f"{os.cpu_count()} CPUs"
    )
    write_results(args.out, results)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

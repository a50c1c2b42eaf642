"""The Python client's transports on a real ``keepset serve`` (TCP, Unix socket and shared
memory at once): sync and async, shared-memory picks equal ``.npy`` picks in every dtype, the
segment grows, one segment per pick in flight, and nothing is left in the folder after close."""

from __future__ import annotations

import asyncio
import shutil
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import ml_dtypes
import numpy as np
import pytest
from conftest import DEMO_KEYS, ROOT, Server, start_server, stop_server

from service.client import AsyncClient, Client, KeepsetError, PickReply

KEY = DEMO_KEYS["prompt-book-app"]


@pytest.fixture(scope="module")
def folders(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path]:
    root = Path(tmp_path_factory.mktemp("ct"))
    (root / "shm").mkdir()
    return root / "shm", root / "k.sock"


@pytest.fixture(scope="module")
def served(
    tmp_path_factory: pytest.TempPathFactory, folders: tuple[Path, Path]
) -> Iterator[Server]:
    shm_dir, sock = folders
    registry = Path(tmp_path_factory.mktemp("ct-registry")) / "policies"
    shutil.copytree(ROOT / "policies", registry)
    running = start_server(registry, workers=1, uds=sock, KEEPSET_SHM_DIR=str(shm_dir))
    yield running
    stop_server(running)


def same(reply: PickReply) -> tuple[Any, ...]:
    """What the same seed and inputs must reproduce (request_id differs)."""
    return reply.policy, reply.version, reply.arm, reply.seed, reply.tokens, reply.rows


def batch(b: int, v: int = 3000, seed: int = 0) -> np.ndarray:
    return (np.random.default_rng(seed).standard_normal((b, v)) * 3).astype(np.float32)


@pytest.mark.parametrize("dtype", ["float32", "float16", "bfloat16"])
def test_sync_shm_and_uds_equal_tcp_npy(
    served: Server, folders: tuple[Path, Path], dtype: Any
) -> None:
    shm_dir, sock = folders
    logits = batch(4)
    kw: dict[str, Any] = {"seed": 5, "routing_key": "u-1", "history": [[1, 2]] * 4}
    kw["adjust"] = {"temperature": 0.9}
    with Client(served.base_url, KEY, dtype=dtype) as tcp:
        expected = same(tcp.pick(logits, **kw))
    with Client("http://keepset", KEY, uds=sock, shm_dir=shm_dir, dtype=dtype) as both:
        assert same(both.pick(logits, **kw)) == expected
        assert len(list(shm_dir.iterdir())) == 1
    with Client("http://keepset", KEY, uds=sock, dtype=dtype) as over_uds:
        assert same(over_uds.pick(logits, **kw)) == expected
    assert not list(shm_dir.iterdir()), "close removes the client's segment"
    # What the server decided is the pick of the values the dtype can carry.
    carried = {"float32": np.float32, "float16": np.float16, "bfloat16": ml_dtypes.bfloat16}
    with Client(served.base_url, KEY) as plain:
        rounded = logits.astype(carried[dtype]).astype(np.float32)
        assert same(plain.pick(rounded, **kw)) == expected


def test_segment_is_reused_and_grows(served: Server, folders: tuple[Path, Path]) -> None:
    shm_dir, _ = folders
    with Client(served.base_url, KEY, shm_dir=shm_dir) as ks, Client(served.base_url, KEY) as ref:
        names = set()
        for b, v in ((1, 100), (8, 20_000), (2, 50), (8, 20_000)):
            logits = batch(b, v, seed=b)
            assert same(ks.pick(logits, seed=1, routing_key="g")) == same(
                ref.pick(logits, seed=1, routing_key="g")
            )
            names |= {p.name for p in shm_dir.iterdir()}
        assert len(names) == 1
        (segment,) = shm_dir.iterdir()
        assert segment.stat().st_size >= 8 * 20_000 * 4
        # A refused pick (no finite logit: 422) keeps the segment for the next one.
        with pytest.raises(KeepsetError) as refused:
            ks.pick(np.full((1, 10), -np.inf, np.float32))
        assert refused.value.status == 422
        assert [p.name for p in shm_dir.iterdir()] == [segment.name]
    assert not list(shm_dir.iterdir())


def test_a_refused_pick_over_the_socket_keeps_the_segment(
    served: Server, folders: tuple[Path, Path]
) -> None:
    """Over the Unix socket too, sync and async: the answer is read after the segment's lease,
    so a refused pick (422) leaves the segment for the next one."""
    shm_dir, sock = folders
    refused = np.full((1, 10), -np.inf, np.float32)
    with Client("http://keepset", KEY, uds=sock, shm_dir=shm_dir) as ks:
        ks.pick(batch(1, 100), seed=1)
        before = sorted(p.name for p in shm_dir.iterdir())
        with pytest.raises(KeepsetError) as sync_error:
            ks.pick(refused)
        assert sync_error.value.status == 422
        assert sorted(p.name for p in shm_dir.iterdir()) == before

    async def run() -> None:
        async with AsyncClient("http://keepset", KEY, uds=sock, shm_dir=shm_dir) as ks:
            await ks.pick(batch(1, 100), seed=1)
            before = sorted(p.name for p in shm_dir.iterdir())
            with pytest.raises(KeepsetError) as async_error:
                await ks.pick(refused)
            assert async_error.value.status == 422
            assert sorted(p.name for p in shm_dir.iterdir()) == before

    asyncio.run(run())
    assert not list(shm_dir.iterdir())


def test_a_folder_the_server_does_not_share_is_a_404(served: Server, tmp_path: Path) -> None:
    with Client(served.base_url, KEY, shm_dir=tmp_path) as ks, pytest.raises(KeepsetError) as e:
        ks.pick(batch(1))
    assert e.value.status == 404 and "no segment named" in e.value.problem["detail"]


def test_async_shm_and_uds(served: Server, folders: tuple[Path, Path]) -> None:
    shm_dir, sock = folders

    async def run() -> None:
        inputs = [batch(2, 4000, seed=s) for s in range(6)]
        async with AsyncClient(served.base_url, KEY) as tcp:
            expected = [
                same(await tcp.pick(x, seed=i, routing_key="a")) for i, x in enumerate(inputs)
            ]
        async with AsyncClient(
            "http://keepset", KEY, uds=sock, shm_dir=shm_dir, dtype="bfloat16"
        ) as ks:
            together = await asyncio.gather(
                *(ks.pick(x, seed=i, routing_key="a") for i, x in enumerate(inputs))
            )
            # Six picks in flight at once could not share one segment.
            assert 1 < len(list(shm_dir.iterdir())) <= 6
        async with AsyncClient("http://keepset", KEY, uds=sock, dtype="bfloat16") as npy:
            via_npy = [
                same(await npy.pick(x, seed=i, routing_key="a")) for i, x in enumerate(inputs)
            ]
        assert [same(r) for r in together] == via_npy
        async with AsyncClient("http://keepset", KEY, uds=sock, shm_dir=shm_dir) as f32:
            assert [
                same(await f32.pick(x, seed=i, routing_key="a")) for i, x in enumerate(inputs)
            ] == expected

    asyncio.run(run())
    assert not list(shm_dir.iterdir())


@pytest.mark.parametrize("dtype", ["float32", "float16", "bfloat16"])
def test_logits_written_in_place_equal_npy_picks(
    served: Server, folders: tuple[Path, Path], dtype: Any
) -> None:
    # A caller that writes its logits straight into the client's shared block: the picks
    # equal .npy picks of the same stored values, step after step in the same block, sync and
    # async, and closing the block removes its segment.
    from service.dtypes import to_wire

    shm_dir, sock = folders
    steps = [batch(3, 2500, seed=s) for s in range(3)]
    with Client(served.base_url, KEY, dtype=dtype) as tcp:
        expected = [same(tcp.pick(x, seed=s, routing_key="w")) for s, x in enumerate(steps)]
    with Client("http://keepset", KEY, uds=sock, shm_dir=shm_dir) as ks:
        with ks.shared_logits(3, 2500, dtype) as block:
            assert block.array.dtype == {"float32": "<f4", "float16": "<f2"}.get(dtype, "<u2")
            got = []
            for s, x in enumerate(steps):
                block.array[:] = to_wire(x, dtype)
                got.append(same(ks.pick(block, seed=s, routing_key="w")))
            assert got == expected
            assert len(list(shm_dir.iterdir())) == 1, "the block's segment only; no copy made"
        assert not list(shm_dir.iterdir())

    async def run() -> list[tuple[Any, ...]]:
        async with AsyncClient("http://keepset", KEY, uds=sock, shm_dir=shm_dir) as ks:
            with ks.shared_logits(3, 2500, dtype) as block:
                out = []
                for s, x in enumerate(steps):
                    block.array[:] = to_wire(x, dtype)
                    out.append(same(await ks.pick(block, seed=s, routing_key="w")))
                return out

    assert asyncio.run(run()) == expected
    assert not list(shm_dir.iterdir())


def test_shared_logits_need_a_shared_folder(served: Server) -> None:
    with Client(served.base_url, KEY) as ks, pytest.raises(ValueError, match="shm_dir"):
        ks.shared_logits(1, 10)


def test_closing_a_block_whose_array_is_still_held(
    served: Server, folders: tuple[Path, Path]
) -> None:
    # A caller may keep a reference to block.array; closing must still remove the segment.
    shm_dir, sock = folders
    with Client("http://keepset", KEY, uds=sock, shm_dir=shm_dir) as ks:
        block = ks.shared_logits(2, 100)
        held = block.array
        block.close()
        assert not list(shm_dir.iterdir())
        del held


def test_unix_picks_survive_a_server_restart_and_report_failures_as_httpx_errors(
    tmp_path: Path, registry: Path
) -> None:
    # Sync picks over the Unix socket skip httpx: a kept connection the server closed (here by
    # restarting) is replaced before the next pick, nothing is sent twice, and failures come as
    # the httpx errors the rest of the client raises.
    import httpx

    sock = tmp_path / "k.sock"
    logits = batch(2, 500)
    ks = Client("http://keepset", KEY, uds=sock, timeout=10)
    first = start_server(registry, workers=1, uds=sock)
    try:
        before = same(ks.pick(logits, seed=3, routing_key="r"))
    finally:
        stop_server(first)
    second = start_server(registry, workers=1, uds=sock)
    try:
        # The connection kept from the first server is dead; the pick goes on a new one.
        assert same(ks.pick(logits, seed=3, routing_key="r")) == before
        with pytest.raises(KeepsetError) as refused:
            ks.pick(np.full((1, 10), -np.inf, np.float32))
        assert refused.value.status == 422 and refused.value.problem["status"] == 422
        assert same(ks.pick(logits, seed=3, routing_key="r")) == before
    finally:
        stop_server(second)
    with pytest.raises(httpx.ConnectError):
        ks.pick(logits, seed=3, routing_key="r")  # nothing listens now
    ks.close()


def test_unix_picks_with_descriptors_above_1023(served: Server, folders: tuple[Path, Path]) -> None:
    # A busy caller holds many files; the kept connection's check must not be limited to
    # descriptors below 1024 (select's limit).
    import os
    import resource

    _, sock = folders
    soft, hard = resource.getrlimit(resource.RLIMIT_NOFILE)
    if hard != resource.RLIM_INFINITY and hard < 1200:
        pytest.skip(f"the hard limit on open files is {hard}")
    resource.setrlimit(resource.RLIMIT_NOFILE, (max(soft, 1200), hard))
    spare = [os.open(os.devnull, os.O_RDONLY) for _ in range(1100)]
    try:
        with Client("http://keepset", KEY, uds=sock) as ks:
            first = same(ks.pick(batch(1, 300), seed=2, routing_key="fd"))
            assert same(ks.pick(batch(1, 300), seed=2, routing_key="fd")) == first
    finally:
        for fd in spare:
            os.close(fd)
        resource.setrlimit(resource.RLIMIT_NOFILE, (soft, hard))

"""The Unix-domain-socket listener on a real ``keepset serve``: picks over the socket with one and
two workers equal the same picks over TCP, TCP keeps serving probes and /metrics, the socket
file has mode 0660, a stale one is replaced and anything else at the path is left alone."""

from __future__ import annotations

import os
import socket
import stat
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from typing import Any

import httpx
import numpy as np
import pytest
from conftest import assert_same_pick, auth, start_server, stop_server

from service.listen import bind_unix
from service.npy import to_npy


def short_socket_path(tmp_path: Path, name: str = "keepset.sock") -> Path:
    """Socket paths are limited to 107 bytes; pytest's temporary folders can be long."""
    path = tmp_path / name
    assert len(str(path)) < 100, path
    return path


def pick_over(client: httpx.Client, base: str, logits: np.ndarray, seed: int) -> dict[str, Any]:
    headers = {**auth("prompt-book-app"), "Content-Type": "application/x-npy"}
    params = {"seed": seed, "routing_key": f"key-{seed}"}
    r = client.post(f"{base}/v1/pick", content=to_npy(logits), params=params, headers=headers)
    assert r.status_code == 200, r.text
    data: dict[str, Any] = r.json()
    data.pop("request_id")
    return data


def rows_served(base: str) -> float:
    text = httpx.get(f"{base}/metrics").text
    return sum(
        float(line.rsplit(" ", 1)[1])
        for line in text.splitlines()
        if line.startswith("keepset_rows_total{")
    )


@pytest.mark.parametrize("workers", [1, 2])
def test_uds_picks_equal_tcp_picks(registry: Path, tmp_path: Path, workers: int) -> None:
    path = short_socket_path(tmp_path)
    server = start_server(registry, workers=workers, uds=path)
    try:
        assert stat.S_IMODE(os.stat(path).st_mode) == 0o660
        assert stat.S_ISSOCK(os.stat(path).st_mode)
        logits = np.random.default_rng(workers).standard_normal((3, 4000)).astype(np.float32)
        with (
            httpx.Client(transport=httpx.HTTPTransport(uds=str(path))) as over_uds,
            httpx.Client() as over_tcp,
        ):
            for seed in range(5):
                assert_same_pick(
                    pick_over(over_uds, server.base_url, logits, seed),
                    pick_over(over_tcp, server.base_url, logits, seed),
                )

        def burst(seed: int) -> int:
            # A connection per thread: with two workers both accept on the shared socket.
            with httpx.Client(transport=httpx.HTTPTransport(uds=str(path))) as own:
                return len(pick_over(own, server.base_url, logits, seed)["tokens"])

        before = rows_served(server.base_url)
        with ThreadPoolExecutor(8) as pool:
            assert list(pool.map(burst, range(40))) == [3] * 40
        # TCP still serves /metrics, and it counts what came over the socket (all workers).
        assert rows_served(server.base_url) == before + 40 * 3
    finally:
        stop_server(server)
    assert not path.exists(), "the socket file is removed at shutdown"


def test_a_stale_socket_file_is_replaced(registry: Path, tmp_path: Path) -> None:
    path = short_socket_path(tmp_path)
    left = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
    left.bind(str(path))  # bound, never listening, closed: what a killed server leaves
    left.close()
    assert stat.S_ISSOCK(os.lstat(path).st_mode)
    server = start_server(registry, workers=1, uds=path)
    try:
        with httpx.Client(transport=httpx.HTTPTransport(uds=str(path))) as over_uds:
            assert over_uds.get(f"{server.base_url}/healthz").status_code == 200
    finally:
        stop_server(server)


def test_anything_but_a_stale_socket_is_left_alone(registry: Path, tmp_path: Path) -> None:
    path = short_socket_path(tmp_path, "not-a-socket")
    path.write_text("precious")
    with pytest.raises(RuntimeError, match="not a socket"):
        start_server(registry, workers=1, uds=path)
    assert path.read_text() == "precious"

    live = short_socket_path(tmp_path, "live.sock")
    with socket.socket(socket.AF_UNIX, socket.SOCK_STREAM) as other:
        other.bind(str(live))
        other.listen()
        with pytest.raises(ValueError, match="another server is listening"):
            bind_unix(live)
        assert stat.S_ISSOCK(os.lstat(live).st_mode)


def test_uds_is_off_by_default_and_a_serve_flag() -> None:
    from service.cli import _parser
    from service.settings import Settings

    assert Settings().uds is None and Settings().shm_dir is None
    args = _parser().parse_args(["serve", "--uds", "/tmp/k.sock", "--shm-dir", "/dev/shm"])
    assert (args.uds, args.shm_dir) == ("/tmp/k.sock", "/dev/shm")
    assert Settings(uds="", shm_dir="").uds is None  # an empty variable means off

"""Shared-memory logits (``logits_shm``) on a real ``keepset serve``: the same picks as the same
array sent as ``.npy``, every way a descriptor or segment can be wrong answered with its 4xx
problem (never a 500, never a read outside the segment), and the mapping gone after the pick.
Segment files are written here with plain numpy, not with keepset's own writer."""

from __future__ import annotations

import os
import shutil
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import httpx
import ml_dtypes
import numpy as np
import pytest
from conftest import ROOT, Server, assert_problem, auth, in_process, start_server, stop_server

from service.npy import to_npy

V = 5000
HEADER = 4096 + 8  # the logits start past the first page, at an offset that is not page-aligned


@pytest.fixture(scope="module")
def shm_dir(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return Path(tmp_path_factory.mktemp("segments"))


@pytest.fixture(scope="module")
def shm_server(tmp_path_factory: pytest.TempPathFactory, shm_dir: Path) -> Iterator[Server]:
    """One worker, so that its process is the one whose mappings the tests read."""
    registry = Path(tmp_path_factory.mktemp("shm-registry")) / "policies"
    shutil.copytree(ROOT / "policies", registry)
    running = start_server(registry, workers=1, KEEPSET_SHM_DIR=str(shm_dir), KEEPSET_MAX_ROWS="8")
    yield running
    stop_server(running)


def stored(values: np.ndarray, dtype: str) -> np.ndarray:
    """``values`` as the little-endian storage of a wire dtype (bfloat16: raw bits)."""
    if dtype == "bfloat16":
        return values.astype(ml_dtypes.bfloat16).view("<u2")
    return values.astype("<f4" if dtype == "float32" else "<f2")


def write_segment(folder: Path, name: str, data: np.ndarray, offset: int = HEADER) -> Path:
    path = folder / name
    path.write_bytes(b"\xab" * offset + data.tobytes())
    return path


def shm_pick(server: Server, descriptor: dict[str, Any], **fields: Any) -> httpx.Response:
    body = {"logits_shm": descriptor, **fields}
    return httpx.post(
        f"{server.base_url}/v1/pick", json=body, headers=auth("prompt-book-app"), timeout=10
    )


def npy_pick(server: Server, data: np.ndarray, params: dict[str, Any]) -> httpx.Response:
    headers = {**auth("prompt-book-app"), "Content-Type": "application/x-npy"}
    return httpx.post(
        f"{server.base_url}/v1/pick", content=to_npy(data), params=params, headers=headers
    )


def answer(response: httpx.Response) -> tuple[Any, ...]:
    assert response.status_code == 200, response.text
    data = response.json()
    return data["policy"], data["version"], data["seed"], data["tokens"], data["rows"]


@pytest.mark.parametrize("dtype", ["float32", "float16", "bfloat16"])
@pytest.mark.parametrize("shape", [(V,), (3, V)])
def test_shm_picks_equal_npy_picks(
    shm_server: Server, shm_dir: Path, dtype: str, shape: tuple[int, ...]
) -> None:
    rng = np.random.default_rng(len(shape) * 10 + len(dtype))
    logits = (rng.standard_normal(shape) * 4).astype(np.float32)
    data = stored(logits, dtype)
    name = f"same-{dtype}-{len(shape)}"
    write_segment(shm_dir, name, data)
    history = [[1, 2, 3]] * (1 if len(shape) == 1 else shape[0])
    fields = {"seed": 42, "routing_key": "scene-7", "history": history}
    descriptor = {"segment": name, "offset": HEADER, "shape": list(shape), "dtype": dtype}
    via_shm = shm_pick(shm_server, descriptor, adjust={"temperature": 0.8}, **fields)
    params = {
        "seed": 42,
        "routing_key": "scene-7",
        "history": ";".join("1,2,3" for _ in history),
        "temperature": 0.8,
        **({"dtype": "bfloat16"} if dtype == "bfloat16" else {}),
    }
    via_npy = npy_pick(shm_server, data, params)
    assert answer(via_shm) == answer(via_npy)


def test_non_finite_rows_in_a_read_only_mapping_fall_back(
    shm_server: Server, shm_dir: Path
) -> None:
    """The float32 view is read-only; rows with NaN and +inf must still be decided (the
    sampler cleans a copy), and a row with no finite entry is a 422."""
    logits = np.random.default_rng(3).standard_normal((3, 64)).astype(np.float32)
    logits[0, 5], logits[1, 7] = np.nan, np.inf
    write_segment(shm_dir, "non-finite", logits, offset=0)
    r = shm_pick(shm_server, {"segment": "non-finite", "shape": [3, 64]}, seed=1)
    rows = answer(r)[4]
    assert [row["fallback"] for row in rows] == ["non_finite", "non_finite", None]
    logits[2] = np.nan
    write_segment(shm_dir, "no-finite", logits, offset=0)
    r = shm_pick(shm_server, {"segment": "no-finite", "shape": [3, 64]})
    assert_problem(r, 422, "no finite")


def mapped_paths(pid: int) -> str:
    return Path(f"/proc/{pid}/maps").read_text()


def test_mappings_are_kept_for_reuse_and_let_go_when_their_file_goes(
    shm_server: Server, shm_dir: Path
) -> None:
    """A worker keeps a segment's mapping open between requests (a caller reuses its segment
    step after step) but reads what is there now, maps a replaced file anew, and lets a
    mapping go once its file is removed, so it never keeps a removed segment's memory alive."""
    pid = shm_server.process.pid
    rng = np.random.default_rng(11)
    first, second, third = (rng.standard_normal((2, V)).astype(np.float32) * 3 for _ in range(3))
    path = write_segment(shm_dir, "reused", first, offset=0)
    descriptor = {"segment": "reused", "shape": [2, V]}

    def same_as_npy(logits: np.ndarray) -> None:
        # One routing key: the client's route splits its traffic between two versions.
        assert answer(shm_pick(shm_server, descriptor, seed=5, routing_key="k")) == answer(
            npy_pick(shm_server, logits, {"seed": 5, "routing_key": "k"})
        )

    same_as_npy(first)
    assert mapped_paths(pid).count(str(path)) == 1
    with path.open("r+b") as f:  # rewritten in place, as a caller does between steps
        f.write(second.tobytes())
    same_as_npy(second)
    assert mapped_paths(pid).count(str(path)) == 1, "the same file keeps one mapping"
    fresh = shm_dir / "reused.new"
    fresh.write_bytes(third.tobytes())
    os.replace(fresh, path)  # another file under the same name
    same_as_npy(third)
    maps = mapped_paths(pid)
    assert maps.count(str(path)) == 1 and "(deleted)" not in maps
    path.unlink()
    assert_problem(shm_pick(shm_server, descriptor), 404, "no segment")
    assert str(path) not in mapped_paths(pid)

    # A segment removed without being named again goes when the worker maps another one.
    gone = write_segment(shm_dir, "gone-later", first, offset=0)
    assert shm_pick(shm_server, {"segment": "gone-later", "shape": [2, V]}).status_code == 200
    gone.unlink()
    write_segment(shm_dir, "next-one", first, offset=0)
    assert shm_pick(shm_server, {"segment": "next-one", "shape": [2, V]}).status_code == 200
    assert str(gone) not in mapped_paths(pid)


def test_a_kept_mapping_is_checked_before_reuse(shm_server: Server, shm_dir: Path) -> None:
    """A kept mapping is reused only while its name is the same regular file at the same
    size: a file cut short in place, or a name swapped for a link to that very file, gets the
    problem a first request would get."""
    rows = np.random.default_rng(12).standard_normal((2, V)).astype(np.float32)
    path = write_segment(shm_dir, "checked", rows, offset=0)
    descriptor = {"segment": "checked", "shape": [2, V]}
    assert shm_pick(shm_server, descriptor).status_code == 200
    assert str(path) in mapped_paths(shm_server.process.pid)
    os.truncate(path, rows.nbytes // 2)
    assert_problem(shm_pick(shm_server, descriptor), 400, "runs past its end")
    path.write_bytes(rows.tobytes())
    assert shm_pick(shm_server, descriptor).status_code == 200
    target = path.rename(shm_dir / "checked.target")
    path.symlink_to(target)
    assert_problem(shm_pick(shm_server, descriptor), 400, "symbolic link")
    path.unlink()
    target.rename(path)
    assert shm_pick(shm_server, descriptor).status_code == 200


def test_mappings_kept_are_bounded(shm_dir: Path) -> None:
    # At most ``limit`` mappings stay open; the least recently used goes first.
    from service.shm import SegmentMaps, ShmRef, read_segment

    maps = SegmentMaps(shm_dir, limit=3)
    names = [f"bounded-{i}" for i in range(5)]
    for name in names:
        write_segment(shm_dir, name, np.arange(8, dtype=np.float32), offset=0)
    for name in [*names, names[3]]:
        read_segment(ShmRef(segment=name, shape=[8]), shm_dir, lambda b, v: None, maps).close()
    maps_text = mapped_paths(os.getpid())
    held = [name for name in names if str(shm_dir / name) in maps_text]
    assert held == names[2:]
    assert len(maps) == 3
    maps.close()
    assert not any(str(shm_dir / name) in mapped_paths(os.getpid()) for name in names)


def test_a_view_in_use_when_the_request_fails_is_released(
    shm_server: Server, shm_dir: Path
) -> None:
    # An error raised while the view was in use (a 422 from the sampler) leaves the worker
    # serving, and the segment's mapping is let go with its file as any other.
    bad = write_segment(shm_dir, "fails-422", np.full(V, -np.inf, np.float32), offset=0)
    assert_problem(shm_pick(shm_server, {"segment": "fails-422", "shape": [V]}), 422)
    bad.unlink()
    write_segment(shm_dir, "after-422", np.zeros(V, np.float32), offset=0)
    assert shm_pick(shm_server, {"segment": "after-422", "shape": [V]}).status_code == 200
    assert str(bad) not in mapped_paths(shm_server.process.pid)


def _outside_link(folder: Path) -> str:
    outside = folder.parent / "outside-secret.bin"
    outside.write_bytes(np.ones(16, np.float32).tobytes())
    (folder / "link-out").unlink(missing_ok=True)
    (folder / "link-out").symlink_to(outside)
    return "link-out"


def _inside_link(folder: Path) -> str:
    write_segment(folder, "link-target", np.ones(16, np.float32), offset=0)
    (folder / "link-in").unlink(missing_ok=True)
    (folder / "link-in").symlink_to(folder / "link-target")
    return "link-in"


def _fifo(folder: Path) -> str:
    if not (folder / "a-fifo").exists():
        os.mkfifo(folder / "a-fifo")
    return "a-fifo"


def _directory(folder: Path) -> str:
    (folder / "a-directory").mkdir(exist_ok=True)
    return "a-directory"


def _truncated(folder: Path) -> str:
    write_segment(folder, "short", np.ones(15, np.float32), offset=0)  # 16 are named
    return "short"


def _vanished(folder: Path) -> str:
    path = write_segment(folder, "gone", np.ones(16, np.float32), offset=0)
    path.unlink()
    return "gone"


def _good(folder: Path) -> str:
    write_segment(folder, "good", np.ones(16, np.float32), offset=0)
    return "good"


Setup = Callable[[Path], str]
CASES: list[tuple[str, Setup | str, dict[str, Any], int, str]] = [
    ("parent", "../good", {}, 400, "plain file name"),
    ("slash", "sub/good", {}, 400, "plain file name"),
    ("absolute", "/etc/passwd", {}, 400, "plain file name"),
    ("empty", "", {}, 400, "plain file name"),
    ("nul", "go\x00od", {}, 400, "plain file name"),
    ("dot", ".", {}, 400, "plain file name"),
    ("dotdot", "..", {}, 400, "plain file name"),
    ("hidden", ".good", {}, 400, "plain file name"),
    ("too-long", "g" * 256, {}, 400, "plain file name"),
    ("link-outside", _outside_link, {}, 400, "symbolic link"),
    ("link-inside", _inside_link, {}, 400, "symbolic link"),
    ("fifo", _fifo, {}, 400, "not a regular file"),
    ("directory", _directory, {}, 400, "not a regular file"),
    ("truncated", _truncated, {}, 400, "runs past its end"),
    ("vanished", _vanished, {}, 404, "no segment named"),
    ("missing", "never-written", {}, 404, "no segment named"),
    ("offset-past-end", _good, {"offset": 64}, 400, "runs past its end"),
    ("offset-huge", _good, {"offset": 2**63 + 4}, 400, "runs past its end"),
    ("offset-negative", _good, {"offset": -4}, 400, "greater than or equal to 0"),
    ("offset-unaligned", _good, {"offset": 2}, 400, "not a multiple of 4"),
    ("offset-unaligned-f16", _good, {"offset": 3, "dtype": "float16"}, 400, "multiple of 2"),
    ("shape-3d", _good, {"shape": [2, 2, 4]}, 400, "shape"),
    ("shape-empty", _good, {"shape": []}, 400, "shape"),
    ("shape-zero", _good, {"shape": [0, 16]}, 400, "sizes >= 1"),
    ("shape-negative", _good, {"shape": [-1, 16]}, 400, "sizes >= 1"),
    ("shape-overflow", _good, {"shape": [2**40, 2**40]}, 413, "KEEPSET_MAX_ROWS"),
    ("vocab-overflow", _good, {"shape": [2**63 + 1]}, 413, "KEEPSET_MAX_VOCAB"),
    ("rows-over-limit", _good, {"shape": [9, 1]}, 413, "KEEPSET_MAX_ROWS"),
    ("dtype-unknown", _good, {"dtype": "float64"}, 400, "dtype"),
    ("extra-field", _good, {"stride": 4}, 400, "stride"),
]


@pytest.mark.parametrize(
    ("setup", "changes", "status", "needle"),
    [case[1:] for case in CASES],
    ids=[case[0] for case in CASES],
)
def test_every_shm_error_is_its_problem(
    shm_server: Server,
    shm_dir: Path,
    setup: Setup | str,
    changes: dict[str, Any],
    status: int,
    needle: str,
) -> None:
    name = setup if isinstance(setup, str) else setup(shm_dir)
    descriptor = {"segment": name, "offset": 0, "shape": [16], "dtype": "float32", **changes}
    assert_problem(shm_pick(shm_server, descriptor), status, needle)


def test_exactly_one_logits_field(shm_server: Server, shm_dir: Path) -> None:
    descriptor = {"segment": _good(shm_dir), "shape": [16]}
    r = shm_pick(shm_server, descriptor, logits=[1.0, 2.0])
    assert_problem(r, 400, "exactly one of 'logits', 'logits_npy' and 'logits_shm'")


def test_shm_off_is_refused(registry: Path, tmp_path: Path) -> None:
    write_segment(tmp_path, "good", np.ones(16, np.float32), offset=0)
    with in_process(registry) as client:
        r = client.post(
            "/v1/pick",
            json={"logits_shm": {"segment": "good", "shape": [16]}},
            headers=auth("usher-desk"),
        )
    assert_problem(r, 403, "KEEPSET_SHM_DIR is not set")

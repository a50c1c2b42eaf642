"""The policy-change loop end to end: live traffic on a real two-worker server with capture on,
then ``preview`` of two versions over that capture, against what the service answered live.

The same requests (logits, histories, seeds) are served twice, once under prompt-book@3 and
once under prompt-book@4, and the first run is captured. A preview of both versions over the
capture must reproduce the live statistics of each run: the replay is exact (float16 logits,
stored as float16), so every statistic equals the live one and lies inside its bootstrap
interval, and the live difference between the versions lies inside the preview's paired
interval. The live statistics are computed here from the answers with numpy, independently of
the preview's own code."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pytest
from conftest import DEMO_KEYS, start_server, stop_server

from service.client import Client, PickReply
from service.preview.replay import preview_capture
from service.registry import load_registry
from service.shards import read_shard, shard_files

VOCAB = 4096
REQUESTS = 150
ROWS = 2  # rows per request


def traffic() -> list[tuple[np.ndarray, list[list[int]], int]]:
    """Requests with kept sets of every size: sharp and flat rows, penalised histories."""
    rng = np.random.default_rng(2026)
    out = []
    for i in range(REQUESTS):
        scale = rng.uniform(0.3, 6.0, size=(ROWS, 1))
        logits = (rng.standard_normal((ROWS, VOCAB)) * scale).astype(np.float16)
        history = [rng.integers(0, VOCAB, size=rng.integers(0, 40)).tolist() for _ in range(ROWS)]
        out.append((logits, history, 10_000 + i))
    return out


def serve_run(registry: Path, version: int, capture: Path | None) -> list[PickReply]:
    routes = (
        "clients:\n  prompt-book-app:\n"
        f"    arms: [{{policy: prompt-book@{version}, weight: 100}}]\n"
        + ("    capture: {rate: 1.0, max_mb: 200}\n" if capture is not None else "")
    )
    (registry / "routes.yaml").write_text(routes)
    env = {"KEEPSET_CAPTURE_DIR": str(capture)} if capture is not None else {}
    server = start_server(registry, workers=2, **env)
    try:
        with Client(server.base_url, DEMO_KEYS["prompt-book-app"], dtype="float16") as client:
            replies = [client.pick(x, seed=s, history=h) for x, h, s in traffic()]
    finally:
        stop_server(server)  # the capture writes what it holds at shutdown
    assert {r.version for r in replies} == {version}
    return replies


def live_statistics(replies: list[PickReply]) -> dict[str, float]:
    rows = [row for reply in replies for row in reply.rows]
    kept = np.array([r.kept for r in rows])
    return {
        "kept_median": float(np.percentile(kept, 50)),
        "kept_p10": float(np.percentile(kept, 10)),
        "kept_p90": float(np.percentile(kept, 90)),
        "single_share": float(np.mean(kept == 1)),
        "entropy_model": float(np.mean([r.entropy for r in rows])),
        "kept_mass": float(np.mean([r.kept_mass for r in rows])),
        "fallback_rate": float(np.mean([r.fallback is not None for r in rows])),
    }


@pytest.fixture(scope="module")
def loop(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    import shutil

    from conftest import ROOT

    base = tmp_path_factory.mktemp("loop")
    registry = base / "policies"
    shutil.copytree(ROOT / "policies", registry)
    capture = base / "capture"
    capture.mkdir()
    live3 = serve_run(registry, 3, capture)
    live4 = serve_run(registry, 4, None)
    shards = [read_shard(p) for p in shard_files(capture)]
    report = preview_capture(
        shards, ["prompt-book@3", "prompt-book@4"], load_registry(registry), seed=0
    ).as_json()
    return {"live": {3: live_statistics(live3), 4: live_statistics(live4)}, "report": report}


def test_the_capture_holds_every_served_row(loop: dict[str, Any]) -> None:
    report = loop["report"]
    assert report["rows"] == REQUESTS * ROWS
    served = report["served"]["prompt-book@3"]
    assert served["rows"] == REQUESTS * ROWS
    assert served["same_token"] == 1.0  # float16 logits replay bit for bit
    assert served.get("rows", 0) and report["served"]["prompt-book@4"]["rows"] == 0


@pytest.mark.parametrize("version", [3, 4])
def test_preview_reproduces_each_versions_live_statistics(
    loop: dict[str, Any], version: int
) -> None:
    live = loop["live"][version]
    previewed = loop["report"]["statistics"][f"prompt-book@{version}"]
    for name, value in live.items():
        interval = previewed[name]
        assert interval["value"] == pytest.approx(value, rel=1e-5, abs=1e-9), name
        assert interval["low"] - 1e-9 <= value <= interval["high"] + 1e-9, name


def test_the_live_difference_lies_in_the_paired_interval(loop: dict[str, Any]) -> None:
    live3, live4 = loop["live"][3], loop["live"][4]
    difference = loop["report"]["differences"]["prompt-book@4"]
    for name in ("kept_median", "single_share", "kept_mass", "fallback_rate"):
        observed = live4[name] - live3[name]
        assert difference[name]["value"] == pytest.approx(observed, rel=1e-5, abs=1e-9), name
        assert difference[name]["low"] - 1e-9 <= observed <= difference[name]["high"] + 1e-9
    # The versions differ on this traffic (typical vs min_p), so the check has something to see.
    assert live3["kept_median"] != live4["kept_median"]

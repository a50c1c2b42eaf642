"""Hot reload under a Kubernetes ConfigMap volume's atomic swap, on a real two-worker server
with traffic running: the registry folder holds symlinks into ``..data``, which points at a
timestamped folder, and every update writes a new folder and renames a new ``..data`` over the
old one (the kubelet's layout). Valid updates are served, broken ones (a tampered published
file, unparsable routes) keep the last good registry, and no valid request fails meanwhile."""

from __future__ import annotations

import os
import shutil
import threading
import time
from collections import Counter
from pathlib import Path

import httpx
import numpy as np
from conftest import ROOT, auth, start_server, stop_server

LOGITS = np.linspace(-3, 3, 64, dtype=np.float32).tolist()


def _version_folder(volume: Path, n: int, usher_policy: str, damage: str | None) -> str:
    """A complete registry in a new timestamped folder; returns its name."""
    name = f"..2026_12_03_12_{n // 60:02d}_{n % 60:02d}.{n}"
    folder = volume / name
    shutil.copytree(ROOT / "policies", folder)
    routes = (folder / "routes.yaml").read_text()
    (folder / "routes.yaml").write_text(routes.replace("box-office@1", usher_policy))
    if damage == "tampered":  # a published version edited in place: refused by its lock entry
        path = folder / "box-office" / "1.yaml"
        path.write_text(path.read_text().replace("box-office", "box-office ", 1))
    elif damage == "routes":
        (folder / "routes.yaml").write_text("clients: [this is not: a mapping\n")
    return name


def _swap(volume: Path, target: str) -> None:
    (volume / "..data_tmp").symlink_to(target)
    os.replace(volume / "..data_tmp", volume / "..data")


def test_symlink_swaps_under_traffic(tmp_path: Path) -> None:
    volume = tmp_path / "policies"
    volume.mkdir()
    first = _version_folder(volume, 0, "box-office@1", None)
    (volume / "..data").symlink_to(first)
    for entry in sorted((volume / first).iterdir()):
        (volume / entry.name).symlink_to(f"..data/{entry.name}")
    server = start_server(volume, workers=2, KEEPSET_RELOAD_POLL_SECONDS="0.2")
    statuses: Counter[int] = Counter()
    served: Counter[str] = Counter()
    stop = threading.Event()

    def traffic() -> None:
        with httpx.Client(base_url=server.base_url, timeout=10) as client:
            while not stop.is_set():
                r = client.post("/v1/pick", json={"logits": LOGITS}, headers=auth("usher-desk"))
                statuses[r.status_code] += 1
                if r.status_code == 200:
                    served[f"{r.json()['policy']}@{r.json()['version']}"] += 1

    threads = [threading.Thread(target=traffic) for _ in range(3)]
    for thread in threads:
        thread.start()
    try:
        # Good updates alternate the usher-desk route; every other update is broken.
        plan = [
            ("prompt-book@2", None),
            ("box-office@1", "tampered"),
            ("box-office@1", None),
            ("prompt-book@2", "routes"),
        ] * 5 + [("prompt-book@2", None), ("box-office@1", "tampered")]
        old = first
        for n, (policy, damage) in enumerate(plan, start=1):
            name = _version_folder(volume, n, policy, damage)
            _swap(volume, name)
            shutil.rmtree(volume / old)  # the kubelet removes the previous folder at once
            old = name
            time.sleep(0.4)
        time.sleep(1.0)  # a few polls on the final, broken, folder
        after = Counter(served)
        time.sleep(1.0)
    finally:
        stop.set()
        for thread in threads:
            thread.join(15)
    try:
        assert set(statuses) == {200}, statuses  # no valid request failed during 22 swaps
        assert set(served) == {"box-office@1", "prompt-book@2"}, served
        # The last update was broken: both workers keep serving the last good registry.
        assert served["prompt-book@2"] > after["prompt-book@2"]
        assert served["box-office@1"] == after["box-office@1"]
        metrics = httpx.get(f"{server.base_url}/metrics", timeout=5).text
        kept = [
            float(line.rsplit(" ", 1)[1])
            for line in metrics.splitlines()
            if line.startswith('keepset_registry_reloads_total{outcome="kept_last_good"}')
        ]
        assert kept and kept[0] >= 2  # broken updates were seen and refused
    finally:
        stop_server(server)

"""The built wheel works outside the checkout: what ``pip install keepset`` gives an operator
(the package, its bundled model) serves a registry and keys from the working directory."""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import time
import zipfile
from pathlib import Path

import httpx
from conftest import ROOT, auth, free_port


def test_wheel_serves_prompts_outside_the_checkout(tmp_path: Path) -> None:
    built = subprocess.run(
        [
            sys.executable,
            "-m",
            "pip",
            "wheel",
            "--no-deps",
            "-w",
            str(tmp_path / "dist"),
            str(ROOT),
        ],
        capture_output=True,
        text=True,
        timeout=300,
    )
    assert built.returncode == 0, built.stderr
    (wheel,) = (tmp_path / "dist").glob("keepset-*.whl")
    names = zipfile.ZipFile(wheel).namelist()
    for needed in ("model.onnx", "tokenizer.json", "model.json", "MODEL_CARD.md"):
        assert f"service/model/bundled/{needed}" in names
    assert not any(n.startswith(("tests/", "loadtest/", "policies/")) for n in names)

    site = tmp_path / "site"
    zipfile.ZipFile(wheel).extractall(site)
    # An operator's working directory: a registry and a keys file, nothing of the checkout.
    work = tmp_path / "srv"
    shutil.copytree(ROOT / "policies", work / "policies")
    (work / "deploy").mkdir()
    shutil.copy(ROOT / "deploy" / "demo-keys.yaml", work / "deploy" / "demo-keys.yaml")
    env = {
        **{k: v for k, v in os.environ.items() if not k.startswith("KEEPSET_")},
        "PYTHONPATH": str(site),  # ahead of the editable install of the checkout
        "KEEPSET_PORT": str(port := free_port()),
        "KEEPSET_LOG_LEVEL": "warning",
    }
    where = subprocess.run(
        [sys.executable, "-c", "import service; print(service.__file__)"],
        cwd=work,
        env=env,
        capture_output=True,
        text=True,
        timeout=60,
    )
    assert where.stdout.strip().startswith(str(site)), where.stdout + where.stderr

    log = (tmp_path / "serve.log").open("wb")
    server = subprocess.Popen(
        [sys.executable, "-m", "service.cli", "serve"], cwd=work, env=env, stdout=log, stderr=log
    )
    try:
        base = f"http://127.0.0.1:{port}"
        # A fresh install compiles the sampling kernel (about 30 s here) before it is ready.
        deadline = time.monotonic() + 120
        while True:
            assert server.poll() is None, (tmp_path / "serve.log").read_text()
            try:
                if httpx.get(f"{base}/readyz", timeout=1).status_code == 200:
                    break
            except httpx.HTTPError:
                pass
            assert time.monotonic() < deadline, (tmp_path / "serve.log").read_text()
            time.sleep(0.2)
        answer = httpx.post(
            f"{base}/v1/continue",
            json={"prompt": "Enter a messenger.", "seed": 1, "budget": 8},
            headers=auth("usher-desk"),
            timeout=30,
        )
        assert answer.status_code == 200, answer.text
        assert answer.json()["policy"] == "box-office"
    finally:
        server.terminate()
        server.wait(timeout=15)
        log.close()

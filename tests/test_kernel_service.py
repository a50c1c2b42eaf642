"""The service and its sampling path: readiness waits for the compiled kernel, both settings of
KEEPSET_SAMPLING_KERNEL answer the same, and a kernel that cannot be built leaves the numpy
path serving."""

from __future__ import annotations

import asyncio
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from conftest import ROOT, assert_same_pick, auth, in_process, wait_ready

from service import live as live_module
from service.keys import load_keyring
from service.live import Live, warm_kernel
from service.registry import load_registry
from service.settings import Settings


def _answers(registry: Path, kernel: str) -> list[dict[str, Any]]:
    rng = np.random.default_rng(11)
    logits = (rng.standard_normal((3, 5000)) * 3).astype(np.float32)
    answers = []
    with in_process(registry, sampling_kernel=kernel) as client:
        assert wait_ready(client) == 200
        assert client.app.state.live.kernel == kernel  # type: ignore[attr-defined]
        for who, seed in (("usher-desk", 5), ("prompt-book-app", 6), ("programme-desk", 7)):
            body = {
                "logits": logits.tolist(),
                "seed": seed,
                "routing_key": "row-a",
                "history": [[1, 2, 2, 40], [], [4999, 7]],
            }
            r = client.post("/v1/pick", json=body, headers=auth(who))
            assert r.status_code == 200, r.text
            answer = r.json()
            answer.pop("request_id")
            answers.append(answer)
    return answers


def test_compiled_and_numpy_settings_answer_the_same(registry: Path) -> None:
    # usher-desk's chain starts with top_k after a temperature (cut by the kernel); the
    # prompt-book arms start with a repetition penalty; programme-desk's with an occurrence
    # penalty; the routing key pins the arm, and history would feed the penalties.
    compiled = _answers(registry, "compiled")
    numpy_path = _answers(registry, "numpy")
    for a, b in zip(compiled, numpy_path, strict=True):
        assert_same_pick(a, b)


def _live(registry: Path, **settings: Any) -> Live:
    options = Settings(policies=registry, keys=ROOT / "deploy" / "demo-keys.yaml", **settings)
    return Live(settings=options, snapshot=load_registry(registry), keys=load_keyring(options.keys))


def test_readiness_waits_for_the_kernel(registry: Path) -> None:
    live = _live(registry)
    assert live.kernel == "numpy" and live.kernel_problem is not None  # until the warm-up
    asyncio.run(warm_kernel(live))
    assert live.kernel == "compiled" and live.kernel_problem is None
    with in_process(registry) as client:
        assert wait_ready(client) == 200
        client.app.state.live.kernel_problem = "the sampling kernel is compiling"  # type: ignore[attr-defined]
        r = client.get("/readyz")
        assert r.status_code == 503 and "compiling" in r.json()["detail"]


def test_a_kernel_that_fails_to_build_leaves_numpy_serving(
    registry: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    def broken() -> None:
        raise RuntimeError("LLVM could not compile")

    monkeypatch.setattr(live_module, "warm_up", broken)
    live = _live(registry)
    asyncio.run(warm_kernel(live))
    assert live.kernel == "numpy" and live.kernel_problem is None


def test_numpy_setting_never_compiles(registry: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    calls: list[int] = []
    monkeypatch.setattr(live_module, "warm_up", lambda: calls.append(1))
    live = _live(registry, sampling_kernel="numpy")
    asyncio.run(warm_kernel(live))
    assert calls == [] and live.kernel == "numpy" and live.kernel_problem is None


def test_read_only_and_writable_rows_give_identical_answers() -> None:
    # Request bodies arrive as read-only arrays, arrays made in process are writable; numba
    # would compile the kernel once for each and LLVM may sum them in a different order.
    from service.sampling import kernel, parse_chain, pick

    x = (np.random.default_rng(3).standard_normal((4, 3000)) * 3).astype(np.float32)
    body = np.frombuffer(x.tobytes(), np.float32).reshape(x.shape)
    assert not body.flags.writeable
    chain = parse_chain([{"temperature": 0.9}, {"top_k": 200}, {"typical": 0.95}])
    a, b = pick(chain, x, seed=1), pick(chain, body, seed=1)
    for field in ("tokens", "kept", "kept_mass", "entropy", "prob", "logprob"):
        np.testing.assert_array_equal(getattr(a, field), getattr(b, field), err_msg=field)
    assert len(kernel.pick_rows.signatures) == 1


def test_plans_die_with_their_chains() -> None:
    # A request with adjustments makes a chain of its own; its plan must not outlive it.
    import gc

    from service.sampling import compiled, parse_chain

    before = len(compiled._PLANS)
    chains = [parse_chain([{"temperature": 0.5 + i / 100}, {"top_k": 5}]) for i in range(50)]
    for chain in chains:
        assert compiled.plan_for(chain) is compiled.plan_for(chain)
    assert len(compiled._PLANS) == before + 50
    del chains, chain
    gc.collect()
    assert len(compiled._PLANS) == before


def test_wide_vectors_follow_the_host_and_keep_an_operators_choice() -> None:
    # The kernel asks numba for 512-bit vectors only on x86-64 CPUs with AVX-512, and never
    # overrides NUMBA_CPU_FEATURES when the operator has set it.
    import os
    import subprocess
    import sys

    from llvmlite import binding

    # The features of the code generator numba builds the kernel with (and keys its cache by).
    probe = (
        "import service.sampling; from numba.core.registry import cpu_target; "
        "print(cpu_target.target_context.codegen().magic_tuple()[2])"
    )
    env = {k: v for k, v in os.environ.items() if k != "NUMBA_CPU_FEATURES"}
    chosen = subprocess.run(
        [sys.executable, "-c", probe], env=env, capture_output=True, text=True, check=True
    ).stdout.strip()
    host = binding.get_host_cpu_features().flatten()
    if "+avx512f" in host.split(","):
        assert chosen == f"{host},-prefer-256-bit"
    else:
        assert chosen == host
    kept = subprocess.run(
        [sys.executable, "-c", probe],
        env={**env, "NUMBA_CPU_FEATURES": host},
        capture_output=True,
        text=True,
        check=True,
    ).stdout.strip()
    assert kept == host


@pytest.mark.parametrize("threads", [1, 2])
def test_large_batches_answer_the_in_process_pick(registry: Path, threads: int) -> None:
    # A batch over a million logits runs in a worker thread with one sampling thread, and on
    # the event loop thread plus the sampling pool with two: both give the in-process pick.
    from service.npy import to_npy
    from service.sampling import pick

    logits = (np.random.default_rng(4).standard_normal((10, 120_000)) * 3).astype(np.float32)
    chain = load_registry(registry).chain(("box-office", 1))  # what usher-desk is routed to
    with in_process(registry, sampling_threads=threads) as client:
        assert wait_ready(client) == 200
        headers = {**auth("usher-desk"), "Content-Type": "application/x-npy"}
        r = client.post("/v1/pick?seed=9", content=to_npy(logits), headers=headers)
    assert r.status_code == 200, r.text
    assert r.json()["tokens"] == pick(chain, logits, seed=9).tokens.tolist()

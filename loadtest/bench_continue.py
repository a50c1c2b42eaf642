"""Benchmark of the prompt path: ``POST /v1/continue`` against a bare onnxruntime loop.

All in one run, on the bundled model with one onnxruntime thread everywhere:

- **bare loop**: onnxruntime alone, key/value cache, greedy argmax, no tokenizer work after the
  prompt: the floor any prompt path on this model pays;
- **policy work alone**: the ``StepPicker`` a continuation calls, on the recorded logits rows
  of a continuation, per token;
- **in process**: :class:`service.prompting.PromptRun` (model + policy + detokenizer), no HTTP;
- **keepset over HTTP**: a real ``keepset serve`` (one worker) on 127.0.0.1, one client sending
  ``/v1/continue`` requests one after another, plain JSON answers, and the same request
  streamed (Server-Sent Events, every step read as it comes); the repeats are spread over
  ``--servers`` server processes started one after another, as a process's own speed varies.

The policies come from a private registry with two bench policies that never stop early (the end
token is banned and there is no stop text), so every request produces exactly ``budget`` tokens:
``bench-greedy`` and ``bench-chain`` (the prompt-book demo chain: repetition penalty,
temperature 0.9, top_k 200, typical 0.95). Every loop is bounded in count and time.

    .venv/bin/python loadtest/bench_continue.py [--budget 128] [--repeats 25] [--servers 5]
        [--out FILE]
"""

from __future__ import annotations

import argparse
import http.client
import json
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import numpy as np
from bench_http import start_keepset

from service.keys import load_keyring
from service.model import BUNDLED, Model
from service.prompting import PromptRun
from service.sampling import StepPicker, parse_chain

ROOT = Path(__file__).resolve().parents[1]
KEY = "demo-usher-desk-key"
PROMPT = "Enter the porter, with a lantern. PORTER. Here's a knocking indeed! If a man"
CHAINS: dict[str, list[dict[str, Any]]] = {
    "bench-greedy": [{"ban": [0]}, {"greedy": True}],
    "bench-chain": [
        {"ban": [0]},
        {"repetition_penalty": {"factor": 1.15, "window": 64}},
        {"temperature": 0.9},
        {"top_k": 200},
        {"typical": 0.95},
    ],
}


def bare_loop(model: Model, budget: int) -> float:
    """Seconds for ``budget`` greedy tokens with onnxruntime and the cache, nothing else: the
    same ``budget`` model calls as a continuation (the prompt, then every token but the last)."""
    ids = model.text_ids(PROMPT)
    started = time.perf_counter()
    logits, past = model.forward(np.asarray([ids], np.int64), model.empty_cache())
    token = int(np.argmax(logits[0, -1]))
    for _ in range(budget - 1):
        logits, past = model.forward(np.asarray([[token]], np.int64), past)
        token = int(np.argmax(logits[0, -1]))
    return time.perf_counter() - started


def in_process(model: Model, name: str, budget: int, seed: int) -> tuple[float, PromptRun]:
    run = PromptRun(model, parse_chain(CHAINS[name]), PROMPT, budget=budget, seed=seed)
    started = time.perf_counter()
    steps = sum(1 for _ in run)
    elapsed = time.perf_counter() - started
    assert steps == budget, (name, steps)
    return elapsed, run


def policy_alone(model: Model, name: str, budget: int, repeats: int) -> float:
    """Median seconds per token of the policy alone (the ``StepPicker`` a continuation calls),
    on the rows a real continuation produced, one after another (warm caches: inside a
    continuation each pick follows a model call and takes longer)."""
    chain = parse_chain(CHAINS[name])
    run = PromptRun(model, chain, PROMPT, budget=budget, seed=3, keep_logits=True)
    for _ in run:
        pass
    assert run.logits is not None
    picker = StepPicker(chain, model.info.vocab_size, 3)
    times = []
    for _ in range(repeats):
        started = time.perf_counter()
        for t, (row, history) in enumerate(zip(run.logits, run.histories, strict=True)):
            picker(row, history, t)
        times.append((time.perf_counter() - started) / len(run.logits))
    return statistics.median(times)


def bench_registry(folder: Path, budget: int) -> None:
    """A copy of the demo registry with the bench policies published and routed to usher-desk."""
    shutil.copytree(ROOT / "policies", folder)
    for name, chain in CHAINS.items():
        (folder / name).mkdir()
        policy = {
            "name": name,
            "version": 1,
            "owner": "bench",
            "summary": "Benchmark policy: never stops before its budget.",
            "chain": chain,
            "min_keep": 1,
            "fallback": "greedy",
            "budget": budget,
            "stop": [],
            "expect": {"kept_median_min": 1},
        }
        (folder / name / "1.yaml").write_text(json.dumps(policy, indent=1))  # JSON is YAML
        subprocess.run(
            [sys.executable, "-m", "service.cli", "policy", "publish", str(folder), name],
            check=True,
            capture_output=True,
        )


def start_server(registry: Path, name: str) -> tuple[subprocess.Popen[bytes], int]:
    demo_routes = (ROOT / "policies" / "routes.yaml").read_text()
    (registry / "routes.yaml").write_text(demo_routes.replace("box-office@1", f"{name}@1"))
    return start_keepset(
        1,
        KEEPSET_POLICIES=str(registry),
        KEEPSET_RELOAD_POLL_SECONDS="0",
        KEEPSET_MODEL_THREADS="1",
    )


def one_http_request(conn: http.client.HTTPConnection, name: str, budget: int, seed: int) -> float:
    headers = {"Authorization": f"Bearer {KEY}", "Content-Type": "application/json"}
    body = json.dumps({"prompt": PROMPT, "seed": seed, "budget": budget})
    started = time.perf_counter()
    conn.request("POST", "/v1/continue", body=body, headers=headers)
    response = conn.getresponse()
    answer = json.loads(response.read())
    elapsed = time.perf_counter() - started
    assert response.status == 200, answer
    assert answer["policy"] == name and len(answer["tokens"]) == budget, answer
    return elapsed


def one_streamed_request(
    conn: http.client.HTTPConnection, name: str, budget: int, seed: int
) -> float:
    """Seconds for a streamed continuation: every step event read as it comes, to ``done``."""
    headers = {"Authorization": f"Bearer {KEY}", "Content-Type": "application/json"}
    body = json.dumps({"prompt": PROMPT, "seed": seed, "budget": budget, "stream": True})
    started = time.perf_counter()
    conn.request("POST", "/v1/continue", body=body, headers=headers)
    response = conn.getresponse()
    assert response.status == 200, response.read()
    steps, event = 0, ""
    while True:
        line = response.readline()
        assert line, "the stream ended before its done event"
        if line.startswith(b"event: "):
            event = line[7:].strip().decode()
            steps += event == "step"
        elif line.startswith(b"data: ") and event == "done":
            done = json.loads(line[6:])
            break
    response.read()  # the end of the chunked body, so the connection can be reused
    elapsed = time.perf_counter() - started
    assert done["policy"] == name and steps == budget, (done, steps)
    return elapsed


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--budget", type=int, default=128)
    # Nine repeats left the medians 10 points apart from run to run on this machine; 25 agree
    # within a few.
    parser.add_argument("--repeats", type=int, default=25)
    parser.add_argument("--servers", type=int, default=5, help="server processes, one at a time")
    parser.add_argument("--out", type=Path, default=ROOT / "loadtest/results/continue.json")
    args = parser.parse_args()
    budget, repeats = args.budget, args.repeats
    assert load_keyring(ROOT / "deploy" / "demo-keys.yaml").identify(KEY) is not None

    model = Model(BUNDLED, threads=1)
    # This machine's speed drifts by tens of percent over minutes, so every repeat times the
    # bare loop, the in-process run and the HTTP request back to back, and the ratios are
    # taken per repeat before the median. A server process can also run the model a few
    # percent slower or faster than the bench's own for the whole of its life (where its
    # memory landed: one in five here gave an HTTP figure 4 points off the others), so the
    # repeats are spread over ``--servers`` processes, started one after another.
    samples: dict[str, dict[str, list[float]]] = {n: {} for n in CHAINS}
    per_server: dict[str, list[tuple[float, float]]] = {n: [] for n in CHAINS}
    servers = max(1, min(args.servers, repeats))
    rounds = [len(part) for part in np.array_split(np.arange(repeats), servers)]
    repeat = 0
    with tempfile.TemporaryDirectory(prefix="keepset-bench-") as tmp:
        for name in CHAINS:
            bench_registry(Path(tmp) / name / "policies", budget)
        for count in rounds:
            servers: dict[str, tuple[subprocess.Popen[bytes], int]] = {}
            try:
                for name in CHAINS:
                    servers[name] = start_server(Path(tmp) / name / "policies", name)
                conns = {
                    name: http.client.HTTPConnection("127.0.0.1", port, timeout=60)
                    for name, (_, port) in servers.items()
                }
                for name in CHAINS:  # warm-up: first model calls, first request per server
                    bare_loop(model, budget)
                    in_process(model, name, budget, 0)
                    one_http_request(conns[name], name, budget, 0)
                    one_streamed_request(conns[name], name, budget, 0)
                mine: dict[str, tuple[list[float], list[float]]] = {n: ([], []) for n in CHAINS}
                for _ in range(count):
                    for name in CHAINS:
                        bare = bare_loop(model, budget)
                        local = in_process(model, name, budget, repeat)[0]
                        served = one_http_request(conns[name], name, budget, repeat)
                        streamed = one_streamed_request(conns[name], name, budget, repeat)
                        got = samples[name]
                        for key, value in (
                            ("bare", bare),
                            ("local", local),
                            ("http", served),
                            ("stream", streamed),
                            ("local_ratio", local / bare),
                            ("http_ratio", served / bare),
                            ("stream_ratio", streamed / bare),
                        ):
                            got.setdefault(key, []).append(value)
                        mine[name][0].append(served / bare)
                        mine[name][1].append(streamed / bare)
                    repeat += 1
                for name, (http_ratios, stream_ratios) in mine.items():
                    per_server[name].append(
                        (statistics.median(http_ratios) - 1, statistics.median(stream_ratios) - 1)
                    )
                for conn in conns.values():
                    conn.close()
            finally:
                for proc, _ in servers.values():
                    proc.terminate()
                    proc.wait(timeout=15)
    results: dict[str, Any] = {"budget": budget, "repeats": repeats, "policies": {}}
    for name, got in samples.items():
        median = {key: statistics.median(values) for key, values in got.items()}
        results["policies"][name] = {
            "policy_ms_per_token": policy_alone(model, name, budget, repeats) * 1e3,
            "bare_tokens_per_s": budget / median["bare"],
            "in_process_tokens_per_s": budget / median["local"],
            "http_tokens_per_s": budget / median["http"],
            "in_process_slower_than_bare": median["local_ratio"] - 1,
            "http_slower_than_bare": median["http_ratio"] - 1,
            "streamed_tokens_per_s": budget / median["stream"],
            "streamed_slower_than_bare": median["stream_ratio"] - 1,
            "http_slower_per_server": [h for h, _ in per_server[name]],
            "streamed_slower_per_server": [t for _, t in per_server[name]],
        }
    print(
        f"budget {budget} tokens, one client, median of {repeats} interleaved repeats "
        f"over {len(rounds)} server processes"
    )
    print(
        f"{'policy':<14}{'bare tok/s':>11}{'in-process':>11}{'HTTP':>7}"
        f"{'streamed':>9}{'in-process vs bare':>20}{'HTTP vs bare':>14}{'streamed vs bare':>18}"
        f"{'policy ms/token':>17}"
    )
    for name, row in results["policies"].items():
        print(
            f"{name:<14}{row['bare_tokens_per_s']:>11.0f}{row['in_process_tokens_per_s']:>11.0f}"
            f"{row['http_tokens_per_s']:>7.0f}{row['streamed_tokens_per_s']:>9.0f}"
            f"{row['in_process_slower_than_bare'] * 100:>19.1f}%"
            f"{row['http_slower_than_bare'] * 100:>13.1f}%"
            f"{row['streamed_slower_than_bare'] * 100:>17.1f}%{row['policy_ms_per_token']:>17.3f}"
        )
    for name, row in results["policies"].items():
        spread = ", ".join(
            f"{h * 100:.1f}/{t * 100:.1f}"
            for h, t in zip(
                row["http_slower_per_server"], row["streamed_slower_per_server"], strict=True
            )
        )
        print(f"{name}: HTTP/streamed % slower per server process: {spread}")
    args.out.parent.mkdir(parents=True, exist_ok=True)
    args.out.write_text(json.dumps(results, indent=2) + "\n")


if __name__ == "__main__":
    main()

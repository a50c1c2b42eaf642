"""Capture shards made the way the service serves rows: seeded synthetic logits (stored as
float16, so a replay sees exactly the logits that were sampled), each request's rows drawn by
the real sampler with the request's seed and streams 0, 1, ... (the rows of a ``/v1/pick``
batch, or the steps of a continuation)."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from service.registry import RegistrySnapshot
from service.sampling import pick
from service.shards import DTYPES, SOURCE_CONTINUE, SOURCE_PICK, Shard, write_shard


@dataclass(frozen=True)
class Request:
    policy: tuple[str, int]
    arm: str
    seed: int
    logits: np.ndarray  # float16 [B, V]
    histories: list[list[int]]
    source: int


def synthetic_logits(rng: np.random.Generator, rows: int, vocab: int) -> np.ndarray:
    """Rows from sharp to flat: Gaussian logits with a per-row spread, so kept sizes vary."""
    spread = rng.uniform(0.5, 4.0, size=(rows, 1))
    return (rng.standard_normal((rows, vocab)) * spread).astype(np.float16)


def synthetic_traffic(
    rng: np.random.Generator,
    arms: Sequence[tuple[tuple[str, int], str]],
    requests: int,
    vocab: int,
) -> list[Request]:
    """Requests spread over ``arms`` in turn: pick batches of 1-3 rows and continuations of
    2-6 steps (a continuation's history grows by the step's own earlier tokens' stand-ins)."""
    out = []
    for r in range(requests):
        policy, arm = arms[r % len(arms)]
        continuation = r % 3 == 2
        n = int(rng.integers(2, 7) if continuation else rng.integers(1, 4))
        base = rng.integers(0, vocab, size=int(rng.integers(0, 6))).tolist()
        histories = [base + list(range(t)) for t in range(n)] if continuation else [base] * n
        out.append(
            Request(
                policy,
                arm,
                int(rng.integers(0, 2**53)),
                synthetic_logits(rng, n, vocab),
                histories,
                SOURCE_CONTINUE if continuation else SOURCE_PICK,
            )
        )
    return out


def served_shard(
    snapshot: RegistrySnapshot, client: str, traffic: Sequence[Request], vocab: int = 16
) -> Shard:
    """The shard the capture would hold for ``traffic``: each request served by its policy's
    chain with the real sampler (``vocab`` sizes an empty shard)."""
    columns: dict[str, list[object]] = {
        k: []
        for k in [
            "seed",
            "stream",
            "source",
            "request_id",
            "policy",
            "arm",
            "version",
            "token",
            "kept",
            "entropy",
            "kept_mass",
            "prob",
            "logprob",
            "fallback",
            "time",
        ]
    }
    histories: list[list[int]] = []
    for i, req in enumerate(traffic):
        rows = req.logits.astype(np.float32)
        out = pick(snapshot.chain(req.policy), rows, req.seed, req.histories, first_stream=0)
        for b in range(rows.shape[0]):
            columns["seed"].append(req.seed)
            columns["stream"].append(b)
            columns["source"].append(req.source)
            columns["request_id"].append(f"req-{i}")
            columns["policy"].append(req.policy[0])
            columns["arm"].append(req.arm)
            columns["version"].append(req.policy[1])
            columns["token"].append(int(out.tokens[b]))
            columns["kept"].append(int(out.kept[b]))
            columns["entropy"].append(float(out.entropy[b]))
            columns["kept_mass"].append(float(out.kept_mass[b]))
            columns["prob"].append(float(out.prob[b]))
            columns["logprob"].append(float(out.logprob[b]))
            columns["fallback"].append(out.fallback[b] or "")
            columns["time"].append(1_800_000_000.0 + i)
        histories += req.histories
    lengths = [len(h) for h in histories]
    arrays = {
        k: np.array(v, dtype=DTYPES[k]) if k in DTYPES else np.array(v, dtype=str)
        for k, v in columns.items()
    }
    return Shard(
        client=client,
        logits=np.concatenate([r.logits for r in traffic])
        if traffic
        else np.zeros((0, vocab), np.float16),
        history=np.array([t for h in histories for t in h], dtype=np.int32),
        history_offsets=np.concatenate(([0], np.cumsum(lengths))).astype(np.int64),
        **arrays,  # type: ignore[arg-type]
    )


def write_capture(
    folder: Path,
    snapshot: RegistrySnapshot,
    arms: Sequence[tuple[tuple[str, int], str]],
    *,
    shards: int = 2,
    requests: int = 40,
    vocab: int = 512,
    seed: int = 0,
) -> list[Path]:
    """``shards`` shard files of synthetic traffic under ``folder``; their paths."""
    rng = np.random.default_rng(seed)
    folder.mkdir(parents=True, exist_ok=True)
    paths = []
    for s in range(shards):
        traffic = synthetic_traffic(rng, arms, requests, vocab)
        path = folder / f"shard-{s:03d}.npz"
        write_shard(path, served_shard(snapshot, "prompt-book-app", traffic))
        paths.append(path)
    return paths

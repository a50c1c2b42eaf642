"""Benchmark of the sampling core: keepset against a sort-based reference and one exp pass.

For each vocabulary size V and batch size B it times, in the same run and on the same rows:
keepset's ``pick`` for the chain [temperature 0.8, top_k 50, top_p 0.9, typical 0.95,
min_p 0.02] and for each of those stages alone; the plain sort-based reference of the test
suite (tests/sampling_reference.py, which sorts the whole vocabulary for every stage); and one
``np.exp`` pass over the rows, the cheapest thing that touches every logit once. It prints a
table of median microseconds per row and writes the figures as JSON.

    .venv/bin/python loadtest/bench_sampling.py [--quick] [--out loadtest/results/sampling.json]
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import sys
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))
from sampling_reference import reference_row

from service.sampling import parse_chain, pick

CHAIN: list[dict[str, Any]] = [
    {"temperature": 0.8},
    {"top_k": 50},
    {"top_p": 0.9},
    {"typical": 0.95},
    {"min_p": 0.02},
]
CASES: dict[str, list[dict[str, Any]]] = {"chain": CHAIN} | {
    next(iter(stage)): [stage] for stage in CHAIN
}


def median_seconds(fn: Callable[[], object], budget: float, min_runs: int = 5) -> float:
    fn()  # warm-up
    times: list[float] = []
    start = time.perf_counter()
    while len(times) < min_runs or (time.perf_counter() - start < budget and len(times) < 200):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return float(np.median(times))


def logits(batch: int, vocab: int, seed: int) -> np.ndarray:
    # Heavy-tailed like a language model's logits: a few strong candidates above a broad floor.
    rng = np.random.default_rng(seed)
    x = rng.standard_normal((batch, vocab)).astype(np.float32) * 2.0
    x += rng.gumbel(size=(batch, vocab)).astype(np.float32) * 1.5
    return x


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="smaller sizes, for a smoke run")
    parser.add_argument("--out", type=Path, default=Path("loadtest/results/sampling.json"))
    args = parser.parse_args()
    vocabs = [32_000] if args.quick else [32_000, 128_256, 256_000]
    batches = [1, 8] if args.quick else [1, 8, 32]
    budget = 0.2 if args.quick else 0.6
    results: list[dict[str, Any]] = []
    print(
        f"{'V':>7} {'B':>3} {'case':>11} {'keepset us/row':>15} {'reference':>11} "
        f"{'exp pass':>9} {'ref/keepset':>12} {'keepset/exp':>12}"
    )
    for vocab in vocabs:
        reference_rows = logits(2, vocab, seed=vocab + 1)
        ref_cost: dict[str, float] = {}
        for name, stages in CASES.items():
            per_row = [
                median_seconds(lambda r=r, s=stages: reference_row(s, 1, r), budget=0.0, min_runs=3)
                for r in reference_rows
            ]
            ref_cost[name] = float(np.mean(per_row))
        for batch in batches:
            x = logits(batch, vocab, seed=vocab * 7 + batch)
            out = np.empty_like(x)  # allocating in the timed pass would time page faults too
            exp_cost = median_seconds(lambda x=x, out=out: np.exp(x, out=out), budget) / batch
            for name, stages in CASES.items():
                chain = parse_chain(stages)
                cost = median_seconds(lambda c=chain, x=x: pick(c, x, seed=1), budget) / batch
                row = {
                    "vocab": vocab,
                    "batch": batch,
                    "case": name,
                    "keepset_us_per_row": cost * 1e6,
                    "reference_us_per_row": ref_cost[name] * 1e6,
                    "exp_pass_us_per_row": exp_cost * 1e6,
                    "reference_over_keepset": ref_cost[name] / cost,
                    "keepset_over_exp": cost / exp_cost,
                }
                results.append(row)
                print(
                    f"{vocab:>7} {batch:>3} {name:>11} {cost * 1e6:>15.0f} "
                    f"{ref_cost[name] * 1e6:>11.0f} {exp_cost * 1e6:>9.0f} "
                    f"{row['reference_over_keepset']:>11.1f}x {row['keepset_over_exp']:>11.2f}x"
                )
    args.out.parent.mkdir(parents=True, exist_ok=True)
    meta = {
        "python": platform.python_version(),
        "numpy": np.__version__,
        "cpus": os.cpu_count(),
        "machine": platform.machine(),
    }
    args.out.write_text(json.dumps({"meta": meta, "results": results}, indent=2) + "\n")
    print(f"wrote {args.out}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

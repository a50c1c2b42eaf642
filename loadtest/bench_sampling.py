"""Benchmark of the sampling core: the compiled kernel, the numpy path, the sort-based reference
and one exp pass, in one interleaved run.

For each vocabulary size V and batch size B it times, on the same rows: ``pick`` on the
compiled kernel and on the numpy path for the chain [temperature 0.8, top_k 50, top_p 0.9,
typical 0.95, min_p 0.02], with ``--threads`` sampling threads (2 by default: rows in
parallel); the plain sort-based reference of the test suite (tests/sampling_reference.py, which
sorts the whole vocabulary for every stage; timed on two rows per V, it is per row anyway); and
one ``np.exp`` pass over one row, the cheapest thing that touches every logit once. This
machine's speed drifts by tens of percent between minutes, so each repeat times every path back
to back and the ratios are taken per repeat; the table shows medians over the repeats.

    .venv/bin/python loadtest/bench_sampling.py [--quick] [--repeats 7] [--threads 2]
"""

from __future__ import annotations

import argparse
import sys
import time
from collections.abc import Callable
from functools import partial
from pathlib import Path
from typing import Any

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))
sys.path.insert(0, str(Path(__file__).resolve().parent))
from bench_http import write_results
from sampling_reference import reference_row

from service.sampling import parse_chain, pick, warm_up

CHAIN: list[dict[str, Any]] = [
    {"temperature": 0.8},
    {"top_k": 50},
    {"top_p": 0.9},
    {"typical": 0.95},
    {"min_p": 0.02},
]


def seconds(fn: Callable[[], object], calls: int) -> float:
    """Median wall time of ``calls`` calls."""
    times = []
    for _ in range(calls):
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
    parser.add_argument("--repeats", type=int, default=7)
    parser.add_argument("--threads", type=int, default=2)
    parser.add_argument("--out", type=Path, default=Path("loadtest/results/sampling.json"))
    args = parser.parse_args()
    vocabs = [32_000] if args.quick else [32_000, 128_256, 256_000]
    batches = [1, 8] if args.quick else [1, 8, 32, 128]
    chain = parse_chain(CHAIN)
    warm_up()
    results: list[dict[str, Any]] = []
    print(
        f"{'V':>7} {'B':>4} {'compiled':>9} {'numpy':>8} {'reference':>10} {'exp pass':>9}"
        f" {'compiled/exp':>13} {'ref/compiled':>13} {'numpy/compiled':>15}   (us per row)"
    )
    for vocab in vocabs:
        ref_rows = logits(2, vocab, seed=vocab + 1)
        reference = float(
            np.mean([seconds(lambda r=r: reference_row(CHAIN, 1, r), 3) for r in ref_rows])
        )
        for batch in batches:
            x = logits(batch, vocab, seed=vocab * 7 + batch)
            out = np.empty_like(x[0])  # allocating in the timed pass would time page faults too
            calls = max(3, min(40, 4000 // batch))
            runs: dict[str, list[float]] = {"compiled": [], "numpy": [], "exp": []}
            for _ in range(args.repeats):
                for kernel in ("compiled", "numpy"):
                    fn = partial(pick, chain, x, seed=1, threads=args.threads, kernel=kernel)
                    fn()
                    runs[kernel].append(seconds(fn, calls) / batch)
                runs["exp"].append(seconds(partial(np.exp, x[0], out=out), calls * 2))
            c, n, e = (np.array(runs[k]) for k in ("compiled", "numpy", "exp"))
            row = {
                "vocab": vocab,
                "batch": batch,
                "threads": args.threads,
                "compiled_us_per_row": float(np.median(c)) * 1e6,
                "numpy_us_per_row": float(np.median(n)) * 1e6,
                "reference_us_per_row": reference * 1e6,
                "exp_pass_us_per_row": float(np.median(e)) * 1e6,
                "compiled_over_exp": float(np.median(c / e)),
                "reference_over_compiled": float(np.median(reference / c)),
                "numpy_over_compiled": float(np.median(n / c)),
            }
            results.append(row)
            print(
                f"{vocab:>7} {batch:>4} {row['compiled_us_per_row']:>9.0f}"
                f" {row['numpy_us_per_row']:>8.0f} {row['reference_us_per_row']:>10.0f}"
                f" {row['exp_pass_us_per_row']:>9.0f} {row['compiled_over_exp']:>12.2f}x"
                f" {row['reference_over_compiled']:>12.1f}x {row['numpy_over_compiled']:>14.1f}x"
            )
    results += special_rows(vocabs[-1] if args.quick else 128_256, args.repeats)
    write_results(args.out, results)
    return 0


def special_rows(vocab: int, repeats: int) -> list[dict[str, Any]]:
    """One row of ``vocab`` in shapes that break a naive cut: masked with -inf or with -1e9 but
    for 10 ids (constrained decoding), and the chain behind a ban of 47 % of the vocabulary."""
    rng = np.random.default_rng(5)
    plain = logits(1, vocab, seed=11)
    allowed = rng.choice(vocab, 10, replace=False)
    masked_inf = np.full_like(plain, -np.inf)
    masked_inf[0, allowed] = plain[0, allowed]
    masked_big = np.full_like(plain, -1e9)
    masked_big[0, allowed] = plain[0, allowed]
    banned = [int(t) for t in rng.permutation(vocab)[: vocab * 47 // 100]]
    cases = [
        ("plain row", CHAIN, plain),
        ("masked with -inf but 10 ids", CHAIN, masked_inf),
        ("masked with -1e9 but 10 ids", CHAIN, masked_big),
        (f"ban of {len(banned)} ids first", [{"ban": banned}, *CHAIN], plain),
    ]
    print(f"\nV = {vocab}, one row, chain as above (us per row):")
    print(f"{'case':<34} {'compiled':>9} {'numpy':>9}")
    rows = []
    for name, stages, x in cases:
        chain = parse_chain(stages)
        times = {}
        for kernel in ("compiled", "numpy"):
            fn = partial(pick, chain, x, seed=1, kernel=kernel)
            fn()
            times[kernel] = float(np.median([seconds(fn, 10) for _ in range(repeats)])) * 1e6
        print(f"{name:<34} {times['compiled']:>9.0f} {times['numpy']:>9.0f}")
        rows.append({"vocab": vocab, "case": name, **{f"{k}_us": v for k, v in times.items()}})
    return rows


if __name__ == "__main__":
    raise SystemExit(main())

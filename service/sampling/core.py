"""Applying a chain to a batch of logits: the kept set, the final distribution, the draw.

The rules are those of DESIGN.md section 1. Each row is worked on lazily: while every finite
token still survives, the working logits are the raw float32 row divided by the accumulated
temperature plus a few sparse edits (penalties, biases, bans), so nothing of vocabulary size is
copied. Stages that only rank tokens (top_k, min_p, greedy) run on the raw row through exact
threshold selection; stages that need the whole renormalised distribution (top_p, typical,
epsilon, eta) first materialise the survivors in float64. From the first truncation on, the row
is a small set of candidate ids with float64 working logits, and everything after is cheap.
"""

from __future__ import annotations

import math
import os
import secrets
from collections import Counter
from collections.abc import Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from service.sampling.chain import Chain, OccurrencePenalty, RepetitionPenalty, Stage
from service.sampling.select import shortest_prefix, top_positions

# Fresh seeds stay below 2**53 so that any JSON client can echo them back exactly.
_FRESH_SEED_BITS = 53
# Rows are shared between threads only when a batch is at least this large in total.
_PARALLEL_MIN_ELEMENTS = 1 << 18

F32 = NDArray[np.float32]
F64 = NDArray[np.float64]
IntArray = NDArray[np.intp]


class InputError(ValueError):
    """Logits or history that cannot be sampled. ``reason`` is a stable machine-readable tag:
    ``shape``, ``dtype``, ``no_finite``, ``token_range``, ``history``, ``seed``."""

    def __init__(self, reason: str, message: str):
        super().__init__(message)
        self.reason = reason


@dataclass(frozen=True)
class PickResult:
    """What ``pick`` chose for each row, with the per-row diagnostics of DESIGN.md section 1."""

    tokens: NDArray[np.int64]
    kept: NDArray[np.int64]
    kept_mass: F64
    entropy: F64
    prob: F64
    logprob: F64
    fallback: list[str | None]
    seed: int


@dataclass
class _Row:
    """One row while the chain runs. ``cand is None`` means every finite raw token survives,
    with working logit ``raw[i] / temp`` unless ``edits`` overrides it."""

    raw: F32
    temp: float
    edits: dict[int, float]
    cand: IntArray | None = None
    w: F64 | None = None


@dataclass(frozen=True)
class _Decision:
    ids: IntArray  # kept token ids, ascending
    probs: F64  # final probabilities of ``ids``
    fallback: str | None


def pick(
    chain: Chain,
    logits: NDArray[np.floating] | Sequence[float] | Sequence[Sequence[float]],
    seed: int | None = None,
    history: Sequence[Sequence[int]] | None = None,
    *,
    first_stream: int = 0,
    threads: int | None = None,
) -> PickResult:
    """Draw one token per row under ``chain``.

    ``logits`` is ``[V]`` or ``[B, V]`` (float16/32/64; worked on as float32). Row ``b`` draws
    from its own stream, the ``first_stream + b``-th double of PCG64 seeded with ``seed``, so a
    row's token depends only on its logits, its history, the chain and (seed, stream). Without a
    seed a fresh one is made; ``PickResult.seed`` always says which seed was used.
    """
    rows = as_batch(logits)
    if seed is None:
        seed = secrets.randbits(_FRESH_SEED_BITS)
    _check_seed(seed)
    histories = _histories(history, rows.shape)
    _check_token_ids(chain, rows.shape[1])
    uniforms = _uniforms(seed, first_stream, rows.shape[0])
    decided = _run_rows(chain, rows, histories, threads)
    n = rows.shape[0]
    tokens = np.empty(n, np.int64)
    kept = np.empty(n, np.int64)
    kept_mass = np.empty(n)
    entropy = np.empty(n)
    prob = np.empty(n)
    logprob = np.empty(n)
    fallback: list[str | None] = []
    for b, (decision, diag) in enumerate(decided):
        cdf = np.cumsum(decision.probs)
        at = min(int(np.searchsorted(cdf, uniforms[b] * cdf[-1], side="right")), cdf.size - 1)
        token = int(decision.ids[at])
        tokens[b], kept[b], prob[b] = token, decision.ids.size, decision.probs[at]
        entropy[b] = diag.entropy
        kept_mass[b] = diag.mass_of(decision.ids)
        logprob[b] = diag.logprob(token)
        fallback.append(decision.fallback)
    return PickResult(tokens, kept, kept_mass, entropy, prob, logprob, fallback, seed)


def final_distribution(
    chain: Chain,
    logits: NDArray[np.floating] | Sequence[float] | Sequence[Sequence[float]],
    history: Sequence[Sequence[int]] | None = None,
) -> F64:
    """The distribution ``pick`` draws from: float64 ``[B, V]``, zero outside the kept set."""
    rows = as_batch(logits)
    histories = _histories(history, rows.shape)
    _check_token_ids(chain, rows.shape[1])
    out = np.zeros(rows.shape, np.float64)
    for b, (decision, _) in enumerate(_run_rows(chain, rows, histories, threads=1)):
        out[b, decision.ids] = decision.probs
    return out


def as_batch(logits: NDArray[np.floating] | Sequence[float] | Sequence[Sequence[float]]) -> F32:
    """Logits as a float32 ``[B, V]`` array, or InputError saying what is wrong."""
    if isinstance(logits, np.ndarray):
        if logits.dtype.kind != "f":
            raise InputError("dtype", f"logits must be floating point, got dtype {logits.dtype}")
        arr = logits
    else:
        try:
            arr = np.asarray(logits, dtype=np.float32)
        except (ValueError, TypeError) as exc:
            raise InputError(
                "shape", f"logits must be a list of numbers or of rows: {exc}"
            ) from None
    if arr.ndim == 1:
        arr = arr[None, :]
    if arr.ndim != 2 or arr.shape[0] < 1 or arr.shape[1] < 1:
        raise InputError("shape", f"logits must have shape [V] or [B, V], got {list(arr.shape)}")
    return np.ascontiguousarray(arr, dtype=np.float32)


# --- per-row work --------------------------------------------------------------------------


@dataclass(frozen=True)
class _Diagnostics:
    """Raw-model quantities of one row (softmax of the finite raw logits at T = 1)."""

    raw: F32
    log_norm: float  # log of the raw softmax normaliser, including the max shift
    entropy: float

    def logprob(self, token: int) -> float:
        return float(self.raw[token]) - self.log_norm

    def mass_of(self, ids: IntArray) -> float:
        return float(np.exp(self.raw[ids].astype(np.float64) - self.log_norm).sum())


def _diagnostics(raw: F32, top: float) -> _Diagnostics:
    # One float32 exp pass with float64 totals: these numbers are reported, never compared
    # against a threshold, so float32 terms (relative error ~1e-7) are accurate enough.
    shifted = raw - np.float32(top)
    e = np.exp(shifted)
    z = float(e.sum(dtype=np.float64))
    with np.errstate(invalid="ignore"):
        s = float(np.dot(e, shifted))
    if not math.isfinite(s):  # -inf entries give 0 * -inf; they carry no mass
        s = float(np.dot(e, np.where(e > 0, shifted, np.float32(0))))
    return _Diagnostics(raw, top + math.log(z), math.log(z) - s / z)


def _run_rows(
    chain: Chain, rows: F32, histories: list[list[int]], threads: int | None
) -> list[tuple[_Decision, _Diagnostics]]:
    n = rows.shape[0]
    workers = _thread_count(threads, rows.size, n)
    if workers == 1:
        return [_decide_row(chain, rows[b], histories[b]) for b in range(n)]
    # NumPy releases the GIL inside the vocabulary-sized passes, so rows overlap well.
    chunks = [range(i, n, workers) for i in range(workers)]

    def run(chunk: range) -> list[tuple[int, tuple[_Decision, _Diagnostics]]]:
        return [(b, _decide_row(chain, rows[b], histories[b])) for b in chunk]

    results: list[tuple[_Decision, _Diagnostics] | None] = [None] * n
    for part in _pool(workers).map(run, chunks):
        for b, value in part:
            results[b] = value
    return [r for r in results if r is not None]


def _decide_row(chain: Chain, raw: F32, history: list[int]) -> tuple[_Decision, _Diagnostics]:
    top = float(raw.max())
    reason: str | None = None
    if not math.isfinite(top):  # NaN propagates through max; +inf is the max
        raw = np.where(np.isfinite(raw), raw, np.float32(-np.inf))
        top = float(raw.max())
        reason = "non_finite"
        if top == -math.inf:
            raise InputError("no_finite", "a row has no finite logit")
    elif top == -math.inf:
        raise InputError("no_finite", "a row has no finite logit")
    diag = _diagnostics(raw, top)
    if reason is None:
        decision = _apply(chain, raw, history)
        if decision is not None:
            return decision, diag
        reason = "empty"
    fallback = chain.fallback
    decision = _apply(fallback, raw, history) if fallback is not None else None
    if decision is None:
        decision = _greedy_raw(raw)
    return _Decision(decision.ids, decision.probs, reason), diag


def _greedy_raw(raw: F32) -> _Decision:
    return _Decision(np.array([int(np.argmax(raw))], dtype=np.intp), np.ones(1), None)


def _apply(chain: Chain, raw: F32, history: list[int]) -> _Decision | None:
    """Run every stage; None when nothing survives."""
    row = _Row(raw=raw, temp=1.0, edits={})
    for stage in chain.stages:
        _STAGES[stage.method](row, stage, history, chain.min_keep)
        if row.cand is not None and row.cand.size == 0:
            return None
    if row.cand is None:
        _materialise(row)
    assert row.cand is not None and row.w is not None
    if row.cand.size == 0:
        return None
    return _Decision(row.cand, _softmax(row.w), None)


# --- stages ----------------------------------------------------------------------------------


def _temperature(row: _Row, stage: Stage, history: list[int], min_keep: int) -> None:
    t = stage.number
    if row.cand is None:
        row.temp *= t
        row.edits = {i: v / t for i, v in row.edits.items()}
    else:
        assert row.w is not None
        row.w = row.w / t


def _edit(row: _Row, updates: dict[int, float]) -> None:
    """Replace working logits of specific ids, given as functions of their current value."""
    if row.cand is None:
        row.edits.update(updates)
        return
    assert row.w is not None
    ids = np.fromiter(updates, dtype=np.intp, count=len(updates))
    at = np.searchsorted(row.cand, ids)
    at_ok = at < row.cand.size
    present = np.zeros(ids.size, dtype=bool)
    present[at_ok] = row.cand[at[at_ok]] == ids[at_ok]
    if present.any():
        row.w = row.w.copy()
        row.w[at[present]] = [updates[int(i)] for i in ids[present]]
        alive = row.w > -np.inf
        if not alive.all():
            row.cand, row.w = row.cand[alive], row.w[alive]


def _current(row: _Row, token: int) -> float:
    """The working logit of one token (``-inf`` when removed)."""
    if row.cand is None:
        if token in row.edits:
            return row.edits[token]
        return float(row.raw[token]) / row.temp
    assert row.w is not None
    at = int(np.searchsorted(row.cand, token))
    if at < row.cand.size and int(row.cand[at]) == token:
        return float(row.w[at])
    return -math.inf


def _window(history: list[int], window: int | None) -> list[int]:
    return history if window is None else history[-window:]


def _repetition_penalty(row: _Row, stage: Stage, history: list[int], min_keep: int) -> None:
    p = stage.param
    assert isinstance(p, RepetitionPenalty)
    updates = {}
    for token in set(_window(history, p.window)):
        v = _current(row, token)
        updates[token] = v / p.factor if v > 0 else v * p.factor
    if updates:
        _edit(row, updates)


def _occurrence_penalty(row: _Row, stage: Stage, history: list[int], min_keep: int) -> None:
    p = stage.param
    assert isinstance(p, OccurrencePenalty)
    counts = Counter(_window(history, p.window))
    updates = {t: _current(row, t) - p.per_use * c - p.present for t, c in counts.items()}
    if updates:
        _edit(row, updates)


def _token_bias(row: _Row, stage: Stage, history: list[int], min_keep: int) -> None:
    _edit(row, {int(t): _current(row, int(t)) + float(d) for t, d in stage.param})  # type: ignore[union-attr]


def _ban(row: _Row, stage: Stage, history: list[int], min_keep: int) -> None:
    _edit(row, {int(t): -math.inf for t in stage.param})  # type: ignore[union-attr]


def _top_k(row: _Row, stage: Stage, history: list[int], min_keep: int) -> None:
    _keep_top(row, max(int(stage.number), min_keep))


def _greedy(row: _Row, stage: Stage, history: list[int], min_keep: int) -> None:
    _keep_top(row, 1)  # greedy keeps exactly one, whatever min_keep says


def _keep_top(row: _Row, m: int) -> None:
    """Keep the ``m`` highest working logits, ties to the lower id."""
    if row.cand is not None:
        assert row.w is not None
        keep = top_positions(row.w, m)
        row.cand, row.w = row.cand[keep], row.w[keep]
        return
    # Dividing by a positive temperature keeps the raw order, so rank the raw row; each edited
    # id can displace at most one raw candidate, so m + len(edits) raw candidates suffice.
    raw_ids = top_positions(row.raw, m + len(row.edits))
    ids = np.union1d(raw_ids, np.fromiter(row.edits, dtype=np.intp, count=len(row.edits)))
    w = _working(row, ids)
    keep = top_positions(w, m)
    row.cand, row.w = ids[keep], w[keep]


def _min_p(row: _Row, stage: Stage, history: list[int], min_keep: int) -> None:
    ratio = stage.number
    was_full = row.cand is None
    if was_full:
        _narrow_for_min_p(row, ratio)
    assert row.w is not None
    if row.w.size == 0:
        return
    # p_i >= ratio * p_max  <=>  exp(w_i - w_max) >= ratio (the normaliser cancels).
    keep = np.flatnonzero(np.exp(row.w - row.w.max()) >= ratio)
    if keep.size < min_keep and was_full:
        # The rescue ranks every survivor, not just the narrowed candidates.
        row.cand = row.w = None
        _keep_top(row, min_keep)
        return
    _keep_positions(row, keep, min_keep)


def _narrow_for_min_p(row: _Row, ratio: float) -> None:
    """Cut a full row down to a candidate set that surely holds every min_p survivor."""
    edited = np.fromiter(row.edits, dtype=np.intp, count=len(row.edits))
    # The best unedited raw token is among the top 1 + len(edits) raw positions.
    head = top_positions(row.raw, 1 + edited.size)
    unedited = np.setdiff1d(head, edited)
    w_max = max(
        [float(row.raw[unedited].max()) / row.temp if unedited.size else -math.inf]
        + [v for v in row.edits.values()]
    )
    if w_max == -math.inf:
        row.cand, row.w = np.empty(0, np.intp), np.empty(0)
        return
    # Generous slack on the float32 comparison; the exact test runs in float64 afterwards.
    floor = (w_max + math.log(ratio)) * row.temp
    floor -= 1e-4 * (abs(floor) + 1.0)
    ids = np.union1d(np.flatnonzero(row.raw >= np.float32(floor)), edited)
    w = _working(row, ids)
    alive = w > -np.inf
    row.cand, row.w = ids[alive], w[alive]


def _top_p(row: _Row, stage: Stage, history: list[int], min_keep: int) -> None:
    if stage.number >= 1.0:
        return  # the whole mass: every survivor, whatever rounding does to the running sum
    _materialise(row)
    assert row.w is not None
    probs = _softmax(row.w)
    keep = shortest_prefix(-probs, probs, stage.number)
    _keep_positions(row, keep, min_keep)


def _typical(row: _Row, stage: Stage, history: list[int], min_keep: int) -> None:
    if stage.number >= 1.0:
        return
    _materialise(row)
    assert row.w is not None
    logp = _log_softmax(row.w)
    probs = np.exp(logp)
    h = float(-(probs * logp).sum())
    keep = shortest_prefix(np.abs(-logp - h), probs, stage.number)
    _keep_positions(row, keep, min_keep)


def _epsilon(row: _Row, stage: Stage, history: list[int], min_keep: int) -> None:
    _materialise(row)
    assert row.w is not None
    probs = _softmax(row.w)
    _keep_where(row, probs >= stage.number, min_keep)


def _eta(row: _Row, stage: Stage, history: list[int], min_keep: int) -> None:
    _materialise(row)
    assert row.w is not None
    eps = stage.number
    logp = _log_softmax(row.w)
    probs = np.exp(logp)
    h = float(-(probs * logp).sum())
    eta = min(eps, math.sqrt(eps) * math.exp(-h))
    _keep_where(row, probs >= eta, min_keep)


def _keep_where(row: _Row, mask: NDArray[np.bool_], min_keep: int) -> None:
    _keep_positions(row, np.flatnonzero(mask), min_keep)


def _keep_positions(row: _Row, keep: IntArray, min_keep: int) -> None:
    assert row.cand is not None and row.w is not None
    if keep.size < min_keep:
        keep = top_positions(row.w, min_keep)
    row.cand, row.w = row.cand[keep], row.w[keep]


_STAGES = {
    "temperature": _temperature,
    "repetition_penalty": _repetition_penalty,
    "occurrence_penalty": _occurrence_penalty,
    "token_bias": _token_bias,
    "ban": _ban,
    "top_k": _top_k,
    "top_p": _top_p,
    "typical": _typical,
    "min_p": _min_p,
    "epsilon": _epsilon,
    "eta": _eta,
    "greedy": _greedy,
}


# --- helpers -------------------------------------------------------------------------------


def _working(row: _Row, ids: IntArray) -> F64:
    """Float64 working logits of ``ids`` for a row that is still full."""
    w = row.raw[ids].astype(np.float64) / row.temp
    for at, token in enumerate(ids.tolist()):
        if token in row.edits:
            w[at] = row.edits[token]
    return w


def _materialise(row: _Row) -> None:
    if row.cand is not None:
        return
    w = row.raw.astype(np.float64) / row.temp
    for token, value in row.edits.items():
        w[token] = value
    alive = w > -np.inf
    if alive.all():
        row.cand, row.w = np.arange(w.size), w
    else:
        row.cand = np.flatnonzero(alive)
        row.w = w[row.cand]
    row.edits = {}


def _log_softmax(w: F64) -> F64:
    shifted = w - w.max()
    result: F64 = shifted - math.log(float(np.exp(shifted).sum()))
    return result


def _softmax(w: F64) -> F64:
    e = np.exp(w - w.max())
    result: F64 = e / e.sum()
    return result


def _uniforms(seed: int, first_stream: int, count: int) -> F64:
    bits = np.random.PCG64(seed)
    if first_stream:
        bits.advance(first_stream)
    return np.random.Generator(bits).random(count)


def _check_seed(seed: int) -> None:
    if isinstance(seed, bool) or not isinstance(seed, int | np.integer) or not 0 <= seed < 2**64:
        raise InputError("seed", f"seed must be an integer in [0, 2**64), got {seed!r}")


def _histories(history: Sequence[Sequence[int]] | None, shape: tuple[int, ...]) -> list[list[int]]:
    rows, vocab = shape
    if history is None:
        return [[] for _ in range(rows)]
    if len(history) != rows:
        raise InputError("history", f"history has {len(history)} rows but the logits have {rows}")
    out = []
    for r, ids in enumerate(history):
        try:
            row = [int(i) for i in ids]
        except (TypeError, ValueError):
            raise InputError("history", f"history row {r} must be a list of token ids") from None
        if any(i < 0 or i >= vocab for i in row):
            raise InputError("token_range", f"history row {r} has a token id outside [0, {vocab})")
        out.append(row)
    return out


def _check_token_ids(chain: Chain, vocab: int) -> None:
    for c in (chain, chain.fallback):
        if c is not None and c.largest_token_id >= vocab:
            raise InputError(
                "token_range",
                f"the policy names token id {c.largest_token_id}, "
                f"but the vocabulary has only {vocab} entries",
            )


def _thread_count(threads: int | None, elements: int, rows: int) -> int:
    if threads is None:
        threads = min(2, os.cpu_count() or 1) if elements >= _PARALLEL_MIN_ELEMENTS else 1
    return max(1, min(threads, rows))


_POOLS: dict[int, ThreadPoolExecutor] = {}


def _pool(workers: int) -> ThreadPoolExecutor:
    if workers not in _POOLS:
        _POOLS[workers] = ThreadPoolExecutor(workers, thread_name_prefix="keepset-sampling")
    return _POOLS[workers]

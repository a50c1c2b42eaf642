"""Applying a chain to a batch of logits: the kept set, the final distribution, the draw.

The rules are those of DESIGN.md section 1. Two paths decide a row, held to the same rules by
the tests:

- the compiled kernel (``compiled``, ``kernel``; numba), row by row and rows in parallel, for
  chains whose first truncation ranks (top_k, greedy, min_p);
- the numpy path: each row is first cut down to a candidate set without copying the vocabulary
  (``full``); the stage rules then run on all rows at once (``batch``), or on a single row
  (``row``). It decides every row the kernel hands back, and everything when numba is missing
  or ``kernel="numpy"`` is asked for.

Rows the chain cannot decide (non-finite logits, nothing left) go to the chain's fallback, then
to greedy. Diagnostics describe the raw model: softmax of the finite raw logits.
"""

from __future__ import annotations

import itertools
import math
import os
import secrets
from collections.abc import Callable, Sequence
from concurrent.futures import ThreadPoolExecutor, wait
from dataclasses import dataclass
from types import ModuleType
from typing import TYPE_CHECKING, Literal, NamedTuple

import numpy as np
from numpy.typing import NDArray

from service.sampling.batch import RULES, Candidates, compact, probabilities
from service.sampling.chain import TRUNCATION_METHODS, Chain
from service.sampling.full import narrow_row
from service.sampling.row import decide_row

if TYPE_CHECKING:
    from service.sampling.compiled import Decided, Plan

compiled: ModuleType | None
# Why the compiled kernel is missing, when it is; the numpy path then decides every row.
KERNEL_PROBLEM: str | None = None
try:
    from service.sampling import compiled
except ImportError:
    compiled, KERNEL_PROBLEM = None, "numba is not installed"
except RuntimeError as exc:
    # numba refuses ``cache=True`` when it finds no folder it may write (a read-only filesystem
    # without a writable NUMBA_CACHE_DIR): serve on the numpy path rather than not at all.
    compiled, KERNEL_PROBLEM = None, f"numba cannot load the kernel: {exc}"

# Fresh seeds stay below 2**53 so that any JSON client can echo them back exactly.
_FRESH_SEED_BITS = 53
# Block length for drawing from wide rows.
_BLOCK = 256
# Rows are shared between threads only when a batch is at least this large in total.
_PARALLEL_MIN_ELEMENTS = 1 << 18

F32 = NDArray[np.float32]
F64 = NDArray[np.float64]
IntArray = NDArray[np.intp]
Logits = NDArray[np.floating] | Sequence[float] | Sequence[Sequence[float]]
Kernel = Literal["compiled", "numpy"]
KERNELS: tuple[Kernel, ...] = ("compiled", "numpy")


def kernel_available() -> bool:
    """Whether the compiled kernel can run here (numba imports; ``KERNEL_PROBLEM`` says why
    not)."""
    return compiled is not None


def warm_up() -> None:
    """Compile the kernel now (or load it from numba's on-disk cache), so that the first
    request does not wait for it; nothing to do without numba."""
    if compiled is not None:
        compiled.warm_up()


class InputError(ValueError):
    """Logits or history that cannot be sampled. ``reason`` is a stable machine-readable tag:
    ``shape``, ``dtype``, ``no_finite``, ``token_range``, ``history``, ``seed``."""

    def __init__(self, reason: str, message: str):
        super().__init__(message)
        self.reason = reason


# Not frozen: a frozen dataclass costs about 1.5 µs more to build, a tenth of a one-row pick's
# time outside the kernel. Nothing in keepset changes a result after ``pick`` returns it.
@dataclass(slots=True)
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


@dataclass(frozen=True)
class _Group:
    """Rows decided the same way: their kept ids and final probabilities, padded to [n, K]."""

    rows: IntArray
    ids: IntArray
    probs: F64
    kept: NDArray[np.bool_]
    reason: str | None


def pick(
    chain: Chain,
    logits: Logits,
    seed: int | None = None,
    history: Sequence[Sequence[int]] | None = None,
    *,
    first_stream: int = 0,
    threads: int | None = None,
    kernel: Kernel | None = None,
) -> PickResult:
    """Draw one token per row under ``chain``.

    ``logits`` is ``[V]`` or ``[B, V]`` (float16/32/64; worked on as float32). Row ``b`` draws
    from its own stream, output ``first_stream + b`` of SplitMix64 seeded with ``seed``, so a
    row's token depends only on its logits, its history, the chain and (seed, stream). Without a
    seed a fresh one is made; ``PickResult.seed`` always says which seed was used. ``kernel``
    chooses the path (None: the compiled kernel when numba is installed).
    """
    rows = as_batch(logits)
    if seed is None:
        seed = fresh_seed()
    _check_seed(seed)
    histories = _histories(history, rows.shape)
    _check_token_ids(chain, rows.shape[1])
    plan = _plan(chain, kernel)
    if plan is None:
        uniforms = _uniforms(seed, first_stream, rows.shape[0])
        return _pick_numpy(chain, rows, histories, uniforms, seed, threads)
    return _pick_compiled(chain, plan, rows, histories, seed, first_stream, threads)


class StepPick(NamedTuple):
    """One row's pick as plain numbers: a ``PickResult`` row."""

    token: int
    kept: int
    kept_mass: float
    entropy: float
    prob: float
    logprob: float
    fallback: str | None


_FLOAT32 = np.dtype(np.float32)  # numpy's one float32 dtype: compared by identity per step
_make_tuple = tuple.__new__
_DECIDED = 0 if compiled is None else compiled.DECIDED


class StepPicker:
    """``pick`` prepared for a stream of single rows from a trusted source (the model runner:
    float32 rows of one vocabulary, histories of ids it made itself, as a list or an int64
    array the kernel reads in place). The chain is checked against the vocabulary and the seed
    once, here; a call then checks nothing more and goes straight to the kernel's one-row
    entry, so a prompt step pays for the kernel and little else. Calling it with row, history
    and stream equals ``pick(chain, row, seed, [history], first_stream=stream)`` (the tests
    hold it so)."""

    __slots__ = ("_one_row", "chain", "kernel", "plan", "seed")

    def __init__(self, chain: Chain, vocab: int, seed: int, *, kernel: Kernel | None = None):
        _check_seed(seed)
        _check_token_ids(chain, vocab)
        self.chain, self.seed, self.kernel = chain, seed, kernel
        self.plan = _plan(chain, kernel)
        # A plan exists only with the compiled kernel.
        self._one_row = (
            None if compiled is None or self.plan is None else compiled.one_row(self.plan, seed)
        )

    def __call__(self, row: F32, history: list[int] | NDArray[np.int64], stream: int) -> StepPick:
        # Other rows (float16/64, strided) take pick's path, which converts them.
        one_row = self._one_row
        if one_row is not None and row.dtype is _FLOAT32 and row.flags.c_contiguous:
            if isinstance(history, list):
                assert compiled is not None and self.plan is not None
                history = compiled.history_ids(self.plan, history)
            if row.flags.writeable:  # one compiled type for every row (see compiled._read_only)
                row = row.view()
                row.flags.writeable = False
            numbers = one_row(row, history, stream)
            if numbers[0] == _DECIDED:
                # tuple.__new__ in C, not the NamedTuple's __new__ in Python: once a token.
                return _make_tuple(StepPick, (*numbers[1:], None))
        ids = history if isinstance(history, list) else history.tolist()
        seen = [ids] if self.chain.reads_history else None
        out = pick(self.chain, row, self.seed, seen, first_stream=stream, kernel=self.kernel)
        return StepPick(
            int(out.tokens[0]),
            int(out.kept[0]),
            float(out.kept_mass[0]),
            float(out.entropy[0]),
            float(out.prob[0]),
            float(out.logprob[0]),
            out.fallback[0],
        )


def _plan(chain: Chain, kernel: Kernel | None) -> Plan | None:
    """The compiled kernel's plan for ``chain``, or None for the numpy path."""
    if kernel not in (None, *KERNELS):
        raise ValueError(f"kernel must be one of {KERNELS}, got {kernel!r}")
    if kernel == "numpy" or compiled is None:
        if kernel == "compiled":
            raise RuntimeError("the compiled kernel needs numba, which is not installed")
        return None
    plan: Plan | None = compiled.plan_for(chain)
    return plan


def _pick_compiled(
    chain: Chain,
    plan: Plan,
    rows: F32,
    histories: list[list[int]],
    seed: int,
    first_stream: int,
    threads: int | None,
) -> PickResult:
    """Rows through the compiled kernel, in parallel threads for large batches (the kernel
    releases the GIL); the rows it hands back go to the numpy path."""
    assert compiled is not None
    workers = _thread_count(threads, rows.size, rows.shape[0])
    out = compiled.pick_rows(
        plan, rows, histories, seed, first_stream, lambda work, n: _in_parallel(work, n, workers)
    )
    # Indexing, not unpacking: iterating a 2-D array costs twice as much, a one-row pick's 2 µs.
    ints, floats = out.ints, out.floats
    tokens, kept = ints[1], ints[2]
    kept_mass, entropy, prob, logprob = floats[0], floats[1], floats[2], floats[3]
    fallback: list[str | None] = [None] * rows.shape[0]
    # The kernel counts what it hands back: no array pass over the statuses when that is none.
    rest = _handed_back(rows, ints[0] != compiled.kernel.DECIDED) if out.undecided else []
    if rest:
        uniforms = _uniforms(seed, first_stream, rows.shape[0])[rest]
        others = _pick_numpy(
            chain, rows[rest], [histories[b] for b in rest], uniforms, seed, threads
        )
        tokens[rest], kept[rest] = others.tokens, others.kept
        kept_mass[rest], entropy[rest] = others.kept_mass, others.entropy
        prob[rest], logprob[rest] = others.prob, others.logprob
        for i, b in enumerate(rest):
            fallback[b] = others.fallback[i]
    return PickResult(tokens, kept, kept_mass, entropy, prob, logprob, fallback, seed)


def _decide_compiled(plan: Plan, rows: F32, histories: list[list[int]]) -> list[Decided | None]:
    assert compiled is not None
    return [compiled.decide(plan, rows[b], histories[b], 0.5) for b in range(rows.shape[0])]


def _handed_back(rows: F32, undecided: NDArray[np.bool_]) -> list[int]:
    """The rows the kernel did not decide; a row among them with no finite entry is refused
    here, under its own index (the numpy path would only see its place among these)."""
    rest: list[int] = np.flatnonzero(undecided).tolist()
    for b in rest:
        if not np.isfinite(rows[b]).any():
            raise InputError("no_finite", f"row {b} has no finite logit")
    return rest


def _pick_numpy(
    chain: Chain,
    rows: F32,
    histories: list[list[int]],
    uniforms: F64,
    seed: int,
    threads: int | None,
) -> PickResult:
    if rows.shape[0] == 1:
        single = _pick_single(chain, rows, histories[0], seed, uniforms)
        if single is not None:
            return single
    rows, groups, log_norm, entropy = _resolve(chain, rows, histories, threads)
    n = rows.shape[0]
    tokens = np.empty(n, np.int64)
    kept = np.empty(n, np.int64)
    kept_mass = np.empty(n)
    prob = np.empty(n)
    fallback: list[str | None] = [None] * n
    for g in groups:
        r = np.arange(g.rows.size)
        at = _inverse_cdf(g.probs, uniforms[g.rows])
        if not g.kept[r, at].all():
            # Rounding put u * total at the very top, past the last kept entry: take that one.
            last = g.kept.shape[1] - 1 - np.argmax(g.kept[:, ::-1], axis=1)
            at = np.where(g.kept[r, at], at, last)
        tokens[g.rows] = g.ids[r, at]
        prob[g.rows] = g.probs[r, at]
        kept[g.rows] = g.kept.sum(axis=1)
        kept_mass[g.rows] = _raw_mass(rows, g, log_norm)
        if g.reason is not None:
            for b in g.rows.tolist():
                fallback[b] = g.reason
    logprob = rows[np.arange(n), tokens].astype(np.float64) - log_norm
    return PickResult(tokens, kept, kept_mass, entropy, prob, logprob, fallback, seed)


def _pick_single(
    chain: Chain, rows: F32, history: list[int], seed: int, uniforms: F64
) -> PickResult | None:
    """One finite row decided by its own chain, on the lean path of ``row``; None sends the
    row to the general path (invalid entries, nothing left, fallbacks)."""
    top = rows.max(axis=1)
    if not math.isfinite(float(top[0])):
        return None
    decided = decide_row(chain, rows[0], history)
    if decided is None:
        return None
    ids, probs = decided
    log_norm, entropy = _raw_diagnostics(rows, top)
    at = int(_inverse_cdf(probs[None, :], uniforms)[0])
    token = int(ids[at])
    raw = rows[0]
    if ids.size == raw.size:
        kept_mass = 1.0  # everything kept: the whole mass, by definition
    else:
        kept_mass = float(np.exp(raw[ids].astype(np.float64) - log_norm[0]).sum())
    return PickResult(
        tokens=np.array([token], np.int64),
        kept=np.array([ids.size], np.int64),
        kept_mass=np.array([kept_mass]),
        entropy=entropy,
        prob=np.array([probs[at]]),
        logprob=np.array([float(raw[token]) - log_norm[0]]),
        fallback=[None],
        seed=seed,
    )


def fresh_seed() -> int:
    """A new random seed, below 2**53 so that any JSON client can echo it back exactly."""
    return secrets.randbits(_FRESH_SEED_BITS)


def _inverse_cdf(probs: F64, uniforms: F64) -> IntArray:
    """Per row, the first position whose cumulative probability exceeds u times the total."""
    width = probs.shape[1]
    if width <= _BLOCK * 4:
        cdf = np.cumsum(probs, axis=1)
        at = (cdf <= (uniforms * cdf[:, -1])[:, None]).sum(axis=1)
        result: IntArray = np.minimum(at, width - 1)
        return result
    # Wide rows: a running sum over the whole row is slow, so find the block first from block
    # totals, then the position inside that block.
    out = np.empty(probs.shape[0], dtype=np.intp)
    pad = (-width) % _BLOCK
    for b in range(probs.shape[0]):
        row = np.concatenate((probs[b], np.zeros(pad))) if pad else probs[b]
        blocks = np.cumsum(row.reshape(-1, _BLOCK).sum(axis=1))
        target = uniforms[b] * blocks[-1]
        k = min(int(np.searchsorted(blocks, target, side="right")), blocks.size - 1)
        inside = np.cumsum(row[k * _BLOCK : (k + 1) * _BLOCK])
        before = blocks[k - 1] if k else 0.0
        j = int(np.searchsorted(inside, target - before, side="right"))
        out[b] = min(k * _BLOCK + min(j, _BLOCK - 1), width - 1)
    return out


def final_distribution(
    chain: Chain,
    logits: Logits,
    history: Sequence[Sequence[int]] | None = None,
    *,
    kernel: Kernel | None = None,
) -> F64:
    """The distribution ``pick`` draws from: float64 ``[B, V]``, zero outside the kept set."""
    rows = as_batch(logits)
    histories = _histories(history, rows.shape)
    _check_token_ids(chain, rows.shape[1])
    plan = _plan(chain, kernel)
    out = np.zeros(rows.shape, np.float64)
    if plan is not None:
        by_kernel = _decide_compiled(plan, rows, histories)
        rest = _handed_back(rows, np.array([d is None for d in by_kernel]))
        for b, d in enumerate(by_kernel):
            if d is not None:
                out[b, d.ids] = d.probs
        if rest:
            out[rest] = final_distribution(
                chain, rows[rest], [histories[b] for b in rest], kernel="numpy"
            )
        return out
    if rows.shape[0] == 1 and math.isfinite(float(rows.max())):
        decided = decide_row(chain, rows[0], histories[0])
        if decided is not None:  # else the general path applies the fallback
            out[0, decided[0]] = decided[1]
            return out
    rows, groups, _, _ = _resolve(chain, rows, histories, threads=1)
    for g in groups:
        alive = g.kept
        r = np.broadcast_to(g.rows[:, None], g.ids.shape)
        out[r[alive], g.ids[alive]] = g.probs[alive]
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


# --- deciding the rows -----------------------------------------------------------------------


def _resolve(
    chain: Chain, rows: F32, histories: list[list[int]], threads: int | None
) -> tuple[F32, list[_Group], F64, F64]:
    """(cleaned rows, groups covering every row, raw log-normaliser, raw entropy)."""
    top = rows.max(axis=1)
    invalid = np.isnan(top) | (top == np.inf)  # NaN propagates through max; +inf is max
    any_invalid = bool(invalid.any())
    if any_invalid:
        rows = rows.copy()
        rows[invalid] = np.where(np.isfinite(rows[invalid]), rows[invalid], np.float32(-np.inf))
        top = rows.max(axis=1)
    if (top == -np.inf).any():
        b = int(np.flatnonzero(top == -np.inf)[0])
        raise InputError("no_finite", f"row {b} has no finite logit")
    valid = np.flatnonzero(~invalid) if any_invalid else np.arange(rows.shape[0])
    log_norm, entropy, narrowed = _first_pass(chain, rows, top, histories, valid, threads)
    groups: list[_Group] = []
    undecided: dict[str, IntArray] = {}
    if any_invalid:
        undecided["non_finite"] = np.flatnonzero(invalid)
    if valid.size:
        decided = _finish_chain(chain, narrowed, [histories[b] for b in valid])
        keep = np.count_nonzero(decided.w > -np.inf, axis=1) > 0
        if keep.all():
            groups.append(_group(valid, decided, keep, None))
        else:
            groups.append(_group(valid[keep], decided, keep, None))
            undecided["empty"] = valid[~keep]
    for reason, picked in undecided.items():
        if picked.size:
            groups += _fall_back(chain.fallback, rows, histories, picked, reason)
    return rows, groups, log_norm, entropy


def _fall_back(
    fallback: Chain | None, rows: F32, histories: list[list[int]], picked: IntArray, reason: str
) -> list[_Group]:
    groups = []
    if fallback is not None:
        narrowed = [narrow_row(fallback, rows[b], histories[b]) for b in picked]
        decided = _finish_chain(fallback, narrowed, [histories[b] for b in picked])
        ok = np.count_nonzero(decided.w > -np.inf, axis=1) > 0
        if ok.any():
            groups.append(_group(picked[ok], decided, ok, reason))
        picked = picked[~ok]
    if picked.size:  # nothing else decides it: the most probable raw token
        best = np.argmax(rows[picked], axis=1)[:, None].astype(np.intp)
        groups.append(_Group(picked, best, np.ones(best.shape), np.ones(best.shape, bool), reason))
    return groups


def _raw_mass(rows: F32, g: _Group, log_norm: F64) -> F64:
    """Raw model mass on each row's kept set."""
    if g.ids.shape[1] == rows.shape[1] and g.kept.all():
        return np.ones(g.rows.size)  # everything kept: the whole mass, by definition
    raw_kept = rows[g.rows[:, None], np.minimum(g.ids, rows.shape[1] - 1)]
    raw_mass = np.exp(raw_kept.astype(np.float64) - log_norm[g.rows][:, None])
    result: F64 = (raw_mass * g.kept).sum(axis=1)
    return result


def _group(rows: IntArray, c: Candidates, select: NDArray[np.bool_], reason: str | None) -> _Group:
    ids, w = (c.ids, c.w) if select.all() else (c.ids[select], c.w[select])
    return _Group(rows, ids, probabilities(w), w > -np.inf, reason)


def _first_pass(
    chain: Chain,
    rows: F32,
    top: F32,
    histories: list[list[int]],
    valid: IntArray,
    threads: int | None,
) -> tuple[F64, F64, list[tuple[IntArray, F64, int]]]:
    """Raw diagnostics for every row and the narrowed candidates of the valid rows; the
    vocabulary-sized passes of different rows run in parallel threads."""
    n = rows.shape[0]
    log_norm = np.empty(n)
    entropy = np.empty(n)
    narrowed: list[tuple[IntArray, F64, int] | None] = [None] * n
    is_valid = np.zeros(n, dtype=bool)
    is_valid[valid] = True

    def work(lo: int, hi: int) -> None:
        # a slice, so the rows are viewed, not copied
        log_norm[lo:hi], entropy[lo:hi] = _raw_diagnostics(rows[lo:hi], top[lo:hi])
        for b in range(lo, hi):
            if is_valid[b]:
                narrowed[b] = narrow_row(chain, rows[b], histories[b])

    _in_parallel(work, n, _thread_count(threads, rows.size, n))
    return log_norm, entropy, [r for r in narrowed if r is not None]


def _raw_diagnostics(rows: F32, top: F32) -> tuple[F64, F64]:
    """(log normaliser, entropy) of each row's raw softmax.

    One float32 exp pass per row, row by row so the working buffers stay in cache, with
    float32 sums (pairwise or blocked, relative error near 1e-7): these numbers are reported,
    never compared with a threshold, so float32 terms are accurate enough.
    """
    n, vocab = rows.shape
    shifted = np.empty(vocab, np.float32)
    e = np.empty(vocab, np.float32)
    log_norm = np.empty(n)
    entropy = np.empty(n)
    for b in range(n):
        np.subtract(rows[b], top[b], out=shifted)
        np.exp(shifted, out=e)
        z = float(e.sum())
        with np.errstate(invalid="ignore"):
            s = float(np.dot(e, shifted))
        if not math.isfinite(s):  # -inf entries give 0 * -inf; they carry no mass
            s = float(np.dot(e, np.where(e > 0, shifted, np.float32(0))))
        log_norm[b] = float(top[b]) + math.log(z)
        entropy[b] = math.log(z) - s / z
    return log_norm, entropy


def _finish_chain(
    chain: Chain, narrowed: list[tuple[IntArray, F64, int]], histories: list[list[int]]
) -> Candidates:
    """Pad the narrowed rows into one batch and apply the remaining stages to all at once."""
    (start,) = {index for _, _, index in narrowed}  # the same chain stops every row alike
    sizes = {ids.size for ids, _, _ in narrowed}
    if len(narrowed) == 1 and 0 not in sizes:
        ids, w = narrowed[0][0][None, :], narrowed[0][1][None, :]
    elif len(sizes) == 1 and 0 not in sizes:  # equal widths: no padding needed
        ids = np.stack([row_ids for row_ids, _, _ in narrowed])
        w = np.stack([row_w for _, row_w, _ in narrowed])
    else:
        width = max(1, *sizes)
        ids = np.full((len(narrowed), width), np.iinfo(np.intp).max, dtype=np.intp)
        w = np.full((len(narrowed), width), -np.inf)
        for b, (row_ids, row_w, _) in enumerate(narrowed):
            ids[b, : row_ids.size] = row_ids
            w[b, : row_w.size] = row_w
    c = Candidates(ids, w)
    for stage in chain.stages[start:]:
        RULES[stage.method](c, stage, histories, chain.min_keep)
        if stage.method in TRUNCATION_METHODS:
            compact(c)
    return c


# --- checks and small helpers ----------------------------------------------------------------


_MASK64 = (1 << 64) - 1
_GOLDEN_GAMMA = 0x9E3779B97F4A7C15


def _uniforms(seed: int, first_stream: int, count: int) -> F64:
    """Outputs ``first_stream .. first_stream + count - 1`` of SplitMix64 seeded with ``seed``
    (Steele, Lea & Flood 2014), as doubles in [0, 1) from their top 53 bits.

    SplitMix64 jumps straight to any output, so the stream of row ``b`` (or step ``t``) costs a
    few integer operations instead of building and advancing a generator for every call.
    """
    out = np.empty(count)
    for i in range(count):
        z = (seed + (first_stream + i + 1) * _GOLDEN_GAMMA) & _MASK64
        z = ((z ^ (z >> 30)) * 0xBF58476D1CE4E5B9) & _MASK64
        z = ((z ^ (z >> 27)) * 0x94D049BB133111EB) & _MASK64
        out[i] = ((z ^ (z >> 31)) >> 11) * 2.0**-53
    return out


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
            row = list(map(int, ids))
        except (TypeError, ValueError):
            raise InputError("history", f"history row {r} must be a list of token ids") from None
        if row and (min(row) < 0 or max(row) >= vocab):
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


def _in_parallel(work: Callable[[int, int], None], n: int, workers: int) -> None:
    """``work(lo, hi)`` over ``range(n)`` split into ``workers`` contiguous parts, in threads."""
    if workers == 1:
        work(0, n)
        return
    edges = [n * k // workers for k in range(workers + 1)]  # np.linspace's split, in ints
    parts = list(itertools.pairwise(edges))
    # The calling thread takes the first part itself: one thread hand-off fewer per batch.
    others = [_pool(workers - 1).submit(work, lo, hi) for lo, hi in parts[1:]]
    try:
        work(*parts[0])
    finally:
        wait(others)  # no part may outlive the call, even when this one raised
    for future in others:
        future.result()  # a part's own error


_POOLS: dict[int, ThreadPoolExecutor] = {}


def _pool(workers: int) -> ThreadPoolExecutor:
    if workers not in _POOLS:
        _POOLS[workers] = ThreadPoolExecutor(workers, thread_name_prefix="keepset-sampling")
    return _POOLS[workers]

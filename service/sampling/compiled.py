"""The compiled path of ``pick``: a chain as the arrays the kernel reads, and rows decided by it.

``plan_for`` packs a chain into two arrays once (stage codes and numbers, edits flattened;
edits that read the history are packed per row). ``pick_rows`` takes a batch through the
kernel (``kernel.pick_rows``: per row the fused pass, the lazy prefix and its cut, the
remaining stages, the draw) and ``decide`` one row, with its kept set. A row the kernel does
not decide (invalid entries, nothing left) comes back with its status, and ``core`` decides it
on the numpy path; ``plan_for`` returns None for chains the kernel does not cut (a first
truncation that needs the whole distribution: top_p, typical, epsilon, eta; or none at all).

Importing this module imports numba; ``core`` treats an ImportError as "no compiled kernel".
"""

from __future__ import annotations

import weakref
from collections import Counter
from collections.abc import Callable
from dataclasses import dataclass
from functools import lru_cache
from typing import Any

import numpy as np
from numpy.typing import NDArray

from service.sampling.vector_width import prefer_wide_vectors

# Before the kernel module is imported: defining its functions makes numba's code generator,
# which takes the target features there and then.
prefer_wide_vectors()

from service.sampling import kernel  # noqa: E402
from service.sampling.chain import (  # noqa: E402
    Chain,
    OccurrencePenalty,
    RepetitionPenalty,
    Stage,
    parse_chain,
)

F32 = NDArray[np.float32]
F64 = NDArray[np.float64]
I64 = NDArray[np.int64]
# codes, params, edit_from, edit_tokens, edit_kinds, edit_values: the kernel's form of stages
Stages = tuple[I64, F64, I64, I64, I64, F64]

_EDITS = ("repetition_penalty", "occurrence_penalty", "token_bias", "ban")
_CODES = {
    "temperature": kernel.TEMPERATURE,
    "top_k": kernel.TOP_K,
    "top_p": kernel.TOP_P,
    "typical": kernel.TYPICAL,
    "min_p": kernel.MIN_P,
    "epsilon": kernel.EPSILON,
    "eta": kernel.ETA,
    "greedy": kernel.GREEDY,
} | dict.fromkeys(_EDITS, kernel.EDIT)
# First truncation stages whose candidates a cut can bound without the whole distribution.
_CUT_BY_RANK = ("top_k", "greedy", "min_p")
_HISTORY_EDITS = ("repetition_penalty", "occurrence_penalty")


# eq=False: a plan is hashed by identity (``plan_for`` makes one per chain) and holds arrays.
@dataclass(frozen=True, eq=False)
class Plan:
    """What the kernel needs of a chain, made once per chain."""

    min_keep: int  # not the chain itself: the plan table must not keep chains alive
    prefix: tuple[Stage, ...]  # temperatures and edits before the first truncation
    tail: tuple[Stage, ...]  # the first truncation (top_k, greedy or min_p) and what follows
    needs_history: bool
    static: tuple[I64, F64]  # the packed chain when no stage reads the history
    static_rows: tuple[I64, F64]  # the same as one-row 2-D views, the form pick_rows reads


@dataclass(frozen=True)
class Decided:
    """One row decided by the kernel."""

    ids: I64  # kept ids, ascending
    probs: F64  # their final probabilities
    token: int
    prob: float
    kept_mass: float
    entropy: float
    logprob: float


@dataclass(frozen=True, slots=True)
class Picked:
    """A batch through ``kernel.pick_rows``: how many rows it did not decide, and per row (as
    columns) ``ints`` = status (``kernel.DECIDED`` or why not), token, kept size and ``floats``
    = kept mass, entropy, prob, logprob; only decided rows' numbers mean anything."""

    undecided: int
    ints: I64
    floats: F64


def plan_for(chain: Chain) -> Plan | None:
    """The chain's plan, or None when the kernel does not cut it; made once per chain object
    (looked up by identity: hashing a chain on every pick costs more than the lookup)."""
    known = _PLANS.get(id(chain))
    if known is not None and known[0]() is chain:
        return known[1]
    plan = _plan(chain)
    # The callback holds the key and the table, not the chain (which would then never die)
    # nor the module's global name (gone at interpreter exit, when the last chains die).
    key, plans = id(chain), _PLANS
    plans[key] = (weakref.ref(chain, lambda _: plans.pop(key, None)), plan)
    return plan


_PLANS: dict[int, tuple[weakref.ref[Chain], Plan | None]] = {}


def _plan(chain: Chain) -> Plan | None:
    start = next((i for i, s in enumerate(chain.stages) if s.method in _CUT_BY_RANK), None)
    if start is None or any(
        _CODES[s.method] not in (kernel.TEMPERATURE, kernel.EDIT) for s in chain.stages[:start]
    ):
        return None
    prefix, tail = chain.stages[:start], chain.stages[start:]
    static = _pack(chain.min_keep, prefix, tail, [])
    return Plan(
        min_keep=chain.min_keep,
        prefix=prefix,
        tail=tail,
        needs_history=any(s.method in _HISTORY_EDITS for s in chain.stages),
        static=static,
        static_rows=(static[0][None, :], static[1][None, :]),
    )


def packed(plan: Plan, history: list[int]) -> tuple[I64, F64]:
    """The chain as the kernel reads it (see ``kernel``), for one row's history."""
    if not plan.needs_history:
        return plan.static
    return _pack(plan.min_keep, plan.prefix, plan.tail, history)


def decide(plan: Plan, raw: F32, history: list[int], u: float) -> Decided | None:
    """One row: its kept set and draw, or None when the kernel does not decide it."""
    ints, floats = packed(plan, history)
    status, ids, probs, token, prob, kept_mass, entropy, logprob = kernel.decide_row(
        _read_only(raw), ints, floats, u
    )
    if status != kernel.DECIDED:
        return None
    return Decided(ids, probs, int(token), prob, kept_mass, entropy, logprob)


def _read_only(rows: F32) -> F32:
    """A read-only view. numba compiles a separate version of the kernel for read-only arrays
    (request bodies are read-only, arrays made in process are not), and LLVM may vectorise the
    two differently: the same logits would then get diagnostics that differ in the last bits,
    and the first read-only request would wait for a compile. One type, one compiled kernel."""
    if not rows.flags.writeable:
        return rows
    view = rows.view()
    view.flags.writeable = False
    return view


def pick_rows(
    plan: Plan,
    rows: F32,
    histories: list[list[int]],
    seed: int,
    first_stream: int,
    parts: Callable[[Callable[[int, int], None], int], None],
) -> Picked:
    """A batch through the kernel, row ``b`` drawing with output ``first_stream + b`` of
    SplitMix64 seeded with ``seed``; ``parts(work, n)`` runs ``work(lo, hi)`` over the rows (in
    threads: the kernel releases the GIL)."""
    n = rows.shape[0]
    rows = _read_only(rows)
    if plan.needs_history:
        ints, floats = _stack([packed(plan, h) for h in histories])
    else:
        ints, floats = plan.static_rows
    # Two arrays for the kernel to fill (fewer arguments to type on every call), seen as columns.
    out_ints, out_floats = np.empty((3, n), np.int64), np.empty((4, n))
    seed_stream = np.array((seed, first_stream), np.uint64)

    if n == 1:  # the common single-step case: no closure, no thread hand-off
        count = kernel.pick_rows(rows, 0, 1, ints, floats, seed_stream, out_ints, out_floats)
        return Picked(count, out_ints, out_floats)

    undecided: list[int] = []

    def work(lo: int, hi: int) -> None:
        count = kernel.pick_rows(rows, lo, hi, ints, floats, seed_stream, out_ints, out_floats)
        undecided.append(count)

    parts(work, n)
    return Picked(sum(undecided), out_ints, out_floats)


def _stack(packs: list[tuple[I64, F64]]) -> tuple[I64, F64]:
    """Rows of different lengths, zero-padded: the counts at the head say what is used."""
    ints = np.zeros((len(packs), max(p[0].size for p in packs)), np.int64)
    floats = np.zeros((len(packs), max(p[1].size for p in packs)), np.float64)
    for b, (i, f) in enumerate(packs):
        ints[b, : i.size] = i
        floats[b, : f.size] = f
    return ints, floats


def _pack(
    min_keep: int, prefix: tuple[Stage, ...], tail: tuple[Stage, ...], history: list[int]
) -> tuple[I64, F64]:
    pre, post = _arrays(prefix, history), _arrays(tail, history)
    first = tail[0]
    head = [min_keep, _CODES[first.method], pre[0].size, pre[3].size, post[0].size, post[3].size]
    int_parts = (pre[0], pre[2], pre[3], pre[4], post[0], post[2], post[3], post[4])
    ints = np.concatenate((np.array(head, np.int64), *int_parts))
    first_param = 0.0 if first.method == "greedy" else first.number
    floats = np.concatenate([np.array([first_param]), pre[1], pre[5], post[1], post[5]])
    return ints, floats


def _arrays(stages: tuple[Stage, ...], history: list[int]) -> Stages:
    """Stages in the kernel's form: edit stage j changes ``tokens[edit_from[j]:edit_from[j+1]]``
    (the arrays form of ``batch.edits_for``)."""
    per_stage = [_edits(s, history) if s.method in _EDITS else None for s in stages]
    edits = [e for e in per_stage if e is not None]
    edit_from = np.zeros(len(stages) + 1, np.int64)
    np.cumsum([0 if e is None else e[0].size for e in per_stage], out=edit_from[1:])
    params = [s.number if s.method in _NUMBERED else 0.0 for s in stages]
    return (
        np.array([_CODES[s.method] for s in stages], np.int64),
        np.array(params, np.float64),
        edit_from,
        np.concatenate([e[0] for e in edits]) if edits else _NO_IDS,
        np.concatenate([e[1] for e in edits]) if edits else _NO_IDS,
        np.concatenate([e[2] for e in edits]) if edits else _NO_VALUES,
    )


_NUMBERED = ("temperature", "top_k", "top_p", "typical", "min_p", "epsilon", "eta")
_NO_IDS = np.zeros(0, np.int64)
_NO_VALUES = np.zeros(0, np.float64)


def _edits(stage: Stage, history: list[int]) -> tuple[I64, I64, F64]:
    """(tokens ascending, kinds, values) of an edit stage. The values are the same floating-point
    operations as ``batch.edits_for``'s (counts are exact in float64)."""
    p = stage.param
    # Python sets and counters: for the few dozen ids of a window they cost a fraction of
    # np.unique's fixed overhead.
    if isinstance(p, RepetitionPenalty):
        recent = history if p.window is None else history[-p.window :]
        tokens = np.array(sorted(set(recent)), np.int64)
        return (
            tokens,
            np.full(tokens.size, kernel.PENALISE, np.int64),
            np.full(tokens.size, p.factor),
        )
    if isinstance(p, OccurrencePenalty):
        recent = history if p.window is None else history[-p.window :]
        counts = sorted(Counter(recent).items())
        tokens = np.array([t for t, _ in counts], np.int64)
        values = np.array([-(p.per_use * n + p.present) for _, n in counts], np.float64)
        return tokens, np.full(tokens.size, kernel.SHIFT, np.int64), values
    return _static_edits(stage)


@lru_cache(maxsize=1024)
def _static_edits(stage: Stage) -> tuple[I64, I64, F64]:
    """Bans and biases: the same for every row, made once per stage."""
    if stage.method == "token_bias":
        pairs = [(int(t), float(d)) for t, d in stage.param]  # type: ignore[union-attr]
        tokens = np.array([t for t, _ in pairs], np.int64)
        values = np.array([d for _, d in pairs], np.float64)
        return tokens, np.full(tokens.size, kernel.SHIFT, np.int64), values
    tokens = np.array(stage.token_ids, np.int64)
    return tokens, np.full(tokens.size, kernel.REMOVE, np.int64), np.zeros(tokens.size)


_WARM_UP_CHAINS: tuple[list[dict[str, Any]], ...] = (
    [{"repetition_penalty": {"factor": 1.2}}, {"temperature": 0.9}, {"top_k": 50}],
    [{"min_p": 0.05}, {"top_p": 0.9}, {"typical": 0.9}, {"epsilon": 1e-4}, {"eta": 1e-4}],
    [{"greedy": True}, {"ban": [3]}],
)


def warm_up() -> None:
    """Compile (or load from numba's on-disk cache) every kernel function, on a row small
    enough to be instant, so that the first real request does not pay for it."""
    raw = np.linspace(-3.0, 3.0, 1000).astype(np.float32)
    for stages in _WARM_UP_CHAINS:
        chain = parse_chain(stages)
        plan = plan_for(chain)
        assert plan is not None
        decide(plan, raw, [1, 2, 3], 0.5)
        pick_rows(plan, raw[None, :], [[1]], 7, 0, lambda work, n: work(0, n))

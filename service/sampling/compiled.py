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
    HISTORY_METHODS,
    Chain,
    OccurrencePenalty,
    RepetitionPenalty,
    Stage,
    parse_chain,
)

F32 = NDArray[np.float32]
F64 = NDArray[np.float64]
I64 = NDArray[np.int64]

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
        needs_history=any(s.method in HISTORY_METHODS for s in chain.stages),
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
    if plan.needs_history and n == 1:
        one_ints, one_floats = packed(plan, histories[0])
        ints, floats = one_ints[None, :], one_floats[None, :]
    elif plan.needs_history:
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
    # Plain lists and one array per kind: a penalty's edits are packed again for every step of
    # a continuation, where a dozen small numpy arrays cost more than the ranking they feed.
    pre, post = _lists(prefix, history), _lists(tail, history)
    first = tail[0]
    head = [min_keep, _CODES[first.method], len(pre[0]), len(pre[3]), len(post[0]), len(post[3])]
    ints = head + pre[0] + pre[2] + pre[3] + pre[4] + post[0] + post[2] + post[3] + post[4]
    first_param = 0.0 if first.method == "greedy" else first.number
    floats = [first_param, *pre[1], *pre[5], *post[1], *post[5]]
    return np.array(ints, np.int64), np.array(floats, np.float64)


StageLists = tuple[list[int], list[float], list[int], list[int], list[int], list[float]]


def _lists(stages: tuple[Stage, ...], history: list[int]) -> StageLists:
    """Stages in the kernel's form (codes, params, edit_from, edit tokens, kinds, values): edit
    stage j changes ``tokens[edit_from[j]:edit_from[j+1]]`` (the arrays form of
    ``batch.edits_for``)."""
    codes, params, edit_from = [], [], [0]
    tokens: list[int] = []
    kinds: list[int] = []
    values: list[float] = []
    for stage in stages:
        codes.append(_CODES[stage.method])
        params.append(stage.number if stage.method in _NUMBERED else 0.0)
        if stage.method in _EDITS:
            t, k, v = _edits(stage, history)
            tokens += t
            kinds += k
            values += v
        edit_from.append(len(tokens))
    return codes, params, edit_from, tokens, kinds, values


_NUMBERED = ("temperature", "top_k", "top_p", "typical", "min_p", "epsilon", "eta")
Edits = tuple[list[int], list[int], list[float]]


def _edits(stage: Stage, history: list[int]) -> Edits:
    """(tokens ascending, kinds, values) of an edit stage. The values are the same floating-point
    operations as ``batch.edits_for``'s (counts are exact in float64)."""
    p = stage.param
    # Python sets and counters: for the few dozen ids of a window they cost a fraction of
    # np.unique's fixed overhead.
    if isinstance(p, RepetitionPenalty):
        recent = history if p.window is None else history[-p.window :]
        tokens = sorted(set(recent))
        return tokens, [kernel.PENALISE] * len(tokens), [p.factor] * len(tokens)
    if isinstance(p, OccurrencePenalty):
        recent = history if p.window is None else history[-p.window :]
        counts = sorted(Counter(recent).items())
        values = [-(p.per_use * n + p.present) for _, n in counts]
        return [t for t, _ in counts], [kernel.SHIFT] * len(counts), values
    return _static_edits(stage)


@lru_cache(maxsize=1024)
def _static_edits(stage: Stage) -> Edits:
    """Bans and biases: the same for every row, made once per stage (callers only read it)."""
    if stage.method == "token_bias":
        pairs = [(int(t), float(d)) for t, d in stage.param]  # type: ignore[union-attr]
        return [t for t, _ in pairs], [kernel.SHIFT] * len(pairs), [d for _, d in pairs]
    tokens = [int(t) for t in stage.token_ids]
    return tokens, [kernel.REMOVE] * len(tokens), [0.0] * len(tokens)


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

"""The compiled path of ``pick``: a chain as the arrays the kernel reads, and rows decided by it.

``plan_for`` packs a chain into two arrays once (stage codes and numbers, edits flattened; a
penalty as a description the kernel applies to each row's history). ``pick_rows`` takes a
batch through the kernel (``kernel.pick_rows``: per row the fused pass, the lazy prefix and
its cut, the remaining stages, the draw) and ``decide`` one row, with its kept set. A row the
kernel does not decide (invalid entries, nothing left) comes back with its status, and
``core`` decides it on the numpy path; ``plan_for`` returns None for chains the kernel does
not cut (a first truncation that needs the whole distribution: top_p, typical, epsilon, eta;
or none at all).

Importing this module imports numba; ``core`` treats an ImportError as "no compiled kernel".
"""

from __future__ import annotations

import weakref
from collections.abc import Callable
from dataclasses import dataclass
from functools import partial
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

    ints: I64  # the packed chain, as one-row 2-D arrays (the form pick_rows reads)
    floats: F64
    # How much of a history the penalties read: 0 (none read it), the largest window, or
    # None (one reads the whole history).
    history_tail: int | None
    # The same arrays' one row (the form pick_row reads), made once rather than every step.
    row_ints: I64
    row_floats: F64


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
        _CODES[s.method] not in (kernel.TEMPERATURE, kernel.EDIT, kernel.HISTORY_EDIT)
        for s in chain.stages[:start]
    ):
        return None
    ints, floats = _pack(chain.min_keep, chain.stages[:start], chain.stages[start:])
    windows = [_window(s) for s in chain.stages if s.method in HISTORY_METHODS]
    tail = 0 if not windows else None if None in windows else max(w for w in windows if w)
    return Plan(ints[None, :], floats[None, :], tail, ints, floats)


def _window(stage: Stage) -> int | None:
    assert isinstance(stage.param, RepetitionPenalty | OccurrencePenalty)
    return stage.param.window


def history_arrays(plan: Plan, histories: list[list[int]]) -> tuple[I64, I64]:
    """The rows' histories as the kernel reads them: ``[B, L]`` ids, each row's from the left,
    and the ``[B]`` lengths; only the part the penalties read (one empty row when none do)."""
    keep = plan.history_tail
    if keep == 0:
        return _NO_HISTORY
    recent = histories if keep is None else [h[-keep:] for h in histories]
    if len(recent) == 1:
        ids = np.array(recent[0], np.int64)
        return ids[None, :], np.array([ids.size], np.int64)
    lengths = np.array([len(h) for h in recent], np.int64)
    ids = np.zeros((len(recent), int(lengths.max(initial=0))), np.int64)
    for b, h in enumerate(recent):
        ids[b, : len(h)] = h
    return ids, lengths


_NO_HISTORY = (np.zeros((1, 0), np.int64), np.zeros(1, np.int64))


DECIDED = kernel.DECIDED

# ``(row, ids, stream)`` -> the kernel's tuple: status, token, kept size, kept mass, entropy,
# prob, logprob.
OneRow = Callable[[F32, I64, int], tuple[Any, ...]]


def one_row(plan: Plan, seed: int) -> OneRow:
    """``kernel.pick_row`` with the plan's arrays and the seed bound, for a run of single rows:
    called with a read-only float32 ``[V]`` row, the row's ids as int64 (all of its history:
    the penalties take their windows) and its stream. A ``functools.partial``: no Python frame
    between the caller and the kernel, which a prompt step meets with cold caches."""
    return partial(kernel.pick_row, plan.row_ints, plan.row_floats, np.array([seed], np.uint64))


def history_ids(plan: Plan, history: list[int]) -> I64:
    """A history list as ``one_row`` reads it: the part the penalties read, as int64."""
    keep = plan.history_tail
    return _NO_IDS if keep == 0 else np.array(history[-keep:] if keep else history, np.int64)


_NO_IDS = np.zeros(0, np.int64)


def decide(plan: Plan, raw: F32, history: list[int], u: float) -> Decided | None:
    """One row: its kept set and draw, or None when the kernel does not decide it."""
    ids, lengths = history_arrays(plan, [history])
    status, kept, probs, token, prob, kept_mass, entropy, logprob = kernel.decide_row(
        _read_only(raw), plan.ints[0], plan.floats[0], ids[0, : lengths[0]], u
    )
    if status != kernel.DECIDED:
        return None
    return Decided(kept, probs, int(token), prob, kept_mass, entropy, logprob)


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
    ints, floats = plan.ints, plan.floats
    past, lengths = history_arrays(plan, histories)
    # Two arrays for the kernel to fill (fewer arguments to type on every call), seen as columns.
    out_ints, out_floats = np.empty((3, n), np.int64), np.empty((4, n))
    seed_stream = np.array((seed, first_stream), np.uint64)
    args = (ints, floats, past, lengths, seed_stream, out_ints, out_floats)

    if n == 1:  # the common single-step case: no closure, no thread hand-off
        return Picked(kernel.pick_rows(rows, 0, 1, *args), out_ints, out_floats)

    undecided: list[int] = []

    def work(lo: int, hi: int) -> None:
        undecided.append(kernel.pick_rows(rows, lo, hi, *args))

    parts(work, n)
    return Picked(sum(undecided), out_ints, out_floats)


def _pack(min_keep: int, prefix: tuple[Stage, ...], tail: tuple[Stage, ...]) -> tuple[I64, F64]:
    pre, post = _lists(prefix), _lists(tail)
    first = tail[0]
    head = [min_keep, _CODES[first.method], len(pre[0]), len(pre[3]), len(post[0]), len(post[3])]
    ints = head + pre[0] + pre[2] + pre[3] + pre[4] + post[0] + post[2] + post[3] + post[4]
    first_param = 0.0 if first.method == "greedy" else first.number
    floats = [first_param, *pre[1], *pre[5], *post[1], *post[5]]
    return np.array(ints, np.int64), np.array(floats, np.float64)


StageLists = tuple[list[int], list[float], list[int], list[int], list[int], list[float]]


def _lists(stages: tuple[Stage, ...]) -> StageLists:
    """Stages in the kernel's form (codes, params, edit_from, edit tokens, kinds, values): edit
    stage j changes ``tokens[edit_from[j]:edit_from[j+1]]``, or is described there (a
    HISTORY_EDIT, see ``kernel``)."""
    codes, params, edit_from = [], [], [0]
    tokens: list[int] = []
    kinds: list[int] = []
    values: list[float] = []
    for stage in stages:
        p = stage.param
        number = stage.number if stage.method in _NUMBERED else 0.0
        if isinstance(p, RepetitionPenalty | OccurrencePenalty):
            tally = isinstance(p, OccurrencePenalty)
            codes.append(kernel.HISTORY_EDIT)
            params.append(p.present if isinstance(p, OccurrencePenalty) else 0.0)
            tokens.append(-1 if p.window is None else p.window)
            kinds.append(kernel.TALLY if tally else kernel.PENALISE)
            values.append(p.per_use if isinstance(p, OccurrencePenalty) else p.factor)
        else:
            codes.append(_CODES[stage.method])
            params.append(number)
            if stage.method in _EDITS:
                t, k, v = _static_edits(stage)
                tokens += t
                kinds += k
                values += v
        edit_from.append(len(tokens))
    return codes, params, edit_from, tokens, kinds, values


_NUMBERED = ("temperature", "top_k", "top_p", "typical", "min_p", "epsilon", "eta")


def _static_edits(stage: Stage) -> tuple[list[int], list[int], list[float]]:
    """Bans and biases: the same for every row, ids ascending and each once (``parse_chain``
    makes them so; the kernel merges edits on that assumption, so it is checked here)."""
    if stage.method == "token_bias":
        pairs = sorted((int(t), float(d)) for t, d in stage.param)  # type: ignore[union-attr]
        tokens, kinds, values = (
            [t for t, _ in pairs],
            [kernel.SHIFT] * len(pairs),
            [d for _, d in pairs],
        )
    else:
        tokens = sorted({int(t) for t in stage.token_ids})
        kinds, values = [kernel.REMOVE] * len(tokens), [0.0] * len(tokens)
    if len(set(tokens)) < len(tokens):
        raise ValueError(f"{stage.method} names a token id more than once")
    return tokens, kinds, values


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
        one_row(plan, 7)(_read_only(raw), np.array([1, 2], np.int64), 0)
        pick_rows(plan, raw[None, :], [[1]], 7, 0, lambda work, n: work(0, n))
        pick_rows(plan, np.stack([raw, raw]), [[1], [2, 2]], 7, 0, lambda work, n: work(0, n))

"""The compiled path of ``pick``: a chain as the arrays the kernel reads, and rows decided by it.

``decide`` takes one row through the kernel (``kernel``): the fused pass, the cut to the
candidates of the chain's first ranking stage (the same lazy prefix as ``full``, with the
kernel's block-maximum searches), the remaining stages and the draw. It returns None for any
row it does not decide (invalid entries, nothing left, a chain whose first truncation needs the
whole distribution), and ``core`` then decides that row on the numpy path.

Importing this module imports numba; ``core`` treats an ImportError as "no compiled kernel".
"""

from __future__ import annotations

import math
from collections import Counter
from dataclasses import dataclass
from functools import lru_cache

import numpy as np
from numpy.typing import NDArray

from service.sampling import kernel
from service.sampling.chain import Chain, OccurrencePenalty, RepetitionPenalty, Stage
from service.sampling.full import EDIT_METHODS, Selection, narrow_row

F32 = NDArray[np.float32]
F64 = NDArray[np.float64]
I64 = NDArray[np.int64]

_CODES = {
    "temperature": kernel.TEMPERATURE,
    "top_k": kernel.TOP_K,
    "top_p": kernel.TOP_P,
    "typical": kernel.TYPICAL,
    "min_p": kernel.MIN_P,
    "epsilon": kernel.EPSILON,
    "eta": kernel.ETA,
    "greedy": kernel.GREEDY,
} | dict.fromkeys(EDIT_METHODS, kernel.EDIT)
# First truncation stages whose candidates a cut can bound without the whole distribution.
_CUT_BY_RANK = ("top_k", "greedy", "min_p")


EditArrays = tuple[I64, I64, I64, F64]


# eq=False: a plan is hashed by identity (``plan_for`` makes one per chain) and holds arrays.
@dataclass(frozen=True, eq=False)
class Plan:
    """What the kernel needs of a chain, made once per chain."""

    start: int  # the first truncation stage: the cut happens there, the rules apply from there
    codes: I64  # stage codes from ``start`` on
    params: F64  # their numbers (0 for edit stages and greedy)
    edit_stages: tuple[Stage | None, ...]  # per code, the edit stage, else None
    needs_history: bool
    static_edits: EditArrays  # the edits when no stage depends on the history


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


@lru_cache(maxsize=256)
def plan_for(chain: Chain) -> Plan | None:
    """The chain's plan, or None when the kernel cannot cut it (its first truncation is top_p,
    typical, epsilon or eta, or it has none): those chains take the numpy path."""
    start = next(
        (i for i, s in enumerate(chain.stages) if _CODES[s.method] not in (0, kernel.EDIT)),
        None,
    )
    if start is None or chain.stages[start].method not in _CUT_BY_RANK:
        return None
    tail = chain.stages[start:]
    params = [0.0 if s.method in EDIT_METHODS or s.method == "greedy" else s.number for s in tail]
    edit_stages = tuple(s if s.method in EDIT_METHODS else None for s in tail)
    return Plan(
        start=start,
        codes=np.array([_CODES[s.method] for s in tail], np.int64),
        params=np.array(params, np.float64),
        edit_stages=edit_stages,
        needs_history=any(s.method in ("repetition_penalty", "occurrence_penalty") for s in tail),
        static_edits=_flatten(edit_stages, []),
    )


def decide(chain: Chain, plan: Plan, raw: F32, history: list[int], u: float) -> Decided | None:
    block_max = np.empty(-(-raw.size // kernel.BLOCK), np.float32)
    _, log_norm, entropy = kernel.scan(raw, block_max)
    if not math.isfinite(log_norm):
        return None  # NaN or +inf entries, or no finite one: the numpy path says which
    select = Selection(
        top=lambda r, m: kernel.top_positions(r, block_max, m),
        at_least=lambda r, floor: kernel.positions_at_least(r, block_max, np.float32(floor)),
    )
    ids, w, start = narrow_row(chain, raw, history, select)
    if start != plan.start:  # cannot happen for a planned chain; the numpy path is the referee
        return None
    edit_from, tokens, kinds, values = _edit_arrays(plan, history)
    ids, w = kernel.apply_stages(
        ids, w, plan.codes, plan.params, edit_from, tokens, kinds, values, chain.min_keep
    )
    if not ids.size:
        return None
    probs = kernel.softmax(w)
    at = kernel.draw(probs, u)
    token = int(ids[at])
    # Everything kept is the whole mass by definition; summing would only add rounding.
    kept_mass = 1.0 if ids.size == raw.size else kernel.mass(raw, ids, log_norm)
    return Decided(
        ids=ids,
        probs=probs,
        token=token,
        prob=float(probs[at]),
        kept_mass=kept_mass,
        entropy=entropy,
        logprob=float(raw[token]) - log_norm,
    )


def _edit_arrays(plan: Plan, history: list[int]) -> EditArrays:
    """The tail's edits flattened: stage j edits ``tokens[edit_from[j]:edit_from[j + 1]]``.
    Bans and biases do not depend on the history, so a plan carries them made once."""
    return _flatten(plan.edit_stages, history) if plan.needs_history else plan.static_edits


def _flatten(edit_stages: tuple[Stage | None, ...], history: list[int]) -> EditArrays:
    edit_from = [0]
    tokens: list[int] = []
    kinds: list[int] = []
    values: list[float] = []
    for stage in edit_stages:
        if stage is not None:
            for token, kind, value in _edits(stage, history):
                tokens.append(token)
                kinds.append(kind)
                values.append(value)
        edit_from.append(len(tokens))
    return (
        np.array(edit_from, np.int64),
        np.array(tokens, np.int64),
        np.array(kinds, np.int64),
        np.array(values, np.float64),
    )


def _edits(stage: Stage, history: list[int]) -> list[tuple[int, int, float]]:
    """(token, kind, value) of an edit stage: the arrays form of ``batch.edits_for``."""
    p = stage.param
    if isinstance(p, RepetitionPenalty):
        recent = history if p.window is None else history[-p.window :]
        return [(t, kernel.PENALISE, p.factor) for t in sorted(set(recent))]
    if isinstance(p, OccurrencePenalty):
        recent = history if p.window is None else history[-p.window :]
        counts = Counter(recent)
        return [(t, kernel.SHIFT, -(p.per_use * n + p.present)) for t, n in sorted(counts.items())]
    if stage.method == "token_bias":
        return [(int(t), kernel.SHIFT, float(d)) for t, d in p]  # type: ignore[union-attr]
    return [(t, kernel.REMOVE, 0.0) for t in stage.token_ids]


def warm_up() -> None:
    """Compile (or load from numba's cache) every kernel function, on a row small enough to be
    instant, so that the first real request does not pay for it."""
    chain_stages = ("top_k", "top_p", "typical", "min_p", "epsilon", "eta", "greedy")
    raw = np.linspace(-3.0, 3.0, 1000).astype(np.float32)
    codes = np.array([kernel.TEMPERATURE, kernel.EDIT] + [_CODES[m] for m in chain_stages])
    params = np.array([0.9, 0.0, 50, 0.9, 0.9, 0.01, 1e-4, 1e-4, 1.0])
    block_max = np.empty(-(-raw.size // kernel.BLOCK), np.float32)
    kernel.scan(raw, block_max)
    ids = kernel.top_positions(raw, block_max, 60)
    kernel.positions_at_least(raw, block_max, np.float32(2.5))
    edit_from = np.array([0, 0, 1, 1, 1, 1, 1, 1, 1, 1], np.int64)
    one = np.array([ids[0]], np.int64)
    ids, w = kernel.apply_stages(
        ids,
        raw[ids].astype(np.float64),
        codes,
        params,
        edit_from,
        one,
        np.array([kernel.PENALISE]),
        np.array([1.2]),
        1,
    )
    probs = kernel.softmax(w)
    kernel.draw(probs, 0.5)
    kernel.mass(raw, ids, 1.0)

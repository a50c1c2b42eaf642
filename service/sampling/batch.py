"""The stage rules of DESIGN.md section 1, applied to a whole batch of candidate sets at once.

A :class:`Candidates` holds, for every row, ascending token ids (padded with the sentinel id
``V`` at the end) and their float64 working logits, ``-inf`` for removed or padding entries.
Each rule is a handful of numpy calls over ``[B, K]``, so the cost per row stays small when K
is small; for very wide rows (a whole vocabulary) the ranking rules switch to the exact
threshold selection of ``select`` row by row instead of sorting everything.
"""

from __future__ import annotations

import math
from collections import Counter
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from service.sampling.chain import OccurrencePenalty, RepetitionPenalty, Stage
from service.sampling.select import shortest_prefix, top_positions

F64 = NDArray[np.float64]
IntArray = NDArray[np.intp]
BoolArray = NDArray[np.bool_]

# Rows wider than this are ranked row by row with threshold selection instead of a full sort.
_WIDE = 4096
# Batches at most this wide are never compacted.
_NARROW = 512


@dataclass
class Candidates:
    ids: IntArray  # [B, K], ascending per row, padded with the vocabulary size
    w: F64  # [B, K], working logits; -inf for removed tokens and padding


def probabilities(w: F64) -> F64:
    """Row-wise softmax over the finite entries; rows with none give all zeros."""
    # Clamping the max makes an all -inf row give exp 0 instead of NaN.
    e: F64 = w - np.maximum(w.max(axis=1, keepdims=True), -1e300)
    np.exp(e, out=e)
    total = e.sum(axis=1, keepdims=True)
    e /= np.maximum(total, 1e-300)
    return e


def _log_probabilities(w: F64) -> F64:
    shifted: F64 = w - np.maximum(w.max(axis=1, keepdims=True), -1e300)
    total = np.exp(shifted).sum(axis=1, keepdims=True)
    shifted -= np.log(np.maximum(total, 1e-300))
    return shifted


def _first_in_order(key: F64, counts: IntArray) -> BoolArray:
    """Per row, the first ``counts[b]`` entries in (key ascending, position ascending) order;
    entries whose key is +inf (removed) are never taken."""
    rows, width = key.shape
    mask = np.zeros(key.shape, dtype=bool)
    if width > _WIDE:
        for b in range(rows):
            mask[b, top_positions(-key[b], int(counts[b]))] = True
        return mask
    order = np.argsort(key, axis=1, kind="stable")
    # Counts beyond a row's survivors reach into removed entries, which stay removed.
    mask[np.arange(rows)[:, None], order] = np.arange(width) < counts[:, None]
    return mask


def _prefix_mask(key: F64, mass: F64, target: float) -> BoolArray:
    """Per row, the shortest prefix in (key asc, position asc) order whose mass is >= target
    (all of it when no prefix reaches it); +inf keys mark removed entries."""
    rows, width = key.shape
    if width > _WIDE:
        mask = np.zeros(key.shape, dtype=bool)
        for b in range(rows):
            live = np.flatnonzero(key[b] < np.inf)
            mask[b, live[shortest_prefix(key[b, live], mass[b, live], target)]] = True
        return mask
    order = np.argsort(key, axis=1, kind="stable")
    r = np.arange(rows)[:, None]
    counts = (np.cumsum(mass[r, order], axis=1) < target).sum(axis=1) + 1
    mask = np.zeros(key.shape, dtype=bool)
    mask[r, order] = np.arange(width) < counts[:, None]
    return mask


def _by_logit(c: Candidates) -> F64:
    """Ranking key for "most probable first": -w, so removed entries (-inf) come out +inf."""
    return -c.w


def _keep(c: Candidates, keep: BoolArray, min_keep: int, may_empty: bool = False) -> None:
    """Drop what ``keep`` leaves out; rows left with fewer than ``min_keep`` instead keep their
    ``min_keep`` most probable survivors (ties to the lower id). Rules that always keep at
    least one survivor (``may_empty`` False) skip the count when ``min_keep`` is 1."""
    if min_keep == 1 and not may_empty:
        c.w = np.where(keep, c.w, -np.inf)
        return
    short = keep.sum(axis=1) < min_keep
    if short.any():
        counts = np.full(c.w.shape[0], min_keep, dtype=np.intp)
        keep = np.where(short[:, None], _first_in_order(_by_logit(c), counts), keep)
    c.w = np.where(keep, c.w, -np.inf)


def compact(c: Candidates) -> None:
    """Squeeze out removed entries when they are most of the width, keeping ids ascending."""
    if c.w.shape[1] <= _NARROW:
        return  # squeezing a narrow batch costs more than it saves
    alive = c.w > -np.inf
    counts = alive.sum(axis=1)
    width = max(1, int(counts.max()))
    if width * 2 > c.w.shape[1]:
        return
    rows, cols = np.nonzero(alive)  # row-major: ascending columns within each row
    starts = np.concatenate(([0], np.cumsum(counts)[:-1]))
    slots = np.arange(rows.size) - np.repeat(starts, counts)
    ids = np.full((c.w.shape[0], width), np.iinfo(np.intp).max, dtype=np.intp)
    w = np.full((c.w.shape[0], width), -np.inf)
    ids[rows, slots] = c.ids[rows, cols]
    w[rows, slots] = c.w[rows, cols]
    c.ids, c.w = ids, w


# --- the rules -------------------------------------------------------------------------------

Rule = Callable[[Candidates, Stage, list[list[int]], int], None]


def temperature(c: Candidates, stage: Stage, history: list[list[int]], min_keep: int) -> None:
    c.w = c.w / stage.number


def _recent(history: list[int], window: int | None) -> list[int]:
    return history if window is None else history[-window:]


Update = Callable[[float], float]


def edits_for(stage: Stage, history: list[int]) -> dict[int, Update]:
    """How a logit-editing stage changes specific tokens of one row, as functions of their
    current working logit; shared by the batched rules and the lazy full-row pass."""
    p = stage.param
    if isinstance(p, RepetitionPenalty):
        factor = p.factor

        def penalise(v: float) -> float:
            return v / factor if v > 0 else v * factor

        return dict.fromkeys(set(_recent(history, p.window)), penalise)
    if isinstance(p, OccurrencePenalty):
        per_use, present = p.per_use, p.present
        counts = Counter(_recent(history, p.window))
        return {t: _shift(-(per_use * n + present)) for t, n in counts.items()}
    if stage.method == "token_bias":
        return {int(t): _shift(float(d)) for t, d in p}  # type: ignore[union-attr]
    if stage.method == "ban":
        return dict.fromkeys(stage.token_ids, _remove)
    raise ValueError(f"{stage.method} does not edit logits")


def _shift(delta: float) -> Update:
    return lambda v: v + delta


def _remove(v: float) -> float:
    return -math.inf


def edit(c: Candidates, stage: Stage, history: list[list[int]], min_keep: int) -> None:
    w = c.w.copy()
    for b, h in enumerate(history):
        updates = edits_for(stage, h)
        if not updates:
            continue
        tokens = np.fromiter(updates, dtype=np.intp, count=len(updates))
        at = np.minimum(np.searchsorted(c.ids[b], tokens), c.ids.shape[1] - 1)
        for token, pos in zip(tokens.tolist(), at.tolist(), strict=True):
            if c.ids[b, pos] == token and w[b, pos] > -np.inf:
                w[b, pos] = updates[token](float(w[b, pos]))
    c.w = w


def top_k(c: Candidates, stage: Stage, history: list[list[int]], min_keep: int) -> None:
    m = max(int(stage.number), min_keep)
    if c.w.shape[1] <= m:
        return  # no row has more than m candidates
    counts = np.full(c.w.shape[0], m, dtype=np.intp)
    c.w = np.where(_first_in_order(_by_logit(c), counts), c.w, -np.inf)


def greedy(c: Candidates, stage: Stage, history: list[list[int]], min_keep: int) -> None:
    ones = np.ones(c.w.shape[0], dtype=np.intp)  # exactly one, whatever min_keep says
    c.w = np.where(_first_in_order(_by_logit(c), ones), c.w, -np.inf)


def top_p(c: Candidates, stage: Stage, history: list[list[int]], min_keep: int) -> None:
    if stage.number >= 1.0:
        return  # all of the mass: every survivor, whatever rounding does to a running sum
    p = probabilities(c.w)
    key = np.where(c.w > -np.inf, -p, np.inf)
    _keep(c, _prefix_mask(key, p, stage.number), min_keep)


def typical(c: Candidates, stage: Stage, history: list[list[int]], min_keep: int) -> None:
    if stage.number >= 1.0:
        return
    logp = _log_probabilities(c.w)
    p = np.exp(logp)
    h = _entropy(p, logp)
    score = np.abs(logp + h)  # |surprisal - H|; removed entries: |-inf| = +inf
    _keep(c, _prefix_mask(score, p, stage.number), min_keep)


def min_p(c: Candidates, stage: Stage, history: list[list[int]], min_keep: int) -> None:
    # p_i >= m * p_max  <=>  exp(w_i - w_max) >= m: the normaliser cancels.
    top = np.maximum(c.w.max(axis=1, keepdims=True), -1e300)
    _keep(c, np.exp(c.w - top) >= stage.number, min_keep)


def epsilon(c: Candidates, stage: Stage, history: list[list[int]], min_keep: int) -> None:
    _keep(c, probabilities(c.w) >= stage.number, min_keep, may_empty=True)


def eta(c: Candidates, stage: Stage, history: list[list[int]], min_keep: int) -> None:
    eps = stage.number
    logp = _log_probabilities(c.w)
    p = np.exp(logp)
    threshold = np.minimum(eps, math.sqrt(eps) * np.exp(-_entropy(p, logp)))
    _keep(c, (p >= threshold) & (c.w > -np.inf), min_keep, may_empty=True)


def _entropy(p: F64, logp: F64) -> F64:
    """Row entropies in nats, [B, 1]; removed entries (p = 0, logp = -inf) add nothing."""
    with np.errstate(invalid="ignore"):
        terms = p * logp
    result: F64 = -np.nansum(terms, axis=1, keepdims=True)
    return result


RULES: dict[str, Rule] = {
    "temperature": temperature,
    "repetition_penalty": edit,
    "occurrence_penalty": edit,
    "token_bias": edit,
    "ban": edit,
    "top_k": top_k,
    "top_p": top_p,
    "typical": typical,
    "min_p": min_p,
    "epsilon": epsilon,
    "eta": eta,
    "greedy": greedy,
}

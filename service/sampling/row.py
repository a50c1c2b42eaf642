"""One row on its own: the stage rules over a single candidate set, in as few numpy calls as
the rules allow.

A request with one row (every step of the prompt path, most single-step picks) pays mostly for
the bookkeeping that lets ``batch`` handle many rows at once: padding, masks, groups. Here a
row is a pair of 1-D arrays, ascending candidate ids and their float64 working logits, and a
rule that removes tokens simply drops them. Ranking uses the exact primitives of ``select``
(ties to the lower id, prefixes in the order of a full stable sort), so the kept set is the one
``batch`` and the sort-based reference give; the tests compare all three.

Only the plain case is handled: a row whose entries are all finite and whose chain leaves at
least one token. Anything else (NaN or +inf entries, an empty result) returns ``None`` and the
batch path decides the row with the policy's fallback.
"""

from __future__ import annotations

import math
from collections.abc import Callable

import numpy as np
from numpy.typing import NDArray

from service.sampling.batch import edits_for
from service.sampling.chain import Chain, Stage
from service.sampling.full import EDIT_METHODS, narrow_row
from service.sampling.select import shortest_prefix, top_positions

F32 = NDArray[np.float32]
F64 = NDArray[np.float64]
IntArray = NDArray[np.intp]
Row = tuple[IntArray, F64]

# Up to this vocabulary a float64 copy of the whole row is cheaper than the lazy narrowing.
DENSE_MAX_VOCAB = 16_384


def decide_row(chain: Chain, raw: F32, history: list[int]) -> tuple[IntArray, F64] | None:
    """Kept ids (ascending) and their final probabilities for one finite row, or None when the
    chain leaves nothing (the caller falls back)."""
    if raw.size <= DENSE_MAX_VOCAB:
        ids, w, start = _dense_start(chain, raw, history)
    else:
        ids, w, start = narrow_row(chain, raw, history)
    for stage in chain.stages[start:]:
        if not ids.size:
            return None
        ids, w = RULES[stage.method]((ids, w), stage, history, chain.min_keep)
    if not ids.size:
        return None
    return ids, _softmax(w)


def _dense_start(chain: Chain, raw: F32, history: list[int]) -> tuple[IntArray, F64, int]:
    """Apply the leading temperature and edit stages to a float64 copy of the whole row; stop
    at the first truncation stage with every surviving id as a candidate."""
    w = raw.astype(np.float64)
    first_truncation = len(chain.stages)
    for index, stage in enumerate(chain.stages):
        if stage.method == "temperature":
            w /= stage.number
        elif stage.method in EDIT_METHODS:
            for token, update in edits_for(stage, history).items():
                w[token] = update(float(w[token]))
        else:
            first_truncation = index
            break
    ids = np.flatnonzero(w > -np.inf)
    return ids, w[ids], first_truncation


# --- the rules on one row -----------------------------------------------------------------------

RowRule = Callable[[Row, Stage, list[int], int], Row]


def _softmax(w: F64) -> F64:
    e: F64 = np.exp(w - w.max())
    e /= e.sum()
    return e


def _take(row: Row, at: IntArray) -> Row:
    return row[0][at], row[1][at]


def _most_probable(row: Row, m: int) -> Row:
    """The ``m`` most probable survivors (ties to the lower id), in id order."""
    return _take(row, top_positions(row[1], m)) if row[0].size > m else row


def _keep(row: Row, at: IntArray, min_keep: int) -> Row:
    """Keep the positions ``at``, or the ``min_keep`` most probable if that is fewer."""
    return _take(row, at) if at.size >= min_keep else _most_probable(row, min_keep)


def temperature(row: Row, stage: Stage, history: list[int], min_keep: int) -> Row:
    return row[0], row[1] / stage.number


def edit(row: Row, stage: Stage, history: list[int], min_keep: int) -> Row:
    ids, w = row
    updates = edits_for(stage, history)
    if not updates:
        return row
    tokens = np.fromiter(updates, dtype=np.intp, count=len(updates))
    at = np.minimum(np.searchsorted(ids, tokens), ids.size - 1)
    present = ids[at] == tokens
    if not present.any():
        return row
    w = w.copy()
    for token, pos in zip(tokens[present].tolist(), at[present].tolist(), strict=True):
        w[pos] = updates[token](float(w[pos]))
    alive = w > -np.inf
    return (ids, w) if alive.all() else (ids[alive], w[alive])


def top_k(row: Row, stage: Stage, history: list[int], min_keep: int) -> Row:
    return _most_probable(row, max(int(stage.number), min_keep))


def greedy(row: Row, stage: Stage, history: list[int], min_keep: int) -> Row:
    at = int(np.argmax(row[1]))  # the first maximum: the lowest id among ties
    return row[0][at : at + 1], row[1][at : at + 1]


def top_p(row: Row, stage: Stage, history: list[int], min_keep: int) -> Row:
    if stage.number >= 1.0:
        return row  # all of the mass: every survivor, whatever rounding does to a running sum
    p = _softmax(row[1])
    return _keep(row, shortest_prefix(-p, p, stage.number), min_keep)


def _log_softmax(w: F64) -> tuple[F64, F64]:
    """(log-probabilities, probabilities) of the working logits."""
    shifted = w - w.max()
    logp: F64 = shifted - math.log(float(np.exp(shifted).sum()))
    return logp, np.exp(logp)


def typical(row: Row, stage: Stage, history: list[int], min_keep: int) -> Row:
    if stage.number >= 1.0:
        return row
    logp, p = _log_softmax(row[1])
    entropy = -float(np.dot(p, logp))
    return _keep(row, shortest_prefix(np.abs(logp + entropy), p, stage.number), min_keep)


def min_p(row: Row, stage: Stage, history: list[int], min_keep: int) -> Row:
    # p_i >= m * p_max  <=>  exp(w_i - w_max) >= m: the normaliser cancels.
    keep = np.exp(row[1] - row[1].max()) >= stage.number
    return _keep(row, np.flatnonzero(keep), min_keep)


def epsilon(row: Row, stage: Stage, history: list[int], min_keep: int) -> Row:
    return _keep(row, np.flatnonzero(_softmax(row[1]) >= stage.number), min_keep)


def eta(row: Row, stage: Stage, history: list[int], min_keep: int) -> Row:
    eps = stage.number
    logp, p = _log_softmax(row[1])
    threshold = min(eps, math.sqrt(eps) * math.exp(float(np.dot(p, logp))))
    return _keep(row, np.flatnonzero(p >= threshold), min_keep)


RULES: dict[str, RowRule] = {
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

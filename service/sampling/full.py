"""The first pass over a whole-vocabulary row: cut it down to candidates without copying it.

Until the first truncation stage, a row's working logits are the raw float32 row divided by
the accumulated temperature, plus a few sparse edits (penalties, biases, bans), so nothing of
vocabulary size is copied. At the first ranking stage (top_k, greedy, min_p) the row is cut to
a candidate set that provably contains everything that stage keeps (ranking is unchanged by a
positive temperature, and each edited id can displace at most one raw candidate); stages that
need the whole renormalised distribution (top_p, typical, epsilon, eta) get every survivor in
float64. The batched rules in ``batch`` then apply that stage and the rest exactly.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import NDArray

from service.sampling.batch import edits_for
from service.sampling.chain import Chain
from service.sampling.select import top_positions

F32 = NDArray[np.float32]
F64 = NDArray[np.float64]
IntArray = NDArray[np.intp]

EDIT_METHODS = ("repetition_penalty", "occurrence_penalty", "token_bias", "ban")


@dataclass
class _Lazy:
    raw: F32
    temp: float = 1.0
    edits: dict[int, float] = field(default_factory=dict)

    def current(self, token: int) -> float:
        if token in self.edits:
            return self.edits[token]
        return float(self.raw[token]) / self.temp

    def working(self, ids: IntArray) -> F64:
        """Working logits of ``ids`` (ascending): raw / temperature, edited ids overwritten."""
        w = self.raw[ids].astype(np.float64)
        if self.temp != 1.0:
            w /= self.temp
        if self.edits:
            edited = self.edited_ids()
            values = np.fromiter(self.edits.values(), dtype=np.float64, count=len(self.edits))
            at = np.minimum(np.searchsorted(ids, edited), max(ids.size - 1, 0))
            present = ids[at] == edited if ids.size else np.zeros(edited.size, dtype=bool)
            w[at[present]] = values[present]
        return w

    def edited_ids(self) -> IntArray:
        return np.fromiter(self.edits, dtype=np.intp, count=len(self.edits))

    def top_superset(self, m: int) -> IntArray:
        """Ids that surely include the ``m`` highest working logits."""
        raw_ids = top_positions(self.raw, m + len(self.edits))
        return _union(raw_ids, self.edited_ids()) if self.edits else raw_ids


def _union(a: IntArray, b: IntArray) -> IntArray:
    """Sorted distinct ids of both; ``np.union1d`` without its general-purpose overhead, which
    costs more than the work on the few hundred ids a row's candidates usually are."""
    if not b.size:
        return a
    ids = np.concatenate((a, b))
    ids.sort()
    fresh = np.empty(ids.size, dtype=bool)
    fresh[:1] = True
    np.not_equal(ids[1:], ids[:-1], out=fresh[1:])
    return ids[fresh]


def narrow_row(chain: Chain, raw: F32, history: list[int]) -> tuple[IntArray, F64, int]:
    """(candidate ids ascending, their float64 working logits, index of the first stage the
    batched rules must still apply). Removed tokens are not among the candidates."""
    row = _Lazy(raw)
    for index, stage in enumerate(chain.stages):
        method = stage.method
        if method == "temperature":
            t = stage.number
            row.temp *= t
            row.edits = {i: v / t for i, v in row.edits.items()}
        elif method == "ban":  # -inf whatever the current value: no per-id work in Python
            row.edits.update(dict.fromkeys(stage.token_ids, -math.inf))
        elif method in EDIT_METHODS:
            for token, update in edits_for(stage, history).items():
                row.edits[token] = update(row.current(token))
        elif method in ("top_k", "greedy"):
            m = 1 if method == "greedy" else max(int(stage.number), chain.min_keep)
            return _finish(row, row.top_superset(m), index)
        elif method == "min_p":
            ids = _union(_min_p_superset(row, stage.number), row.top_superset(chain.min_keep))
            return _finish(row, ids, index)
        else:
            return _materialise(row, index)
    return _materialise(row, len(chain.stages))


def _finish(row: _Lazy, ids: IntArray, index: int) -> tuple[IntArray, F64, int]:
    w = row.working(ids)
    if not row.edits:  # raw candidates are finite; only an edit (a ban) can remove one
        return ids, w, index
    alive = w > -np.inf
    return ids[alive], w[alive], index


def _min_p_superset(row: _Lazy, ratio: float) -> IntArray:
    head = row.top_superset(1)
    w_max = float(row.working(head).max())
    if w_max == -math.inf:
        return head
    # A generous margin on the float32 comparison; the exact float64 test runs afterwards.
    floor = (w_max + math.log(ratio)) * row.temp
    floor -= 1e-4 * (abs(floor) + 1.0)
    return _union(np.flatnonzero(row.raw >= np.float32(floor)), row.edited_ids())


def _materialise(row: _Lazy, index: int) -> tuple[IntArray, F64, int]:
    w = row.raw.astype(np.float64) / row.temp
    if row.edits:
        values = np.fromiter(row.edits.values(), dtype=np.float64, count=len(row.edits))
        w[row.edited_ids()] = values
    alive = w > -np.inf
    if alive.all():
        return np.arange(w.size), w, index
    ids = np.flatnonzero(alive)
    return ids, w[ids], index

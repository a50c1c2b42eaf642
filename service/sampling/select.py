"""Exact selection primitives that avoid sorting a whole vocabulary.

Every function here returns exactly what a full stable sort would give (ties broken by lower
position), but looks at the whole array only with cheap linear passes (a compare, a count) and
sorts just a small candidate set. The trick is the same throughout: take a threshold from a
strided sample, gather everything on the right side of it, prove the gathered set must contain
the answer, and widen the threshold when it does not.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

# Below this size a direct partition/sort is as fast as sampling a threshold.
_SMALL = 4096
# A sample of about this many entries picks the thresholds.
_SAMPLE = 2048

IntArray = NDArray[np.intp]


def top_positions(values: NDArray[np.floating], m: int) -> IntArray:
    """Positions (ascending) of the ``m`` largest values; ties go to the lower position.

    Entries equal to -inf never count as present: if fewer than ``m`` entries are finite, all
    finite positions are returned.
    """
    n = values.size
    if m >= n:
        return np.flatnonzero(values > -np.inf)
    if n > _SMALL and m * 16 < n:
        stride = max(1, n // _SAMPLE)
        sample = values[::stride]
        s = sample.size
        # Expect about three times m candidates; retry with a lower threshold when short.
        rank = min(s, 3 * (m * s // n + 1) + 8)
        while rank < s:
            threshold = np.partition(sample, s - rank)[s - rank]
            if threshold == -np.inf:
                break
            cand = np.flatnonzero(values >= threshold)
            if cand.size >= m:
                return cand[_top_exact(values[cand], m)]
            rank *= 4
    return _top_exact(values, m)


def _top_exact(values: NDArray[np.floating], m: int) -> IntArray:
    n = values.size
    if m >= n:
        return np.flatnonzero(values > -np.inf)
    pivot = np.partition(values, n - m)[n - m]  # the m-th largest
    if pivot == -np.inf:
        return np.flatnonzero(values > -np.inf)
    above = np.flatnonzero(values > pivot)
    ties = np.flatnonzero(values == pivot)[: m - above.size]
    return np.sort(np.concatenate((above, ties)))


def shortest_prefix(key: NDArray[np.float64], mass: NDArray[np.float64], target: float) -> IntArray:
    """Positions (ascending) of the shortest prefix, in (key ascending, position ascending)
    order, whose cumulative mass is >= ``target``; all positions when no prefix reaches it.

    Cumulative sums are taken over the prefix in sorted order, so they equal, bit for bit, the
    cumulative sums of a full sort: the candidate set is a prefix of that same order.
    """
    n = key.size
    if n > _SMALL:
        stride = max(1, n // _SAMPLE)
        sample = np.sort(key[::stride])
        rank = 32
        while rank < sample.size:
            threshold = sample[rank]
            cand = np.flatnonzero(key <= threshold)
            if float(mass[cand].sum()) >= target:
                kept = _prefix_exact(key[cand], mass[cand], target)
                if kept is not None:
                    return np.sort(cand[kept])
            rank *= 4
    kept = _prefix_exact(key, mass, target)
    return np.arange(n) if kept is None else np.sort(kept)


def _prefix_exact(
    key: NDArray[np.float64], mass: NDArray[np.float64], target: float
) -> IntArray | None:
    order = np.argsort(key, kind="stable")
    cum = np.cumsum(mass[order])
    reach = int(np.searchsorted(cum, target, side="left"))
    if reach >= order.size:
        return None
    return order[: reach + 1]

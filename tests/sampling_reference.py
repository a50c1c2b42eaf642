"""A plain, obviously-correct reference for DESIGN.md section 1, written for the tests only.

Every stage works on the full float64 vocabulary and sorts it completely; no shortcuts. It
also reports whether any keep/drop decision sat within 1e-9 of its threshold (cumulative mass
for top_p and typical, probability for min_p, epsilon and eta), where float64 rounding alone
may legitimately decide either way.
"""

from __future__ import annotations

import math
from collections import Counter
from typing import Any

import numpy as np

AMBIGUOUS = 1e-9


def softmax_alive(w: np.ndarray) -> np.ndarray:
    alive = w > -np.inf
    p = np.zeros_like(w)
    e = np.exp(w[alive] - w[alive].max())
    p[alive] = e / e.sum()
    return p


def order_by(key: np.ndarray, alive: np.ndarray) -> np.ndarray:
    """Alive ids sorted by key ascending, ties by id ascending (a full sort)."""
    ids = np.flatnonzero(alive)
    return ids[np.lexsort((ids, key[ids]))]


def reference_row(
    stages: list[dict[str, Any]],
    min_keep: int,
    row: np.ndarray,
    history: list[int] | None = None,
) -> tuple[np.ndarray, str | None, bool]:
    """(final distribution over the vocabulary, fallback reason, ambiguous?)."""
    history = history or []
    x = np.asarray(row, dtype=np.float32).astype(np.float64)
    if np.isnan(x).any() or (x == np.inf).any():  # -inf is a valid "masked" entry
        x = np.where(np.isfinite(x), x, -np.inf)
        return _greedy(x), "non_finite", False
    w = x.copy()
    ambiguous = False
    for spec in stages:
        ((method, param),) = spec.items()
        alive = w > -np.inf
        if method == "temperature":
            w = w / param
            continue
        if method == "repetition_penalty":
            window = param.get("window")
            recent = history if window is None else history[-window:]
            for t in set(recent):
                w[t] = w[t] / param["factor"] if w[t] > 0 else w[t] * param["factor"]
            continue
        if method == "occurrence_penalty":
            window = param.get("window")
            recent = history if window is None else history[-window:]
            for t, c in Counter(recent).items():
                w[t] -= param.get("per_use", 0.0) * c + param.get("present", 0.0)
            continue
        if method == "token_bias":
            for t, d in param.items():
                w[int(t)] += d
            continue
        if method == "ban":
            for t in param:
                w[t] = -np.inf
            continue
        if not alive.any():
            break
        p = softmax_alive(w)
        # "Most probable" is ranked by working logit, which orders exactly as the probability:
        # exp's rounding can give distinct logits (0 and -1e-308) one float64 probability.
        by_prob = order_by(-w, alive)
        if method == "top_k":
            keep = by_prob[:param]
        elif method == "greedy":
            keep = by_prob[:1]
        elif method == "top_p":
            cum = np.cumsum(p[by_prob])
            reach = np.flatnonzero(cum >= param)
            keep = by_prob if param >= 1.0 or reach.size == 0 else by_prob[: reach[0] + 1]
            ambiguous |= bool(np.any(np.abs(cum - param) < AMBIGUOUS)) and param < 1.0
        elif method == "typical":
            logp = np.full_like(w, -np.inf)
            logp[alive] = w[alive] - w[alive].max()
            logp[alive] -= math.log(np.exp(logp[alive]).sum())
            h = -float((p[alive] * logp[alive]).sum())
            score = np.abs(-logp - h)
            by_score = order_by(score, alive)
            cum = np.cumsum(p[by_score])
            reach = np.flatnonzero(cum >= param)
            keep = by_score if param >= 1.0 or reach.size == 0 else by_score[: reach[0] + 1]
            ambiguous |= bool(np.any(np.abs(cum - param) < AMBIGUOUS)) and param < 1.0
        else:
            if method == "min_p":
                threshold = param * p.max()
            elif method == "epsilon":
                threshold = param
            elif method == "eta":
                pa = p[alive]
                h = -float((pa * np.log(pa, where=pa > 0, out=np.zeros_like(pa))).sum())
                threshold = min(param, math.sqrt(param) * math.exp(-h))
            else:
                raise AssertionError(method)
            keep = np.flatnonzero(alive & (p >= threshold))
            ambiguous |= bool(
                np.any(np.abs(p[alive] - threshold) < AMBIGUOUS * max(threshold, 1e-300))
            )
        if method != "greedy" and keep.size < min_keep:
            keep = by_prob[:min_keep]
        mask = np.zeros(w.size, dtype=bool)
        mask[keep] = True
        w = np.where(mask, w, -np.inf)
    if not (w > -np.inf).any():
        return _greedy(x), "empty", False
    return softmax_alive(w), None, ambiguous


def _greedy(x: np.ndarray) -> np.ndarray:
    out = np.zeros_like(x)
    out[int(np.argmax(x))] = 1.0
    return out

"""The statistics of a policy preview and their percentile bootstrap intervals.

Pure functions on per-row columns (kept-set size, entropies, kept mass, fallback reason) and on
continuations (token id lists). What each statistic means:

- ``kept_median``, ``kept_p10``, ``kept_p90``: percentiles of the kept-set size, with numpy's
  default linear interpolation (Hyndman & Fan 1996, definition 7);
- ``single_share``: share of rows whose kept set is a single token;
- ``entropy_model``: mean entropy (nats) of the raw model distribution (the ``entropy``
  diagnostic; the same for every version on the same rows);
- ``entropy_policy``: mean entropy of the version's final distribution, the one drawn from;
- ``kept_mass``: mean raw model mass on the kept set;
- ``fallback_rate`` and ``fallback_<reason>``: share of rows decided by the fallback.

Continuation statistics (prompt mode):

- ``repetition_<n>`` for n = 2, 3, 4: within one continuation, 1 - unique n-grams / n-grams,
  averaged over the continuations that have at least one n-gram;
- ``distinct_<n>`` for n = 1, 2, 3: unique n-grams / n-grams over all continuations together
  (Li et al. 2016, "A Diversity-Promoting Objective Function for Neural Conversation Models");
- ``length``: mean continuation length in tokens; ``finish_<reason>``: share of continuations
  that ended that way.

Intervals are percentile bootstrap intervals (Efron & Tibshirani 1993, ch. 13): resample the
units (rows, or continuations with all their rows) with replacement, recompute the statistic,
take the (1 - c) / 2 and (1 + c) / 2 quantiles of the recomputed values. Distinct-n is
resampled as a ratio of per-continuation parts (see :func:`distinct_shares`). Versions replayed
on the same units share each resample's indices, so the difference between two versions is
resampled in pairs.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

FALLBACK_REASONS = ("non_finite", "empty")
FINISH_REASONS = ("budget", "end", "stop")
REPETITION_N = (2, 3, 4)
DISTINCT_N = (1, 2, 3)

ROW_STATISTICS = (
    "kept_median",
    "kept_p10",
    "kept_p90",
    "single_share",
    "entropy_model",
    "entropy_policy",
    "kept_mass",
    "fallback_rate",
    *(f"fallback_{r}" for r in FALLBACK_REASONS),
)
CONTINUATION_STATISTICS = (
    *(f"repetition_{n}" for n in REPETITION_N),
    *(f"distinct_{n}" for n in DISTINCT_N),
    "length",
    *(f"finish_{r}" for r in FINISH_REASONS),
)

F64 = npt.NDArray[np.float64]
Indices = npt.NDArray[np.intp]


@dataclass(frozen=True)
class Rows:
    """Per-row results of one version on the replayed rows (all arrays of one length)."""

    kept: npt.NDArray[np.int64]
    entropy_model: F64
    entropy_policy: F64
    kept_mass: F64
    fallback: npt.NDArray[np.str_]  # "" for none

    @property
    def size(self) -> int:
        return int(self.kept.size)

    def take(self, idx: Indices) -> Rows:
        return Rows(
            self.kept[idx],
            self.entropy_model[idx],
            self.entropy_policy[idx],
            self.kept_mass[idx],
            self.fallback[idx],
        )


def row_statistics(rows: Rows) -> dict[str, float]:
    """Every row statistic of the module docstring, on these rows (NaN when there are none)."""
    if rows.size == 0:
        return dict.fromkeys(ROW_STATISTICS, math.nan)
    kept = rows.kept.astype(np.float64)
    p10, p50, p90 = np.quantile(kept, [0.1, 0.5, 0.9])
    out = {
        "kept_median": float(p50),
        "kept_p10": float(p10),
        "kept_p90": float(p90),
        "single_share": float(np.mean(rows.kept == 1)),
        "entropy_model": float(np.mean(rows.entropy_model)),
        "entropy_policy": float(np.mean(rows.entropy_policy)),
        "kept_mass": float(np.mean(rows.kept_mass)),
        "fallback_rate": float(np.mean(rows.fallback != "")),
    }
    for reason in FALLBACK_REASONS:
        out[f"fallback_{reason}"] = float(np.mean(rows.fallback == reason))
    return out


def ngrams(tokens: Sequence[int], n: int) -> list[tuple[int, ...]]:
    return [tuple(tokens[i : i + n]) for i in range(len(tokens) - n + 1)]


def repetition(tokens: Sequence[int], n: int) -> float | None:
    """1 - unique n-grams / n-grams within one continuation; None when it has no n-gram."""
    grams = ngrams(tokens, n)
    if not grams:
        return None
    return 1.0 - len(set(grams)) / len(grams)


def distinct(continuations: Sequence[Sequence[int]], n: int) -> float:
    """Li et al. 2016: unique n-grams / n-grams over all continuations (NaN without any)."""
    seen: set[tuple[int, ...]] = set()
    total = 0
    for tokens in continuations:
        grams = ngrams(tokens, n)
        seen.update(grams)
        total += len(grams)
    return len(seen) / total if total else math.nan


@dataclass(frozen=True)
class Continuations:
    """The continuations of one version, one per prompt, in prompt order."""

    tokens: list[list[int]]
    finish: list[str]


def distinct_shares(continuations: Sequence[Sequence[int]], n: int) -> tuple[F64, F64]:
    """Per continuation: its share of the unique n-grams (each occurrence of an n-gram weighs
    1 / its count over all continuations) and its n-gram count. Their sums' ratio is exactly
    ``distinct(continuations, n)``; over a resample it is the ratio estimator a bootstrap
    needs, in which a continuation drawn twice does not count as repeating itself (the plain
    unique count of a resample would, and would drag every replicate below the estimate)."""
    grams = [ngrams(t, n) for t in continuations]
    counts: dict[tuple[int, ...], int] = {}
    for g in grams:
        for gram in g:
            counts[gram] = counts.get(gram, 0) + 1
    shares = np.array([sum(1.0 / counts[gram] for gram in g) for g in grams])
    totals = np.array([float(len(g)) for g in grams])
    return shares, totals


def continuation_statistic(c: Continuations) -> Callable[[Indices], dict[str, float]]:
    """The continuation statistics of the module docstring on any resample of ``c``'s
    continuations (indices into them); on all of them, the statistics of ``c``."""
    parts = {n: distinct_shares(c.tokens, n) for n in DISTINCT_N}

    def statistic(idx: Indices) -> dict[str, float]:
        tokens = [c.tokens[i] for i in idx]
        finish = [c.finish[i] for i in idx]
        out: dict[str, float] = {}
        for n in REPETITION_N:
            values = [r for t in tokens if (r := repetition(t, n)) is not None]
            out[f"repetition_{n}"] = float(np.mean(values)) if values else math.nan
        for n in DISTINCT_N:
            shares, totals = parts[n]
            total = float(totals[idx].sum())
            out[f"distinct_{n}"] = float(shares[idx].sum()) / total if total else math.nan
        out["length"] = float(np.mean([len(t) for t in tokens])) if tokens else math.nan
        for reason in FINISH_REASONS:
            share = float(np.mean([f == reason for f in finish])) if finish else math.nan
            out[f"finish_{reason}"] = share
        return out

    return statistic


def continuation_statistics(c: Continuations) -> dict[str, float]:
    """Every continuation statistic of the module docstring, on all of ``c``."""
    return continuation_statistic(c)(np.arange(len(c.tokens), dtype=np.intp))


@dataclass(frozen=True)
class Interval:
    """A point estimate and its percentile bootstrap interval."""

    value: float
    low: float
    high: float

    def as_dict(self) -> dict[str, float | None]:
        return {"value": _num(self.value), "low": _num(self.low), "high": _num(self.high)}


def _num(x: float) -> float | None:
    # JSON has no NaN: a statistic that does not exist on these rows is null.
    return None if not math.isfinite(x) else float(f"{x:.6g}")


def percentile_interval(point: float, replicates: Sequence[float], confidence: float) -> Interval:
    """Efron & Tibshirani 1993, percentile method; NaN replicates (a statistic undefined on a
    resample) are left out."""
    values = np.asarray(replicates, dtype=np.float64)
    values = values[np.isfinite(values)]
    if values.size == 0:
        return Interval(point, math.nan, math.nan)
    alpha = (1.0 - confidence) / 2.0
    low, high = np.quantile(values, [alpha, 1.0 - alpha])
    return Interval(point, float(low), float(high))


Statistic = Callable[[Indices], Mapping[str, float]]


@dataclass(frozen=True)
class Bootstrapped:
    """Per version its statistics with intervals; per version after the first the differences
    from the first (the baseline), resampled in pairs."""

    own: list[dict[str, Interval]]
    difference: list[dict[str, Interval]]


def paired_bootstrap(
    statistics: Sequence[Statistic],
    units: int,
    *,
    resamples: int,
    confidence: float,
    rng: np.random.Generator,
    progress: Callable[[int], None] | None = None,
) -> Bootstrapped:
    """Percentile bootstrap of every version's statistics and of their differences from the
    first version. ``statistics[v](idx)`` computes version v's statistics on the units
    ``idx`` (a resample of ``range(units)``); each resample's indices serve every version."""
    full = np.arange(units, dtype=np.intp)
    points = [dict(s(full)) for s in statistics]
    names = list(points[0])
    own_reps: list[dict[str, list[float]]] = [{k: [] for k in names} for _ in statistics]
    diff_reps: list[dict[str, list[float]]] = [{k: [] for k in names} for _ in statistics]
    for r in range(resamples):
        idx = rng.integers(0, units, size=units).astype(np.intp)
        values = [s(idx) for s in statistics]
        for v, stats in enumerate(values):
            for k in names:
                own_reps[v][k].append(stats[k])
                diff_reps[v][k].append(stats[k] - values[0][k])
        if progress is not None:
            progress(r + 1)
    own = [
        {k: percentile_interval(points[v][k], own_reps[v][k], confidence) for k in names}
        for v in range(len(statistics))
    ]
    difference = [
        {
            k: percentile_interval(points[v][k] - points[0][k], diff_reps[v][k], confidence)
            for k in names
        }
        for v in range(1, len(statistics))
    ]
    return Bootstrapped(own, difference)


def unit_rows(lengths: Sequence[int]) -> Callable[[Indices], Indices]:
    """For continuations of these lengths laid end to end: the row indices of a resample of
    continuations (each chosen continuation brings all its rows)."""
    starts = np.concatenate(([0], np.cumsum(lengths)[:-1])).astype(np.intp)
    spans = [np.arange(s, s + n, dtype=np.intp) for s, n in zip(starts, lengths, strict=True)]

    def rows_of(idx: Indices) -> Indices:
        if len(idx) == 0:
            return np.zeros(0, np.intp)
        return np.concatenate([spans[i] for i in idx])

    return rows_of


def fibonacci_edges(limit: int) -> list[int]:
    """Upper bucket bounds 1, 2, 3, 5, 8, ... up to the first >= ``limit``: the kept-size
    buckets of the ``keepset_kept_tokens`` metric, so the report reads like the dashboard."""
    out = [1, 2]
    while out[-1] < limit:
        out.append(out[-1] + out[-2])
    return out


def kept_histogram(kept: npt.NDArray[np.int64], edges: Sequence[int]) -> list[int]:
    """Rows per bucket: bucket i holds sizes in (edges[i-1], edges[i]] (the first, sizes <= 1)."""
    at = np.searchsorted(np.asarray(edges), kept, side="left")
    counts: list[int] = np.bincount(at, minlength=len(edges))[: len(edges)].tolist()
    return counts


def entropy_of(probs: F64) -> F64:
    """Entropy in nats of each row of a [B, V] distribution (0 log 0 = 0)."""
    out = np.empty(probs.shape[0])
    for b in range(probs.shape[0]):
        # Only the kept entries: the log of a whole wide row costs more than the rest.
        kept = probs[b][probs[b] > 0]
        out[b] = -float(np.dot(kept, np.log(kept)))
    return out

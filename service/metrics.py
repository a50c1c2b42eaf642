"""Prometheus metrics (DESIGN.md section 5) and their exposition, correct with several workers.

With several uvicorn workers, ``keepset serve`` points ``PROMETHEUS_MULTIPROC_DIR`` at a fresh
folder before any worker starts; each worker then writes its samples there and ``/metrics``
aggregates the folder (prometheus-client's multiprocess mode). That mode has limits we respect:
no Info metrics and no callback gauges; gauges state how workers combine (``max`` here). Labels
only ever carry configured names (clients, policies, arms, endpoints), never request text.
"""

from __future__ import annotations

import functools
import os
import re
from bisect import bisect_left
from collections import Counter as Tally
from collections.abc import Sequence
from typing import Any

from prometheus_client import (
    CONTENT_TYPE_LATEST,
    CollectorRegistry,
    Counter,
    Gauge,
    Histogram,
    generate_latest,
)
from prometheus_client import multiprocess as prom_multiprocess


def fibonacci_buckets(limit: int) -> list[float]:
    """1, 2, 3, 5, 8, ... up to the first value >= ``limit`` (the largest vocabulary)."""
    out = [1, 2]
    while out[-1] < limit:
        out.append(out[-1] + out[-2])
    return [float(v) for v in out]


KEPT_BUCKETS = fibonacci_buckets(262_144)
ENTROPY_BUCKETS = [0.01, 0.05, 0.1, 0.25, 0.5, 0.75, 1, 1.5, 2, 2.5, 3, 4, 5, 6, 8, 10, 12.5]
DURATION_BUCKETS = [0.0005, 0.001, 0.002, 0.005, 0.01, 0.02, 0.05, 0.1, 0.2, 0.5, 1, 2, 5, 10, 30]

KEPT_TOKENS = Histogram(
    "keepset_kept_tokens",
    "Kept-set size per sampled row (survivors after the whole chain).",
    ["policy", "version", "role"],
    buckets=KEPT_BUCKETS,
)
ENTROPY = Histogram(
    "keepset_entropy_nats",
    "Entropy of the raw model distribution per sampled row, in nats.",
    ["policy", "version"],
    buckets=ENTROPY_BUCKETS,
)
FALLBACKS = Counter(
    "keepset_fallbacks",
    "Rows decided by the policy's fallback, by reason (non_finite, empty).",
    ["policy", "version", "reason"],
)
ROWS = Counter(
    "keepset_rows",
    "Rows sampled, by client, policy version and arm.",
    ["client", "policy", "version", "arm"],
)
ADJUST_REFUSED = Counter(
    "keepset_adjust_refused",
    "Per-request adjustments refused or clamped, by client and field.",
    ["client", "field"],
)
REQUEST_DURATION = Histogram(
    "keepset_request_duration_seconds",
    "Time from request to response, by endpoint and status code.",
    ["endpoint", "code"],
    buckets=DURATION_BUCKETS,
)
REGISTRY_RELOADS = Counter(
    "keepset_registry_reloads",
    "Registry reloads, by outcome (loaded, kept_last_good).",
    ["outcome"],
)
COLLAPSE_ACTIVE = Gauge(
    "keepset_collapse_active",
    "1 while a policy version's recent kept sizes sit below its expect.kept_median_min.",
    ["policy", "version"],
    multiprocess_mode="livemax",
)
ASSIGNMENTS = Counter(
    "keepset_assignments",
    "Requests assigned to each arm of a client's route (the unit of the A/B split).",
    ["client", "arm"],
)
ARM_WEIGHT = Gauge(
    "keepset_arm_weight",
    "Configured share of a client's requests for each arm (0 for arms no longer routed).",
    ["client", "arm"],
    # The newest write wins: a worker that has just reloaded knows the current weights.
    multiprocess_mode="livemostrecent",
)
GUARD_ACTIVE = Gauge(
    "keepset_guard_active",
    "1 while a client's collapse guard serves its fallback instead of this policy version.",
    ["client", "policy", "version"],
    multiprocess_mode="livemax",
)
GUARD_TRANSITIONS = Counter(
    "keepset_guard_transitions",
    "Collapse guard changes for a client's policy version, by new state (engaged, released).",
    ["client", "policy", "version", "to"],
)
GUARD_FALLBACK_COLLAPSED = Counter(
    "keepset_guard_fallback_collapsed",
    "Guarded requests served by a fallback version that is itself collapsed (it still serves).",
    ["client", "policy", "version"],
)

CAPTURE_ROWS = Counter(
    "keepset_capture_rows",
    "Served rows written to capture shards, by client.",
    ["client"],
)
CAPTURE_DROPPED = Counter(
    "keepset_capture_dropped_rows",
    "Sampled rows not captured, by client and reason (queue_full, write_error, too_large).",
    ["client", "reason"],
)
CAPTURE_PRUNED = Counter(
    "keepset_capture_pruned_shards",
    "Capture shards deleted to keep a client's folder within its max_mb.",
    ["client"],
)
CAPTURE_BYTES = Gauge(
    "keepset_capture_bytes",
    "Bytes of capture shards on disk per client, as last measured by a worker.",
    ["client"],
    # Every worker measures the same folder; the largest recent measure is the safe one.
    multiprocess_mode="livemax",
)
OUTCOMES = Counter(
    "keepset_outcomes",
    "Outcomes reported by clients for the requests they were served, by client and arm.",
    ["client", "arm"],
)


def observe_rows(
    *,
    client: str,
    policy: str,
    version: int,
    arm: str,
    role: str,
    kept: Sequence[int],
    entropy: Sequence[float],
    fallback: Sequence[str | None],
) -> None:
    """Record one batch of sampled rows for a served or shadow policy version."""
    v = str(version)
    observe_all(series(KEPT_TOKENS, policy, v, role), kept)
    if role != "served":
        return
    series(ROWS, client, policy, v, arm).inc(len(kept))
    observe_all(series(ENTROPY, policy, v), entropy)
    for reason in fallback:
        if reason is not None:
            series(FALLBACKS, policy, v, reason).inc()


@functools.lru_cache(maxsize=4096)
def series(metric: Counter | Gauge | Histogram, *values: str) -> Any:
    """``metric.labels(*values)``, remembered. prometheus_client checks the values and takes
    a lock on every call (about 5 µs), and a pick labels five series; keepset never removes
    a labelled series, so the remembered child stays the one exported. The label sets are
    bounded by the registry and routes (as every metric's here), the cache by its size."""
    return metric.labels(*values)


def observe_all(histogram: Histogram, values: Sequence[float]) -> None:
    """``histogram.observe(x)`` for every x, with one update per bucket hit and one for the
    sum. prometheus_client observes one value at a time, and in multiprocess mode every update
    is a locked write to a shared file: the rows of a 32-row pick took 0.4 ms one by one. This
    reads the client's histogram internals (bucket bounds and values); if they are not there,
    it observes one by one."""
    bounds = getattr(histogram, "_upper_bounds", None)
    buckets = getattr(histogram, "_buckets", None)
    total = getattr(histogram, "_sum", None)
    if bounds is None or buckets is None or total is None or len(values) < 2:
        for x in values:
            histogram.observe(x)
        return
    # observe() puts x in the first bucket whose bound is >= x: bisect_left; a NaN goes in none.
    for at, n in Tally(bisect_left(bounds, x) for x in values if x == x).items():
        buckets[at].inc(n)
    total.inc(sum(values))


def set_arm_weights(weights: dict[tuple[str, str], float]) -> None:
    """Export the configured arm shares; arms seen before but no longer routed go to 0 (a
    multiprocess gauge cannot drop a label, and 0 is what such an arm now gets)."""
    for client, arm in _exported_arms - set(weights):
        ARM_WEIGHT.labels(client, arm).set(0)
    for (client, arm), share in weights.items():
        ARM_WEIGHT.labels(client, arm).set(share)
    _exported_arms.update(weights)


_exported_arms: set[tuple[str, str]] = set()


def _registry() -> CollectorRegistry:
    folder = os.environ.get("PROMETHEUS_MULTIPROC_DIR")
    if folder:
        forget_dead_workers(folder)
        registry = CollectorRegistry()
        prom_multiprocess.MultiProcessCollector(registry)  # type: ignore[no-untyped-call]
        return registry
    from prometheus_client import REGISTRY

    return REGISTRY


def exposition() -> tuple[bytes, str]:
    """The /metrics body and content type, aggregated over workers in multiprocess mode."""
    return generate_latest(_registry()), CONTENT_TYPE_LATEST


def assignment_counts() -> dict[tuple[str, str], int]:
    """Requests per (client, arm) since start, summed over every worker."""
    counts: dict[tuple[str, str], int] = {}
    for family in _registry().collect():
        if family.name != "keepset_assignments":
            continue
        for sample in family.samples:
            if sample.name == "keepset_assignments_total":
                key = (sample.labels["client"], sample.labels["arm"])
                counts[key] = counts.get(key, 0) + int(sample.value)
    return counts


_LIVE_GAUGE_FILE = re.compile(r"gauge_live[a-z]+_(\d+)\.db")


def forget_dead_workers(folder: str) -> None:
    """Drop the live gauges of worker processes that no longer exist.

    uvicorn restarts a worker that dies but tells nobody, so nothing else would call
    ``mark_process_dead``: a crashed worker's ``keepset_collapse_active`` of 1 would stay in
    the aggregate for good. Checked before every collection; counters and histograms of dead
    workers stay, as they must.
    """
    for name in os.listdir(folder):
        match = _LIVE_GAUGE_FILE.fullmatch(name)
        if match and not _alive(int(match[1])):
            prom_multiprocess.mark_process_dead(int(match[1]), folder)  # type: ignore[no-untyped-call]


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # someone else's process: it exists
        return True
    return True

"""Capture of served rows for routes that opt in (``capture: {rate, max_mb}`` in routes.yaml).

This module owns the sampling decision (each ``/v1/pick`` row on its own, a continuation whole),
the bounded in-memory queue between requests and the disk, the one writer thread per worker
process that turns queued rows into shards of the :mod:`service.shards` format, the rotation of
shards, and each client's disk bound. A request never waits for the disk: its hot path copies
the chosen rows to float16 and puts them on the queue without blocking; when the queue is full
the rows are dropped and counted. Shards go to ``<capture_dir>/<client>/`` under names that
sort by time; a client's oldest shards are deleted when its folder grows past ``max_mb``.
"""

from __future__ import annotations

import contextlib
import logging
import math
import os
import queue
import random
import threading
import time
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path

import numpy as np
import numpy.typing as npt

from service import metrics
from service.prompting import StepRecord
from service.routing import CaptureRule, Route
from service.sampling import PickResult
from service.shards import SOURCE_CONTINUE, SOURCE_PICK, SUFFIX, Shard, write_shard

log = logging.getLogger("keepset")

MB = 1_000_000
# A shard is written once it holds this many rows or bytes, or when its oldest row has waited
# FLUSH_SECONDS (so a crash loses little).
SHARD_ROWS = 4096
SHARD_BYTES = 64 * MB
FLUSH_SECONDS = 10.0
# The queue holds at most this many requests' rows and this many bytes of them.
QUEUE_BATCHES = 1024
QUEUE_BYTES = 256 * MB
# A temporary file this old is left by a write that crashed; younger ones may be in progress.
STALE_TEMP_SECONDS = 60.0
ERROR_LOG_SECONDS = 60.0
# Upper bounds for a shard's size estimate, so that a shard never exceeds its client's bound:
# the zip and .npy headers of the ~20 arrays, and per row every column but logits and history
# (8-byte numbers, and text columns in UCS-4 of at most 32 + 64 + 64 + 16 characters).
SHARD_OVERHEAD = 16_384
ROW_OVERHEAD = 1024


@dataclass(frozen=True)
class Origin:
    """What served a request's rows: who asked, the answer's id, the version and arm, the seed."""

    client: str
    request_id: str
    policy: str
    version: int
    arm: str
    seed: int


@dataclass
class _Batch:
    """The captured rows of one request, on their way to the writer thread."""

    rule: CaptureRule
    origin: Origin
    source: int
    logits: npt.NDArray[np.float16]
    histories: list[list[int]]
    streams: list[int]
    token: list[int]
    kept: list[int]
    entropy: list[float]
    kept_mass: list[float]
    prob: list[float]
    logprob: list[float]
    fallback: list[str]
    time: float

    @property
    def rows(self) -> int:
        return int(self.logits.shape[0])

    @property
    def vocab(self) -> int:
        return int(self.logits.shape[1])

    @property
    def nbytes(self) -> int:
        return int(self.logits.nbytes) + 4 * sum(len(h) for h in self.histories)

    def row_bytes(self, i: int) -> int:
        """An upper bound of what row ``i`` adds to a shard file."""
        return 2 * self.vocab + 4 * len(self.histories[i]) + ROW_OVERHEAD


@dataclass
class _Pending:
    """Rows of one (client, vocabulary) waiting for their shard: runs of consecutive rows."""

    rule: CaptureRule
    deadline: float
    parts: list[tuple[_Batch, int, int]] = field(default_factory=list)
    rows: int = 0
    bytes: int = SHARD_OVERHEAD

    def add(self, batch: _Batch, i: int) -> None:
        if self.parts and self.parts[-1][0] is batch and self.parts[-1][2] == i:
            self.parts[-1] = (batch, self.parts[-1][1], i + 1)
        else:
            self.parts.append((batch, i, i + 1))
        self.rows += 1
        self.bytes += batch.row_bytes(i)
        self.rule = batch.rule


_STOP = None


class Capture:
    """One worker process's capture: :meth:`start` its writer thread, offer rows from requests,
    :meth:`close` to write what it holds and stop."""

    def __init__(
        self,
        folder: Path,
        *,
        seed: int | None = None,
        queue_batches: int = QUEUE_BATCHES,
        queue_bytes: int = QUEUE_BYTES,
        shard_rows: int = SHARD_ROWS,
        shard_bytes: int = SHARD_BYTES,
        flush_seconds: float = FLUSH_SECONDS,
    ) -> None:
        self.folder = folder
        self.shard_rows = shard_rows
        self.shard_bytes = shard_bytes
        self.flush_seconds = flush_seconds
        self._rng = random.Random(seed)
        self._queue: queue.Queue[_Batch | None] = queue.Queue(maxsize=queue_batches)
        self._queue_bytes = queue_bytes
        self._queued_bytes = 0
        self._lock = threading.Lock()
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self._sequence = 0
        self._last_error_log = -math.inf

    # -- the request side: sampling and the hand-over, never blocking ------------------------

    def sample(self, rule: CaptureRule) -> bool:
        """Whether one unit (a pick row, a whole continuation) is captured."""
        return self._rng.random() < rule.rate

    def offer_pick(
        self,
        rule: CaptureRule,
        origin: Origin,
        rows: npt.NDArray[np.float32],
        history: Sequence[Sequence[int]] | None,
        out: PickResult,
    ) -> None:
        """Sample the rows of a ``/v1/pick`` answer (row ``b`` drew from stream ``b``) and hand
        the chosen ones, copied, to the writer."""
        chosen = [b for b in range(rows.shape[0]) if self.sample(rule)]
        if not chosen:
            return
        picked = rows if len(chosen) == rows.shape[0] else rows[chosen]
        self._offer(
            _Batch(
                rule=rule,
                origin=origin,
                source=SOURCE_PICK,
                logits=_float16(picked),
                histories=[[] if history is None else list(history[b]) for b in chosen],
                streams=chosen,
                token=out.tokens[chosen].tolist(),
                kept=out.kept[chosen].tolist(),
                entropy=out.entropy[chosen].tolist(),
                kept_mass=out.kept_mass[chosen].tolist(),
                prob=out.prob[chosen].tolist(),
                logprob=out.logprob[chosen].tolist(),
                fallback=[out.fallback[b] or "" for b in chosen],
                time=time.time(),
            )
        )

    def offer_steps(
        self,
        rule: CaptureRule,
        origin: Origin,
        logits: Sequence[npt.NDArray[np.float32]],
        histories: Sequence[list[int]],
        records: Sequence[StepRecord],
    ) -> None:
        """Hand every step of a sampled continuation to the writer (step ``t`` drew from stream
        ``t``, with the history that step's pick saw)."""
        n = len(records)
        if n == 0:
            return
        self._offer(
            _Batch(
                rule=rule,
                origin=origin,
                source=SOURCE_CONTINUE,
                logits=_float16(np.stack(logits[:n])),
                histories=[list(h) for h in histories[:n]],
                streams=list(range(n)),
                token=[r.token for r in records],
                kept=[r.kept for r in records],
                entropy=[r.entropy for r in records],
                kept_mass=[r.kept_mass for r in records],
                prob=[r.prob for r in records],
                logprob=[r.logprob for r in records],
                fallback=[r.fallback or "" for r in records],
                time=time.time(),
            )
        )

    def _offer(self, batch: _Batch) -> None:
        size = batch.nbytes
        with self._lock:
            accepted = self._queued_bytes + size <= self._queue_bytes
            if accepted:
                self._queued_bytes += size
        if accepted:
            try:
                self._queue.put_nowait(batch)
                return
            except queue.Full:
                self._release(size)
        metrics.CAPTURE_DROPPED.labels(batch.origin.client, "queue_full").inc(batch.rows)

    def _release(self, size: int) -> None:
        with self._lock:
            self._queued_bytes -= size

    # -- the writer thread ----------------------------------------------------------------------

    def start(self) -> None:
        # A daemon, so that a disk that hangs cannot keep the process alive; close() joins it.
        self._thread = threading.Thread(target=self._run, name="keepset-capture", daemon=True)
        self._thread.start()

    def close(self, timeout: float = 30.0) -> None:
        """Write every row accepted so far, then stop the writer thread."""
        self._stop.set()
        with contextlib.suppress(queue.Full):
            self._queue.put_nowait(_STOP)  # wakes the writer at once; it also polls the flag
        if self._thread is not None:
            self._thread.join(timeout)

    def _run(self) -> None:
        self._tidy()
        pending: dict[tuple[str, int], _Pending] = {}
        while True:
            try:
                stopping = self._stop.is_set()
                batch = self._next(pending, stopping)
                if batch is not None:
                    self._take(pending, batch)
                elif stopping and self._queue.empty():
                    for key in list(pending):
                        self._write(key[0], pending.pop(key))
                    return
                now = time.monotonic()
                for key in [k for k, p in pending.items() if p.deadline <= now]:
                    self._write(key[0], pending.pop(key))
            except Exception:  # the writer must outlive anything a shard can throw at it
                self._log_error("capture writer: unexpected error", exc_info=True)

    def _next(self, pending: Mapping[tuple[str, int], _Pending], stopping: bool) -> _Batch | None:
        if stopping:
            try:
                batch = self._queue.get_nowait()
            except queue.Empty:
                return None
        else:
            deadline = min((p.deadline for p in pending.values()), default=math.inf)
            wait = min(self.flush_seconds, max(deadline - time.monotonic(), 0.0))
            try:
                batch = self._queue.get(timeout=wait)
            except queue.Empty:
                return None
        if batch is not None:
            self._release(batch.nbytes)
        return batch

    def _take(self, pending: dict[tuple[str, int], _Pending], batch: _Batch) -> None:
        """Add a batch's rows to their shard, writing the shard first whenever a row would take
        it past the row count or the byte bound."""
        client = batch.origin.client
        key = (client, batch.vocab)
        limit = min(self.shard_bytes, batch.rule.max_bytes)
        for i in range(batch.rows):
            if SHARD_OVERHEAD + batch.row_bytes(i) > limit:
                metrics.CAPTURE_DROPPED.labels(client, "too_large").inc()
                continue
            shard = pending.get(key)
            if shard is not None and (
                shard.rows >= self.shard_rows or shard.bytes + batch.row_bytes(i) > limit
            ):
                self._write(client, pending.pop(key))
                shard = None
            if shard is None:
                shard = pending[key] = _Pending(batch.rule, time.monotonic() + self.flush_seconds)
            shard.add(batch, i)
        shard = pending.get(key)
        if shard is not None and shard.rows >= self.shard_rows:
            self._write(client, pending.pop(key))

    def _write(self, client: str, pending: _Pending) -> None:
        folder = self.folder / client
        self._sequence += 1
        stamp = datetime.now(UTC).strftime("%Y%m%dT%H%M%S")
        path = folder / f"{stamp}-{os.getpid()}-{self._sequence:06d}{SUFFIX}"
        try:
            folder.mkdir(parents=True, exist_ok=True)
            write_shard(path, _shard(client, pending.parts))
        except (OSError, ValueError) as exc:
            metrics.CAPTURE_DROPPED.labels(client, "write_error").inc(pending.rows)
            self._log_error(f"capture: cannot write a shard for {client} in {folder}: {exc}")
            return
        metrics.CAPTURE_ROWS.labels(client).inc(pending.rows)
        try:
            left, deleted = prune(folder, pending.rule.max_bytes)
        except OSError as exc:
            self._log_error(f"capture: cannot check the size of {folder}: {exc}")
            return
        metrics.CAPTURE_BYTES.labels(client).set(left)
        if deleted:
            metrics.CAPTURE_PRUNED.labels(client).inc(deleted)

    def _tidy(self) -> None:
        """Remove the temporary files of writes that crashed, and measure what survived."""
        try:
            folders = [p for p in self.folder.iterdir() if p.is_dir()]
        except OSError as exc:
            self._log_error(f"capture: cannot list {self.folder}: {exc}")
            return
        for folder in folders:
            with contextlib.suppress(OSError):
                remove_stale_temporaries(folder, STALE_TEMP_SECONDS)
                metrics.CAPTURE_BYTES.labels(folder.name).set(sum(shard_sizes(folder).values()))

    def _log_error(self, message: str, exc_info: bool = False) -> None:
        # A full disk fails every write: once a minute in the log is enough, the counter has all.
        now = time.monotonic()
        if now - self._last_error_log >= ERROR_LOG_SECONDS:
            self._last_error_log = now
            log.error(message, exc_info=exc_info)


def _float16(rows: npt.NDArray[np.float32]) -> npt.NDArray[np.float16]:
    # Finite values beyond float16's range become +-inf, which the shard format documents.
    with np.errstate(over="ignore"):
        return rows.astype(np.float16)


def _shard(client: str, parts: Sequence[tuple[_Batch, int, int]]) -> Shard:
    rows = [(b, i) for b, start, end in parts for i in range(start, end)]
    histories = [b.histories[i] for b, i in rows]
    offsets = np.zeros(len(rows) + 1, np.int64)
    offsets[1:] = np.cumsum([len(h) for h in histories])
    history = np.fromiter((t for h in histories for t in h), np.int32, count=int(offsets[-1]))
    return Shard(
        client=client,
        logits=np.concatenate([b.logits[start:end] for b, start, end in parts]),
        history=history,
        history_offsets=offsets,
        seed=np.array([b.origin.seed for b, _ in rows], np.uint64),
        stream=np.array([b.streams[i] for b, i in rows], np.int64),
        source=np.array([b.source for b, _ in rows], np.uint8),
        request_id=np.array([b.origin.request_id for b, _ in rows], np.str_),
        policy=np.array([b.origin.policy for b, _ in rows], np.str_),
        arm=np.array([b.origin.arm for b, _ in rows], np.str_),
        version=np.array([b.origin.version for b, _ in rows], np.int32),
        token=np.array([b.token[i] for b, i in rows], np.int32),
        kept=np.array([b.kept[i] for b, i in rows], np.int32),
        entropy=np.array([b.entropy[i] for b, i in rows], np.float64),
        kept_mass=np.array([b.kept_mass[i] for b, i in rows], np.float64),
        prob=np.array([b.prob[i] for b, i in rows], np.float64),
        logprob=np.array([b.logprob[i] for b, i in rows], np.float64),
        fallback=np.array([b.fallback[i] for b, i in rows], np.str_),
        time=np.array([b.time for b, _ in rows], np.float64),
    )


def shard_sizes(folder: Path) -> dict[str, int]:
    """The finished shards directly in ``folder`` and their sizes; shards that another worker
    deletes meanwhile are left out."""
    sizes = {}
    for entry in os.scandir(folder):
        if entry.name.endswith(SUFFIX) and not entry.name.startswith("."):
            with contextlib.suppress(FileNotFoundError):
                sizes[entry.name] = entry.stat().st_size
    return sizes


def prune(folder: Path, max_bytes: int) -> tuple[int, int]:
    """Delete the oldest shards (by name, which sorts by time) until the folder's shards take at
    most ``max_bytes``; returns the bytes left and the shards deleted. Several workers may prune
    one folder at once: a shard already gone counts as deleted by the other."""
    sizes = shard_sizes(folder)
    total = sum(sizes.values())
    deleted = 0
    for name in sorted(sizes):
        if total <= max_bytes:
            break
        try:
            (folder / name).unlink()
            deleted += 1
        except FileNotFoundError:
            pass
        total -= sizes[name]
    return total, deleted


def remove_stale_temporaries(folder: Path, older_than: float) -> int:
    """Remove the temporary files (``.*.tmp``) that a crashed write left, if older than
    ``older_than`` seconds (younger ones may belong to a write in progress)."""
    removed = 0
    now = time.time()
    for path in folder.glob(".*.tmp"):
        with contextlib.suppress(FileNotFoundError):
            if now - path.stat().st_mtime > older_than:
                path.unlink()
                removed += 1
    return removed


def warn_if_off(routes: Mapping[str, Route], folder: Path | None) -> None:
    """One warning when routes ask for capture that cannot happen (no KEEPSET_CAPTURE_DIR)."""
    asking = sorted(client for client, route in routes.items() if route.capture is not None)
    if asking and folder is None:
        log.warning(
            "routes.yaml asks to capture rows of %s, but KEEPSET_CAPTURE_DIR is not set: "
            "capture is off",
            ", ".join(asking),
        )

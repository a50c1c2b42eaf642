"""Outcomes: what a client reports about a request it was served, where the reports are kept,
and the per-arm experiment report built from them.

An outcome names a ``request_id`` (which proves, by its MAC, which client, policy version and
arm served the request: see ``request_ids``) and carries a number, a label, or both. Reports go
to one SQLite file that every worker shares (WAL mode, so readers never block the writer), one
row per request id: a second report for the same request is refused and nothing is counted
twice. The report aggregates in SQL over every worker's rows and adds the statistics of
``experiment``.
"""

from __future__ import annotations

import math
import os
import sqlite3
import tempfile
import threading
import time
from collections.abc import Mapping
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

from pydantic import BaseModel, ConfigDict, Field

from service.experiment import (
    MeanComparison,
    Moments,
    ShareComparison,
    label_share,
    mean_estimate,
    two_shares,
    welch,
)
from service.policy import format_ref
from service.problems import Problem
from service.request_ids import MAX_ID_CHARS, RequestIds
from service.routing import Route

# Inside the metrics folder of `keepset serve`; not *.db, which the Prometheus multiprocess
# collector would try to read as its own files.
DB_NAME = "outcomes.sqlite3"


class OutcomeBody(BaseModel):
    """JSON body of ``POST /v1/outcome``."""

    model_config = ConfigDict(extra="forbid")

    request_id: str = Field(min_length=1, max_length=MAX_ID_CHARS)
    # Strict: true/false and "3" are not numbers; non-finite values are checked after
    # parsing, so that they get a 422 rather than a 400.
    value: float | None = Field(default=None, strict=True)
    label: str | None = Field(default=None, min_length=1, max_length=64)


@dataclass(frozen=True)
class Outcome:
    """One recorded outcome, as stored."""

    request_id: str
    client: str
    policy: str
    version: int
    arm: str
    value: float | None
    label: str | None
    issued: int
    at: float

    def as_dict(self) -> dict[str, Any]:
        return asdict(self)


def check_outcome(
    ids: RequestIds,
    client: str,
    route: Route,
    body: OutcomeBody,
    max_age_seconds: float,
    now: float | None = None,
) -> Outcome:
    """The outcome to store, or the problem with it: an id not issued to this client (404, the
    same answer whether it exists for someone else or not at all), too old (410), a value that
    is not finite or a label the route does not declare (422)."""
    now = time.time() if now is None else now
    issued = ids.verify(client, body.request_id)
    if issued is None:
        raise Problem(404, "unknown-request", "no request with this request_id was served to you")
    if now - issued.issued > max_age_seconds:
        raise Problem(
            410,
            "request-too-old",
            f"outcomes are taken for {max_age_seconds:g} s after the request "
            "(KEEPSET_OUTCOME_MAX_AGE_SECONDS)",
        )
    if body.value is not None and not math.isfinite(body.value):
        raise Problem(422, "bad-outcome-value", "value must be a finite number")
    if body.label is not None and body.label not in route.outcome_labels:
        declared = ", ".join(route.outcome_labels)
        detail = (
            f"label {body.label!r} is not one of this client's outcome labels: {declared}"
            if declared
            else "this client's route declares no outcome labels (routes.yaml: outcomes: "
            "{labels: [...]}); report a value instead"
        )
        raise Problem(422, "bad-outcome-label", detail, allowed=list(route.outcome_labels))
    return Outcome(
        body.request_id,
        client,
        issued.policy,
        issued.version,
        issued.arm,
        body.value,
        body.label,
        issued.issued,
        now,
    )


# -- the store ---------------------------------------------------------------------------------


class DuplicateOutcome(Exception):
    """An outcome for this request id is already stored."""


class StoreBusy(Exception):
    """The store could not be written or read in time."""


@dataclass
class ArmOutcomes:
    """One (client, arm)'s stored outcomes: how many, the moments of their values, the count
    of each label."""

    outcomes: int = 0
    values: Moments = field(default_factory=lambda: Moments(0, 0.0, 0.0))
    labels: dict[str, int] = field(default_factory=dict)


_SCHEMA = """
CREATE TABLE IF NOT EXISTS outcomes (
    request_id TEXT PRIMARY KEY,
    client TEXT NOT NULL,
    policy TEXT NOT NULL,
    version INTEGER NOT NULL,
    arm TEXT NOT NULL,
    value REAL,
    label TEXT,
    issued INTEGER NOT NULL,
    at REAL NOT NULL
);
CREATE INDEX IF NOT EXISTS outcomes_by_arm ON outcomes (client, arm);
"""

# The squares are summed around each arm's mean (a second pass over the rows): the textbook
# sum(x^2) - n mean^2 loses every digit when the mean is large against the spread.
_MOMENTS = """
SELECT o.client, o.arm, COUNT(*), COUNT(o.value), AVG(o.value),
       SUM((o.value - m.mean) * (o.value - m.mean))
FROM outcomes AS o
JOIN (SELECT client, arm, AVG(value) AS mean FROM outcomes GROUP BY client, arm) AS m
  ON o.client = m.client AND o.arm = m.arm
GROUP BY o.client, o.arm
"""
_LABELS = """
SELECT client, arm, label, COUNT(*) FROM outcomes WHERE label IS NOT NULL
GROUP BY client, arm, label
"""


class OutcomeStore:
    """The SQLite file of outcomes; one connection per worker, used from worker threads."""

    def __init__(self, path: Path, *, temporary: bool = False):
        self.path = path
        self.temporary = temporary
        self._lock = threading.Lock()
        # Autocommit: every write is one statement, and reads open their own transaction.
        self._db = sqlite3.connect(
            path, timeout=10.0, isolation_level=None, check_same_thread=False
        )
        try:
            self._db.execute("PRAGMA busy_timeout = 10000")
            self._db.execute("PRAGMA journal_mode = WAL")
            self._db.execute("PRAGMA synchronous = NORMAL")
            self._db.executescript(_SCHEMA)
        except sqlite3.Error:
            self._db.close()
            raise

    def add(self, outcome: Outcome) -> None:
        row = (
            outcome.request_id,
            outcome.client,
            outcome.policy,
            outcome.version,
            outcome.arm,
            outcome.value,
            outcome.label,
            outcome.issued,
            outcome.at,
        )
        with self._lock:
            try:
                self._db.execute("INSERT INTO outcomes VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)", row)
            except sqlite3.IntegrityError:
                raise DuplicateOutcome(outcome.request_id) from None
            except sqlite3.OperationalError as exc:
                raise StoreBusy(str(exc)) from None

    def by_arm(self) -> dict[tuple[str, str], ArmOutcomes]:
        """Every (client, arm)'s outcomes, from all workers, read in one transaction."""
        out: dict[tuple[str, str], ArmOutcomes] = {}
        with self._lock:
            try:
                self._db.execute("BEGIN")
                try:
                    moments = self._db.execute(_MOMENTS).fetchall()
                    labels = self._db.execute(_LABELS).fetchall()
                finally:
                    self._db.execute("COMMIT")
            except sqlite3.OperationalError as exc:
                raise StoreBusy(str(exc)) from None
        for client, arm, count, n, mean, squares in moments:
            out[(client, arm)] = ArmOutcomes(
                count, Moments(n, mean or 0.0, max(squares or 0.0, 0.0))
            )
        for client, arm, label, count in labels:
            out.setdefault((client, arm), ArmOutcomes()).labels[label] = count
        return out

    def close(self) -> None:
        with self._lock:
            self._db.close()
        if self.temporary:
            for suffix in ("", "-wal", "-shm"):
                Path(f"{self.path}{suffix}").unlink(missing_ok=True)


def open_store(configured: Path | None) -> OutcomeStore:
    """The configured file; else one in the metrics folder that `keepset serve` makes for each
    start (shared by its workers, gone with it); else, in process, a temporary file."""
    if configured is not None:
        return OutcomeStore(configured)
    folder = os.environ.get("PROMETHEUS_MULTIPROC_DIR")
    if folder:
        return OutcomeStore(Path(folder) / DB_NAME)
    handle, name = tempfile.mkstemp(prefix="keepset-outcomes-", suffix=".sqlite3")
    os.close(handle)
    return OutcomeStore(Path(name), temporary=True)


# -- the report --------------------------------------------------------------------------------


def _plain(value: Any) -> Any:
    """Dataclass results as JSON: tuples become lists, non-finite numbers null."""
    if isinstance(value, dict):
        return {k: _plain(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_plain(v) for v in value]
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


def _comparison(result: MeanComparison | ShareComparison) -> dict[str, Any]:
    return {k: _plain(v) for k, v in asdict(result).items()}


def client_report(
    route: Route,
    requests: Mapping[str, int],
    stored: Mapping[str, ArmOutcomes],
    since: str,
) -> dict[str, Any]:
    """One client's outcomes per arm and each arm against the first arm (the control)."""
    labels = [arm.public_label(i) for i, arm in enumerate(route.arms)]
    empty = ArmOutcomes()
    arms: dict[str, Any] = {}
    for label, arm in zip(labels, route.arms, strict=True):
        got = stored.get(label, empty)
        labelled = sum(got.labels.values())
        arms[label] = {
            "policy": format_ref(*arm.policy),
            "requests": requests.get(label, 0),
            "outcomes": got.outcomes,
            "value": _plain(asdict(mean_estimate(got.values))),
            "labelled": labelled,
            "labels": {
                name: _plain(asdict(label_share(got.labels.get(name, 0), labelled)))
                for name in route.outcome_labels
            },
        }
    control = stored.get(labels[0], empty)
    control_labelled = sum(control.labels.values())
    versus: dict[str, Any] = {}
    for label in labels[1:]:
        got = stored.get(label, empty)
        labelled = sum(got.labels.values())
        versus[label] = {
            "value": _comparison(welch(control.values, got.values)),
            "labels": {
                name: _comparison(
                    two_shares(
                        control.labels.get(name, 0),
                        control_labelled,
                        got.labels.get(name, 0),
                        labelled,
                    )
                )
                for name in route.outcome_labels
            },
        }
    return {
        "since": since,
        "labels": list(route.outcome_labels),
        "control": labels[0],
        "arms": arms,
        "versus_control": versus,
    }


def add_outcome_report(
    described: dict[str, Any], routes: Mapping[str, Route], store: OutcomeStore, since: str
) -> dict[str, Any]:
    """Add each client's ``outcomes`` block to the routes report, next to its ``split`` (whose
    request counts it reuses); blocking, it reads the store."""
    try:
        stored = store.by_arm()
    except StoreBusy as exc:
        raise busy_problem(exc) from None
    for client, route in routes.items():
        entry = described["clients"][client]
        mine = {arm: v for (c, arm), v in stored.items() if c == client}
        requests = entry.get("split", {}).get("requests", {})
        entry["outcomes"] = client_report(route, requests, mine, since)
    return described


def save_outcome(store: OutcomeStore, outcome: Outcome) -> None:
    """Store the outcome (blocking), or the problem: already reported (409), store busy (503)."""
    try:
        store.add(outcome)
    except DuplicateOutcome:
        raise Problem(
            409,
            "outcome-already-reported",
            "an outcome for this request_id is already recorded; each request counts once",
        ) from None
    except StoreBusy as exc:
        raise busy_problem(exc) from None


def busy_problem(exc: Exception) -> Problem:
    return Problem(
        503,
        "outcomes-busy",
        f"the outcome store is busy ({exc}); retry",
        headers={"Retry-After": "1"},
    )

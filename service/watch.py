"""The collapse watch: recent kept-set sizes of each served policy version against its promise.

A policy file states ``expect.kept_median_min``, the median kept-set size it should keep in
normal traffic. The watch keeps, per (policy, version), a sliding window of the kept sizes of
the last ``window`` served rows (pick rows and continuation steps alike). Once the window holds
at least ``min_steps`` rows and its median falls below the floor, the version is *collapsed*;
it clears when the median is back at or above the floor. The watch only reports transitions;
the HTTP layer turns them into the ``keepset_collapse_active`` gauge and one log line each.
Each worker process watches the rows it served; the gauge takes the max over live workers.
"""

from __future__ import annotations

import threading
from collections import deque
from collections.abc import Sequence
from dataclasses import dataclass, field

Key = tuple[str, int]


@dataclass(frozen=True)
class Transition:
    """A policy version that just collapsed (``active``) or just recovered."""

    policy: str
    version: int
    active: bool
    median: float
    floor: float
    rows: int


@dataclass
class CollapseWatch:
    window: int = 200
    min_steps: int = 50
    _recent: dict[Key, deque[int]] = field(default_factory=dict)
    _active: set[Key] = field(default_factory=set)
    # Picks and continuations feed the watch from the event loop; the lock keeps it whole for a
    # caller in another thread: a transition is reported once, a window never read mid-change.
    _lock: threading.Lock = field(default_factory=threading.Lock)

    def __post_init__(self) -> None:
        if self.window < 1 or not 1 <= self.min_steps <= self.window:
            raise ValueError("need window >= 1 and 1 <= min_steps <= window")

    def observe(
        self, policy: str, version: int, kept: Sequence[int], floor: float
    ) -> Transition | None:
        """Add served rows' kept sizes; return the transition they cause, if any."""
        with self._lock:
            return self._observe((policy, version), kept, floor)

    def _observe(self, key: Key, kept: Sequence[int], floor: float) -> Transition | None:
        recent = self._recent.get(key)
        if recent is None:
            recent = self._recent[key] = deque(maxlen=self.window)
        recent.extend(kept)
        if len(recent) < self.min_steps:
            return None
        median = _median(recent)
        collapsed = median < floor
        if collapsed == (key in self._active):
            return None
        if collapsed:
            self._active.add(key)
        else:
            self._active.discard(key)
        return Transition(key[0], key[1], collapsed, median, floor, len(recent))

    def active(self) -> set[Key]:
        with self._lock:
            return set(self._active)

    def median(self, policy: str, version: int) -> tuple[float, int] | None:
        """The median kept size in the window and how many rows it holds, once the window holds
        at least ``min_steps`` (the collapse guard's recovery check reads it)."""
        with self._lock:
            recent = self._recent.get((policy, version))
            if recent is None or len(recent) < self.min_steps:
                return None
            return _median(recent), len(recent)


def _median(values: deque[int]) -> float:
    """The median of a window of kept sizes (the mean of the middle two for an even count):
    numpy's answer, at a sixth of its cost for the few hundred ints of a window, on every
    served request."""
    ordered = sorted(values)
    n = len(ordered)
    return (ordered[n // 2] + ordered[(n - 1) // 2]) / 2

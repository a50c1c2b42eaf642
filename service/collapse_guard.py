"""The collapse guard's state: per client and guarded policy version, engaged or not, since when.

A route may declare a guard (``routes.yaml``: ``guard: {fallback, hold_seconds,
recover_margin}``). For each (client, arm version) it applies to, the guard is *engaged* as soon
as the collapse watch holds that version collapsed, and *released* only when all of these hold:

- the watch no longer holds the version collapsed,
- the median of the version's window is at least ``expect.kept_median_min + recover_margin``
  (hysteresis: with a margin, a median that hovers at the floor does not flap the guard),
- ``hold_seconds`` have passed since it engaged (a minimum time on the fallback).

The state is per worker process, like the watch it reads; nothing here serves, records or logs:
:mod:`service.fallback_serving` asks for the state and reports the changes. The clock is
injectable so the rules can be checked without waiting.
"""

from __future__ import annotations

import threading
import time
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field

from service.routing import GuardSpec, Ref, Route
from service.watch import CollapseWatch

Key = tuple[str, Ref]  # (client, guarded version)


@dataclass(frozen=True)
class GuardChange:
    """A guard that just engaged or was just released, with the numbers behind it."""

    client: str
    version: Ref
    fallback: Ref
    engaged: bool
    reason: str  # collapsed | recovered | unrouted
    median: float | None
    floor: float | None
    recover_at: float | None
    rows: int
    held_seconds: float


def may_release(
    *,
    collapsed: bool,
    median: float | None,
    floor: float,
    margin: float,
    engaged_at: float,
    hold_seconds: float,
    now: float,
) -> bool:
    """Whether an engaged guard may let its version serve again."""
    return (
        not collapsed
        and median is not None
        and median >= floor + margin
        and now - engaged_at >= hold_seconds
    )


def applies(route: Route, version: Ref) -> bool:
    """Whether the route's guard covers requests routed to ``version``: never the fallback
    itself (it serves on, collapsed or not), never a version the route no longer has."""
    return (
        route.guard is not None
        and version != route.guard.fallback
        and any(arm.policy == version for arm in route.arms)
    )


@dataclass
class _Engagement:
    since: float
    fallback: Ref
    fallback_collapse_seen: bool = False


@dataclass
class CollapseGuard:
    """Engaged guards of one worker, keyed by (client, guarded version)."""

    clock: Callable[[], float] = time.monotonic
    _engaged: dict[Key, _Engagement] = field(default_factory=dict)
    # Updates come from the event loop and from after-answer tasks in worker threads.
    _lock: threading.Lock = field(default_factory=threading.Lock)
    _routes_seen: Mapping[str, Route] | None = None

    def engaged(self, client: str, version: Ref) -> bool:
        return (client, version) in self._engaged

    def update(
        self,
        client: str,
        version: Ref,
        spec: GuardSpec,
        floor: float | None,
        watch: CollapseWatch,
    ) -> GuardChange | None:
        """Bring the guard of (client, version) up to date with the watch; the change, if any."""
        if floor is None:  # a version without a promise is never watched, so never guarded
            return None
        key = (client, version)
        collapsed = version in watch.active()
        if not collapsed and key not in self._engaged:
            return None  # the common case, without computing a median
        window = watch.median(*version)
        median, rows = window if window is not None else (None, 0)

        def change(*, engaged: bool, reason: str, held_seconds: float) -> GuardChange:
            return GuardChange(
                client=client,
                version=version,
                fallback=spec.fallback,
                engaged=engaged,
                reason=reason,
                median=median,
                floor=floor,
                recover_at=floor + spec.recover_margin,
                rows=rows,
                held_seconds=held_seconds,
            )

        with self._lock:
            now = self.clock()
            state = self._engaged.get(key)
            if state is None:
                if not collapsed:
                    return None
                self._engaged[key] = _Engagement(now, spec.fallback)
                return change(engaged=True, reason="collapsed", held_seconds=0.0)
            if not may_release(
                collapsed=collapsed,
                median=median,
                floor=floor,
                margin=spec.recover_margin,
                engaged_at=state.since,
                hold_seconds=spec.hold_seconds,
                now=now,
            ):
                return None
            del self._engaged[key]
            return change(engaged=False, reason="recovered", held_seconds=now - state.since)

    def first_fallback_collapse(self, client: str, version: Ref) -> bool:
        """True the first time in an engagement that its fallback is found collapsed too."""
        with self._lock:
            state = self._engaged.get((client, version))
            if state is None or state.fallback_collapse_seen:
                return False
            state.fallback_collapse_seen = True
            return True

    def forget_unrouted(self, routes: Mapping[str, Route]) -> list[GuardChange]:
        """Release guards that ``routes`` no longer applies (a reload changed the route); only
        looks when the routes mapping is not the one it saw last."""
        with self._lock:
            if routes is self._routes_seen:
                return []
            self._routes_seen = routes
            now = self.clock()
            changes = []
            for (client, version), state in list(self._engaged.items()):
                route = routes.get(client)
                if route is not None and applies(route, version):
                    continue
                del self._engaged[(client, version)]
                changes.append(
                    GuardChange(
                        client=client,
                        version=version,
                        fallback=state.fallback,
                        engaged=False,
                        reason="unrouted",
                        median=None,
                        floor=None,
                        recover_at=None,
                        rows=0,
                        held_seconds=now - state.since,
                    )
                )
            return changes

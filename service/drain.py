"""Graceful drain: what a worker does between SIGTERM and its exit.

On the first SIGTERM a worker starts *draining*: ``/readyz`` answers 503 at once (so a
Service or load balancer stops sending traffic), new ``/v1/`` requests get 503 with
``Retry-After`` (another replica, or this pod's successor, takes them), and everything already
in flight (picks, continuations, streams) runs to its end. After ``KEEPSET_DRAIN_SECONDS`` the
worker hands the signal to uvicorn, which stops listening and gives what is still running up to
``KEEPSET_SHUTDOWN_SECONDS`` before it cancels it. A second SIGTERM skips the rest of the drain.

uvicorn installs its own SIGTERM handler when a worker starts serving; ``install`` wraps it
from the app's start-up, so the drain comes first and uvicorn's shutdown follows unchanged.
"""

from __future__ import annotations

import asyncio
import logging
import signal
from collections.abc import Callable
from types import FrameType
from typing import Any

log = logging.getLogger("keepset")

Handler = Callable[[int, FrameType | None], Any]


def install(
    loop: asyncio.AbstractEventLoop,
    drain_seconds: float,
    start_draining: Callable[[], None],
) -> bool:
    """Put the drain in front of the SIGTERM handler in place (uvicorn's); False when there is
    none to wrap (not the main thread, or no server handler: then nothing changes)."""
    try:
        previous = signal.getsignal(signal.SIGTERM)
    except ValueError:
        return False
    if not callable(previous):
        return False
    state = {"draining": False}

    def on_term(signum: int, frame: FrameType | None) -> None:
        if state["draining"]:  # asked again: stop draining, shut down now
            previous(signum, frame)
            return
        state["draining"] = True
        start_draining()
        log.warning(
            "SIGTERM: draining for %g s (readiness 503, new requests 503), then shutting down",
            drain_seconds,
        )
        loop.call_soon_threadsafe(loop.call_later, drain_seconds, previous, signum, frame)

    try:
        signal.signal(signal.SIGTERM, on_term)
    except ValueError:  # not the main thread of the main interpreter
        return False
    return True

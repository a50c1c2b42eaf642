"""Admission, in front of every handler: a draining worker (503 with Retry-After), overload
(429 with Retry-After), a declared body over the limit (413), reading bodies within the limit,
and the request-duration metric with bounded endpoint labels. A plain ASGI middleware: the
decorator form streams every body through extra tasks.
"""

from __future__ import annotations

import time
from typing import Any

from fastapi import Request

from service import metrics, problems
from service.live import Live
from service.problems import Problem

_EXACT_ENDPOINTS = {
    "/v1/pick",
    "/v1/continue",
    "/v1/outcome",
    "/v1/policies",
    "/v1/routes",
    "/v1/registry/reload",
    "/metrics",
    "/healthz",
    "/readyz",
}


def endpoint_label(path: str) -> str:
    """Route templates, not raw paths: the label set stays bounded whatever clients send."""
    if path in _EXACT_ENDPOINTS:
        return path
    if path.startswith("/v1/policies/"):
        depth = path.count("/", len("/v1/policies/"))
        return "/v1/policies/{name}" if depth == 0 else "/v1/policies/{name}/{version}"
    return "other"


class Admission:
    """Draining (503), overload (429), declared body size (413) and request timing, before any
    handler runs."""

    def __init__(self, app: Any, live: Live):
        self.app = app
        self.live = live

    async def __call__(self, scope: Any, receive: Any, send: Any) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        live = self.live
        started = time.perf_counter()
        path: str = scope["path"]
        status = [500]

        async def send_and_note(message: Any) -> None:
            if message["type"] == "http.response.start":
                status[0] = message["status"]
            await send(message)

        problem: Problem | None = None
        if path.startswith("/v1/") and live.draining:
            problem = Problem(
                503,
                "draining",
                "this worker is shutting down; retry (another replica or its successor answers)",
                headers={"Retry-After": str(live.settings.retry_after_seconds)},
            )
        elif path.startswith("/v1/") and live.in_flight >= live.settings.max_in_flight:
            problem = Problem(
                429,
                "overloaded",
                f"more than {live.settings.max_in_flight} requests in work; retry shortly",
                headers={"Retry-After": str(live.settings.retry_after_seconds)},
            )
        else:
            for name, value in scope.get("headers", ()):
                if name == b"content-length" and value.isdigit():
                    if int(value) > live.settings.max_body_bytes:
                        problem = too_large_body(live)
                    break
        if problem is not None:
            await problems.problem_response(problem)(scope, receive, send_and_note)
        else:
            live.in_flight += 1
            try:
                await self.app(scope, receive, send_and_note)
            finally:
                live.in_flight -= 1
        duration = metrics.series(metrics.REQUEST_DURATION, endpoint_label(path), str(status[0]))
        duration.observe(time.perf_counter() - started)


def too_large_body(live: Live) -> Problem:
    return Problem(
        413,
        "body-too-large",
        f"the body is over KEEPSET_MAX_BODY_BYTES={live.settings.max_body_bytes}",
    )


async def read_body(request: Request, live: Live) -> bytes:
    limit = live.settings.max_body_bytes
    chunks: list[bytes] = []
    size = 0
    async for chunk in request.stream():
        size += len(chunk)
        if size > limit:
            raise too_large_body(live)
        chunks.append(chunk)
    return b"".join(chunks)

"""Errors as RFC 9457 problem details: one exception type and the handlers that render it.

Every error keepset returns is ``application/problem+json`` with ``type``, ``title``,
``status`` and ``detail``; the ``type`` is a URN naming the kind of problem, stable for
clients to branch on (``urn:keepset:problem:<slug>``).
"""

from __future__ import annotations

import json
from typing import Any

from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from starlette.exceptions import HTTPException as StarletteHTTPException
from starlette.responses import Response

MEDIA_TYPE = "application/problem+json"

_TITLES = {
    400: "Malformed request",
    401: "Missing or invalid key",
    403: "Not allowed",
    404: "Not found",
    405: "Method not allowed",
    409: "Conflict",
    410: "Gone",
    413: "Too large",
    415: "Unsupported media type",
    422: "Invalid values",
    429: "Overloaded",
    500: "Internal error",
    503: "Not ready",
}


class Problem(Exception):
    """Raise anywhere in request handling to answer with a problem document."""

    def __init__(
        self,
        status: int,
        slug: str,
        detail: str,
        *,
        headers: dict[str, str] | None = None,
        **extra: Any,
    ):
        super().__init__(detail)
        self.status = status
        self.slug = slug
        self.detail = detail
        self.headers = headers or {}
        self.extra = extra


def problem_response(problem: Problem) -> Response:
    body = {
        "type": f"urn:keepset:problem:{problem.slug}",
        "title": _TITLES.get(problem.status, "Error"),
        "status": problem.status,
        "detail": problem.detail,
        **problem.extra,
    }
    return Response(
        json.dumps(body), status_code=problem.status, media_type=MEDIA_TYPE, headers=problem.headers
    )


def install(app: FastAPI) -> None:
    """Render every error the app can raise as a problem document."""

    async def on_problem(request: Request, exc: Exception) -> Response:
        assert isinstance(exc, Problem)
        return problem_response(exc)

    async def on_validation(request: Request, exc: Exception) -> Response:
        assert isinstance(exc, RequestValidationError)
        errors = [
            {"where": ".".join(str(p) for p in e.get("loc", ())), "problem": e.get("msg", "")}
            for e in exc.errors()
        ]
        detail = "; ".join(f"{e['where']}: {e['problem']}" for e in errors)
        return problem_response(Problem(400, "malformed", detail, errors=errors))

    async def on_http(request: Request, exc: Exception) -> Response:
        assert isinstance(exc, StarletteHTTPException)
        slug = {404: "not-found", 405: "method-not-allowed"}.get(exc.status_code, "http")
        return problem_response(
            Problem(exc.status_code, slug, str(exc.detail), headers=dict(exc.headers or {}))
        )

    async def on_crash(request: Request, exc: Exception) -> Response:
        return problem_response(Problem(500, "internal", "keepset failed; the log has details"))

    app.add_exception_handler(Problem, on_problem)
    app.add_exception_handler(RequestValidationError, on_validation)
    app.add_exception_handler(StarletteHTTPException, on_http)
    app.add_exception_handler(Exception, on_crash)

"""The HTTP layer: a thin FastAPI app over auth, routing, policies, the sampler and metrics.

Each handler reads the request, asks the current registry snapshot who the client is routed
to, runs the sampler off the event loop, records metrics and answers; everything else lives in
its own module. The registry snapshot is swapped by one attribute assignment, so a request sees
the old registry or the new one, never a mix.
"""

from __future__ import annotations

import asyncio
import base64
import binascii
import contextlib
import json
import logging
import random
import signal
import time
import uuid
from collections.abc import AsyncIterator
from dataclasses import dataclass, field
from functools import partial
from typing import Any

import numpy as np
import orjson
from fastapi import FastAPI, Request
from fastapi.responses import JSONResponse, StreamingResponse
from pydantic import BaseModel, ConfigDict, Field, StrictInt, ValidationError
from starlette.background import BackgroundTask
from starlette.concurrency import run_in_threadpool
from starlette.responses import Response

from service import metrics, problems
from service.keys import Identity, KeyRing, load_keyring
from service.model import Model, ModelError, PromptError, PromptTooLong
from service.npy import NpyError, read_npy
from service.policy import AdjustError, Policy, apply_adjust
from service.problems import Problem
from service.prompting import PromptRun, StepRecord
from service.ratio import sample_ratio
from service.registry import RegistrySnapshot, load_registry, reload_registry
from service.routing import Route, choose_arm
from service.sampling import Chain, InputError, as_batch, pick
from service.settings import Settings
from service.watch import CollapseWatch

log = logging.getLogger("keepset")

NPY_MEDIA = "application/x-npy"
# Picks up to this many logits run on the event loop (a few ms at most); larger ones in a thread.
_INLINE_ELEMENTS = 1 << 20


class PickBody(BaseModel):
    """JSON body of ``POST /v1/pick``."""

    model_config = ConfigDict(extra="forbid")

    # Checked by numpy's conversion, not field by field: per-number validation of a 128k row
    # would cost more than the sampling.
    logits: Any = None
    logits_npy: str | None = Field(default=None, description="base64 of .npy bytes")
    history: list[list[StrictInt]] | None = None
    seed: StrictInt | None = Field(default=None, ge=0, lt=2**64)
    routing_key: str | None = Field(default=None, max_length=512)
    adjust: dict[str, float] = {}


class ContinueBody(BaseModel):
    """JSON body of ``POST /v1/continue``."""

    model_config = ConfigDict(extra="forbid")

    prompt: str = Field(max_length=1_000_000)
    budget: StrictInt | None = Field(
        default=None, ge=1, description="tokens to generate at most; capped by the policy's"
    )
    seed: StrictInt | None = Field(default=None, ge=0, lt=2**64)
    routing_key: str | None = Field(default=None, max_length=512)
    adjust: dict[str, float] = {}
    stream: bool = False


@dataclass
class Live:
    """What the running app serves; ``snapshot`` is replaced whole on reload."""

    settings: Settings
    snapshot: RegistrySnapshot
    keys: KeyRing
    draining: bool = False
    in_flight: int = 0
    last_reload: dict[str, Any] = field(default_factory=dict)
    rng: random.Random = field(default_factory=random.Random)
    model: Model | None = None
    model_problem: str | None = "the model is still loading"
    watch: CollapseWatch = field(default_factory=CollapseWatch)


def create_app(settings: Settings | None = None) -> FastAPI:
    settings = settings or Settings()
    snapshot = load_registry(settings.policies)
    if settings.collapse_min_steps > settings.collapse_window:
        raise ValueError("KEEPSET_COLLAPSE_MIN_STEPS must not exceed KEEPSET_COLLAPSE_WINDOW")
    live = Live(
        settings=settings,
        snapshot=snapshot,
        keys=load_keyring(settings.keys),
        watch=CollapseWatch(settings.collapse_window, settings.collapse_min_steps),
    )
    if not snapshot.valid:
        log.warning("registry loaded with problems: %s", snapshot.problem_lines())
    metrics.set_arm_weights(_arm_shares(snapshot))
    for outcome in ("loaded", "kept_last_good"):  # present at 0, so increase() sees the first
        metrics.REGISTRY_RELOADS.labels(outcome)

    @contextlib.asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        loop = asyncio.get_running_loop()
        with contextlib.suppress(NotImplementedError, RuntimeError, ValueError):
            loop.add_signal_handler(signal.SIGHUP, lambda: _reload(live, "signal"))
        poller = asyncio.create_task(_poll_registry(live))
        loader = asyncio.create_task(_load_model(live))
        yield
        live.draining = True
        poller.cancel()
        loader.cancel()

    app = FastAPI(
        title="keepset",
        summary="Decoding policies as a governed, observable service.",
        version="0.1.0",
        lifespan=lifespan,
    )
    app.state.live = live
    problems.install(app)
    _install_middleware(app, live)
    _add_routes(app, live)
    return app


# --- middleware: limits, overload, timing ---------------------------------------------------


def _install_middleware(app: FastAPI, live: Live) -> None:
    # A plain ASGI middleware: the decorator form streams every body through extra tasks.
    app.add_middleware(_Guard, live=live)


_EXACT_ENDPOINTS = {
    "/v1/pick",
    "/v1/continue",
    "/v1/policies",
    "/v1/routes",
    "/v1/registry/reload",
    "/metrics",
    "/healthz",
    "/readyz",
}


def _endpoint_label(path: str) -> str:
    """Route templates, not raw paths: the label set stays bounded whatever clients send."""
    if path in _EXACT_ENDPOINTS:
        return path
    if path.startswith("/v1/policies/"):
        depth = path.count("/", len("/v1/policies/"))
        return "/v1/policies/{name}" if depth == 0 else "/v1/policies/{name}/{version}"
    return "other"


class _Guard:
    """Overload (429), declared body size (413) and request timing, before any handler runs."""

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
        if path.startswith("/v1/") and live.in_flight >= live.settings.max_in_flight:
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
                        problem = _too_large_body(live)
                    break
        if problem is not None:
            await problems.problem_response(problem)(scope, receive, send_and_note)
        else:
            live.in_flight += 1
            try:
                await self.app(scope, receive, send_and_note)
            finally:
                live.in_flight -= 1
        metrics.REQUEST_DURATION.labels(_endpoint_label(path), str(status[0])).observe(
            time.perf_counter() - started
        )


def _too_large_body(live: Live) -> Problem:
    return Problem(
        413,
        "body-too-large",
        f"the body is over KEEPSET_MAX_BODY_BYTES={live.settings.max_body_bytes}",
    )


async def _read_body(request: Request, live: Live) -> bytes:
    limit = live.settings.max_body_bytes
    chunks: list[bytes] = []
    size = 0
    async for chunk in request.stream():
        size += len(chunk)
        if size > limit:
            raise _too_large_body(live)
        chunks.append(chunk)
    return b"".join(chunks)


# --- auth ---------------------------------------------------------------------------------------


def _identity(request: Request, live: Live) -> Identity:
    header = request.headers.get("authorization", "")
    scheme, _, token = header.partition(" ")
    if scheme.lower() != "bearer" or not token.strip():
        raise Problem(
            401,
            "no-key",
            "send the API key as 'Authorization: Bearer <key>'",
            headers={"WWW-Authenticate": "Bearer"},
        )
    identity = live.keys.identify(token.strip())
    if identity is None:
        raise Problem(
            401, "bad-key", "the API key is not known", headers={"WWW-Authenticate": "Bearer"}
        )
    return identity


def _client(request: Request, live: Live) -> str:
    identity = _identity(request, live)
    if identity.role != "client":
        raise Problem(403, "not-a-client", "admin keys cannot sample; use a client key")
    return identity.name


def _admin(request: Request, live: Live) -> str:
    identity = _identity(request, live)
    if identity.role != "admin":
        raise Problem(403, "admin-only", "this endpoint needs an admin key")
    return identity.name


# --- the pick path --------------------------------------------------------------------------


@dataclass
class _PickInput:
    logits: np.ndarray
    history: list[list[int]] | None
    seed: int | None
    routing_key: str | None
    adjust: dict[str, float]


async def _pick_input(request: Request, live: Live) -> _PickInput:
    media = request.headers.get("content-type", "").split(";")[0].strip().lower()
    if media not in ("application/json", NPY_MEDIA):
        raise Problem(
            415,
            "media-type",
            f"send application/json or {NPY_MEDIA}, not {media or 'no Content-Type'}",
        )
    body = await _read_body(request, live)
    if media == NPY_MEDIA:
        return _npy_input(body, dict(request.query_params))
    try:
        data = orjson.loads(body)
    except orjson.JSONDecodeError:
        # orjson is strict JSON; the standard parser also takes NaN and Infinity, which many
        # JSON encoders emit for float rows.
        try:
            data = json.loads(body)
        except (json.JSONDecodeError, UnicodeDecodeError) as exc:
            raise Problem(400, "malformed-json", f"the body is not JSON: {exc}") from None
    try:
        parsed = PickBody.model_validate(data)
    except ValidationError as exc:
        raise Problem(400, "malformed", _validation_text(exc)) from None
    if (parsed.logits is None) == (parsed.logits_npy is None):
        raise Problem(400, "malformed", "send exactly one of 'logits' and 'logits_npy'")
    if parsed.logits_npy is not None:
        try:
            raw = base64.b64decode(parsed.logits_npy, validate=True)
        except (binascii.Error, ValueError):
            raise Problem(400, "malformed", "logits_npy is not valid base64") from None
        logits = _npy(raw)
    else:
        logits = _json_logits(parsed.logits)
    return _PickInput(logits, parsed.history, parsed.seed, parsed.routing_key, parsed.adjust)


def _validation_text(exc: ValidationError) -> str:
    return "; ".join(
        f"{'.'.join(str(p) for p in e['loc']) or 'body'}: {e['msg']}" for e in exc.errors()[:5]
    )


def _json_logits(values: Any) -> np.ndarray:
    # JSON has no NaN or infinity; null stands for a missing (invalid) entry, like NaN.
    try:
        return as_batch(np.array(values, dtype=np.float32))
    except (ValueError, TypeError):
        raise Problem(
            400, "malformed", "logits must be a list of numbers or of equal-length rows"
        ) from None


def _npy(data: bytes) -> np.ndarray:
    try:
        return read_npy(data)
    except NpyError as exc:
        status = 415 if exc.kind == "dtype" else 400
        raise Problem(status, f"npy-{exc.kind}", str(exc)) from None


def _npy_input(body: bytes, query: dict[str, str]) -> _PickInput:
    logits = _npy(body)
    seed = query.pop("seed", None)
    routing_key = query.pop("routing_key", None)
    history_text = query.pop("history", None)
    try:
        seed_value = int(seed) if seed is not None else None
        history = None
        if history_text is not None:
            history = [
                [int(t) for t in row.split(",") if t.strip()] for row in history_text.split(";")
            ]
        adjust = {k: float(v) for k, v in query.items()}
    except ValueError as exc:
        raise Problem(400, "malformed-query", f"bad query parameter: {exc}") from None
    return _PickInput(logits, history, seed_value, routing_key, adjust)


def _check_limits(logits: np.ndarray, live: Live) -> np.ndarray:
    rows = as_batch(logits) if logits.ndim != 2 else logits
    b, v = rows.shape
    if b > live.settings.max_rows:
        raise Problem(
            413, "too-many-rows", f"{b} rows is over KEEPSET_MAX_ROWS={live.settings.max_rows}"
        )
    if v > live.settings.max_vocab:
        raise Problem(
            413,
            "vocab-too-large",
            f"vocabulary {v} is over KEEPSET_MAX_VOCAB={live.settings.max_vocab}",
        )
    return rows


_INPUT_STATUS = {
    "shape": 400,
    "history": 400,
    "seed": 400,
    "dtype": 415,
    "no_finite": 422,
    "token_range": 422,
}


# --- who serves a request: route, arm, policy, adjustments ------------------------------------


@dataclass(frozen=True)
class _Served:
    policy: Policy
    chain: Chain
    label: str
    clamped: list[str]


def _route(snapshot: RegistrySnapshot, client: str) -> Route:
    route = snapshot.route_for(client)
    if route is None:
        raise Problem(403, "unknown-client", f"client {client!r} has no route in routes.yaml")
    return route


def _serve(
    snapshot: RegistrySnapshot,
    client: str,
    route: Route,
    routing_key: str | None,
    adjust: dict[str, float],
    live: Live,
) -> _Served:
    """The arm, policy and (adjusted) chain that serve this request."""
    arm_index = choose_arm(client, routing_key, route.arms, live.rng)
    arm = route.arms[arm_index]
    # Counted at assignment, before anything can fail: the split's unit is the request.
    metrics.ASSIGNMENTS.labels(client, arm.public_label(arm_index)).inc()
    policy = snapshot.policy(arm.policy)
    chain = snapshot.chain(arm.policy)
    clamped: list[str] = []
    if adjust:
        try:
            chain, clamped = apply_adjust(policy, adjust, chain)
        except AdjustError as exc:
            metrics.ADJUST_REFUSED.labels(client, exc.metric_field).inc()
            raise Problem(
                422, f"adjust-{exc.reason.replace('_', '-')}", str(exc), field=exc.field
            ) from None
        for name in clamped:
            metrics.ADJUST_REFUSED.labels(client, name).inc()
    return _Served(policy, chain, arm.public_label(arm_index), clamped)


def _input_problem(exc: InputError) -> Problem:
    return Problem(
        _INPUT_STATUS.get(exc.reason, 400), f"input-{exc.reason.replace('_', '-')}", str(exc)
    )


def _add_routes(app: FastAPI, live: Live) -> None:
    @app.post("/v1/pick", summary="Logits in, tokens and per-row diagnostics out")
    async def pick_tokens(request: Request) -> Response:
        client = _client(request, live)
        snapshot = live.snapshot  # one registry for the whole request
        route = _route(snapshot, client)
        data = await _pick_input(request, live)
        rows = _check_limits(data.logits, live)
        served = _serve(snapshot, client, route, data.routing_key, data.adjust, live)
        chain, policy, label, clamped = served.chain, served.policy, served.label, served.clamped
        try:
            args = (chain, rows, data.seed, data.history)
            threads = live.settings.sampling_threads
            if rows.size <= _INLINE_ELEMENTS:  # a thread hand-off would cost more than it frees
                out = pick(*args, threads=threads)
            else:
                out = await run_in_threadpool(pick, *args, threads=threads)
        except InputError as exc:
            raise _input_problem(exc) from None
        _record_served(live, client, served, out.kept.tolist(), out.entropy.tolist(), out.fallback)
        body: dict[str, Any] = {
            "request_id": uuid.uuid4().hex,
            "client": client,
            "policy": policy.name,
            "version": policy.version,
            "arm": label,
            "seed": out.seed,
            "tokens": out.tokens.tolist(),
            "rows": [
                {
                    "token": int(out.tokens[b]),
                    "prob": float(out.prob[b]),
                    "logprob": float(out.logprob[b]),
                    "entropy": float(out.entropy[b]),
                    "kept": int(out.kept[b]),
                    "kept_mass": float(out.kept_mass[b]),
                    "fallback": out.fallback[b],
                }
                for b in range(out.tokens.size)
            ],
        }
        if clamped:
            body["clamped"] = clamped
        shadow = (
            BackgroundTask(_run_shadows, snapshot, route.shadow, rows, data.history, out.seed)
            if route.shadow
            else None
        )
        return JSONResponse(body, background=shadow)

    @app.post("/v1/continue", summary="Prompt in, a continuation with per-step diagnostics out")
    async def continue_prompt(request: Request) -> Response:
        client = _client(request, live)
        snapshot = live.snapshot
        route = _route(snapshot, client)
        body = await _continue_input(request, live)
        model = live.model
        if model is None:
            raise Problem(503, "model-not-ready", live.model_problem or "the model is not loaded")
        served = _serve(snapshot, client, route, body.routing_key, body.adjust, live)
        policy = served.policy
        budget = policy.budget if body.budget is None else min(body.budget, policy.budget)
        try:
            # Tokenizing a long prompt takes a while: off the event loop.
            run = await run_in_threadpool(
                partial(
                    PromptRun,
                    model,
                    served.chain,
                    body.prompt,
                    budget=budget,
                    seed=body.seed,
                    stop=policy.stop,
                    keep_logits=bool(route.shadow),
                )
            )
        except PromptTooLong as exc:
            raise Problem(
                413, "prompt-too-long", f"{exc}; shorten the prompt", tokens=exc.length
            ) from None
        except (PromptError, InputError) as exc:
            raise Problem(422, "bad-prompt", str(exc)) from None
        head: dict[str, Any] = {
            "request_id": uuid.uuid4().hex,
            "client": client,
            "policy": policy.name,
            "version": policy.version,
            "arm": served.label,
            "seed": run.seed,
            "budget": budget,
            "prompt_tokens": run.prompt_tokens,
        }
        if served.clamped:
            head["clamped"] = served.clamped
        after = BackgroundTask(_after_continuation, live, snapshot, route, client, served, run)
        if body.stream:
            return StreamingResponse(
                _event_stream(head, run),
                media_type="text/event-stream",
                headers={"Cache-Control": "no-store", "X-Accel-Buffering": "no"},
                background=after,
            )
        try:
            records = await run_in_threadpool(list, run)
        except (InputError, ValueError) as exc:  # a model that emits no finite logit
            raise Problem(422, "model-output", str(exc)) from None
        return JSONResponse(
            {
                **head,
                "text": run.text,
                "tokens": run.tokens,
                "finish": run.finish,
                "steps": [r.as_dict() for r in records],
            },
            background=after,
        )

    @app.get("/v1/policies", summary="Every published policy version")
    async def list_policies(request: Request) -> dict[str, Any]:
        _identity(request, live)
        snapshot = live.snapshot
        return {"policies": [snapshot.describe(p) for p in snapshot.all_policies()]}

    @app.get("/v1/policies/{name}", summary="The versions of one policy")
    async def policy_versions(name: str, request: Request) -> dict[str, Any]:
        _identity(request, live)
        versions = live.snapshot.versions_of(name)
        if not versions:
            raise Problem(404, "unknown-policy", f"no policy named {name!r}")
        return {"name": name, "versions": [live.snapshot.describe(p) for p in versions]}

    @app.get("/v1/policies/{name}/{version}", summary="One policy version in full")
    async def policy_version(name: str, version: int, request: Request) -> dict[str, Any]:
        _identity(request, live)
        policy = live.snapshot.find(name, version)
        if policy is None:
            raise Problem(404, "unknown-policy", f"no published version {name}@{version}")
        return live.snapshot.describe(policy, full=True)

    @app.get("/v1/routes", summary="Routes and arms (admin)")
    async def routes(request: Request) -> dict[str, Any]:
        _admin(request, live)
        return _routes_with_ratio(live.snapshot)

    @app.post("/v1/registry/reload", summary="Reload the registry (admin)")
    async def reload(request: Request) -> JSONResponse:
        _admin(request, live)
        report = _reload(live, "admin")
        return JSONResponse(report, status_code=200 if report["outcome"] == "loaded" else 422)

    @app.get("/metrics", summary="Prometheus exposition")
    async def scrape() -> Response:
        payload, content_type = metrics.exposition()
        return Response(payload, media_type=content_type)

    @app.get("/healthz", summary="Liveness")
    async def healthz() -> dict[str, str]:
        return {"status": "ok"}

    @app.get("/readyz", summary="Readiness: registry and model loaded, not draining")
    async def readyz() -> JSONResponse:
        reasons = []
        if live.draining:
            reasons.append("draining")
        if not live.snapshot.policy_count():
            reasons.append("no policies loaded")
        if live.model_problem is not None:
            reasons.append(live.model_problem)
        if reasons:
            return JSONResponse(
                {
                    "type": "urn:keepset:problem:not-ready",
                    "title": "Not ready",
                    "status": 503,
                    "detail": "; ".join(reasons),
                },
                status_code=503,
                media_type=problems.MEDIA_TYPE,
            )
        return JSONResponse({"status": "ready", "policies": live.snapshot.policy_count()})


# --- the prompt path ----------------------------------------------------------------------------


async def _continue_input(request: Request, live: Live) -> ContinueBody:
    media = request.headers.get("content-type", "").split(";")[0].strip().lower()
    if media != "application/json":
        raise Problem(415, "media-type", f"send application/json, not {media or 'no Content-Type'}")
    body = await _read_body(request, live)
    try:
        return ContinueBody.model_validate_json(body)
    except ValidationError as exc:
        kind = "malformed-json" if _is_json_error(exc) else "malformed"
        raise Problem(400, kind, _validation_text(exc)) from None


def _is_json_error(exc: ValidationError) -> bool:
    return any(e["type"] == "json_invalid" for e in exc.errors())


def _sse(event: str, data: dict[str, Any]) -> bytes:
    return b"event: " + event.encode() + b"\ndata: " + orjson.dumps(data) + b"\n\n"


async def _event_stream(head: dict[str, Any], run: PromptRun) -> AsyncIterator[bytes]:
    """One ``step`` event per token, then ``done``; each step runs off the event loop, so a
    client that disconnects (Starlette then cancels this generator) stops the model."""
    yield _sse("start", head)
    done: dict[str, Any]
    try:
        while True:
            record: StepRecord | None = await run_in_threadpool(next, run, None)
            if record is None:
                break
            yield _sse("step", record.as_dict())
        done = {"text": run.text, "tokens": run.tokens, "finish": run.finish}
    except (InputError, ValueError) as exc:
        done = {"text": run.text, "tokens": run.tokens, "finish": "error", "detail": str(exc)}
    finally:
        # After a cancel the worker thread may still be inside the step it was running; the
        # generator is then left to the garbage collector and no further step starts.
        with contextlib.suppress(ValueError):
            run.close()
    yield _sse("done", {**head, **done})


def _after_continuation(
    live: Live,
    snapshot: RegistrySnapshot,
    route: Route,
    client: str,
    served: _Served,
    run: PromptRun,
) -> None:
    """Metrics for every generated step (as for /v1/pick rows), then the shadow policies on the
    same logits, after the answer has gone out."""
    records = list(run.records)  # a cancelled stream's last step may still be landing
    if not records:
        return
    kept = [r.kept for r in records]
    fallback = [r.fallback for r in records]
    _record_served(live, client, served, kept, [r.entropy for r in records], fallback)
    if route.shadow and run.logits:
        rows = np.stack(run.logits[: len(records)])
        _run_shadows(snapshot, route.shadow, rows, run.histories[: len(records)], run.seed)


def _record_served(
    live: Live,
    client: str,
    served: _Served,
    kept: list[int],
    entropy: list[float],
    fallback: list[str | None],
) -> None:
    """Metrics for served rows, and the collapse watch that turns them into an alarm."""
    policy = served.policy
    metrics.observe_rows(
        client=client,
        policy=policy.name,
        version=policy.version,
        arm=served.label,
        role="served",
        kept=kept,
        entropy=entropy,
        fallback=fallback,
    )
    floor = policy.expect.kept_median_min
    if floor is None:  # the owner made no promise to watch
        return
    change = live.watch.observe(policy.name, policy.version, kept, floor)
    if change is None:
        return
    metrics.COLLAPSE_ACTIVE.labels(policy.name, str(policy.version)).set(int(change.active))
    fields = (
        f"policy={change.policy} version={change.version} median_kept={change.median:g} "
        f"kept_median_min={change.floor:g} rows={change.rows}"
    )
    if change.active:
        log.warning("collapse watch: kept set collapsed %s", fields)
    else:
        log.info("collapse watch: kept set recovered %s", fields)


def _arm_shares(snapshot: RegistrySnapshot) -> dict[tuple[str, str], float]:
    return {
        (client, arm.public_label(i)): arm.weight / route.total_weight
        for client, route in snapshot.routes.items()
        for i, arm in enumerate(route.arms)
    }


def _routes_with_ratio(snapshot: RegistrySnapshot) -> dict[str, Any]:
    """The routes, and per client the requests each arm got since start (all workers) with a
    chi-square sample-ratio check against the weights."""
    described = snapshot.describe_routes()
    counts = metrics.assignment_counts()
    for client, route in snapshot.routes.items():
        labels = [arm.public_label(i) for i, arm in enumerate(route.arms)]
        observed = [counts.get((client, label), 0) for label in labels]
        check = sample_ratio(observed, [arm.weight for arm in route.arms])
        described["clients"][client]["split"] = {
            "since": "start",
            "requests": dict(zip(labels, observed, strict=True)),
            "expected_share": {
                label: arm.weight / route.total_weight
                for label, arm in zip(labels, route.arms, strict=True)
            },
            "chi_square": None if check is None else check.statistic,
            "p_value": None if check is None else check.p_value,
        }
    return described


def _run_shadows(
    snapshot: RegistrySnapshot,
    shadows: tuple[tuple[str, int], ...],
    rows: np.ndarray,
    history: list[list[int]] | None,
    seed: int,
) -> None:
    """Evaluate shadow policies on the same logits: metrics only, never returned."""
    for ref in shadows:
        try:
            out = pick(snapshot.chain(ref), rows, seed, history)
        except InputError:
            continue  # the shadow cannot take these logits; the served answer stands
        metrics.observe_rows(
            client="",
            policy=ref[0],
            version=ref[1],
            arm="",
            role="shadow",
            kept=out.kept.tolist(),
            entropy=[],
            fallback=[],
        )


def _reload(live: Live, trigger: str) -> dict[str, Any]:
    snapshot, report = reload_registry(live.snapshot, live.settings.policies)
    live.snapshot = snapshot
    metrics.set_arm_weights(_arm_shares(snapshot))
    outcome = "loaded" if report.ok else "kept_last_good"
    metrics.REGISTRY_RELOADS.labels(outcome).inc()
    result = {"outcome": outcome, "trigger": trigger, **report.as_dict()}
    live.last_reload = result
    if report.ok:
        log.info("registry reloaded (%s): %d files", trigger, len(report.loaded))
    else:
        log.warning(
            "registry reload refused (%s); keeping the last good: %s", trigger, report.refused
        )
    return result


async def _load_model(live: Live) -> None:
    """Load the model off the event loop; /v1/pick serves meanwhile, readiness waits for it."""
    folder = live.settings.model
    try:
        live.model = await run_in_threadpool(Model, folder, threads=live.settings.model_threads)
    except ModelError as exc:
        live.model_problem = f"model not loaded: {exc}"
        log.error("%s; /v1/continue answers 503 until it is fixed and keepset restarted", exc)
    else:
        live.model_problem = None
        log.info("model %s loaded from %s", live.model.info.name, folder)


async def _poll_registry(live: Live) -> None:
    interval = live.settings.reload_poll_seconds
    if interval <= 0:
        return
    seen = live.snapshot.fingerprint
    while True:
        await asyncio.sleep(interval)
        try:
            current = await run_in_threadpool(
                RegistrySnapshot.fingerprint_of, live.settings.policies
            )
        except OSError:
            continue
        if current != seen:
            seen = current
            _reload(live, "file-change")

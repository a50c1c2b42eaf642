"""The HTTP layer: the FastAPI app and its handlers, thin over the modules that do the work.

A request goes through admission (``admission``), the key (``keys``), its body (``bodies``), the
policy that serves it (``serving``: route, arm, adjusted chain), the sampler or the prompt path
(``sampling``, ``prompting``), then metrics and the answer. What the running app holds, and how
reloads and the model loading change it, is in ``live``.
"""

from __future__ import annotations

import asyncio
import contextlib
import logging
import math
import signal
import sqlite3
import threading
import time
from collections.abc import AsyncIterator, Awaitable, Callable
from concurrent.futures import ThreadPoolExecutor
from functools import partial
from typing import Any

import orjson
from fastapi import FastAPI, Request
from fastapi.responses import JSONResponse, StreamingResponse
from starlette.background import BackgroundTask
from starlette.concurrency import run_in_threadpool
from starlette.responses import Response

from service import drain, metrics, problems
from service.admission import Admission
from service.bodies import (
    PickInput,
    check_limits,
    continue_input,
    input_problem,
    outcome_input,
    pick_input,
)
from service.capture import Capture, Origin, warn_if_off
from service.fallback_serving import after_pick, after_run, guard_request
from service.keys import Identity, load_keyring, utc_now
from service.live import (
    Live,
    arm_shares,
    load_model,
    poll_registry,
    reload_now,
    settled_model,
    warm_kernel,
)
from service.model import PromptError, PromptTooLong
from service.outcomes import (
    OutcomeStore,
    add_outcome_report,
    check_outcome,
    open_store,
    save_outcome,
)
from service.problems import Problem
from service.prompting import Cancelled, PromptRun, StepRecord
from service.registry import RegistrySnapshot, load_registry
from service.request_ids import RequestIds, new_secret
from service.routing import Route
from service.sampling import InputError, pick
from service.serving import (
    account_continuation,
    continuation_aside,
    evaluates_aside,
    record_served,
    route_of,
    routes_with_ratio,
    run_shadows,
    serve,
)
from service.settings import Settings
from service.shm import SegmentMaps
from service.watch import CollapseWatch

log = logging.getLogger("keepset")

# Status recorded for a continuation whose client went away before the answer (no standard
# code exists; 499 is the one proxies log for it).
CLIENT_GONE = 499
# A prompt request that reaches a worker whose model is still loading waits this long for it.
MODEL_WAIT_SECONDS = 30.0
# Picks up to this many logits run on the event loop (a few ms at most); larger ones in a thread.
_INLINE_ELEMENTS = 1 << 20

Endpoint = Callable[[Request], Awaitable[Response]]


def create_app(settings: Settings | None = None) -> FastAPI:
    settings = settings or Settings()
    _log_to_stderr(settings.log_level)
    snapshot = load_registry(settings.policies)
    if settings.collapse_min_steps > settings.collapse_window:
        raise ValueError("KEEPSET_COLLAPSE_MIN_STEPS must not exceed KEEPSET_COLLAPSE_WINDOW")
    if settings.shm_dir is not None and not settings.shm_dir.is_dir():
        raise ValueError(f"KEEPSET_SHM_DIR={settings.shm_dir} is not a folder")
    if settings.capture_dir is not None and not settings.capture_dir.is_dir():
        raise ValueError(f"KEEPSET_CAPTURE_DIR={settings.capture_dir} is not a folder")
    secret = settings.request_secret
    live = Live(
        settings=settings,
        snapshot=snapshot,
        keys=load_keyring(settings.keys),
        watch=CollapseWatch(settings.collapse_window, settings.collapse_min_steps),
        capture=None if settings.capture_dir is None else Capture(settings.capture_dir),
        # Without a configured secret (an app made in process) ids are valid for this app only.
        request_ids=RequestIds(new_secret() if secret is None else secret.get_secret_value()),
        outcomes=_outcome_store(settings),
        segment_maps=None if settings.shm_dir is None else SegmentMaps(settings.shm_dir),
        continuations=ThreadPoolExecutor(settings.max_in_flight, "keepset-continue"),
    )
    warn_if_off(snapshot.routes, settings.capture_dir)
    if not snapshot.valid:
        log.warning("registry loaded with problems: %s", snapshot.problem_lines())
    metrics.set_arm_weights(arm_shares(snapshot))
    for outcome in ("loaded", "kept_last_good"):  # present at 0, so increase() sees the first
        metrics.REGISTRY_RELOADS.labels(outcome)

    @contextlib.asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        loop = asyncio.get_running_loop()
        with contextlib.suppress(NotImplementedError, RuntimeError, ValueError):
            loop.add_signal_handler(signal.SIGHUP, lambda: reload_now(live, "signal"))
        drain.install(loop, settings.drain_seconds, partial(setattr, live, "draining", True))
        poller = asyncio.create_task(poll_registry(live))
        loader = asyncio.create_task(load_model(live))
        compiler = asyncio.create_task(warm_kernel(live))
        if live.capture is not None:
            live.capture.start()
        yield
        live.draining = True
        poller.cancel()
        # The load and the compile run in worker threads that a cancel cannot stop; wait for
        # them, so that no onnxruntime or LLVM thread is still starting when the process exits.
        with contextlib.suppress(Exception):
            await loader
        with contextlib.suppress(Exception):
            await compiler
        if live.capture is not None:  # writes the rows it still holds
            await run_in_threadpool(live.capture.close)
        if live.outcomes is not None:
            live.outcomes.close()
        if live.segment_maps is not None:
            live.segment_maps.close()
        live.continuations.shutdown(wait=False)

    app = _Service(
        title="keepset",
        summary="Decoding policies as a governed, observable service.",
        version="0.1.0",
        lifespan=lifespan,
    )
    app.state.live = live
    problems.install(app)
    lanes = _add_routes(app, live)
    _install_middleware(app, live, lanes)
    return app


def _outcome_store(settings: Settings) -> OutcomeStore:
    try:
        return open_store(settings.outcomes_db)
    except sqlite3.Error as exc:
        raise ValueError(f"KEEPSET_OUTCOMES_DB={settings.outcomes_db}: {exc}") from None


def _log_to_stderr(level: str) -> None:
    """uvicorn configures its own loggers only: without a handler of its own, keepset's INFO
    lines (a recovery, a reload, a guard released) would never reach a worker's output."""
    logger = logging.getLogger("keepset")
    if not logger.handlers:
        handler = logging.StreamHandler()
        handler.setFormatter(logging.Formatter("%(levelname)s:     keepset: %(message)s"))
        logger.addHandler(handler)
    logger.setLevel(level.upper())


def _install_middleware(app: _Service, live: Live, lanes: dict[tuple[str, str], Endpoint]) -> None:
    # Plain ASGI middleware: the decorator form streams every body through extra tasks.
    app.add_middleware(Admission, live=live)
    app.lanes = Admission(_Lanes(lanes), live)
    app.lane_keys = frozenset(lanes)


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
        stored = live.keys.match(token.strip())
        if stored is not None and stored.not_after is not None:
            when = stored.not_after.isoformat()
            detail = f"the API key expired at {when}; ask for its replacement"
            raise Problem(401, "expired-key", detail, headers={"WWW-Authenticate": "Bearer"})
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


class _Service(FastAPI):
    """The FastAPI app, with the hot paths (``POST /v1/pick`` and ``/v1/continue``) in front of
    it: they go from admission straight to their endpoint, past FastAPI's and Starlette's entry,
    the server-error and exception middleware, the router's matching and FastAPI's route
    wrapper. Those layers took about 0.2 ms of a shared-memory step and of a continuation's
    start; the entry layers alone, about 15 µs of the step after the router was bypassed. The
    routes stay registered, for the OpenAPI document and for other methods, and an app served
    under a root path takes the framework's way."""

    lanes: Any = None
    lane_keys: frozenset[tuple[str, str]] = frozenset()

    async def __call__(self, scope: Any, receive: Any, send: Any) -> None:
        if (
            scope["type"] == "http"
            and (scope["method"], scope["path"]) in self.lane_keys
            and not scope.get("root_path")
        ):
            scope["app"] = self
            await self.lanes(scope, receive, send)
            return
        await super().__call__(scope, receive, send)


class _Lanes:
    """The hot paths' endpoints, behind admission: a problem an endpoint raises is answered as
    the exception middleware would, and a crash as the server-error middleware would (a 500
    problem document, then the error goes on to the server, which logs it)."""

    def __init__(self, lanes: dict[tuple[str, str], Endpoint]):
        self.lanes = lanes

    async def __call__(self, scope: Any, receive: Any, send: Any) -> None:
        endpoint = self.lanes[(scope["method"], scope["path"])]
        try:
            response = await endpoint(Request(scope, receive, send))
        except Problem as problem:
            response = problems.problem_response(problem)
        except Exception:
            crash = Problem(500, "internal", "keepset failed; the log has details")
            await problems.problem_response(crash)(scope, receive, send)
            raise
        await response(scope, receive, send)


def _add_routes(app: _Service, live: Live) -> dict[tuple[str, str], Endpoint]:
    """Register the routes; return the hot ones, for :class:`_Lanes`."""

    async def pick_tokens(request: Request) -> Response:
        client = _client(request, live)
        snapshot = live.snapshot  # one registry for the whole request
        route = route_of(snapshot, client)
        data = await pick_input(request, live)
        try:
            return await _pick_answer(live, client, snapshot, route, data)
        finally:
            # _pick_answer's frame, which held the other references to a shared-memory view,
            # has ended: the mapping can close now.
            data.release()

    app.router.add_api_route(
        "/v1/pick",
        pick_tokens,
        methods=["POST"],
        summary="Logits in, tokens and per-row diagnostics out",
    )

    @app.post("/v1/continue", summary="Prompt in, a continuation with per-step diagnostics out")
    async def continue_prompt(request: Request) -> Response:
        client = _client(request, live)
        snapshot = live.snapshot
        route = route_of(snapshot, client)
        body = await continue_input(request, live)
        model = await settled_model(live, MODEL_WAIT_SECONDS)
        if model is None:
            raise Problem(503, "model-not-ready", live.model_problem or "the model is not loaded")
        served = serve(snapshot, client, route, body.routing_key, body.adjust, live)
        vocab = model.info.vocab_size
        guarding = guard_request(live, snapshot, client, route, served, body.adjust, vocab)
        served = guarding.served
        policy = served.policy
        budget = policy.budget if body.budget is None else min(body.budget, policy.budget)
        capturing = (
            live.capture is not None
            and route.capture is not None
            and live.capture.sample(route.capture)
        )
        start = partial(
            PromptRun,
            model,
            served.chain,
            body.prompt,
            budget=budget,
            seed=body.seed,
            stop=policy.stop,
            keep_logits=bool(route.shadow) or capturing or guarding.guarded is not None,
            cancel=threading.Event(),
            kernel=live.kernel,
        )
        request_id = live.request_ids.mint(client, policy.name, policy.version, served.label)

        def answer_head(run: PromptRun) -> dict[str, Any]:
            head: dict[str, Any] = {
                "request_id": request_id,
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
            head.update(guarding.answer_fields())
            return head

        def afterwards(run: PromptRun) -> BackgroundTask:
            captured = request_id if capturing else None

            async def account() -> None:
                # The metrics on the event loop (a thread hand-off would cost more than they
                # do); a capture and the shadows, which pick again, in a worker thread.
                steps = account_continuation(live, client, served, run)
                if steps and evaluates_aside(live, route, run, captured):
                    aside = (live, snapshot, route, client, served, run, steps, captured)
                    await run_in_threadpool(continuation_aside, *aside)

            after = BackgroundTask(account)
            if route.guard is not None:
                after = after_run(after, live, client, route, guarding, run)
            return after

        if body.stream:
            # Tokenizing a long prompt takes a while: off the event loop.
            try:
                run = await asyncio.get_running_loop().run_in_executor(live.continuations, start)
            except (PromptError, InputError) as exc:
                raise _start_problem(exc) from None
            flush_seconds = live.settings.stream_flush_ms / 1e3
            return StreamingResponse(
                _event_stream(answer_head(run), run, flush_seconds, live.continuations),
                media_type="text/event-stream",
                headers={"Cache-Control": "no-store", "X-Accel-Buffering": "no"},
                background=afterwards(run),
            )

        def answer(run: PromptRun, records: list[StepRecord]) -> bytes:
            # orjson (which writes a dataclass by its fields): the standard encoder took 0.4 ms
            # for the 128 steps of a continuation.
            return orjson.dumps(
                {
                    **answer_head(run),
                    "text": run.text,
                    "tokens": run.tokens,
                    "finish": run.finish,
                    "steps": records,
                }
            )

        # One worker-thread hop for the tokenizing, every step and the answer's JSON: each hop
        # costs the event loop and the worker a hand-off, and the worker's core is the one
        # running at full speed when the last step is taken.
        cancel = start.keywords["cancel"]
        made: list[PromptRun] = []
        watcher = asyncio.create_task(_cancel_on_disconnect(request, cancel))
        try:
            content = await asyncio.get_running_loop().run_in_executor(
                live.continuations, _run_to_end, start, made, answer
            )
        except Cancelled:
            # Nobody is listening; the status is for the request metrics and the access log.
            return Response(status_code=CLIENT_GONE, background=afterwards(made[0]))
        except (PromptError, InputError, ValueError) as exc:
            if not made:  # the prompt (or the chain against this model) failed to start
                raise _start_problem(exc) from None
            # A model that emits no finite logit.
            raise Problem(422, "model-output", str(exc)) from None
        finally:
            watcher.cancel()
        return Response(content, media_type="application/json", background=afterwards(made[0]))

    @app.post("/v1/outcome", status_code=201, summary="Report the outcome of a served request")
    async def report_outcome(request: Request) -> JSONResponse:
        client = _client(request, live)
        route = route_of(live.snapshot, client)
        body = await outcome_input(request, live)
        max_age = live.settings.outcome_max_age_seconds
        outcome = check_outcome(live.request_ids, client, route, body, max_age)
        store = live.outcomes
        if store is None:
            raise Problem(503, "outcomes-off", "this app has no outcome store")
        await run_in_threadpool(save_outcome, store, outcome)
        metrics.OUTCOMES.labels(client, outcome.arm).inc()
        return JSONResponse(outcome.as_dict(), status_code=201)

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
        snapshot = live.snapshot
        described = routes_with_ratio(snapshot)
        described["keys"] = live.keys.describe(utc_now(), live.settings.key_expiry_warning_days)
        if live.outcomes is None:
            return described
        since = "start" if live.settings.outcomes_db is None else "KEEPSET_OUTCOMES_DB"
        return await run_in_threadpool(
            add_outcome_report, described, snapshot.routes, live.outcomes, since
        )

    @app.post("/v1/registry/reload", summary="Reload the registry (admin)")
    async def reload(request: Request) -> JSONResponse:
        _admin(request, live)
        report = reload_now(live, "admin")
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
        if live.kernel_problem is not None:
            reasons.append(live.kernel_problem)
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

    return {("POST", "/v1/pick"): pick_tokens, ("POST", "/v1/continue"): continue_prompt}


async def _pick_answer(
    live: Live, client: str, snapshot: RegistrySnapshot, route: Route, data: PickInput
) -> Response:
    """Pick for ``data`` under the client's route and answer; every array reference to the
    request's logits ends with this frame, except what the shadows get."""
    rows = check_limits(data.logits, live)
    served = serve(snapshot, client, route, data.routing_key, data.adjust, live)
    guarding = guard_request(live, snapshot, client, route, served, data.adjust, rows.shape[1])
    served = guarding.served
    chain, policy, label, clamped = served.chain, served.policy, served.label, served.clamped
    try:
        args = (chain, rows, data.seed, data.history)
        run = partial(pick, *args, threads=live.settings.sampling_threads, kernel=live.kernel)
        # Inline when a thread hand-off would cost more than it frees: a small batch, or one
        # the sampler spreads over several threads anyway (this thread then takes one part, where
        # a worker thread would, and the loop would have nothing to do while the cores are
        # busy; the hand-off took about a fifth of a 32-row pick at V = 128 256).
        if rows.size <= _INLINE_ELEMENTS or live.settings.sampling_threads > 1:
            out = run()
        else:
            out = await run_in_threadpool(run)
    except InputError as exc:
        raise input_problem(exc) from None
    tokens, kept_list, entropy_list = out.tokens.tolist(), out.kept.tolist(), out.entropy.tolist()
    request_id = live.request_ids.mint(client, policy.name, policy.version, label)
    if route.capture is not None and live.capture is not None:
        # Before the request ends: shared-memory rows are copied (to float16) while still valid.
        origin = Origin(client, request_id, policy.name, policy.version, label, out.seed)
        offer = partial(live.capture.offer_pick, route.capture, origin, rows, data.history, out)
        if rows.size <= _INLINE_ELEMENTS:
            offer()
        else:
            await run_in_threadpool(offer)
    body: dict[str, Any] = {
        "request_id": request_id,
        "client": client,
        "policy": policy.name,
        "version": policy.version,
        "arm": label,
        "seed": out.seed,
        "tokens": tokens,
        "rows": [
            {
                "token": token,
                "prob": prob,
                "logprob": logprob,
                "entropy": entropy,
                "kept": kept,
                "kept_mass": kept_mass,
                "fallback": fallback,
            }
            # Whole columns to Python numbers at once: indexing numpy arrays row by row took
            # a tenth of a millisecond for 32 rows.
            for token, prob, logprob, entropy, kept, kept_mass, fallback in zip(
                tokens,
                out.prob.tolist(),
                out.logprob.tolist(),
                entropy_list,
                kept_list,
                out.kept_mass.tolist(),
                out.fallback,
                strict=True,
            )
        ],
    }
    if clamped:
        body["clamped"] = clamped
    body.update(guarding.answer_fields())
    shadow = None
    if route.shadow:
        # Shadows run after the answer, when the caller may already be writing its next step
        # into the segment: they get their own copy of shared-memory rows.
        shadow_rows = rows.copy() if data.mapped is not None and data.mapped.shared else rows
        shadow = BackgroundTask(
            run_shadows, snapshot, route.shadow, shadow_rows, data.history, out.seed, live.kernel
        )
    if route.guard is not None:
        # The guarded version is evaluated on these rows after the answer: its own copy of
        # shared-memory rows, as for the shadows.
        kept_rows = None
        if guarding.guarded is not None:
            kept_rows = rows.copy() if data.mapped is not None and data.mapped.shared else rows
        shadow = after_pick(
            shadow, live, client, route, guarding, kept_rows, data.history, out.seed
        )

    async def account() -> None:
        # Metrics and the collapse watch take about 0.15 ms for 32 rows: they run once the
        # answer is sent, while the caller reads it, and before this worker takes its next
        # request (nothing here awaits), so every later request sees them.
        record_served(live, client, served, kept_list, entropy_list, out.fallback)
        if shadow is not None:
            await shadow()

    # orjson: the standard encoder took a tenth of a 32-row pick's time outside the sampler.
    return _JsonAnswer(orjson.dumps(body), account)


class _JsonAnswer(Response):
    """A 200 JSON answer, and ``after``, awaited once it is sent. Starlette's ``Response``
    works out its headers and wraps the task on every answer, about 10 µs of a pick's answer
    on the caches the pick has just emptied; these two headers are all a pick's answer has."""

    media_type = "application/json"

    def __init__(self, body: bytes, after: Callable[[], Awaitable[None]]):
        self.status_code = 200
        self.body = body
        self.after = after
        self.background = None  # a framework route may set it; it runs after ``after``
        self.raw_headers = [
            (b"content-length", b"%d" % len(body)),
            (b"content-type", b"application/json"),
        ]

    async def __call__(self, scope: Any, receive: Any, send: Any) -> None:
        await send({"type": "http.response.start", "status": 200, "headers": self.raw_headers})
        await send({"type": "http.response.body", "body": self.body})
        await self.after()
        if self.background is not None:
            await self.background()


async def _cancel_on_disconnect(request: Request, cancel: threading.Event) -> None:
    """Stop a plain (unstreamed) continuation at its next step when the client goes away; the
    body has been read, so the next ASGI message can only be the disconnect."""
    while (await request.receive())["type"] != "http.disconnect":
        pass
    cancel.set()


def _run_to_end(
    start: Callable[[], PromptRun],
    made: list[PromptRun],
    answer: Callable[[PromptRun, list[StepRecord]], bytes],
) -> bytes:
    """Start a continuation, take every step and make its answer (in a worker thread); the run
    is put in ``made`` as soon as it exists, so the caller has it even when a step fails."""
    run = start()
    made.append(run)
    return answer(run, list(run))


def _start_problem(exc: Exception) -> Problem:
    """The problem for a continuation that could not start: its prompt, or its chain against
    this model's vocabulary."""
    if isinstance(exc, PromptTooLong):
        return Problem(413, "prompt-too-long", f"{exc}; shorten the prompt", tokens=exc.length)
    return Problem(422, "bad-prompt", str(exc))


def _sse(event: str, data: dict[str, Any] | StepRecord) -> bytes:
    return b"event: " + event.encode() + b"\ndata: " + orjson.dumps(data) + b"\n\n"


async def _event_stream(
    head: dict[str, Any],
    run: PromptRun,
    flush_seconds: float,
    executor: ThreadPoolExecutor | None = None,
) -> AsyncIterator[bytes]:
    """One ``step`` event per token, then ``done``. The steps are made in one thread of
    ``executor`` (None: the loop's default) and handed to the event loop in batches: the
    first at once, then whatever was made once ``flush_seconds`` have passed since the last
    hand-over (each hand-over wakes the event loop and the client, which cost the bundled
    model a tenth of its speed when done per step). A step waits at most the interval plus
    one step. A client that disconnects (Starlette then cancels this generator) sets the
    run's ``cancel``, which stops the model at its next step."""
    yield _sse("start", head)
    loop = asyncio.get_running_loop()
    made: asyncio.Queue[list[StepRecord] | Exception | None] = asyncio.Queue()

    def hand_over(item: list[StepRecord] | Exception | None) -> None:
        with contextlib.suppress(RuntimeError):  # the loop is gone: nobody to hand it to
            loop.call_soon_threadsafe(made.put_nowait, item)

    def produce() -> None:
        batch: list[StepRecord] = []
        handed_at = -math.inf
        try:
            for record in run:
                batch.append(record)
                now = time.monotonic()
                if now - handed_at >= flush_seconds:
                    hand_over(batch)
                    batch, handed_at = [], now
            outcome: Exception | None = None
        except Exception as exc:  # Cancelled, or a model that emits no finite logit
            outcome = exc
        if batch:
            hand_over(batch)
        hand_over(outcome)

    producer = asyncio.ensure_future(loop.run_in_executor(executor, produce))
    done: dict[str, Any]
    try:
        ended = False
        while not ended:
            # Batches handed over while the last ones were being sent go out in one write.
            items = [await made.get()]
            while not made.empty():
                items.append(made.get_nowait())
            events: list[bytes] = []
            failure: Exception | None = None
            for item in items:
                if isinstance(item, Exception):
                    failure = item
                    break
                if item is None:
                    ended = True
                    break
                events.extend(_sse("step", record) for record in item)
            if events:
                yield b"".join(events)
            if failure is not None:
                raise failure
        done = {"text": run.text, "tokens": run.tokens, "finish": run.finish}
    except (InputError, ValueError) as exc:
        done = {"text": run.text, "tokens": run.tokens, "finish": "error", "detail": str(exc)}
    finally:
        if run.cancel is not None and not producer.done():
            run.cancel.set()  # the client went away: stop at the next step
        # After a cancel the worker thread may still be inside the step it was running; the
        # generator is then left to the garbage collector and no further step starts.
        with contextlib.suppress(ValueError):
            run.close()
    yield _sse("done", {**head, **done})

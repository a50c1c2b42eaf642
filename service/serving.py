"""Who serves a request and what is recorded about it: the client's route, the sticky arm, the
policy version and its adjusted chain; the metrics and collapse watch for served rows; shadow
policies evaluated on the same logits; and the A/B split report of ``GET /v1/routes``.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass
from typing import Any

import numpy as np

from service import metrics
from service.capture import Origin
from service.live import Live
from service.policy import AdjustError, Policy, apply_adjust
from service.problems import Problem
from service.prompting import PromptRun
from service.ratio import sample_ratio
from service.registry import RegistrySnapshot
from service.routing import Route, choose_arm
from service.sampling import Chain, InputError, Kernel, pick

log = logging.getLogger("keepset")


@dataclass(frozen=True)
class Served:
    """The policy version that serves one request, its chain after adjustments, the arm's public
    label and the adjustments that were clamped."""

    policy: Policy
    chain: Chain
    label: str
    clamped: list[str]


def route_of(snapshot: RegistrySnapshot, client: str) -> Route:
    route = snapshot.route_for(client)
    if route is None:
        raise Problem(403, "unknown-client", f"client {client!r} has no route in routes.yaml")
    return route


def serve(
    snapshot: RegistrySnapshot,
    client: str,
    route: Route,
    routing_key: str | None,
    adjust: dict[str, float],
    live: Live,
) -> Served:
    """The arm, policy and (adjusted) chain that serve this request."""
    arm_index = choose_arm(client, routing_key, route.arms, live.rng)
    arm = route.arms[arm_index]
    # Counted at assignment, before anything can fail: the split's unit is the request.
    metrics.series(metrics.ASSIGNMENTS, client, arm.public_label(arm_index)).inc()
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
    return Served(policy, chain, arm.public_label(arm_index), clamped)


def record_served(
    live: Live,
    client: str,
    served: Served,
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
    watch_kept(live, policy, kept)


def watch_kept(live: Live, policy: Policy, kept: list[int]) -> None:
    """Feed kept sizes of rows evaluated under ``policy`` to the collapse watch; its transitions
    become the ``keepset_collapse_active`` gauge and one log line each."""
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


def account_continuation(live: Live, client: str, served: Served, run: PromptRun) -> int:
    """Metrics and the collapse watch for every generated step (as for /v1/pick rows): a few
    tenths of a millisecond for a long continuation, cheap enough for the event loop. Returns
    how many steps were accounted."""
    records = list(run.records)  # a cancelled stream's last step may still be landing
    if records:
        kept = [r.kept for r in records]
        entropy = [r.entropy for r in records]
        record_served(live, client, served, kept, entropy, [r.fallback for r in records])
    return len(records)


def evaluates_aside(live: Live, route: Route, run: PromptRun, captured: str | None) -> bool:
    """Whether a continuation has work for :func:`continuation_aside`: a capture or shadows."""
    if run.logits is None:
        return False
    return bool(route.shadow) or bool(captured and live.capture and route.capture)


def continuation_aside(
    live: Live,
    snapshot: RegistrySnapshot,
    route: Route,
    client: str,
    served: Served,
    run: PromptRun,
    steps: int,
    captured: str | None = None,
) -> None:
    """After the answer has gone out (in a worker thread): the capture of the first ``steps``
    steps when this continuation was sampled for it (``captured`` is the answer's
    request_id), then the shadow policies on the same logits."""
    if run.logits is None or not steps:
        return
    records = run.records[:steps]
    if captured and live.capture and route.capture:
        p = served.policy
        origin = Origin(client, captured, p.name, p.version, served.label, run.seed)
        live.capture.offer_steps(route.capture, origin, run.logits, run.histories, records)
    if route.shadow:
        rows = np.stack(run.logits[:steps])
        histories = run.histories[:steps]
        run_shadows(snapshot, route.shadow, rows, histories, run.seed, live.kernel)


def run_shadows(
    snapshot: RegistrySnapshot,
    shadows: tuple[tuple[str, int], ...],
    rows: np.ndarray,
    history: list[list[int]] | None,
    seed: int,
    kernel: Kernel,
) -> None:
    """Evaluate shadow policies on the same logits: metrics only, never returned."""
    for ref in shadows:
        try:
            out = pick(snapshot.chain(ref), rows, seed, history, kernel=kernel)
        except InputError:
            continue  # the shadow cannot take these logits; the served answer stands
        observe_shadow(ref[0], ref[1], out.kept.tolist())


def observe_shadow(policy: str, version: int, kept: list[int]) -> None:
    """Kept sizes of a version evaluated on rows it did not serve (a shadow, or a guarded
    version while its fallback serves): the kept-set histogram with role shadow, nothing else."""
    metrics.observe_rows(
        client="",
        policy=policy,
        version=version,
        arm="",
        role="shadow",
        kept=kept,
        entropy=[],
        fallback=[],
    )


def routes_with_ratio(snapshot: RegistrySnapshot) -> dict[str, Any]:
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

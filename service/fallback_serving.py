"""Serving a route's declared fallback while the version a request was routed to is collapsed.

For a request whose route declares a guard, :func:`guard_request` first brings the guard of
(client, routed version) up to date with the worker's collapse watch, then, if it is engaged,
swaps what serves: the fallback version's chain (the caller's ``adjust`` applied within the
fallback's own ranges), its budget and stop strings. The arm label stays the client's arm: the
split's unit is the request. The answer then says ``"guarded": true``, ``"guarded_from"`` and
the version actually used in ``"policy"``/``"version"``.

The collapsed version must go on being observed, or it could never recover: after the answer
(so latency does not grow), :func:`after_pick` and :func:`after_run` evaluate its chain on the
same rows (the same logits, histories and seed) and feed its kept sizes to the watch, as
``role="shadow"`` rows in ``keepset_kept_tokens``, then bring the guard up to date again.

Order within one worker: (1) the guard state is updated from the watch when a request
arrives; (2) the served rows (the fallback's when guarded) are recorded under their own version
before the answer goes out; (3) after the answer, the guarded version's rows are fed to its
window and the guard is updated once more. The watch therefore never mixes the two versions'
rows, and the guarded version's window lags the answers only by the requests whose step (3)
has not run yet.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np
from starlette.background import BackgroundTask, BackgroundTasks
from starlette.concurrency import run_in_threadpool

from service import metrics
from service.collapse_guard import GuardChange, applies
from service.policy import AdjustError, Policy, apply_adjust, format_ref
from service.prompting import PromptRun
from service.registry import RegistrySnapshot
from service.routing import Route
from service.sampling import Chain, InputError, pick
from service.serving import Served, observe_shadow, watch_kept

if TYPE_CHECKING:
    from service.live import Live

log = logging.getLogger("keepset")


@dataclass(frozen=True)
class Guarding:
    """How one request is served: ``served`` answers it; ``guarded`` is the routed version the
    guard stands in for (evaluated after the answer), or None when the request is not guarded."""

    served: Served
    guarded: Served | None = None
    adjust_ignored: tuple[str, ...] = ()

    def answer_fields(self) -> dict[str, Any]:
        """What a guarded answer adds; unguarded answers stay exactly as they were."""
        if self.guarded is None:
            return {}
        fields: dict[str, Any] = {"guarded": True, "guarded_from": self.guarded.policy.ref}
        if self.adjust_ignored:
            fields["adjust_ignored"] = list(self.adjust_ignored)
        return fields


def fallback_chain(
    fallback: Policy, chain: Chain, adjust: Mapping[str, Any]
) -> tuple[Chain, list[str], list[str]]:
    """The fallback's chain with the caller's adjustments it allows; (chain, clamped, ignored).

    The caller wrote ``adjust`` for the routed version, and it was checked against that
    version's ranges; the guard is keepset's decision, not the caller's, so it never turns a
    valid request into a refusal. An adjustment the fallback also lists is clamped into the
    fallback's range (whatever its ``on_out_of_range``); one it does not list is ignored.
    """
    usable: dict[str, float] = {}
    clamped: list[str] = []
    ignored: list[str] = []
    for name in sorted(adjust):
        value = adjust[name]
        allowed = fallback.adjustable.get(name)
        if allowed is None or not isinstance(value, int | float) or not math.isfinite(value):
            ignored.append(name)
            continue
        lo, hi = allowed
        usable[name] = min(max(float(value), lo), hi)
        if usable[name] != value:
            clamped.append(name)
    try:
        adjusted, _ = apply_adjust(fallback, usable, chain)
    except AdjustError:  # e.g. a top_k that is not a whole number: the fallback as published
        return chain, [], sorted(adjust)
    return adjusted, clamped, ignored


def guard_request(
    live: Live,
    snapshot: RegistrySnapshot,
    client: str,
    route: Route,
    served: Served,
    adjust: Mapping[str, Any],
    vocab: int,
) -> Guarding:
    """What serves this request under the route's guard (``served`` itself when unguarded).
    ``vocab`` is the request's vocabulary size: a fallback that names a token id beyond it
    cannot take these rows, and the routed version serves them as if unguarded."""
    report(live.collapse_guard.forget_unrouted(snapshot.routes))
    spec = route.guard
    version = (served.policy.name, served.policy.version)
    if spec is None or not applies(route, version):
        return Guarding(served)
    settle(live, client, route, served.policy)
    if not live.collapse_guard.engaged(client, version):
        return Guarding(served)
    fallback = snapshot.policy(spec.fallback)
    chain, clamped, ignored = fallback_chain(fallback, snapshot.chain(spec.fallback), adjust)
    if max(c.largest_token_id for c in (chain, chain.fallback) if c is not None) >= vocab:
        return Guarding(served)
    if spec.fallback in live.watch.active():
        metrics.GUARD_FALLBACK_COLLAPSED.labels(client, fallback.name, str(fallback.version)).inc()
        if live.collapse_guard.first_fallback_collapse(client, version):
            log.warning(
                "collapse guard: fallback collapsed too, still serving it client=%s "
                "policy=%s version=%s fallback=%s",
                client,
                version[0],
                version[1],
                fallback.ref,
            )
    return Guarding(Served(fallback, chain, served.label, clamped), served, tuple(ignored))


def settle(live: Live, client: str, route: Route, policy: Policy) -> None:
    """Update the guard of (client, policy's version) from the watch and report any change."""
    version = (policy.name, policy.version)
    if route.guard is None or not applies(route, version):
        return
    change = live.collapse_guard.update(
        client, version, route.guard, policy.expect.kept_median_min, live.watch
    )
    if change is not None:
        report([change])


def report(changes: list[GuardChange]) -> None:
    """The gauge, the transitions counter and one log line per guard change."""
    for change in changes:
        name, number = change.version
        labels = (change.client, name, str(number))
        metrics.GUARD_ACTIVE.labels(*labels).set(int(change.engaged))
        to = "engaged" if change.engaged else "released"
        metrics.GUARD_TRANSITIONS.labels(*labels, to).inc()
        fields = (
            f"client={change.client} policy={name} version={number} "
            f"fallback={format_ref(*change.fallback)} reason={change.reason} "
            f"median_kept={_number(change.median)} kept_median_min={_number(change.floor)} "
            f"recover_at={_number(change.recover_at)} rows={change.rows} "
            f"held_seconds={change.held_seconds:.3f}"
        )
        if change.engaged:
            log.warning("collapse guard: engaged, serving the fallback %s", fields)
        else:
            log.info("collapse guard: released, the routed version serves again %s", fields)


def _number(value: float | None) -> str:
    return "-" if value is None else f"{value:g}"


def _observe_guarded(live: Live, policy: Policy, kept: list[int]) -> None:
    observe_shadow(policy.name, policy.version, kept)
    watch_kept(live, policy, kept)


def _then(first: BackgroundTask | None, task: BackgroundTask) -> BackgroundTasks:
    return BackgroundTasks([first, task] if first is not None else [task])


def after_pick(
    first: BackgroundTask | None,
    live: Live,
    client: str,
    route: Route,
    guarding: Guarding,
    rows: np.ndarray | None,
    history: list[list[int]] | None,
    seed: int,
) -> BackgroundTasks:
    """``first`` (the shadows, if any), then the guarded version on the same rows."""
    return _then(
        first, BackgroundTask(_pick_guarded, live, client, route, guarding, rows, history, seed)
    )


async def _pick_guarded(
    live: Live,
    client: str,
    route: Route,
    guarding: Guarding,
    rows: np.ndarray | None,
    history: list[list[int]] | None,
    seed: int,
) -> None:
    guarded = guarding.guarded
    if guarded is not None and rows is not None:
        try:
            out = await run_in_threadpool(
                pick, guarded.chain, rows, seed, history, kernel=live.kernel
            )
        except InputError:
            pass  # the routed version cannot take these rows: nothing to observe
        else:
            _observe_guarded(live, guarded.policy, out.kept.tolist())
    settle(live, client, route, (guarded or guarding.served).policy)


def after_run(
    first: BackgroundTask | None,
    live: Live,
    client: str,
    route: Route,
    guarding: Guarding,
    run: PromptRun,
) -> BackgroundTasks:
    """``first`` (metrics and shadows), then the guarded version on every step's logits."""
    return _then(first, BackgroundTask(_run_guarded, live, client, route, guarding, run))


async def _run_guarded(
    live: Live, client: str, route: Route, guarding: Guarding, run: PromptRun
) -> None:
    guarded = guarding.guarded
    steps = len(run.records)  # a cancelled stream's last step may still be landing
    if guarded is not None and run.logits and steps:
        rows = np.stack(run.logits[:steps])
        histories = run.histories[:steps]
        try:
            out = await run_in_threadpool(
                pick, guarded.chain, rows, run.seed, histories, kernel=live.kernel
            )
        except InputError:
            pass
        else:
            _observe_guarded(live, guarded.policy, out.kept.tolist())
    settle(live, client, route, (guarded or guarding.served).policy)

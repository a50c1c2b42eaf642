"""What a running keepset holds and how it changes while it runs: the registry snapshot (replaced
whole by a reload from the admin endpoint, SIGHUP or a file change, so a request sees the old
registry or the new one, never a mix), the keys, the model (loaded in the background, with the
reason when it cannot be), the collapse watch and the in-flight count.
"""

from __future__ import annotations

import asyncio
import contextlib
import hashlib
import logging
import random
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from starlette.concurrency import run_in_threadpool

from service import metrics
from service.capture import Capture, warn_if_off
from service.collapse_guard import CollapseGuard
from service.keys import KeyRing, load_keyring
from service.model import Model, ModelError
from service.outcomes import OutcomeStore
from service.registry import RegistrySnapshot, reload_registry
from service.request_ids import RequestIds, new_secret
from service.sampling import KERNEL_PROBLEM, Kernel, kernel_available, warm_up
from service.settings import Settings
from service.shm import SegmentMaps
from service.watch import CollapseWatch

log = logging.getLogger("keepset")


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
    # Set once loading has ended either way; prompt requests that arrive earlier wait for it.
    model_settled: asyncio.Event = field(default_factory=asyncio.Event)
    watch: CollapseWatch = field(default_factory=CollapseWatch)
    # Which clients' routed versions the collapse guard currently serves a fallback for.
    collapse_guard: CollapseGuard = field(default_factory=CollapseGuard)
    # The sampling path; "compiled" only once its warm-up has compiled (or loaded) the kernel.
    kernel: Kernel = "numpy"
    kernel_problem: str | None = "the sampling kernel is compiling"
    # Set when KEEPSET_CAPTURE_DIR is: this worker's capture of served rows.
    capture: Capture | None = None
    # Mints and checks request ids; the secret is KEEPSET_REQUEST_SECRET's when set.
    request_ids: RequestIds = field(default_factory=lambda: RequestIds(new_secret()))
    outcomes: OutcomeStore | None = None
    # Set when KEEPSET_SHM_DIR is: the segments' mappings this worker keeps open.
    segment_maps: SegmentMaps | None = None
    # The threads continuations run in, plain and streamed: a hand-off to an executor of our
    # own starts a run 0.15 ms sooner than one through anyio's thread limiter. The app sizes it
    # to KEEPSET_MAX_IN_FLIGHT, so that every admitted request runs at once, as before.
    continuations: ThreadPoolExecutor = field(
        default_factory=lambda: ThreadPoolExecutor(thread_name_prefix="keepset-continue")
    )


def reload_now(live: Live, trigger: str) -> dict[str, Any]:
    """Reload the registry folder; keep the last good snapshot if any file is refused. Returns
    the report the admin endpoint answers with."""
    snapshot, report = reload_registry(live.snapshot, live.settings.policies)
    live.snapshot = snapshot
    metrics.set_arm_weights(arm_shares(snapshot))
    if report.ok:
        warn_if_off(snapshot.routes, live.settings.capture_dir)
    keys_problem = reload_keys(live)
    outcome = "loaded" if report.ok and keys_problem is None else "kept_last_good"
    metrics.REGISTRY_RELOADS.labels(outcome).inc()
    result = {
        "outcome": outcome,
        "trigger": trigger,
        **report.as_dict(),
        "keys": "loaded" if keys_problem is None else f"kept last good: {keys_problem}",
    }
    live.last_reload = result
    if report.ok:
        log.info("registry reloaded (%s): %d files", trigger, len(report.loaded))
    else:
        log.warning(
            "registry reload refused (%s); keeping the last good: %s", trigger, report.refused
        )
    return result


def reload_keys(live: Live) -> str | None:
    """Read the keys file again (a rotation, a new client); keep the last good keys and say why
    when it cannot be used."""
    try:
        live.keys = load_keyring(live.settings.keys)
    except (ValueError, OSError) as exc:  # KeysError and YamlFileError are ValueErrors
        log.warning("keys file refused; keeping the last good keys: %s", exc)
        return str(exc)
    return None


def keys_fingerprint(path: Path) -> str:
    """The keys file's content hash: a Secret volume swaps it by symlink, so stat alone may
    not change."""
    try:
        return hashlib.sha256(path.read_bytes()).hexdigest()
    except OSError:
        return ""


async def load_model(live: Live) -> None:
    """Load the model off the event loop; /v1/pick serves meanwhile, readiness waits for it."""
    folder = live.settings.model
    try:
        live.model = await run_in_threadpool(Model, folder, threads=live.settings.model_threads)
    except ModelError as exc:
        live.model_problem = f"model not loaded: {exc}"
        log.error("%s; /v1/continue answers 503 until it is fixed and keepset restarted", exc)
    except Exception as exc:  # anything the runtime raises past the runner's own checks
        live.model_problem = f"model not loaded: {type(exc).__name__}: {exc}"
        log.exception("model not loaded; /v1/continue answers 503")
    else:
        live.model_problem = None
        log.info("model %s loaded from %s", live.model.info.name, folder)
    finally:
        live.model_settled.set()


async def warm_kernel(live: Live) -> None:
    """Compile the sampling kernel (or load it from numba's cache) off the event loop; picks
    take the numpy path meanwhile, and readiness waits for it. A kernel that cannot be had
    leaves the numpy path in place, with a log line that says why."""
    try:
        if live.settings.sampling_kernel == "compiled":
            if not kernel_available():
                log.warning("%s: sampling takes the numpy path", KERNEL_PROBLEM)
            else:
                await run_in_threadpool(warm_up)
                live.kernel = "compiled"
                log.info("sampling kernel compiled")
    except Exception:  # a numba or LLVM failure: the numpy path decides the same rows
        log.exception("the compiled sampling kernel failed to build; using the numpy path")
    finally:
        live.kernel_problem = None


async def settled_model(live: Live, wait_seconds: float) -> Model | None:
    """The model, waiting up to ``wait_seconds`` for a load still in progress: each worker
    loads its own copy, so a request can reach a worker that started a moment later."""
    if live.model is None and not live.model_settled.is_set():
        with contextlib.suppress(TimeoutError):
            await asyncio.wait_for(live.model_settled.wait(), wait_seconds)
    return live.model


async def poll_registry(live: Live) -> None:
    """Reload whenever a file under the registry folder changes (0 seconds: never look)."""
    interval = live.settings.reload_poll_seconds
    if interval <= 0:
        return
    seen = live.snapshot.fingerprint
    seen_keys = keys_fingerprint(live.settings.keys)
    while True:
        await asyncio.sleep(interval)
        # On the loop thread: a few dozen stat calls take a fraction of a millisecond, while in
        # a worker thread each call had to win the GIL back from a loop busy with requests, and
        # under load one poll took over a second (a worker then missed registry updates).
        try:
            current = RegistrySnapshot.fingerprint_of(live.settings.policies)
        except OSError:
            continue
        current_keys = keys_fingerprint(live.settings.keys)
        if current != seen:
            seen, seen_keys = current, current_keys
            try:
                reload_now(live, "file-change")  # the keys too
            except Exception:
                # The poll must outlive any one bad reload, or this worker never reloads again.
                log.exception("registry reload failed; keeping the last good, polling on")
                seen = ""  # try again at the next poll
        elif current_keys != seen_keys:
            seen_keys = current_keys
            if reload_keys(live) is None:
                log.info("keys file reloaded (file-change)")


def arm_shares(snapshot: RegistrySnapshot) -> dict[tuple[str, str], float]:
    """Configured share of each (client, arm label), for the ``keepset_arm_weight`` gauge."""
    return {
        (client, arm.public_label(i)): arm.weight / route.total_weight
        for client, route in snapshot.routes.items()
        for i, arm in enumerate(route.arms)
    }

"""Routes: which policy versions serve each client, how traffic splits between them, shadows.

``routes.yaml`` maps each client to weighted arms and optional shadow versions. The arm for a
request with a routing key comes from a stable hash of (client, key) (BLAKE2b, never Python's
salted ``hash``), so the same key lands on the same arm on every replica and after restarts;
a request without a key is assigned at random in proportion to the weights.
"""

from __future__ import annotations

import hashlib
import math
import random
import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from service.policy import check_name, format_ref, parse_ref

Ref = tuple[str, int]


class RoutesError(ValueError):
    """routes.yaml as a whole cannot be used."""


@dataclass(frozen=True)
class Arm:
    policy: Ref
    weight: int
    label: str | None = None

    def public_label(self, index: int) -> str:
        """What responses and metrics call this arm: its label, or its index."""
        return self.label if self.label is not None else str(index)


# How long a collapse guard serves its fallback at the least, unless routes.yaml says otherwise.
DEFAULT_HOLD_SECONDS = 30.0


@dataclass(frozen=True)
class GuardSpec:
    """A route's collapse guard: the version that serves while an arm's version is collapsed,
    the least time it serves once engaged, and how far above the version's
    ``expect.kept_median_min`` its kept median must be back before the arm serves again."""

    fallback: Ref
    hold_seconds: float = DEFAULT_HOLD_SECONDS
    recover_margin: float = 0.0

    def describe(self) -> dict[str, Any]:
        return {
            "fallback": format_ref(*self.fallback),
            "hold_seconds": self.hold_seconds,
            "recover_margin": self.recover_margin,
        }


@dataclass(frozen=True)
class CaptureRule:
    """A route's opt-in capture of served rows: the share of rows sampled, and the disk the
    client's shards may take (megabytes of 10**6 bytes)."""

    rate: float
    max_mb: float

    @property
    def max_bytes(self) -> int:
        return int(self.max_mb * 1_000_000)


@dataclass(frozen=True)
class Route:
    client: str
    arms: tuple[Arm, ...]
    shadow: tuple[Ref, ...] = ()
    capture: CaptureRule | None = None
    guard: GuardSpec | None = None
    # Labels a client may report as outcomes (``outcomes: {labels: [...]}``); none by default.
    outcome_labels: tuple[str, ...] = ()

    @property
    def total_weight(self) -> int:
        return sum(a.weight for a in self.arms)


def stable_point(client: str, routing_key: str, total: int) -> int:
    """A point in [0, total) that depends only on (client, routing_key)."""
    # Length-prefixed so ("ab", "c") and ("a", "bc") never collide.
    payload = b"".join(
        len(p).to_bytes(4, "big") + p for p in (client.encode(), routing_key.encode())
    )
    digest = hashlib.blake2b(payload, digest_size=8, person=b"keepset-arm").digest()
    return int.from_bytes(digest, "big") % total


def choose_arm(
    client: str, routing_key: str | None, arms: Sequence[Arm], rng: random.Random
) -> int:
    """Index of the arm serving this request."""
    if len(arms) == 1:  # no split: nothing to hash
        return 0
    total = sum(a.weight for a in arms)
    point = (
        stable_point(client, routing_key, total)
        if routing_key is not None
        else rng.randrange(total)
    )
    for index, arm in enumerate(arms):
        if point < arm.weight:
            return index
        point -= arm.weight
    return len(arms) - 1


def parse_routes(data: Any, known: set[Ref]) -> tuple[dict[str, Route], list[Any]]:
    """Validate parsed routes.yaml; each client with a problem is refused on its own."""
    from service.registry import Refusal  # the registry owns the refusal type

    if not isinstance(data, Mapping) or not isinstance(data.get("clients"), Mapping):
        raise RoutesError("expected a mapping with a 'clients' mapping")
    unknown_top = set(data) - {"clients"}
    if unknown_top:
        raise RoutesError(f"unknown top-level keys: {', '.join(sorted(map(str, unknown_top)))}")
    routes: dict[str, Route] = {}
    refused = []
    for client, spec in data["clients"].items():
        try:
            routes[str(client)] = _route(str(client), spec, known)
        except ValueError as exc:
            refused.append(Refusal("routes.yaml", f"clients.{client}: {exc}"))
    return routes, refused


def _route(client: str, spec: Any, known: set[Ref]) -> Route:
    check_name(client)
    if (
        not isinstance(spec, Mapping)
        or set(spec) - {"arms", "shadow", "capture", "guard", "outcomes"}
        or "arms" not in spec
    ):
        raise ValueError(
            "expected {arms: [...], shadow: [...], capture: {...}, guard: {...}, "
            "outcomes: {labels: [...]}} (all but arms optional)"
        )
    arms_spec = spec["arms"]
    if not isinstance(arms_spec, list) or not arms_spec:
        raise ValueError("arms: expected a non-empty list")
    arms = []
    labels: set[str] = set()
    for i, arm in enumerate(arms_spec):
        if (
            not isinstance(arm, Mapping)
            or set(arm) - {"policy", "weight", "label"}
            or "policy" not in arm
        ):
            raise ValueError(
                f"arms[{i}]: expected {{policy: name@version, weight: n, label: text}}"
            )
        ref = _known_ref(arm["policy"], known, f"arms[{i}].policy")
        weight = arm.get("weight", 1)
        if isinstance(weight, bool) or not isinstance(weight, int) or weight < 1:
            raise ValueError(f"arms[{i}].weight: expected a positive integer, got {weight!r}")
        label = arm.get("label")
        if label is not None:
            if not isinstance(label, str) or not label or len(label) > 64:
                raise ValueError(f"arms[{i}].label: expected text of 1 to 64 characters")
            if label in labels:
                raise ValueError(f"arms[{i}].label: {label!r} is used twice")
            labels.add(label)
        arms.append(Arm(ref, weight, label))
    shadow_spec = spec.get("shadow", []) or []
    if not isinstance(shadow_spec, list):
        raise ValueError("shadow: expected a list of name@version")
    shadow = tuple(_known_ref(s, known, f"shadow[{i}]") for i, s in enumerate(shadow_spec))
    capture = _capture_rule(spec["capture"]) if "capture" in spec else None
    guard = None if spec.get("guard") is None else _guard(spec["guard"], known)
    outcomes = _outcome_labels(spec["outcomes"]) if "outcomes" in spec else ()
    return Route(client, tuple(arms), shadow, capture, guard, outcomes)


def _capture_rule(spec: Any) -> CaptureRule:
    if not isinstance(spec, Mapping) or set(spec) != {"rate", "max_mb"}:
        raise ValueError(
            "capture: expected {rate: 0 < r <= 1, max_mb: n > 0}, both keys and no other"
        )
    rate, max_mb = spec["rate"], spec["max_mb"]
    if not _is_number(rate) or not 0 < rate <= 1:
        raise ValueError(f"capture.rate: expected a number with 0 < rate <= 1, got {rate!r}")
    if not _is_number(max_mb) or not 0 < max_mb < math.inf:
        raise ValueError(f"capture.max_mb: expected a positive number of megabytes, got {max_mb!r}")
    return CaptureRule(float(rate), float(max_mb))


def _is_number(value: Any) -> bool:
    return isinstance(value, int | float) and not isinstance(value, bool) and not math.isnan(value)


def _guard(spec: Any, known: set[Ref]) -> GuardSpec:
    keys = {"fallback", "hold_seconds", "recover_margin"}
    if not isinstance(spec, Mapping) or set(spec) - keys or "fallback" not in spec:
        raise ValueError(
            "guard: expected {fallback: name@version, hold_seconds: n, recover_margin: n} "
            "(hold_seconds and recover_margin optional)"
        )
    return GuardSpec(
        _known_ref(spec["fallback"], known, "guard.fallback"),
        _non_negative(spec.get("hold_seconds", DEFAULT_HOLD_SECONDS), "guard.hold_seconds"),
        _non_negative(spec.get("recover_margin", 0.0), "guard.recover_margin"),
    )


def _non_negative(value: Any, where: str) -> float:
    if (
        isinstance(value, bool)
        or not isinstance(value, int | float)
        or not math.isfinite(value)
        or value < 0
    ):
        raise ValueError(f"{where}: expected a number >= 0, got {value!r}")
    return float(value)


OUTCOME_LABEL = re.compile(r"[a-z][a-z0-9_-]{0,31}")
MAX_OUTCOME_LABELS = 16


def _outcome_labels(spec: Any) -> tuple[str, ...]:
    """A route's ``outcomes: {labels: [name, ...]}``: the labels its client may report."""
    if not isinstance(spec, Mapping) or set(spec) != {"labels"}:
        raise ValueError("outcomes: expected {labels: [name, ...]}")
    labels = spec["labels"]
    if not isinstance(labels, list) or not 1 <= len(labels) <= MAX_OUTCOME_LABELS:
        raise ValueError(f"outcomes.labels: expected a list of 1 to {MAX_OUTCOME_LABELS} names")
    for i, label in enumerate(labels):
        if not isinstance(label, str) or not OUTCOME_LABEL.fullmatch(label):
            raise ValueError(
                f"outcomes.labels[{i}]: expected a lowercase letter, then up to 31 of a-z, 0-9,"
                f" '_' and '-'; got {label!r}"
            )
    if len(set(labels)) != len(labels):
        raise ValueError("outcomes.labels: a label is listed twice")
    return tuple(labels)


def _known_ref(text: Any, known: set[Ref], where: str) -> Ref:
    try:
        ref = parse_ref(text)
    except ValueError as exc:
        raise ValueError(f"{where}: {exc}") from None
    if ref not in known:
        raise ValueError(f"{where}: {format_ref(*ref)} is not a loaded policy version")
    return ref

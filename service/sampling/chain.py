"""Chains: the ordered list of sampling stages a policy applies, parsed and validated.

A chain is written as a list of one-key mappings, ``[{"temperature": 0.8}, {"top_k": 50}]``.
``parse_chain`` turns that into an immutable :class:`Chain`; every problem raises
:class:`ChainError` naming the stage (by position and method) and the allowed range, so a
policy author sees what to fix without reading code.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace
from functools import cached_property
from typing import Any


class ChainError(ValueError):
    """A chain that cannot be applied: unknown stage, bad parameter, bad ``min_keep``."""

    def __init__(self, message: str, *, stage: str | None = None, index: int | None = None):
        super().__init__(message)
        self.stage = stage
        self.index = index


@dataclass(frozen=True)
class RepetitionPenalty:
    """Keskar et al. 2019, sign-aware: divide positive logits by ``factor``, multiply others."""

    factor: float
    window: int | None  # None: the whole history


@dataclass(frozen=True)
class OccurrencePenalty:
    """Subtract ``per_use`` per occurrence and ``present`` once, over the last ``window`` ids."""

    per_use: float
    present: float
    window: int | None


StageParam = float | int | bool | RepetitionPenalty | OccurrencePenalty | tuple[Any, ...]


@dataclass(frozen=True)
class Stage:
    """One step of a chain: a method name and its validated parameter."""

    method: str
    param: StageParam

    @property
    def number(self) -> float:
        """The parameter of a single-number stage (temperature, top_k, top_p, ...)."""
        if isinstance(self.param, bool) or not isinstance(self.param, int | float):
            raise TypeError(f"{self.method} has no single-number parameter")
        return float(self.param)

    @cached_property  # read for every row a ban or bias edits: a long ban made it 30 ms a row
    def token_ids(self) -> tuple[int, ...]:
        """The ids a ban or token_bias stage names."""
        if self.method == "ban":
            return tuple(int(i) for i in self.param)  # type: ignore[union-attr]
        if self.method == "token_bias":
            return tuple(int(i) for i, _ in self.param)  # type: ignore[union-attr]
        return ()

    def to_spec(self) -> dict[str, Any]:
        """The stage in the one-key mapping form it was written in."""
        p = self.param
        if isinstance(p, RepetitionPenalty):
            spec: Any = {"factor": p.factor}
            if p.window is not None:
                spec["window"] = p.window
        elif isinstance(p, OccurrencePenalty):
            spec = {"per_use": p.per_use, "present": p.present}
            if p.window is not None:
                spec["window"] = p.window
        elif self.method == "token_bias":
            spec = {int(i): float(d) for i, d in p}  # type: ignore[union-attr]
        elif self.method == "ban":
            spec = [int(i) for i in p]  # type: ignore[union-attr]
        else:
            spec = p
        return {self.method: spec}


@dataclass(frozen=True)
class Chain:
    """A validated chain. ``fallback`` decides rows the chain cannot (None means greedy)."""

    stages: tuple[Stage, ...]
    min_keep: int = 1
    fallback: Chain | None = field(default=None, compare=False)

    def with_param(self, index: int, value: float) -> Chain:
        """A copy with stage ``index``'s scalar parameter replaced, validated like the original."""
        if not 0 <= index < len(self.stages):
            raise ChainError(f"no stage at position {index}", index=index)
        stage = self.stages[index]
        if stage.method not in SCALAR_METHODS:
            raise ChainError(
                f"stage {index} ({stage.method}) has no single adjustable parameter",
                stage=stage.method,
                index=index,
            )
        new_stage = _parse_stage(index, {stage.method: value})
        stages = (*self.stages[:index], new_stage, *self.stages[index + 1 :])
        return replace(self, stages=stages)

    def with_fallback(self, fallback: Chain | None) -> Chain:
        return replace(self, fallback=fallback)

    def to_spec(self) -> list[dict[str, Any]]:
        return [s.to_spec() for s in self.stages]

    @cached_property
    def reads_history(self) -> bool:
        """Whether any stage of the chain or its fallback reads the history (the penalties):
        only then can the history change what is drawn."""
        own = any(s.method in HISTORY_METHODS for s in self.stages)
        return own or (self.fallback is not None and self.fallback.reads_history)

    @cached_property  # checked on every pick; a frozen chain's answer never changes
    def largest_token_id(self) -> int:
        """The largest id that ban or token_bias names (-1 if none); vocabularies must exceed it."""
        return max((i for s in self.stages for i in s.token_ids), default=-1)


HISTORY_METHODS = ("repetition_penalty", "occurrence_penalty")
# Stages whose whole parameter is one number, so a request may adjust it.
SCALAR_METHODS = ("temperature", "top_k", "top_p", "typical", "min_p", "epsilon", "eta")
TRUNCATION_METHODS = ("top_k", "top_p", "typical", "min_p", "epsilon", "eta", "greedy")
METHODS = (
    "temperature",
    "repetition_penalty",
    "occurrence_penalty",
    "token_bias",
    "ban",
    *TRUNCATION_METHODS,
)

# (low, low inclusive, high, high inclusive, human-readable range)
_RANGES: dict[str, tuple[float, bool, float, bool, str]] = {
    "temperature": (0.0, False, math.inf, False, "a number > 0"),
    "top_p": (0.0, False, 1.0, True, "a number in (0, 1]"),
    "typical": (0.0, False, 1.0, True, "a number in (0, 1]"),
    "min_p": (0.0, False, 1.0, True, "a number in (0, 1]"),
    "epsilon": (0.0, False, 1.0, False, "a number in (0, 1)"),
    "eta": (0.0, False, 1.0, False, "a number in (0, 1)"),
}


def parse_chain(
    stages: Sequence[Mapping[str, Any]],
    min_keep: int = 1,
    fallback: Chain | None = None,
) -> Chain:
    """Validate a chain written as one-key mappings; raise ChainError on the first problem."""
    if isinstance(stages, str | bytes) or not isinstance(stages, Sequence):
        raise ChainError("a chain is a list of stages, each a one-key mapping like {top_k: 50}")
    if isinstance(min_keep, bool) or not isinstance(min_keep, int) or min_keep < 1:
        raise ChainError(f"min_keep must be an integer >= 1, got {min_keep!r}")
    parsed = tuple(_parse_stage(i, spec) for i, spec in enumerate(stages))
    return Chain(stages=parsed, min_keep=min_keep, fallback=fallback)


def _parse_stage(index: int, spec: Any) -> Stage:
    if not isinstance(spec, Mapping) or len(spec) != 1:
        raise ChainError(
            f"stage {index}: each stage is a one-key mapping like {{top_k: 50}}, got {spec!r}",
            index=index,
        )
    ((method, value),) = spec.items()
    where = f"stage {index} ({method})"
    if method not in METHODS:
        raise ChainError(
            f"stage {index}: unknown method {method!r}; known methods: {', '.join(METHODS)}",
            stage=str(method),
            index=index,
        )

    def fail(allowed: str) -> ChainError:
        return ChainError(f"{where}: expected {allowed}, got {value!r}", stage=method, index=index)

    if method in _RANGES:
        lo, lo_in, hi, hi_in, text = _RANGES[method]
        x = _number(value)
        if x is None or not (x >= lo if lo_in else x > lo) or not (x <= hi if hi_in else x < hi):
            raise fail(text)
        return Stage(method, x)
    if method == "top_k":
        if isinstance(value, bool) or not isinstance(value, int) or value < 1:
            raise fail("an integer >= 1")
        return Stage(method, int(value))
    if method == "greedy":
        if value is not True:
            raise fail("true")
        return Stage(method, True)
    if method == "ban":
        if not isinstance(value, list | tuple) or not value:
            raise fail("a non-empty list of token ids (integers >= 0)")
        ids = [_token_id(v) for v in value]
        if any(i is None for i in ids):
            raise fail("a non-empty list of token ids (integers >= 0)")
        return Stage(method, tuple(sorted({i for i in ids if i is not None})))
    if method == "token_bias":
        if not isinstance(value, Mapping) or not value:
            raise fail("a mapping of token id (integer >= 0) to a finite number")
        pairs: list[tuple[int, float]] = []
        for k, d in value.items():
            tid, delta = _token_id(k), _number(d)
            if tid is None or delta is None:
                raise fail("a mapping of token id (integer >= 0) to a finite number")
            pairs.append((tid, delta))
        named = [i for i, _ in pairs]
        if len(set(named)) < len(named):  # 3 and "3" are both id 3: which delta was meant?
            twice = sorted({i for i in named if named.count(i) > 1})
            raise fail(f"each token id once (id {twice[0]} is named twice)")
        return Stage(method, tuple(sorted(pairs)))
    if method == "repetition_penalty":
        fields = _fields(value, {"factor", "window"}, required={"factor"}, fail=fail)
        factor = _number(fields["factor"])
        if factor is None or factor < 1.0:
            raise fail("{factor: a number >= 1, window: an integer >= 1 (optional)}")
        return Stage(method, RepetitionPenalty(factor, _window(fields.get("window"), fail)))
    # occurrence_penalty
    fields = _fields(value, {"per_use", "present", "window"}, required=set(), fail=fail)
    per_use, present = _number(fields.get("per_use", 0.0)), _number(fields.get("present", 0.0))
    if per_use is None or present is None or per_use < 0 or present < 0:
        raise fail("{per_use: a number >= 0, present: a number >= 0, window: an integer >= 1}")
    return Stage(method, OccurrencePenalty(per_use, present, _window(fields.get("window"), fail)))


def _number(value: Any) -> float | None:
    if isinstance(value, bool) or not isinstance(value, int | float):
        return None
    x = float(value)
    return x if math.isfinite(x) else None


def _token_id(value: Any) -> int | None:
    if isinstance(value, str) and value.isdigit():
        value = int(value)  # JSON object keys are strings
    if isinstance(value, bool) or not isinstance(value, int) or value < 0:
        return None
    return int(value)


def _fields(value: Any, allowed: set[str], *, required: set[str], fail: Any) -> dict[str, Any]:
    text = ", ".join(sorted(allowed))
    if not isinstance(value, Mapping):
        raise fail(f"a mapping with keys from: {text}")
    unknown = set(value) - allowed
    missing = required - set(value)
    if unknown or missing:
        raise fail(f"a mapping with keys from: {text} (required: {', '.join(sorted(required))})")
    return dict(value)


def _window(value: Any, fail: Any) -> int | None:
    if value is None:
        return None
    if isinstance(value, bool) or not isinstance(value, int) or value < 1:
        raise fail("window to be an integer >= 1")
    return int(value)

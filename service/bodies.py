"""Request bodies of the HTTP API and how they are read: ``/v1/pick`` as JSON or a raw ``.npy``
body (with query parameters), ``/v1/continue`` as JSON, and the limits on rows and vocabulary.
Every way a body can be wrong becomes a problem document with its documented status; nothing
here knows about routes, policies or metrics.
"""

from __future__ import annotations

import base64
import binascii
import json
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
import orjson
from fastapi import Request
from pydantic import BaseModel, ConfigDict, Field, StrictInt, ValidationError

from service.admission import read_body
from service.live import Live
from service.npy import NpyError, read_npy
from service.outcomes import OutcomeBody
from service.problems import Problem
from service.sampling import InputError, as_batch
from service.settings import Settings
from service.shm import MappedLogits, ShmRef, read_segment

NPY_MEDIA = "application/x-npy"


class PickBody(BaseModel):
    """JSON body of ``POST /v1/pick``."""

    model_config = ConfigDict(extra="forbid")

    # Checked by numpy's conversion, not field by field: per-number validation of a 128k row
    # would cost more than the sampling.
    logits: Any = None
    logits_npy: str | None = Field(default=None, description="base64 of .npy bytes")
    logits_dtype: Literal["bfloat16"] | None = Field(
        default=None, description="what the uint16 array of logits_npy holds"
    )
    logits_shm: ShmRef | None = Field(default=None, description="a shared-memory segment")
    history: list[list[StrictInt]] | None = None
    seed: StrictInt | None = Field(default=None, ge=0, lt=2**64)
    routing_key: str | None = Field(default=None, max_length=512)
    adjust: dict[str, float] = Field(default_factory=dict)


class ContinueBody(BaseModel):
    """JSON body of ``POST /v1/continue``."""

    model_config = ConfigDict(extra="forbid")

    prompt: str = Field(max_length=1_000_000)
    budget: StrictInt | None = Field(
        default=None, ge=1, description="tokens to generate at most; capped by the policy's"
    )
    seed: StrictInt | None = Field(default=None, ge=0, lt=2**64)
    routing_key: str | None = Field(default=None, max_length=512)
    adjust: dict[str, float] = Field(default_factory=dict)
    stream: bool = False


@dataclass
class PickInput:
    logits: np.ndarray
    history: list[list[int]] | None
    seed: int | None
    routing_key: str | None
    adjust: dict[str, float]
    # Set when ``logits`` views a shared-memory segment: release() lets it go.
    mapped: MappedLogits | None = None

    def release(self) -> None:
        """Drop the logits; a shared-memory view must not be touched after this."""
        self.logits = np.empty((0, 0), np.float32)
        if self.mapped is not None:
            self.mapped.close()
            self.mapped = None


async def pick_input(request: Request, live: Live) -> PickInput:
    media = request.headers.get("content-type", "").split(";")[0].strip().lower()
    if media not in ("application/json", NPY_MEDIA):
        raise Problem(
            415,
            "media-type",
            f"send application/json or {NPY_MEDIA}, not {media or 'no Content-Type'}",
        )
    body = await read_body(request, live)
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
        raise Problem(400, "malformed", validation_text(exc)) from None
    given = [
        parsed.logits is not None,
        parsed.logits_npy is not None,
        parsed.logits_shm is not None,
    ]
    if sum(given) != 1:
        raise Problem(
            400, "malformed", "send exactly one of 'logits', 'logits_npy' and 'logits_shm'"
        )
    if parsed.logits_dtype is not None and parsed.logits_npy is None:
        raise Problem(400, "malformed", "'logits_dtype' describes 'logits_npy'; send it with that")
    mapped = None
    if parsed.logits_shm is not None:
        settings = live.settings
        mapped = read_segment(
            parsed.logits_shm,
            settings.shm_dir,
            lambda b, v: check_shape(b, v, settings),
            live.segment_maps,
        )
        logits = mapped.logits
    elif parsed.logits_npy is not None:
        try:
            raw = base64.b64decode(parsed.logits_npy, validate=True)
        except (binascii.Error, ValueError):
            raise Problem(400, "malformed", "logits_npy is not valid base64") from None
        logits = _npy(raw, parsed.logits_dtype)
    else:
        logits = _json_logits(parsed.logits)
    return PickInput(logits, parsed.history, parsed.seed, parsed.routing_key, parsed.adjust, mapped)


def validation_text(exc: ValidationError) -> str:
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


def _npy(data: bytes, declared: str | None = None) -> np.ndarray:
    try:
        return read_npy(data, declared)
    except NpyError as exc:
        status = 415 if exc.kind == "dtype" else 400
        raise Problem(status, f"npy-{exc.kind}", str(exc)) from None


def _npy_input(body: bytes, query: dict[str, str]) -> PickInput:
    declared = query.pop("dtype", None)
    if declared not in (None, "bfloat16"):
        raise Problem(
            400,
            "malformed-query",
            f"dtype may only be bfloat16 (float32 and float16 are read from the .npy header), "
            f"got {declared[:32]!r}",
        )
    logits = _npy(body, declared)
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
    return PickInput(logits, history, seed_value, routing_key, adjust)


def check_limits(logits: np.ndarray, live: Live) -> np.ndarray:
    rows = as_batch(logits) if logits.ndim != 2 else logits
    b, v = rows.shape
    check_shape(b, v, live.settings)
    return rows


def check_shape(b: int, v: int, settings: Settings) -> None:
    if b > settings.max_rows:
        raise Problem(
            413, "too-many-rows", f"{b} rows is over KEEPSET_MAX_ROWS={settings.max_rows}"
        )
    if v > settings.max_vocab:
        raise Problem(
            413, "vocab-too-large", f"vocabulary {v} is over KEEPSET_MAX_VOCAB={settings.max_vocab}"
        )


_INPUT_STATUS = {
    "shape": 400,
    "history": 400,
    "seed": 400,
    "dtype": 415,
    "no_finite": 422,
    "token_range": 422,
}


def input_problem(exc: InputError) -> Problem:
    return Problem(
        _INPUT_STATUS.get(exc.reason, 400), f"input-{exc.reason.replace('_', '-')}", str(exc)
    )


async def continue_input(request: Request, live: Live) -> ContinueBody:
    media = request.headers.get("content-type", "").split(";")[0].strip().lower()
    if media != "application/json":
        raise Problem(415, "media-type", f"send application/json, not {media or 'no Content-Type'}")
    body = await read_body(request, live)
    try:
        return ContinueBody.model_validate_json(body)
    except ValidationError as exc:
        kind = "malformed-json" if _is_json_error(exc) else "malformed"
        raise Problem(400, kind, validation_text(exc)) from None


def _is_json_error(exc: ValidationError) -> bool:
    return any(e["type"] == "json_invalid" for e in exc.errors())


async def outcome_input(request: Request, live: Live) -> OutcomeBody:
    media = request.headers.get("content-type", "").split(";")[0].strip().lower()
    if media != "application/json":
        raise Problem(415, "media-type", f"send application/json, not {media or 'no Content-Type'}")
    body = await read_body(request, live)
    try:
        parsed = OutcomeBody.model_validate_json(body)
    except ValidationError as exc:
        kind = "malformed-json" if _is_json_error(exc) else "malformed"
        raise Problem(400, kind, validation_text(exc)) from None
    if parsed.value is None and parsed.label is None:
        raise Problem(400, "malformed", "send a 'value', a 'label' or both")
    return parsed

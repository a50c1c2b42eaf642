"""Policy files: the pydantic model of one ``policies/<name>/<version>.yaml``, and adjust.

This module owns what a single policy version may say (DESIGN.md section 2), how validation
problems are reported (file and field named, allowed values stated), the JSON Schema shipped as
``policies/policy.schema.json``, and :func:`apply_adjust`, the pure function that applies a
caller's ``adjust`` mapping within the ranges the policy allows. Cross-file rules (folder names,
the lock, fallback resolution) belong to :mod:`service.registry`.
"""

from __future__ import annotations

import json
import math
import re
from collections.abc import Mapping, Sequence
from typing import Annotated, Any, Literal

from pydantic import (
    BaseModel,
    ConfigDict,
    Field,
    PrivateAttr,
    StrictFloat,
    StrictInt,
    StrictStr,
    ValidationError,
    ValidationInfo,
    field_validator,
)

from service.sampling import METHODS, SCALAR_METHODS, Chain, ChainError, parse_chain

# Names become folder names, metrics labels and parts of "name@version", so keep them plain.
NAME_PATTERN = re.compile(r"[a-z0-9]+(?:-[a-z0-9]+)*")
NAME_RULE = "lowercase letters, digits and single hyphens, at most 64 characters (e.g. prompt-book)"
REF_PATTERN = re.compile(r"(?P<name>[a-z0-9]+(?:-[a-z0-9]+)*)@(?P<version>[1-9][0-9]*)")

SCHEMA_URI = "https://json-schema.org/draft/2020-12/schema"


def check_name(value: str) -> str:
    """Return ``value`` if it is a valid policy or client name, else raise ValueError."""
    if len(value) > 64 or not NAME_PATTERN.fullmatch(value):
        raise ValueError(f"expected {NAME_RULE}, got {value!r}")
    return value


def parse_ref(text: str) -> tuple[str, int]:
    """Split ``"name@version"`` into its parts; raise ValueError saying what is expected."""
    match = REF_PATTERN.fullmatch(text) if isinstance(text, str) else None
    if match is None:
        raise ValueError(
            f"expected a policy reference name@version like prompt-book@3, got {text!r}"
        )
    return match["name"], int(match["version"])


def format_ref(name: str, version: int) -> str:
    return f"{name}@{version}"


Number = Annotated[StrictFloat, Field(allow_inf_nan=False)]


class Expect(BaseModel):
    """What the policy's owner expects to see live; the collapse watch compares against it."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    kept_median_min: Annotated[
        Number | None,
        Field(
            ge=1,
            description="Lowest acceptable median of the per-row survivor count (kept).",
        ),
    ] = None


class Policy(BaseModel):
    """One published version of a named decoding policy."""

    model_config = ConfigDict(extra="forbid", frozen=True, title="keepset policy")

    name: Annotated[
        StrictStr, Field(description="Policy name; equals the folder name. " + NAME_RULE)
    ]
    version: Annotated[
        StrictInt, Field(gt=0, description="Version number; equals the file name <version>.yaml.")
    ]
    owner: Annotated[StrictStr, Field(min_length=1, description="Team answerable for this policy.")]
    summary: Annotated[
        StrictStr, Field(min_length=1, description="One line saying what the policy is for.")
    ]
    # Declared before chain on purpose: pydantic validates fields in order, and the chain
    # validator needs min_keep.
    min_keep: Annotated[
        StrictInt,
        Field(ge=1, description="No truncation stage leaves fewer survivors than this."),
    ] = 1
    chain: Annotated[
        list[dict[str, Any]],
        Field(
            min_length=1,
            description="Ordered sampling stages, each a one-key mapping such as {top_k: 50}.",
            json_schema_extra={
                "items": {
                    "type": "object",
                    "minProperties": 1,
                    "maxProperties": 1,
                    "propertyNames": {"enum": list(METHODS)},
                }
            },
        ),
    ]
    fallback: Annotated[
        StrictStr,
        Field(
            description="What decides a row the chain cannot: greedy, or a policy name@version.",
            pattern=r"^(greedy|[a-z0-9]+(-[a-z0-9]+)*@[1-9][0-9]*)$",
        ),
    ] = "greedy"
    adjustable: Annotated[
        dict[StrictStr, tuple[Number, Number]],
        Field(
            description=(
                "Parameters a caller may change per request, each with its inclusive "
                "[low, high] range."
            ),
            json_schema_extra={"propertyNames": {"enum": list(SCALAR_METHODS)}},
        ),
    ] = {}
    on_out_of_range: Annotated[
        Literal["reject", "clamp"],
        Field(description="An adjustment outside its range is refused (reject) or clamped."),
    ] = "reject"
    budget: Annotated[
        StrictInt, Field(gt=0, description="Default token budget for the prompt path.")
    ] = 128
    stop: Annotated[
        list[Annotated[StrictStr, Field(min_length=1)]],
        Field(description="Strings that end a continuation."),
    ] = []
    expect: Annotated[Expect, Field(description="Live expectations for monitoring.")] = Expect()

    _chain: Chain = PrivateAttr()

    @field_validator("name")
    @classmethod
    def _name(cls, value: str) -> str:
        return check_name(value)

    @field_validator("fallback", mode="before")
    @classmethod
    def _fallback(cls, value: Any) -> Any:
        if isinstance(value, str) and value != "greedy":
            parse_ref(value)  # a clearer message than the bare pattern failure
        return value

    @field_validator("chain")
    @classmethod
    def _chain_valid(cls, value: list[dict[str, Any]], info: ValidationInfo) -> Any:
        # If min_keep itself was invalid it is reported on its own; still check the stages.
        min_keep = info.data.get("min_keep", 1)
        try:
            parse_chain(value, min_keep=min_keep)
        except ChainError as exc:
            raise ValueError(str(exc)) from None
        return value

    @field_validator("adjustable")
    @classmethod
    def _adjustable(
        cls, value: dict[str, tuple[float, float]], info: ValidationInfo
    ) -> dict[str, tuple[float, float]]:
        if "chain" not in info.data:
            return value  # the chain's own error is already reported
        chain = parse_chain(info.data["chain"], min_keep=info.data.get("min_keep", 1))
        problems = [p for key, rng in value.items() if (p := _range_problem(chain, key, rng))]
        if problems:
            raise ValueError("; ".join(problems))
        return {key: (lo, hi) for key, (lo, hi) in value.items()}

    def model_post_init(self, context: Any) -> None:
        self._chain = parse_chain(self.chain, min_keep=self.min_keep)

    @property
    def ref(self) -> str:
        return format_ref(self.name, self.version)

    @property
    def parsed_chain(self) -> Chain:
        """The validated chain (without its fallback linked; the registry links fallbacks)."""
        return self._chain

    @property
    def fallback_ref(self) -> tuple[str, int] | None:
        """``(name, version)`` of the fallback policy, or None for greedy."""
        return None if self.fallback == "greedy" else parse_ref(self.fallback)


def _range_problem(chain: Chain, key: str, rng: tuple[float, float]) -> str | None:
    if key not in SCALAR_METHODS:
        return f"{key}: not a single-number stage; adjustable stages: {', '.join(SCALAR_METHODS)}"
    index = first_stage(chain, key)
    if index is None:
        return f"{key}: the chain has no {key} stage, so it cannot be adjusted"
    lo, hi = rng
    if lo > hi:
        return f"{key}: the range [{lo:g}, {hi:g}] has low above high"
    for bound in (lo, hi):
        try:
            chain.with_param(index, _as_param(key, bound))
        except (ChainError, ValueError) as exc:
            return f"{key}: range bound {bound:g} is not a valid value ({exc})"
    current = chain.stages[index].number
    if not lo <= current <= hi:
        return f"{key}: the chain's value {current:g} lies outside the range [{lo:g}, {hi:g}]"
    return None


def first_stage(chain: Chain, method: str) -> int | None:
    """Index of the first stage using ``method``, or None."""
    return next((i for i, s in enumerate(chain.stages) if s.method == method), None)


def _as_param(method: str, value: float) -> float | int:
    # top_k takes an integer; a caller's 40.0 means 40, but 40.5 is not a count of tokens.
    if method == "top_k":
        if not float(value).is_integer():
            raise ValueError(f"top_k takes an integer, got {value:g}")
        return int(value)
    return float(value)


class PolicyFileError(ValueError):
    """A policy file that cannot be loaded; ``problems`` pairs a field path with a message."""

    def __init__(self, file: str, problems: Sequence[tuple[str, str]]):
        self.file = file
        self.problems = list(problems)
        super().__init__(
            "; ".join(f"{file}: {f}: {m}" if f else f"{file}: {m}" for f, m in problems)
        )


def validation_problems(exc: ValidationError) -> list[tuple[str, str]]:
    """Turn a pydantic error into ``(field path, message)`` pairs a policy author can act on."""
    out = []
    for err in exc.errors():
        field = _loc_text(err["loc"])
        kind = err["type"]
        if kind == "value_error":
            message = str(err.get("ctx", {}).get("error", err["msg"]))
        elif kind == "extra_forbidden":
            message = "unknown field; allowed fields are listed in policies/policy.schema.json"
        elif kind == "missing":
            message = "required field is missing"
        else:
            message = f"{err['msg']} (got {err['input']!r})"
        out.append((field, message))
    return out


def _loc_text(loc: tuple[int | str, ...]) -> str:
    text = ""
    for part in loc:
        text += f"[{part}]" if isinstance(part, int) else (f".{part}" if text else str(part))
    return text


def policy_from_data(data: Any, file: str) -> Policy:
    """Validate already-parsed YAML as a policy; raise PolicyFileError naming file and fields."""
    if not isinstance(data, Mapping):
        kind = "empty" if data is None else type(data).__name__
        raise PolicyFileError(file, [("", f"a policy file is a YAML mapping, got {kind}")])
    try:
        return Policy.model_validate(dict(data))
    except ValidationError as exc:
        raise PolicyFileError(file, validation_problems(exc)) from None


# ---------------------------------------------------------------------------------------------
# Per-request adjustment


AdjustReason = Literal["not_adjustable", "out_of_range", "invalid"]


class AdjustError(ValueError):
    """A refused adjustment; the HTTP layer answers 422 with ``field`` and ``reason``."""

    def __init__(self, field: str, reason: AdjustReason, message: str):
        super().__init__(message)
        self.field = field
        self.reason = reason

    @property
    def metric_field(self) -> str:
        """``field`` when it is a known parameter, else "other": metric labels stay bounded."""
        return self.field if self.field in SCALAR_METHODS else "other"


def apply_adjust(
    policy: Policy, adjust: Mapping[str, Any], chain: Chain | None = None
) -> tuple[Chain, list[str]]:
    """Apply a request's ``adjust`` mapping; return the new chain and the fields that were clamped.

    ``chain`` defaults to the policy's own; the registry passes the one with its fallback linked
    (``Chain.with_param`` keeps it). Each adjusted parameter changes the FIRST stage of that
    method. Anything not listed under ``adjustable`` is refused, whatever its value.
    """
    current = policy.parsed_chain if chain is None else chain
    clamped: list[str] = []
    for field in sorted(adjust):  # sorted: the same request always reports the same first error
        raw = adjust[field]
        if field not in policy.adjustable:
            allowed = ", ".join(sorted(policy.adjustable)) or "nothing"
            raise AdjustError(
                field,
                "not_adjustable",
                f"{field} is not adjustable in {policy.ref}; adjustable: {allowed}",
            )
        lo, hi = policy.adjustable[field]
        if isinstance(raw, bool) or not isinstance(raw, int | float) or not math.isfinite(raw):
            raise AdjustError(field, "invalid", f"{field} must be a finite number, got {raw!r}")
        value = float(raw)
        if not lo <= value <= hi:
            if policy.on_out_of_range == "reject":
                raise AdjustError(
                    field,
                    "out_of_range",
                    f"{field}={value:g} is outside the allowed range [{lo:g}, {hi:g}]",
                )
            value = min(max(value, lo), hi)
            clamped.append(field)
        index = first_stage(current, field)
        if index is None:  # validation guarantees the stage; keep the check for safety
            raise AdjustError(field, "not_adjustable", f"{policy.ref} has no {field} stage")
        try:
            current = current.with_param(index, _as_param(field, value))
        except (ChainError, ValueError) as exc:
            raise AdjustError(field, "invalid", str(exc)) from None
    return current, clamped


# ---------------------------------------------------------------------------------------------
# JSON Schema


def policy_json_schema() -> dict[str, Any]:
    """The JSON Schema of a policy file, generated from :class:`Policy`."""
    schema = Policy.model_json_schema()
    return {"$schema": SCHEMA_URI, **schema}


def policy_schema_text() -> str:
    """The text of ``policies/policy.schema.json``; ``keepset policy schema`` rewrites it."""
    return json.dumps(policy_json_schema(), indent=2, ensure_ascii=False) + "\n"

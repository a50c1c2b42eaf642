"""Configuration: every ``KEEPSET_*`` environment variable, with the defaults a newcomer needs.

Each setting is also a ``keepset serve`` flag (the CLI passes flags in as overrides). The
defaults run the service on the embedded demo: the repository's ``policies/`` registry, the
demo keys in ``deploy/demo-keys.yaml`` and the bundled model in ``service/model/bundled``.
"""

from __future__ import annotations

from pathlib import Path
from typing import Literal

from pydantic import Field, SecretStr, field_validator
from pydantic_settings import BaseSettings, SettingsConfigDict

_PACKAGE = Path(__file__).resolve().parent
_CHECKOUT = _PACKAGE.parent


def _default(relative: str) -> Path:
    """A path inside the checkout when keepset runs from one, else relative to the cwd."""
    inside = _CHECKOUT / relative
    return inside if inside.exists() else Path(relative)


class Settings(BaseSettings):
    """Service configuration, read from ``KEEPSET_*`` variables."""

    model_config = SettingsConfigDict(env_prefix="KEEPSET_", extra="ignore")

    policies: Path = Field(default_factory=lambda: _default("policies"))
    keys: Path = Field(default_factory=lambda: _default("deploy/demo-keys.yaml"))
    model: Path = Field(default_factory=lambda: _PACKAGE / "model" / "bundled")
    host: str = "127.0.0.1"
    port: int = Field(default=8411, ge=1, le=65535)
    workers: int = Field(default=1, ge=1, le=64)
    max_body_bytes: int = Field(default=32 * 1024 * 1024, ge=1024)
    max_rows: int = Field(default=64, ge=1)
    max_vocab: int = Field(default=262_144, ge=2)
    max_in_flight: int = Field(default=64, ge=1, description="requests in work before 429")
    retry_after_seconds: int = Field(default=1, ge=1)
    reload_poll_seconds: float = Field(default=2.0, ge=0.0, description="0 disables polling")
    model_threads: int = Field(default=1, ge=1, description="onnxruntime intra-op threads")
    sampling_threads: int = Field(default=1, ge=1, description="threads per batch in the sampler")
    sampling_kernel: Literal["compiled", "numpy"] = Field(
        default="compiled",
        description="compiled (numba; numpy when numba is missing) or numpy (the reference path)",
    )
    collapse_window: int = Field(
        default=200, ge=1, description="served rows per policy version the collapse watch keeps"
    )
    collapse_min_steps: int = Field(
        default=50, ge=1, description="rows needed before the collapse watch decides"
    )
    key_expiry_warning_days: float = Field(
        default=14.0, ge=0.0, description="GET /v1/routes flags keys expiring within this many days"
    )
    drain_seconds: float = Field(
        default=5.0, ge=0.0, description="after SIGTERM: readiness 503, in-flight work finishes"
    )
    shutdown_seconds: float = Field(
        default=20.0, ge=0.0, description="after the drain: the most in-flight work may still take"
    )
    stream_flush_ms: float = Field(
        default=10.0,
        ge=0.0,
        le=1000.0,
        description="streamed steps are sent at most this often (the first at once); 0: each step",
    )
    log_level: str = "info"
    shm_dir: Path | None = Field(
        default=None, description="folder of shared-memory segments callers may name; off if unset"
    )
    uds: Path | None = Field(
        default=None, description="Unix domain socket to listen on besides host and port"
    )
    capture_dir: Path | None = Field(
        default=None, description="folder of captured rows for routes with capture; off if unset"
    )

    request_secret: SecretStr | None = Field(
        default=None,
        description="key of the request ids' MAC; keepset serve makes one per start if unset",
    )
    outcomes_db: Path | None = Field(
        default=None, description="SQLite file of outcomes; one per start of keepset serve if unset"
    )
    outcome_max_age_seconds: int = Field(
        default=7 * 24 * 3600, ge=60, description="outcomes are taken this long after a request"
    )

    @field_validator("request_secret", "outcomes_db", mode="before")
    @classmethod
    def _empty_is_unset(cls, value: object) -> object:
        return None if value == "" else value

    @field_validator("shm_dir", "uds", "capture_dir", mode="before")
    @classmethod
    def _empty_is_off(cls, value: object) -> object:
        # A manifest that sets the variable to "" means "off", not the current directory.
        return None if value == "" else value

"""A Python client for keepset, sync and async, on httpx.

    from service.client import Client
    with Client("http://127.0.0.1:8411", key="...") as ks:
        result = ks.pick(logits, seed=7, routing_key="user-42")
        result.tokens, result.rows[0].kept

Logits travel as a raw ``.npy`` body (no JSON encoding of big arrays); the other fields go in
the query string. Errors come back as :class:`KeepsetError` carrying the problem document.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import httpx
import numpy as np
from numpy.typing import NDArray

from service.npy import to_npy

NPY_MEDIA = "application/x-npy"


@dataclass(frozen=True)
class Row:
    token: int
    prob: float
    logprob: float
    entropy: float
    kept: int
    kept_mass: float
    fallback: str | None


@dataclass(frozen=True)
class PickReply:
    request_id: str
    client: str
    policy: str
    version: int
    arm: str
    seed: int
    tokens: list[int]
    rows: list[Row]
    clamped: list[str]

    @classmethod
    def from_json(cls, data: Mapping[str, Any]) -> PickReply:
        return cls(
            request_id=data["request_id"],
            client=data["client"],
            policy=data["policy"],
            version=int(data["version"]),
            arm=str(data["arm"]),
            seed=int(data["seed"]),
            tokens=[int(t) for t in data["tokens"]],
            rows=[Row(**row) for row in data["rows"]],
            clamped=list(data.get("clamped", [])),
        )


class KeepsetError(Exception):
    """An error answer; ``problem`` is the RFC 9457 document keepset sent."""

    def __init__(self, status: int, problem: Mapping[str, Any]):
        super().__init__(f"{status} {problem.get('title', '')}: {problem.get('detail', '')}")
        self.status = status
        self.problem = dict(problem)


def _pick_request(
    logits: NDArray[np.floating],
    seed: int | None,
    routing_key: str | None,
    history: Sequence[Sequence[int]] | None,
    adjust: Mapping[str, float] | None,
) -> tuple[bytes, dict[str, str]]:
    array = np.asarray(logits)
    if array.dtype not in (np.float32, np.float16):
        array = array.astype(np.float32)
    params: dict[str, str] = {}
    if seed is not None:
        params["seed"] = str(seed)
    if routing_key is not None:
        params["routing_key"] = routing_key
    if history is not None:
        params["history"] = ";".join(",".join(str(int(t)) for t in row) for row in history)
    for name, value in (adjust or {}).items():
        params[name] = repr(float(value))
    return to_npy(array), params


def _reply(response: httpx.Response) -> PickReply:
    if response.status_code != 200:
        try:
            problem = response.json()
        except ValueError:
            problem = {"detail": response.text}
        raise KeepsetError(response.status_code, problem)
    return PickReply.from_json(response.json())


class Client:
    """Blocking client. Reuse one instance: it keeps connections open."""

    def __init__(self, base_url: str, key: str, *, timeout: float = 10.0):
        self._http = httpx.Client(
            base_url=base_url, headers={"Authorization": f"Bearer {key}"}, timeout=timeout
        )

    def pick(
        self,
        logits: NDArray[np.floating],
        *,
        seed: int | None = None,
        routing_key: str | None = None,
        history: Sequence[Sequence[int]] | None = None,
        adjust: Mapping[str, float] | None = None,
    ) -> PickReply:
        body, params = _pick_request(logits, seed, routing_key, history, adjust)
        response = self._http.post(
            "/v1/pick", content=body, params=params, headers={"Content-Type": NPY_MEDIA}
        )
        return _reply(response)

    def close(self) -> None:
        self._http.close()

    def __enter__(self) -> Client:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


class AsyncClient:
    """The same calls for asyncio code."""

    def __init__(self, base_url: str, key: str, *, timeout: float = 10.0):
        self._http = httpx.AsyncClient(
            base_url=base_url, headers={"Authorization": f"Bearer {key}"}, timeout=timeout
        )

    async def pick(
        self,
        logits: NDArray[np.floating],
        *,
        seed: int | None = None,
        routing_key: str | None = None,
        history: Sequence[Sequence[int]] | None = None,
        adjust: Mapping[str, float] | None = None,
    ) -> PickReply:
        body, params = _pick_request(logits, seed, routing_key, history, adjust)
        response = await self._http.post(
            "/v1/pick", content=body, params=params, headers={"Content-Type": NPY_MEDIA}
        )
        return _reply(response)

    async def aclose(self) -> None:
        await self._http.aclose()

    async def __aenter__(self) -> AsyncClient:
        return self

    async def __aexit__(self, *exc: object) -> None:
        await self.aclose()

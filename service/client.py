"""A Python client for keepset, sync and async, on httpx (picks over a Unix socket skip it:
see ``unix_posts``).

    from service.client import Client
    with Client("http://127.0.0.1:8411", key="...") as ks:
        result = ks.pick(logits, seed=7, routing_key="user-42")
        result.tokens, result.rows[0].kept
        reply = ks.continue_prompt("Enter the porter,", seed=7)
        for step in ks.stream_prompt("Enter the porter,"):
            print(step.text, end="")
        ks.outcome(result.request_id, value=1.0, label="accepted")

Logits travel as a raw ``.npy`` body (no JSON encoding of big arrays); the other fields go in
the query string. Errors come back as :class:`KeepsetError` carrying the problem document.

On the same host or pod: ``uds="/run/keepset/keepset.sock"`` talks over keepset's Unix socket
(``KEEPSET_UDS``), and ``shm_dir="/dev/shm"`` (the server's ``KEEPSET_SHM_DIR``) writes the
logits into a shared-memory segment the client owns and sends only its name. A caller that can
produce its logits in place asks for ``ks.shared_logits(rows, vocab)``, writes into its
``array`` and passes it to ``pick``: then nothing is copied at all.
``dtype="float16"`` or ``"bfloat16"`` halves what travels, in either mode.
"""

from __future__ import annotations

import contextlib
import functools
import json
import threading
import urllib.parse
from collections.abc import AsyncIterator, Iterator, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any, TypeVar

import httpx
import numpy as np
import orjson
from numpy.typing import NDArray

from service.dtypes import WireDtype, to_wire
from service.npy import to_npy
from service.shm import Segment
from service.unix_posts import AsyncUnixPoster, UnixPoster

NPY_MEDIA = "application/x-npy"
_Frozen = TypeVar("_Frozen")


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
        return cls(**_head(data), rows=_frozen_all(Row, data["rows"]))


@dataclass(frozen=True)
class Step(Row):
    """One generated token of a continuation: a row's diagnostics and its text piece."""

    text: str


@dataclass(frozen=True)
class ContinueReply:
    request_id: str
    client: str
    policy: str
    version: int
    arm: str
    seed: int
    budget: int
    prompt_tokens: int
    text: str
    tokens: list[int]
    finish: str
    steps: list[Step]
    clamped: list[str]

    @classmethod
    def from_json(cls, data: Mapping[str, Any]) -> ContinueReply:
        return cls(
            **_head(data),
            budget=int(data["budget"]),
            prompt_tokens=int(data["prompt_tokens"]),
            text=data["text"],
            finish=data["finish"],
            steps=_frozen_all(Step, data["steps"]),
        )


def _frozen_all(cls: type[_Frozen], items: Sequence[Mapping[str, Any]]) -> list[_Frozen]:
    """``[cls(**item) for item in items]`` for a frozen dataclass, without its ``__init__``,
    which sets every field through ``object.__setattr__``: 2-4 µs a row, a tenth of a
    millisecond for a 32-row answer. An item whose keys are not exactly the fields goes
    through ``__init__``, for its error."""
    fields = cls.__dataclass_fields__.keys()  # type: ignore[attr-defined]
    made = []
    for item in items:
        if item.keys() == fields:
            one = object.__new__(cls)
            one.__dict__.update(item)
        else:
            one = cls(**item)
        made.append(one)
    return made


def _head(data: Mapping[str, Any]) -> dict[str, Any]:
    """The fields every answer of keepset's sampling endpoints carries."""
    return {
        "request_id": data["request_id"],
        "client": data["client"],
        "policy": data["policy"],
        "version": int(data["version"]),
        "arm": str(data["arm"]),
        "seed": int(data["seed"]),
        "tokens": [int(t) for t in data["tokens"]],
        "clamped": list(data.get("clamped", [])),
    }


@dataclass(frozen=True)
class OutcomeReply:
    """What keepset recorded for a reported outcome."""

    request_id: str
    client: str
    policy: str
    version: int
    arm: str
    value: float | None
    label: str | None
    issued: int
    at: float

    @classmethod
    def from_json(cls, data: Mapping[str, Any]) -> OutcomeReply:
        return cls(**{name: data[name] for name in cls.__dataclass_fields__})


def _outcome_body(request_id: str, value: float | None, label: str | None) -> dict[str, Any]:
    body: dict[str, Any] = {"request_id": request_id}
    if value is not None:
        body["value"] = float(value)
    if label is not None:
        body["label"] = label
    return body


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
    dtype: WireDtype | None = None,
) -> tuple[bytes, dict[str, str]]:
    array = np.asarray(logits)
    params: dict[str, str] = {}
    if dtype is not None:
        array = to_wire(array, dtype)
        if dtype == "bfloat16":
            params["dtype"] = dtype
    elif array.dtype not in (np.float32, np.float16):
        array = array.astype(np.float32)
    if seed is not None:
        params["seed"] = str(seed)
    if routing_key is not None:
        params["routing_key"] = routing_key
    if history is not None:
        params["history"] = ";".join(",".join(str(int(t)) for t in row) for row in history)
    for name, value in (adjust or {}).items():
        params[name] = repr(float(value))
    return to_npy(array), params


class SharedLogits:
    """A ``[rows, vocab]`` block of logits in a shared-memory segment of the client's own, for
    callers that can write their logits in place: fill ``array`` (the model's output copied or
    written straight there) and pass this object to ``pick``, which then sends only the
    segment's name. Made by ``Client.shared_logits``; reuse it step after step, one pick at a
    time, and close it (or use ``with``) when done. ``array`` is float32 or float16, or raw
    uint16 bits for bfloat16."""

    def __init__(self, folder: Path, shape: tuple[int, ...], dtype: WireDtype):
        self._segment = Segment(folder)
        try:
            self.array: NDArray[Any] = self._segment.view(shape, dtype)
        except BaseException:
            self._segment.close()
            raise
        self.descriptor = {
            "segment": self._segment.name,
            "offset": 0,
            "shape": list(shape),
            "dtype": dtype,
        }

    def close(self) -> None:
        """Remove the segment; ``array`` must not be used afterwards."""
        self.array = np.empty((0, 0), self.array.dtype)
        self._segment.close()

    def __enter__(self) -> SharedLogits:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def _shm_body(
    segment: Segment | None,
    logits: NDArray[np.floating] | SharedLogits,
    seed: int | None,
    routing_key: str | None,
    history: Sequence[Sequence[int]] | None,
    adjust: Mapping[str, float] | None,
    dtype: WireDtype | None,
) -> dict[str, Any]:
    if isinstance(logits, SharedLogits):
        shm = logits.descriptor
    else:
        assert segment is not None
        shm = segment.write(logits, dtype or "float32")
    body: dict[str, Any] = {"logits_shm": shm}
    for name, value in (("seed", seed), ("routing_key", routing_key)):
        if value is not None:
            body[name] = value
    if history is not None:
        body["history"] = [[int(t) for t in row] for row in history]
    if adjust:
        body["adjust"] = {k: float(v) for k, v in adjust.items()}
    return body


@contextlib.contextmanager
def _pick_post(
    segments: _Segments | None,
    dtype: WireDtype | None,
    logits: NDArray[np.floating] | SharedLogits,
    seed: int | None,
    routing_key: str | None,
    history: Sequence[Sequence[int]] | None,
    adjust: Mapping[str, float] | None,
) -> Iterator[dict[str, Any]]:
    """The arguments of the ``POST /v1/pick`` that sends ``logits``: a shared-memory descriptor
    (its segment stays leased until the block ends, i.e. until the answer is in) or a .npy body."""
    if isinstance(logits, SharedLogits):
        yield {"json": _shm_body(None, logits, seed, routing_key, history, adjust, dtype)}
        return
    if segments is None:
        body, params = _pick_request(logits, seed, routing_key, history, adjust, dtype)
        yield {"content": body, "params": params, "headers": {"Content-Type": NPY_MEDIA}}
        return
    with segments.lease() as segment:
        yield {"json": _shm_body(segment, logits, seed, routing_key, history, adjust, dtype)}


def _plain_post(path: str, post: Mapping[str, Any]) -> tuple[str, bytes, str]:
    """(target, body, content type) of the httpx ``post`` arguments ``_pick_post`` made."""
    if "json" in post:
        return path, orjson.dumps(post["json"]), "application/json"
    query = urllib.parse.urlencode(post["params"])
    return f"{path}?{query}" if query else path, post["content"], NPY_MEDIA


class _Segments:
    """A client's shared-memory segments: one while picks come one after another, one more for
    each pick in flight at the same time. A segment whose request failed on the way is removed,
    not reused: keepset may still be reading it."""

    def __init__(self, folder: Path):
        self._folder = folder
        self._free: list[Segment] = []
        self._lock = threading.Lock()

    @contextlib.contextmanager
    def lease(self) -> Iterator[Segment]:
        with self._lock:
            segment = self._free.pop() if self._free else Segment(self._folder)
        try:
            yield segment
        except BaseException:
            segment.close()
            raise
        with self._lock:
            self._free.append(segment)

    def close(self) -> None:
        with self._lock:
            for segment in self._free:
                segment.close()
            self._free.clear()


def _continue_body(
    prompt: str,
    budget: int | None,
    seed: int | None,
    routing_key: str | None,
    adjust: Mapping[str, float] | None,
    stream: bool,
) -> dict[str, Any]:
    body: dict[str, Any] = {"prompt": prompt, "stream": stream}
    for name, value in (("budget", budget), ("seed", seed), ("routing_key", routing_key)):
        if value is not None:
            body[name] = value
    if adjust:
        body["adjust"] = {k: float(v) for k, v in adjust.items()}
    return body


def _check(response: httpx.Response, expected: int = 200) -> None:
    if response.status_code != expected:
        raise _error(response.status_code, response.content)


def _error(status: int, body: bytes) -> KeepsetError:
    """The error for an answer with ``status``: its problem document, or its text in one."""
    try:
        problem = orjson.loads(body)
    except orjson.JSONDecodeError:
        problem = {"detail": body.decode(errors="replace")}
    return KeepsetError(status, problem)


def _unix_reply(status: int, body: bytes) -> PickReply:
    if status != 200:
        raise _error(status, body)
    return PickReply.from_json(orjson.loads(body))


def _reply(response: httpx.Response) -> PickReply:
    _check(response)
    return PickReply.from_json(response.json())


class _StepEvents:
    """Reads a ``/v1/continue`` event stream line by line: :meth:`feed` returns the
    :class:`Step` of a ``step`` event's data line (None for other lines); :attr:`done` turns
    true at the ``done`` event."""

    def __init__(self) -> None:
        self.event = ""
        self.done = False

    def feed(self, line: str) -> Step | None:
        if line.startswith("event: "):
            self.event = line[len("event: ") :]
        elif line.startswith("data: "):
            if self.event == "step":
                return Step(**json.loads(line[len("data: ") :]))
            self.done = self.event == "done"
        return None


class _Connection:
    """Where keepset is and how logits travel, for both clients. ``uds``: keepset's Unix
    socket (``base_url`` then only names the host); ``shm_dir``: the folder keepset shares as
    ``KEEPSET_SHM_DIR``; ``dtype``: what the logits travel as (float16 and bfloat16 halve the
    bytes; by default float16 arrays stay float16 and the rest go as float32)."""

    def __init__(
        self,
        base_url: str,
        key: str,
        *,
        timeout: float = 10.0,
        uds: str | Path | None = None,
        shm_dir: str | Path | None = None,
        dtype: WireDtype | None = None,
    ):
        self._options: dict[str, Any] = {
            "base_url": base_url,
            "headers": {"Authorization": f"Bearer {key}"},
            "timeout": timeout,
        }
        self._uds = None if uds is None else str(uds)
        self._shm_dir = None if shm_dir is None else Path(shm_dir)
        self._segments = _Segments(self._shm_dir) if self._shm_dir is not None else None
        self._dtype = dtype

    def _unix_options(self) -> tuple[str, str, dict[str, str], float]:
        assert self._uds is not None
        host = httpx.URL(self._options["base_url"]).host or "localhost"
        return self._uds, host, self._options["headers"], self._options["timeout"]

    def shared_logits(self, rows: int, vocab: int, dtype: WireDtype | None = None) -> SharedLogits:
        """A block of ``[rows, vocab]`` logits to write in place and pass to ``pick`` (which
        then copies nothing); needs ``shm_dir``. ``dtype`` defaults to the client's, else
        float32."""
        if self._shm_dir is None:
            raise ValueError("shared_logits needs a client made with shm_dir")
        return SharedLogits(self._shm_dir, (rows, vocab), dtype or self._dtype or "float32")


class Client(_Connection):
    """Blocking client. Reuse one instance: it keeps connections open (and its segment)."""

    @functools.cached_property
    def _http(self) -> httpx.Client:
        transport = None if self._uds is None else httpx.HTTPTransport(uds=self._uds)
        return httpx.Client(**self._options, transport=transport)

    def pick(
        self,
        logits: NDArray[np.floating] | SharedLogits,
        *,
        seed: int | None = None,
        routing_key: str | None = None,
        history: Sequence[Sequence[int]] | None = None,
        adjust: Mapping[str, float] | None = None,
    ) -> PickReply:
        request = (logits, seed, routing_key, history, adjust)
        # The answer is read after the block: an error answer must not discard the segment.
        with _pick_post(self._segments, self._dtype, *request) as post:
            if self._uds is not None:
                answer = self._unix.post(*_plain_post("/v1/pick", post))
            else:
                response = self._http.post("/v1/pick", **post)
        return _unix_reply(*answer) if self._uds is not None else _reply(response)

    @functools.cached_property
    def _unix(self) -> UnixPoster:
        """Picks over the Unix socket skip httpx (see ``unix_posts``); the rest use it."""
        return UnixPoster(*self._unix_options())

    def continue_prompt(
        self,
        prompt: str,
        *,
        budget: int | None = None,
        seed: int | None = None,
        routing_key: str | None = None,
        adjust: Mapping[str, float] | None = None,
    ) -> ContinueReply:
        """Continue ``prompt`` with the bundled model under this client's policy."""
        body = _continue_body(prompt, budget, seed, routing_key, adjust, stream=False)
        response = self._http.post("/v1/continue", json=body)
        _check(response)
        return ContinueReply.from_json(response.json())

    def stream_prompt(
        self,
        prompt: str,
        *,
        budget: int | None = None,
        seed: int | None = None,
        routing_key: str | None = None,
        adjust: Mapping[str, float] | None = None,
    ) -> Iterator[Step]:
        """The steps of a continuation as they are made; leaving the loop early closes the
        connection, which stops the generation on the server."""
        body = _continue_body(prompt, budget, seed, routing_key, adjust, stream=True)
        with self._http.stream("POST", "/v1/continue", json=body) as response:
            if response.status_code != 200:
                response.read()
                _check(response)
            events = _StepEvents()
            for line in response.iter_lines():
                step = events.feed(line)
                if step is not None:
                    yield step
                if events.done:
                    return

    def outcome(
        self, request_id: str, value: float | None = None, label: str | None = None
    ) -> OutcomeReply:
        """Report the outcome of a request this client was served (once per request)."""
        response = self._http.post("/v1/outcome", json=_outcome_body(request_id, value, label))
        _check(response, 201)
        return OutcomeReply.from_json(response.json())

    def close(self) -> None:
        """Close the connections and remove the client's segments."""
        if "_http" in self.__dict__:  # made on first use
            self._http.close()
        if "_unix" in self.__dict__:
            self._unix.close()
        if self._segments is not None:
            self._segments.close()

    def __enter__(self) -> Client:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


class AsyncClient(_Connection):
    """The same calls for asyncio code; picks in flight together each get their own segment."""

    @functools.cached_property
    def _http(self) -> httpx.AsyncClient:
        transport = None if self._uds is None else httpx.AsyncHTTPTransport(uds=self._uds)
        return httpx.AsyncClient(**self._options, transport=transport)

    async def pick(
        self,
        logits: NDArray[np.floating] | SharedLogits,
        *,
        seed: int | None = None,
        routing_key: str | None = None,
        history: Sequence[Sequence[int]] | None = None,
        adjust: Mapping[str, float] | None = None,
    ) -> PickReply:
        request = (logits, seed, routing_key, history, adjust)
        # The answer is read after the block: an error answer must not discard the segment.
        with _pick_post(self._segments, self._dtype, *request) as post:
            if self._uds is not None:
                answer = await self._unix.post(*_plain_post("/v1/pick", post))
            else:
                response = await self._http.post("/v1/pick", **post)
        return _unix_reply(*answer) if self._uds is not None else _reply(response)

    @functools.cached_property
    def _unix(self) -> AsyncUnixPoster:
        """Picks over the Unix socket skip httpx (see ``unix_posts``); the rest use it."""
        return AsyncUnixPoster(*self._unix_options())

    async def continue_prompt(
        self,
        prompt: str,
        *,
        budget: int | None = None,
        seed: int | None = None,
        routing_key: str | None = None,
        adjust: Mapping[str, float] | None = None,
    ) -> ContinueReply:
        body = _continue_body(prompt, budget, seed, routing_key, adjust, stream=False)
        response = await self._http.post("/v1/continue", json=body)
        _check(response)
        return ContinueReply.from_json(response.json())

    async def stream_prompt(
        self,
        prompt: str,
        *,
        budget: int | None = None,
        seed: int | None = None,
        routing_key: str | None = None,
        adjust: Mapping[str, float] | None = None,
    ) -> AsyncIterator[Step]:
        body = _continue_body(prompt, budget, seed, routing_key, adjust, stream=True)
        async with self._http.stream("POST", "/v1/continue", json=body) as response:
            if response.status_code != 200:
                await response.aread()
                _check(response)
            events = _StepEvents()
            async for line in response.aiter_lines():
                step = events.feed(line)
                if step is not None:
                    yield step
                if events.done:
                    return

    async def outcome(
        self, request_id: str, value: float | None = None, label: str | None = None
    ) -> OutcomeReply:
        body = _outcome_body(request_id, value, label)
        response = await self._http.post("/v1/outcome", json=body)
        _check(response, 201)
        return OutcomeReply.from_json(response.json())

    async def aclose(self) -> None:
        """Close the connections and remove the client's segments."""
        if "_http" in self.__dict__:
            await self._http.aclose()
        if "_unix" in self.__dict__:
            await self._unix.aclose()
        if self._segments is not None:
            self._segments.close()

    async def __aenter__(self) -> AsyncClient:
        return self

    async def __aexit__(self, *exc: object) -> None:
        await self.aclose()

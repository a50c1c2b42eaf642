"""POST requests over keepset's Unix socket, written and read by hand: both Python clients'
path for picks, the one call a co-located caller makes every step.

A pick over shared memory sends a few hundred bytes and gets a few kilobytes back, so what the
HTTP machinery costs shows: httpx made an async 32-row step in shared memory take about 6 ms
where it now takes about 4, and ``http.client`` parsed headers into objects after every sync
pick. This module writes one prepared head and reads the answer with :func:`read_answer`, a
generator both posters feed from their sockets (``loadtest/bench_transport.py`` measures the
step). It speaks the part of HTTP/1.1 a keepset answer uses: a status line, headers, and a body
of ``Content-Length`` bytes, chunked, or up to the close. Errors are raised as the httpx
exceptions the rest of the client raises, so callers catch one family.

The sync poster keeps one connection per thread, the async one a pool of idle connections (one
per pick in flight). Before reusing one, a connection the server has closed meanwhile (its
keep-alive timeout, a restart) is noticed and replaced, so a request is never sent on a dead
connection and never needs to be sent twice.
"""

from __future__ import annotations

import asyncio
import contextlib
import select
import socket
import threading
from collections.abc import Generator, Mapping
from dataclasses import dataclass
from typing import Any

# An answer's status line and headers; keepset's are a few hundred bytes.
MAX_HEAD_BYTES = 64 * 1024
_READ_BYTES = 256 * 1024
# Bodies up to this size go out in one write with the head (one system call, one copy).
_JOIN_BELOW = 64 * 1024


class ProtocolError(Exception):
    """The server's answer is not HTTP/1.1 as this module reads it."""


# What a reader yields to ask for more bytes, and is sent back: b"" when the stream has ended.
Reader = Generator[None, bytes, "Answer"]


@dataclass(frozen=True)
class Answer:
    status: int
    body: bytes
    # The server keeps the connection open, and nothing arrived past this answer.
    reusable: bool


def read_answer() -> Reader:
    """Read one answer from bytes sent in as they arrive (no I/O here: the sync and the async
    poster each feed it from their own socket)."""
    buffer = bytearray()

    def more() -> Generator[None, bytes, bool]:
        data = yield
        buffer.extend(data)
        return bool(data)

    def line() -> Generator[None, bytes, bytes]:
        while (end := buffer.find(b"\r\n")) < 0:
            if len(buffer) > MAX_HEAD_BYTES or not (yield from more()):
                raise ProtocolError("the answer ended inside a line")
        found = bytes(buffer[:end])
        del buffer[: end + 2]
        return found

    def exactly(size: int) -> Generator[None, bytes, bytes]:
        while len(buffer) < size:
            if not (yield from more()):
                raise ProtocolError(f"the answer ended {size - len(buffer)} bytes short")
        found = bytes(buffer[:size])
        del buffer[:size]
        return found

    while True:
        while (end := buffer.find(b"\r\n\r\n")) < 0:
            if len(buffer) > MAX_HEAD_BYTES:
                raise ProtocolError(f"the answer's head is over {MAX_HEAD_BYTES} bytes")
            if not (yield from more()):
                raise ProtocolError("the server closed the connection before an answer")
        status, headers = _head(bytes(buffer[:end]))
        del buffer[: end + 4]
        if not 100 <= status < 200:  # interim answers (100 Continue) come before the real one
            break
    keep = headers.get("connection", "").lower() != "close"
    if status in (204, 304):
        return Answer(status, b"", keep and not buffer)
    if "chunked" in headers.get("transfer-encoding", "").lower():
        parts: list[bytes] = []
        while True:
            size_text = (yield from line()).split(b";")[0].strip()
            try:
                size = int(size_text, 16)
            except ValueError:
                raise ProtocolError(f"bad chunk size {size_text[:40]!r}") from None
            if size == 0:
                while (yield from line()):  # trailers, up to the empty line
                    pass
                return Answer(status, b"".join(parts), keep and not buffer)
            parts.append((yield from exactly(size)))
            if (yield from exactly(2)) != b"\r\n":
                raise ProtocolError("a chunk does not end with CRLF")
    length = headers.get("content-length")
    if length is None:  # the body runs to the close
        while (yield from more()):
            pass
        return Answer(status, bytes(buffer), False)
    if not length.isdigit():
        raise ProtocolError(f"bad Content-Length {length[:40]!r}")
    body = yield from exactly(int(length))
    return Answer(status, body, keep and not buffer)


def _head(raw: bytes) -> tuple[int, dict[str, str]]:
    status_line, *lines = raw.decode("latin-1").split("\r\n")
    version, _, rest = status_line.partition(" ")
    code = rest[:3]
    if not version.startswith("HTTP/1.") or not code.isdigit():
        raise ProtocolError(f"not an HTTP/1.1 status line: {status_line[:80]!r}")
    headers: dict[str, str] = {}
    for header in lines:
        name, colon, value = header.partition(":")
        if not colon:
            raise ProtocolError(f"not a header line: {header[:80]!r}")
        headers[name.strip().lower()] = value.strip()
    return int(code), headers


def _request_head(target: str, fixed: bytes, content_type: str, length: int) -> bytes:
    return (
        f"POST {target} HTTP/1.1\r\n".encode("latin-1")
        + fixed
        + f"Content-Type: {content_type}\r\nContent-Length: {length}\r\n\r\n".encode("latin-1")
    )


def _whole_answer(data: bytes) -> Answer | None:
    """``data`` as one whole answer with a ``Content-Length`` body, the shape of every keepset
    answer when the first read brings all of it; None for anything else, which
    :func:`read_answer` then reads. Skipping the generator's steps took a 32-row answer's read
    from 31 to 20 µs on caches emptied beforehand, though only about 3 µs in a real step."""
    end = data.find(b"\r\n\r\n")
    if end < 0:
        return None
    status, headers = _head(data[:end])
    length = headers.get("content-length", "")
    if (
        status < 200
        or status in (204, 304)
        or "transfer-encoding" in headers
        or not length.isdigit()
        or int(length) != len(data) - end - 4
    ):
        return None
    return Answer(status, data[end + 4 :], headers.get("connection", "").lower() != "close")


def _receive(sock: socket.socket) -> Answer:
    first = sock.recv(_READ_BYTES)
    whole = _whole_answer(first)
    if whole is not None:
        return whole
    reader = read_answer()
    next(reader)
    try:
        reader.send(first)
        while True:
            reader.send(sock.recv(_READ_BYTES))
    except StopIteration as done:
        answer: Answer = done.value
        return answer


def _connect(path: str, timeout: float) -> socket.socket:
    sock = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
    sock.settimeout(timeout)
    try:
        sock.connect(path)
    except OSError:
        sock.close()
        raise
    return sock


def _closed_by_peer(sock: Any) -> bool:
    """True when the server has closed (or written unasked to) the kept connection."""
    # poll, not select: select refuses descriptors above 1023, common in a busy server.
    poller = select.poll()
    poller.register(sock, select.POLLIN)
    return bool(poller.poll(0))


def _header_lines(host: str, headers: Mapping[str, str]) -> bytes:
    lines = [f"Host: {host}", *(f"{name}: {value}" for name, value in headers.items())]
    for line in lines:
        if "\r" in line or "\n" in line or "\0" in line:
            # A key with a line break would end the header early and smuggle in others.
            raise ValueError(f"a header holds a line break or NUL: {line.split(':')[0]!r}")
    return "".join(line + "\r\n" for line in lines).encode("latin-1")


class UnixPoster:
    """POSTs to ``path`` (a Unix socket) with ``headers`` on every request; thread-safe."""

    def __init__(self, path: str, host: str, headers: Mapping[str, str], timeout: float):
        self._path, self._timeout = path, timeout
        self._fixed = _header_lines(host, headers)
        self._local = threading.local()
        self._all: list[socket.socket] = []
        self._lock = threading.Lock()

    def post(self, target: str, body: bytes, content_type: str) -> tuple[int, bytes]:
        """(status, body) of ``POST target``; httpx's ConnectError, ReadTimeout or
        RemoteProtocolError when the exchange fails."""
        import httpx  # the client's exception family; imported here to keep this module light

        head = _request_head(target, self._fixed, content_type, len(body))
        sock = None
        try:
            sock = self._connection()
            if len(body) < _JOIN_BELOW:
                sock.sendall(head + body)
            else:
                sock.sendall(head)
                sock.sendall(body)
            answer = _receive(sock)
        except (FileNotFoundError, ConnectionRefusedError) as exc:
            self._drop(sock)
            raise httpx.ConnectError(f"cannot connect to {self._path}: {exc}") from exc
        except TimeoutError as exc:
            self._drop(sock)
            raise httpx.ReadTimeout(f"no answer within {self._timeout} s") from exc
        except (OSError, ProtocolError) as exc:
            self._drop(sock)
            message = f"the exchange with {self._path} failed: {exc}"
            raise httpx.RemoteProtocolError(message) from exc
        except BaseException:
            # Interrupted mid-exchange (Ctrl-C): the answer may still arrive, and must not be
            # read as the next request's.
            self._drop(sock)
            raise
        if not answer.reusable:
            self._drop(sock)
        return answer.status, answer.body

    def close(self) -> None:
        with self._lock:
            for sock in self._all:
                sock.close()
            self._all.clear()

    def _connection(self) -> socket.socket:
        sock: socket.socket | None = getattr(self._local, "sock", None)
        if sock is not None and _closed_by_peer(sock):
            self._drop(sock)
            sock = None
        if sock is None:
            sock = _connect(self._path, self._timeout)
            self._local.sock = sock
            with self._lock:
                self._all.append(sock)
        return sock

    def _drop(self, sock: socket.socket | None) -> None:
        if sock is None:
            return
        sock.close()
        if getattr(self._local, "sock", None) is sock:
            self._local.sock = None
        with self._lock:
            if sock in self._all:
                self._all.remove(sock)


class AsyncUnixPoster:
    """:class:`UnixPoster` for asyncio: idle connections wait in a pool, and each request
    takes one (or opens one) for itself, so requests in flight together never share one."""

    def __init__(self, path: str, host: str, headers: Mapping[str, str], timeout: float):
        self._path, self._timeout = path, timeout
        self._fixed = _header_lines(host, headers)
        self._idle: list[tuple[asyncio.StreamReader, asyncio.StreamWriter]] = []

    async def post(self, target: str, body: bytes, content_type: str) -> tuple[int, bytes]:
        """(status, body) of ``POST target``; httpx's ConnectError, ReadTimeout or
        RemoteProtocolError when the exchange fails."""
        import httpx

        head = _request_head(target, self._fixed, content_type, len(body))
        writer = None
        try:
            async with asyncio.timeout(self._timeout):
                reader, writer = await self._connection()
                if len(body) < _JOIN_BELOW:
                    writer.write(head + body)
                else:
                    writer.writelines((head, body))
                await writer.drain()
                answer = await _areceive(reader)
        except (FileNotFoundError, ConnectionRefusedError) as exc:
            _close(writer)
            raise httpx.ConnectError(f"cannot connect to {self._path}: {exc}") from exc
        except TimeoutError as exc:
            _close(writer)
            raise httpx.ReadTimeout(f"no answer within {self._timeout} s") from exc
        except (OSError, ProtocolError) as exc:
            _close(writer)
            message = f"the exchange with {self._path} failed: {exc}"
            raise httpx.RemoteProtocolError(message) from exc
        except BaseException:
            # Cancelled mid-exchange: the connection never goes back to the pool (its answer
            # may still arrive); close it now rather than when it is collected.
            _close(writer)
            raise
        if answer.reusable:
            self._idle.append((reader, writer))
        else:
            _close(writer)
        return answer.status, answer.body

    async def aclose(self) -> None:
        idle, self._idle = self._idle, []
        for _, writer in idle:
            writer.close()
        for _, writer in idle:
            with contextlib.suppress(OSError):
                await writer.wait_closed()

    async def _connection(self) -> tuple[asyncio.StreamReader, asyncio.StreamWriter]:
        while self._idle:
            reader, writer = self._idle.pop()
            # The server's close (or stray bytes) on an idle connection, whether the loop has
            # read it yet (the reader) or not (the socket itself).
            sock = writer.get_extra_info("socket")
            if (
                reader.at_eof()
                or writer.is_closing()
                or _has_unread(reader)
                or sock is None
                or _closed_by_peer(sock)
            ):
                writer.close()
                continue
            return reader, writer
        return await asyncio.open_unix_connection(self._path, limit=_READ_BYTES)


def _has_unread(reader: asyncio.StreamReader) -> bool:
    # An idle connection must have nothing to read; StreamReader has no public way to ask.
    return bool(getattr(reader, "_buffer", b""))


def _close(writer: asyncio.StreamWriter | None) -> None:
    if writer is not None:
        writer.close()


async def _areceive(reader: asyncio.StreamReader) -> Answer:
    first = await reader.read(_READ_BYTES)
    whole = _whole_answer(first)
    if whole is not None:
        return whole
    answer = read_answer()
    next(answer)
    try:
        answer.send(first)
        while True:
            answer.send(await reader.read(_READ_BYTES))
    except StopIteration as done:
        result: Answer = done.value
        return result

"""POST requests over keepset's Unix socket, written and read by hand: the sync Python client's
path for picks, the one call a co-located caller makes every step.

A pick over shared memory sends a few hundred bytes and gets a few kilobytes back, so what the
HTTP machinery costs shows. httpx took about 0.35 ms a request here, the standard library's
``http.client`` about 0.15 ms (its header objects and checks), and its answers' headers were
parsed after each pick; this module sends one prepared head and reads the answer's with a
split (``loadtest/bench_transport.py`` measures the step). It speaks the part of HTTP/1.1 a
keepset answer uses: a status line, headers, and a body of ``Content-Length`` bytes, chunked,
or up to the close. Errors are raised as the httpx exceptions the rest of the client raises,
so callers catch one family.

Each thread keeps one connection alive. Before reusing it, a connection the server has closed
meanwhile (its keep-alive timeout, a restart) is noticed and replaced, so a request is never
sent on a dead connection and never needs to be sent twice.
"""

from __future__ import annotations

import select
import socket
import threading
from collections.abc import Mapping

# An answer's status line and headers; keepset's are a few hundred bytes.
MAX_HEAD_BYTES = 64 * 1024
_READ_BYTES = 256 * 1024
# Bodies up to this size go out in one write with the head (one system call, one copy).
_JOIN_BELOW = 64 * 1024


class ProtocolError(Exception):
    """The server's answer is not HTTP/1.1 as this module reads it."""


class _Answer:
    """Reads one answer from a connected socket, keeping what arrives past it."""

    def __init__(self, sock: socket.socket):
        self._sock = sock
        self._buffer = bytearray()

    def read(self) -> tuple[int, bytes, bool]:
        """(status, body, whether the server keeps the connection open)."""
        while True:
            status, headers = self._head()
            if not 100 <= status < 200:  # interim answers (100 Continue) come before the real one
                break
        keep = headers.get("connection", "").lower() != "close"
        if status in (204, 304):
            return status, b"", keep
        if "chunked" in headers.get("transfer-encoding", "").lower():
            return status, self._chunked(), keep
        length = headers.get("content-length")
        if length is None:
            return status, self._to_close(), False
        if not length.isdigit():
            raise ProtocolError(f"bad Content-Length {length[:40]!r}")
        return status, self._exactly(int(length)), keep

    def leftover(self) -> bool:
        return bool(self._buffer)

    def _fill(self) -> bool:
        """Receive more; False at the end of the stream."""
        data = self._sock.recv(_READ_BYTES)
        if not data:
            return False
        self._buffer += data
        return True

    def _line(self, limit: int) -> bytes:
        while (end := self._buffer.find(b"\r\n")) < 0:
            if len(self._buffer) > limit or not self._fill():
                raise ProtocolError("the answer ended inside a line")
        line = bytes(self._buffer[:end])
        del self._buffer[: end + 2]
        return line

    def _head(self) -> tuple[int, dict[str, str]]:
        while (end := self._buffer.find(b"\r\n\r\n")) < 0:
            if len(self._buffer) > MAX_HEAD_BYTES:
                raise ProtocolError(f"the answer's head is over {MAX_HEAD_BYTES} bytes")
            if not self._fill():
                raise ProtocolError("the server closed the connection before an answer")
        head = bytes(self._buffer[:end]).decode("latin-1")
        del self._buffer[: end + 4]
        status_line, *lines = head.split("\r\n")
        version, _, rest = status_line.partition(" ")
        code = rest[:3]
        if not version.startswith("HTTP/1.") or not code.isdigit():
            raise ProtocolError(f"not an HTTP/1.1 status line: {status_line[:80]!r}")
        headers: dict[str, str] = {}
        for line in lines:
            name, colon, value = line.partition(":")
            if not colon:
                raise ProtocolError(f"not a header line: {line[:80]!r}")
            headers[name.strip().lower()] = value.strip()
        return int(code), headers

    def _exactly(self, size: int) -> bytes:
        while len(self._buffer) < size:
            if not self._fill():
                raise ProtocolError(f"the answer ended {size - len(self._buffer)} bytes short")
        body = bytes(self._buffer[:size])
        del self._buffer[:size]
        return body

    def _chunked(self) -> bytes:
        parts: list[bytes] = []
        while True:
            size_text = self._line(MAX_HEAD_BYTES).split(b";")[0].strip()
            try:
                size = int(size_text, 16)
            except ValueError:
                raise ProtocolError(f"bad chunk size {size_text[:40]!r}") from None
            if size == 0:
                while self._line(MAX_HEAD_BYTES):  # trailers, up to the empty line
                    pass
                return b"".join(parts)
            parts.append(self._exactly(size))
            if self._exactly(2) != b"\r\n":
                raise ProtocolError("a chunk does not end with CRLF")

    def _to_close(self) -> bytes:
        while self._fill():
            pass
        body = bytes(self._buffer)
        self._buffer.clear()
        return body


def _connect(path: str, timeout: float) -> socket.socket:
    sock = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
    sock.settimeout(timeout)
    try:
        sock.connect(path)
    except OSError:
        sock.close()
        raise
    return sock


def _closed_by_peer(sock: socket.socket) -> bool:
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

        head = (
            f"POST {target} HTTP/1.1\r\n".encode("latin-1")
            + self._fixed
            + f"Content-Type: {content_type}\r\nContent-Length: {len(body)}\r\n\r\n".encode(
                "latin-1"
            )
        )
        sock = None
        try:
            sock = self._connection()
            if len(body) < _JOIN_BELOW:
                sock.sendall(head + body)
            else:
                sock.sendall(head)
                sock.sendall(body)
            answer = _Answer(sock)
            status, data, keep = answer.read()
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
        if not keep or answer.leftover():
            self._drop(sock)
        return status, data

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

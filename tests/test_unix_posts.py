"""The clients' hand-written HTTP/1.1 exchange over a Unix socket, sync and asyncio, against a
scripted server on a real socket: the request bytes it writes, each form of answer body
HTTP/1.1 allows (RFC 9112 section 6: Content-Length, chunked, up to the close), interim
answers, connection reuse and replacement, and every broken answer as httpx's
RemoteProtocolError, never a hang or a wrong body. Answers arrive split at arbitrary points
(hypothesis), as a stream socket may deliver them."""

from __future__ import annotations

import asyncio
import contextlib
import itertools
import shutil
import signal
import socket
import tempfile
import threading
import time
from collections.abc import Iterator
from pathlib import Path

import httpx
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from service.unix_posts import (
    Answer,
    AsyncUnixPoster,
    ProtocolError,
    UnixPoster,
    _whole_answer,
    read_answer,
)


class Scripted:
    """A Unix socket server that answers each request with the next scripted answer, written
    in the given pieces, and closes the connection after it when told to."""

    def __init__(self, path: Path):
        self.path = path
        self.script: list[tuple[list[bytes | float], bool]] = []
        self.requests: list[bytes] = []
        self.connections = 0
        self._open: list[socket.socket] = []
        self._listener = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
        self._listener.bind(str(path))
        self._listener.listen(8)
        self._listener.settimeout(10)
        self._thread = threading.Thread(target=self._serve, daemon=True)
        self._thread.start()

    def answer(self, pieces: list[bytes | float] | bytes, close: bool = False) -> None:
        """Queue the answer to the next request: bytes to write, or seconds to wait first."""
        self.script.append(([pieces] if isinstance(pieces, bytes) else pieces, close))

    def _serve(self) -> None:
        while True:
            try:
                conn, _ = self._listener.accept()
            except OSError:
                return
            self.connections += 1
            self._open.append(conn)
            with conn, contextlib.suppress(OSError):
                conn.settimeout(10)
                while self._one(conn):
                    pass

    def _one(self, conn: socket.socket) -> bool:
        data = b""
        while b"\r\n\r\n" not in data:
            more = conn.recv(65536)
            if not more:
                return False
            data += more
        head, _, body = data.partition(b"\r\n\r\n")
        length = next(
            int(line.split(b":")[1])
            for line in head.split(b"\r\n")
            if line.lower().startswith(b"content-length:")
        )
        while len(body) < length:
            body += conn.recv(65536)
        self.requests.append(head + b"\r\n\r\n" + body)
        pieces, close = self.script.pop(0)
        for piece in pieces:
            if isinstance(piece, float):
                time.sleep(piece)
            else:
                conn.sendall(piece)
        return not close

    def close(self) -> None:
        # shutdown, not just close: it wakes the thread blocked in accept() or recv().
        for conn in [*self._open, self._listener]:
            with contextlib.suppress(OSError):
                conn.shutdown(socket.SHUT_RDWR)
        self._listener.close()
        self._thread.join(timeout=10)
        assert not self._thread.is_alive()


@pytest.fixture
def server() -> Iterator[Scripted]:
    folder = Path(tempfile.mkdtemp(prefix="ks-posts-", dir="/tmp"))
    scripted = Scripted(folder / "s.sock")
    yield scripted
    scripted.close()
    shutil.rmtree(folder)


Call = tuple[str, bytes, str]
Result = tuple[int, bytes] | Exception
PLAIN: Call = ("/x", b"", "text/plain")
KINDS = pytest.mark.parametrize("kind", ["sync", "async"])


def run_posts(kind: str, server: Scripted, calls: list[Call], timeout: float = 5.0) -> list[Result]:
    """``calls`` one after another through one poster of ``kind`` (the async one in one event
    loop, as a client's connections live in theirs); each answer or exception, in order."""
    headers = {"Authorization": "Bearer k-1"}
    out: list[Result] = []
    if kind == "sync":
        posts = UnixPoster(str(server.path), "keepset", headers, timeout)
        for call in calls:
            try:
                out.append(posts.post(*call))
            except Exception as exc:
                out.append(exc)
        posts.close()
        return out

    async def in_one_loop() -> list[Result]:
        posts = AsyncUnixPoster(str(server.path), "keepset", headers, timeout)
        for call in calls:
            try:
                out.append(await posts.post(*call))
            except Exception as exc:
                out.append(exc)
        await posts.aclose()
        return out

    return asyncio.run(in_one_loop())


OK = b'HTTP/1.1 200 OK\r\ncontent-length: 7\r\ncontent-type: application/json\r\n\r\n{"a":1}'
ANSWERED = (200, b'{"a":1}')


@KINDS
def test_request_bytes_and_a_kept_connection(kind: str, server: Scripted) -> None:
    server.answer(OK)
    server.answer(OK)
    calls = [("/v1/pick", b"{}", "application/json"), ("/v1/pick", b"[1]", "application/json")]
    assert run_posts(kind, server, calls) == [ANSWERED, ANSWERED]
    assert server.connections == 1
    assert server.requests[0] == (
        b"POST /v1/pick HTTP/1.1\r\nHost: keepset\r\nAuthorization: Bearer k-1\r\n"
        b"Content-Type: application/json\r\nContent-Length: 2\r\n\r\n{}"
    )


@KINDS
def test_a_large_body_arrives_whole(kind: str, server: Scripted) -> None:
    body = bytes(range(256)) * 4096  # 1 MiB: written after the head, not joined to it
    server.answer(OK)
    assert run_posts(kind, server, [("/v1/pick", body, "application/x-npy")]) == [ANSWERED]
    assert server.requests[0].endswith(b"\r\n\r\n" + body)


@KINDS
def test_chunked_interim_and_until_close_bodies(kind: str, server: Scripted) -> None:
    chunked = (
        b"HTTP/1.1 200 OK\r\nTransfer-Encoding: chunked\r\n\r\n"
        b"4;ext=1\r\nkeep\r\n4\r\nset \r\nE\r\nrows\r\n\r\nwhole.\r\n0\r\nX-Tail: 1\r\n\r\n"
    )
    server.answer(chunked)
    server.answer(b"HTTP/1.1 100 Continue\r\n\r\n" + OK)
    server.answer(b"HTTP/1.1 200 OK\r\nconnection: close\r\n\r\nto the end", close=True)
    server.answer(b"HTTP/1.1 204 No Content\r\n\r\n")
    # Sizes worked by hand: 4 + 4 + 0xE (14: "rows", CRLF CRLF, "whole."), a chunk extension
    # and a trailer, both to be skipped.
    assert run_posts(kind, server, [PLAIN] * 4) == [
        (200, b"keepset rows\r\n\r\nwhole."),
        ANSWERED,
        (200, b"to the end"),
        (204, b""),
    ]
    assert server.connections == 2  # the body that ran to the close needed a new connection


@KINDS
def test_connection_close_header_and_a_closed_kept_connection(kind: str, server: Scripted) -> None:
    said = b"HTTP/1.1 200 OK\r\nContent-Length: 2\r\nConnection: close\r\n\r\nhi"
    server.answer(said, close=True)
    server.answer(OK, close=True)  # closed by the server after answering, without saying so
    server.answer(OK)
    # The server closed the kept connection: noticed before sending, so the request is sent once.
    assert run_posts(kind, server, [PLAIN] * 3) == [(200, b"hi"), ANSWERED, ANSWERED]
    assert (server.connections, len(server.requests)) == (3, 3)


@KINDS
@pytest.mark.parametrize(
    "answer, words",
    [
        (b"SMTP 220 hello\r\n\r\n", "status line"),
        (b"HTTP/1.1 2x0 OK\r\n\r\n", "status line"),
        (b"HTTP/1.1 200 OK\r\nno colon here\r\n\r\n", "header line"),
        (b"HTTP/1.1 200 OK\r\nContent-Length: -3\r\n\r\n", "Content-Length"),
        (b"HTTP/1.1 200 OK\r\nContent-Length: 10\r\n\r\nshort", "bytes short"),
        (b"HTTP/1.1 200 OK\r\nTransfer-Encoding: chunked\r\n\r\nzz\r\n", "chunk size"),
        (b"HTTP/1.1 200 OK\r\nTransfer-Encoding: chunked\r\n\r\n2\r\nabXY", "CRLF"),
        (b"HTTP/1.1 200 OK\r\nContent-Le", "before an answer"),
        (b"HTTP/1.1 200 OK\r\nX-Big: " + b"a" * 70_000, "over 65536"),
    ],
)
def test_broken_answers_are_protocol_errors(
    kind: str, server: Scripted, answer: bytes, words: str
) -> None:
    server.answer(answer, close=True)
    server.answer(OK)
    broken, fresh = run_posts(kind, server, [PLAIN, PLAIN])
    assert isinstance(broken, httpx.RemoteProtocolError) and words in str(broken), broken
    assert fresh == ANSWERED  # on a fresh connection


@KINDS
def test_no_answer_is_a_read_timeout_and_no_server_a_connect_error(
    kind: str, server: Scripted
) -> None:
    server.answer(b"HTTP/1.1 200 OK\r\n")  # the head never ends
    [late] = run_posts(kind, server, [PLAIN], timeout=0.3)
    assert isinstance(late, httpx.ReadTimeout), late
    server.path.unlink()  # nobody listens at the path any more
    [gone] = run_posts(kind, server, [PLAIN])
    assert isinstance(gone, httpx.ConnectError), gone


class Interrupted(BaseException):
    """What Ctrl-C is to a caller: not an Exception, raised in the middle of anything."""


def test_an_interrupted_exchange_never_answers_the_next_request(server: Scripted) -> None:
    """An answer still on its way when the caller was interrupted arrives on a connection the
    poster has dropped: the next request gets its own answer, not that one."""
    late = b"HTTP/1.1 200 OK\r\ncontent-length: 4\r\n\r\nlate"
    server.answer([0.5, late])
    server.answer(OK)
    server.answer([0.5, late])
    server.answer(OK)

    def interrupt(signum: int, frame: object) -> None:
        raise Interrupted

    posts = UnixPoster(str(server.path), "keepset", {}, 5.0)
    previous = signal.signal(signal.SIGALRM, interrupt)
    try:
        signal.setitimer(signal.ITIMER_REAL, 0.1)
        with pytest.raises(Interrupted):
            posts.post(*PLAIN)
    finally:
        signal.setitimer(signal.ITIMER_REAL, 0)
        signal.signal(signal.SIGALRM, previous)
    assert posts.post(*PLAIN) == ANSWERED
    posts.close()

    async def cancelled_then_next() -> Result:
        posts = AsyncUnixPoster(str(server.path), "keepset", {}, 5.0)
        with pytest.raises(TimeoutError):
            await asyncio.wait_for(posts.post(*PLAIN), 0.1)
        answered = await posts.post(*PLAIN)
        await posts.aclose()
        return answered

    assert asyncio.run(cancelled_then_next()) == ANSWERED


@pytest.mark.parametrize("poster", [UnixPoster, AsyncUnixPoster])
def test_a_key_with_a_line_break_is_refused(poster: type) -> None:
    with pytest.raises(ValueError, match="line break"):
        poster("/nowhere", "keepset", {"Authorization": "Bearer a\r\nX-Admin: 1"}, 1.0)


@settings(max_examples=40, deadline=None)
@given(
    cuts=st.lists(st.integers(min_value=1, max_value=300), max_size=12),
    chunked=st.booleans(),
    kind=st.sampled_from(["sync", "async"]),
)
def test_answers_split_anywhere_read_the_same(cuts: list[int], chunked: bool, kind: str) -> None:
    body = b'{"rows": [' + b'{"token": 7, "kept": 50}, ' * 20 + b"{}]}"
    if chunked:
        answer = b"HTTP/1.1 200 OK\r\ntransfer-encoding: chunked\r\n\r\n"
        answer += b"".join(b"%x\r\n%s\r\n" % (len(p), p) for p in (body[:100], body[100:]))
        answer += b"0\r\n\r\n"
    else:
        answer = b"HTTP/1.1 200 OK\r\ncontent-length: %d\r\n\r\n%s" % (len(body), body)
    pieces, at = [], 0
    for cut in cuts:
        pieces.append(answer[at : at + cut])
        at += cut
    pieces.append(answer[at:])
    folder = Path(tempfile.mkdtemp(prefix="ks-posts-", dir="/tmp"))
    scripted = Scripted(folder / "s.sock")
    try:
        scripted.answer([p for p in pieces if p])
        assert run_posts(kind, scripted, [PLAIN]) == [(200, body)]
    finally:
        scripted.close()
        shutil.rmtree(folder)


def _read_whole_stream(data: bytes) -> Answer | str:
    """What the generator makes of ``data`` followed by the end of the stream."""
    reader = read_answer()
    next(reader)
    try:
        reader.send(data)
        reader.send(b"")
    except StopIteration as done:
        answer: Answer = done.value
        return answer
    except ProtocolError as exc:
        return f"error: {exc}"
    return "wants more"


def test_a_whole_answer_in_one_read_is_read_as_the_generator_reads_it() -> None:
    """The shortcut for an answer that arrives whole (``_whole_answer``) either declines or
    gives exactly what ``read_answer`` gives for the same bytes: every status, set of up to
    three framing headers, body and bytes after the answer below."""
    statuses = [b"200 OK", b"404 Not Found", b"204 No Content", b"100 Continue"]
    header_lines = [
        b"content-type: application/json",
        b"Connection: close",
        b"connection: keep-alive",
        b"Transfer-Encoding: chunked",
        b"Content-Length: 7",
        b"content-length: 8",
        b"content-length: x",
    ]
    bodies = [b"", b'{"a":1}', b'{"a":12}', b"0\r\n\r\n"]
    taken = 0
    for count in range(4):
        for headers in itertools.combinations(header_lines, count):
            for status, body, then in itertools.product(statuses, bodies, [b"", OK]):
                data = b"HTTP/1.1 " + status + b"\r\n" + b"".join(h + b"\r\n" for h in headers)
                data += b"\r\n" + body + then
                whole = _whole_answer(data)
                if whole is not None:
                    taken += 1
                    assert whole == _read_whole_stream(data), data
    assert taken > 0


def test_the_shortcut_takes_a_plain_answer() -> None:
    """It is a shortcut only if it takes the usual answer: a status, headers, a
    Content-Length body and nothing after it."""
    assert _whole_answer(OK) == Answer(200, b'{"a":1}', True)
    closing = OK.replace(b"\r\n\r\n", b"\r\nConnection: close\r\n\r\n")
    assert _whole_answer(closing) == Answer(200, b'{"a":1}', False)
    assert _whole_answer(OK[:-1]) is None  # a body still on its way
    assert _whole_answer(OK + OK) is None  # something after it

"""POST requests over keepset's Unix socket with the standard library's ``http.client``: the
sync Python client's path for picks, the one call a co-located caller makes every step.

httpx's request machinery costs about 0.35 ms a request here where ``http.client`` costs about
0.1 ms (``loadtest/bench_transport.py`` measures the step), a fifth of a 32-row pick. Errors are
raised as the httpx exceptions the rest of the client raises, so callers catch one family.

Each thread keeps one connection alive. Before reusing it, a connection the server has closed
meanwhile (its keep-alive timeout, a restart) is noticed and replaced, so a request is never
sent on a dead connection and never needs to be sent twice.
"""

from __future__ import annotations

import http.client
import select
import socket
import threading
from collections.abc import Mapping


class _UnixConnection(http.client.HTTPConnection):
    def __init__(self, path: str, host: str, timeout: float):
        super().__init__(host, timeout=timeout)
        self._path = path

    def connect(self) -> None:
        sock = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
        sock.settimeout(self.timeout)
        try:
            sock.connect(self._path)
        except OSError:
            sock.close()
            raise
        self.sock = sock

    def closed_by_peer(self) -> bool:
        """True when the server has closed (or written unasked to) the kept connection."""
        if self.sock is None:
            return False
        # poll, not select: select refuses descriptors above 1023, common in a busy server.
        poller = select.poll()
        poller.register(self.sock, select.POLLIN)
        return bool(poller.poll(0))


class UnixPoster:
    """POSTs to ``path`` (a Unix socket) with ``headers`` on every request; thread-safe."""

    def __init__(self, path: str, host: str, headers: Mapping[str, str], timeout: float):
        self._path, self._host, self._timeout = path, host, timeout
        self._headers = dict(headers)
        self._local = threading.local()
        self._all: list[_UnixConnection] = []
        self._lock = threading.Lock()

    def post(self, target: str, body: bytes, content_type: str) -> tuple[int, bytes]:
        """(status, body) of ``POST target``; httpx's ConnectError, ReadTimeout or
        RemoteProtocolError when the exchange fails."""
        import httpx  # the client's exception family; imported here to keep this module light

        conn = self._connection()
        headers = {**self._headers, "Content-Type": content_type}
        try:
            conn.request("POST", target, body=body, headers=headers)
            response = conn.getresponse()
            return response.status, response.read()
        except (FileNotFoundError, ConnectionRefusedError) as exc:
            self._drop(conn)
            raise httpx.ConnectError(f"cannot connect to {self._path}: {exc}") from exc
        except TimeoutError as exc:
            self._drop(conn)
            raise httpx.ReadTimeout(f"no answer within {self._timeout} s") from exc
        except (OSError, http.client.HTTPException) as exc:
            self._drop(conn)
            message = f"the exchange with {self._path} failed: {exc}"
            raise httpx.RemoteProtocolError(message) from exc

    def close(self) -> None:
        with self._lock:
            for conn in self._all:
                conn.close()
            self._all.clear()

    def _connection(self) -> _UnixConnection:
        conn: _UnixConnection | None = getattr(self._local, "conn", None)
        if conn is not None and conn.closed_by_peer():
            self._drop(conn)
            conn = None
        if conn is None:
            conn = _UnixConnection(self._path, self._host, self._timeout)
            self._local.conn = conn
            with self._lock:
                self._all.append(conn)
        return conn

    def _drop(self, conn: _UnixConnection) -> None:
        conn.close()
        self._local.conn = None
        with self._lock:
            if conn in self._all:
                self._all.remove(conn)

"""The sockets ``keepset serve`` listens on: TCP host and port (probes, /metrics scraping) and,
with ``KEEPSET_UDS``, a Unix domain socket beside it for callers on the same host or pod. Both
are bound before uvicorn starts its workers, which then accept on both.
"""

from __future__ import annotations

import contextlib
import logging
import os
import signal
import socket
import stat
from pathlib import Path
from types import FrameType

import uvicorn
from uvicorn.supervisors import Multiprocess

log = logging.getLogger("keepset")

# Owner and group may connect: keepset and its callers share a group (a pod's fsGroup), and
# nobody else on the host can send it requests.
SOCKET_MODE = 0o660


def bind_unix(path: Path) -> socket.socket:
    """A listening-ready Unix socket at ``path`` with mode 0660, after removing a stale socket
    file a previous run left; refuses to replace anything else or a socket still in use."""
    _remove_stale(path)
    sock = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
    # The umask covers the moment between bind and chmod, when the socket would otherwise
    # exist with the process's default mode.
    old = os.umask(0o777 & ~SOCKET_MODE)
    try:
        sock.bind(str(path))
    except OSError:
        sock.close()
        raise
    finally:
        os.umask(old)
    os.chmod(path, SOCKET_MODE)
    return sock


def _remove_stale(path: Path) -> None:
    try:
        info = os.lstat(path)
    except FileNotFoundError:
        return
    if not stat.S_ISSOCK(info.st_mode):
        raise ValueError(f"KEEPSET_UDS={path} exists and is not a socket; not replacing it")
    with socket.socket(socket.AF_UNIX, socket.SOCK_STREAM) as probe:
        try:
            probe.connect(str(path))
        except (ConnectionRefusedError, FileNotFoundError):
            path.unlink(missing_ok=True)  # nobody listens: left by a run that did not clean up
            return
    raise ValueError(f"KEEPSET_UDS={path}: another server is listening on it")


def run(config: uvicorn.Config, uds: Path | None) -> int:
    """Serve ``config`` on its host and port and, if given, on ``uds``, with
    ``config.workers`` processes; returns the exit status."""
    sockets = [config.bind_socket()]
    if uds is not None:
        sockets.append(bind_unix(uds))
        log.warning("keepset also listening on unix socket %s (mode %o)", uds, SOCKET_MODE)
    bound = os.stat(uds).st_ino if uds is not None else None
    server = uvicorn.Server(config)
    # uvicorn shuts down gracefully on SIGTERM, then raises it again under the handler that was
    # there before; with the default one the process would die before removing its socket file.
    signal.signal(signal.SIGTERM, _leave)
    try:
        if config.workers > 1:
            Multiprocess(config, sockets=sockets).run()
        else:
            server.run(sockets=sockets)
    except KeyboardInterrupt:
        pass
    finally:
        for sock in sockets:
            sock.close()
        # Only the socket this run made: a later run may already have bound a new one.
        if uds is not None:
            with contextlib.suppress(OSError):
                if os.stat(uds).st_ino == bound:
                    uds.unlink()
    if config.workers == 1 and not server.started:
        return 3  # uvicorn's start-up failure status
    return 0


def _leave(signum: int, frame: FrameType | None) -> None:
    raise SystemExit(0)

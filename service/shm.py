"""Logits in shared memory: the ``logits_shm`` descriptor of ``/v1/pick``, reading a caller's
segment read-only from ``KEEPSET_SHM_DIR`` with the checks that keep every read inside it, and
the reusable segment a sender (the Python client) writes into.

A segment is a plain file in that folder (a memory-backed one: /dev/shm, a memory emptyDir).
The caller writes a little-endian ``[V]`` or ``[B, V]`` block at ``offset`` and names it;
keepset views float32 in place and converts float16/bfloat16.

A worker keeps the mappings of the segments it read last open (``SegmentMaps``): a caller
reuses its segment step after step, and mapping 16 MB anew costs more than deciding the rows
in it. Every request still opens the name and checks the file (same file, regular, long
enough); a file replaced, grown or removed is mapped again or let go.

One race cannot be guarded here: a caller that shrinks a segment while a request naming it is
in flight. The size is checked when the request arrives; a page cut away later makes the
kernel raise SIGBUS in the worker that reads it. Callers must only grow segments in use.
"""

from __future__ import annotations

import contextlib
import errno
import math
import mmap
import os
import re
import secrets
import stat
import threading
from collections import OrderedDict
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray
from pydantic import BaseModel, ConfigDict, Field, StrictInt

from service.dtypes import STORAGE, WireDtype, to_float32, to_wire
from service.problems import Problem

# A plain file name: no separator, no NUL, not "." or ".." (nor any hidden name), at most
# NAME_MAX bytes. The character set is narrow on purpose: every name it allows means the same
# file to every caller and to keepset, whatever their locale.
_SEGMENT_NAME = re.compile(r"[A-Za-z0-9_-][A-Za-z0-9._-]{0,254}")
_EMPTY: NDArray[np.float32] = np.empty((0, 0), np.float32)


class ShmRef(BaseModel):
    """Where a request's logits are: ``logits_shm`` of a ``/v1/pick`` JSON body."""

    model_config = ConfigDict(extra="forbid")

    segment: str = Field(description="file name inside KEEPSET_SHM_DIR")
    offset: StrictInt = Field(default=0, ge=0, description="bytes from the start of the file")
    shape: list[StrictInt] = Field(min_length=1, max_length=2, description="[V] or [B, V]")
    dtype: WireDtype = "float32"


class MappedLogits:
    """float32 logits read from a segment. float32 is a read-only view of the caller's segment
    (``shared``); float16/bfloat16 are converted copies. ``mapping`` is the mapping to close
    with the request, when no ``SegmentMaps`` keeps it."""

    def __init__(self, logits: NDArray[np.float32], shared: bool, mapping: mmap.mmap | None):
        self.logits = logits
        self._shared = shared
        self._mapping = mapping

    @property
    def shared(self) -> bool:
        """True while ``logits`` is a view of the caller's segment (which it may rewrite)."""
        return self._shared

    def close(self) -> None:
        self.logits = _EMPTY
        self._shared = False
        if self._mapping is not None:
            _close(self._mapping)
            self._mapping = None


def _close(mapping: mmap.mmap) -> None:
    # A view still living (an error's traceback holds it) makes Python refuse to unmap under
    # it; the mapping then goes when the last view is freed.
    with contextlib.suppress(BufferError):
        mapping.close()


@dataclass
class _Kept:
    """One open mapping of a whole segment file, and which file it was."""

    device: int
    inode: int
    size: int
    mapping: mmap.mmap

    def maps(self, info: os.stat_result) -> bool:
        """True when ``info`` describes the file this mapping holds, at the size it mapped."""
        return (info.st_dev, info.st_ino, info.st_size) == (self.device, self.inode, self.size)


class SegmentMaps:
    """The mappings of the segments a worker read last, kept open between requests (at most
    ``limit``, the least recently used let go first). A mapping keeps its file's memory alive
    after the caller removes it, so a name seen removed or replaced lets its mapping go, and
    every new mapping first drops those of the others whose file is gone."""

    def __init__(self, folder: Path, limit: int = 16):
        self._folder = folder
        self._limit = limit
        self._kept: OrderedDict[str, _Kept] = OrderedDict()
        self._lock = threading.Lock()

    def __len__(self) -> int:
        return len(self._kept)

    def mapping(self, fd: int, info: os.stat_result, name: str) -> mmap.mmap:
        """The open mapping of the whole file ``fd`` (just checked, named ``name``)."""
        with self._lock:
            kept = self._kept.get(name)
            if kept is not None and kept.maps(info):
                self._kept.move_to_end(name)
                return kept.mapping
            self._drop_gone()
            mapping = mmap.mmap(fd, info.st_size, flags=_MAP_FLAGS, prot=mmap.PROT_READ)
            self._forget(name)
            self._kept[name] = _Kept(info.st_dev, info.st_ino, info.st_size, mapping)
            while len(self._kept) > self._limit:
                _close(self._kept.popitem(last=False)[1].mapping)
            return mapping

    def still_mapped(self, path: str, name: str) -> tuple[mmap.mmap, int] | None:
        """The kept mapping of ``name`` and its size, when ``path`` is still the regular file
        it maps (same device, inode and size): one ``lstat`` where opening costs an open, an
        ``fstat`` and a close, three system calls into caches a pick has just emptied. None
        sends the caller down the opening path, which answers every other case. A file whose
        mode changed after it was mapped is still read through the mapping, as through an
        open descriptor."""
        with self._lock:
            kept = self._kept.get(name)
            if kept is None:
                return None
            try:
                info = os.lstat(path)
            except OSError:
                return None
            if not stat.S_ISREG(info.st_mode) or not kept.maps(info):
                return None
            self._kept.move_to_end(name)
            return kept.mapping, kept.size

    def forget(self, name: str) -> None:
        """Let the mapping of ``name`` go (its file is gone or no longer what was mapped)."""
        with self._lock:
            self._forget(name)

    def close(self) -> None:
        with self._lock:
            while self._kept:
                _close(self._kept.popitem()[1].mapping)

    def _forget(self, name: str) -> None:
        kept = self._kept.pop(name, None)
        if kept is not None:
            _close(kept.mapping)

    def _drop_gone(self) -> None:
        for name, kept in list(self._kept.items()):
            try:
                info = os.stat(self._folder / name, follow_symlinks=False)
            except OSError:
                info = None
            if info is None or (info.st_dev, info.st_ino) != (kept.device, kept.inode):
                self._forget(name)


def segment_shape(ref: ShmRef) -> tuple[int, int]:
    """The descriptor's shape as (rows, vocabulary), or a 400 saying what is wrong with it."""
    if any(n < 1 for n in ref.shape):
        raise Problem(
            400,
            "shm-shape",
            f"logits_shm.shape must be [V] or [B, V] of sizes >= 1, got {ref.shape}",
        )
    return (1, ref.shape[0]) if len(ref.shape) == 1 else (ref.shape[0], ref.shape[1])


def read_segment(
    ref: ShmRef,
    folder: Path | None,
    within_limits: Callable[[int, int], None],
    maps: SegmentMaps | None = None,
) -> MappedLogits:
    """Map the logits ``ref`` names; every way it can be wrong is a problem document.

    ``within_limits(rows, vocab)`` raises for shapes over the server's limits; it runs before
    the file is opened, so an oversized descriptor never reaches the file system. With
    ``maps``, the segment's mapping is kept open for the next request; without, just the window
    is mapped and :meth:`MappedLogits.close` unmaps it.
    """
    if folder is None:
        raise Problem(
            403,
            "shm-off",
            "shared-memory logits are off on this server (KEEPSET_SHM_DIR is not set); "
            "send 'logits' or 'logits_npy'",
        )
    name = ref.segment
    if not _SEGMENT_NAME.fullmatch(name):
        raise Problem(
            400,
            "shm-name",
            f"logits_shm.segment must be a plain file name of 1-255 characters from "
            f"A-Z a-z 0-9 . _ - not starting with a dot, got {name[:64]!r}",
        )
    rows, vocab = segment_shape(ref)
    within_limits(rows, vocab)
    storage = STORAGE[ref.dtype]
    if ref.offset % storage.itemsize:
        raise Problem(
            400,
            "shm-offset",
            f"logits_shm.offset {ref.offset} is not a multiple of {storage.itemsize}, "
            f"the size of one {ref.dtype}",
        )
    count = math.prod(ref.shape)
    nbytes = count * storage.itemsize
    # A plain string: pathlib's / would build and parse a Path on every request.
    mapping, skip = _map_window(os.path.join(folder, name), name, ref.offset, nbytes, maps)
    own = mapping if maps is None else None  # the request's to close, or the maps' to keep
    view = np.frombuffer(mapping, dtype=storage, count=count, offset=skip)
    view = view.reshape(ref.shape)
    if ref.dtype == "float32":
        return MappedLogits(view, True, own)
    converted = to_float32(view, ref.dtype)
    del view  # the last export of the mapping, so it can close now
    if own is not None:
        own.close()
    return MappedLogits(converted, False, None)


_MAP_FLAGS = mmap.MAP_SHARED | getattr(mmap, "MAP_POPULATE", 0)


def _map_window(
    path: str, name: str, offset: int, nbytes: int, maps: SegmentMaps | None
) -> tuple[mmap.mmap, int]:
    """A read-only mapping that holds ``offset`` to ``offset + nbytes`` (the whole file from
    ``maps``, else just that window, its start rounded down to the allocation granularity),
    after checking the file is a regular one that long; and where in the mapping ``offset``
    is."""
    kept = None if maps is None else maps.still_mapped(path, name)
    if kept is not None:
        if offset + nbytes > kept[1]:
            raise _truncated(name, kept[1], offset, nbytes)
        return kept[0], offset
    # O_NOFOLLOW: a link could point anywhere the server may read. O_NONBLOCK: opening a FIFO
    # for reading would otherwise wait for a writer forever.
    flags = os.O_RDONLY | os.O_NOFOLLOW | os.O_NONBLOCK | os.O_CLOEXEC
    try:
        fd = os.open(path, flags)
    except OSError as exc:
        if maps is not None:
            maps.forget(name)
        raise _open_problem(exc, name) from None
    try:
        info = os.fstat(fd)
        if not stat.S_ISREG(info.st_mode):
            raise Problem(
                400,
                "shm-not-regular",
                f"segment {name!r} is not a regular file; keepset maps files only",
            )
        if offset + nbytes > info.st_size:
            raise _truncated(name, info.st_size, offset, nbytes)
        start = offset - offset % mmap.ALLOCATIONGRANULARITY
        try:
            if maps is not None:
                return maps.mapping(fd, info, name), offset
            # MAP_POPULATE maps every page in one call: the kernel then reads the whole window
            # without a page fault per 4 KiB (about a millisecond for a 16 MB batch).
            window = mmap.mmap(
                fd, offset + nbytes - start, flags=_MAP_FLAGS, prot=mmap.PROT_READ, offset=start
            )
            return window, offset - start
        except (OSError, ValueError, OverflowError) as exc:
            # The file changed between the size check and the mapping.
            raise Problem(400, "shm-map", f"segment {name!r} could not be mapped: {exc}") from None
    finally:
        os.close(fd)


def _truncated(name: str, size: int, offset: int, nbytes: int) -> Problem:
    return Problem(
        400,
        "shm-truncated",
        f"segment {name!r} holds {size} bytes; offset {offset} plus the "
        f"{nbytes} bytes its shape and dtype need runs past its end",
    )


def _open_problem(exc: OSError, name: str) -> Problem:
    if exc.errno == errno.ENOENT:
        return Problem(404, "shm-not-found", f"no segment named {name!r} in KEEPSET_SHM_DIR")
    if exc.errno == errno.ELOOP:
        return Problem(
            400,
            "shm-not-regular",
            f"segment {name!r} is a symbolic link; keepset does not follow links",
        )
    if exc.errno in (errno.EACCES, errno.EPERM):
        return Problem(403, "shm-denied", f"keepset may not read segment {name!r}")
    if exc.errno == errno.ENXIO:  # a Unix socket, or a FIFO without a writer
        return Problem(
            400,
            "shm-not-regular",
            f"segment {name!r} is not a regular file; keepset maps files only",
        )
    if exc.errno in (errno.EMFILE, errno.ENFILE, errno.ENOMEM):
        return Problem(
            503,
            "shm-busy",
            f"keepset could not open a segment now: {exc.strerror}",
            headers={"Retry-After": "1"},
        )
    return Problem(400, "shm-open", f"segment {name!r} could not be opened: {exc.strerror}")


class Segment:
    """A segment a sender owns: created with a unique name in ``folder``, reused for every
    write, grown (never shrunk, see the module docstring) when a bigger batch comes, and
    removed by :meth:`close`. Mode 0660 (less the umask): keepset may run as another user of
    the same group."""

    def __init__(self, folder: Path):
        self.name = f"keepset-{os.getpid()}-{secrets.token_hex(8)}"
        self.path = Path(folder) / self.name
        flags = os.O_RDWR | os.O_CREAT | os.O_EXCL | os.O_NOFOLLOW | os.O_CLOEXEC
        self._fd = os.open(self.path, flags, 0o660)
        self._mapping: mmap.mmap | None = None
        self._size = 0

    def write(self, values: NDArray[np.floating], dtype: WireDtype = "float32") -> dict[str, Any]:
        """Write ``values`` ([V] or [B, V]) as ``dtype``; returns the ``logits_shm`` descriptor."""
        data = to_wire(np.asarray(values), dtype)
        if data.ndim not in (1, 2):
            raise ValueError(f"logits must have shape [V] or [B, V], got {list(data.shape)}")
        if self._mapping is None or data.nbytes > self._size:
            self._grow(max(data.nbytes, 2 * self._size, mmap.PAGESIZE))
        assert self._mapping is not None
        self._mapping[: data.nbytes] = data.data.cast("B")
        return {"segment": self.name, "offset": 0, "shape": list(data.shape), "dtype": dtype}

    def view(self, shape: tuple[int, ...], dtype: WireDtype = "float32") -> NDArray[Any]:
        """A writable ``shape`` array of ``dtype``'s storage (bfloat16 as raw uint16 bits) at
        the start of the segment, sized for it once: what is written there is what keepset
        reads, with no copy on the way. The segment cannot grow while the view lives."""
        if len(shape) not in (1, 2) or any(n < 1 for n in shape):
            raise ValueError(f"shape must be [V] or [B, V] of sizes >= 1, got {list(shape)}")
        storage = STORAGE[dtype]
        nbytes = math.prod(shape) * storage.itemsize
        if self._mapping is None or nbytes > self._size:
            self._grow(max(nbytes, mmap.PAGESIZE))
        assert self._mapping is not None
        return np.frombuffer(self._mapping, storage, math.prod(shape)).reshape(shape)

    def _grow(self, size: int) -> None:
        os.ftruncate(self._fd, size)
        if self._mapping is not None:
            self._mapping.close()
        self._mapping = mmap.mmap(self._fd, size)
        self._size = size

    def close(self) -> None:
        if self._mapping is not None:
            _close(self._mapping)  # a caller may still hold a view of a shared_logits block
            self._mapping = None
        if self._fd >= 0:
            os.close(self._fd)
            self._fd = -1
        self.path.unlink(missing_ok=True)

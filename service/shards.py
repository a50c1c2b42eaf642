"""The capture shard format: what one ``.npz`` shard of captured rows holds, how it is written
(atomically: a shard is either whole on disk or absent) and how it is read back.

A shard holds N rows that were served to one client with the same vocabulary size V. Each row
is what is needed to replay any policy version on it (logits, history, seed, stream) and what
the served version did with it (token and diagnostics). Arrays, all of length N unless said:

======================  =============  ====================================================
``logits``              float16 [N, V]  the raw row (float16 halves the disk; out-of-range
                                        values saturate to +-inf, which replays as the service
                                        treats them: -inf removed, +inf invalid)
``history``             int32 [H]       every row's history ids, concatenated
``history_offsets``     int64 [N + 1]   row i's history is ``history[off[i]:off[i + 1]]``
``seed``                uint64          the request's seed
``stream``              int64           the row's random stream: row b of a pick, step t of a
                                        continuation (see ``service.sampling.pick``)
``source``              uint8           0 a ``/v1/pick`` row, 1 a ``/v1/continue`` step
``request_id``          str             the answer's request_id
``policy``, ``arm``     str             the served policy name and the arm's public label
``version``             int32           the served policy version
``token``, ``kept``     int32           the chosen token; the kept-set size
``entropy``, ``kept_mass``, ``prob``, ``logprob``   float64   the row's diagnostics
``fallback``            str             the fallback reason, "" for none
``time``                float64         Unix time the row was served
``meta``                str, 0-d        JSON: ``{"format": FORMAT, "client": ..., "vocab": V}``
======================  =============  ====================================================

No object arrays, so shards load with ``allow_pickle=False``. Text columns are fixed-width
unicode arrays.
"""

from __future__ import annotations

import json
import os
from collections.abc import Iterator
from dataclasses import dataclass, fields
from pathlib import Path

import numpy as np
import numpy.typing as npt

FORMAT = "keepset-capture/1"
SUFFIX = ".npz"
SOURCE_PICK = 0
SOURCE_CONTINUE = 1


class ShardError(ValueError):
    """A file that is not a readable capture shard of this format."""


@dataclass(frozen=True)
class Shard:
    """The rows of one shard; see the module docstring for each column."""

    client: str
    logits: npt.NDArray[np.float16]
    history: npt.NDArray[np.int32]
    history_offsets: npt.NDArray[np.int64]
    seed: npt.NDArray[np.uint64]
    stream: npt.NDArray[np.int64]
    source: npt.NDArray[np.uint8]
    request_id: npt.NDArray[np.str_]
    policy: npt.NDArray[np.str_]
    arm: npt.NDArray[np.str_]
    version: npt.NDArray[np.int32]
    token: npt.NDArray[np.int32]
    kept: npt.NDArray[np.int32]
    entropy: npt.NDArray[np.float64]
    kept_mass: npt.NDArray[np.float64]
    prob: npt.NDArray[np.float64]
    logprob: npt.NDArray[np.float64]
    fallback: npt.NDArray[np.str_]
    time: npt.NDArray[np.float64]

    @property
    def rows(self) -> int:
        return int(self.logits.shape[0])

    @property
    def vocab(self) -> int:
        return int(self.logits.shape[1])

    def history_of(self, i: int) -> list[int]:
        start, end = self.history_offsets[i], self.history_offsets[i + 1]
        return [int(t) for t in self.history[start:end]]

    def histories(self) -> list[list[int]]:
        return [self.history_of(i) for i in range(self.rows)]


_ARRAYS = [f.name for f in fields(Shard) if f.name != "client"]
# The numeric columns' types (the text columns are fixed-width unicode).
DTYPES = {
    "logits": np.float16,
    "history": np.int32,
    "history_offsets": np.int64,
    "seed": np.uint64,
    "stream": np.int64,
    "source": np.uint8,
    "version": np.int32,
    "token": np.int32,
    "kept": np.int32,
    "entropy": np.float64,
    "kept_mass": np.float64,
    "prob": np.float64,
    "logprob": np.float64,
    "time": np.float64,
}
_TEXT = ("request_id", "policy", "arm", "fallback")


def write_shard(path: Path, shard: Shard) -> int:
    """Write ``shard`` to ``path`` atomically (a temporary file in the same folder, fsynced, then
    renamed); returns the bytes written."""
    _check(shard)
    arrays = {name: getattr(shard, name) for name in _ARRAYS}
    meta = {"format": FORMAT, "client": shard.client, "vocab": shard.vocab}
    temporary = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    try:
        with temporary.open("wb") as handle:
            np.savez(handle, meta=np.array(json.dumps(meta)), **arrays)
            handle.flush()
            os.fsync(handle.fileno())
        size = temporary.stat().st_size
        os.replace(temporary, path)
    except BaseException:
        temporary.unlink(missing_ok=True)
        raise
    return size


def read_shard(path: Path) -> Shard:
    """Read one shard back, checking its format and the length of every column."""
    try:
        with np.load(path, allow_pickle=False) as data:
            meta = json.loads(str(data["meta"]))
            if not isinstance(meta, dict) or meta.get("format") != FORMAT:
                raise ShardError(f"{path}: not a {FORMAT} shard")
            columns = {name: data[name] for name in _ARRAYS}
    except (OSError, KeyError, ValueError) as exc:
        if isinstance(exc, ShardError):
            raise
        raise ShardError(f"{path}: not a readable capture shard ({exc})") from None
    for name, dtype in DTYPES.items():
        columns[name] = columns[name].astype(dtype, copy=False)
    shard = Shard(client=str(meta.get("client", "")), **columns)
    _check(shard)
    return shard


def shard_files(folder: Path) -> Iterator[Path]:
    """Every finished shard under ``folder`` (recursively), oldest name first; temporary files
    of a write in progress are skipped."""
    for path in sorted(folder.rglob(f"*{SUFFIX}")):
        if path.is_file() and not path.name.startswith("."):
            yield path


def _check(shard: Shard) -> None:
    if shard.logits.ndim != 2:
        raise ShardError("logits must be [rows, vocab]")
    n = shard.rows
    if shard.history_offsets.shape != (n + 1,):
        raise ShardError("history_offsets must have rows + 1 entries")
    if n and (shard.history_offsets[0] != 0 or shard.history_offsets[-1] != shard.history.size):
        raise ShardError("history_offsets must start at 0 and end at the history's length")
    for name in _ARRAYS:
        if name in ("logits", "history", "history_offsets"):
            continue
        column = getattr(shard, name)
        if column.shape != (n,):
            raise ShardError(f"column {name} must have one entry per row")
        if name in _TEXT and column.dtype.kind != "U":
            raise ShardError(f"column {name} must be text")

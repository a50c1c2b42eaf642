"""Reading logits from ``.npy`` bytes without pickle and without copying the payload twice.

Only the header is parsed by numpy's format helpers; the data is viewed with ``frombuffer``
after checking that its length matches the header exactly. float32 and float16 are accepted,
in either byte order, and raw uint16 when the sender declares it as bfloat16 (numpy has no
bfloat16 dtype); everything else is refused with a reason.
"""

from __future__ import annotations

import io
import math
import re

import numpy as np
from numpy.lib import format as npy_format
from numpy.typing import NDArray

from service.dtypes import to_float32

ACCEPTED = ("float32", "float16")


class NpyError(ValueError):
    """Bytes that are not a usable .npy array; ``kind`` is ``malformed`` or ``dtype``."""

    def __init__(self, kind: str, message: str):
        super().__init__(message)
        self.kind = kind


# The header numpy itself writes: {'descr': '<f4', 'fortran_order': False, 'shape': (2, 5), }
_HEADER = re.compile(
    rb"\{'descr': '(?P<descr>[<>|=][a-z][0-9]+)', 'fortran_order': (?P<fortran>True|False), "
    rb"'shape': \((?P<shape>[0-9, ]*)\), \}"
)


def _fast_header(data: bytes) -> tuple[tuple[int, ...], bool, np.dtype[np.generic], int] | None:
    """Parse a version 1.0 header of numpy's own layout without ast; None if it is any other."""
    if len(data) < 10 or data[:8] != b"\x93NUMPY\x01\x00":
        return None
    length = int.from_bytes(data[8:10], "little")
    match = _HEADER.match(data, 10, 10 + length)
    if match is None:
        return None
    shape = tuple(int(p) for p in match["shape"].replace(b" ", b"").split(b",") if p)
    descr = match["descr"].decode()
    try:
        dtype = np.dtype(descr)
    except TypeError:  # not a dtype at all ('<f3'): a broken header, not an unsupported type
        raise NpyError("malformed", f"the header names no valid dtype: {descr!r}") from None
    return shape, match["fortran"] == b"True", dtype, 10 + length


def read_npy(data: bytes, declared: str | None = None) -> NDArray[np.floating]:
    """The float32 logits in ``data``; ``declared="bfloat16"`` reads a uint16 array as raw
    bfloat16 bits."""
    fast = _fast_header(data)
    if fast is not None:
        shape, fortran, dtype, offset = fast
        return _array(data, shape, fortran, dtype, offset, declared)
    stream = io.BytesIO(data)
    try:
        version = npy_format.read_magic(stream)
        if version == (1, 0):
            shape, fortran, dtype = npy_format.read_array_header_1_0(stream)
        elif version in ((2, 0), (3, 0)):
            shape, fortran, dtype = npy_format.read_array_header_2_0(stream)
        else:
            raise NpyError("malformed", f"unsupported .npy format version {version}")
    except NpyError:
        raise
    except Exception as exc:  # numpy raises ValueError/SyntaxError variants for bad headers
        raise NpyError("malformed", f"not a .npy array: {exc}") from None
    return _array(data, shape, fortran, dtype, stream.tell(), declared)


def _array(
    data: bytes,
    shape: tuple[int, ...],
    fortran: bool,
    dtype: np.dtype[np.generic],
    offset: int,
    declared: str | None,
) -> NDArray[np.floating]:
    if declared == "bfloat16":
        if dtype.kind != "u" or dtype.itemsize != 2:
            raise NpyError(
                "dtype", f"bfloat16 logits travel as raw uint16 bits (<u2), got {dtype.str}"
            )
    elif dtype.hasobject or dtype.kind != "f" or dtype.name not in ACCEPTED:
        hint = (
            "; raw bfloat16 bits (uint16) must be declared as bfloat16"
            if dtype.str[1:] == "u2"
            else ""
        )
        raise NpyError("dtype", f"logits must be float32 or float16, got {dtype.str}{hint}")
    if len(shape) not in (1, 2) or 0 in shape:
        raise NpyError("malformed", f"logits must have shape [V] or [B, V], got {list(shape)}")
    # math.prod on Python ints: np.prod would wrap around on a header with huge dimensions.
    count = math.prod(shape)
    expected = count * dtype.itemsize
    if len(data) - offset != expected:
        raise NpyError(
            "malformed",
            f"the header says {expected} data bytes for shape {list(shape)}, "
            f"the body has {len(data) - offset}",
        )
    array = np.frombuffer(data, dtype=dtype, count=count, offset=offset)
    array = array.reshape(shape, order="F" if fortran else "C")
    if declared == "bfloat16":
        return to_float32(array, "bfloat16")
    return array.astype(np.float32, copy=False) if dtype.isnative else array.astype(np.float32)


def npy_header_shape(data: bytes) -> tuple[int, ...]:
    """The shape a .npy header announces, read before the data is touched."""
    stream = io.BytesIO(data[:4096])
    version = npy_format.read_magic(stream)
    reader = (
        npy_format.read_array_header_1_0 if version == (1, 0) else npy_format.read_array_header_2_0
    )
    shape, _, _ = reader(stream)
    return tuple(int(s) for s in shape)


def to_npy(array: NDArray[np.floating]) -> bytes:
    """Serialise an array as .npy bytes (what the Python client sends)."""
    buffer = io.BytesIO()
    np.save(buffer, np.ascontiguousarray(array), allow_pickle=False)
    return buffer.getvalue()

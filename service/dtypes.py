"""The element types logits travel in (float32, float16, bfloat16) and their conversion to the
float32 the sampler works on, plus the narrowing a sender needs.

bfloat16 has no numpy dtype: it travels as raw ``uint16`` whose bits are the top half of a
float32, so widening is a 16-bit shift and exact. Narrowing rounds to nearest, ties to even, as
accelerators do, and keeps NaN a NaN.
"""

from __future__ import annotations

from typing import Literal, get_args

import numpy as np
from numpy.typing import NDArray

WireDtype = Literal["float32", "float16", "bfloat16"]
WIRE_DTYPES: tuple[str, ...] = get_args(WireDtype)
# How each wire type is stored in memory: little-endian, bfloat16 as its raw bits.
STORAGE: dict[str, np.dtype[np.generic]] = {
    "float32": np.dtype("<f4"),
    "float16": np.dtype("<f2"),
    "bfloat16": np.dtype("<u2"),
}


def bfloat16_to_float32(bits: NDArray[np.generic]) -> NDArray[np.float32]:
    """Raw bfloat16 bits (uint16, either byte order) as float32 values."""
    widened = bits.astype(np.uint32) << np.uint32(16)
    return widened.view(np.float32)


def float32_to_bfloat16(values: NDArray[np.floating]) -> NDArray[np.uint16]:
    """float32 values as raw bfloat16 bits, rounded to nearest with ties to even."""
    f = np.ascontiguousarray(values, dtype=np.float32)
    u = f.view(np.uint32)
    # Adding 0x7FFF plus the lowest kept bit rounds ties to even; uint32 wraps only for NaNs,
    # which are replaced below.
    rounded = (u + np.uint32(0x7FFF) + ((u >> np.uint32(16)) & np.uint32(1))) >> np.uint32(16)
    bits = rounded.astype(np.uint16)
    nan = np.isnan(f)
    if nan.any():
        # Rounding could carry a NaN's payload into the exponent (infinity); keep sign and top
        # payload bits and set the quiet bit instead.
        bits[nan] = ((u[nan] >> np.uint32(16)) | np.uint32(0x0040)).astype(np.uint16)
    return bits


def to_float32(array: NDArray[np.generic], dtype: str) -> NDArray[np.float32]:
    """An array stored as wire type ``dtype`` as float32; float32 input is returned as is (no
    copy), so a read-only view stays one."""
    if dtype == "bfloat16":
        return bfloat16_to_float32(array)
    return array.astype(np.float32, copy=False)


def to_wire(values: NDArray[np.floating], dtype: str) -> NDArray[np.generic]:
    """float values in the storage of wire type ``dtype`` (what a sender writes)."""
    if dtype == "bfloat16":
        return float32_to_bfloat16(values)
    return np.ascontiguousarray(values, dtype=STORAGE[dtype])

"""Reading ``.npy`` bodies: numpy's own ``np.load`` is the reference for every array keepset
accepts, and no byte string, however broken, gets anything but an array or an NpyError (which
the HTTP layer turns into a 400 or 415, never a 500)."""

from __future__ import annotations

import io

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from service.npy import NpyError, read_npy, to_npy


def saved(array: np.ndarray, version: tuple[int, int] | None = None) -> bytes:
    buffer = io.BytesIO()
    if version is None:
        np.save(buffer, array, allow_pickle=False)
    else:  # other header versions, as other writers may send them
        np.lib.format.write_array(buffer, array, version=version, allow_pickle=False)
    return buffer.getvalue()


def reference(data: bytes) -> np.ndarray:
    return np.asarray(np.load(io.BytesIO(data), allow_pickle=False), dtype=np.float32)


shapes = st.one_of(
    st.tuples(st.integers(1, 300)),
    st.tuples(st.integers(1, 6), st.integers(1, 200)),
)


@settings(max_examples=300, deadline=None, derandomize=True)
@given(
    shape=shapes,
    dtype=st.sampled_from(["<f4", ">f4", "<f2", ">f2"]),
    fortran=st.booleans(),
    version=st.sampled_from([None, (1, 0), (2, 0), (3, 0)]),
    seed=st.integers(0, 2**32 - 1),
)
def test_accepted_arrays_equal_numpys_own_reading(
    shape: tuple[int, ...], dtype: str, fortran: bool, version: tuple[int, int] | None, seed: int
) -> None:
    values = np.random.default_rng(seed).standard_normal(shape).astype(dtype)
    if fortran:
        values = np.asfortranarray(values)
    data = saved(values, version)
    got = read_npy(data)
    assert got.dtype == np.float32 and got.shape == shape
    np.testing.assert_array_equal(got, reference(data))


@settings(max_examples=500, deadline=None, derandomize=True)
@given(
    shape=shapes,
    cut=st.integers(0, 200),
    flips=st.lists(st.tuples(st.integers(0, 199), st.integers(0, 255)), max_size=4),
    tail=st.binary(max_size=8),
)
def test_damaged_bodies_give_an_array_or_an_npy_error(
    shape: tuple[int, ...], cut: int, flips: list[tuple[int, int]], tail: bytes
) -> None:
    data = bytearray(saved(np.zeros(shape, np.float32)))
    for at, value in flips:  # mostly lands in the header: magic, length, dict text
        data[at % len(data)] = value
    body = bytes(data[: max(0, len(data) - cut)]) + tail
    try:
        got = read_npy(body)
    except NpyError as exc:
        assert exc.kind in ("malformed", "dtype") and str(exc)
        return
    # Whatever was accepted must be what numpy itself reads from the same bytes.
    np.testing.assert_array_equal(got, reference(body))


@settings(max_examples=300, deadline=None, derandomize=True)
@given(st.binary(max_size=300))
def test_arbitrary_bytes_never_escape_as_another_error(data: bytes) -> None:
    with pytest.raises(NpyError):
        read_npy(b"\x93NUMPY" + data)
    with pytest.raises(NpyError):
        read_npy(data if not data.startswith(b"\x93NUMPY") else b"x" + data)


@pytest.mark.parametrize(
    ("descr", "kind"),
    [("<f8", "dtype"), ("<i4", "dtype"), ("|b1", "dtype"), ("<f3", "malformed"), ("<z9", None)],
)
def test_header_dtypes(descr: str, kind: str | None) -> None:
    header = "{'descr': '" + descr + "', 'fortran_order': False, 'shape': (2,), }"
    header += " " * (63 - len(header)) + "\n"
    body = b"\x93NUMPY\x01\x00" + len(header).to_bytes(2, "little") + header.encode() + bytes(16)
    with pytest.raises(NpyError) as refused:
        read_npy(body)
    if kind is not None:
        assert refused.value.kind == kind


def test_client_encoding_round_trips() -> None:
    values = np.random.default_rng(1).standard_normal((3, 7)).astype(np.float16)
    np.testing.assert_array_equal(read_npy(to_npy(values)), values.astype(np.float32))


def test_a_header_whose_size_overflows_int64_is_malformed() -> None:
    # 2**32 * 2**32 elements wrap to 0 in int64 arithmetic, which would "match" an empty body.
    header = b"{'descr': '<f4', 'fortran_order': False, 'shape': (4294967296, 4294967296), }"
    header += b" " * (-(10 + len(header) + 1) % 64) + b"\n"
    data = b"\x93NUMPY\x01\x00" + len(header).to_bytes(2, "little") + header
    with pytest.raises(NpyError) as caught:
        read_npy(data)
    assert caught.value.kind == "malformed"

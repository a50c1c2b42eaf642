"""bfloat16 and float16 logits: the conversions against hand-worked bit patterns and against
``ml_dtypes`` (an independent bfloat16 implementation), ``.npy`` bodies that declare raw uint16
as bfloat16, and the same picks over HTTP as float32 (in process)."""

from __future__ import annotations

import base64
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import ml_dtypes
import numpy as np
import pytest
from conftest import assert_problem, auth, in_process, wait_ready
from fastapi.testclient import TestClient

from service.dtypes import bfloat16_to_float32, float32_to_bfloat16
from service.npy import NpyError, read_npy, to_npy

# bfloat16 = sign, 8 exponent bits (bias 127), 7 fraction bits: the top half of a float32.
WORKED = [
    (0x3F80, 1.0),  # exponent 127, fraction 0
    (0xC000, -2.0),  # sign, exponent 128
    (0x4049, 3.140625),  # 2 * (1 + 73/128)
    (0x0080, 2.0**-126),  # smallest normal
    (0x0001, 2.0**-133),  # smallest subnormal: 2**-126 * 2**-7
    (0x7F7F, (2 - 2**-7) * 2.0**127),  # largest finite
    (0x7F80, np.inf),
    (0xFF80, -np.inf),
]


@pytest.mark.parametrize(("bits", "value"), WORKED)
def test_widening_hand_worked_patterns(bits: int, value: float) -> None:
    got = bfloat16_to_float32(np.array([bits], np.uint16))
    assert got.dtype == np.float32 and got[0] == np.float32(value)


def test_widening_nan_and_negative_zero() -> None:
    got = bfloat16_to_float32(np.array([0x7FC0, 0xFFC1, 0x8000], np.uint16))
    assert np.isnan(got[0]) and np.isnan(got[1])
    assert got[2] == 0 and np.signbit(got[2])


@pytest.mark.parametrize(
    ("float_bits", "expected"),
    [
        (0x3F800000, 0x3F80),  # 1.0 exactly
        (0x3F808000, 0x3F80),  # halfway between 0x3F80 and 0x3F81: ties to the even 0x3F80
        (0x3F818000, 0x3F82),  # halfway between 0x3F81 and 0x3F82: ties to the even 0x3F82
        (0x3F808001, 0x3F81),  # just above halfway rounds up
        (0x3F807FFF, 0x3F80),  # just below halfway rounds down
        (0x7F7FFFFF, 0x7F80),  # largest float32 rounds past the largest bfloat16: infinity
        (0xFF800000, 0xFF80),  # -inf stays -inf
    ],
)
def test_narrowing_rounds_to_nearest_even(float_bits: int, expected: int) -> None:
    values = np.array([float_bits], np.uint32).view(np.float32)
    assert int(float32_to_bfloat16(values)[0]) == expected


def test_narrowing_keeps_nan_a_nan() -> None:
    # 0x7FFFFFFF would round up into the exponent (0x8000, -0.0) without the NaN guard.
    nans = np.array([0x7FFFFFFF, 0xFFFFFFFF, 0x7F800001, 0x7FC00000], np.uint32).view(np.float32)
    assert np.isnan(bfloat16_to_float32(float32_to_bfloat16(nans))).all()


def test_widening_equals_ml_dtypes_for_every_bit_pattern() -> None:
    bits = np.arange(2**16, dtype=np.uint16)
    reference = bits.view(ml_dtypes.bfloat16).astype(np.float32)
    ours = bfloat16_to_float32(bits)
    np.testing.assert_array_equal(ours, reference)  # NaN matches NaN
    finite = np.isfinite(reference)
    assert (ours[finite].view(np.uint32) == reference[finite].view(np.uint32)).all()


def test_narrowing_equals_ml_dtypes_on_random_float32_bits() -> None:
    words = np.random.default_rng(5).integers(0, 2**32, size=1_000_000, dtype=np.uint32)
    values = np.concatenate([words.view(np.float32), np.float32([0.1, -0.0, 65504, 1e-40])])
    with np.errstate(invalid="ignore"):  # ml_dtypes warns when it casts NaNs
        reference = values.astype(ml_dtypes.bfloat16).view(np.uint16)
    ours = float32_to_bfloat16(values)
    nan = np.isnan(values)
    assert (ours[~nan] == reference[~nan]).all()
    assert np.isnan(bfloat16_to_float32(ours[nan])).all()


def test_npy_declared_bfloat16_in_either_byte_order() -> None:
    values = np.random.default_rng(2).standard_normal((3, 50)).astype(ml_dtypes.bfloat16)
    bits = values.view(np.uint16)
    expected = values.astype(np.float32)
    np.testing.assert_array_equal(read_npy(to_npy(bits), "bfloat16"), expected)
    np.testing.assert_array_equal(read_npy(to_npy(bits.astype(">u2")), "bfloat16"), expected)


def test_npy_uint16_needs_the_declaration_and_bfloat16_needs_uint16() -> None:
    bits = np.zeros(8, np.uint16)
    with pytest.raises(NpyError, match="declared as bfloat16") as refused:
        read_npy(to_npy(bits))
    assert refused.value.kind == "dtype"
    with pytest.raises(NpyError, match="uint16") as refused:
        read_npy(to_npy(np.zeros(8, np.float32)), "bfloat16")
    assert refused.value.kind == "dtype"


@pytest.fixture
def client(registry: Path) -> Iterator[TestClient]:
    with in_process(registry) as test_client:
        assert wait_ready(test_client) == 200
        yield test_client


def _answer_fields(response: Any) -> tuple[list[int], list[dict[str, Any]]]:
    assert response.status_code == 200, response.text
    data = response.json()
    return data["tokens"], data["rows"]


def test_bfloat16_bodies_pick_like_their_float32_values(client: TestClient) -> None:
    rng = np.random.default_rng(9)
    logits = (rng.standard_normal((4, 3000)) * 3).astype(ml_dtypes.bfloat16)
    bits, widened = logits.view(np.uint16), logits.astype(np.float32)
    npy = {**auth("prompt-book-app"), "Content-Type": "application/x-npy"}
    as_float32 = client.post(
        "/v1/pick", content=to_npy(widened), params={"seed": 11, "routing_key": "k"}, headers=npy
    )
    raw = client.post(
        "/v1/pick",
        content=to_npy(bits),
        params={"seed": 11, "routing_key": "k", "dtype": "bfloat16"},
        headers=npy,
    )
    encoded = base64.b64encode(to_npy(bits)).decode()
    in_json = client.post(
        "/v1/pick",
        json={"logits_npy": encoded, "logits_dtype": "bfloat16", "seed": 11, "routing_key": "k"},
        headers=auth("prompt-book-app"),
    )
    expected = _answer_fields(as_float32)
    assert _answer_fields(raw) == expected
    assert _answer_fields(in_json) == expected


def test_bfloat16_body_errors(client: TestClient) -> None:
    npy = {**auth("usher-desk"), "Content-Type": "application/x-npy"}
    bits = to_npy(np.full((2, 10), 0x3F80, np.uint16))
    assert_problem(client.post("/v1/pick", content=bits, headers=npy), 415, "bfloat16")
    wrong = client.post("/v1/pick", content=bits, params={"dtype": "float64"}, headers=npy)
    assert_problem(wrong, 400, "dtype may only be bfloat16")
    floats = to_npy(np.zeros(4, np.float32))
    mislabelled = client.post("/v1/pick", content=floats, params={"dtype": "bfloat16"}, headers=npy)
    assert_problem(mislabelled, 415, "uint16")
    lone = client.post(
        "/v1/pick",
        json={"logits": [1.0, 2.0], "logits_dtype": "bfloat16"},
        headers=auth("usher-desk"),
    )
    assert_problem(lone, 400, "logits_dtype")
    other = client.post(
        "/v1/pick",
        json={"logits_npy": base64.b64encode(bits).decode(), "logits_dtype": "int8"},
        headers=auth("usher-desk"),
    )
    assert_problem(other, 400, "logits_dtype")

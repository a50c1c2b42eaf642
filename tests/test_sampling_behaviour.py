"""Facts of the trade, reproducibility, input forms and bad input for the sampling core."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import special, stats

from service.sampling import (
    ChainError,
    InputError,
    final_distribution,
    parse_chain,
    pick,
)

ROW = np.array([0.3, 2.0, -1.0, 1.5, 0.0, 1.9], np.float32)


# --- facts of the trade (common practice) -----------------------------------------------------


def test_low_temperature_approaches_greedy() -> None:
    dist = final_distribution(parse_chain([{"temperature": 1e-3}]), ROW)[0]
    assert dist[1] > 1 - 1e-12  # argmax is id 1 (2.0 against 1.9)


def test_high_temperature_approaches_uniform() -> None:
    dist = final_distribution(parse_chain([{"temperature": 1e6}]), ROW)[0]
    np.testing.assert_allclose(dist, np.full(6, 1 / 6), atol=1e-6)


def test_top_p_one_and_typical_one_keep_everything() -> None:
    x = np.random.default_rng(4).standard_normal(10000).astype(np.float32) * 5
    for stage in ({"top_p": 1.0}, {"typical": 1.0}):
        dist = final_distribution(parse_chain([stage]), x)[0]
        np.testing.assert_allclose(dist, special.softmax(x.astype(np.float64)), rtol=1e-9)


def test_top_k_at_least_vocabulary_keeps_everything() -> None:
    dist = final_distribution(parse_chain([{"top_k": 100}]), ROW)[0]
    assert np.count_nonzero(dist) == 6


# --- reproducibility ----------------------------------------------------------------------------


def test_same_seed_same_tokens_and_seed_echoed() -> None:
    chain = parse_chain([{"temperature": 1.2}, {"top_k": 4}])
    x = np.random.default_rng(1).standard_normal((16, 300)).astype(np.float32)
    a, b = pick(chain, x, seed=99), pick(chain, x, seed=99)
    np.testing.assert_array_equal(a.tokens, b.tokens)
    assert a.seed == 99
    fresh = pick(chain, x)
    assert 0 <= fresh.seed < 2**53
    np.testing.assert_array_equal(pick(chain, x, seed=fresh.seed).tokens, fresh.tokens)


def test_row_token_depends_only_on_its_own_stream() -> None:
    chain = parse_chain([{"temperature": 1.0}])
    x = np.random.default_rng(2).standard_normal((5, 50)).astype(np.float32)
    whole = pick(chain, x, seed=7)
    for b in range(5):
        alone = pick(chain, x[b], seed=7, first_stream=b)
        assert alone.tokens[0] == whole.tokens[b]


def test_draws_follow_splitmix64_on_both_paths() -> None:
    # SplitMix64 (Steele, Lea & Flood 2014): the first output for seed 0 is 0xe220a8397b1dcdaf
    # (a widely published test value, quoted from memory). Both paths draw row b with output
    # first_stream + b, the compiled kernel in its own uint64 arithmetic: on a flat row of
    # 2**16 tokens the token is floor(u * V), so the drawn ids reveal the uniforms used.
    from service.sampling.core import _uniforms

    assert _uniforms(0, 0, 1)[0] == (0xE220A8397B1DCDAF >> 11) * 2.0**-53
    vocab = 2**16
    flat = np.zeros((3, vocab), np.float32)
    for seed in (0, 1, 2**53 - 1, 2**63 + 5, 2**64 - 1):
        for first in (0, 7, 2**40):
            want = np.floor(_uniforms(seed, first, 3) * vocab).astype(np.int64)
            for kernel in ("compiled", "numpy"):
                chain = parse_chain([{"top_k": vocab}])
                got = pick(chain, flat, seed=seed, first_stream=first, kernel=kernel).tokens
                np.testing.assert_array_equal(got, want, err_msg=f"{kernel} {seed} {first}")


def test_rows_of_a_batch_are_independent() -> None:
    # Two identical rows in 20 000 batches: the pair of tokens must look independent
    # (SciPy's chi-square test of independence on the contingency table).
    chain = parse_chain([{"temperature": 1.0}])
    row = np.log(np.array([0.4, 0.3, 0.2, 0.1])).astype(np.float32)
    pairs = np.array([pick(chain, np.stack([row, row]), seed=s).tokens for s in range(20000)])
    table = np.zeros((4, 4))
    np.add.at(table, (pairs[:, 0], pairs[:, 1]), 1)
    assert stats.chi2_contingency(table).pvalue > 1e-4


# --- input forms ---------------------------------------------------------------------------------


def test_single_row_float16_and_lists() -> None:
    chain = parse_chain([{"top_k": 2}])
    want = final_distribution(chain, ROW)
    for form in (ROW.astype(np.float16), ROW.tolist(), [ROW.tolist()], ROW.astype(np.float64)):
        np.testing.assert_allclose(final_distribution(chain, form), want, rtol=1e-3)
    out = pick(chain, ROW.astype(np.float16), seed=1)
    assert out.tokens.shape == (1,) and out.tokens[0] in (1, 5)


def test_min_keep_holds_for_every_truncation() -> None:
    peaky = np.array([10.0, 0.0, 0.0, 0.0, 0.0], np.float32)
    for stage in (
        {"top_k": 1},
        {"top_p": 0.1},
        {"typical": 0.1},
        {"min_p": 0.9},
        {"epsilon": 0.9},
        {"eta": 0.9},
    ):
        dist = final_distribution(parse_chain([stage], min_keep=3), peaky)[0]
        assert np.flatnonzero(dist).tolist() == [0, 1, 2], stage  # ties to the lower ids


# --- bad input -------------------------------------------------------------------------------


def test_non_finite_rows_fall_back() -> None:
    chain = parse_chain([{"temperature": 5.0}, {"top_k": 3}])
    x = np.array([[0.0, np.nan, 1.0, 3.0], [0.0, 1.0, np.inf, 2.0], [0.0, 1.0, 2.0, 0.5]])
    out = pick(chain, x.astype(np.float32), seed=1)
    assert out.fallback == ["non_finite", "non_finite", None]
    # The default fallback is greedy over the finite entries.
    assert out.tokens[0] == 3 and out.tokens[1] == 3 and out.prob[0] == 1.0
    assert out.kept[0] == 1


def test_fallback_chain_decides_non_finite_and_empty_rows() -> None:
    fallback = parse_chain([{"top_k": 2}])
    chain = parse_chain([{"ban": [0, 1, 2]}], fallback=fallback)
    x = np.array([[0.0, 1.0, 2.0], [np.nan, 1.0, 2.0]], np.float32)
    out = pick(chain, x, seed=3)
    assert out.fallback == ["empty", "non_finite"]
    assert (out.kept == 2).all()
    dist = final_distribution(chain, x)
    np.testing.assert_allclose(dist[0], [0, special.expit(-1.0), special.expit(1.0)], rtol=1e-6)


def test_all_banned_without_fallback_is_greedy() -> None:
    out = pick(parse_chain([{"ban": [0, 1, 2]}]), np.array([0.0, 5.0, 1.0], np.float32), seed=1)
    assert out.fallback == ["empty"] and out.tokens[0] == 1


def test_row_without_finite_logit_is_refused() -> None:
    x = np.array([[0.0, 1.0], [-np.inf, np.nan]], np.float32)
    with pytest.raises(InputError) as err:
        pick(parse_chain([{"top_k": 1}]), x, seed=1)
    assert err.value.reason == "no_finite" and "row 1" in str(err.value)


@pytest.mark.parametrize(
    ("logits", "reason"),
    [
        (np.zeros((2, 2, 2), np.float32), "shape"),
        (np.zeros((0, 3), np.float32), "shape"),
        (np.zeros(3, np.int32), "dtype"),
        ([[1.0, 2.0], [3.0]], "shape"),
    ],
)
def test_malformed_logits(logits: object, reason: str) -> None:
    with pytest.raises(InputError) as err:
        pick(parse_chain([{"top_k": 1}]), logits, seed=1)  # type: ignore[arg-type]
    assert err.value.reason == reason


def test_banned_id_beyond_vocabulary_and_bad_history() -> None:
    with pytest.raises(InputError) as err:
        pick(parse_chain([{"ban": [10]}]), np.zeros(5, np.float32), seed=1)
    assert err.value.reason == "token_range" and "10" in str(err.value)
    chain = parse_chain([{"repetition_penalty": {"factor": 1.2}}])
    with pytest.raises(InputError) as err:
        pick(chain, np.zeros(5, np.float32), seed=1, history=[[7]])
    assert err.value.reason == "token_range"
    with pytest.raises(InputError) as err:
        pick(chain, np.zeros((2, 5), np.float32), seed=1, history=[[1]])
    assert err.value.reason == "history"
    with pytest.raises(InputError):
        pick(chain, np.zeros(5, np.float32), seed=-1)


@pytest.mark.parametrize(
    ("stages", "needle"),
    [
        ([{"temperature": 0}], "temperature"),
        ([{"temperature": -1}], "> 0"),
        ([{"top_k": 0}], "integer >= 1"),
        ([{"top_k": 2.5}], "top_k"),
        ([{"top_p": 1.5}], "(0, 1]"),
        ([{"typical": 0}], "(0, 1]"),
        ([{"min_p": -0.1}], "(0, 1]"),
        ([{"epsilon": 1.0}], "(0, 1)"),
        ([{"eta": 0}], "(0, 1)"),
        ([{"greedy": False}], "true"),
        ([{"ban": []}], "non-empty"),
        ([{"ban": [-1]}], "token ids"),
        ([{"token_bias": {"x": 1}}], "token id"),
        ([{"token_bias": {3: 1.0, "3": 2.0}}], "id 3 is named twice"),
        ([{"repetition_penalty": {"factor": 0.5}}], "factor"),
        ([{"repetition_penalty": {"factor": 1.2, "span": 3}}], "keys from"),
        ([{"occurrence_penalty": {"per_use": -1}}], "per_use"),
        ([{"nucleus": 0.9}], "unknown method"),
        ([{"top_k": 5, "top_p": 0.9}], "one-key"),
        ([{"temperature": float("nan")}], "temperature"),
    ],
)
def test_invalid_chains_name_stage_and_range(stages: list[dict[str, object]], needle: str) -> None:
    with pytest.raises(ChainError) as err:
        parse_chain(stages)
    assert needle in str(err.value)
    assert str(err.value).startswith("stage 0")


def test_invalid_min_keep() -> None:
    with pytest.raises(ChainError, match="min_keep"):
        parse_chain([{"top_k": 3}], min_keep=0)


def test_with_param_revalidates() -> None:
    chain = parse_chain([{"temperature": 0.8}, {"top_k": 50}])
    assert chain.with_param(0, 1.1).stages[0].param == 1.1
    with pytest.raises(ChainError, match="temperature"):
        chain.with_param(0, 0.0)
    assert parse_chain(chain.to_spec()) == chain


def test_reads_history_only_with_a_penalty_in_the_chain_or_its_fallback() -> None:
    plain = parse_chain([{"temperature": 0.7}, {"top_k": 5}])
    penalised = parse_chain([{"repetition_penalty": {"factor": 1.2}}, {"top_k": 5}])
    counted = parse_chain([{"occurrence_penalty": {"per_use": 0.5}}, {"greedy": True}])
    assert not plain.reads_history
    assert penalised.reads_history and counted.reads_history
    assert plain.with_fallback(counted).reads_history
    # Without a penalty, the history cannot change the draw.
    x = np.random.default_rng(5).standard_normal((3, 400)).astype(np.float32)
    with_history = pick(plain, x, seed=4, history=[[1, 2, 3]] * 3).tokens
    np.testing.assert_array_equal(with_history, pick(plain, x, seed=4).tokens)

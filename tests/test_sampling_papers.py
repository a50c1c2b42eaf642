"""Worked examples computed by hand from each method's published definition, and SciPy as the
reference library for softmax, entropy and goodness of fit of the draws."""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import pytest
from scipy import special, stats

from service.sampling import final_distribution, parse_chain, pick


def logits_of(probs: list[float]) -> np.ndarray:
    return np.log(np.asarray(probs, dtype=np.float64)).astype(np.float32)


def kept(stages: list[dict[str, Any]], row: np.ndarray, **kw: Any) -> list[int]:
    dist = final_distribution(parse_chain(stages, **kw), row)[0]
    return [int(i) for i in np.flatnonzero(dist)]


# --- hand-worked examples ---------------------------------------------------------------------


def test_top_k_fan_2018() -> None:
    # Fan et al. 2018: keep the k most likely tokens, renormalise.
    # logits [1, 3, 2, 3, 0], k = 2 -> ids 1 and 3 (both 3.0), each 1/2.
    row = np.array([1, 3, 2, 3, 0], np.float32)
    dist = final_distribution(parse_chain([{"top_k": 2}]), row)[0]
    np.testing.assert_allclose(dist, [0, 0.5, 0, 0.5, 0])
    # Ties at the cut go to the lower id (DESIGN.md): [3, 1, 3, 3], k = 2 -> ids 0 and 2.
    assert kept([{"top_k": 2}], np.array([3, 1, 3, 3], np.float32)) == [0, 2]


def test_nucleus_holtzman_2020() -> None:
    # Holtzman et al. 2020: smallest prefix by probability whose mass reaches p.
    # p = [.5, .2, .15, .1, .05]; cumulative .5, .7, .85, .95, 1.
    row = logits_of([0.5, 0.2, 0.15, 0.1, 0.05])
    assert kept([{"top_p": 0.6}], row) == [0, 1]
    assert kept([{"top_p": 0.8}], row) == [0, 1, 2]
    assert kept([{"top_p": 0.3}], row) == [0]
    dist = final_distribution(parse_chain([{"top_p": 0.8}]), row)[0]
    # Renormalised by hand: .5/.85, .2/.85, .15/.85.
    np.testing.assert_allclose(dist[:3], [0.588235294, 0.235294118, 0.176470588], rtol=1e-6)


def test_typical_meister_2023() -> None:
    # Meister et al. 2023, locally typical sampling. p = [1/2, 1/4, 1/8, 1/8]:
    # H = 1.75 ln 2; surprisals ln2, 2 ln2, 3 ln2, 3 ln2; |surprisal - H| = .75, .25, 1.25,
    # 1.25 (times ln 2). Order: id 1, id 0, id 2, id 3 (tie to the lower id).
    row = logits_of([0.5, 0.25, 0.125, 0.125])
    assert kept([{"typical": 0.2}], row) == [1]  # .25 >= .2: the most probable is NOT kept
    assert kept([{"typical": 0.7}], row) == [0, 1]  # .25 + .5 = .75
    assert kept([{"typical": 0.8}], row) == [0, 1, 2]  # .875; id 2 wins the tie with id 3


def test_epsilon_hewitt_2022() -> None:
    # Hewitt et al. 2022, epsilon sampling: keep p_i >= epsilon.
    row = logits_of([0.6, 0.3, 0.07, 0.03])
    assert kept([{"epsilon": 0.05}], row) == [0, 1, 2]
    assert kept([{"epsilon": 0.4}], row) == [0]
    # Nothing reaches 0.7: min_keep (default 1) keeps the most probable.
    assert kept([{"epsilon": 0.7}], row) == [0]
    assert kept([{"epsilon": 0.7}], row, min_keep=2) == [0, 1]


def test_eta_hewitt_2022() -> None:
    # Hewitt et al. 2022, eta sampling: eta = min(eps, sqrt(eps) * exp(-H)).
    # p = [.6, .3, .07, .03]: H = .3065 + .3612 + .1862 + .1052 = .9591 nats (by hand).
    row = logits_of([0.6, 0.3, 0.07, 0.03])
    h = -sum(p * math.log(p) for p in [0.6, 0.3, 0.07, 0.03])
    assert h == pytest.approx(0.9591, abs=1e-4)
    # eps = .4: sqrt(.4) * exp(-.9591) = .6325 * .3832 = .2424 < .4, so eta = .2424:
    # keeps .6 and .3, where epsilon .4 alone would keep only .6.
    assert kept([{"eta": 0.4}], row) == [0, 1]
    # eps = .05: .2236 * .3832 = .0857 > .05, so eta = .05: keeps .6, .3, .07.
    assert kept([{"eta": 0.05}], row) == [0, 1, 2]


def test_min_p_nguyen_2024() -> None:
    # Nguyen et al. 2024: keep p_i >= m * max p. p = [.5, .3, .1, .06, .04].
    row = logits_of([0.5, 0.3, 0.1, 0.06, 0.04])
    assert kept([{"min_p": 0.1}], row) == [0, 1, 2, 3]  # threshold .05
    assert kept([{"min_p": 0.25}], row) == [0, 1]  # threshold .125


def test_repetition_penalty_keskar_2019() -> None:
    # Keskar et al. 2019 (CTRL), sign-aware form (common practice): a seen token's positive
    # logit is divided by theta, a negative one multiplied. logits [2, -1, .5, 3], history
    # [0, 1, 1], theta = 2 -> [1, -2, .5, 3]: each seen id penalised once.
    row = np.array([2.0, -1.0, 0.5, 3.0], np.float32)
    chain = parse_chain([{"repetition_penalty": {"factor": 2.0}}])
    dist = final_distribution(chain, row, history=[[0, 1, 1]])[0]
    np.testing.assert_allclose(dist, special.softmax([1.0, -2.0, 0.5, 3.0]), rtol=1e-6)
    # window 1 sees only the last id (1): [2, -2, .5, 3].
    chain = parse_chain([{"repetition_penalty": {"factor": 2.0, "window": 1}}])
    dist = final_distribution(chain, row, history=[[0, 1, 1]])[0]
    np.testing.assert_allclose(dist, special.softmax([2.0, -2.0, 0.5, 3.0]), rtol=1e-6)


def test_occurrence_penalty_common_practice() -> None:
    # Common practice: w -= per_use * count + present * [count > 0].
    # logits [1, 1, 1], history [0, 0, 2], per_use .5, present 1 -> [-1, 1, -.5].
    row = np.ones(3, np.float32)
    chain = parse_chain([{"occurrence_penalty": {"per_use": 0.5, "present": 1.0}}])
    dist = final_distribution(chain, row, history=[[0, 0, 2]])[0]
    np.testing.assert_allclose(dist, special.softmax([-1.0, 1.0, -0.5]), rtol=1e-6)


def test_temperature_ackley_1985() -> None:
    # Ackley, Hinton & Sejnowski 1985: p proportional to exp(w / T). [1, 2, 3] at T = 2.
    dist = final_distribution(parse_chain([{"temperature": 2.0}]), np.array([1, 2, 3], np.float32))
    np.testing.assert_allclose(dist[0], special.softmax([0.5, 1.0, 1.5]), rtol=1e-9)


def test_bias_and_ban_common_practice() -> None:
    row = np.zeros(4, np.float32)
    dist = final_distribution(parse_chain([{"token_bias": {2: math.log(3.0)}}, {"ban": [0]}]), row)
    # After the bias the weights are 1, 1, 3, 1; the ban removes id 0: 1/5, 3/5, 1/5.
    np.testing.assert_allclose(dist[0], [0, 0.2, 0.6, 0.2], rtol=1e-6)


def test_greedy_keeps_one_whatever_min_keep() -> None:
    row = np.array([0.0, 2.0, 2.0, 1.0], np.float32)
    assert kept([{"greedy": True}], row, min_keep=3) == [1]  # tie to the lower id


# --- SciPy as the reference library ------------------------------------------------------------


def test_entropy_and_logprob_match_scipy() -> None:
    rng = np.random.default_rng(11)
    x = (rng.standard_normal((6, 3000)) * 4).astype(np.float32)
    x[2, :100] = -np.inf  # masked entries carry no mass
    out = pick(parse_chain([{"top_k": 20}]), x, seed=1)
    for b in range(6):
        finite = x[b][np.isfinite(x[b])].astype(np.float64)
        p = special.softmax(finite)
        assert out.entropy[b] == pytest.approx(stats.entropy(p), rel=1e-5)
        logp = special.log_softmax(np.where(np.isfinite(x[b]), x[b].astype(np.float64), -np.inf))
        assert out.logprob[b] == pytest.approx(logp[out.tokens[b]], abs=1e-5)
        top = np.argsort(-x[b].astype(np.float64), kind="stable")[:20]
        assert out.kept_mass[b] == pytest.approx(np.exp(logp[top]).sum(), rel=1e-5)
        assert out.kept[b] == 20


def test_temperature_one_is_scipy_softmax() -> None:
    # Common practice: T = 1 leaves the distribution unchanged.
    x = np.random.default_rng(2).standard_normal(500).astype(np.float32) * 3
    dist = final_distribution(parse_chain([{"temperature": 1.0}]), x)[0]
    np.testing.assert_allclose(dist, special.softmax(x.astype(np.float64)), rtol=1e-9)


DRAW_CASES: list[list[dict[str, Any]]] = [
    [{"temperature": 0.7}],
    [{"repetition_penalty": {"factor": 1.8, "window": 4}}],
    [{"occurrence_penalty": {"per_use": 0.4, "present": 0.3}}],
    [{"token_bias": {3: 1.5, 7: -2.0}}],
    [{"ban": [0, 5]}],
    [{"top_k": 8}],
    [{"top_p": 0.8}],
    [{"typical": 0.8}],
    [{"min_p": 0.1}],
    [{"epsilon": 0.02}],
    [{"eta": 0.02}],
    [{"greedy": True}],
    [{"temperature": 0.8}, {"top_k": 50}, {"top_p": 0.9}, {"typical": 0.95}, {"min_p": 0.02}],
]


@pytest.mark.parametrize("stages", DRAW_CASES, ids=lambda s: "+".join(next(iter(d)) for d in s))
def test_draws_fit_final_distribution_chisquare(stages: list[dict[str, Any]]) -> None:
    """50 000 seeded draws per stage against final_distribution, SciPy's chi-square test."""
    rng = np.random.default_rng(5)
    row = (rng.standard_normal(24) * 1.2).astype(np.float32)
    history = [[3, 3, 9, 1]]
    chain = parse_chain(stages)
    want = final_distribution(chain, row, history=history)[0]
    n = 50_000
    batch = np.repeat(row[None, :], n, axis=0)
    out = pick(chain, batch, seed=424242, history=history * n)
    counts = np.bincount(out.tokens, minlength=row.size)
    assert counts[want == 0].sum() == 0, "a token outside the kept set was drawn"
    support = want > 0
    if support.sum() == 1:
        assert counts[support][0] == n
        return
    result = stats.chisquare(counts[support], want[support] * n)
    assert result.pvalue > 1e-4, (result, counts[support], want[support] * n)

"""keepset's fast selection must give what a full sort gives: compared with the plain reference
in sampling_reference.py on thousands of random rows (hypothesis plus a seeded sweep)."""

from __future__ import annotations

from typing import Any

import numpy as np
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from sampling_reference import reference_row

from service.sampling import (
    StepPick,
    StepPicker,
    compiled,
    final_distribution,
    kernel_available,
    parse_chain,
    pick,
)

# Every row is checked on both paths; without numba the suite must say so, not pass quietly.
assert kernel_available(), "the compiled kernel needs numba (pip install -e '.[test]')"
KERNELS = ("compiled", "numpy")

ROWS_CHECKED = {"hypothesis": 0, "sweep": 0, "ambiguous": 0, "kernel_cut": 0}


def _stage(draw: Any, vocab: int) -> dict[str, Any]:
    method = draw(
        st.sampled_from(
            [
                "temperature",
                "repetition_penalty",
                "occurrence_penalty",
                "token_bias",
                "ban",
                "top_k",
                "top_p",
                "typical",
                "min_p",
                "epsilon",
                "eta",
                "greedy",
            ]
        )
    )
    unit = st.floats(0.01, 1.0)
    if method == "temperature":
        return {method: draw(st.sampled_from([0.05, 0.5, 0.8, 1.0, 1.5, 3.0]))}
    if method == "repetition_penalty":
        return {method: {"factor": draw(st.floats(1.0, 3.0)), "window": draw(st.integers(1, 8))}}
    if method == "occurrence_penalty":
        return {method: {"per_use": draw(st.floats(0, 2)), "present": draw(st.floats(0, 2))}}
    if method == "token_bias":
        ids = draw(st.lists(st.integers(0, vocab - 1), min_size=1, max_size=3, unique=True))
        return {method: {i: draw(st.integers(-20, 20)) / 4 for i in ids}}
    if method == "ban":
        return {method: draw(st.lists(st.integers(0, vocab - 1), min_size=1, max_size=4))}
    if method == "top_k":
        return {method: draw(st.integers(1, max(1, vocab + 2)))}
    if method in ("top_p", "typical", "min_p"):
        return {method: draw(st.one_of(unit, st.sampled_from([0.5, 0.9, 0.95, 1.0])))}
    if method in ("epsilon", "eta"):
        return {method: draw(st.floats(1e-5, 0.5))}
    return {"greedy": True}


@st.composite
def cases(draw: Any) -> tuple[list[dict[str, Any]], int, np.ndarray, list[list[int]]]:
    # The last range straddles the one-row path's switch from a dense start to lazy narrowing.
    vocab = draw(
        st.one_of(
            st.integers(2, 64),
            st.integers(65, 2000),
            st.integers(4097, 12000),
            st.integers(16_000, 17_000),
        )
    )
    rows = draw(st.integers(1, 8))
    seed = draw(st.integers(0, 2**32 - 1))
    kind = draw(st.sampled_from(["normal", "quantised", "peaky", "flat", "masked"]))
    rng = np.random.default_rng(seed)
    scale = draw(st.sampled_from([0.1, 1.0, 3.0, 8.0]))
    x = rng.standard_normal((rows, vocab)) * scale
    if kind == "quantised":  # exact ties everywhere
        x = np.round(x * 2) / 2
    elif kind == "peaky":
        x[np.arange(rows), rng.integers(0, vocab, rows)] += 25.0
    elif kind == "flat":
        x = np.zeros((rows, vocab))
    elif kind == "masked":
        x[rng.random((rows, vocab)) < 0.6] = -np.inf
        x[:, rng.integers(0, vocab)] = 0.0  # keep every row with one finite entry
    stages = [_stage(draw, vocab) for _ in range(draw(st.integers(1, 4)))]
    min_keep = draw(st.sampled_from([1, 1, 2, 3]))
    # Up to 12 ids: longer than most windows drawn above, so windows do cut the history.
    history = [list(rng.integers(0, vocab, draw(st.integers(0, 12)))) for _ in range(rows)]
    return stages, min_keep, x.astype(np.float32), history


def _compare(
    stages: list[dict[str, Any]], min_keep: int, x: np.ndarray, history: list[list[int]]
) -> int:
    """Each row against the reference, on both paths (the compiled kernel and numpy), decided
    both within its batch and alone (on the numpy path a single row takes the lean one-row
    path of ``sampling.row``, a batch the batched rules)."""
    chain = parse_chain(stages, min_keep=min_keep)
    wants = [reference_row(stages, min_keep, x[b], history[b]) for b in range(x.shape[0])]
    tokens = {}
    for kernel in KERNELS:
        got = final_distribution(chain, x, history=history, kernel=kernel)
        out = pick(chain, x, seed=3, history=history, kernel=kernel)
        tokens[kernel] = out.tokens
        for b, (want, reason, ambiguous) in enumerate(wants):
            alone = final_distribution(chain, x[b], history=[history[b]], kernel=kernel)[0]
            alone_out = pick(
                chain, x[b], seed=3, history=[history[b]], first_stream=b, kernel=kernel
            )
            assert out.fallback[b] == reason and alone_out.fallback[0] == reason
            # The prompt path's prepared picker: the same row, the same numbers.
            stepped = StepPicker(chain, x.shape[1], 3, kernel=kernel)(x[b], history[b], b)
            assert stepped == StepPick(
                int(alone_out.tokens[0]),
                int(alone_out.kept[0]),
                float(alone_out.kept_mass[0]),
                float(alone_out.entropy[0]),
                float(alone_out.prob[0]),
                float(alone_out.logprob[0]),
                alone_out.fallback[0],
            )
            if ambiguous:
                continue
            assert want[out.tokens[b]] > 0, f"{kernel}: drawn token outside the reference set"
            assert want[alone_out.tokens[0]] > 0, f"{kernel}: drawn token outside the set"
            for dist in (got[b], alone):
                np.testing.assert_array_equal(np.flatnonzero(dist), np.flatnonzero(want))
                np.testing.assert_allclose(dist, want, atol=1e-6, rtol=0)
    # A replay must not depend on whether numba is installed: both paths draw the same token
    # (the two compute the final probabilities in a different order, so they could part only
    # where a uniform falls within rounding of a cumulative boundary).
    np.testing.assert_array_equal(tokens["compiled"], tokens["numpy"])
    ROWS_CHECKED["ambiguous"] += sum(ambiguous for _, _, ambiguous in wants)
    if compiled.plan_for(chain) is not None:
        ROWS_CHECKED["kernel_cut"] += x.shape[0]
    return x.shape[0]


# derandomize: CI runs the same examples every time; change the seed source to explore more.
@settings(
    max_examples=800,
    deadline=None,
    derandomize=True,
    suppress_health_check=[HealthCheck.too_slow],
)
@given(cases())
def test_matches_sort_reference_on_random_rows(case: Any) -> None:
    ROWS_CHECKED["hypothesis"] += _compare(*case)


SWEEP_CHAINS: list[list[dict[str, Any]]] = [
    [{"temperature": 0.8}, {"top_k": 50}, {"top_p": 0.9}, {"typical": 0.95}, {"min_p": 0.02}],
    [{"top_k": 1}],
    [{"top_k": 200}],
    [{"top_p": 0.5}],
    [{"top_p": 0.99}],
    [{"typical": 0.2}],
    [{"typical": 0.9}],
    [{"min_p": 0.05}],
    [{"min_p": 0.3}],
    [{"epsilon": 3e-4}],
    [{"eta": 3e-4}],
    [{"greedy": True}],
    [{"repetition_penalty": {"factor": 1.3, "window": 16}}, {"temperature": 0.7}, {"top_k": 40}],
    [{"ban": [0, 1, 2]}, {"token_bias": {3: 4.0}}, {"min_p": 0.1}],
    [{"temperature": 1.3}, {"min_p": 0.05}, {"top_p": 0.8}],
]


def test_sweep_over_large_vocabularies() -> None:
    """Seeded rows at vocabulary sizes where the threshold shortcuts are active."""
    rng = np.random.default_rng(20240611)
    for vocab in (5000, 20000, 50000):
        for stages in SWEEP_CHAINS:
            for kind in ("normal", "quantised", "peaky"):
                x = rng.standard_normal((4, vocab)) * 3
                if kind == "quantised":
                    x = np.round(x)
                elif kind == "peaky":
                    x[:, rng.integers(0, vocab, 4)] += 15
                history = [list(rng.integers(0, vocab, 20)) for _ in range(4)]
                ROWS_CHECKED["sweep"] += _compare(stages, 1, x.astype(np.float32), history)


def test_report_row_count() -> None:
    # Runs last in this file: the exactness tests above must have covered thousands of rows.
    total = ROWS_CHECKED["hypothesis"] + ROWS_CHECKED["sweep"]
    print(f"\nexactness rows: {ROWS_CHECKED}")
    assert total >= 2000, ROWS_CHECKED
    # Flat and quantised rows put many cumulative sums exactly on a threshold; keep that a minority.
    assert ROWS_CHECKED["ambiguous"] < 0.1 * total
    # The kernel cuts rows for chains whose first truncation ranks; a good share must be those.
    assert ROWS_CHECKED["kernel_cut"] > 0.2 * total, ROWS_CHECKED


def test_step_picker_equals_pick_over_a_long_continuation() -> None:
    """A prompt's picks one step after another: histories that outgrow the picker's reused
    arrays, penalties over the whole history and over a window, and a row the kernel hands
    back (a NaN entry: the fallback decides it)."""
    rng = np.random.default_rng(11)
    vocab = 4096
    chains = [
        [{"repetition_penalty": {"factor": 1.3}}, {"temperature": 0.9}, {"top_k": 200}],
        [
            {"occurrence_penalty": {"per_use": 0.4, "present": 0.2, "window": 32}},
            {"top_k": 100},
            {"typical": 0.9},
        ],
        [{"top_p": 0.9}],  # the numpy path throughout
    ]
    for stages in chains:
        chain = parse_chain(stages, min_keep=2)
        for kernel in KERNELS:
            picker = StepPicker(chain, vocab, 5, kernel=kernel)
            history = [int(t) for t in rng.integers(0, vocab, 50)]
            for step in range(150):
                row = (rng.standard_normal(vocab) * 3).astype(np.float32)
                if step == 70:
                    row[9] = np.nan
                want = pick(chain, row, 5, [history], first_stream=step, kernel=kernel)
                got = picker(row, history, step)
                assert got.token == want.tokens[0] and got.kept == want.kept[0]
                assert got.fallback == want.fallback[0]
                assert (got.kept_mass, got.prob, got.logprob) == (
                    want.kept_mass[0],
                    want.prob[0],
                    want.logprob[0],
                )
                assert got.entropy == want.entropy[0] or np.isnan(want.entropy[0])
                if step == 100:  # a float64 and a strided row: converted, not refused
                    for other in (row.astype(np.float64), np.repeat(row, 2)[::2]):
                        assert picker(other, history, step) == got
                history.append(got.token)


def test_edits_that_overlap_within_and_across_stages() -> None:
    """Edit stages meeting on the same ids: a ban of a biased id, penalties on banned and
    biased ids, a temperature between edits; then a ban of 2 000 ids beside a penalty over a
    long history (the kernel merges each stage's edits into those before it). Worked against
    the sort reference."""
    rng = np.random.default_rng(23)
    small: list[dict[str, Any]] = [
        {"token_bias": {3: 2.5, 7: 2.0, 20: -1.0}},
        {"ban": [7, 11]},
        {"repetition_penalty": {"factor": 1.4}},
        {"temperature": 0.7},
        {"occurrence_penalty": {"per_use": 0.3, "present": 0.1, "window": 5}},
        {"top_k": 6},
    ]
    history = [[3, 7, 11, 3, 20, 5], [11, 11, 3], [], [20, 3, 7, 7, 7, 1, 2]]
    x = (rng.standard_normal((4, 40)) * 2).astype(np.float32)
    assert compiled.plan_for(parse_chain(small)) is not None
    assert _compare(small, 1, x, history) == 4
    vocab = 8000
    banned = sorted(int(t) for t in rng.permutation(vocab)[:2000])
    large: list[dict[str, Any]] = [
        {"ban": banned},
        {"repetition_penalty": {"factor": 1.3}},
        {"temperature": 0.9},
        {"top_k": 40},
    ]
    long_history = [[int(t) for t in rng.integers(0, vocab, 600)] for _ in range(3)]
    x = (rng.standard_normal((3, vocab)) * 3).astype(np.float32)
    assert _compare(large, 2, x, long_history) == 3


def test_largest_float64_values_as_a_stable_sort_ranks_them() -> None:
    """The kernel's top-m mask of float64 working logits against a stable sort by decreasing
    value (numpy's argsort, kind="stable"): values that round to the same float32 (the kernel
    ranks float32 roundings first, then the values tied there), signed zeros and values that
    round to zero, exact ties, infinities, and every m."""
    kernel = compiled.kernel
    rng = np.random.default_rng(41)
    base = rng.standard_normal(60) * 4
    # Neighbours within float32's rounding of one another, and repeats.
    near = base[:10] * (1 + rng.integers(1, 50, 10) * 2.0**-52)
    tiny = np.array([0.0, -0.0, 1e-50, -1e-50, 1e-300, 0.0])
    wide = np.array([np.inf, -np.inf, 1e300, -1e300, 3.5, 3.5])
    for values in (np.concatenate([base, near, base[:5], tiny, wide]), np.round(base * 2) / 2):
        rng.shuffle(values)
        order = np.argsort(-values, kind="stable")
        for m in range(1, values.size):
            mask = kernel._largest(values, m)
            assert np.array_equal(np.flatnonzero(mask), np.sort(order[:m])), m


def test_stable_order_is_numpys_stable_argsort() -> None:
    """The kernel's radix ordering (typical and top_p prefixes) against numpy's
    ``argsort(kind="stable")``: sizes on both sides of the merge-sort cut-over, exact ties,
    signed zeros, infinities, NaN, keys that differ only below their top 32 bits (the
    insertion pass), and a long run of those (past its bound, the merge sort)."""
    kernel = compiled.kernel
    rng = np.random.default_rng(43)
    cases = []
    for n in (1, 2, kernel._RADIX_FROM - 1, kernel._RADIX_FROM, 200, 1000):
        cases += [
            rng.standard_normal(n) * 3,
            np.abs(rng.standard_normal(n)),
            rng.integers(-3, 4, n).astype(np.float64),
            rng.choice([0.0, -0.0, 1.0, -1.0], n),
            rng.choice([np.inf, -np.inf, 5e-324, -5e-324, 1e300, 0.0, -0.0], n),
            1.0 + rng.integers(0, 8, n) * 2.0**-40,  # equal in the top 32 bits, a few apart
            1.0 + rng.permutation(n) * 2.0**-45,  # all equal there: past the bound
        ]
    with_nan = rng.standard_normal(300)
    with_nan[[3, 100, 299]] = np.nan
    cases.append(with_nan)
    for key in cases:
        assert np.array_equal(kernel.stable_order(key), np.argsort(key, kind="stable")), key

"""The bundled model and its runner: tokenizer, cache equivalence, decoding, quality, bad folders.

Everything runs against the committed model in service/model/bundled and the committed corpus
split in service/model/corpus; nothing is downloaded.
"""

from __future__ import annotations

import codecs
import gzip
import json
import math
import re
import shutil
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import numpy.typing as npt
import pytest

from service.model import (
    BUNDLED,
    Model,
    ModelError,
    PromptError,
    PromptTooLong,
    StepFn,
    held_out_perplexity,
)

CORPUS = Path(__file__).resolve().parents[1] / "service" / "model" / "corpus"
WRONG_LAYOUT = Path(__file__).resolve().parent / "data" / "wrong_layout.onnx"
NON_ASCII = "Café naïve — über Straße, “quoted”, ½ and 😀🎭 at the end.\n"


def read_part(part: str) -> str:
    with gzip.open(CORPUS / f"{part}.txt.gz", "rt", encoding="utf-8") as f:
        return f.read()


@pytest.fixture(scope="module")
def model() -> Model:
    return Model(BUNDLED, threads=2)


@pytest.fixture(scope="module")
def heldout() -> str:
    return read_part("heldout")


def greedy(row: npt.NDArray[np.float32], history: list[int]) -> int:
    return int(np.argmax(row))


def forced(ids: list[int]) -> StepFn:
    """A step function that replays a fixed id sequence (teacher forcing)."""
    it: Iterator[int] = iter(ids)

    def step(row: npt.NDArray[np.float32], history: list[int]) -> int:
        return next(it)

    return step


def seeded(seed: int) -> StepFn:
    """Sampling at temperature 1 with an independent stream per step, derived from (seed, t)."""
    calls = [0]

    def step(row: npt.NDArray[np.float32], history: list[int]) -> int:
        rng = np.random.default_rng([seed, calls[0]])
        calls[0] += 1
        p = np.exp(row.astype(np.float64) - row.max())
        return int(rng.choice(len(p), p=p / p.sum()))

    return step


# -- tokenizer and incremental text ------------------------------------------------------------


def test_tokenizer_round_trip_on_heldout_and_non_ascii(model: Model, heldout: str) -> None:
    sample = heldout[:20000] + NON_ASCII
    ids = model.encode(sample)
    assert model.decode(ids) == sample
    assert max(ids) < model.info.vocab_size
    assert model.info.end_id not in ids  # ordinary text never produces the end token


def test_incremental_text_never_splits_a_character(model: Model) -> None:
    ids = model.encode(NON_ASCII * 2)
    # the emoji and the curly quotes are several byte-level tokens each
    assert len(ids) > len(NON_ASCII * 2) // 2
    cont = model.generate([model.info.end_id], len(ids), forced(ids), end_id=None)
    pieces = [piece for _, piece in cont]
    assert "".join(pieces) == NON_ASCII * 2
    assert all("\ufffd" not in p for p in pieces)
    assert any(p == "" for p in pieces)  # some bytes were held back until complete
    assert cont.finish == "budget" and cont.tokens == ids


def test_pieces_equal_an_incremental_utf8_decoder_on_random_ids(model: Model) -> None:
    """Random id streams (many split characters among them): the pieces a continuation yields
    join to what Python's own incremental UTF-8 decoder makes of the ids' bytes, piece by
    piece (the runner hands whole-text ids over without the decoder when it holds nothing)."""
    rng = np.random.default_rng(9)
    table = model._token_bytes
    assert table is not None
    split = [i for i, b in enumerate(table) if b and b[-1] >= 0x80]  # ids ending mid-character
    for trial in range(100):
        ids = [int(i) for i in rng.integers(0, model.info.vocab_size, 40)]
        ids[::3] = [split[int(k)] for k in rng.integers(0, len(split), len(ids[::3]))]
        cont = model.generate([model.info.end_id], len(ids), forced(ids), end_id=None)
        pieces = [piece for _, piece in cont]
        decoder = codecs.getincrementaldecoder("utf-8")(errors="replace")
        want = [decoder.decode(table[i]) for i in ids]
        want[-1] += decoder.decode(b"", final=True)
        assert pieces == want, trial


# -- the cache -----------------------------------------------------------------------------------


def test_cached_greedy_decoding_equals_full_recomputation(model: Model, heldout: str) -> None:
    prompt = model.text_ids(heldout[5000:5300])
    rows: list[npt.NDArray[np.float32]] = []

    def record(row: npt.NDArray[np.float32], history: list[int]) -> int:
        rows.append(row.copy())
        return int(np.argmax(row))

    cont = model.generate(prompt, 32, record, end_id=None)
    tokens = [t for t, _ in cont]
    assert len(tokens) == 32 and cont.finish == "budget"
    history = list(prompt)
    for t in range(32):
        full, _ = model.forward(np.asarray([history], np.int64), model.empty_cache())
        ref = full[0, -1]
        assert np.abs(rows[t] - ref).max() <= 1e-4, f"step {t}"
        assert tokens[t] == int(np.argmax(ref)), f"step {t}"
        history.append(tokens[t])


def test_batched_cache_matches_full_batch(model: Model, heldout: str) -> None:
    a = model.text_ids(heldout[:400])[:48]
    b = model.text_ids(heldout[9000:9400])[:48]
    batch = np.asarray([a, b], np.int64)
    full, present = model.forward(batch, model.empty_cache(2))
    _, past = model.forward(batch[:, :30], model.empty_cache(2))
    tail, present2 = model.forward(batch[:, 30:], past)
    assert np.abs(tail - full[:, 30:]).max() <= 1e-4
    assert np.abs(present2 - present).max() <= 1e-4
    i = model.info
    assert full.shape == (2, 48, i.vocab_size)
    assert present.shape == (i.n_layer, 2, 2, i.n_head, 48, i.head_dim)


# -- decoding ------------------------------------------------------------------------------------


def test_same_seed_same_text_other_seed_other_text(model: Model) -> None:
    prompt = "KING.\nWhat news"
    runs = []
    for seed in (11, 11, 12):
        cont = model.generate(prompt, 40, seeded(seed), end_id=None)
        list(cont)
        runs.append((cont.tokens, cont.text))
    assert runs[0] == runs[1]
    assert runs[0][0] != runs[2][0]
    assert runs[0][1] == model.decode(runs[0][0])


def test_stop_text_cuts_before_it_and_is_never_emitted(model: Model, heldout: str) -> None:
    text = heldout[3000:4000]
    ids = model.encode(text)
    first = text.index("\n\n")
    cont = model.generate([model.info.end_id], len(ids), forced(ids), stop=["\n\n"], end_id=None)
    pieces = [p for _, p in cont]
    assert cont.finish == "stop"
    assert cont.text == text[:first]
    assert "".join(pieces) == text[:first]
    assert len(cont.tokens) < len(ids)


def test_end_token_and_early_close(model: Model) -> None:
    end = model.info.end_id
    ids = [*model.encode("Good night."), end, *model.encode(" Never seen")]
    cont = model.generate("Hor.\n", 50, forced(ids))
    steps = list(cont)
    assert cont.finish == "end" and steps[-1] == (end, "")
    assert cont.text == "Good night."
    early = model.generate("Hor.\n", 50, greedy)
    for n, _ in enumerate(early, 1):
        if n == 3:
            break
    early.close()
    assert early.finish is None and len(early.tokens) == 3


def test_budget_and_sliding_past_the_context(model: Model, heldout: str) -> None:
    ctx = model.info.context
    prompt = model.text_ids(heldout)[: ctx - 4]
    seen: list[tuple[npt.NDArray[np.float32], list[int]]] = []

    def record(row: npt.NDArray[np.float32], history: list[int]) -> int:
        seen.append((row.copy(), list(history)))  # the runner's list: copied to keep
        return int(np.argmax(row))

    cont = model.generate(prompt, 12, record, end_id=None)
    assert len(list(cont)) == 12 and cont.finish == "budget"
    # the cache is full after 4 generated tokens; step 5 rebuilds it from the last 3/4 of the
    # window, and every later step sees exactly the tokens since that window's start
    keep = ctx - ctx // 4
    start = len(seen[5][1]) - keep
    for row, history in seen[5:]:
        full, _ = model.forward(np.asarray([history[start:]], np.int64), model.empty_cache())
        assert np.abs(row - full[0, -1]).max() <= 1e-4
    full, _ = model.forward(np.asarray([seen[4][1]], np.int64), model.empty_cache())
    assert np.abs(seen[4][0] - full[0, -1]).max() <= 1e-4  # the last step before the slide
    zero = model.generate(prompt, 0, greedy)
    assert list(zero) == [] and zero.finish == "budget"


def test_prompt_errors(model: Model, heldout: str) -> None:
    ctx = model.info.context
    with pytest.raises(PromptTooLong) as err:
        model.generate(heldout[:20000], 5, greedy)
    assert err.value.context == ctx and err.value.length > ctx
    assert f"context is {ctx} tokens" in str(err.value)
    model.generate(model.text_ids(heldout)[:ctx], 1, greedy)  # exactly the context is fine
    with pytest.raises(PromptError, match="empty"):
        model.generate([], 5, greedy)
    with pytest.raises(PromptError, match="outside the vocabulary"):
        model.generate([1, model.info.vocab_size], 5, greedy)
    with pytest.raises(ValueError, match="outside"):
        list(model.generate("A", 2, lambda row, history: len(row)))


# -- quality -------------------------------------------------------------------------------------


def test_heldout_perplexity_matches_card_and_beats_ngram_baselines(
    model: Model, heldout: str
) -> None:
    meta = json.loads((BUNDLED / "model.json").read_text())
    card = (BUNDLED / "MODEL_CARD.md").read_text()
    m = re.search(r"\| held-out perplexity \| ([0-9.]+) \|", card)
    assert m is not None
    report = held_out_perplexity(model, heldout)
    assert report.tokens > 100_000
    for recorded in (meta["heldout_perplexity"], float(m.group(1))):
        assert abs(report.perplexity - recorded) <= 0.02 * recorded
    assert math.isclose(report.perplexity, math.exp(report.loss))

    # baselines on the same tokenizer, estimated on the training split, scored on the same
    # predicted tokens (every held-out token after the start id; its predecessor is always in
    # the same window, so the bigram sees the same left neighbour the model does)
    v = model.info.vocab_size
    end = model.info.end_id
    train: list[int] = [end]
    for enc in model.tokenizer.encode_batch(read_part("train").split("\f\n")):
        train.extend(enc.ids)
        train.append(end)
    t = np.asarray(train, np.int64)
    h = np.asarray(model.text_ids(heldout), np.int64)
    uni = np.bincount(t, minlength=v).astype(np.float64)
    uni_logp = np.log((uni + 1) / (uni.sum() + v))
    unigram = math.exp(-uni_logp[h[1:]].mean())
    pair_codes, pair_counts = np.unique(t[:-1] * v + t[1:], return_counts=True)
    prev = np.bincount(t[:-1], minlength=v).astype(np.float64)
    codes = h[:-1] * v + h[1:]
    at = np.searchsorted(pair_codes, codes)
    found = (at < len(pair_codes)) & (pair_codes[np.minimum(at, len(pair_codes) - 1)] == codes)
    c = np.where(found, pair_counts[np.minimum(at, len(pair_codes) - 1)], 0)
    bigram = math.exp(-np.log((c + 1) / (prev[h[:-1]] + v)).mean())
    assert len(h) - 1 == report.tokens
    assert report.perplexity < bigram < unigram, (report.perplexity, bigram, unigram)


# -- bad model folders ---------------------------------------------------------------------------


def copy_bundled(tmp_path: Path) -> Path:
    dest = tmp_path / "model"
    dest.mkdir(parents=True)
    for name in ("model.onnx", "tokenizer.json", "model.json"):
        shutil.copy(BUNDLED / name, dest / name)
    return dest


def test_missing_folder_and_files(tmp_path: Path) -> None:
    with pytest.raises(ModelError, match="model folder not found"):
        Model(tmp_path / "nowhere")
    (tmp_path / "file").write_text("x")
    with pytest.raises(ModelError, match="not a directory"):
        Model(tmp_path / "file")
    folder = copy_bundled(tmp_path)
    (folder / "tokenizer.json").unlink()
    (folder / "model.onnx").unlink()
    with pytest.raises(ModelError, match=r"missing model\.onnx, tokenizer\.json"):
        Model(folder)


@pytest.mark.parametrize(
    ("change", "reason"),
    [
        ({"vocab_size": "many"}, "'vocab_size' must be an integer"),
        ({"context": 0}, "'context' must be >= 1"),
        ({"end_id": 10**6}, "end_id 1000000 is outside the vocabulary"),
        ({"n_layer": 7}, "past_kv axis 0 is .*, model.json implies 7|present_kv of a probe"),
        ({"vocab_size": 100}, "tokenizer has .* entries, more than the model's vocab_size 100"),
    ],
)
def test_inconsistent_model_json(tmp_path: Path, change: dict[str, object], reason: str) -> None:
    folder = copy_bundled(tmp_path)
    meta = json.loads((folder / "model.json").read_text())
    meta.update(change)
    (folder / "model.json").write_text(json.dumps(meta))
    with pytest.raises(ModelError, match=reason):
        Model(folder)


def test_broken_files(tmp_path: Path) -> None:
    folder = copy_bundled(tmp_path)
    (folder / "model.json").write_text("{not json")
    with pytest.raises(ModelError, match="not valid JSON"):
        Model(folder)
    folder = copy_bundled(tmp_path / "b")
    (folder / "tokenizer.json").write_text('{"version": "1.0"}')
    with pytest.raises(ModelError, match=r"tokenizer\.json: cannot be loaded"):
        Model(folder)
    folder = copy_bundled(tmp_path / "c")
    (folder / "model.onnx").write_bytes(b"\x00not an onnx model")
    with pytest.raises(ModelError, match=r"model\.onnx: cannot be loaded"):
        Model(folder)


def test_incompatible_onnx_layout(tmp_path: Path) -> None:
    folder = copy_bundled(tmp_path)
    shutil.copy(WRONG_LAYOUT, folder / "model.onnx")
    with pytest.raises(ModelError, match=r"inputs are \['x'\], expected \['past_kv', 'tokens'\]"):
        Model(folder)

"""Run a keepset model folder on CPU: load and validate it, decode with a key/value cache.

A model folder holds ``model.onnx``, ``tokenizer.json`` (Hugging Face ``tokenizers`` format) and
``model.json``; the bundled one is ``service/model/bundled`` and its ``MODEL_CARD.md`` documents
the ONNX layout every folder must follow:

- inputs ``tokens`` int64 ``[batch, seq]`` and ``past_kv`` float32
  ``[n_layer, 2, batch, n_head, past_len, head_dim]`` (keys at index 0, values at 1; ``past_len``
  may be 0);
- outputs ``logits`` float32 ``[batch, seq, vocab]`` and ``present_kv`` float32
  ``[n_layer, 2, batch, n_head, past_len + seq, head_dim]``.

``model.json`` must give ``vocab_size``, ``context``, ``end_id``, ``n_layer``, ``n_head`` and
``head_dim``; optional ``start_id`` (put before text prompts), ``name`` and
``heldout_perplexity``.

Only onnxruntime, tokenizers and numpy are used here; nothing is downloaded.  A :class:`Model` is
safe to share between threads (onnxruntime sessions allow concurrent ``run`` calls; each
generation keeps its own cache).
"""

from __future__ import annotations

import codecs
import json
import math
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any, NamedTuple

import numpy as np
import numpy.typing as npt

BUNDLED = Path(__file__).resolve().parent / "bundled"
REQUIRED_FILES = ("model.onnx", "tokenizer.json", "model.json")
INPUTS = {"tokens": ("tensor(int64)", 2), "past_kv": ("tensor(float)", 6)}
OUTPUTS = {"logits": ("tensor(float)", 3), "present_kv": ("tensor(float)", 6)}

FloatArray = npt.NDArray[np.float32]
StepFn = Callable[[FloatArray, list[int]], int]
"""``step_fn(logits_row, history_ids) -> token_id``: ``logits_row`` is the next-token logits, a
float32 ``[V]`` array of the step's own that nothing else refers to (it may be kept or changed);
``history_ids`` the prompt ids (with the start id, if any) followed by the ids generated so far:
the runner's own list, to be read during the call, not changed (copy it to keep it; a copy on
every step touched every id's object, with the caches cold after the model's call)."""


class ModelError(Exception):
    """A model folder that cannot be used, or a request the model cannot serve."""


class PromptError(ModelError):
    """A prompt the model cannot take (empty, or ids outside the vocabulary)."""


class PromptTooLong(PromptError):
    """A prompt longer than the context window (the HTTP layer answers 413)."""

    def __init__(self, length: int, context: int) -> None:
        super().__init__(f"prompt is {length} tokens; the model's context is {context} tokens")
        self.length = length
        self.context = context


@dataclass(frozen=True)
class ModelInfo:
    folder: Path
    name: str
    vocab_size: int
    context: int
    end_id: int
    start_id: int | None
    n_layer: int
    n_head: int
    head_dim: int
    heldout_perplexity: float | None


class Step(NamedTuple):
    """One generated token and the text it completes (may be empty: bytes held back)."""

    token_id: int
    text: str


class Perplexity(NamedTuple):
    loss: float  # mean negative log-likelihood, nats per predicted token
    perplexity: float
    tokens: int  # number of predicted tokens


def _int_field(meta: dict[str, Any], key: str, lo: int, path: Path) -> int:
    value = meta.get(key)
    if isinstance(value, bool) or not isinstance(value, int):
        raise ModelError(f"{path}: field {key!r} must be an integer, got {value!r}")
    if value < lo:
        raise ModelError(f"{path}: field {key!r} must be >= {lo}, got {value}")
    return value


def read_info(folder: str | Path) -> ModelInfo:
    """Check a folder's files and parse its ``model.json``."""
    folder = Path(folder)
    if not folder.exists():
        raise ModelError(f"model folder not found: {folder}")
    if not folder.is_dir():
        raise ModelError(f"model folder is not a directory: {folder}")
    missing = [f for f in REQUIRED_FILES if not (folder / f).is_file()]
    if missing:
        raise ModelError(f"model folder {folder} is missing {', '.join(missing)}")
    path = folder / "model.json"
    try:
        meta = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as e:
        raise ModelError(f"{path}: not valid JSON ({e})") from e
    if not isinstance(meta, dict):
        raise ModelError(f"{path}: expected a JSON object")
    vocab = _int_field(meta, "vocab_size", 1, path)
    context = _int_field(meta, "context", 1, path)
    end_id = _int_field(meta, "end_id", 0, path)
    start = meta.get("start_id")
    start_id = None if start is None else _int_field(meta, "start_id", 0, path)
    for key, value in (("end_id", end_id), ("start_id", start_id)):
        if value is not None and value >= vocab:
            raise ModelError(f"{path}: {key} {value} is outside the vocabulary of {vocab}")
    ppl = meta.get("heldout_perplexity")
    if ppl is not None and (isinstance(ppl, bool) or not isinstance(ppl, int | float)):
        raise ModelError(f"{path}: field 'heldout_perplexity' must be a number")
    return ModelInfo(
        folder=folder,
        name=str(meta.get("name", folder.name)),
        vocab_size=vocab,
        context=context,
        end_id=end_id,
        start_id=start_id,
        n_layer=_int_field(meta, "n_layer", 1, path),
        n_head=_int_field(meta, "n_head", 1, path),
        head_dim=_int_field(meta, "head_dim", 1, path),
        heldout_perplexity=None if ppl is None else float(ppl),
    )


def _byte_decoder() -> dict[str, int]:
    """The character-to-byte table of byte-level BPE: printable Latin-1 bytes stand for
    themselves, the remaining bytes are numbered from U+0100 upwards in byte order."""
    keep = [*range(0x21, 0x7F), *range(0xA1, 0xAD), *range(0xAE, 0x100)]
    table = {chr(b): b for b in keep}
    extra = 0
    for b in range(256):
        if b not in table.values():
            table[chr(0x100 + extra)] = b
            extra += 1
    return table


def _whole_text(data: bytes) -> str | None:
    try:
        return data.decode("utf-8")
    except UnicodeDecodeError:
        return None


class _Detokenizer:
    """Turns ids into text incrementally without ever splitting a UTF-8 character.

    For byte-level tokenizers each id maps to its exact bytes and an incremental UTF-8 decoder
    holds back an incomplete character until its remaining bytes arrive.  For other tokenizers the
    generated ids are decoded as a whole and only the new, settled suffix is released (a trailing
    U+FFFD, the mark of an incomplete character, is held back until the next id).
    """

    def __init__(self, model: Model) -> None:
        self._model = model
        self._utf8 = codecs.getincrementaldecoder("utf-8")(errors="replace")
        self._ids: list[int] = []
        self._released = 0

    def push(self, token_id: int) -> str:
        table = self._model._token_bytes
        if table is not None:
            # Most ids are whole UTF-8 text: with nothing held back, that text is what the
            # decoder would give (its buffer is the bytes it holds back).
            whole = self._model._token_texts[token_id]
            if whole is not None and not self._utf8.buffer:
                return whole
            return self._utf8.decode(table[token_id] if token_id < len(table) else b"")
        self._ids.append(token_id)
        text = self._model.decode(self._ids)
        settled = len(text.rstrip("\ufffd"))
        piece = text[self._released : settled] if settled > self._released else ""
        self._released = max(self._released, settled)
        return piece

    def flush(self) -> str:
        if self._model._token_bytes is not None:
            return self._utf8.decode(b"", final=True)
        text = self._model.decode(self._ids)
        piece = text[self._released :]
        self._released = len(text)
        return piece


class Continuation:
    """Iterator of :class:`Step` for one generation; see :meth:`Model.generate`.

    After the iteration ends, :attr:`finish` is ``"budget"``, ``"end"`` or ``"stop"``; it stays
    ``None`` if the caller stopped iterating first.  :attr:`tokens` and :attr:`text` hold what was
    yielded so far.
    """

    def __init__(self, prompt_ids: list[int]) -> None:
        self._steps: Iterator[Step] = iter(())
        self.prompt_ids = prompt_ids
        self.tokens: list[int] = []
        self.pieces: list[str] = []
        self.finish: str | None = None

    @property
    def text(self) -> str:
        return "".join(self.pieces)

    def __iter__(self) -> Iterator[Step]:
        return self._steps  # the generator itself, which keeps tokens and pieces

    def __next__(self) -> Step:
        return next(self._steps)

    def close(self) -> None:
        close = getattr(self._steps, "close", None)
        if close is not None:
            close()


class Model:
    """A loaded model folder.  ``threads`` sets onnxruntime's intra-op threads (None: its
    default, one per core)."""

    def __init__(self, folder: str | Path = BUNDLED, *, threads: int | None = None) -> None:
        import onnxruntime as ort
        from tokenizers import Tokenizer

        self.info = info = read_info(folder)
        if threads is not None and threads < 0:
            raise ValueError("threads must be >= 0")
        try:
            self.tokenizer = Tokenizer.from_file(str(info.folder / "tokenizer.json"))
        except Exception as e:  # the library raises a bare Exception on bad files
            raise ModelError(f"{info.folder / 'tokenizer.json'}: cannot be loaded ({e})") from e
        if self.tokenizer.get_vocab_size(with_added_tokens=True) > info.vocab_size:
            raise ModelError(
                f"{info.folder}: tokenizer has {self.tokenizer.get_vocab_size()} entries, "
                f"more than the model's vocab_size {info.vocab_size}"
            )
        opts = ort.SessionOptions()
        opts.intra_op_num_threads = threads or 0
        opts.inter_op_num_threads = 1
        opts.log_severity_level = 3
        try:
            self.session = ort.InferenceSession(
                str(info.folder / "model.onnx"), opts, providers=["CPUExecutionProvider"]
            )
        except Exception as e:  # onnxruntime raises its own exception types
            raise ModelError(f"{info.folder / 'model.onnx'}: cannot be loaded ({e})") from e
        self._check_layout()
        self._token_bytes = self._byte_table()
        # Each id's bytes as text when they are whole UTF-8 on their own, else None.
        self._token_texts = [_whole_text(b) for b in self._token_bytes or ()]

    # -- validation --------------------------------------------------------------------------

    def _check_layout(self) -> None:
        info = self.info
        where = info.folder / "model.onnx"
        for kind, found, wanted in (
            ("input", self.session.get_inputs(), INPUTS),
            ("output", self.session.get_outputs(), OUTPUTS),
        ):
            names = {t.name: t for t in found}
            if set(names) != set(wanted):
                raise ModelError(
                    f"{where}: {kind}s are {sorted(names)}, expected {sorted(wanted)} "
                    "(see the ONNX layout in the model card)"
                )
            for name, (dtype, rank) in wanted.items():
                t = names[name]
                if t.type != dtype or len(t.shape) != rank:
                    raise ModelError(
                        f"{where}: {kind} {name!r} is {t.type} of rank {len(t.shape)}, "
                        f"expected {dtype} of rank {rank}"
                    )
        kv = (info.n_layer, 2, None, info.n_head, None, info.head_dim)
        tensors = {t.name: t for t in [*self.session.get_inputs(), *self.session.get_outputs()]}
        for name in ("past_kv", "present_kv"):
            for axis, (have, need) in enumerate(zip(tensors[name].shape, kv, strict=True)):
                if need is not None and isinstance(have, int) and have != need:
                    raise ModelError(
                        f"{where}: {name} axis {axis} is {have}, model.json implies {need}"
                    )
        try:
            logits, present = self.forward(np.array([[info.end_id]], np.int64), self.empty_cache())
        except Exception as e:
            raise ModelError(f"{where}: a one-token probe run failed ({e})") from e
        if logits.shape != (1, 1, info.vocab_size):
            raise ModelError(
                f"{where}: logits of a one-token probe have shape {logits.shape}, "
                f"expected (1, 1, {info.vocab_size}) from model.json"
            )
        cache = (info.n_layer, 2, 1, info.n_head, 1, info.head_dim)
        if present.shape != cache:
            raise ModelError(f"{where}: present_kv of a probe is {present.shape}, expected {cache}")

    def _byte_table(self) -> list[bytes] | None:
        spec = json.loads(self.tokenizer.to_str())
        decoder = spec.get("decoder") or {}
        if decoder.get("type") != "ByteLevel":
            return None
        chars = _byte_decoder()
        special = {t["id"] for t in spec.get("added_tokens", []) if t.get("special")}
        table = [b""] * self.info.vocab_size
        for token, i in self.tokenizer.get_vocab(with_added_tokens=True).items():
            if i in special or i >= len(table):
                continue
            if all(c in chars for c in token):
                table[i] = bytes(chars[c] for c in token)
            else:  # an added plain-text token
                table[i] = token.encode("utf-8")
        return table

    # -- basics ------------------------------------------------------------------------------

    def encode(self, text: str) -> list[int]:
        return list(self.tokenizer.encode(text, add_special_tokens=False).ids)

    def decode(self, ids: Sequence[int]) -> str:
        return str(self.tokenizer.decode(list(ids), skip_special_tokens=True))

    def empty_cache(self, batch: int = 1) -> FloatArray:
        i = self.info
        return np.zeros((i.n_layer, 2, batch, i.n_head, 0, i.head_dim), np.float32)

    def forward(
        self, tokens: npt.NDArray[np.int64], past: FloatArray
    ) -> tuple[FloatArray, FloatArray]:
        """One onnxruntime call: ``tokens [B, T]``, cache ``[L, 2, B, H, P, D]`` ->
        ``(logits [B, T, V], present [L, 2, B, H, P + T, D])``."""
        logits, present = self.session.run(None, {"tokens": tokens, "past_kv": past})
        return logits, present

    def text_ids(self, text: str) -> list[int]:
        """The ids of a text prompt: the start id (if the model has one), then its tokens."""
        ids = self.encode(text)
        return ids if self.info.start_id is None else [self.info.start_id, *ids]

    def prompt_ids(self, prompt: str | Sequence[int]) -> list[int]:
        """Checked prompt ids (text via :meth:`text_ids`); raises :class:`PromptError`."""
        if isinstance(prompt, str):
            ids = self.text_ids(prompt)
        else:
            ids = [int(t) for t in prompt]
            bad = [t for t in ids if not 0 <= t < self.info.vocab_size]
            if bad:
                raise PromptError(
                    f"prompt ids {bad[:5]} are outside the vocabulary of {self.info.vocab_size}"
                )
        if not ids:
            raise PromptError("the prompt is empty and the model has no start id")
        if len(ids) > self.info.context:
            raise PromptTooLong(len(ids), self.info.context)
        return ids

    # -- decoding ----------------------------------------------------------------------------

    def generate(
        self,
        prompt: str | Sequence[int],
        budget: int,
        step_fn: StepFn,
        *,
        stop: Sequence[str] = (),
        end_id: int | None = -1,
    ) -> Continuation:
        """Continue ``prompt`` one token at a time with the key/value cache.

        ``prompt`` is text (encoded, with the model's start id put first) or token ids.  At most
        ``budget`` tokens are generated; each comes from ``step_fn(logits_row, history_ids)`` (see
        :data:`StepFn`), which is where the caller's decoding policy lives.  The result is an
        iterator of :class:`Step` ``(token_id, text_piece)``: pieces join to the continuation's
        text, never split a UTF-8 character and may be empty while bytes or a possible stop text
        are held back; the caller may stop iterating at any time.  Generation ends with
        ``finish`` = ``"end"`` when ``end_id`` (default: the model's end id; ``None``: never) is
        chosen (that step is yielded, with no text of its own), ``"stop"`` when the text contains
        one of ``stop`` (the text is cut before it), or ``"budget"``.

        Raises :class:`PromptTooLong` (before any model call) for a prompt longer than the
        context window — the HTTP layer maps it to 413 — and :class:`PromptError` for an empty
        prompt or ids outside the vocabulary.  A continuation that fills the context slides: the
        cache is rebuilt from the last three quarters of the window and decoding goes on.
        """
        if budget < 0:
            raise ValueError("budget must be >= 0")
        ids = self.prompt_ids(prompt)
        stops = [s for s in stop if s]
        end = self.info.end_id if end_id == -1 else end_id
        cont = Continuation(ids)
        cont._steps = self._steps(cont, budget, step_fn, stops, end)
        return cont

    def _steps(
        self, cont: Continuation, budget: int, step_fn: StepFn, stops: list[str], end: int | None
    ) -> Iterator[Step]:
        ids = cont.prompt_ids
        context = self.info.context
        history = list(ids)
        detok = _Detokenizer(self)
        pending = ""  # released by the detokenizer, held back as a possible start of a stop text
        tokens, pieces = cont.tokens, cont.pieces
        logits, past = self.forward(np.asarray([history], np.int64), self.empty_cache())
        for n in range(budget):
            if n > 0:
                if past.shape[4] >= context:
                    window = history[-max(1, context - context // 4) :]
                    logits, past = self.forward(np.asarray([window], np.int64), self.empty_cache())
                else:
                    last = np.asarray([[history[-1]]], np.int64)
                    logits, past = self.forward(last, past)
            # onnxruntime makes new output arrays on every call, so a one-token step's row is
            # already the caller's own; a prompt's last row is copied out of its [T, V] block.
            row = logits[0, -1] if logits.shape[1] == 1 else logits[0, -1].copy()
            token = step_fn(row, history)
            if type(token) is not int:  # one check for the usual plain int
                if isinstance(token, bool) or not isinstance(token, int | np.integer):
                    raise TypeError(f"step_fn returned {token!r}, expected a token id")
                token = int(token)
            if not 0 <= token < row.shape[0]:
                raise ValueError(f"step_fn returned id {token}, outside 0..{row.shape[0] - 1}")
            history.append(token)
            done = False
            if token == end:
                cont.finish, done = "end", True
                piece = pending + detok.flush()
            else:
                pending += detok.push(token)
                last_step = n == budget - 1
                if last_step:
                    pending += detok.flush()
                    cont.finish = "budget"
                if not stops:
                    piece, pending = pending, ""
                else:
                    hits = [i for i in (pending.find(s) for s in stops) if i >= 0]
                    if hits:
                        cont.finish, done = "stop", True
                        piece = pending[: min(hits)]
                    else:
                        hold = 0 if last_step else _held_back(pending, stops)
                        cut = len(pending) - hold
                        piece, pending = pending[:cut], pending[cut:]
            # Kept here rather than by Continuation.__next__: a caller iterates this generator
            # itself, one Python frame fewer a step.
            tokens.append(token)
            pieces.append(piece)
            yield Step(token, piece)
            if done:
                return
        cont.finish = "budget"


def _held_back(text: str, stops: list[str]) -> int:
    """Length of the longest suffix of ``text`` that is a proper prefix of a stop text."""
    best = 0
    for s in stops:
        for k in range(min(len(s) - 1, len(text)), best, -1):
            if text.endswith(s[:k]):
                best = k
                break
    return best


def load(folder: str | Path = BUNDLED, *, threads: int | None = None) -> Model:
    return Model(folder, threads=threads)


def held_out_perplexity(
    folder: str | Path | Model, text: str, *, threads: int | None = None, batch: int = 8
) -> Perplexity:
    """Perplexity of ``text`` under the model, measured with onnxruntime.

    The text is tokenized as the start id (if any) followed by its tokens, cut into consecutive
    non-overlapping windows of ``context`` predicted tokens (window ``j`` covers ids
    ``j*C .. j*C + C``), and each token after the first of its window is predicted from the
    earlier ones in that window.  Returns the mean negative log-likelihood, its exponential and
    the number of predicted tokens.
    """
    model = folder if isinstance(folder, Model) else Model(folder, threads=threads)
    ids = np.asarray(model.text_ids(text), np.int64)
    ctx = model.info.context
    if len(ids) < 2:
        raise PromptError("text too short to measure (needs at least one predicted token)")
    windows = [ids[j : j + ctx + 1] for j in range(0, len(ids) - 1, ctx)]
    total, count = 0.0, 0
    i = 0
    while i < len(windows):
        group = [w for w in windows[i : i + batch] if len(w) == len(windows[i])]
        i += len(group)
        w = np.stack(group)
        logits, _ = model.forward(np.ascontiguousarray(w[:, :-1]), model.empty_cache(len(group)))
        x = logits.astype(np.float64)
        top = x.max(axis=-1, keepdims=True)
        logz = np.log(np.exp(x - top).sum(axis=-1)) + top[..., 0]
        target = np.take_along_axis(x, w[:, 1:, None], axis=-1)[..., 0]
        total += float((logz - target).sum())
        count += int(target.size)
    loss = total / count
    return Perplexity(loss=loss, perplexity=math.exp(loss), tokens=count)

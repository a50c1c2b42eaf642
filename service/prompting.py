"""The prompt path: continue a prompt with the model, one policy pick per generated token.

This module owns the glue between the model runner (``service.model``) and the sampling core:
every step's next-token logits go through the policy's chain with the step's own random stream
(derived from ``(seed, t)``), the prompt and the tokens generated so far are the history the
penalties see, and each step's diagnostics are kept for the response and the metrics. No web or
metrics imports live here; the HTTP layer streams or collects what :class:`PromptRun` yields.
"""

from __future__ import annotations

import threading
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from service.model import Continuation, Model
from service.sampling import Chain, Kernel, StepPick, StepPicker, fresh_seed


class Cancelled(Exception):
    """The caller asked the run to stop (its client went away); no further step is taken."""


@dataclass(slots=True)
class StepRecord:
    """One generated token: its text piece and the per-step diagnostics of DESIGN.md §1. Not
    changed once made; not frozen, because a frozen dataclass takes three times as long to
    make (1.2 µs against 0.4, on every step). The answers are its fields, as orjson writes a
    dataclass."""

    token: int
    text: str
    prob: float
    logprob: float
    entropy: float
    kept: int
    kept_mass: float
    fallback: str | None


class PromptRun:
    """Iterator of :class:`StepRecord` for one continuation under one chain.

    The model runs only while the caller iterates, so a caller that stops iterating (a client
    that went away) stops the work; a caller that iterates in another thread can set
    ``cancel`` instead, and the next step raises :class:`Cancelled`. After the last step,
    :attr:`finish` is ``"budget"``, ``"end"`` or ``"stop"``; :attr:`records` holds every step
    yielded so far, and :attr:`logits` the raw logits rows of those steps when ``keep_logits``
    was asked for (the shadow policies are evaluated on them afterwards).
    """

    def __init__(
        self,
        model: Model,
        chain: Chain,
        prompt: str,
        *,
        budget: int,
        seed: int | None = None,
        stop: Sequence[str] = (),
        keep_logits: bool = False,
        cancel: threading.Event | None = None,
        kernel: Kernel | None = None,
    ) -> None:
        self.seed = fresh_seed() if seed is None else seed
        self.cancel = cancel
        self.chain = chain
        self.kernel = kernel
        self.records: list[StepRecord] = []
        self.histories: list[list[int]] = []
        self.logits: list[npt.NDArray[np.float32]] | None = [] if keep_logits else None
        self._last: StepPick | None = None  # the pick of the step the model is taking
        # The start marker put before text prompts is not something the penalties should see.
        self._skip = 0 if model.info.start_id is None else 1
        # The chain and seed are checked once here; every step's row and history come from
        # the model, so each pick need not check them again.
        self._pick = StepPicker(chain, model.info.vocab_size, self.seed, kernel=kernel)
        # Raises PromptTooLong / PromptError before any model call.
        self._continuation: Continuation = model.generate(prompt, budget, self._step, stop=stop)
        self._steps = iter(self._continuation)
        # The ids the penalties see, kept as the kernel reads them (the model's list converted
        # on every step cost a prompt step more than the penalty itself): the prompt after its
        # start marker, then every token picked.
        seen = self._continuation.prompt_ids[self._skip :]
        self._seen = np.empty(len(seen) + budget, np.int64)
        self._seen[: len(seen)] = seen
        self._filled = self._prompt_seen = len(seen)

    def _step(self, row: npt.NDArray[np.float32], history: list[int]) -> int:
        if self.cancel is not None and self.cancel.is_set():
            raise Cancelled
        n = self._filled
        assert len(history) - self._skip == n, "the model's history is the prompt and the picks"
        row.flags.writeable = False  # the run's own row (see StepFn), read-only from here on
        out = self._pick(row, self._seen[:n], n - self._prompt_seen)
        self._seen[n] = out.token
        self._filled = n + 1
        self._last = out
        if self.logits is not None:
            self.logits.append(row)
            self.histories.append(history[self._skip :])
        return out.token

    @property
    def prompt_tokens(self) -> int:
        return len(self._continuation.prompt_ids)

    @property
    def finish(self) -> str | None:
        return self._continuation.finish

    @property
    def tokens(self) -> list[int]:
        return [r.token for r in self.records]

    @property
    def text(self) -> str:
        return "".join(r.text for r in self.records)

    def __iter__(self) -> PromptRun:
        return self

    def __next__(self) -> StepRecord:
        token, text = next(self._steps)  # each step follows one _step call
        out = self._last
        assert out is not None and out.token == token
        record = StepRecord(
            token, text, out.prob, out.logprob, out.entropy, out.kept, out.kept_mass, out.fallback
        )
        self.records.append(record)
        return record

    def close(self) -> None:
        self._continuation.close()

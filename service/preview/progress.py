"""A plain-text progress bar on stderr for long command-line runs (no dependency).

It redraws one line with ``\\r`` and is silent unless enabled: the CLI enables it when stderr is
a terminal or ``--progress`` asks for it, so logs and pipes stay clean.
"""

from __future__ import annotations

import sys
import time
from typing import TextIO

_WIDTH = 30
# Redraw at most this often: a bar that repaints on every row costs more than the rows.
_MIN_INTERVAL = 0.1


class Progress:
    """``start(label, total)`` a phase, ``update(done)`` within it, ``finish()`` at its end."""

    def __init__(self, enabled: bool, stream: TextIO | None = None) -> None:
        self.enabled = enabled
        self.stream = stream if stream is not None else sys.stderr
        self.label = ""
        self.total = 0
        self._last = 0.0
        self._shown = -1

    def start(self, label: str, total: int) -> None:
        self.label, self.total = label, max(total, 0)
        self._last = 0.0
        self._shown = -1
        self.update(0)

    def update(self, done: int) -> None:
        if not self.enabled:
            return
        now = time.monotonic()
        if done == self._shown or (done < self.total and now - self._last < _MIN_INTERVAL):
            return
        self._last, self._shown = now, done
        self.stream.write("\r" + bar_line(self.label, done, self.total))
        self.stream.flush()

    def finish(self) -> None:
        if self.enabled:
            self.update(self.total)
            self.stream.write("\n")
            self.stream.flush()


def bar_line(label: str, done: int, total: int) -> str:
    """``label [#####-----]  50% 5/10``."""
    share = 1.0 if total <= 0 else min(max(done / total, 0.0), 1.0)
    filled = round(share * _WIDTH)
    return f"{label} [{'#' * filled}{'-' * (_WIDTH - filled)}] {share:4.0%} {done}/{total}"

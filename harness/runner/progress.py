"""A small progress line on stderr for long work.

On a terminal the line is redrawn in place; otherwise (logs, CI) a line is printed at
every tenth of the work, so long runs still show they are alive.
"""

from __future__ import annotations

import sys
import time
from typing import TextIO


class Progress:
    """``with Progress("simulating", total) as p: p.update(done, note)``."""

    def __init__(self, label: str, total: float, *, stream: TextIO | None = None, enabled: bool = True):
        self.label = label
        self.total = max(float(total), 1e-300)
        self.stream = stream if stream is not None else sys.stderr
        self.enabled = enabled
        self.interactive = enabled and getattr(self.stream, "isatty", lambda: False)()
        self.started = time.perf_counter()
        self._last_tenth = -1

    def __enter__(self) -> Progress:
        return self

    def __exit__(self, *exc: object) -> None:
        if self.interactive:
            self.stream.write("\n")
            self.stream.flush()

    def update(self, done: float, note: str = "") -> None:
        if not self.enabled:
            return
        if done <= 0 and self._last_tenth < 0:
            self.started = time.perf_counter()  # time the work, not the set-up before it
        fraction = min(max(done / self.total, 0.0), 1.0)
        elapsed = time.perf_counter() - self.started
        eta = elapsed * (1 - fraction) / fraction if fraction > 0 else float("nan")
        width = 28
        filled = int(round(fraction * width))
        bar = "=" * filled + "." * (width - filled)
        text = f"{self.label:<11} |{bar}| {100 * fraction:5.1f}%  {note}  {elapsed:6.1f}s elapsed"
        if fraction < 1 and eta == eta:
            text += f", ~{eta:.0f}s left"
        if self.interactive:
            self.stream.write("\r" + text.ljust(100))
            self.stream.flush()
        else:
            tenth = int(fraction * 10)
            if tenth > self._last_tenth:
                self._last_tenth = tenth
                self.stream.write(text + "\n")
                self.stream.flush()

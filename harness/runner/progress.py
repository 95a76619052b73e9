"""A small progress line on stderr for long work.

On a terminal the line is redrawn in place; otherwise (logs, CI) a line is printed at
every tenth of the work, so long runs still show they are alive. One line can follow
several phases in turn (:meth:`Progress.restart`): a run's simulation, then its theory.
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
        self._drawn = False  # a line is open on the terminal
        self._first: tuple[float, float] | None = None  # time and fraction of the first report

    def __enter__(self) -> Progress:
        return self

    def __exit__(self, *exc: object) -> None:
        self._close_line()

    def _close_line(self) -> None:
        if self.interactive and self._drawn:
            self.stream.write("\n")
            self.stream.flush()
        self._drawn = False

    def restart(self, label: str, total: float) -> None:
        """Follow the next phase of the work from zero: the current line is ended, a new one begins."""
        self._close_line()
        self.label = label
        self.total = max(float(total), 1e-300)
        self.started = time.perf_counter()
        self._last_tenth = -1
        self._first = None

    def update(self, done: float, note: str = "") -> None:
        if not self.enabled:
            return
        if done <= 0 and self._last_tenth < 0:
            self.started = time.perf_counter()  # time the work, not the set-up before it
        fraction = min(max(done / self.total, 0.0), 1.0)
        now = time.perf_counter()
        elapsed = now - self.started
        # the rate since the first report, so that set-up before it (compiling) does not count
        if self._first is None:
            self._first = (now, fraction)
        since, at = self._first
        eta = (now - since) * (1 - fraction) / (fraction - at) if fraction > at else float("nan")
        width = 28
        filled = int(round(fraction * width))
        bar = "=" * filled + "." * (width - filled)
        text = f"{self.label:<11} |{bar}| {100 * fraction:5.1f}%  {note}  {elapsed:6.1f}s elapsed"
        if fraction < 1 and eta == eta:
            text += f", ~{eta:.0f}s left"
        if self.interactive:
            self.stream.write("\r" + text.ljust(100))
            self.stream.flush()
            self._drawn = True
        else:
            tenth = int(fraction * 10)
            if tenth > self._last_tenth:
                self._last_tenth = tenth
                self.stream.write(text + "\n")
                self.stream.flush()

"""How much of a stretch of work was JAX tracing and compiling rather than computing.

A run reports the theory's cost next to the simulation's, and both apart from the one-off
cost of turning Python into XLA programs (tracing, lowering to MLIR, backend compilation),
which a persistent compilation cache or a second run at the same shapes does not pay
again. The simulator compiles ahead of time, so its split is direct; a theory may be any
Python function (``theory.source``) that compiles on first call, so its split is measured:
JAX reports the start and end of every trace, lowering and compilation through
:mod:`jax.monitoring`, and :class:`CompileClock` adds up the time covered by those spans
inside its ``with`` block. Spans nest (tracing an outer function traces the inner ones it
calls), so the clock measures their union, not their sum.
"""

from __future__ import annotations

import threading
import time

import jax.monitoring

# The three stages of getting a program ready, as jax._src.dispatch names them.
_COMPILE_EVENTS = (
    "/jax/core/compile/jaxpr_trace_duration",
    "/jax/core/compile/jaxpr_to_mlir_module_duration",
    "/jax/core/compile/backend_compile_duration",
)


class CompileClock:
    """Context manager: ``total_s`` (wall time of the block) and ``compile_s`` (the part of it JAX spent compiling).

    >>> with CompileClock() as clock:
    ...     result = some_function_that_jits()
    >>> clock.total_s - clock.compile_s  # the computation itself
    """

    def __init__(self) -> None:
        self._spans: list[tuple[float, float]] = []
        self._lock = threading.Lock()
        self.total_s = 0.0
        self.compile_s = 0.0

    def _listen(self, event: str, start: float, end: float, **_: object) -> None:
        if event in _COMPILE_EVENTS:
            with self._lock:
                self._spans.append((start, end))

    def __enter__(self) -> CompileClock:
        self._spans.clear()
        self._started_wall = time.time()  # the clock JAX's spans use
        self._started = time.perf_counter()
        jax.monitoring.register_event_time_span_listener(self._listen)
        return self

    def __exit__(self, *exc: object) -> None:
        jax.monitoring.unregister_event_time_span_listener(self._listen)
        self.total_s = time.perf_counter() - self._started
        self.compile_s = min(_union_length(self._spans, self._started_wall), self.total_s)


def _union_length(spans: list[tuple[float, float]], since: float) -> float:
    """Length of the union of the intervals ``spans``, each clipped to start no earlier than ``since``."""
    covered, reach = 0.0, since
    for start, end in sorted(spans):
        start = max(start, reach)
        if end > start:
            covered += end - start
            reach = end
    return covered

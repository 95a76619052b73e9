"""Ctrl-C during long work: honoured within about two seconds, and nothing half-written.

Python turns SIGINT into ``KeyboardInterrupt`` only between bytecodes of the main thread.
A compiled XLA call (compiling a program, a block of simulation, a theory's solve) holds the
main thread in C++ until it returns, so a Ctrl-C used to wait for the whole call (27 s
during a theory's solve). Three pieces answer that:

* **Short calls.** Long computations return to Python often: the simulation advances in
  slices of a fraction of a second (harness.runner.experiment), the theories solve in pieces
  of a few steps (harness.equations.ode_solve). ``KeyboardInterrupt`` then arrives within a
  slice's time, and the code that catches it saves what is finished.
* :func:`deferred` keeps ``KeyboardInterrupt`` out of the few lines that replace a state by
  its successor (the simulator donates the old state's buffers, so an interrupt between the
  call and the assignment would lose both); it is raised right after them.
* :func:`guard`, a watchdog for the rest (a compilation, a long draw): a thread that hears the
  signal at once, through :func:`signal.set_wakeup_fd` (the C-level handler writes a byte
  even while the main thread is blocked), and, when the process has not ended ``grace_s``
  after the signal, prints the one-line message and ends the process with exit status 130
  (``os._exit``). It first lets a write in progress finish (:func:`writing`, which
  harness.core.files marks around every atomic write), so nothing is left half-written; the
  previous checkpoint, if any, stays as it was.

Exactly one line is printed whichever path ends the process (:func:`report`).
"""

from __future__ import annotations

import os
import signal
import socket
import sys
import threading
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager

EXIT_STATUS = 130
"""Exit status of an interrupted command (128 + SIGINT, as shells report it)."""
GRACE_S = 1.5
"""Seconds the main thread has, after a Ctrl-C, to stop by itself before the watchdog ends the process."""
LONGEST_WRITE_S = 60.0
"""The watchdog waits at most this long for a write in progress (then ends the process anyway)."""

_report_lock = threading.Lock()
_reported = False
_writes = threading.Condition()
_writes_in_progress = 0


def report(message: str, *, fresh_line: bool = False) -> bool:
    """Print the interrupt's one-line message on stderr, once per process; False if it was printed already."""
    global _reported
    with _report_lock:
        if _reported:
            return False
        _reported = True
        stream = sys.stderr
        if fresh_line and getattr(stream, "isatty", lambda: False)():
            stream.write("\n")  # a progress line may be open on a terminal
        stream.write(message.rstrip("\n") + "\n")
        stream.flush()
        return True


@contextmanager
def writing() -> Iterator[None]:
    """Mark a write in progress: the watchdog does not end the process until it is over."""
    global _writes_in_progress
    with _writes:
        _writes_in_progress += 1
    try:
        yield
    finally:
        with _writes:
            _writes_in_progress -= 1
            _writes.notify_all()


def _in_main_thread() -> bool:
    return threading.current_thread() is threading.main_thread()


@contextmanager
def deferred() -> Iterator[None]:
    """Hold a Ctrl-C that arrives inside the block until the block is over, then deliver it.

    Only in the main thread (signal handlers live there); elsewhere, and where SIGINT is
    ignored or handled by someone else's handler that is not Python's default, the block runs
    unchanged. Cost: two ``signal.signal`` calls.
    """
    previous = signal.getsignal(signal.SIGINT) if _in_main_thread() else None
    if previous is not signal.default_int_handler:
        yield
        return
    pending: list[int] = []
    signal.signal(signal.SIGINT, lambda signum, frame: pending.append(signum))
    try:
        yield
    finally:
        signal.signal(signal.SIGINT, previous)
        if pending:
            raise KeyboardInterrupt


def _wait_for_writes(until: float) -> None:
    with _writes:
        while _writes_in_progress > 0 and time.monotonic() < until:
            _writes.wait(timeout=0.05)


def _watch(receiver: socket.socket, message: Callable[[], str], grace_s: float) -> None:
    while True:
        try:
            data = receiver.recv(64)
        except OSError:
            return
        if not data:  # the guard was closed
            return
        if signal.SIGINT in data:
            break
    time.sleep(grace_s)
    _wait_for_writes(time.monotonic() + LONGEST_WRITE_S)
    try:
        report(message(), fresh_line=True)
    finally:
        os._exit(EXIT_STATUS)


@contextmanager
def guard(message: Callable[[], str], *, grace_s: float = GRACE_S) -> Iterator[None]:
    """Within the block, a Ctrl-C ends the process within ``grace_s`` seconds even if the main thread is stuck.

    ``message()`` gives the one line printed when the watchdog has to end the process; the
    main thread, when it stops by itself, prints its own through :func:`report`. After an
    interrupt the watchdog stays armed until the process ends, so a slow exit is cut short
    too. Main thread only (elsewhere the block runs unguarded).
    """
    if not _in_main_thread() or signal.getsignal(signal.SIGINT) is signal.SIG_IGN:
        yield
        return
    receiver, sender = socket.socketpair()
    sender.setblocking(False)
    try:
        previous_fd = signal.set_wakeup_fd(sender.fileno(), warn_on_full_buffer=False)
    except ValueError:  # not the main interpreter
        receiver.close()
        sender.close()
        yield
        return
    watchdog = threading.Thread(target=_watch, args=(receiver, message, grace_s), name="harness-interrupt", daemon=True)
    watchdog.start()
    interrupted = False
    try:
        yield
    except KeyboardInterrupt:
        interrupted = True
        raise
    finally:
        if not interrupted:
            signal.set_wakeup_fd(previous_fd)
            sender.close()  # the watchdog's recv returns b"" and it ends
            watchdog.join(timeout=1.0)
            receiver.close()


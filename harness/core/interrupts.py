"""Ctrl-C during long work: honoured within about a second, and nothing half-written.

Python turns SIGINT into ``KeyboardInterrupt`` only between bytecodes of the main thread.
A compiled XLA call (compiling a program, a block of simulation, a theory's solve) holds the
main thread in C++ until it returns, so a Ctrl-C used to wait for the whole call (27 s
during a theory's solve); and a ``KeyboardInterrupt`` raised inside a garbage-collector
callback (JAX registers one) is printed and dropped, so a Ctrl-C while JAX is imported could
be lost altogether. Three pieces answer that:

* **Short calls.** Long computations return to Python often: the simulation advances in
  slices of a fraction of a second (harness.runner.experiment), the theories solve in pieces
  of a few steps (harness.equations.ode_solve). ``KeyboardInterrupt`` then arrives within a
  slice's time, and the code that catches it saves what is finished.
* :func:`deferred` keeps ``KeyboardInterrupt`` out of the few lines that replace a state by
  its successor (the simulator donates the old state's buffers, so an interrupt between the
  call and the assignment would lose both); it is raised right after them.
* :func:`guard`, around a whole command: its SIGINT handler notes the interrupt before
  raising ``KeyboardInterrupt``, and a watchdog thread hears the signal at once, through
  :func:`signal.set_wakeup_fd` (the C-level handler writes a byte even while the main thread
  is blocked). When the process has not ended :data:`GRACE_S` after the signal, the watchdog
  prints the one-line message and ends the process with exit status 130 (``os._exit``),
  first letting a write in progress finish (:func:`writing`, which harness.core.files marks
  around every atomic write), so nothing is left half-written; the previous checkpoint, if
  any, stays as it was. An exception that ends the command after an interrupt (an import
  that failed because it was interrupted) is reported as the interrupt, not as an error.

Exactly one line is printed whichever path ends the process (:func:`report`).
"""

from __future__ import annotations

import os
import signal
import sys
import threading
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager

EXIT_STATUS = 130
"""Exit status of an interrupted command (128 + SIGINT, as shells report it)."""
GRACE_S = 1.0
"""Seconds the main thread has, after a Ctrl-C, to stop by itself before the watchdog ends the process."""
LONGEST_WRITE_S = 60.0
"""The watchdog waits at most this long for a write in progress (then ends the process anyway)."""
MESSAGE = "harness: interrupted; nothing half-written was left behind"
"""The line an interrupted command prints when it has nothing more specific to say."""

_interrupted = threading.Event()
_messages: list[Callable[[], str]] = []  # the innermost guard's message comes last
_armed: list[int] = []  # the watchdog's pipe, open while it is on
_report_lock = threading.Lock()
_reported = False
_writes = threading.Condition()
_writes_in_progress = 0


def report(message: str | None = None, *, fresh_line: bool = False) -> bool:
    """Print the interrupt's one-line message on stderr, once per process; False if it was printed already.

    ``message`` defaults to the innermost :func:`guard`'s message.
    """
    global _reported
    with _report_lock:
        if _reported:
            return False
        _reported = True
        text = message if message is not None else current_message()
        stream = sys.stderr
        if fresh_line and getattr(stream, "isatty", lambda: False)():
            stream.write("\n")  # a progress line may be open on a terminal
        stream.write(text.rstrip("\n") + "\n")
        stream.flush()
        return True


def current_message() -> str:
    """The message of the innermost :func:`guard` (the generic one outside any)."""
    try:
        return _messages[-1]() if _messages else MESSAGE
    except Exception:  # a message must never hide the interrupt
        return MESSAGE


def interrupted() -> bool:
    """True once a Ctrl-C reached a guarded command."""
    return _interrupted.is_set()


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


def _on_sigint(signum: int, frame: object) -> None:
    _interrupted.set()
    raise KeyboardInterrupt


@contextmanager
def deferred() -> Iterator[None]:
    """Hold a Ctrl-C that arrives inside the block until the block is over, then deliver it.

    Only in the main thread (signal handlers live there) and only where Ctrl-C raises
    ``KeyboardInterrupt`` (Python's handler or :func:`guard`'s); elsewhere the block runs
    unchanged. Cost: two ``signal.signal`` calls.
    """
    previous = signal.getsignal(signal.SIGINT) if _in_main_thread() else None
    if previous is not signal.default_int_handler and previous is not _on_sigint:
        yield
        return
    pending: list[int] = []
    signal.signal(signal.SIGINT, lambda signum, frame: pending.append(signum))
    try:
        yield
    finally:
        signal.signal(signal.SIGINT, previous)
        if pending:
            previous(signal.SIGINT, None)


@contextmanager
def uninterrupted() -> Iterator[None]:
    """A step that must be done whole (storing a run: its folder, then its index row): Ctrl-C waits for its end."""
    with deferred(), writing():
        yield


def _wait_for_writes(until: float) -> None:
    with _writes:
        while _writes_in_progress > 0 and time.monotonic() < until:
            _writes.wait(timeout=0.05)


def _watch(receiver: int, grace_s: float) -> None:
    while True:
        try:
            data = os.read(receiver, 64)
        except OSError:
            return
        if not data:  # the guard was closed
            os.close(receiver)
            return
        if signal.SIGINT in data:
            break
    _interrupted.set()
    time.sleep(grace_s)
    _wait_for_writes(time.monotonic() + LONGEST_WRITE_S)
    try:
        report(fresh_line=True)
    finally:
        os._exit(EXIT_STATUS)


@contextmanager
def guard(message: Callable[[], str] | None = None, *, grace_s: float = GRACE_S) -> Iterator[None]:
    """Within the block, a Ctrl-C ends the process within ``grace_s`` seconds, with one line and status 130.

    ``message()`` gives that line (default :data:`MESSAGE`); nested guards refine it (the
    innermost one's is used), and only the outermost one arms the watchdog. A Ctrl-C that
    ends the block with an exception (``KeyboardInterrupt``, or an error it caused) is
    reported with the message and ends the process with status 130 (:func:`_end_process`):
    this is for a command line's top level, not for library code. Main thread only, and not
    where SIGINT is ignored (elsewhere the block runs unguarded).
    """
    _messages.append(message or (lambda: MESSAGE))
    try:
        if _armed or not _in_main_thread() or signal.getsignal(signal.SIGINT) is signal.SIG_IGN:
            yield  # nested, or nothing to guard here
            return
        with _watchdog(grace_s):
            try:
                yield
            except BaseException as error:
                if not interrupted() or isinstance(error, SystemExit):
                    raise
                report()
                _end_process()
    finally:
        _messages.pop()


def _end_process() -> None:
    """Exit with status 130 now. Everything is written (writes are atomic and finished); the
    interpreter's own shutdown is skipped: tearing JAX down took up to a second, and a Ctrl-C
    met inside some C extensions' start-up code leaves CPython to end the process by SIGINT
    (status -2) whatever the program asked."""
    for stream in (sys.stdout, sys.stderr):
        try:
            stream.flush()
        except Exception:  # noqa: S110 - a closed stream must not keep the process alive
            pass
    os._exit(EXIT_STATUS)


@contextmanager
def _watchdog(grace_s: float) -> Iterator[None]:
    receiver, sender = os.pipe()  # plain descriptors: nothing to warn about if left open at exit
    os.set_blocking(sender, False)
    try:
        previous_fd = signal.set_wakeup_fd(sender, warn_on_full_buffer=False)
    except ValueError:  # not the main interpreter
        os.close(receiver)
        os.close(sender)
        yield
        return
    previous_handler = signal.signal(signal.SIGINT, _on_sigint)
    _armed.extend((receiver, sender))
    threading.Thread(target=_watch, args=(receiver, grace_s), name="harness-interrupt", daemon=True).start()
    try:
        yield
    finally:
        if not interrupted():  # after an interrupt the watchdog stays on until the process ends
            signal.signal(signal.SIGINT, previous_handler)
            signal.set_wakeup_fd(previous_fd)
            _armed.clear()
            os.close(sender)  # the watchdog's read returns b"" and it ends (and closes its end)

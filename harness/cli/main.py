"""The ``harness`` command line.

Subcommands are registered by the modules that implement them through an
``add_commands(subparsers)``-style function; each handler returns the exit status.
Exit statuses of commands that give a verdict (run, theory, scale; harness.results.judgement):
0 agree (scale: consistent), 1 disagree (inconsistent), 3 inconclusive; 2 is bad input
for every command (a one-line message on stderr, nothing written); other commands exit 0
on success and 1 on a failure they report.
"""

from __future__ import annotations

import argparse
import sys
import warnings
from collections.abc import Callable, Sequence

from harness.core import interrupts
from harness.core.configure import configure
from harness.core.errors import InputError


class _Parser(argparse.ArgumentParser):
    """argparse that reports usage errors as one line and exit status 2."""

    def error(self, message: str) -> None:  # type: ignore[override]
        sys.stderr.write(f"harness: error: {message} (see 'harness --help')\n")
        raise SystemExit(2)


def _registrars() -> list[Callable]:
    """Every module's command registration function (imported lazily: startup stays quick)."""
    registrars: list[Callable] = []
    for module_name, function_name in COMMAND_MODULES:
        try:
            module = __import__(module_name, fromlist=[function_name])
        except ModuleNotFoundError as error:
            if error.name == module_name:
                continue
            raise
        registrars.append(getattr(module, function_name))
    return registrars


COMMAND_MODULES: list[tuple[str, str]] = [
    ("harness.cli.run", "add_run_commands"),
    ("harness.cli.figure", "add_figure_commands"),
    ("harness.cli.generator", "add_generator_commands"),
    ("harness.cli.sweep", "add_sweep_commands"),
    ("harness.cli.scale", "add_scale_command"),
    ("harness.cli.baseline", "add_baseline_commands"),
    ("harness.cli.fixed_points", "add_fixed_points_command"),
    ("harness.cli.keys", "add_keys_command"),
]


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(
        prog="harness",
        description="Simulate online SGD in two-layer networks and hold it against order-parameter theory.",
    )
    subparsers = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    subparsers.required = True
    for register in _registrars():
        register(subparsers)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    # Warnings as one "harness: warning:" line each, for this command only: a caller that runs
    # commands in-process (a test, a notebook) gets its own warning settings back afterwards.
    format_before = warnings.formatwarning
    with warnings.catch_warnings():
        warnings.simplefilter("default")
        warnings.formatwarning = lambda message, category, *rest: f"harness: warning: {message}\n"
        try:
            return _run_command(argv)
        finally:
            warnings.formatwarning = format_before


def _run_command(argv: Sequence[str] | None) -> int:
    try:
        with interrupts.guard():  # start-up imports JAX, which can drop a Ctrl-C (harness.core.interrupts)
            args = build_parser().parse_args(argv)
            configure()  # JAX's process-wide options (harness.core.configure), before any computation
        return int(args.handler(args))
    except InputError as error:
        sys.stderr.write(f"harness: error: {error}\n")
        return 2
    except KeyboardInterrupt:
        sys.stderr.write("harness: interrupted; nothing half-written was left behind\n")
        return 130


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main())

"""The ``fixed-points`` subcommand, registered on the main parser by harness/cli/main.py.

    harness fixed-points [SCENARIO.toml] [--out DIR]

Finds the unspecialised and specialised fixed points of the scenario's i.i.d. order-parameter
flow (:mod:`harness.equations.fixed_points`), prints what they predict (plateau height, escape rate,
asymptotic error and decay rate, learning-rate limit) and writes everything to
``DIR/fixed_points_<run_id>.json`` atomically, numbers that do not exist as null. Exit status 0,
or 2 on bad input (one line on stderr, nothing written).
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import Any, TextIO


def add_fixed_points_command(subparsers: argparse._SubParsersAction) -> None:
    """Register ``harness fixed-points``."""
    command = subparsers.add_parser(
        "fixed-points",
        help="fixed points of the built-in i.i.d. theory: plateau, escape rate, asymptotic decay, learning-rate limit",
        description=(
            "Find the unspecialised (plateau) and specialised fixed points of the scenario's order-parameter "
            "equations (i.i.d. Gaussian inputs), their eigenvalues, and what these predict for the learning "
            "curve; write DIR/fixed_points_<run_id>.json."
        ),
    )
    command.add_argument("scenario", nargs="?", help="scenario TOML file (default: the embedded default scenario)")
    command.add_argument("--out", type=Path, default=Path("results"), help="results folder (default: results/)")
    command.set_defaults(handler=run_fixed_points_command)


def output_path(out: Path, scenario: dict[str, Any]) -> Path:
    from harness.core.scenario import run_id

    return Path(out) / f"fixed_points_{run_id(scenario)}.json"


def run_fixed_points_command(args: argparse.Namespace) -> int:
    from harness.core import scenario as scenario_lib
    from harness.core.destinations import check_output_folder
    from harness.core.files import atomic_write_json
    from harness.equations import fixed_points

    scenario = scenario_lib.load(args.scenario)  # bad input raises InputError before any work
    check_output_folder(args.out, "--out")
    result = fixed_points.fixed_points(scenario)
    path = output_path(args.out, scenario)
    atomic_write_json(path, result)
    print_summary(result, sys.stdout)
    print(f"-> {path}")
    return 0


def _show(value: float | None, form: str = ".5g") -> str:
    return "none" if value is None else format(value, form)


def print_summary(result: dict[str, Any], stream: TextIO) -> None:
    """A few lines: each fixed point, then the predictions."""
    p = result["predictions"]
    stream.write(
        f"fixed points of the i.i.d. theory: K = {result['K']}, M = {result['M']}, "
        f"{result['student']}/{result['teacher']}, eta = {result['learning_rate']:g}, "
        f"label noise {result['noise_std']:g}\n"
    )
    for name in ("unspecialised", "specialised"):
        point = result[name]
        if not point["found"]:
            stream.write(f"  {name:<14} not found: {point.get('reason') or 'Newton did not converge'}\n")
            continue
        stability = "unknown stability" if point["leading_eigenvalue"] is None else (
            "stable" if point["stable"] else "unstable")
        leading = _show(point["leading_eigenvalue"], "+.5g")
        stream.write(
            f"  {name:<14} eps = {_show(point['error'])}, leading eigenvalue {leading} ({stability}), "
            f"residual {_show(point['residual'], '.1e')}\n"
        )
    if p["plateau_error"] is not None:
        stream.write(
            f"  plateau        height {_show(p['plateau_error'])}, escape rate {_show(p['escape_rate'])} "
            f"(eps_plateau - eps ~ exp({_show(p['plateau_error_exponent'])} t))\n"
        )
    if p["asymptotic_error"] is not None:
        stream.write(
            f"  asymptote      eps = {_show(p['asymptotic_error'])}, convergence rate {_show(p['convergence_rate'])}, "
            f"error decay rate {_show(p['error_decay_rate'])} ({p['error_decay_rule'] or 'none'} rule)\n"
        )
        stream.write(
            f"  learning-rate limit {_show(p['learning_rate_limit'])} ({p['learning_rate_limit_note']})\n"
        )

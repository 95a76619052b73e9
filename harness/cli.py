"""The ``harness`` command line.

Subcommands are registered by the modules that implement them through an
``add_commands(subparsers)``-style function; each handler returns the exit status.
Exit statuses: 0 success, 1 a comparison that failed, 2 bad input (a one-line message
on stderr, nothing written), 3 an inconclusive verdict (finite-size scaling).
"""

from __future__ import annotations

import argparse
import sys
import warnings
from collections.abc import Callable, Sequence
from pathlib import Path

from harness.errors import InputError

DEFAULT_OUT = Path("results")


class _Parser(argparse.ArgumentParser):
    """argparse that reports usage errors as one line and exit status 2."""

    def error(self, message: str) -> None:  # type: ignore[override]
        sys.stderr.write(f"harness: error: {message} (see 'harness --help')\n")
        raise SystemExit(2)


def _load_scenario(path: str | None):
    from harness import scenario as scenario_lib

    return scenario_lib.load(path)


def print_run_summary(stored, scenario, *, stream=None) -> None:
    """The short closing table: per observable group, max |z| and agreement."""
    from harness.comparison import AGREEMENT_Z, group_verdicts

    stream = stream or sys.stdout
    if stored.skipped:
        stream.write(f"run {stored.run_id} already complete in {stored.folder} (use --force to redo)\n")
        return
    timings = stored.manifest["timings"]
    s = scenario
    stream.write(
        f"run {stored.run_id} -> {stored.folder}\n"
        f"  {s['run']['seeds']} seeds, N = {s['data']['input_dim']}, K = {s['student']['hidden']}, "
        f"M = {s['teacher']['hidden']}, t = {s['sgd']['time']:g}; simulation {timings['simulation_s']:.1f} s, "
        f"theory {timings['theory_s']:.2f} s; compiling: simulation {timings['compile_s']:.1f} s, "
        f"theory {timings.get('theory_compile_s', 0.0):.1f} s\n"
    )
    if stored.manifest.get("diverged_count"):
        stream.write(f"  {stored.manifest['diverged_count']} seed(s) diverged and left the averages\n")
    if stored.manifest.get("kind") == "theory":
        return
    verdicts = group_verdicts(stored.metrics)
    stream.write(f"  {'observable':<15}{'max |z|':>9}{'adjusted':>10}  {'first |z|>3 run at t':>21}  verdict\n")
    for _, row in verdicts.iterrows():
        # iterrows turns a None verdict into NaN; both mean "nothing to compare" (n/a)
        verdict = "n/a" if row["agree"] is None or row["agree"] != row["agree"] else (
            "agree" if row["agree"] else "DISAGREE")
        when = "-" if row["divergence_t"] != row["divergence_t"] else f"{row['divergence_t']:.3g}"
        stream.write(
            f"  {row['group']:<15}{row['max_abs_z']:>9.2f}{row['max_abs_z_adjusted']:>10.2f}  {when:>21}  {verdict}\n"
        )
    stream.write(
        f"  (agree: adjusted |z| <= {AGREEMENT_Z:g} at every evaluation time; adjusted = |z| carried to the normal\n"
        f"   scale through Student's t with seeds - 1 degrees of freedom)\n"
    )
    if "gaussian_equivalence_gap" in stored.manifest:
        from harness.comparison import describe_gaps

        seeds = stored.manifest.get("seeds", 0) - stored.manifest.get("diverged_count", 0)
        stream.write(f"  {describe_gaps(stored.manifest, seeds if seeds >= 2 else None)}\n")


def _cmd_run(args: argparse.Namespace) -> int:
    scenario = _load_scenario(args.scenario)  # validate before any heavy import or work
    from harness.pipeline import run_and_store
    from harness.progress import Progress

    with Progress("simulating", 1, enabled=not args.quiet) as bar:

        def report(done: int, total: int) -> None:
            bar.total = total
            bar.update(done, f"step {done}/{total}")

        stored = run_and_store(scenario, args.out, force=args.force, progress=report)
    print_run_summary(stored, scenario)
    return 0


def _cmd_theory(args: argparse.Namespace) -> int:
    scenario = _load_scenario(args.scenario)
    from harness.pipeline import theory_and_store

    stored = theory_and_store(scenario, args.out, force=args.force)
    print_run_summary(stored, scenario)
    return 0


def _add_core_commands(subparsers) -> None:
    run = subparsers.add_parser("run", help="simulate a scenario and pair it with its theory, seed by seed")
    run.add_argument("scenario", nargs="?", help="scenario TOML file (default: the embedded default scenario)")
    run.add_argument("--out", type=Path, default=DEFAULT_OUT, help="results folder (default: results/)")
    run.add_argument("--force", action="store_true", help="redo a run whose identical scenario is already stored")
    run.add_argument("--quiet", action="store_true", help="no progress line")
    run.set_defaults(handler=_cmd_run)

    theory = subparsers.add_parser("theory", help="solve the theory alone from the initial conditions a run would draw")
    theory.add_argument("scenario", nargs="?", help="scenario TOML file (default: the embedded default scenario)")
    theory.add_argument("--out", type=Path, default=DEFAULT_OUT, help="results folder (default: results/)")
    theory.add_argument("--force", action="store_true", help="redo an identical stored theory run")
    theory.set_defaults(handler=_cmd_theory)


def _registrars() -> list[Callable]:
    """Every module's command registration function (imported lazily: startup stays quick)."""
    registrars: list[Callable] = [_add_core_commands]
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
    ("harness.figures_cli", "add_figure_commands"),
    ("harness.generator_cli", "add_generator_commands"),
    ("harness.sweep", "add_sweep_commands"),
    ("harness.scaling", "add_scale_command"),
    ("harness.baselines", "add_baseline_commands"),
    ("harness.fixed_points_cli", "add_fixed_points_command"),
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
    parser = build_parser()
    args = parser.parse_args(argv)
    warnings.simplefilter("default")
    warnings.formatwarning = lambda message, category, *rest: f"harness: warning: {message}\n"
    try:
        return int(args.handler(args))
    except InputError as error:
        sys.stderr.write(f"harness: error: {error}\n")
        return 2
    except KeyboardInterrupt:
        sys.stderr.write("harness: interrupted; nothing half-written was left behind\n")
        return 130


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main())

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
from pathlib import Path

from harness.core.configure import configure
from harness.core.errors import InputError

DEFAULT_OUT = Path("results")


class _Parser(argparse.ArgumentParser):
    """argparse that reports usage errors as one line and exit status 2."""

    def error(self, message: str) -> None:  # type: ignore[override]
        sys.stderr.write(f"harness: error: {message} (see 'harness --help')\n")
        raise SystemExit(2)


def _load_scenario(path: str | None):
    from harness.core import scenario as scenario_lib

    return scenario_lib.load(path)


def _number(value, digits: int = 3) -> str:
    return "-" if value is None or value != value else f"{value:.{digits}g}"


def _seeds(value, verdict: str) -> str:
    """Seeds that would settle an inconclusive verdict (None in judgement.json: none would)."""
    if verdict != "inconclusive":
        return "-"
    return "none would" if value is None or value != value or value == float("inf") else f"about {int(value)}"


def format_judgement(record: dict) -> list[str]:
    """The verdict table of a run (judgement.json, harness.results.judgement), as terminal lines."""
    lines = [
        f"  {'group':<15}{'verdict':<14}{'|diff|/margin':>14}{'band/margin':>13}{'detectable':>12}"
        f"{'departs':>10}  seeds to settle",
        f"  {'':<15}{'':<14}{'(largest)':>14}{'(reach)':>13}{'from t':>12}{'from t':>10}",
    ]
    for g in record["groups"]:
        verdict = g["verdict"].upper() if g["verdict"] == "disagree" else g["verdict"]
        lines.append(
            f"  {g['group']:<15}{verdict:<14}{_number(g['worst_ratio']):>14}{_number(g['reach']):>13}"
            f"{_number(g['detected_t']):>12}{_number(g['departs_t']):>10}  {_seeds(g['seeds_needed'], g['verdict'])}"
        )
    verdict = record["verdict"]
    text = f"  verdict: {verdict.upper() if verdict == 'disagree' else verdict}"
    if verdict == "inconclusive":
        needed = record.get("seeds_needed")
        text += (": no number of seeds would settle it at this margin" if needed is None or needed == float("inf")
                 else f": about {int(needed)} seeds would settle it (an estimate from the measured spread)")
    lines.append(text)
    band = f"c = {_number(record['band_factor'])}, {record['band_method']}"
    if record.get("band_cells"):
        band += f" over {record['band_cells']} cells with {record['band_seeds']} seeds"
    lines.append(
        f"  (agree: the {100 * (1 - record['alpha']):.3g} % simultaneous band of theory - simulation lies within "
        f"+-margin at every time; disagree: wholly outside it at some time;\n"
        f"   margin = {record['margin']:g} x an error's value at each time (at least {record['floor']:g} x its "
        f"largest), {record['margin']:g} x an order-parameter group's largest size; band = mean +- {band})"
    )
    return lines


def print_run_summary(stored, scenario, *, stream=None) -> None:
    """The closing lines of a run: where it is, its cost, its verdict table and its gaps."""
    from harness.results.comparison import describe_gaps

    stream = stream or sys.stdout
    timings = stored.manifest["timings"]
    s = scenario
    if stored.skipped:
        stream.write(f"run {stored.run_id} already complete in {stored.folder} (use --force to redo); stored:\n")
    else:
        stream.write(f"run {stored.run_id} -> {stored.folder}\n")
    costs = f"theory {timings['theory_s']:.2f} s"
    if stored.manifest.get("kind") != "theory":
        costs = f"simulation {timings['simulation_s']:.1f} s, " + costs
    stream.write(
        f"  {s['run']['seeds']} seeds, N = {s['data']['input_dim']}, K = {s['student']['hidden']}, "
        f"M = {s['teacher']['hidden']}, t = {s['sgd']['time']:g}; {costs}; compiling: simulation "
        f"{timings['compile_s']:.1f} s, theory {timings.get('theory_compile_s', 0.0):.1f} s\n"
    )
    if stored.manifest.get("diverged_count"):
        stream.write(f"  {stored.manifest['diverged_count']} seed(s) diverged and left the averages\n")
    if stored.manifest.get("kind") == "theory" or stored.judgement is None:
        return
    for line in format_judgement(stored.judgement):
        stream.write(line + "\n")
    for line in describe_gaps(stored.judgement.get("gaps", {})):
        stream.write(f"  {line}\n")


def verdict_status(stored) -> int:
    """Exit status of a command that judged a run: 0 agree, 1 disagree, 3 inconclusive (harness.results.judgement)."""
    from harness.results.judgement import EXIT_STATUS, NOT_JUDGED

    verdict = stored.judgement["verdict"] if stored.judgement else NOT_JUDGED
    return EXIT_STATUS[verdict]


def _cmd_run(args: argparse.Namespace) -> int:
    scenario = _load_scenario(args.scenario)  # validate before any heavy import or work
    from harness.runner.pipeline import run_and_store
    from harness.runner.progress import Progress

    with Progress("simulating", 1, enabled=not args.quiet) as bar:

        def report(done: int, total: int) -> None:
            bar.total = total
            bar.update(done, f"step {done}/{total}")

        stored = run_and_store(scenario, args.out, force=args.force, progress=report)
    print_run_summary(stored, scenario)
    return verdict_status(stored)


def _cmd_theory(args: argparse.Namespace) -> int:
    scenario = _load_scenario(args.scenario)
    from harness.runner.pipeline import theory_and_store

    stored = theory_and_store(scenario, args.out, force=args.force)
    print_run_summary(stored, scenario)
    return verdict_status(stored)


def _add_core_commands(subparsers) -> None:
    run = subparsers.add_parser(
        "run", help="simulate a scenario and pair it with its theory, seed by seed",
        description="Simulate a scenario, pair it with its theory seed by seed, judge and store it. Exit status: "
        "0 agree, 1 disagree, 3 inconclusive (agreement within the scenario's [agreement] margin is shown, "
        "disagreement is shown, or neither), 2 bad input.",
    )
    run.add_argument("scenario", nargs="?", help="scenario TOML file (default: the embedded default scenario)")
    run.add_argument("--out", type=Path, default=DEFAULT_OUT, help="results folder (default: results/)")
    run.add_argument("--force", action="store_true", help="redo a run whose identical scenario is already stored")
    run.add_argument("--quiet", action="store_true", help="no progress line")
    run.set_defaults(handler=_cmd_run)

    theory = subparsers.add_parser(
        "theory", help="solve the theory alone from the initial conditions a run would draw",
        description="Solve the scenario's theory alone, from the initial conditions a run would draw, and store it. "
        "Exit status: 0 (or, when judged against a stored simulation, 0 agree, 1 disagree, 3 inconclusive), "
        "2 bad input.",
    )
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
    ("harness.cli.figure", "add_figure_commands"),
    ("harness.cli.generator", "add_generator_commands"),
    ("harness.studies.sweep", "add_sweep_commands"),
    ("harness.studies.scaling", "add_scale_command"),
    ("harness.studies.baselines", "add_baseline_commands"),
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
    parser = build_parser()
    args = parser.parse_args(argv)
    configure()  # JAX's process-wide options (harness.core.configure), before any computation
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

"""``harness run`` and ``harness theory``: one scenario simulated (or its theory solved), judged and stored."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

DEFAULT_OUT = Path("results")
PRACTICAL_SEED_FACTOR = 50
"""More than this many times the seeds run is called beyond practical reach."""


def _load_scenario(path: str | None):
    from harness.core import scenario as scenario_lib

    return scenario_lib.load(path)


def check_out(out: Path) -> None:
    """The results folder can take the run (harness.core.destinations), checked before any work."""
    from harness.core.destinations import check_output_folder

    check_output_folder(out, "--out")


def announce_replacement(folder: Path, what: str = "run") -> None:
    """With --force, say on stderr (one line) which stored run is replaced and what happens to its figures."""
    from harness.results.store import is_complete_run

    if not is_complete_run(folder):
        return
    kept = (" (its figures/ are kept, older than the new tables: 'harness report' or 'harness figure' redraws them)"
            if (folder / "figures").is_dir() else "")
    sys.stderr.write(f"harness: --force: replacing the stored {what} '{folder}'{kept}\n")


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
        seeds = record.get("band_seeds") or 0
        if needed is None or needed == float("inf"):
            text += ": no number of seeds would settle it at this margin"
        elif seeds and needed > PRACTICAL_SEED_FACTOR * seeds:
            text += (f": about {int(needed)} seeds would settle it, beyond practical reach at this margin "
                     "(a wider [agreement] margin is the realistic change)")
        else:
            text += f": about {int(needed)} seeds would settle it (an estimate from the measured spread)"
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


def _with_interval(mean, low, high) -> str:
    """'172 [166, 178]' (a mean with its pointwise interval; '-' where undetermined)."""
    if mean is None or mean != mean:
        return "-"
    if low is None or high is None or low != low:
        return f"{mean:.3g}"
    return f"{mean:.3g} [{low:.3g}, {high:.3g}]"


def _landmark_difference(row: dict) -> str:
    if row["diff_mean"] is None:
        return "-"
    band = row["band"]
    return f"{row['diff_mean']:+.2g}" + (f" ± {band:.2g}" if band is not None else "")


def _band_factors(rows: list[dict]) -> str:
    """The band factors c = band / se of the judged landmarks: one number, or their range."""
    factors = sorted(r["band"] / r["diff_sem"] for r in rows if r["band"] is not None and r["diff_sem"])
    if not factors:
        return "-"
    low, high = _number(factors[0]), _number(factors[-1])
    return low if low == high else f"{low} to {high}"


def format_landmarks(record: dict) -> list[str]:
    """A run's landmark table (judgement.json's "landmarks", harness.results.paired_landmarks), as terminal lines."""
    section = record.get("landmarks")
    if not section:
        return []
    rows = [r for r in section["table"] if r["sim_seeds"] or r["theory_seeds"]]
    table = [
        ["landmark", "verdict", "simulation", "theory", "theory - sim.", "margin", "seeds", "seeds to settle"],
        ["", "", "mean [95 % interval]", "mean [95 % interval]", "± band", "", "sim/th", ""],
    ]
    for r in rows:
        settle = _seeds(r["seeds_needed"], r["verdict"]) if r["presence"] not in ("theory only", "simulation only") \
            else f"found in the {r['presence'].removesuffix(' only')} only"
        table.append([
            r["landmark"], r["verdict"].upper() if r["verdict"] == "disagree" else r["verdict"],
            _with_interval(r["sim_mean"], r["sim_low"], r["sim_high"]),
            _with_interval(r["theory_mean"], r["theory_low"], r["theory_high"]),
            _landmark_difference(r), _number(r["margin"], 2), f"{r['sim_seeds']}/{r['theory_seeds']}", settle,
        ])
    widths = [max(len(line[c]) for line in table) for c in range(len(table[0]))]
    lines = ["  " + "  ".join(cell.ljust(w) for cell, w in zip(line, widths, strict=True)).rstrip() for line in table]
    verdict = section["verdict"]
    text = f"  landmark verdict: {verdict.upper() if verdict == 'disagree' else verdict}"
    if verdict == "inconclusive":
        needed = section.get("seeds_needed")
        text += (": no number of seeds would settle it" if needed is None or needed == float("inf")
                 else f": about {int(needed)} seeds would settle it")
    lines.append(text)
    lines.append(
        f"  (landmarks measured seed by seed on the {section['options']['error']} curve; theory - sim.: paired mean "
        f"± its {100 * (1 - section['alpha']):.3g} % simultaneous band, c = {_band_factors(rows)} "
        f"({section['band_method']});\n   margin = {section['margin']:g} x the simulated landmark (an error at least "
        f"{section.get('floor', 0.001):g} x its curve's largest); "
        "the landmark verdict does not change the run's, which is the curves')"
    )
    if section.get("sampling_warning"):
        lines.append(f"  warning: {section['sampling_warning']}")
    return lines


def print_run_summary(stored, scenario, *, stream=None) -> None:
    """The closing lines of a run: where it is, its cost, its verdict table and its gaps.

    A theory run (``harness theory``) shows its own cost, the simulation it was paired with
    (if any) and then the same table; one with no simulation shows the theory's key values.
    """
    from harness.results.comparison import describe_gaps

    stream = stream or sys.stdout
    timings = stored.manifest["timings"]
    s = scenario
    theory_run = stored.manifest.get("kind") == "theory"
    if stored.skipped:
        stream.write(f"run {stored.run_id} already complete in {stored.folder} (use --force to redo); stored:\n")
    else:
        stream.write(f"run {stored.run_id} -> {stored.folder}\n")
    shape = (f"{s['run']['seeds']} seeds, N = {s['data']['input_dim']}, K = {s['student']['hidden']}, "
             f"M = {s['teacher']['hidden']}, t = {s['sgd']['time']:g}")
    theory_cost = f"theory {timings['theory_s']:.2f} s (compiling {timings.get('theory_compile_s', 0.0):.1f} s)"
    if theory_run:
        paired = stored.manifest.get("simulation")
        against = (f"paired with the stored simulation of run {paired['run_id']}" if paired
                   else "no stored simulation to judge it against")
        stream.write(f"  {shape}; {theory_cost}; {against}\n")
    else:
        stream.write(
            f"  {shape}; simulation {timings['simulation_s']:.1f} s, {theory_cost.split(' (')[0]}; compiling: "
            f"simulation {timings['compile_s']:.1f} s, theory {timings.get('theory_compile_s', 0.0):.1f} s\n"
        )
    if stored.manifest.get("diverged_count"):
        stream.write(f"  {stored.manifest['diverged_count']} seed(s) diverged and left the averages\n")
    if theory_run and not stored.manifest.get("simulation"):
        for line in theory_key_values(stored.folder):
            stream.write(f"  {line}\n")
        return
    if stored.judgement is None:
        return
    for line in format_judgement(stored.judgement):
        stream.write(line + "\n")
    for line in format_landmarks(stored.judgement):
        stream.write(line + "\n")
    for line in describe_gaps(stored.judgement.get("gaps", {})):
        stream.write(f"  {line}\n")


def theory_key_values(folder) -> list[str]:
    """A theory's test error at the start and the end, with its spread over seeds (from trajectories.parquet)."""
    import numpy as np
    import pandas as pd

    table = pd.read_parquet(Path(folder) / "trajectories.parquet", columns=["seed", "t", "observable", "theory"])
    error = table[table["observable"] == "test_error"].pivot(index="seed", columns="t", values="theory")
    lines = []
    for label, t in (("initial", error.columns.min()), ("final", error.columns.max())):
        values = error[t].to_numpy()
        values = values[np.isfinite(values)]
        if not len(values):
            lines.append(f"{label} test error (t = {t:g}): not predicted")
            continue
        spread = (f", spread over {len(values)} seeds {np.std(values, ddof=1):.3g} (std), "
                  f"{values.min():.4g} to {values.max():.4g}") if len(values) > 1 else ""
        lines.append(f"{label} test error (t = {t:g}): {values.mean():.4g}{spread}")
    return lines


def verdict_status(stored) -> int:
    """Exit status of a command that judged a run: 0 agree, 1 disagree, 3 inconclusive (harness.results.judgement)."""
    from harness.results.judgement import EXIT_STATUS, NOT_JUDGED

    verdict = stored.judgement["verdict"] if stored.judgement else NOT_JUDGED
    return EXIT_STATUS[verdict]


def _interrupted_message(kept: Path | None) -> str:
    """The one line of an interrupted run: what it left for the next one (harness.runner.checkpoint)."""
    from harness.core.interrupts import MESSAGE as message
    from harness.runner.checkpoint import FILE_NAME, FINISHED_NAME

    if kept is not None and (kept / FINISHED_NAME).is_file():
        return message + f"; the finished simulation is kept in {kept}: rerun to go on without simulating again"
    if kept is not None and (kept / FILE_NAME).is_file():
        return message + f"; the simulation's progress is kept in {kept}: rerun to continue from it"
    return message


def _progress_line(quiet: bool):
    """One progress line for a run's phases: the simulation (steps), then the theory (t covered)."""
    from harness.runner.progress import Progress

    line = Progress("simulating", 1, enabled=not quiet)

    def simulation(done: int, total: int) -> None:
        line.total = total
        line.update(done, f"step {done}/{total}")

    def theory(covered: float, total: float) -> None:
        if line.label != "theory":
            line.restart("theory", total)
        line.total = total
        line.update(covered, f"t {covered:.4g}/{total:.4g}")

    return line, simulation, theory


def _cmd_run(args: argparse.Namespace) -> int:
    from harness.core import interrupts

    kept: list[Path] = []
    # a Ctrl-C: exit status 130 within about a second, one line saying what is kept (harness.core.interrupts);
    # guarded from the first line on: resolving a scenario imports JAX modules, which can drop a Ctrl-C
    with interrupts.guard(lambda: _interrupted_message(kept[0] if kept else None)):
        scenario = _load_scenario(args.scenario)  # validate before any heavy work
        check_out(args.out)
        from harness.core.scenario import run_id
        from harness.runner.checkpoint import checkpoint_folder
        from harness.runner.pipeline import run_and_store

        if args.force:
            announce_replacement(args.out / run_id(scenario))

        kept.append(checkpoint_folder(args.out, run_id(scenario)))
        line, simulation, theory = _progress_line(args.quiet)
        with line:
            stored = run_and_store(scenario, args.out, force=args.force, progress=simulation, theory_progress=theory)
    print_run_summary(stored, scenario)
    return verdict_status(stored)


def _theory_target(args: argparse.Namespace):
    """The scenario and results folder ``harness theory`` works on: a scenario file, or a stored run's folder."""
    from harness.core.errors import InputError
    from harness.results.store import is_complete_run

    target = Path(args.scenario) if args.scenario else None
    if target is None or not target.is_dir():
        return _load_scenario(args.scenario), args.out
    if not is_complete_run(target):
        raise InputError(f"'{target}': a folder, but not a complete run (scenario.toml, manifest.json and its "
                         "tables); give a run folder or a scenario file")
    return _load_scenario(str(target / "scenario.toml")), target.parent


def _cmd_theory(args: argparse.Namespace) -> int:
    from harness.core import interrupts

    with interrupts.guard():
        scenario, out = _theory_target(args)
        check_out(out)
        from harness.runner.pipeline import theory_and_store

        if args.force:
            from harness.core.scenario import run_id

            announce_replacement(out / (run_id(scenario) + "-theory"), "theory run")

        line, _, theory = _progress_line(args.quiet)
        line.restart("theory", 1)
        with line:
            stored = theory_and_store(scenario, out, force=args.force, progress=theory)
    print_run_summary(stored, scenario)
    return verdict_status(stored)


def add_run_commands(subparsers) -> None:
    """Register ``harness run`` and ``harness theory``."""
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
        "theory", help="solve the theory alone (judged against the stored simulation, if there is one)",
        description="Solve the scenario's theory alone, from the initial conditions a run draws, and store it in "
        "OUT/<run_id>-theory/. When the run itself is stored (OUT/<run_id>/, or the run folder given), the theory "
        "is paired with its simulation seed by seed and judged as 'harness run' judges, without simulating again. "
        "Exit status: 0 agree, 1 disagree, 3 inconclusive (0 with no simulation to judge against), 2 bad input.",
    )
    theory.add_argument("scenario", nargs="?", metavar="SCENARIO_OR_RUN",
                        help="scenario TOML file, or a stored run's folder (default: the embedded default scenario)")
    theory.add_argument("--out", type=Path, default=DEFAULT_OUT,
                        help="results folder (default: results/; a run folder's own results folder when one is given)")
    theory.add_argument("--force", action="store_true", help="redo an identical stored theory run")
    theory.add_argument("--quiet", action="store_true", help="no progress line")
    theory.set_defaults(handler=_cmd_theory)



"""``harness baseline save`` and ``harness check``: solver regression baselines."""

from __future__ import annotations

import argparse
import math
import sys
from pathlib import Path

from harness.core.destinations import check_output_folder
from harness.core.errors import InputError
from harness.studies.baselines import (
    BUILTIN_BASELINES,
    DEFAULT_DIR,
    SHOWN_DEVIATIONS,
    Tolerance,
    check_baselines,
    check_name,
    check_source,
    find_baselines,
    format_report,
    read_baseline,
    save_baseline,
)


def _positive_tolerance(option: str, value: float | None) -> float | None:
    if value is not None and not (math.isfinite(value) and value >= 0):
        raise InputError(f"{option}: must be a finite number >= 0, got {value!r}")
    return value


def _cmd_save(args: argparse.Namespace) -> int:
    from harness.core import scenario as scenario_lib

    directory = check_output_folder(args.dir, "--dir")
    jobs: list[tuple[str, dict]] = []  # (name, resolved scenario), all validated before any solve
    if args.name is not None and len(args.scenarios) != 1:
        raise InputError("--name: only with exactly one SCENARIO file")
    for path in args.scenarios:
        name = args.name or Path(path).stem
        check_name(name)
        jobs.append((name, scenario_lib.load(path)))
    if args.builtin is not None:
        names = args.builtin or list(BUILTIN_BASELINES)
        for name in names:
            if name not in BUILTIN_BASELINES:
                raise InputError(f"--builtin: unknown baseline {name!r}; known: {', '.join(BUILTIN_BASELINES)}")
            if not args.builtin and not args.force and (directory / name).exists():
                print(f"kept {directory / name} (--force re-solves it)")
                continue  # a bare --builtin adds the missing ones
            jobs.append((name, scenario_lib.resolve(BUILTIN_BASELINES[name])))
        if not jobs:
            return 0
    if not jobs:
        if not args.force:
            raise InputError(
                "baseline save: give SCENARIO files or --builtin, or --force to re-solve every baseline "
                f"already in '{directory}' from its stored scenario"
            )
        jobs = [(folder.name, read_baseline(folder).scenario) for folder in find_baselines(directory)]
    names = [name for name, _ in jobs]
    repeated = sorted({n for n in names if names.count(n) > 1})
    if repeated:
        raise InputError(f"baseline save: the name {repeated[0]!r} would be written twice; use distinct files")
    for name, scenario in jobs:
        check_source(scenario, f"baseline '{name}'")
        if (directory / name).exists() and not args.force:
            raise InputError(f"baseline '{directory / name}' exists; use --force to replace its reference trajectories")
    for index, (name, scenario) in enumerate(jobs, start=1):
        replacing = " (replacing the stored one; its tolerances.toml is kept)" if (directory / name).exists() else ""
        sys.stderr.write(f"baseline: {index}/{len(jobs)} solving {name}{replacing}\n")
        folder = save_baseline(scenario, directory, name, force=args.force)
        print(f"saved {folder}")
    return 0


def _cmd_check(args: argparse.Namespace) -> int:
    rtol = _positive_tolerance("--rtol", args.rtol)
    atol = _positive_tolerance("--atol", args.atol)
    if args.show < 0:
        raise InputError(f"--show: must be an integer >= 0, got {args.show}")
    override = Tolerance(rtol, atol) if (rtol is not None or atol is not None) else None
    results = check_baselines(args.dir, override=override, log=None if args.quiet else sys.stderr)
    print(format_report(results, limit=args.show))
    return 0 if all(r.passed for r in results) else 1


def add_baseline_commands(subparsers: argparse._SubParsersAction) -> None:
    """Register ``harness baseline save`` and ``harness check``."""
    baseline = subparsers.add_parser(
        "baseline", help="store reference theory trajectories that 'harness check' compares against"
    )
    actions = baseline.add_subparsers(dest="baseline_action", metavar="ACTION")
    actions.required = True
    save = actions.add_parser(
        "save",
        help="solve the theory of each scenario and store it as a baseline folder",
        description=(
            "Solves the theory alone (no simulation) and writes DIR/<name>/ with the resolved scenario, the "
            "trajectories, the initial conditions and editable tolerances. Without SCENARIO or --builtin, "
            "--force re-solves every baseline already in DIR."
        ),
    )
    save.add_argument("scenarios", nargs="*", metavar="SCENARIO", help="scenario TOML files (name: the file stem)")
    save.add_argument("--dir", type=Path, default=DEFAULT_DIR, help=f"baseline folder (default: {DEFAULT_DIR}/)")
    save.add_argument("--name", help="folder name for a single SCENARIO (default: its file stem)")
    save.add_argument(
        "--builtin", nargs="*", metavar="NAME",
        help="the project's own baselines: the NAMEs given, or every missing one (all with --force): "
        + ", ".join(BUILTIN_BASELINES),
    )
    save.add_argument("--force", action="store_true", help="replace existing baselines (their tolerances.toml is kept)")
    save.set_defaults(handler=_cmd_save)

    check = subparsers.add_parser(
        "check",
        help="re-solve stored baselines and fail (exit 1) if a theory trajectory moved beyond its tolerance",
        description=(
            "Re-solves every baseline in DIR (or the one baseline folder DIR) from its stored initial "
            "conditions and compares per seed, time and observable: |now - stored| <= atol + rtol |stored|. "
            "Tolerances come from each baseline's tolerances.toml; --rtol/--atol replace its defaults "
            "(per-observable entries still apply). Exit status: 0 all match, 1 a deviation, 2 bad input."
        ),
    )
    check.add_argument("--dir", type=Path, default=DEFAULT_DIR, help=f"baseline folder (default: {DEFAULT_DIR}/)")
    check.add_argument("--rtol", type=float, default=None, help="relative tolerance for every observable")
    check.add_argument("--atol", type=float, default=None, help="absolute tolerance for every observable")
    check.add_argument("--show", type=int, default=SHOWN_DEVIATIONS, help="rows in the table of worst deviations")
    check.add_argument("--quiet", action="store_true", help="no progress lines")
    check.set_defaults(handler=_cmd_check)

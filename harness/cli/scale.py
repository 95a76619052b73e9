"""``harness scale SCENARIO --sizes ...``: does the gap between theory and simulation vanish as N grows?

With ``--observable landmark:NAME``: does the theory's landmark follow the simulation's as N grows?
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from harness.core import scenario as scenario_lib
from harness.core.destinations import check_output_folder
from harness.results.store import is_complete_run
from harness.studies.scaling import (
    DEFAULT_OBSERVABLE,
    DEFAULT_RESOLUTION,
    EXIT_STATUS,
    EXPONENT_BOUNDS,
    format_verdict,
    parse_sizes,
    run_scaling,
    validate,
)


def _cmd_scale(args: argparse.Namespace) -> int:
    scenario = scenario_lib.load(args.scenario)
    sizes = parse_sizes(args.sizes)
    # every check before any work: the sizes and options, then where the results go
    per_size = validate(scenario, sizes, args.observable, args.resolution, args.min_exponent)
    check_output_folder(args.out, "--out")
    if args.force:
        replaced = [scenario_lib.run_id(s) for s in per_size if is_complete_run(args.out / scenario_lib.run_id(s))]
        if replaced:
            sys.stderr.write(
                f"harness: --force: replacing {len(replaced)} stored run(s) in '{args.out}' ({', '.join(replaced)}); "
                "their figures/ are kept, older than the new tables: 'harness report' redraws them\n"
            )
    verdict = run_scaling(
        scenario, sizes, args.out, observable=args.observable, resolution=args.resolution,
        min_exponent=args.min_exponent, force=args.force, show_progress=not args.quiet,
    )
    print(format_verdict(verdict))
    return EXIT_STATUS[verdict["verdict"]]


def add_scale_command(subparsers: argparse._SubParsersAction) -> None:
    """Register ``harness scale``."""
    scale = subparsers.add_parser(
        "scale",
        help="run a scenario at several input sizes and decide whether theory and simulation meet as N grows",
        description=(
            "Runs SCENARIO at each input size (data.input_dim; each size is an ordinary stored run, reused "
            "when complete), measures the gap between theory and simulation at each size, fits "
            "gap(N) = a N^-b + c and writes DIR/<scale_id>/verdict.json. With --observable landmark:NAME it "
            "judges the landmark's theory against its simulation at every size and in its growth per e-fold "
            "of N, and fits a + b ln N and a N^-b + c to each side. Exit status: 0 consistent, "
            "1 inconsistent, 3 inconclusive, 2 bad input."
        ),
    )
    scale.add_argument("scenario", help="scenario TOML file")
    scale.add_argument("--sizes", required=True, help="input sizes N, comma-separated, e.g. 250,500,1000,2000")
    scale.add_argument("--out", type=Path, default=Path("results"), help="results folder (default: results/)")
    scale.add_argument(
        "--observable", default=DEFAULT_OBSERVABLE,
        help=f"observable whose gap is measured (default: {DEFAULT_OBSERVABLE}; overlap_error avoids "
        "the held-out set's noise), or landmark:NAME (e.g. landmark:plateau_exit) to judge a landmark at every "
        "size and its growth with ln N",
    )
    scale.add_argument(
        "--resolution", type=float, default=DEFAULT_RESOLUTION,
        help="smallest offset worth detecting, relative to the observable's rms over time "
        f"(default: {DEFAULT_RESOLUTION:g}; a landmark is judged with the scenario's [agreement] margin instead)",
    )
    scale.add_argument(
        "--min-exponent", type=float, default=EXPONENT_BOUNDS[0],
        help=f"slowest decay N^-b allowed for the finite-size part of the gap (default: {EXPONENT_BOUNDS[0]:g})",
    )
    scale.add_argument("--force", action="store_true", help="redo runs that are already stored")
    scale.add_argument("--quiet", action="store_true", help="no progress bar")
    scale.set_defaults(handler=_cmd_scale)

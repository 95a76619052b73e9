"""The `figure` and `report` subcommands, registered on the main parser by harness/cli/main.py.

    harness figure FOLDER... [--format png,pdf] [--size single|double|W,H] [--per-seed]
                             [--seeds-shown N] [--metric NAME] [--groups GROUP[,GROUP]]
                             [--sweep-axes KEY[,KEY]]
    harness report DIR [--keep-figures]

Each handler takes the parsed namespace and returns the exit status: 0 on success, 2 on
bad input (one line on stderr naming the path or option and what was expected).
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

# matplotlib is imported lazily inside the handlers so that other subcommands start fast.


def add_figure_commands(subparsers: argparse._SubParsersAction) -> None:
    """Register `figure` and `report`; each sets ``handler`` to a function(namespace) -> int."""
    figure = subparsers.add_parser(
        "figure",
        help="draw the figures of run, finite-size-scaling or sweep folders from their stored tables",
        description=(
            "Write FOLDER/figures/ for each result folder. A run folder gets the learning curve "
            "with its z residuals and the order-parameter grid; a finite-size-scaling folder the gap "
            "against N; a sweep folder one metric over the swept keys."
        ),
    )
    figure.add_argument("folders", nargs="+", metavar="FOLDER", type=Path, help="run, scaling or sweep folder")
    figure.add_argument(
        "--format",
        dest="formats",
        default="png,pdf",
        help="comma-separated: png, pdf (default: png,pdf)",
    )
    figure.add_argument(
        "--size",
        default="single",
        help="single (3.4 in column), double (7 in page width) or W,H in inches (default: single)",
    )
    figure.add_argument(
        "--per-seed",
        action="store_true",
        help="add thin per-seed curves, each with its paired theory",
    )
    figure.add_argument(
        "--seeds-shown",
        type=int,
        default=8,
        metavar="N",
        help="per-seed curves drawn at most (default: 8)",
    )
    figure.add_argument(
        "--metric",
        default="final_test_error",
        help="sweep metric: final_test_error, max_abs_z, final_rel_err, divergence_t, or a numeric runs.parquet column",
    )
    figure.add_argument(
        "--groups",
        default="test_error",
        metavar="GROUP[,GROUP]",
        help="sweep curves of final values: one panel per observable group, from test_error, overlap_error, "
        "Q, R, T, v (default: test_error)",
    )
    figure.add_argument(
        "--sweep-axes",
        default=None,
        metavar="KEY[,KEY]",
        help="swept key(s) to lay out: one gives curves, two a heat map (default: the first two swept keys)",
    )
    figure.set_defaults(handler=run_figure_command)

    report = subparsers.add_parser(
        "report",
        help="write DIR/index.html, a static page over every result in DIR",
        description=(
            "Write DIR/index.html (and one page per sort order) listing every run, scaling and sweep "
            "result below DIR, drawing missing or outdated figures first."
        ),
    )
    report.add_argument("folder", metavar="DIR", type=Path, help="results folder")
    report.add_argument(
        "--keep-figures",
        action="store_true",
        help="do not draw figures; link only the ones that exist",
    )
    report.set_defaults(handler=run_report_command)


def _fail(command: str, message: str) -> int:
    print(f"harness {command}: error: {message}", file=sys.stderr)
    return 2


def run_figure_command(args: argparse.Namespace) -> int:
    from harness.core.errors import InputError
    from harness.plot import figures

    try:
        if args.seeds_shown < 0:
            raise figures.FigureInputError(f"--seeds-shown {args.seeds_shown}: expected a count >= 0")
        axes = tuple(key.strip() for key in args.sweep_axes.split(",") if key.strip()) if args.sweep_axes else None
        options = figures.FigureOptions(
            formats=figures.parse_formats(args.formats),
            size=figures.parse_size(args.size),
            per_seed=args.per_seed,
            seeds_shown=args.seeds_shown,
            metric=args.metric,
            sweep_axes=axes,
            groups=figures.parse_groups(args.groups),
        )
        # Check every folder (its tables, what is asked of it, that figures/ can be written)
        # before drawing anything, so bad input leaves no partial output.
        for folder in args.folders:
            figures.check_folder(folder, options)
        for folder in args.folders:
            for path in figures.write_figures(folder, options):
                print(path)
    except InputError as error:
        return _fail("figure", str(error))
    return 0


def run_report_command(args: argparse.Namespace) -> int:
    from harness.core.destinations import check_output_folder
    from harness.core.errors import InputError
    from harness.plot import figures, report

    try:
        if not args.folder.is_dir():
            raise figures.FigureInputError(
                f"{args.folder}: not a folder; expected a results folder holding run folders")
        check_output_folder(args.folder, "DIR")  # index.html and figures are written there
        pages = report.write_report(args.folder, draw_figures=not args.keep_figures)
    except InputError as error:
        return _fail("report", str(error))
    print(pages[0])
    return 0

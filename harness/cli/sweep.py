"""``harness sweep SWEEP.toml``: every point of a sweep file, in parallel, resuming what is complete."""

from __future__ import annotations

import sys
from pathlib import Path

from harness.core.destinations import check_output_folder
from harness.results.store import is_complete_run
from harness.studies.sweep import (
    JOBQUEUE_KINDS,
    SWEEP_JSON,
    LocalExecutor,
    describe_point,
    jobqueue_executor,
    load_sweep,
    local_dask_executor,
    run_sweep,
    scheduler_executor,
    verdict_tally,
)


def _positive_int(text: str) -> int:
    import argparse

    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected an integer >= 1, got {text!r}") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"expected an integer >= 1, got {text!r}")
    return value


def _cmd_sweep(args) -> int:
    plan = load_sweep(args.sweep_file)  # every point checked before anything starts
    out_dir = args.out if args.out is not None else Path("results") / plan.source.stem
    if not args.list:  # --list writes nothing
        check_output_folder(out_dir, "--out")
    if args.list:
        for i, (point, run_id) in enumerate(zip(plan.points, plan.run_ids, strict=True)):
            state = "complete" if is_complete_run(Path(out_dir) / run_id) else "to do"
            sys.stdout.write(f"{i:>5}  {run_id}  {state:<8}  {describe_point(point)}\n")
        return 0
    if args.jobqueue is not None:
        executor = jobqueue_executor(args.jobqueue, plan.jobqueue)
    elif args.scheduler is not None:
        executor = scheduler_executor(args.scheduler)
    elif args.workers is not None:
        executor = local_dask_executor(args.workers)
    else:
        executor = LocalExecutor(args.processes)
    sys.stderr.write(f"sweep {plan.source.name}: {len(plan.points)} points ({plan.mode}) on {executor.describe()}\n")
    outcome = run_sweep(plan, out_dir, executor, show_progress=not args.quiet)
    sys.stdout.write(
        f"sweep: {outcome.total} points -> {out_dir}: {outcome.computed} computed, {outcome.reused} already complete, "
        f"{outcome.failed} failed ({outcome.seconds:.1f} s); {Path(out_dir) / SWEEP_JSON}\n"
    )
    tally = verdict_tally(out_dir, plan.run_ids)
    if tally:
        sys.stdout.write(f"sweep: verdicts: {tally}\n")
    return 0 if outcome.ok else 1



def add_sweep_commands(subparsers) -> None:
    """Register ``harness sweep``."""
    sweep = subparsers.add_parser(
        "sweep", help="run every point of a sweep file, in parallel, resuming whatever is already complete"
    )
    sweep.add_argument("sweep_file", help="scenario TOML file with a [sweep] table of dotted keys and value lists")
    sweep.add_argument("--out", type=Path, default=None, metavar="DIR",
                       help="results folder (default: results/<sweep file name>/)")
    where = sweep.add_mutually_exclusive_group()
    where.add_argument("--processes", type=_positive_int, default=None, metavar="N",
                       help="local worker processes without any server (default: one per core)")
    where.add_argument("--workers", type=_positive_int, default=None, metavar="N",
                       help="start a dask LocalCluster with N single-threaded worker processes")
    where.add_argument("--scheduler", metavar="ADDRESS", default=None,
                       help="submit to a running dask scheduler, e.g. tcp://10.0.0.5:8786")
    where.add_argument("--jobqueue", choices=JOBQUEUE_KINDS, default=None,
                       help="start batch jobs via dask-jobqueue, configured by [sweep.jobqueue] (optional extra)")
    sweep.add_argument("--list", action="store_true", help="list the points and whether each is complete; run nothing")
    sweep.add_argument("--quiet", action="store_true", help="no progress line")
    sweep.set_defaults(handler=_cmd_sweep)

"""Sweep throughput: one vs two local worker processes, and the Dask path's cost per point.

A 16-point learning-rate sweep of small but complete points (simulation with compile,
paired i.i.d. theory, comparison, storage) is run three times into fresh folders:

* the local executor with 1 worker process, then with 2 (speed-up aimed at >= 1.8x on
  two cores: the points are independent, each process uses one XLA thread);
* a dask LocalCluster of 2 single-threaded worker processes; its start-up is timed
  apart, and (dask time - local time) / points is the Dask path's overhead per point.

Timings include worker start-up (spawning a process and importing JAX), which is part
of what a user waits for. Each executor starts with an empty persistent compilation
cache (``HARNESS_COMPILATION_CACHE``), as a first sweep on a machine does; one more run
of the 2-worker local sweep reuses its cache, as every later sweep of the same shapes does.
Other load on the machine distorts every number here: the
load average before and after is reported with them.

    python benchmarks/sweep.py            # prints a table
"""

from __future__ import annotations

import os
import resource
import sys
import tempfile
import time
from pathlib import Path

from harness.studies import sweep

SWEEP_TEXT = """
[data]
input_dim = 100
[sgd]
time = 40.0
[run]
seeds = 4
evaluations = 20
test_samples = 1000
checkpoint_minutes = 0.0
[sweep]
"sgd.learning_rate" = {rates}
"""


def _plan(folder: Path, points: int) -> sweep.SweepPlan:
    rates = [round(0.1 + 0.05 * i, 4) for i in range(points)]
    path = folder / "benchmark_sweep.toml"
    path.write_text(SWEEP_TEXT.format(rates=rates))
    return sweep.load_sweep(path)


def _cpu_seconds() -> float:
    """CPU time of this process and of every finished (waited-for) descendant process."""
    own, children = resource.getrusage(resource.RUSAGE_SELF), resource.getrusage(resource.RUSAGE_CHILDREN)
    return own.ru_utime + own.ru_stime + children.ru_utime + children.ru_stime


def _fresh_cache(out: Path) -> Path:
    """Give the worker processes started from now on an empty compilation cache."""
    os.environ["HARNESS_COMPILATION_CACHE"] = str(out.parent / f"{out.name}-cache")
    return out


def _timed(plan: sweep.SweepPlan, out: Path, executor) -> tuple[float, float]:
    """Wall time and CPU time (client + workers, which have exited when run_sweep returns)."""
    cpu, started = _cpu_seconds(), time.perf_counter()
    outcome = sweep.run_sweep(plan, out, executor, show_progress=False)
    elapsed = time.perf_counter() - started
    if not outcome.ok or outcome.computed != len(plan.points):
        raise RuntimeError(f"benchmark sweep did not complete: {outcome}")
    return elapsed, _cpu_seconds() - cpu


def run(points: int = 16) -> list[dict]:
    """Time the sweep on each executor; one row per measured quantity."""
    load_before = os.getloadavg()[0]
    with tempfile.TemporaryDirectory(prefix="harness-sweep-bench-") as tmp:
        folder = Path(tmp)
        plan = _plan(folder, points)
        one, one_cpu = _timed(plan, _fresh_cache(folder / "local1"), sweep.LocalExecutor(1))
        two, two_cpu = _timed(plan, _fresh_cache(folder / "local2"), sweep.LocalExecutor(2))
        _fresh_cache(folder / "dask2")  # before the cluster starts: its workers inherit the setting
        cpu, started = _cpu_seconds(), time.perf_counter()
        executor = sweep.local_dask_executor(2)
        dask_startup = time.perf_counter() - started
        dask_two, _ = _timed(plan, folder / "dask2", executor)
        dask_cpu = _cpu_seconds() - cpu  # the cluster's processes have exited: start-up included
        os.environ["HARNESS_COMPILATION_CACHE"] = str(folder / "local2-cache")  # filled by the local2 run
        warm, warm_cpu = _timed(plan, folder / "local2-warm", sweep.LocalExecutor(2))
    load = f"load average {load_before:.1f} before, {os.getloadavg()[0]:.1f} after, {sweep.usable_cores()} cores"
    name = f"sweep of {points} points (N=100, 4 seeds, t=40, with theory)"
    return [
        {"benchmark": name, "quantity": "local, 1 worker process", "value": one, "unit": "s", "note": load},
        {"benchmark": name, "quantity": "local, 2 worker processes", "value": two, "unit": "s", "note": load},
        {"benchmark": name, "quantity": "speed-up 2 vs 1 local workers", "value": one / two, "unit": "x",
         "note": "aim >= 1.8 on 2 idle cores"},
        {"benchmark": name, "quantity": "throughput, 2 local workers", "value": points / two * 60, "unit": "points/min",
         "note": load},
        {"benchmark": name, "quantity": "dask LocalCluster(2), start-up", "value": dask_startup, "unit": "s",
         "note": "once per sweep"},
        {"benchmark": name, "quantity": "dask LocalCluster(2), sweep", "value": dask_two, "unit": "s", "note": load},
        {"benchmark": name, "quantity": "dask overhead per point vs local", "value": (dask_two - two) / points,
         "unit": "s/point", "note": "(dask - local, both 2 workers) / points; start-up excluded"},
        {"benchmark": name, "quantity": "CPU per point, local 1 worker", "value": one_cpu / points,
         "unit": "cpu-s/point", "note": "client + workers; insensitive to other load"},
        {"benchmark": name, "quantity": "CPU per point, local 2 workers", "value": two_cpu / points,
         "unit": "cpu-s/point", "note": "client + workers"},
        {"benchmark": name, "quantity": "CPU per point, dask 2 workers", "value": dask_cpu / points,
         "unit": "cpu-s/point", "note": "client + scheduler + nannies + workers, cluster start-up included"},
        {"benchmark": name, "quantity": "local, 2 workers, warm compilation cache", "value": warm, "unit": "s",
         "note": f"{warm_cpu / points:.2f} cpu-s/point; {load}"},
    ]


def main() -> int:
    points = int(sys.argv[1]) if len(sys.argv) > 1 else 16
    for row in run(points):
        print(f"{row['quantity']:<40} {row['value']:>9.2f} {row['unit']:<10} {row['note']}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

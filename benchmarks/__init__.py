"""Benchmarks of the harness: ``python -m benchmarks`` prints one table measured in one run.

Every section is a module with ``run() -> list[dict]``; a row is
``{"benchmark", "quantity", "value", "unit", "note"}`` (``"measure"`` is accepted for
``"quantity"``). Timings are wall-clock after compilation unless a row says otherwise,
best of a few repeats; since other processes distort them, each row records the 1-minute
load average when it was measured and CPU-seconds where they tell more than wall time.
Figures and the machine they were measured on are kept in benchmarks/RESULTS.md.
"""

from __future__ import annotations

import math
import os
import platform
import resource
import subprocess
import sys
import time
from collections.abc import Callable
from typing import Any


def load_average() -> float:
    """The 1-minute load average (what else is running; 2 cores are busy at 2.0)."""
    try:
        with open("/proc/loadavg") as handle:
            return float(handle.read().split()[0])
    except OSError:
        return math.nan


def harness_command(*args: str, env: dict[str, str]) -> int:
    """Run ``python -m harness ARGS`` quietly; its verdict's exit status (0, 1 or 3), or an error.

    A run that judged its theory (agree 0, disagree 1, inconclusive 3) has done its work;
    bad input (2) or a crash is an error the benchmark must not time.
    """
    from harness.results.judgement import EXIT_STATUS

    done = subprocess.run([sys.executable, "-m", "harness", *args], env=env, stdout=subprocess.DEVNULL,
                          stderr=subprocess.PIPE, text=True)
    if done.returncode not in set(EXIT_STATUS.values()):
        raise RuntimeError(f"harness {' '.join(args)} exited {done.returncode}: {done.stderr.strip()[-2000:]}")
    return done.returncode


def cpu_seconds() -> float:
    """User + system CPU time of this process, all threads."""
    usage = resource.getrusage(resource.RUSAGE_SELF)
    return usage.ru_utime + usage.ru_stime


class Timing:
    """Best (shortest) wall time of repeated calls, the CPU time of that call and the load then."""

    def __init__(self) -> None:
        self.wall = math.inf
        self.cpu = math.nan
        self.load = math.nan

    def measure(self, fn: Callable[[], Any]) -> Any:
        load = load_average()
        cpu, started = cpu_seconds(), time.perf_counter()
        result = fn()
        wall = time.perf_counter() - started
        if wall < self.wall:
            self.wall, self.cpu, self.load = wall, cpu_seconds() - cpu, load
        return result


def machine() -> dict[str, Any]:
    """The machine and software the figures were measured with."""
    cpu_model = platform.processor() or platform.machine()
    try:
        with open("/proc/cpuinfo") as handle:
            for line in handle:
                if line.startswith("model name"):
                    cpu_model = line.split(":", 1)[1].strip()
                    break
    except OSError:
        pass
    memory_gib = math.nan
    try:
        with open("/proc/meminfo") as handle:
            for line in handle:
                if line.startswith("MemTotal"):
                    memory_gib = int(line.split()[1]) / 2**20
                    break
    except OSError:
        pass
    import jax

    from harness.runner.pipeline import package_versions  # the versions a run's manifest records

    versions = package_versions()
    return {
        "nproc": os.cpu_count(),
        "cpu": cpu_model,
        "memory_gib": round(memory_gib, 1),
        "python": platform.python_version(),
        "packages": versions,
        "jax_devices": len(jax.devices()),
        "load_average": load_average(),
    }


def row(benchmark: str, quantity: str, value: float, unit: str, note: str = "", load: float | None = None) -> dict:
    """One table row; ``load`` defaults to the load average now."""
    return {
        "benchmark": benchmark,
        "quantity": quantity,
        "value": float(value),
        "unit": unit,
        "note": note,
        "load": load_average() if load is None else float(load),
    }

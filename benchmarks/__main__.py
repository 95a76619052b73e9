"""``python -m benchmarks [--sections a,b] [--json FILE] [--wait-idle SECONDS]``: one table, one run.

Sections (all by default, in this order): full, blocks, chain, solvers, end_to_end, theory_speed, and the
modules other parts of the harness add (latent, sweep) when present. Each prints its rows
as soon as it is done; the whole table is printed at the end with the machine's description.
"""

from __future__ import annotations

import argparse
import importlib
import json
import math
import sys
import time
from collections.abc import Callable

from benchmarks import machine

SECTIONS: dict[str, tuple[str, str]] = {
    "full": ("benchmarks.full_simulation", "run"),
    "blocks": ("benchmarks.full_simulation", "block_sweep"),
    "chain": ("benchmarks.chain", "run"),
    "solvers": ("benchmarks.solvers", "run"),
    "end_to_end": ("benchmarks.end_to_end", "run"),
    "theory_speed": ("benchmarks.theory_speed", "run"),
    "latent": ("benchmarks.latent", "run"),
    "sweep": ("benchmarks.sweep", "run"),
    "calibration": ("benchmarks.calibration", "run"),
}


def _section(name: str) -> Callable[[], list[dict]] | None:
    module_name, function = SECTIONS[name]
    try:
        module = importlib.import_module(module_name)
    except ModuleNotFoundError as error:
        if error.name == module_name:
            return None  # an optional section that is not there
        raise
    return getattr(module, function)


def _busy_fraction(seconds: float = 1.0) -> float:
    """Fraction of the machine's CPU time spent busy over the next ``seconds`` (from /proc/stat)."""

    def sample() -> tuple[int, int]:
        with open("/proc/stat") as handle:
            fields = [int(x) for x in handle.readline().split()[1:]]
        idle = fields[3] + (fields[4] if len(fields) > 4 else 0)
        return sum(fields), idle

    try:
        total0, idle0 = sample()
        time.sleep(seconds)
        total1, idle1 = sample()
    except OSError:
        return math.nan
    return 1.0 - (idle1 - idle0) / max(1, total1 - total0)


def wait_for_idle(limit_s: float, threshold: float = 0.25) -> float:
    """Wait (at most ``limit_s``) until other processes keep less than ``threshold`` of the CPUs busy."""
    deadline = time.monotonic() + limit_s
    busy = _busy_fraction()
    while busy > threshold and time.monotonic() < deadline:
        busy = _busy_fraction(2.0)
    return busy


def normalise(item: dict, section: str) -> dict:
    """Rows from other sections may name the quantity "measure" and carry no benchmark or load."""
    out = dict(item)
    out.setdefault("benchmark", section)
    if "quantity" not in out:
        out["quantity"] = out.pop("measure", "")
    out.setdefault("note", "")
    out.setdefault("load", math.nan)
    return out


def format_value(value: float) -> str:
    if not math.isfinite(value):
        return str(value)
    if abs(value) >= 1000:
        return f"{value:,.0f}"
    return f"{value:.3g}"


def format_table(rows: list[dict]) -> str:
    header = ("benchmark", "quantity", "value", "unit", "load", "note")
    cells = [header] + [
        (r["benchmark"], r["quantity"], format_value(float(r["value"])), r["unit"],
         "" if not math.isfinite(float(r["load"])) else f"{float(r['load']):.1f}", r["note"])
        for r in rows
    ]
    widths = [max(len(str(c[i])) for c in cells) for i in range(len(header) - 1)]
    lines = []
    for c in cells:
        lines.append("  ".join(str(c[i]).ljust(widths[i]) for i in range(len(header) - 1)) + "  " + str(c[-1]))
    lines.insert(1, "-" * min(160, sum(widths) + 2 * len(widths) + 20))
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m benchmarks", description="Measure the harness; print one table.")
    parser.add_argument("--sections", default=",".join(SECTIONS),
                        help=f"comma-separated, from: {', '.join(SECTIONS)} (default: all)")
    parser.add_argument("--json", metavar="FILE", help="also write the rows and the machine description as JSON")
    parser.add_argument("--wait-idle", type=float, default=0.0, metavar="SECONDS",
                        help="before each section wait up to SECONDS for the machine to be idle (shared machines)")
    args = parser.parse_args(argv)
    chosen = [name.strip() for name in args.sections.split(",") if name.strip()]
    unknown = [name for name in chosen if name not in SECTIONS]
    if unknown:
        print(f"--sections: unknown {', '.join(unknown)}; allowed: {', '.join(SECTIONS)}", file=sys.stderr)
        return 2

    rows: list[dict] = []
    for name in chosen:
        section = _section(name)
        if section is None:
            print(f"[{name}: not present, skipped]", file=sys.stderr)
            continue
        if args.wait_idle > 0:
            busy = wait_for_idle(args.wait_idle)
            print(f"[{name}: machine {100 * busy:.0f}% busy when starting]", file=sys.stderr)
        new = [normalise(item, name) for item in section()]
        print(format_table(new), file=sys.stderr, flush=True)
        rows.extend(new)

    description = machine()
    packages = ", ".join(f"{k} {v}" for k, v in description["packages"].items())
    print(f"machine: {description['nproc']} cores ({description['cpu']}), {description['memory_gib']} GiB, "
          f"python {description['python']}, {description['jax_devices']} XLA CPU devices; {packages}")
    print(f"load average at the end: {description['load_average']:.2f} (1 min); the load column is at each measurement")
    print(format_table(rows))
    if args.json:
        with open(args.json, "w") as handle:
            json.dump({"machine": description, "rows": rows}, handle, indent=1)
    return 0


if __name__ == "__main__":
    sys.exit(main())

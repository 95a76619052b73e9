"""``harness run`` on the default scenario, end to end, in a fresh process (issue 7).

Three runs into fresh result folders, each a new process (imports, compilation, simulation,
theory, tables, storage):

* cold: no persistent compilation cache (``HARNESS_COMPILATION_CACHE=off``);
* cache fill and cache hit: a new, empty cache folder, used by two runs in a row, as a user's
  second run of a scenario of the same shapes (another learning rate, say) finds it.

Wall time of the whole command (aim <= 60 s) and the run manifest's timings: compile_s
(drawing the instances and compiling the simulator), simulation_s (compilation excluded),
theory_s (the theory's solve, compilation excluded) and theory_compile_s (tracing and
compiling the diffrax solve, measured by harness.runner.compile_clock).
"""

from __future__ import annotations

import json
import os
import tempfile
import time
from pathlib import Path

from benchmarks import harness_command, load_average, row

NAME = "harness run (default scenario)"


def _harness_run(out: Path, cache: str) -> tuple[float, dict, float]:
    env = dict(os.environ, HARNESS_COMPILATION_CACHE=cache)
    load = load_average()
    started = time.perf_counter()
    harness_command("run", "--out", str(out), env=env)
    wall = time.perf_counter() - started
    manifest = json.loads(next(out.glob("*/manifest.json")).read_text())
    return wall, manifest["timings"], load


def run() -> list[dict]:
    rows = []
    with tempfile.TemporaryDirectory() as folder:
        folder = Path(folder)
        cache = str(folder / "xla-cache")
        for label, setting in (("cold, no cache", "off"), ("cache fill", cache), ("cache hit", cache)):
            wall, timings, load = _harness_run(folder / label.replace(" ", "_").replace(",", ""), setting)
            note = ", ".join(f"{name} {value:.2f} s" for name, value in timings.items())
            rows.append(row(NAME, f"wall time, {label}", wall, "s", f"{note}; aim <= 60 s", load))
            rows.append(row(NAME, f"theory_s / simulation_s, {label}", timings["theory_s"] / timings["simulation_s"],
                            "ratio", "theory should cost well under the simulation", load))
            compile_total = timings["compile_s"] + timings.get("theory_compile_s", 0.0)
            rows.append(row(NAME, f"compile time, {label}", compile_total, "s",
                            "compile_s + theory_compile_s", load))
    return rows


if __name__ == "__main__":
    for r in run():
        print(r)

"""The built-in theory against the simulation, for activations other than erf (issue 12).

``harness run`` on the scenarios in benchmarks/scenarios/, each in a fresh process with the
persistent compilation cache off (a user's first run of those shapes), reading the run
manifest's timings: simulation_s (compilation excluded), theory_s (the theory's solve and
its eps_g, compilation excluded) and theory_compile_s (tracing and compiling them, measured
by harness.runner.compile_clock). Targets: theory_s <= simulation_s and theory_compile_s <= 5 s
for the relu and tanh scenarios; the erf scenario (closed forms) is the reference.
"""

from __future__ import annotations

import json
import os
import tempfile
from pathlib import Path

from benchmarks import harness_command, load_average, row

NAME = "theory vs simulation"
SCENARIOS = {
    "relu K=3 M=2, trained 2nd layer, noise": "relu_k3m2_trained.toml",
    "tanh K=M=2": "tanh_k2m2.toml",
    "erf K=3 M=2 (reference)": "erf_k3m2_trained.toml",
}
FOLDER = Path(__file__).resolve().parent / "scenarios"


def _run(scenario: Path, out: Path) -> tuple[dict, float]:
    env = dict(os.environ, HARNESS_COMPILATION_CACHE="off")
    load = load_average()
    harness_command("run", str(scenario), "--out", str(out), env=env)
    manifest = json.loads(next(out.glob("*/manifest.json")).read_text())
    return manifest["timings"], load


def run() -> list[dict]:
    rows = []
    with tempfile.TemporaryDirectory() as folder:
        for label, file in SCENARIOS.items():
            timings, load = _run(FOLDER / file, Path(folder) / file.removesuffix(".toml"))
            sim, theory, compile_s = timings["simulation_s"], timings["theory_s"], timings["theory_compile_s"]
            rows.append(row(NAME, f"theory_s / simulation_s, {label}", theory / sim, "ratio",
                            f"theory_s {theory:.2f} s, simulation_s {sim:.2f} s; aim <= 1", load))
            rows.append(row(NAME, f"theory_compile_s, {label}", compile_s, "s", "cold cache; aim <= 5 s", load))
    return rows


if __name__ == "__main__":
    for r in run():
        print(r)

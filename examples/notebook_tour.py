"""A notebook-style tour of the Python API: run a scenario, look at its verdict, plot it, read it back.

Run it as a script (``python examples/notebook_tour.py [OUT]``) or paste the cells into a
notebook. The scenario is deliberately small (a few seconds on a laptop); the tests run this
file as it is (tests/test_examples.py).
"""

# %% A scenario is a dict of tables, a TOML file, or nothing at all (the default scenario).
from __future__ import annotations

import sys
import tempfile
from pathlib import Path

import harness

out = Path(sys.argv[1]) if len(sys.argv) > 1 else Path(tempfile.mkdtemp(prefix="harness-tour-"))
scenario = {
    "data": {"input_dim": 100},
    "teacher": {"hidden": 1},
    "student": {"hidden": 1, "init_std": 0.5},
    "sgd": {"learning_rate": 1.0, "time": 5.0},
    "run": {"seeds": 6, "evaluations": 12, "test_samples": 2000},
    "agreement": {"margin": 0.10},  # how close is close enough: 10 %
}

# %% Simulate, pair with the theory seed by seed, judge: one call.
result = harness.run(scenario, out=out)
print(f"{result.run_id}: {result.verdict}")
print(result.metrics[["observable", "verdict", "band_reach", "max_abs_z"]].to_string(index=False))

# %% The scenario comes back resolved, every default filled in and typed.
print("learning rate", result.scenario.sgd.learning_rate, "seeds", result.scenario.run.seeds)

# %% Plot straight from the result (matplotlib figures).
import matplotlib  # noqa: E402

matplotlib.use("Agg")  # a file, not a window: this tour also runs headless
figure = result.figure("learning_curve")
figure.savefig(out / "tour_learning_curve.png", dpi=120)

# %% Read the stored run back later, in another session.
again = harness.load_run(result.folder)
assert again.verdict == result.verdict and again.summary.equals(result.summary)
final = again.summary[again.summary["observable"] == "test_error"].iloc[-1]
print(f"final test error: simulation {final['sim_mean']:.4f}, theory {final['theory_mean']:.4f}")

# %% The same trajectories as [seeds, times, observables] arrays (or an xarray Dataset with to_xarray()).
arrays = again.arrays()
print("arrays:", arrays.sim.shape, "observables:", ", ".join(arrays.observables[:4]), "...")

"""How often the verdict errs: its rates over many replicate ensembles (python -m benchmarks --sections calibration).

One large ensemble of the exact order-parameter chain (harness.sim.chain: exact in law at any N,
so thousands of seeds cost seconds; K = M = 1 erf, eta = 1.5, N = 500, t = 5, 10 evaluation
times) is cut into replicate ensembles of S seeds and each is judged as ``harness run`` would
judge it (harness.results.judgement, default margin 5 %, alpha = 0.05), against

* the built-in theory: correct, so "disagree" is an error;
* the same equations without their eta^2 term: wrong by far more than the margin, so
  "agree" is an error;
* the built-in theory moved by 0.9 margins (inside: "disagree" is an error) and by 1.1 margins
  (outside: "agree" is an error) on the error curves.

Every rate comes with its exact (Clopper-Pearson) 95 % interval. tests/test_judgement_calibration.py
runs a smaller version of the same on every test run; docs/judgement.md quotes these figures.
"""

from __future__ import annotations

import numpy as np
from scipy import stats

from harness.core import scenario as sc
from harness.core.trajectories import Trajectories
from harness.equations.sources import builtin_iid
from harness.results.judgement import Margin, judge
from harness.runner import experiment
from harness.sim import simulation
from harness.sim.initial import initial_state

SEED_COUNTS = (3, 8, 16, 32, 64)
ENSEMBLE_SEEDS = 12_800


def ensemble(seeds: int, input_dim: int = 500, time: float = 5.0) -> tuple[Trajectories, np.ndarray]:
    """The chain's trajectories paired with the built-in theory, and the no-eta^2 theory's values."""
    scenario = sc.resolve({
        "data": {"input_dim": input_dim},
        "teacher": {"hidden": 1},
        "student": {"hidden": 1},
        "sgd": {"learning_rate": 1.5, "time": time},
        "run": {"seeds": seeds, "evaluations": 10, "engine": "chain", "checkpoint_minutes": 0.0},
    })
    traj = experiment.run_experiment(scenario).trajectories
    start = initial_state(simulation.make_simulator(scenario), traj.seeds)
    return traj, builtin_iid(scenario, start, traj.t, second_order=False).values


def verdict_counts(
    traj: Trajectories, theory: np.ndarray, seeds: int, replicates: int, group: str | None = None
) -> dict[str, int]:
    """Outcome counts over ``replicates`` disjoint ensembles of ``seeds`` seeds (the run's or one group's)."""
    counts: dict[str, int] = {}
    for start in range(0, min(len(traj.seeds), replicates * seeds) - seeds + 1, seeds):
        part = slice(start, start + seeds)
        replicate = Trajectories(np.arange(seeds), traj.t, traj.observables, traj.sim[part], theory[part])
        result = judge(replicate, Margin())
        verdict = result.verdict if group is None else result.group(group).verdict
        counts[verdict] = counts.get(verdict, 0) + 1
    return counts


def rate(count: int, total: int) -> tuple[float, float, float]:
    """The observed rate with its exact 95 % interval (Clopper & Pearson 1934, scipy.stats.binomtest)."""
    interval = stats.binomtest(count, total).proportion_ci(0.95, method="exact")
    return count / total, float(interval.low), float(interval.high)


def error_curves_shifted(traj: Trajectories, margins: float) -> tuple[Trajectories, np.ndarray]:
    """The error curves alone, with their paired theory moved by ``margins`` x the margin (5 % of the mean)."""
    columns = [traj.observables.index(name) for name in ("test_error", "overlap_error")]
    errors = traj._replace(
        observables=["test_error", "overlap_error"], sim=traj.sim[:, :, columns], theory=traj.theory[:, :, columns]
    )
    shift = margins * Margin().margin * np.abs(np.nanmean(errors.sim, axis=0))
    return errors, errors.theory + shift[None]


def run() -> list[dict]:
    traj, wrong = ensemble(ENSEMBLE_SEEDS)
    inside = error_curves_shifted(traj, 0.9)
    outside = error_curves_shifted(traj, 1.1)
    cases = (
        ("correct theory", traj, traj.theory, None, ("disagree", "agree")),
        ("no eta^2 term", traj, wrong, None, ("agree", "disagree")),
        ("0.9 margins off (test_error)", *inside, "test_error", ("disagree", "agree")),
        ("1.1 margins off (test_error)", *outside, "test_error", ("agree", "disagree")),
    )
    rows = []
    for seeds in SEED_COUNTS:
        replicates = min(400, ENSEMBLE_SEEDS // seeds)
        for label, data, theory, group, (error, right) in cases:
            counts = verdict_counts(data, theory, seeds, replicates, group)
            total = sum(counts.values())
            value, low, high = rate(counts.get(error, 0), total)
            rows.append({
                "benchmark": "calibration",
                "quantity": f"{label}, {seeds} seeds: '{error}' rate",
                "value": value,
                "unit": "fraction",
                "note": f"{counts.get(error, 0)}/{total} [{low:.3f}, {high:.3f}]; '{right}' "
                        f"{counts.get(right, 0)}, inconclusive {counts.get('inconclusive', 0)}",
            })
            print(rows[-1]["quantity"], rows[-1]["note"], flush=True)
    return rows

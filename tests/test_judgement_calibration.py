"""Calibration of the verdict by simulation: its error rates over many replicate ensembles.

One large ensemble of the exact order-parameter chain (K = M = 1 erf, eta = 1.5, i.i.d.
Gaussian inputs; exact in law at any N, so thousands of seeds cost seconds) is cut into
replicate ensembles of S seeds, each judged as a run would be, against

* the built-in theory (docs/equations.md, section 4): correct, so "disagree" is an error;
* the same equations without their eta^2 term (examples/no_eta_squared_theory.py): wrong by
  far more than the 5 % margin, so "agree" is an error;
* the built-in theory shifted by 0.9 margins (inside the margin: "disagree" is an error) and
  by 1.1 margins (outside it: "agree" is an error) on the error curves.

The verdict's promise (harness.judgement, docs/judgement.md): each error at most at the
nominal rate alpha = 0.05 (two one-sided tests, Schuirmann 1987; simultaneous bands by the
bootstrap max-|t|, Westfall & Young 1993, or Sidak 1967 with few seeds). Each rate is shown
with its exact binomial (Clopper-Pearson 1934) interval; a test fails when the interval lies
wholly above alpha. With 3 seeds the verdict on a correct theory must be mostly inconclusive.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from harness import experiment, simulation
from harness import scenario as sc
from harness.judgement import Margin, judge
from harness.paired_theory import builtin_iid, initial_state
from harness.trajectories import Trajectories

ALPHA = Margin().alpha
REPLICATES = 200
SEEDS = 16


@pytest.fixture(scope="module")
def ensemble():
    scenario = sc.resolve({
        "data": {"input_dim": 500},
        "teacher": {"hidden": 1},
        "student": {"hidden": 1},
        "sgd": {"learning_rate": 1.5, "time": 5.0},
        "run": {"seeds": REPLICATES * SEEDS, "evaluations": 10, "engine": "chain", "checkpoint_minutes": 0.0},
    })
    result = experiment.run_experiment(scenario)
    traj = result.trajectories
    start = initial_state(simulation.make_simulator(scenario), traj.seeds)
    wrong = builtin_iid(scenario, start, traj.t, second_order=False).values
    return traj, wrong


def _verdicts(
    traj: Trajectories, theory: np.ndarray, seeds: int, group: str | None = None, replicates: int = REPLICATES
) -> dict[str, int]:
    """Outcome counts over ``replicates`` ensembles of ``seeds`` seeds (the run's, or one group's)."""
    counts: dict[str, int] = {}
    for start in range(0, min(len(traj.seeds), replicates * seeds) - seeds + 1, seeds):
        part = slice(start, start + seeds)
        replicate = Trajectories(np.arange(seeds), traj.t, traj.observables, traj.sim[part], theory[part])
        result = judge(replicate, Margin())
        verdict = result.verdict if group is None else result.group(group).verdict
        counts[verdict] = counts.get(verdict, 0) + 1
    return counts


def _rate(count: int, total: int) -> tuple[float, float, float]:
    """The observed rate with its 95 % Clopper-Pearson interval (scipy.stats.binomtest)."""
    interval = stats.binomtest(count, total).proportion_ci(0.95, method="exact")
    return count / total, interval.low, interval.high


def _error_curves_shifted(traj: Trajectories, margins: float) -> tuple[Trajectories, np.ndarray]:
    """The error curves alone, and their paired theory moved by ``margins`` x the margin (5 % of the mean)."""
    columns = [traj.observables.index(name) for name in ("test_error", "overlap_error")]
    errors = traj._replace(observables=["test_error", "overlap_error"], sim=traj.sim[:, :, columns],
                           theory=traj.theory[:, :, columns])
    shift = margins * Margin().margin * np.abs(np.nanmean(errors.sim, axis=0))
    return errors, errors.theory + shift[None]


def test_a_correct_theory_is_called_disagree_at_most_at_the_nominal_rate(ensemble):
    traj, _ = ensemble
    counts = _verdicts(traj, traj.theory, SEEDS)
    rate, low, high = _rate(counts.get("disagree", 0), REPLICATES)
    print(f"correct theory, {SEEDS} seeds: {counts}; disagree rate {rate:.3f} [{low:.3f}, {high:.3f}]")
    assert low <= ALPHA and rate <= ALPHA


def test_a_theory_missing_its_eta_squared_term_is_called_agree_at_most_at_the_nominal_rate(ensemble):
    traj, wrong = ensemble
    counts = _verdicts(traj, wrong, SEEDS)
    rate, low, high = _rate(counts.get("agree", 0), REPLICATES)
    print(f"no eta^2 term, {SEEDS} seeds: {counts}; agree rate {rate:.3f} [{low:.3f}, {high:.3f}]")
    assert low <= ALPHA and rate <= ALPHA
    assert counts.get("disagree", 0) >= 0.9 * REPLICATES  # and it is shown to be wrong


def test_error_rates_just_inside_and_just_outside_the_margin(ensemble):
    traj, _ = ensemble
    inside = _verdicts(*_error_curves_shifted(traj, 0.9), SEEDS, group="test_error")
    outside = _verdicts(*_error_curves_shifted(traj, 1.1), SEEDS, group="test_error")
    wrong_disagree = _rate(inside.get("disagree", 0), REPLICATES)
    wrong_agree = _rate(outside.get("agree", 0), REPLICATES)
    print(f"0.9 margins: {inside}; disagree rate {wrong_disagree[0]:.3f} "
          f"[{wrong_disagree[1]:.3f}, {wrong_disagree[2]:.3f}]")
    print(f"1.1 margins: {outside}; agree rate {wrong_agree[0]:.3f} [{wrong_agree[1]:.3f}, {wrong_agree[2]:.3f}]")
    assert wrong_disagree[1] <= ALPHA and wrong_agree[1] <= ALPHA


def test_with_three_seeds_a_correct_theory_is_mostly_inconclusive(ensemble):
    traj, _ = ensemble
    counts = _verdicts(traj, traj.theory, 3)
    total = sum(counts.values())
    print(f"correct theory, 3 seeds: {counts}")
    assert counts.get("inconclusive", 0) >= 0.9 * total
    assert counts.get("agree", 0) <= ALPHA * total and counts.get("disagree", 0) <= ALPHA * total


def test_with_enough_seeds_a_correct_theory_agrees(ensemble):
    traj, _ = ensemble
    counts = _verdicts(traj, traj.theory, 64, replicates=25)
    print(f"correct theory, 64 seeds: {counts}")
    assert counts.get("agree", 0) >= 0.8 * sum(counts.values())

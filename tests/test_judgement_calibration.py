"""Calibration of the verdict by simulation: its error rates over many replicate ensembles.

(A smaller run of benchmarks/calibration.py, whose functions it uses.)

One large ensemble of the exact order-parameter chain (K = M = 1 erf, eta = 1.5, i.i.d.
Gaussian inputs; exact in law at any N, so thousands of seeds cost seconds) is cut into
replicate ensembles of S seeds, each judged as a run would be, against

* the built-in theory (docs/equations.md, section 4): correct, so "disagree" is an error;
* the same equations without their eta^2 term (examples/no_eta_squared_theory.py): wrong by
  far more than the 5 % margin, so "agree" is an error;
* the built-in theory shifted by 0.9 margins (inside the margin: "disagree" is an error) and
  by 1.1 margins (outside it: "agree" is an error) on the error curves.

The verdict's promise (harness.results.judgement, docs/judgement.md): each error at most at the
nominal rate alpha = 0.05 (two one-sided tests, Schuirmann 1987; simultaneous bands by the
bootstrap max-|t|, Westfall & Young 1993, or Sidak 1967 with few seeds). Each rate is shown
with its exact binomial (Clopper-Pearson 1934) interval; a test fails when the interval lies
wholly above alpha. With 3 seeds the verdict on a correct theory must be mostly inconclusive.
"""

from __future__ import annotations

import pytest

from benchmarks import calibration
from harness.results.judgement import Margin

ALPHA = Margin().alpha
REPLICATES = 200
SEEDS = 16


@pytest.fixture(scope="module")
def ensemble():
    return calibration.ensemble(REPLICATES * SEEDS)


def _verdicts(traj, theory, seeds: int, group: str | None = None, replicates: int = REPLICATES) -> dict[str, int]:
    return calibration.verdict_counts(traj, theory, seeds, replicates, group)


def test_a_correct_theory_is_called_disagree_at_most_at_the_nominal_rate(ensemble):
    traj, _ = ensemble
    counts = _verdicts(traj, traj.theory, SEEDS)
    rate, low, high = calibration.rate(counts.get("disagree", 0), REPLICATES)
    print(f"correct theory, {SEEDS} seeds: {counts}; disagree rate {rate:.3f} [{low:.3f}, {high:.3f}]")
    assert low <= ALPHA and rate <= ALPHA


def test_a_theory_missing_its_eta_squared_term_is_called_agree_at_most_at_the_nominal_rate(ensemble):
    traj, wrong = ensemble
    counts = _verdicts(traj, wrong, SEEDS)
    rate, low, high = calibration.rate(counts.get("agree", 0), REPLICATES)
    print(f"no eta^2 term, {SEEDS} seeds: {counts}; agree rate {rate:.3f} [{low:.3f}, {high:.3f}]")
    assert low <= ALPHA and rate <= ALPHA
    assert counts.get("disagree", 0) >= 0.9 * REPLICATES  # and it is shown to be wrong


def test_error_rates_just_inside_and_just_outside_the_margin(ensemble):
    traj, _ = ensemble
    inside = _verdicts(*calibration.error_curves_shifted(traj, 0.9), SEEDS, group="test_error")
    outside = _verdicts(*calibration.error_curves_shifted(traj, 1.1), SEEDS, group="test_error")
    wrong_disagree = calibration.rate(inside.get("disagree", 0), REPLICATES)
    wrong_agree = calibration.rate(outside.get("agree", 0), REPLICATES)
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
    # 64 seeds at N = 500: ~70 % of ensembles agree (measured), the rest stay inconclusive.
    counts = _verdicts(traj, traj.theory, 64, replicates=25)
    print(f"correct theory, 64 seeds: {counts}")
    assert counts.get("agree", 0) >= 0.5 * sum(counts.values()) and counts.get("disagree", 0) == 0

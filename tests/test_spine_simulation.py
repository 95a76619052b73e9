"""The JAX simulation against classic closed forms and against its paired theory."""

from __future__ import annotations

import numpy as np
import pytest

from harness.core import scenario as sc
from harness.core import times as time_grid
from harness.equations.sources import builtin_iid
from harness.results import comparison
from harness.results.judgement import Margin
from harness.runner.experiment import run_experiment, simulate
from harness.sim import simulation
from harness.sim.initial import initial_state

INNER = 13.78  # measured when written: the band lies 13.8 margins out where it lies furthest


def test_lms_learning_curve_matches_the_exact_finite_n_recursion():
    # Classic LMS analysis with white Gaussian inputs (Widrow & Hoff; Haykin, Adaptive Filter
    # Theory -- from memory): for a linear student and teacher, K = M = 1, label noise sigma,
    # E[eps_{s+1} | eps_s] = eps_s (1 - 2 eta/N + eta^2 (N+2)/N^2) + eta^2 sigma^2 / (2N)
    # exactly at every finite N. For linear networks overlap_error = |w - w*|^2 / (2N) is eps_g
    # itself, so each seed's expected curve follows from its own eps_0.
    # N = 10 makes the finite-N term (N + 2) / N a 20 % effect and 2000 seeds resolve it: the
    # same data reject the recursion with N in place of N + 2 (max |z| ~ 12 when written) and
    # with eta 5 % off (~9), so the check can tell.
    n, eta, sigma = 10, 0.5, 0.3
    scenario = sc.resolve({
        "data": {"input_dim": n},
        "teacher": {"hidden": 1, "activation": "linear", "noise_std": sigma},
        "student": {"hidden": 1, "activation": "linear", "init_std": 0.5},
        "sgd": {"learning_rate": eta, "time": 20.0},
        "run": {"seeds": 2000, "evaluations": 12, "spacing": "linear", "test_samples": 500, "dtype": "float64"},
        "theory": {"source": "none"},
    })
    result = simulate(scenario)
    eps = result.values[:, :, 1]  # overlap_error, [S, E]
    steps = result.steps[None, :]

    def max_abs_z(values: np.ndarray, rate: float, size_term: float) -> float:
        a = 1 - 2 * rate / n + rate**2 * size_term / n**2
        b = rate**2 * sigma**2 / (2 * n)
        diff = values - (eps[:, :1] * a**steps + b * (1 - a**steps) / (1 - a))
        return float(np.max(np.abs(diff.mean(axis=0)[1:] / (diff.std(axis=0, ddof=1)[1:] / np.sqrt(len(diff))))))

    assert max_abs_z(eps, eta, n + 2) <= 3.5
    assert max_abs_z(eps, eta, n) > 6  # the recursion without its finite-N term
    assert max_abs_z(eps, 1.05 * eta, n + 2) > 6  # a learning rate 5 % off
    # The measured test error (held-out samples) is an unbiased estimate of the same curve.
    assert max_abs_z(result.values[:, :, 0], eta, n + 2) <= 3.5


@pytest.fixture(scope="module")
def erf_run():
    # Agreement within the default 5 % margin has to be *shown*: at N = 300 the finite-size
    # difference (~3 % of the error during its fast decay) and the seeds' spread leave 32 seeds
    # inconclusive; at N = 1000, 48 seeds show it with room (band reach ~0.6 of the margin,
    # measured when written).
    scenario = sc.resolve({
        "data": {"input_dim": 1000},
        "student": {"init_std": 0.5},
        "sgd": {"learning_rate": 1.0, "time": 10.0},
        "run": {"seeds": 48, "evaluations": 12, "test_samples": 4000},
    })
    return scenario, run_experiment(scenario)


def test_simulation_agrees_with_paired_theory_on_a_small_erf_scenario(erf_run):
    scenario, result = erf_run
    judged = comparison.compare(result.trajectories, Margin()).judgement
    assert not np.isfinite(result.diverged_at).any()
    verdicts = {g.group: g.verdict for g in judged.groups}
    assert verdicts == dict.fromkeys(["test_error", "overlap_error", "Q", "R", "T"], "agree"), judged.groups
    assert judged.verdict == "agree"
    # The theory really moved: eps_g fell by more than half, so agreement is not trivial.
    test = result.trajectories.theory[:, :, 0].mean(axis=0)
    assert test[-1] < 0.5 * test[0]


def test_the_same_machinery_flags_a_wrong_theory(erf_run):
    # The notes' equations without the eta^2 term: wrong at any finite learning rate.
    scenario, result = erf_run
    start = initial_state(simulation.make_simulator(scenario), result.trajectories.seeds)
    wrong = builtin_iid(scenario, start, result.trajectories.t, second_order=False)
    traj = result.trajectories._replace(theory=wrong.values)
    comp = comparison.compare(traj, Margin())
    test = comp.judgement.group("test_error")
    assert comp.judgement.verdict == "disagree" and test.verdict == "disagree"
    # How far outside the margin the band lies where it lies furthest: measured when written
    # (48 seeds) inner = INNER; a broken SEM (missing its 1/sqrt S: the band 7x wider) or margin moves it.
    assert test.inner == pytest.approx(INNER, rel=0.1)
    metric_table = comp.metrics.set_index("observable")
    assert np.isfinite(metric_table.loc["test_error", "divergence_t"])


def test_diverging_seeds_leave_the_averages_with_a_warning():
    scenario = sc.resolve({
        "data": {"input_dim": 50},
        "student": {"activation": "linear", "init_std": 1.0},
        "teacher": {"activation": "linear"},
        "sgd": {"learning_rate": 6.0, "time": 20.0},
        "run": {"seeds": 3, "evaluations": 6, "test_samples": 200},
        "theory": {"source": "none"},
    })
    with pytest.warns(RuntimeWarning, match="diverged"):
        result = simulate(scenario)
    assert np.isfinite(result.diverged_at).all()
    first = np.searchsorted(result.t, result.diverged_at)
    for s, e in enumerate(first):
        assert np.isnan(result.values[s, e:]).all() and np.isfinite(result.values[s, :e]).all()


def test_runs_are_bit_identical_and_seeds_differ():
    scenario = sc.resolve({
        "data": {"input_dim": 60},
        "sgd": {"time": 3.0},
        "run": {"seeds": 3, "evaluations": 4, "test_samples": 100},
        "theory": {"source": "none"},
    })
    first, second = simulate(scenario), simulate(scenario)
    np.testing.assert_array_equal(first.values, second.values)
    assert not np.allclose(first.values[0], first.values[1])


def test_evaluation_times_include_zero_and_the_end():
    s = sc.resolve({"data": {"input_dim": 100}, "sgd": {"time": 50.0}, "run": {"evaluations": 30}})
    steps = time_grid.evaluation_steps(s)
    assert steps[0] == 0 and steps[-1] == 5000 and np.all(np.diff(steps) > 0) and len(steps) == 30
    lin = time_grid.evaluation_steps(sc.with_overrides(s, {"run.spacing": "linear"}))
    assert np.allclose(np.diff(lin), 5000 / 29, atol=1)

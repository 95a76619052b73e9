"""The time grid: whole SGD steps, and scenarios asking for what whole steps cannot give.

t = steps / N (docs/equations.md, section 1), so a run measures at t = k / N only. A scenario
that asks for more evaluation times than there are steps, or for less than one step, is
refused when it is resolved (before any work) with one line naming the key; one whose time
is not a whole number of steps, or whose first log-spaced times fall within one step, is
run with a one-line warning saying what changed.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from harness.cli.main import main
from harness.core.scenario import ScenarioError, resolve
from harness.core.times import evaluation_steps, total_steps


def _scenario(n: int, time: float, evaluations: int = 6, spacing: str = "log"):
    return {"data": {"input_dim": n}, "sgd": {"time": time}, "run": {"evaluations": evaluations, "spacing": spacing}}


def _resolve_quietly(table):
    """Resolve, failing on any warning: the scenario is expected to give exactly what it asks."""
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        return resolve(table)


def test_a_grid_that_fits_gives_every_time_asked_for():
    for spacing in ("log", "linear"):
        scenario = _resolve_quietly(_scenario(20, 1.0, evaluations=6, spacing=spacing))
        steps = evaluation_steps(scenario)
        assert len(steps) == 6 and steps[0] == 0 and steps[-1] == total_steps(scenario) == 20
        assert np.all(np.diff(steps) > 0)
    # One time per step, t = 0 included: the most a grid of 20 steps holds.
    steps = evaluation_steps(_resolve_quietly(_scenario(20, 1.0, evaluations=21, spacing="linear")))
    np.testing.assert_array_equal(steps, np.arange(21))


def test_input_dim_1_cannot_hold_60_evaluations():
    # The default 60 evaluations at N = 1 and t = 1 is one SGD step: two times at most (t = 0 and 1).
    # It used to be accepted and silently measured 2 times.
    with pytest.raises(ScenarioError) as caught:
        resolve({"data": {"input_dim": 1}, "sgd": {"time": 1.0}})
    message = str(caught.value)
    assert "\n" not in message
    assert message.startswith("scenario key 'run.evaluations': 60 evaluation times do not fit in 1 SGD step ")
    assert message.endswith("allowed: at most 2")


@pytest.mark.parametrize("spacing", ["log", "linear"])
def test_more_evaluations_than_steps_are_refused(spacing):
    with pytest.raises(ScenarioError, match=r"'run.evaluations': 30 evaluation times do not fit in 20 SGD steps.*"
                                            r"allowed: at most 21$"):
        resolve(_scenario(20, 1.0, evaluations=30, spacing=spacing))


def test_a_time_shorter_than_one_step_is_refused():
    # N = 20: one step is t = 0.05; 0.01 would silently have become one full step.
    with pytest.raises(ScenarioError, match=r"^scenario key 'sgd.time': 0.01 is shorter than one SGD step "
                                            r"\(1 / data.input_dim = 0.05\); allowed: at least 0.05$"):
        resolve(_scenario(20, 0.01, evaluations=2))
    assert total_steps(_resolve_quietly(_scenario(20, 0.05, evaluations=2))) == 1  # exactly one step is fine


def test_a_time_between_steps_warns_where_the_run_ends():
    with pytest.warns(UserWarning) as caught:
        scenario = resolve(_scenario(20, 1.03))  # 20.6 steps
    (warning,) = [w for w in caught if "sgd.time" in str(w.message)]
    assert str(warning.message) == (
        "sgd.time = 1.03 is 20.6 SGD steps at data.input_dim = 20; the run takes 21 steps and ends at t = 1.05"
    )
    assert evaluation_steps(scenario)[-1] == 21


def test_log_times_closer_than_a_step_are_spread_with_a_warning():
    # N = 1, t = 300, 60 log-spaced times: the first ones fall between whole steps and are
    # taken at consecutive steps instead; every time asked for is still measured.
    with pytest.warns(UserWarning, match=r"early evaluation time\(s\) fall less than one SGD step apart") as caught:
        scenario = resolve({"data": {"input_dim": 1}})
    assert all("\n" not in str(w.message) for w in caught)
    steps = evaluation_steps(scenario)
    assert len(steps) == 60 and np.all(np.diff(steps) >= 1)
    np.testing.assert_array_equal(steps[:5], [0, 1, 2, 3, 4])


def test_run_command_refuses_the_grid_before_any_work(tmp_path, capsys):
    scenario = tmp_path / "n1.toml"
    scenario.write_text("[data]\ninput_dim = 1\n[sgd]\ntime = 1.0\n")
    out = tmp_path / "results"
    assert main(["run", str(scenario), "--out", str(out)]) == 2
    error = capsys.readouterr().err
    assert error.count("\n") == 1 and "run.evaluations" in error
    assert not out.exists()

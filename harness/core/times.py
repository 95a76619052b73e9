"""The time grid of a run: how many SGD steps, and at which steps the run is measured.

Time is t = steps / N (docs/equations.md, section 1): one unit of t is N samples, and
the grid is made of whole steps, so a run can only be measured at t = k / N.

What the scenario asks and what whole steps can give (:func:`check_time_grid`, registered
with the scenario's checks, so it runs whenever a scenario is resolved, before any work):

* ``sgd.time`` shorter than one step (time x N < 1): nothing can be trained: refused.
* ``run.evaluations`` larger than the distinct steps the grid can hold (at most
  time x N + 1 with t = 0): the run would silently measure fewer times: refused, naming the
  largest count that fits.
* ``sgd.time`` not a whole number of steps (time x N = 166.5): the run takes the nearest
  whole number of steps and ends a little earlier or later; meaningful, so a one-line
  warning says where it ends.
* log spacing whose first points fall closer together than one step: they are taken at
  consecutive steps instead (evenly spaced at the start, not geometrically); meaningful,
  so a one-line warning says how many.
"""

from __future__ import annotations

import warnings

import numpy as np

from harness.core.scenario import ScenarioError, register_check
from harness.core.sections import Scenario


def total_steps(scenario: Scenario) -> int:
    """Number of SGD steps for the scenario's time: round(time * N), at least 1."""
    return max(1, round(scenario.sgd.time * scenario.data.input_dim))


def _requested_steps(scenario: Scenario) -> np.ndarray:
    """The evaluation steps as asked (rounded to whole steps, before any adjustment)."""
    n = scenario.data.input_dim
    end = total_steps(scenario)
    count = scenario.run.evaluations
    if scenario.run.spacing == "linear":
        steps = np.rint(np.linspace(0, end, count)).astype(np.int64)
    else:
        first = max(scenario.sgd.time / 1000.0, 1.0 / n) * n
        grid = np.geomspace(first, end, count - 1) if count > 2 else np.array([end])
        steps = np.concatenate([[0], np.rint(grid).astype(np.int64)])
    steps[-1] = end
    return steps


def evaluation_steps(scenario: Scenario) -> np.ndarray:
    """Strictly increasing SGD step counts at which to measure, 0 and the end included.

    Log spacing places ``evaluations - 1`` points geometrically between
    t_1 = max(time / 1000, 1 / N) and the final time, after t = 0. Rounding to whole
    steps can merge early points; they are then pushed one step apart, and if that
    overshoots the end, fewer evaluations result (never duplicates). A scenario for which
    that would happen is refused by :func:`check_time_grid`.
    """
    end = total_steps(scenario)
    steps = _requested_steps(scenario)
    for i in range(1, len(steps)):  # force strictly increasing
        steps[i] = max(steps[i], steps[i - 1] + 1)
    return np.unique(steps[steps <= end])


def check_time_grid(scenario: Scenario) -> None:
    """Refuse a time grid that cannot give what was asked; warn (one line) where it differs but is meaningful."""
    n = scenario.data.input_dim
    time = scenario.sgd.time
    asked_steps = time * n
    if asked_steps < 1.0 - 1e-9:
        raise ScenarioError(
            f"scenario key 'sgd.time': {time:g} is shorter than one SGD step (1 / data.input_dim = {1.0 / n:g}); "
            f"allowed: at least {1.0 / n:g}"
        )
    end = total_steps(scenario)
    count = scenario.run.evaluations
    steps = evaluation_steps(scenario)
    if len(steps) < count:
        largest = end + 1 if count > end + 1 else len(steps)
        plural = "s" if end != 1 else ""
        raise ScenarioError(
            f"scenario key 'run.evaluations': {count} evaluation times do not fit in {end} SGD step{plural} "
            f"(sgd.time x data.input_dim = {time:g} x {n}), one time per step at most; allowed: at most {largest}"
        )
    if abs(asked_steps - end) > 1e-9 * asked_steps:
        warnings.warn(
            f"sgd.time = {time:g} is {asked_steps:g} SGD steps at data.input_dim = {n}; the run takes {end} steps "
            f"and ends at t = {end / n:g}",
            UserWarning, stacklevel=2,
        )
    moved = int(np.count_nonzero(steps != _requested_steps(scenario)))
    if moved:
        warnings.warn(
            f"run.evaluations = {count} with run.spacing = '{scenario.run.spacing}': {moved} early evaluation "
            f"time(s) fall less than one SGD step apart and are taken one step apart instead (t = k / {n})",
            UserWarning, stacklevel=2,
        )


register_check(check_time_grid)

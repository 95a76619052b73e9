"""The time grid of a run: how many SGD steps, and at which steps the run is measured.

Time is t = steps / N (docs/equations.md, section 1): one unit of t is N samples.
"""

from __future__ import annotations

import numpy as np

from harness.core.sections import Scenario


def total_steps(scenario: Scenario) -> int:
    """Number of SGD steps for the scenario's time: round(time * N), at least 1."""
    return max(1, round(scenario.sgd.time * scenario.data.input_dim))


def evaluation_steps(scenario: Scenario) -> np.ndarray:
    """Strictly increasing SGD step counts at which to measure, 0 and the end included.

    Log spacing places ``evaluations - 1`` points geometrically between
    t_1 = max(time / 1000, 1 / N) and the final time, after t = 0. Rounding to whole
    steps can merge early points; they are then pushed one step apart, and if that
    overshoots the end, fewer evaluations result (never duplicates).
    """
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
    for i in range(1, len(steps)):  # force strictly increasing
        steps[i] = max(steps[i], steps[i - 1] + 1)
    return np.unique(steps[steps <= end])

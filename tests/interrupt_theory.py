"""A user theory for tests/test_interrupts.py: the built-in theory, after one very long compiled call.

With ``HARNESS_TEST_SLOW_THEORY=1`` in the environment, a full solve first spends minutes in a
single XLA loop, a call Python cannot interrupt: the case a Ctrl-C must still end within two
seconds (harness.core.interrupts). The two-time check a run makes before simulating
(harness.equations.sources.check_before_simulating) is answered with NaN (no prediction) of the
right shape: that check only asks whether the theory runs and returns the right shapes, and
solving the built-in theory there cost each of the test's processes ~5 s of compiling. The
run's real solve, afterwards, is the built-in theory's, judged against the simulation as usual.
"""

from __future__ import annotations

import os

import jax
import jax.numpy as jnp
import numpy as np

from harness.core.trajectories import observable_names
from harness.equations.sources import Prediction, builtin_iid


@jax.jit
def _spin(count: jax.Array) -> jax.Array:
    # a scalar recurrence XLA cannot fold: one iteration per count, ~10^8-10^9 per second
    return jax.lax.fori_loop(0, count, lambda i, x: x * 0.9999999 + 1.0, jnp.float64(0.0))


def predict(scenario, start, times: np.ndarray):
    if len(times) <= 2:  # the check before simulating: the right shapes, nothing predicted
        student, teacher = scenario.student, scenario.teacher
        names = observable_names(student.hidden, teacher.hidden, student.train_second_layer)
        return Prediction(np.full((len(start.seeds), len(times), len(names)), np.nan), paired=True)
    if os.environ.get("HARNESS_TEST_SLOW_THEORY"):
        jax.block_until_ready(_spin(jnp.int64(10**12)))
    return builtin_iid(scenario, start, times)

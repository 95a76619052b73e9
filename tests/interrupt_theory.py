"""A user theory for tests/test_interrupts.py: the built-in theory, after one very long compiled call.

With ``HARNESS_TEST_SLOW_THEORY=1`` in the environment, a full solve first spends minutes in a
single XLA loop, a call Python cannot interrupt: the case a Ctrl-C must still end within two
seconds (harness.core.interrupts). The two-time check a run makes before simulating
(harness.equations.sources.check_before_simulating) stays quick.
"""

from __future__ import annotations

import os

import jax
import jax.numpy as jnp
import numpy as np

from harness.equations.sources import builtin_iid


@jax.jit
def _spin(count: jax.Array) -> jax.Array:
    # a scalar recurrence XLA cannot fold: one iteration per count, ~10^8-10^9 per second
    return jax.lax.fori_loop(0, count, lambda i, x: x * 0.9999999 + 1.0, jnp.float64(0.0))


def predict(scenario, start, times: np.ndarray):
    if len(times) > 2 and os.environ.get("HARNESS_TEST_SLOW_THEORY"):
        jax.block_until_ready(_spin(jnp.int64(10**12)))
    return builtin_iid(scenario, start, times)

"""The JAX simulator against a plain NumPy per-sample loop, and the invariances of its stream.

The NumPy loop below is written from the update rule of docs/equations.md, section 1:
  w_k <- w_k - (eta / sqrt(N)) v_k g'(lambda_k) Delta x,   v_k <- v_k - (eta_v / N) g(lambda_k) Delta,
with g(x) = erf(x / sqrt(2)) and g'(x) = sqrt(2 / pi) exp(-x^2 / 2). It is fed the very samples
the simulator draws (simulation.draw_steps) and must reproduce its weights to float64 rounding.
"""

from __future__ import annotations

import math

import jax
import jax.numpy as jnp
import numpy as np
from scipy.special import erf

from harness.core import scenario as sc
from harness.sim import simulation


def _scenario(**overrides: object) -> dict:
    base = {
        "data.input_dim": 40,
        "run.seeds": 4,
        "run.test_samples": 50,
        "run.dtype": "float64",
        "sgd.learning_rate": 0.7,
        "sgd.second_layer_learning_rate": 0.4,
        "student.train_second_layer": True,
        "student.init_std": 0.3,
        "teacher.noise_std": 0.2,
        "run.block_steps": 64,
    }
    base.update(overrides)
    return sc.with_overrides(sc.resolve({}), base)


def _numpy_loop(w: np.ndarray, v: np.ndarray, x: np.ndarray, y: np.ndarray, eta: float, eta_v: float) -> tuple:
    """Plain per-sample online SGD (docs/equations.md, section 1), one sample at a time."""
    w, v = w.copy(), v.copy()
    n = w.shape[1]
    for x_i, y_i in zip(x, y, strict=True):
        lam = w @ x_i / math.sqrt(n)
        g = erf(lam / math.sqrt(2.0))
        g_prime = math.sqrt(2.0 / math.pi) * np.exp(-lam**2 / 2.0)
        delta = v @ g - y_i
        w_new = w - (eta / math.sqrt(n)) * (v * g_prime * delta)[:, None] * x_i[None, :]
        v = v - (eta_v / n) * g * delta
        w = w_new
    return w, v


def _advance_through(sim, instance, state, targets):
    advance = simulation.make_advance(sim)
    for target in targets:
        state = advance(instance, state, jnp.asarray(target, dtype=state.step.dtype))
    return state


def test_numpy_per_sample_loop_fed_the_same_draws_gives_the_same_weights_after_1000_steps():
    s = _scenario()
    sim = simulation.make_simulator(s)
    instance, state = simulation.init_ensemble(sim)
    w0, v0 = np.asarray(state.params["w"]), np.asarray(state.params["v"])
    # Evaluation-like stops in the middle of blocks, as a run makes them.
    final = _advance_through(sim, instance, state, [0, 3, 100, 129, 640, 1000])
    assert np.all(np.asarray(final.step) == 1000)
    steps = jnp.arange(1000, dtype=jnp.int64)
    for seed in range(s["run"]["seeds"]):
        one = jax.tree_util.tree_map(lambda leaf, i=seed: leaf[i], instance)
        x, y = (np.asarray(a) for a in simulation.draw_steps(sim, one, steps))
        w, v = _numpy_loop(w0[seed], v0[seed], x, y, 0.7, 0.4)
        np.testing.assert_allclose(np.asarray(final.params["w"][seed]), w, rtol=1e-11, atol=1e-12)
        np.testing.assert_allclose(np.asarray(final.params["v"][seed]), v, rtol=1e-11, atol=1e-12)


def test_the_stream_depends_neither_on_block_size_nor_on_evaluation_times():
    # Samples are keyed by absolute step, so grouping steps differently is bit for bit the same run.
    results = []
    for block, targets in ((16, [1000]), (64, [1, 2, 333, 1000]), (256, [999, 1000])):
        sim = simulation.make_simulator(_scenario(**{"run.dtype": "float32", "run.block_steps": block}))
        instance, state = simulation.init_ensemble(sim)
        results.append(np.asarray(_advance_through(sim, instance, state, targets).params["w"]))
    for other in results[1:]:
        np.testing.assert_array_equal(other, results[0])


def test_a_seed_runs_the_same_in_a_larger_ensemble():
    # Seeds are independent (and split across devices in lockstep): seeds 0..3 of an 8-seed
    # run are those of a 4-seed run, whatever the number of seeds per device.
    runs = []
    for seeds in (4, 8):
        sim = simulation.make_simulator(_scenario(**{"run.dtype": "float32", "run.seeds": seeds}))
        instance, state = simulation.init_ensemble(sim)
        state = _advance_through(sim, instance, state, [300])
        test_error = simulation.make_observe(sim)(instance, state).test_error
        runs.append((np.asarray(state.params["w"]), np.asarray(test_error)))
    np.testing.assert_array_equal(runs[1][0][:4], runs[0][0])
    np.testing.assert_array_equal(runs[1][1][:4], runs[0][1])


def test_steps_beyond_two_to_the_32_get_fresh_keys():
    key = jax.random.PRNGKey(3)
    steps = jnp.asarray([5, 5 + 2**32, 5 + 2**33], dtype=jnp.int64)
    keys = np.asarray(simulation.step_keys(key, steps))
    assert len({tuple(k) for k in keys}) == 3
    # Below 2**32 the key is exactly jax.random.fold_in(train_key, step).
    np.testing.assert_array_equal(keys[0], np.asarray(jax.random.fold_in(key, 5)))

"""Run timings: the compile clock, and the theory's solver staying cacheable and NaN on failure."""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np

from harness.core import scenario as sc
from harness.equations import iid as iid_theory
from harness.equations.ode_solve import start_carry
from harness.runner.compile_clock import CompileClock, _union_length


def test_union_of_nested_and_overlapping_spans_is_counted_once():
    # [0, 4] contains [1, 2]; [3, 6] overlaps it; [8, 9] stands alone: union 6 + 1 = 7.
    spans = [(1.0, 2.0), (0.0, 4.0), (3.0, 6.0), (8.0, 9.0)]
    assert _union_length(spans, since=0.0) == 7.0
    # spans clipped to the clock's start: [2.5, 4] U [3, 6] U [8, 9] -> 3.5 + 1
    assert _union_length(spans, since=2.5) == 4.5


def test_clock_sees_a_first_compilation_and_not_a_cached_call():
    def f(x):
        return jnp.sin(x) @ jnp.cos(x).T + 0.123456789  # a fresh function: nothing cached for it

    compiled = jax.jit(f)
    x = jnp.ones((3, 3))
    with CompileClock() as first:
        jax.block_until_ready(compiled(x))
    with CompileClock() as second:
        jax.block_until_ready(compiled(x))
    assert 0.0 < first.compile_s <= first.total_s
    assert second.compile_s == 0.0


def _dyn_and_start():
    scenario = sc.resolve({})
    dyn = iid_theory.dynamics_of(scenario)
    eye = np.eye(2)[None]
    start = iid_theory.OrderParameters(Q=0.3 * eye, R=0.1 * eye, T=eye, v=np.ones((1, 2)))
    return dyn, start


def test_a_solve_that_runs_out_of_steps_returns_nan_not_numbers():
    # The tolerances, the number of times and the piece size (16 steps, which a budget of 16
    # leaves as it is) are those of the sweep test below: one compiled solver serves both
    # (compiling another cost ~10 s). The two solves differ in their step budget alone, and
    # the fine one takes far more than 16 steps to t = 50, so the NaN is the spent budget's.
    dyn, start = _dyn_and_start()
    times = np.linspace(0.0, 50.0, 4)
    failed = iid_theory.solve(dyn, start, np.ones((1, 2)), times, rtol=1e-7, atol=1e-9, max_steps=16)
    assert np.all(np.isnan(np.asarray(failed.Q)))
    fine = iid_theory.solve(dyn, start, np.ones((1, 2)), times, rtol=1e-7, atol=1e-9)
    assert np.all(np.isfinite(np.asarray(fine.Q)))


def test_the_solver_program_has_no_host_callback_so_the_persistent_cache_keeps_it():
    # JAX does not write programs with host callbacks to its persistent compilation cache;
    # equinox's default run-time checks are host callbacks (harness/__init__.py sets
    # EQX_ON_ERROR=nan so that they are not). A callback shows up as a custom call.
    dyn, start = _dyn_and_start()
    static, rates = iid_theory.split_rates(dyn)
    piece = iid_theory._compiled_piece(static, 1e-6, 1e-8, 16)
    carry = start_carry(np.zeros(1), (start.Q, start.R, start.v), np.ones(1))
    times = jnp.linspace(0.0, 1.0, 3)
    args = (times, jnp.asarray(rates), carry, jnp.asarray(start.T), jnp.ones((1, 2)))
    text = piece.lower(*args).as_text()
    assert "callback" not in text.lower()


def test_a_sweep_over_learning_rates_and_noise_compiles_one_solver():
    dyn, start = _dyn_and_start()
    times = np.linspace(0.0, 5.0, 4)
    iid_theory.solve(dyn, start, np.ones((1, 2)), times, rtol=1e-7, atol=1e-9)
    compiled_before = iid_theory._compiled_piece.cache_info().misses
    with CompileClock() as clock:
        slow = iid_theory.solve(dyn._replace(learning_rate=0.1), start, np.ones((1, 2)), times, rtol=1e-7, atol=1e-9)
        noisy = iid_theory.solve(dyn._replace(noise_std=0.5), start, np.ones((1, 2)), times, rtol=1e-7, atol=1e-9)
    assert iid_theory._compiled_piece.cache_info().misses == compiled_before
    assert clock.compile_s == 0.0
    # the rates do reach the program: a smaller learning rate moves R less, noise inflates Q
    base = iid_theory.solve(dyn, start, np.ones((1, 2)), times, rtol=1e-7, atol=1e-9)
    moved = lambda ops: abs(float(ops.R[0, -1, 0, 0] - ops.R[0, 0, 0, 0]))  # noqa: E731
    assert moved(slow) < moved(base)
    assert float(noisy.Q[0, -1, 0, 0]) > float(base.Q[0, -1, 0, 0])

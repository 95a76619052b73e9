"""The order-parameter ODEs for i.i.d. Gaussian inputs (docs/equations.md, section 4).

State y = (Q [K, K], R [K, M], v [K]); T and the teacher's second layer are constants.
With u = (lambda, nu) ~ N(0, Sigma), Sigma = [[Q, R], [R^T, T]], and
a = (v_1..K, -vt_1..M), Delta = sum_c a_c g_c(u_c):

  H[b, k] = E[u_b g'(lambda_k) Delta]            = sum_c a_c I3(k, b, c)
  J[k, l] = E[g'(lambda_k) g'(lambda_l) Delta^2] = sum_cd a_c a_d I4(k, l, c, d) + sigma^2 J0[k, l]
  dR_km/dt = -eta v_k H[K+m, k]
  dQ_kl/dt = -eta v_k H[l, k] - eta v_l H[k, l] + eta^2 v_k v_l J[k, l]
  dv_k/dt  = -eta_v sum_c a_c I2(k, c)                     (second layer trained only)

The system is integrated by :mod:`harness.equations.ode_solve` (diffrax's Tsit5 at the
scenario's rtol/atol, in pieces of the time grid that report progress), saved at the
evaluation times, one solve per seed, the seeds in turn within one program, in float64.
"""

from __future__ import annotations

import functools
from typing import NamedTuple

import jax
import jax.numpy as jnp
import numpy as np

from harness.core.devices import place_on_devices, split_over_seeds
from harness.core.scenario import Scenario
from harness.equations.gaussian_averages import gaussian_averages, generalisation_error
from harness.equations.ode_solve import (
    PIECE_COMPILER_OPTIONS,
    Carry,
    integrate_piece,
    one_seed_at_a_time,
    solve_in_pieces,
    start_carry,
)

Array = jax.Array


class OrderParameters(NamedTuple):
    """Order parameters of one seed, or of many with a leading seed (and time) axis."""

    Q: Array  # [..., K, K]
    R: Array  # [..., K, M]
    T: Array  # [..., M, M]
    v: Array  # [..., K]


class Dynamics(NamedTuple):
    """Static settings of the ODE right-hand side."""

    K: int
    student: str
    teacher: str
    learning_rate: float
    second_layer_learning_rate: float
    train_second_layer: bool
    noise_std: float
    second_order: bool = True  # False drops the eta^2 term: a deliberately wrong theory


def dynamics_of(scenario: Scenario, *, second_order: bool = True) -> Dynamics:
    return Dynamics(
        K=scenario.student.hidden,
        student=scenario.student.activation,
        teacher=scenario.teacher.activation,
        learning_rate=scenario.sgd.learning_rate,
        second_layer_learning_rate=scenario.sgd.second_layer_learning_rate,
        train_second_layer=scenario.student.train_second_layer,
        noise_std=scenario.teacher.noise_std,
        second_order=second_order,
    )


def covariance(Q: Array, R: Array, T: Array) -> Array:
    """Sigma = [[Q, R], [R^T, T]], the covariance of (lambda, nu) (docs/equations.md, section 2)."""
    return jnp.block([[Q, R], [jnp.swapaxes(R, -1, -2), T]])


def error_signal_moments(dyn: Dynamics, cov: Array, a: Array) -> tuple[Array, Array, Array]:
    """(H [P, K], J [K, K], E[g(lambda_k) Delta] [K]) at covariance ``cov``."""
    avg = gaussian_averages(cov, dyn.K, dyn.student, dyn.teacher)
    h = jnp.einsum("kbc,c->bk", avg.I3, a)
    j = jnp.einsum("klcd,c,d->kl", avg.I4, a, a) + dyn.noise_std**2 * avg.J0
    g_delta = avg.I2[: dyn.K, :] @ a
    return h, j, g_delta


def vector_field(dyn: Dynamics, state: tuple[Array, Array, Array], T: Array, teacher_v: Array):
    """d(Q, R, v)/dt of docs/equations.md, section 4 for one seed."""
    Q, R, v = state
    K = dyn.K
    eta = dyn.learning_rate
    a = jnp.concatenate([v, -teacher_v])
    h, j, g_delta = error_signal_moments(dyn, covariance(Q, R, T), a)
    dR = -eta * v[:, None] * h[K:, :].T
    drift = v[:, None] * h[:K, :].T  # drift[k, l] = v_k H[l, k]
    dQ = -eta * (drift + drift.T)
    if dyn.second_order:
        dQ = dQ + eta**2 * jnp.outer(v, v) * j
    dv = -dyn.second_layer_learning_rate * g_delta if dyn.train_second_layer else jnp.zeros_like(v)
    return dQ, dR, dv


RATE_FIELDS = ("learning_rate", "second_layer_learning_rate", "noise_std")
"""The numbers of :class:`Dynamics` that are inputs of the compiled solvers, not constants in them."""


def split_rates(dyn: Dynamics) -> tuple[Dynamics, np.ndarray]:
    """``dyn`` with its rates zeroed (what a solver is compiled for) and the rates (float64 [3]).

    The rates enter the compiled program as run-time values, so the points of a sweep over
    learning rates or label noise share one compiled solver (and its persistent-cache entry)
    instead of tracing and compiling one each.
    """
    rates = np.array([getattr(dyn, field) for field in RATE_FIELDS], np.float64)
    return dyn._replace(**dict.fromkeys(RATE_FIELDS, 0.0)), rates


def with_rates(static: Dynamics, rates: Array) -> Dynamics:
    """The inverse of :func:`split_rates` inside a compiled function (``rates`` traced)."""
    return static._replace(**{field: rates[i] for i, field in enumerate(RATE_FIELDS)})


STEPS_PER_PIECE = 16
"""Accepted-or-rejected steps per piece of a solve (harness.equations.ode_solve.solve_in_pieces)."""


@functools.cache
def _compiled_piece(static: Dynamics, rtol: float, atol: float, steps: int, seeds: int = 1):
    """One piece of every seed's solve (harness.equations.ode_solve), built once per process and setting.

    The evaluation times, the carry and the rates are arguments, so runs with the same
    activations, sizes and tolerances (the sizes of a finite-size scan, the learning rates of
    a sweep, baseline checks) compile once per shape instead of once per call. The seeds are
    split across the host's XLA devices (one per core) exactly as the simulator splits them
    (harness.core.devices.split_over_seeds): each device solves its share in its own loop.
    """

    def one(carry: Carry, T: Array, vt: Array, times: Array, rates: Array):
        dyn = with_rates(static, rates)
        field = lambda t, y: vector_field(dyn, y, T, vt)  # noqa: E731
        return integrate_piece(field, carry, times, rtol=rtol, atol=atol, steps=steps)

    split = split_over_seeds(one_seed_at_a_time(one, shared=2), seeds, replicated=2)
    return jax.jit(
        lambda times, rates, carry, T, vt: split(carry, T, vt, times, rates), compiler_options=PIECE_COMPILER_OPTIONS
    )


def solve(
    dyn: Dynamics,
    initial: OrderParameters,
    teacher_v: Array,
    times: np.ndarray,
    *,
    rtol: float,
    atol: float,
    max_steps: int = 1_000_000,
) -> OrderParameters:
    """Integrate every seed's ODE from its own initial order parameters.

    ``initial`` and ``teacher_v`` carry a leading seed axis; the result has shape
    ``[seeds, times, ...]`` (numpy, float64). The solve runs in pieces of
    :data:`STEPS_PER_PIECE` steps (:func:`harness.equations.ode_solve.solve_in_pieces`), which
    report progress; a seed whose solve fails or needs more than ``max_steps`` steps is NaN.
    """
    # host arrays: the piece's jit places them as it splits the seeds (no resharding program)
    f64 = lambda x: np.asarray(x, np.float64)  # noqa: E731
    static, rates = split_rates(dyn)
    seeds = int(np.shape(initial.Q)[0])
    times = np.asarray(times, np.float64)
    piece = _compiled_piece(static, float(rtol), float(atol), min(STEPS_PER_PIECE, int(max_steps)), seeds)
    T, vt, rates, ts = f64(initial.T), f64(teacher_v), f64(rates), f64(times)
    # placed as the pieces return it, so that the first piece and the rest are one compiled program
    carry = place_on_devices(
        start_carry(np.full(seeds, times[0]), (initial.Q, initial.R, initial.v), np.full(seeds, times[-1])), seeds
    )
    (Q, R, v), _ = solve_in_pieces(lambda carry: piece(ts, rates, carry, T, vt), carry, times, max_steps=int(max_steps))
    return OrderParameters(Q, R, np.repeat(np.asarray(T)[:, None], len(times), axis=1), v)


@functools.cache
def _compiled_overlap_error(K: int, student: str, teacher: str, leading_axes: int):
    def one(Q: Array, R: Array, T: Array, v: Array, vt: Array) -> Array:
        a = jnp.concatenate([v, -vt])
        return generalisation_error(covariance(Q, R, T), a, K, student, teacher)

    for _ in range(leading_axes):
        one = jax.vmap(one)
    return jax.jit(one)


def overlap_error(dyn: Dynamics, ops: OrderParameters, teacher_v: Array) -> Array:
    """eps_g from order parameters via the Gaussian formula (docs/equations.md, section 2).

    Works for any leading axes (seeds, times); ``teacher_v`` has the leading axes of
    ``ops.v`` and a trailing M axis.
    """
    f64 = lambda x: jnp.asarray(x, jnp.float64)  # noqa: E731
    compiled = _compiled_overlap_error(dyn.K, dyn.student, dyn.teacher, ops.Q.ndim - 2)
    return compiled(f64(ops.Q), f64(ops.R), f64(ops.T), f64(ops.v), f64(teacher_v))

"""A user theory: the section-3 equations of the theory notes with L2 weight decay.

Used as ``[theory] source = "python:examples.weight_decay_theory:predict"`` (run from the
repository root, or with this folder's parent on the Python path); see README.md for the
protocol and the derivation.

The simulation's ``sgd.weight_decay = kappa`` adds the penalty
(kappa / 2) (sum_k Q_kk + sum_k v_k^2) to each sample's loss, so one SGD step is
w_k <- w_k - eta (grad_k + (kappa / N) w_k) (and v_k <- v_k - (eta_v / N)(grad + kappa v_k)).
Over one unit of t = steps / N the extra term adds, to leading order in 1/N
(derived here, see README.md):

  dQ_kl/dt += -2 eta kappa Q_kl,   dR_km/dt += -eta kappa R_km,   dv_k/dt += -eta_v kappa v_k.

Everything else is the built-in section-3 field, reused from :mod:`harness.equations.iid`.
"""

from __future__ import annotations

import functools

import diffrax
import jax
import jax.numpy as jnp
import numpy as np

from harness.equations import iid as iid_theory
from harness.equations.sources import InitialState


def decayed_field(dyn: iid_theory.Dynamics, kappa: float, state, T, teacher_v):
    """The section-3 field plus the weight-decay terms, for one seed."""
    Q, R, v = state
    dQ, dR, dv = iid_theory.vector_field(dyn, state, T, teacher_v)
    dQ = dQ - 2.0 * dyn.learning_rate * kappa * Q
    dR = dR - dyn.learning_rate * kappa * R
    if dyn.train_second_layer:
        dv = dv - dyn.second_layer_learning_rate * kappa * v
    return dQ, dR, dv


@functools.cache
def _solver(dyn: iid_theory.Dynamics, rtol: float, atol: float):
    """Every seed's solve, compiled once per dynamics and tolerances.

    kappa and the evaluation times are inputs of the compiled program, not constants in it,
    so that several weight decays (a sweep, or a theory held against decays 10 % off) share
    one compilation instead of tracing and compiling the solve again each time.
    """

    def one_seed(kappa, ts, Q0, R0, T, v0, vt):
        term = diffrax.ODETerm(lambda t, y, args: decayed_field(dyn, kappa, y, T, vt))
        solution = diffrax.diffeqsolve(
            term, diffrax.Tsit5(), t0=ts[0], t1=ts[-1], dt0=None, y0=(Q0, R0, v0),
            saveat=diffrax.SaveAt(ts=ts),
            stepsize_controller=diffrax.PIDController(rtol=rtol, atol=atol),
            max_steps=1_000_000,
        )
        return solution.ys

    return jax.jit(jax.vmap(one_seed, in_axes=(None, None, 0, 0, 0, 0, 0)))


def predict(scenario: dict, start: InitialState, times: np.ndarray) -> dict[str, np.ndarray]:
    """Per-seed predictions ``[S, E]`` of every observable (a paired comparison)."""
    dyn = iid_theory.dynamics_of(scenario)
    kappa = jnp.asarray(scenario["sgd"]["weight_decay"], jnp.float64)
    theory = scenario["theory"]
    ts = jnp.asarray(times, jnp.float64)
    solve = _solver(dyn, float(theory["rtol"]), float(theory["atol"]))
    ops0 = start.order_parameters
    Q, R, v = solve(kappa, ts, ops0.Q, ops0.R, ops0.T, ops0.v, start.teacher_v)
    e = len(times)
    T = np.broadcast_to(ops0.T[:, None], (len(start.seeds), e) + ops0.T.shape[1:])
    vt = np.broadcast_to(start.teacher_v[:, None, :], (len(start.seeds), e, start.teacher_v.shape[1]))
    eps = np.asarray(iid_theory.overlap_error(dyn, iid_theory.OrderParameters(Q, R, T, v), vt))

    # The protocol's return value: {observable name: [S, E]} for any subset of observables.
    out = {"test_error": eps, "overlap_error": eps}
    K, M = R.shape[-2], R.shape[-1]
    for i in range(K):
        for j in range(K):
            out[f"Q[{i},{j}]"] = np.asarray(Q[:, :, i, j])
        for m in range(M):
            out[f"R[{i},{m}]"] = np.asarray(R[:, :, i, m])
        if dyn.train_second_layer:
            out[f"v[{i}]"] = np.asarray(v[:, :, i])
    for m in range(M):
        for n in range(M):
            out[f"T[{m},{n}]"] = np.asarray(T[:, :, m, n])  # constant: the teacher does not learn
    return out

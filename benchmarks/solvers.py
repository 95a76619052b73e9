"""The i.i.d. order-parameter ODE: the harness's diffrax solve against scipy's solve_ivp.

Problem (issue 7): docs/equations.md, section 4, K = M = 2, erf, learning rate 0.5, integrated to t = 1000
with 200 save points (t = 0 and 199 log-spaced times from 0.1), 16 seeds, each from its own
initial (Q, R, T, v) as a run would draw them, rtol 1e-6, atol 1e-9.

* harness: ``iid_theory.solve`` (diffrax Tsit5 with a PID step-size controller, the 16 seeds
  vmapped in one compiled call), timed after compilation, best of three;
* scipy: ``solve_ivp(method="RK45")`` (Dormand-Prince, the same order as Tsit5) at the same
  tolerances, one seed after another, on a NumPy right-hand side written here from the
  notes (the closed-form erf averages of section 2, the equations of section 3).

The two solutions are compared as a check that the same problem was solved.
"""

from __future__ import annotations

import math
import time

import jax
import numpy as np
from scipy.integrate import solve_ivp

from benchmarks import Timing, load_average, row
from harness.core import scenario as scenario_lib
from harness.equations import iid as iid_theory
from harness.sim import simulation
from harness.sim.initial import initial_state

K, M, SEEDS, ETA, RTOL, ATOL = 2, 2, 16, 0.5, 1e-6, 1e-9
NAME = "i.i.d. ODE solve"


def times() -> np.ndarray:
    return np.concatenate([[0.0], np.geomspace(0.1, 1000.0, 199)])


def _erf_averages(cov: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """I3 [K, P, P] and I4 [K, K, P, P] for erf(x / sqrt 2) units (docs/equations.md, section 2, Saad & Solla 1995)."""
    d = np.diagonal(cov)
    c11, c12, c13 = d[:K, None, None], cov[:K, :, None], cov[:K, None, :]
    c23, c33 = cov[None, :, :], d[None, None, :]
    L3 = (1 + c11) * (1 + c33) - c13**2
    I3 = (2 / math.pi) / np.sqrt(L3) * (c23 * (1 + c11) - c12 * c13) / (1 + c11)
    e11, e22 = d[:K, None, None, None], d[None, :K, None, None]
    e12 = cov[:K, :K, None, None]
    e13, e14 = cov[:K, None, :, None], cov[:K, None, None, :]
    e23, e24 = cov[None, :K, :, None], cov[None, :K, None, :]
    e33, e44, e34 = d[None, None, :, None], d[None, None, None, :], cov[None, None, :, :]
    L4 = (1 + e11) * (1 + e22) - e12**2
    L0 = L4 * e34 - e23 * e24 * (1 + e11) - e13 * e14 * (1 + e22) + e12 * e13 * e24 + e12 * e14 * e23
    L1 = L4 * (1 + e33) - e23**2 * (1 + e11) - e13**2 * (1 + e22) + 2 * e12 * e13 * e23
    L2 = L4 * (1 + e44) - e24**2 * (1 + e11) - e14**2 * (1 + e22) + 2 * e12 * e14 * e24
    I4 = (4 / math.pi**2) / np.sqrt(L4) * np.arcsin(np.clip(L0 / np.sqrt(L1 * L2), -1, 1))
    return I3, I4


def numpy_vector_field(T: np.ndarray, v: np.ndarray, vt: np.ndarray):
    """d(Q, R)/dt of docs/equations.md, section 4 (second layer fixed, no noise) on a flat state."""
    a = np.concatenate([v, -vt])

    def rhs(t: float, y: np.ndarray) -> np.ndarray:
        Q, R = y[: K * K].reshape(K, K), y[K * K:].reshape(K, M)
        cov = np.block([[Q, R], [R.T, T]])
        I3, I4 = _erf_averages(cov)
        H = np.einsum("kbc,c->bk", I3, a)
        J = np.einsum("klcd,c,d->kl", I4, a, a)
        drift = v[:, None] * H[:K, :].T
        dQ = -ETA * (drift + drift.T) + ETA**2 * np.outer(v, v) * J
        dR = -ETA * v[:, None] * H[K:, :].T
        return np.concatenate([dQ.ravel(), dR.ravel()])

    return rhs


def run(repeats: int = 3) -> list[dict]:
    s = scenario_lib.with_overrides(scenario_lib.resolve({}), {"run.seeds": SEEDS, "sgd.learning_rate": ETA})
    start = initial_state(simulation.make_simulator(s), np.arange(SEEDS))
    dyn = iid_theory.dynamics_of(s)
    ts = times()

    def harness_solve():
        return jax.block_until_ready(
            iid_theory.solve(dyn, start.order_parameters, start.teacher_v, ts, rtol=RTOL, atol=ATOL)
        )

    started = time.perf_counter()
    solution = harness_solve()
    first_call = time.perf_counter() - started
    harness_timing = Timing()
    for _ in range(repeats):
        harness_timing.measure(harness_solve)

    ops = start.order_parameters
    load = load_average()
    started = time.perf_counter()
    scipy_Q, evaluations = [], 0
    for seed in range(SEEDS):
        y0 = np.concatenate([ops.Q[seed].ravel(), ops.R[seed].ravel()])
        rhs = numpy_vector_field(ops.T[seed], ops.v[seed], start.teacher_v[seed])
        result = solve_ivp(rhs, (ts[0], ts[-1]), y0, method="RK45", t_eval=ts, rtol=RTOL, atol=ATOL)
        evaluations += result.nfev
        scipy_Q.append(result.y[: K * K].T.reshape(len(ts), K, K))
    scipy_s = time.perf_counter() - started
    difference = float(np.max(np.abs(np.asarray(solution.Q) - np.asarray(scipy_Q))))
    setting = f"K=M={K}, erf, t to 1000, {len(ts)} save points, {SEEDS} seeds, rtol {RTOL:g}, atol {ATOL:g}"
    return [
        row(NAME, "harness (diffrax Tsit5, seeds vmapped)", harness_timing.wall, "s",
            f"{setting}; after compilation; first call {first_call:.1f} s", harness_timing.load),
        row(NAME, "scipy solve_ivp RK45, NumPy right-hand side", scipy_s, "s",
            f"seed after seed, {evaluations // SEEDS} evaluations per seed; max |Q diff| vs harness {difference:.1e}",
            load),
        row(NAME, "scipy / harness", scipy_s / harness_timing.wall, "ratio", "aim >= 20", harness_timing.load),
    ]


if __name__ == "__main__":
    for r in run():
        print(r)

"""The i.i.d. order-parameter ODEs against outside references (scipy, classic closed forms)."""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from scipy.integrate import solve_ivp

from harness.core import scenario as sc
from harness.equations import iid as iid_theory


def _initial(K: int, M: int, rng: np.random.Generator, scale: float = 0.3):
    w = rng.normal(size=(K, 40)) * scale
    wt = rng.normal(size=(M, 40))
    n = w.shape[1]
    return iid_theory.OrderParameters(
        Q=(w @ w.T / n)[None], R=(w @ wt.T / n)[None], T=(wt @ wt.T / n)[None], v=np.ones((1, K))
    )


@pytest.mark.parametrize(
    "student, teacher, trained",
    # sigmoid exercises the quadrature route at a fraction of tanh's cost per right-hand side
    [("erf", "erf", False), ("erf", "erf", True), ("sigmoid", "sigmoid", False)],
)
def test_diffrax_solution_matches_scipy_dop853(student, teacher, trained):
    # Reference: scipy.integrate.solve_ivp with DOP853 at tight tolerances on the very same
    # right-hand side (scipy documentation; Hairer, Norsett & Wanner, Solving ODEs I).
    scenario = sc.resolve({
        "student": {"activation": student, "train_second_layer": trained},
        "teacher": {"activation": teacher, "noise_std": 0.1},
        "sgd": {"learning_rate": 0.8},
        "theory": {"rtol": 1e-10, "atol": 1e-12},
    })
    dyn = iid_theory.dynamics_of(scenario)
    start = _initial(2, 2, np.random.default_rng(1))
    vt = np.ones((1, 2))
    times = np.linspace(0.0, 20.0, 11)
    ours = iid_theory.solve(dyn, start, vt, times, rtol=1e-10, atol=1e-12)

    T = jnp.asarray(start.T[0])

    @jax.jit
    def flat_field(y):
        Q, R, v = y[:4].reshape(2, 2), y[4:8].reshape(2, 2), y[8:]
        dQ, dR, dv = iid_theory.vector_field(dyn, (Q, R, v), T, jnp.ones(2))
        return jnp.concatenate([jnp.ravel(dQ), jnp.ravel(dR), jnp.ravel(dv)])

    def rhs(t, y):
        return np.asarray(flat_field(jnp.asarray(y)))

    y0 = np.concatenate([start.Q[0].ravel(), start.R[0].ravel(), start.v[0]])
    ref = solve_ivp(rhs, (0.0, 20.0), y0, method="DOP853", t_eval=times, rtol=1e-11, atol=1e-13)
    assert ref.success
    np.testing.assert_allclose(np.asarray(ours.Q[0]).reshape(len(times), -1), ref.y[:4].T, rtol=1e-7, atol=1e-9)
    np.testing.assert_allclose(np.asarray(ours.R[0]).reshape(len(times), -1), ref.y[4:8].T, rtol=1e-7, atol=1e-9)
    np.testing.assert_allclose(np.asarray(ours.v[0]), ref.y[8:].T, rtol=1e-7, atol=1e-9)


def test_linear_ode_equals_the_lms_infinite_n_limit():
    # Classic LMS analysis (Widrow & Hoff; Haykin, Adaptive Filter Theory -- from memory): for a
    # linear student and teacher with white inputs, as N -> infinity the generalisation error obeys
    # d eps/dt = (eta^2 - 2 eta) eps + eta^2 sigma^2 / 2, so
    # eps(t) = eps_inf + (eps_0 - eps_inf) exp((eta^2 - 2 eta) t), eps_inf = eta sigma^2 / (2 (2 - eta)).
    eta, sigma = 0.6, 0.5
    scenario = sc.resolve({
        "data": {"input_dim": 100},
        "teacher": {"hidden": 1, "activation": "linear", "noise_std": sigma},
        "student": {"hidden": 1, "activation": "linear"},
        "sgd": {"learning_rate": eta},
        "theory": {"rtol": 1e-10, "atol": 1e-13},
    })
    dyn = iid_theory.dynamics_of(scenario)
    start = iid_theory.OrderParameters(Q=np.array([[[0.3]]]), R=np.array([[[0.1]]]), T=np.array([[[1.2]]]),
                                       v=np.ones((1, 1)))
    times = np.linspace(0, 6, 13)
    ops = iid_theory.solve(dyn, start, np.ones((1, 1)), times, rtol=1e-10, atol=1e-13)
    vt = np.ones((1, len(times), 1))
    eps = np.asarray(iid_theory.overlap_error(dyn, ops, vt))[0]
    eps0 = 0.5 * (0.3 - 2 * 0.1 + 1.2)
    eps_inf = eta * sigma**2 / (2 * (2 - eta))
    exact = eps_inf + (eps0 - eps_inf) * np.exp((eta**2 - 2 * eta) * times)
    np.testing.assert_allclose(eps, exact, rtol=1e-8)


def test_dropping_the_second_order_term_changes_the_solution():
    scenario = sc.resolve({"sgd": {"learning_rate": 1.5}})
    start = _initial(2, 2, np.random.default_rng(3), scale=0.5)
    times = np.linspace(0, 30, 5)
    right = iid_theory.solve(iid_theory.dynamics_of(scenario), start, np.ones((1, 2)), times, rtol=1e-8, atol=1e-10)
    wrong = iid_theory.solve(iid_theory.dynamics_of(scenario, second_order=False), start, np.ones((1, 2)), times,
                             rtol=1e-8, atol=1e-10)
    assert np.max(np.abs(np.asarray(right.Q) - np.asarray(wrong.Q))) > 1e-2

"""The exact order-parameter chain (harness.sim.chain) against explicit weights and the full simulation."""

from __future__ import annotations

import math

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from scipy import stats

from harness.core import scenario as sc
from harness.core import threefry
from harness.core.activations import get_activation
from harness.core.trajectories import observable_names
from harness.runner import experiment
from harness.sim import chain


def _scenario(**overrides: object) -> dict:
    base = {"run.engine": "chain", "data.input_dim": 30, "run.seeds": 2, "run.checkpoint_minutes": 0.0}
    base.update(overrides)
    return sc.with_overrides(sc.resolve({}), base)


# ------------------------------------------------------------------- building blocks


def test_psd_cholesky_factors_definite_and_singular_matrices():
    rng = np.random.default_rng(0)
    a = rng.standard_normal((5, 5))
    definite = a @ a.T + 0.1 * np.eye(5)
    L = np.asarray(chain.psd_cholesky(jnp.asarray(definite)))
    np.testing.assert_allclose(L, np.linalg.cholesky(definite), rtol=1e-12, atol=1e-12)  # numpy's LAPACK Cholesky
    # Rank 3 of 5 (two rows repeat others): a factor still exists and is found.
    b = rng.standard_normal((5, 3))
    b[3], b[4] = b[0], 2.0 * b[1]
    singular = b @ b.T
    L = np.asarray(chain.psd_cholesky(jnp.asarray(singular)))
    np.testing.assert_allclose(L @ L.T, singular, atol=1e-12)
    assert np.all(np.isfinite(L))
    # All zero (students and teacher at zero): the factor is zero, no NaN.
    assert np.all(np.asarray(chain.psd_cholesky(jnp.zeros((4, 4)))) == 0.0)


@pytest.mark.parametrize("dof", [1, 7, 99996])
def test_chi_square_draws_follow_the_chi_square_law(dof):
    keys = jax.random.split(jax.random.PRNGKey(dof), 20_000)
    draws = np.asarray(jax.jit(lambda k: chain.chi_square(k, dof))(keys))
    # Reference law: scipy.stats.chi2 (one-sample Kolmogorov-Smirnov test).
    assert stats.kstest(draws, stats.chi2(dof).cdf).pvalue > 1e-3
    assert abs(draws.mean() - dof) < 5 * math.sqrt(2 * dof / len(draws))


# ------------------------------------------------------- one step against the weights


def _explicit_step(s: dict, W, Wt, v, vt, x, y_noise):
    """The notes' SGD step on explicit weights (section 1), then the new order parameters."""
    n = W.shape[1]
    g = get_activation(s["student"]["activation"])
    gt = get_activation(s["teacher"]["activation"]).fn
    eta, eta_v, kappa = s["sgd"]["learning_rate"], s["sgd"]["second_layer_learning_rate"], s["sgd"]["weight_decay"]
    lam, nu = W @ x / math.sqrt(n), Wt @ x / math.sqrt(n)
    g_lam = np.asarray(g.fn(lam))
    delta = g_lam @ v - (np.asarray(gt(nu)) @ vt + s["teacher"]["noise_std"] * y_noise)
    c = v * np.asarray(g.derivative(lam)) * delta
    W_new = (1 - eta * kappa / n) * W - (eta / math.sqrt(n)) * c[:, None] * x[None, :]
    v_new = (1 - eta_v * kappa / n) * v - (eta_v / n) * g_lam * delta
    return W_new @ W_new.T / n, W_new @ Wt.T / n, v_new


@pytest.mark.parametrize("case", ["generic", "identical students", "students at zero"])
def test_one_chain_step_is_the_sgd_step_of_weights_with_that_input(case):
    # Build an explicit input x whose projections and norm are those the chain draws
    # (u = L z, |x|^2 = |z|^2 + chi2, see harness.sim.chain), apply the notes' SGD step to
    # explicit weights, and compare the resulting overlaps with the chain's step.
    s = _scenario(**{
        "data.input_dim": 12, "student.hidden": 2, "teacher.hidden": 2, "student.train_second_layer": True,
        "sgd.learning_rate": 0.9, "sgd.second_layer_learning_rate": 0.6, "sgd.weight_decay": 0.3,
        "teacher.noise_std": 0.4, "student.activation": "tanh",
    })
    n, k, m = 12, 2, 2
    rng = np.random.default_rng(7)
    W, Wt = rng.standard_normal((k, n)), rng.standard_normal((m, n))
    if case == "identical students":
        W[1] = W[0]
    elif case == "students at zero":
        W[:] = 0.0
    v, vt = np.array([0.8, -0.5]), np.array([1.0, 0.7])
    A = np.vstack([W, Wt])
    Q, R, T = W @ W.T / n, W @ Wt.T / n, Wt @ Wt.T / n
    sigma = A @ A.T / n
    L = np.asarray(chain.psd_cholesky(jnp.asarray(sigma)))
    # An orthonormal B (k+m rows) with A = sqrt(n) L B: solve on the spanned columns, then
    # complete the rows for the directions L leaves out (zero columns).
    spanned = np.abs(np.diagonal(L)) > 0
    B = np.zeros((k + m, n))
    B[spanned] = np.linalg.lstsq(math.sqrt(n) * L[:, spanned], A, rcond=None)[0]
    basis = np.linalg.qr(np.vstack([B[spanned], rng.standard_normal((n, n))]).T)[0].T  # orthonormal rows
    extra = iter(basis[spanned.sum():])
    for row in np.flatnonzero(~spanned):
        B[row] = next(extra)
    np.testing.assert_allclose(B @ B.T, np.eye(k + m), atol=1e-10)
    np.testing.assert_allclose(math.sqrt(n) * L @ B, A, atol=1e-10)
    z, chi2, xi = rng.standard_normal(k + m), 5.3, 0.37
    perpendicular = next(extra)  # a unit vector orthogonal to every row of B
    x = B.T @ z + math.sqrt(chi2) * perpendicular
    expected = _explicit_step(s, W, Wt, v, vt, x, xi)

    step = chain._chain_step(chain.make_simulator(s))
    params = {"Q": jnp.asarray(Q), "R": jnp.asarray(R), "v": jnp.asarray(v)}
    new = step(params, jnp.asarray(T), jnp.asarray(vt), jnp.asarray(z), jnp.asarray(chi2), jnp.asarray(xi), True)
    for got, want in zip((new["Q"], new["R"], new["v"]), expected, strict=True):
        np.testing.assert_allclose(np.asarray(got), want, rtol=1e-10, atol=1e-12)
    unchanged = step(params, jnp.asarray(T), jnp.asarray(vt), jnp.asarray(z), jnp.asarray(chi2), jnp.asarray(xi), False)
    np.testing.assert_array_equal(np.asarray(unchanged["Q"]), Q)


# --------------------------------------------------------- the chain against the full run


def _final_distributions(engine: str, seed: int, learning_rate: float = 0.5) -> np.ndarray:
    s = sc.with_overrides(sc.resolve({}), {
        "run.engine": engine, "run.seed": seed, "run.seeds": 300, "data.input_dim": 200, "sgd.time": 4.0,
        "sgd.learning_rate": learning_rate, "run.evaluations": 5, "run.spacing": "linear", "run.test_samples": 100,
        "student.init_std": 0.5, "run.checkpoint_minutes": 0.0,
    })
    result = experiment.simulate(s)
    return result.values[:, 1:, 1]  # overlap_error (eps_g of the seed's own Q, R, T, v) at t = 1, 2, 3, 4


@pytest.fixture(scope="module")
def full_and_chain():
    # Different base seeds: independent samples, as a two-sample test needs.
    return _final_distributions("full", seed=0), _final_distributions("chain", seed=1)


def test_chain_and_full_simulation_give_the_same_distribution_of_the_generalisation_error(full_and_chain):
    full, chained = full_and_chain
    for column in range(full.shape[1]):
        a, b = full[:, column], chained[:, column]
        # Two-sample Kolmogorov-Smirnov test (scipy.stats.ks_2samp).
        assert stats.ks_2samp(a, b).pvalue > 1e-3, f"t = {column + 1}"
        sem = math.hypot(a.std(ddof=1), b.std(ddof=1)) / math.sqrt(len(a))
        assert abs(a.mean() - b.mean()) < 4 * sem
        # Standard error of a standard deviation ~ sd / sqrt(2 (n - 1)), normal approximation
        # (common practice, no source).
        sd_err = math.hypot(a.std(ddof=1), b.std(ddof=1)) / math.sqrt(2 * (len(a) - 1))
        assert abs(a.std(ddof=1) - b.std(ddof=1)) < 4 * sd_err


def test_the_comparison_detects_a_different_dynamics(full_and_chain):
    # The same test against a chain at learning rate 0.8 instead of 0.5 must fail: it has power.
    full, _ = full_and_chain
    other = _final_distributions("chain", seed=2, learning_rate=0.8)
    assert min(stats.ks_2samp(full[:, c], other[:, c]).pvalue for c in range(full.shape[1])) < 1e-6


def _erf_generalisation_error(Q: np.ndarray, R: np.ndarray, T: np.ndarray) -> np.ndarray:
    """eps_g of erf(x / sqrt 2) networks with unit second layers, written out (Saad & Solla 1995,
    Phys. Rev. E 52, 4225, eq. for eps_g): (1/pi) [sum_kl arcsin(Q_kl / sqrt((1+Q_kk)(1+Q_ll)))
    + sum_mn arcsin(T_mn / sqrt((1+T_mm)(1+T_nn))) - 2 sum_km arcsin(R_km / sqrt((1+Q_kk)(1+T_mm)))]."""
    q, t = np.diagonal(Q, axis1=-2, axis2=-1), np.diagonal(T, axis1=-2, axis2=-1)
    student = np.arcsin(Q / np.sqrt((1 + q[..., :, None]) * (1 + q[..., None, :]))).sum(axis=(-2, -1))
    teacher = np.arcsin(T / np.sqrt((1 + t[..., :, None]) * (1 + t[..., None, :]))).sum(axis=(-2, -1))
    cross = np.arcsin(R / np.sqrt((1 + q[..., :, None]) * (1 + t[..., None, :]))).sum(axis=(-2, -1))
    return (student + teacher - 2 * cross) / np.pi


def test_chain_test_error_is_the_gaussian_formula_and_large_n_runs():
    s = _scenario(**{"data.input_dim": 1_000_000, "sgd.time": 0.0005, "run.evaluations": 3, "run.test_samples": 1})
    result = experiment.simulate(s)
    assert np.all(np.isfinite(result.values))
    assert result.steps[-1] == 500
    names = observable_names(2, 2, False)
    Q, R, T = (
        result.values[..., [names.index(f"{family}[{i},{j}]") for i in range(2) for j in range(2)]]
        .reshape(*result.values.shape[:2], 2, 2)
        for family in "QRT"
    )
    expected = _erf_generalisation_error(Q, R, T)
    np.testing.assert_allclose(result.values[..., names.index("test_error")], expected, rtol=1e-10)
    np.testing.assert_allclose(result.values[..., names.index("overlap_error")], expected, rtol=1e-10)


@pytest.mark.parametrize(
    ("overrides", "needle"),
    [
        ({"data.kind": "latent"}, "data.kind = 'gaussian'"),
        ({"sgd.optimizer": "adam"}, "sgd.optimizer = 'sgd'"),
        ({"data.input_dim": 4}, "input_dim > student.hidden + teacher.hidden"),
    ],
)
def test_unsupported_scenarios_are_refused_before_any_work(overrides, needle):
    with pytest.raises(sc.ScenarioError, match="run.engine") as error:
        _scenario(**overrides)
    assert needle in str(error.value)


def test_chain_keys_are_the_per_step_keys():
    # Step i of a seed draws from fold_in(train_key, i): resuming anywhere gives the same draws.
    key = jax.random.PRNGKey(9)
    c = chain.make_simulator(_scenario())
    z, chi2, xi = chain._draws(c, key, jnp.arange(5, 9, dtype=jnp.int64))
    z2, chi22, xi2 = chain._draws(c, key, jnp.arange(7, 8, dtype=jnp.int64))
    np.testing.assert_array_equal(np.asarray(z[2]), np.asarray(z2[0]))
    np.testing.assert_array_equal(np.asarray(chi2[2]), np.asarray(chi22[0]))
    step_key = threefry.split(jax.random.fold_in(key, 7), 3)[2]
    np.testing.assert_array_equal(np.asarray(xi[2]), np.asarray(jax.random.normal(step_key, (), jnp.float64)))

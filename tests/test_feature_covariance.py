"""Moments of latent-variable inputs (harness/data/feature_covariance.py).

The closed forms and the quadrature are held against plain numpy Monte Carlo written
here independently of the module (own feature maps, own sampling); every Monte Carlo
comparison allows 4 entry-wise standard errors.
"""

from __future__ import annotations

import math

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from scipy.special import erf as scipy_erf

from harness.core.errors import InputError
from harness.data.feature_covariance import (
    deep_generator_apply,
    deep_generator_init,
    deep_generator_moments,
    eigen_overlaps,
    eigen_projection,
    monte_carlo_moments,
    order_parameters,
    single_layer_moments,
)

# Element-wise maps written with numpy/scipy only, so the references do not share code
# with harness.core.activations.
NUMPY_MAPS = {
    "sign": np.sign,
    "relu": lambda u: np.maximum(u, 0.0),
    "erf": lambda u: scipy_erf(u / math.sqrt(2.0)),  # docs/equations.md, section 1: g(x) = erf(x/sqrt2)
    "tanh": np.tanh,
    "sigmoid": lambda u: 1.0 / (1.0 + np.exp(-u)),
    "linear": lambda u: u,
}

SMALL_D, SMALL_N = 4, 6
MC_SAMPLES = 1_000_000


def _feature_matrix(seed: int, D: int = SMALL_D, N: int = SMALL_N) -> np.ndarray:
    return np.random.default_rng(seed).standard_normal((D, N))


def _numpy_monte_carlo(F: np.ndarray, feature_map: str, samples: int, seed: int) -> dict[str, np.ndarray]:
    """Sample moments of x = f(F^T c / sqrt(D)) with entry-wise standard errors."""
    D = F.shape[0]
    c = np.random.default_rng(seed).standard_normal((samples, D))
    x = NUMPY_MAPS[feature_map](c @ F / math.sqrt(D))
    mean = x.mean(axis=0)
    y = x - mean
    omega = y.T @ y / samples
    phi = y.T @ c / samples
    return {
        "mean": mean,
        "mean_se": y.std(axis=0) / math.sqrt(samples),
        "omega": omega,
        # std error of a sample mean of (x_i - m_i)(x_j - m_j), leading order in 1/samples
        "omega_se": np.sqrt(np.maximum((y * y).T @ (y * y) / samples - omega**2, 0.0) / samples),
        "phi": phi,
        "phi_se": np.sqrt(np.maximum((y * y).T @ (c * c) / samples - phi**2, 0.0) / samples),
    }


def _assert_within(estimate: np.ndarray, exact: np.ndarray, standard_error, sigmas: float = 4.0) -> None:
    deviation = np.abs(np.asarray(estimate) - np.asarray(exact))
    allowed = sigmas * np.asarray(standard_error) + 1e-12
    worst = np.max(deviation / allowed)
    assert np.all(deviation <= allowed), f"deviation up to {worst:.2f} x the {sigmas}-sigma allowance"


# ----------------------------------------------------------------------------------------
# closed forms against Monte Carlo


@pytest.mark.parametrize(
    "feature_map",
    [
        "sign",  # Sheppard (1899): E[sign u_i sign u_j] = (2/pi) arcsin(rho_ij)
        "relu",  # Cho & Saul (2009), degree-1 arc-cosine kernel; E relu(u) = sqrt(C_ii / (2 pi))
        "erf",  # arcsine kernel, Saad & Solla (1995) (docs/equations.md, section 2, I2)
        "linear",  # Omega = C, common practice, no source
    ],
)
def test_closed_form_moments_match_monte_carlo(feature_map: str) -> None:
    F = _feature_matrix(1)
    moments = single_layer_moments(F, feature_map)
    assert moments.method == "closed_form" and moments.standard_error is None
    reference = _numpy_monte_carlo(F, feature_map, MC_SAMPLES, seed=11)
    _assert_within(moments.omega, reference["omega"], reference["omega_se"])
    _assert_within(moments.mean, reference["mean"], reference["mean_se"])
    # Phi from Stein's lemma, E[f(u_i) c] = F_i / sqrt(D) E f'(u_i), against sampled E[x c^T]
    _assert_within(moments.phi, reference["phi"], reference["phi_se"])


def test_closed_form_diagonals() -> None:
    # Var sign(u) = 1; Var relu(u) = C_ii (1/2 - 1/(2 pi)) (Cho & Saul 2009 at angle 0)
    F = _feature_matrix(2)
    var = np.diag(F.T @ F / F.shape[0])
    np.testing.assert_allclose(np.diag(single_layer_moments(F, "sign").omega), 1.0, rtol=0, atol=1e-15)
    np.testing.assert_allclose(np.diag(single_layer_moments(F, "relu").omega), var * (0.5 - 0.5 / math.pi), rtol=1e-13)


# ----------------------------------------------------------------------------------------
# quadrature


@pytest.mark.parametrize("feature_map", ["erf", "linear"])
def test_quadrature_reproduces_closed_form(feature_map: str) -> None:
    # erf is analytic: 40 Gauss-Hermite nodes reach ~1e-11 here (measured); linear is exact
    F = _feature_matrix(3, D=8, N=10)
    closed = single_layer_moments(F, feature_map)
    quadrature = single_layer_moments(F, feature_map, method="quadrature")
    assert quadrature.method == "quadrature"
    np.testing.assert_allclose(quadrature.omega, closed.omega, rtol=0, atol=1e-9)
    np.testing.assert_allclose(quadrature.phi, closed.phi, rtol=0, atol=1e-12)
    np.testing.assert_allclose(quadrature.mean, closed.mean, rtol=0, atol=1e-14)


@pytest.mark.parametrize("feature_map", ["tanh", "sigmoid"])  # sigmoid: non-zero mean to subtract
def test_quadrature_matches_monte_carlo(feature_map: str) -> None:
    F = _feature_matrix(4)
    moments = single_layer_moments(F, feature_map)
    assert moments.method == "quadrature"
    reference = _numpy_monte_carlo(F, feature_map, MC_SAMPLES, seed=12)
    _assert_within(moments.omega, reference["omega"], reference["omega_se"])
    _assert_within(moments.mean, reference["mean"], reference["mean_se"])
    _assert_within(moments.phi, reference["phi"], reference["phi_se"])


def test_quadrature_converges_and_chunking_is_invisible() -> None:
    F = _feature_matrix(5, D=6, N=9)
    default = single_layer_moments(F, "tanh")
    finer = single_layer_moments(F, "tanh", quadrature_points=100)
    np.testing.assert_allclose(default.omega, finer.omega, rtol=0, atol=1e-6)
    # 36 pairs in chunks of 5 (the last one padded) must give the same numbers
    chunked = single_layer_moments(F, "tanh", pair_chunk_elements=5 * 40 * 40)
    np.testing.assert_allclose(chunked.omega, default.omega, rtol=0, atol=1e-14)
    np.testing.assert_allclose(default.omega, default.omega.T, rtol=0, atol=0)


# ----------------------------------------------------------------------------------------
# deep generator and generic Monte Carlo


def test_linear_deep_generator_is_exact_within_reported_errors() -> None:
    widths = [4, 7, 5]
    weights = deep_generator_init(0, widths, ["linear", "linear"])
    assert [w.shape for w in weights] == [(4, 7), (7, 5)]
    samples = 200_000
    moments = deep_generator_moments(weights, ["linear", "linear"], samples, seed=3)
    assert moments.method == "monte_carlo"
    # x = c A with A = W_0 W_1 / sqrt(4 * 7): Omega = A^T A, Phi = A^T, mean 0
    A = weights[0] @ weights[1] / math.sqrt(widths[0] * widths[1])
    omega = A.T @ A
    _assert_within(moments.omega, omega, moments.standard_error)
    _assert_within(moments.phi, A.T, moments.phi_standard_error)
    _assert_within(moments.mean, 0.0, np.sqrt(np.diag(omega) / samples))
    # Isserlis (1918): for Gaussian x, Var[x_i x_j] = Omega_ii Omega_jj + Omega_ij^2, so the
    # reported maximal standard error must match that maximum up to its own sampling noise
    expected_se = math.sqrt(np.max(np.outer(np.diag(omega), np.diag(omega)) + omega**2) / samples)
    assert moments.standard_error == pytest.approx(expected_se, rel=0.05)


def test_one_layer_deep_generator_is_the_single_layer_model() -> None:
    # the layout [D, N] of the first weight matrix is the F of the single-layer model
    weights = deep_generator_init(jax.random.PRNGKey(1), [4, 6], ["relu"])
    moments = deep_generator_moments(weights, ["relu"], 200_000, seed=4, chunk=5000)
    exact = single_layer_moments(weights[0], "relu")
    _assert_within(moments.omega, exact.omega, moments.standard_error)
    _assert_within(moments.phi, exact.phi, moments.phi_standard_error)
    _assert_within(moments.mean, exact.mean, math.sqrt(np.max(np.diag(exact.omega)) / 200_000))


def test_deep_generator_apply_is_jittable_and_composes_layers() -> None:
    activations = ("tanh", "relu", "erf")
    weights = deep_generator_init(2, [3, 8, 6, 5], activations)
    c = np.random.default_rng(0).standard_normal((11, 3))
    jitted = jax.jit(deep_generator_apply, static_argnums=1)(weights, activations, jnp.asarray(c))
    x = c
    for weight, name in zip(weights, activations, strict=True):
        x = NUMPY_MAPS[name](x @ weight / math.sqrt(weight.shape[0]))
    np.testing.assert_allclose(np.asarray(jitted), x, rtol=1e-12, atol=1e-14)


def test_monte_carlo_moments_handles_a_ragged_last_chunk() -> None:
    # 1000 samples in chunks of 300: the padded rows of the last chunk must not count.
    # Reproduce the draws (one key per chunk) and compare with plain sample moments.
    D, samples, chunk, seed = 3, 1000, 300, 5
    moments = monte_carlo_moments(lambda c: jnp.tanh(c) + 1.0, D, samples, seed, chunk=chunk)
    keys = jax.random.split(jax.random.PRNGKey(seed), 4)
    c = np.concatenate([np.asarray(jax.random.normal(k, (chunk, D), dtype=jnp.float64)) for k in keys])[:samples]
    x = np.tanh(c) + 1.0
    np.testing.assert_allclose(moments.mean, x.mean(axis=0), rtol=1e-13)
    np.testing.assert_allclose(moments.omega, np.cov(x, rowvar=False), rtol=1e-12)
    np.testing.assert_allclose(moments.phi, (x - x.mean(axis=0)).T @ c / samples, rtol=1e-12)


# ----------------------------------------------------------------------------------------
# section-4 projection and order parameters


def _instance(seed: int, D: int = 8, N: int = 12, K: int = 3, M: int = 2):
    rng = np.random.default_rng(seed)
    moments = single_layer_moments(rng.standard_normal((D, N)), "erf")
    return moments.omega, moments.phi, rng.standard_normal((M, D)), rng.standard_normal((K, N))


def test_projection_recovers_order_parameters() -> None:
    omega, phi, wt, w = _instance(6)
    N, D = phi.shape
    projection = eigen_projection(omega, phi, wt, w)
    assert np.all(np.diff(projection.rho) >= 0)
    np.testing.assert_allclose(projection.psi.T @ projection.psi, np.eye(N), atol=1e-12)
    np.testing.assert_allclose(projection.psi * projection.rho @ projection.psi.T, omega, atol=1e-12)
    Q, R, T = order_parameters(omega, phi, wt, w)
    q, r, t = eigen_overlaps(projection)
    # docs/equations.md, section 5: Q = (1/N) sum_tau rho_tau q(tau), R = (1/N) sum_tau r(tau)
    np.testing.assert_allclose(np.einsum("t,tkl->kl", projection.rho, q) / N, Q, rtol=1e-12, atol=1e-13)
    np.testing.assert_allclose(r.sum(axis=0) / N, R, rtol=1e-12, atol=1e-13)
    np.testing.assert_allclose(T, wt @ wt.T / D, rtol=1e-14)
    # (1/N) sum_tau t(tau) = wt Phi^T Phi wt^T / D, from om^tau = sqrt(N/D) psi_tau^T Phi wt
    np.testing.assert_allclose(t.sum(axis=0) / N, wt @ phi.T @ phi @ wt.T / D, rtol=1e-12)


def test_iid_order_parameters() -> None:
    # docs/equations.md, section 2: for i.i.d. data Omega = Phi = I and D = N
    rng = np.random.default_rng(7)
    N = 10
    wt, w = rng.standard_normal((2, N)), rng.standard_normal((3, N))
    Q, R, T = order_parameters(np.eye(N), np.eye(N), wt, w)
    np.testing.assert_allclose(Q, w @ w.T / N, rtol=1e-14)
    np.testing.assert_allclose(R, w @ wt.T / N, rtol=1e-14)
    np.testing.assert_allclose(T, wt @ wt.T / N, rtol=1e-14)


def test_order_parameters_are_covariances_of_the_local_fields() -> None:
    # docs/equations.md, section 2: (lambda, nu) has covariance [[Q, R], [R^T, T]] with
    # lambda = w x / sqrt(N), nu = wt c / sqrt(D); checked on sampled sign features
    rng = np.random.default_rng(8)
    D, N, samples = 5, 7, 400_000
    F = rng.standard_normal((D, N))
    wt, w = rng.standard_normal((2, D)), rng.standard_normal((3, N))
    moments = single_layer_moments(F, "sign")
    Q, R, _ = order_parameters(moments.omega, moments.phi, wt, w)
    c = rng.standard_normal((samples, D))
    lam = np.sign(c @ F / math.sqrt(D)) @ w.T / math.sqrt(N)
    nu = c @ wt.T / math.sqrt(D)
    _assert_within(lam.T @ lam / samples, Q, np.sqrt((lam**2).T @ (lam**2) / samples - Q**2) / math.sqrt(samples))
    _assert_within(lam.T @ nu / samples, R, np.sqrt((lam**2).T @ (nu**2) / samples - R**2) / math.sqrt(samples))


# ----------------------------------------------------------------------------------------
# bad input


def test_bad_input_is_named() -> None:
    F = _feature_matrix(9)
    with pytest.raises(InputError, match="feature_map 'cosine' is unknown; allowed: .*tanh"):
        single_layer_moments(F, "cosine")
    with pytest.raises(InputError, match="no closed form; allowed: erf, linear, relu, sign"):
        single_layer_moments(F, "tanh", method="closed_form")
    with pytest.raises(InputError, match="method 'exact' is unknown"):
        single_layer_moments(F, "sign", method="exact")
    with pytest.raises(InputError, match="F must be a 2-D array"):
        single_layer_moments(F[0], "sign")
    with pytest.raises(InputError, match="activations needs one name per layer"):
        deep_generator_init(0, [3, 4, 5], ["tanh"])
    omega, phi, wt, w = _instance(10)
    with pytest.raises(InputError, match="student_weights must be \\[K, N\\]"):
        eigen_projection(omega, phi, wt, w[:, :-1])
    with pytest.raises(InputError, match="teacher_weights must be \\[M, D\\]"):
        order_parameters(omega, phi, wt[:, :-1], w)

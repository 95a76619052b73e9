"""Closed forms of the relu averages (harness/equations/relu_averages.py) against outside references."""

from __future__ import annotations

import math

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from scipy import integrate, stats

from harness.equations.gaussian_averages import gaussian_averages
from harness.equations.relu_averages import PATH_NODES
from harness.equations.relu_averages import relu_averages as eager_relu_averages

jax.config.update("jax_enable_x64", True)

# Compiled once per configuration (op-by-op execution of the many small ops is slower).
relu_averages = jax.jit(eager_relu_averages, static_argnums=(1, 2), static_argnames=("path_nodes",))

OUTPUTS = ("I2", "I3", "I4", "J0")


def correlation(rng: np.random.Generator, n: int, min_eigenvalue: float) -> np.ndarray:
    while True:
        a = rng.normal(size=(n, n))
        c = a @ a.T
        d = np.sqrt(np.diag(c))
        c = c / np.outer(d, d)
        if np.linalg.eigvalsh(c).min() >= min_eigenvalue:
            return c


def rank_two_covariance(rng: np.random.Generator, noise: float) -> np.ndarray:
    """K = 3 students in the span of M = 2 teachers (plus ``noise``): late training, P = 5."""
    teachers = rng.normal(size=(2, 60))
    students = rng.normal(size=(3, 2)) @ teachers + noise * rng.normal(size=(3, 60))
    fields = np.vstack([students, teachers])
    return fields @ fields.T / 60


def orthant(cov: np.ndarray) -> float:
    """P(y > 0) for y ~ N(0, cov): scipy's multivariate normal CDF (Genz 1992) of -y at 0."""
    n = len(cov)
    return float(stats.multivariate_normal.cdf(np.zeros(n), np.zeros(n), cov, abseps=1e-10, releps=1e-10,
                                               maxpts=400_000, rng=np.random.default_rng(0)))


def tallis_second_moment(R: np.ndarray, c: int, d: int) -> float:
    """E[y_c y_d 1{y > 0}] for a 4 x 4 correlation matrix R, c != d, at the endpoint.

    Stein's lemma twice (the form of Tallis 1961, J. R. Stat. Soc. B 23, 223): R_cd P(y > 0)
    + sum_{m != d} R_cm phi(0) E[y_d 1{y_-m > 0} | y_m = 0], the conditional first moment again
    by Stein as a sum of bivariate orthant probabilities; every orthant probability by scipy.
    A different route from the module's Price path, valid for non-singular R.
    """
    phi0 = 1.0 / math.sqrt(2.0 * math.pi)
    total = R[c, d] * orthant(R)
    for m in range(4):
        if m == d:
            continue
        rest = [v for v in range(4) if v != m]
        S = R[np.ix_(rest, rest)] - np.outer(R[rest, m], R[m, rest])  # covariance given y_m = 0
        position = rest.index(d)
        first = 0.0
        for r_pos in range(3):
            keep = [q for q in range(3) if q != r_pos]
            S2 = S[np.ix_(keep, keep)] - np.outer(S[keep, r_pos], S[r_pos, keep]) / S[r_pos, r_pos]
            first += S[position, r_pos] * phi0 / math.sqrt(S[r_pos, r_pos]) * orthant(S2)
        total += R[c, m] * phi0 * first
    return total


def test_four_variable_moments_match_the_endpoint_formula_with_scipy_orthant_probabilities():
    rng = np.random.default_rng(1)
    for min_eigenvalue in (0.3, 0.05):
        R = correlation(rng, 4, min_eigenvalue)
        I4 = relu_averages(jnp.asarray(R), 2, ("I4",))["I4"]
        # positions (k, l, c, d) = (0, 1, 2, 3): the only all-distinct entries of K = 2, P = 4
        assert abs(float(I4[0, 1, 2, 3]) - tallis_second_moment(R, 2, 3)) < 1e-7
        assert abs(float(I4[1, 0, 3, 2]) - tallis_second_moment(R, 2, 3)) < 1e-7


def test_three_variable_moments_match_scipy_integration():
    # E[u_1 u_2 1{u > 0}] (entry [0, 0, 1, 2]) and E[u_2^2 1{u > 0}] (entry [0, 1, 2, 2]) over three
    # variables: scipy.integrate.dblquad over (u_1, u_2) > 0 of the powers times the bivariate
    # density times P(u_0 > 0 | u_1, u_2), a normal CDF.
    R = correlation(np.random.default_rng(2), 3, 0.1)
    cov = R * np.outer([1.0, 1.3, 0.8], [1.0, 1.3, 0.8])
    averages = relu_averages(jnp.asarray(cov), 2, ("I4",))["I4"]
    inverse = np.linalg.inv(cov[1:, 1:])
    weights = cov[0, 1:] @ inverse
    sd = math.sqrt(cov[0, 0] - weights @ cov[1:, 0])
    density = stats.multivariate_normal(np.zeros(2), cov[1:, 1:]).pdf

    def integrand(yd, yc, power_c, power_d):
        y = np.array([yc, yd])
        return yc**power_c * yd**power_d * density(y) * stats.norm.cdf(weights @ y / sd)

    for entry, powers in (((0, 0, 1, 2), (1, 1)), ((0, 1, 2, 2), (0, 2))):
        reference, _ = integrate.dblquad(integrand, 0, 12, 0, 12, args=powers, epsabs=1e-10, epsrel=1e-9)
        assert abs(float(averages[entry]) - reference) < 1e-8, entry


@pytest.mark.parametrize("noise", [1e-4, 0.0])
def test_rank_deficient_covariances_match_monte_carlo(noise):
    # Late in training the students lie in the teachers' span: every four fields are
    # (nearly) dependent. Monte Carlo with numpy, 10^6 samples, within 5 standard errors
    # (common practice, no source).
    rng = np.random.default_rng(3)
    cov = rank_two_covariance(rng, noise)
    avg = relu_averages(jnp.asarray(cov), 3, OUTPUTS)
    u = rng.multivariate_normal(np.zeros(5), cov, size=1_000_000, method="eigh").T
    step, relu = (u > 0).astype(float), np.maximum(u, 0.0)
    for k, l, c, d in ((0, 1, 3, 4), (0, 2, 3, 4), (0, 1, 2, 3), (1, 1, 3, 4), (0, 1, 2, 2)):
        sample = step[k] * step[l] * relu[c] * relu[d]
        se = max(sample.std() / math.sqrt(sample.size), 1e-6)
        assert abs(float(avg["I4"][k, l, c, d]) - sample.mean()) < 5 * se, (k, l, c, d)
    assert all(bool(jnp.all(jnp.isfinite(x))) for x in avg.values())


def test_path_rule_has_converged():
    # The Price-path integral at PATH_NODES against 60 nodes, well-conditioned and exactly rank 2.
    rng = np.random.default_rng(4)
    for cov in (correlation(rng, 5, 0.05) * 2.0, rank_two_covariance(rng, 0.0)):
        default = relu_averages(jnp.asarray(cov), 3, ("I4",))["I4"]
        fine = relu_averages(jnp.asarray(cov), 3, ("I4",), path_nodes=60)["I4"]
        assert float(jnp.max(jnp.abs(default - fine))) < 1e-8
    assert PATH_NODES <= 24  # the speed the docstring's accuracy table assumes


def test_closed_forms_agree_with_the_quadrature_route():
    # The module's quadrature (relu levels split at the kink) is the older, independent route.
    rng = np.random.default_rng(5)
    for diag in (0.5, 2.0):
        cov = jnp.asarray(correlation(rng, 4, 0.1) * diag)
        closed = gaussian_averages(cov, 2, "relu", "relu")
        quadrature = gaussian_averages(cov, 2, "relu", "relu", method="quadrature")
        for name in OUTPUTS:
            assert float(jnp.max(jnp.abs(getattr(closed, name) - getattr(quadrature, name)))) < 2e-7, name


def test_zero_variance_student_gives_zero_and_no_nan():
    # g'(0) = relu(0) = 0: an all-zero student unit takes part in no average (module docstring).
    cov = np.zeros((4, 4))
    cov[1:, 1:] = correlation(np.random.default_rng(6), 3, 0.1)
    avg = relu_averages(jnp.asarray(cov), 2, OUTPUTS)
    assert all(bool(jnp.all(jnp.isfinite(x))) for x in avg.values())
    assert float(jnp.max(jnp.abs(avg["I4"][0]))) == 0.0 and float(jnp.max(jnp.abs(avg["I3"][0]))) == 0.0
    assert float(jnp.max(jnp.abs(avg["I2"][0]))) == 0.0 and float(avg["J0"][0, 1]) == 0.0
    assert abs(float(avg["J0"][1, 1]) - 0.5) < 1e-15

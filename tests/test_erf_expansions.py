"""tanh and sigmoid averages through erf sums (harness/equations/erf_expansions.py) against the outside."""

from __future__ import annotations

import math

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from scipy import integrate
from test_relu_averages import correlation  # a random correlation matrix, well conditioned

from harness.equations.erf_expansions import expansion, fit_residuals
from harness.equations.gaussian_averages import gaussian_averages

jax.config.update("jax_enable_x64", True)


@pytest.mark.parametrize("name, value_error, slope_error", [("tanh", 1e-5, 1e-5), ("sigmoid", 5e-6, 3e-6)])
def test_fitted_sums_have_the_stated_accuracy(name, value_error, slope_error):
    # The module docstring's table: worst error over the line (the sums and the exact
    # functions become constants beyond |x| = 40, where both are evaluated too).
    x = np.concatenate([np.linspace(-40.0, 40.0, 40001), [-1e3, 1e3]])
    value, slope = fit_residuals(name, x)
    assert np.max(np.abs(value)) < value_error
    assert np.max(np.abs(slope)) < slope_error


def test_erf_is_its_own_one_term_sum():
    x = np.linspace(-10.0, 10.0, 101)
    value, slope = fit_residuals("erf", x)
    assert np.max(np.abs(value)) < 1e-15 and np.max(np.abs(slope)) < 1e-15
    assert expansion("erf").alpha == (1.0,)


@pytest.mark.parametrize("cov", [[[1.0, 0.4], [0.4, 0.8]], [[2.5, -1.6], [-1.6, 1.5]]])
def test_tanh_pair_average_matches_scipy_dblquad(cov):
    # E[tanh(u) tanh(v)] of exact tanh by scipy.integrate.dblquad over the whitened plane:
    # the accuracy that matters is the averages' against exact tanh (module docstring).
    c = np.asarray(cov)
    eigenvalues, vectors = np.linalg.eigh(c)
    root = vectors * np.sqrt(eigenvalues)

    def integrand(z2, z1, f, g):
        u = root @ np.array([z1, z2])
        return f(u[0]) * g(u[1]) * math.exp(-0.5 * (z1 * z1 + z2 * z2)) / (2.0 * math.pi)

    tanh_slope = lambda x: 1.0 / math.cosh(x) ** 2  # noqa: E731
    pair, _ = integrate.dblquad(integrand, -9, 9, -9, 9, args=(math.tanh, math.tanh), epsabs=1e-12, epsrel=1e-11)
    slopes, _ = integrate.dblquad(integrand, -9, 9, -9, 9, args=(tanh_slope, tanh_slope), epsabs=1e-12)
    full = np.eye(3)
    full[:2, :2] = c
    avg = gaussian_averages(jnp.asarray(full), 2, "tanh", "tanh")
    assert abs(float(avg.I2[0, 1]) - pair) < 1e-5
    assert abs(float(avg.J0[0, 1]) - slopes) < 1e-5


@pytest.mark.parametrize("student, teacher", [("tanh", "tanh"), ("sigmoid", "sigmoid"), ("tanh", "erf"),
                                              ("sigmoid", "tanh")])
def test_erf_sums_agree_with_quadrature_of_the_exact_activations(student, teacher):
    # The module's quadrature integrates tanh and sigmoid themselves (to ~1e-7 at 40 points,
    # unit diagonal); the erf sums differ from them by the fits' errors, <= 1e-5 here.
    rng = np.random.default_rng(11)
    for diag in (0.5, 2.0):
        cov = jnp.asarray(correlation(rng, 3, 0.05) * diag)
        fast = gaussian_averages(cov, 2, student, teacher)
        exact = gaussian_averages(cov, 2, student, teacher, method="quadrature", points=40)
        for name in ("I2", "I3", "I4", "J0"):
            gap = float(jnp.max(jnp.abs(getattr(fast, name) - getattr(exact, name))))
            assert gap < 1e-5, (name, diag, gap)


def test_forced_erf_sum_route_reproduces_the_erf_closed_forms():
    # erf/erf through the virtual-network code (one term per unit) against Saad & Solla's forms.
    cov = jnp.asarray(correlation(np.random.default_rng(12), 5, 0.05) * 1.5)
    closed = gaussian_averages(cov, 3, "erf", "erf")
    summed = gaussian_averages(cov, 3, "erf", "erf", method="erf_sum")
    for name in ("I2", "I3", "I4", "J0"):
        assert float(jnp.max(jnp.abs(getattr(closed, name) - getattr(summed, name)))) < 1e-13, name


def test_sigmoid_offset_terms():
    # A sigmoid network's I2 carries 1/4 from the offsets even at zero covariance of the
    # fields, and I4 = J0 / 4 there (sigmoid(0) = 1/2, E[g' g' 1/2 1/2], common practice).
    cov = jnp.zeros((3, 3))
    avg = gaussian_averages(cov, 2, "sigmoid", "sigmoid")
    np.testing.assert_allclose(np.asarray(avg.I2), 0.25, atol=1e-12)
    np.testing.assert_allclose(np.asarray(avg.J0), 1.0 / 16.0, atol=1e-5)  # sigmoid'(0) = 1/4
    expected = np.broadcast_to(0.25 * np.asarray(avg.J0)[:, :, None, None], avg.I4.shape)
    np.testing.assert_allclose(np.asarray(avg.I4), expected, atol=1e-12)

"""Gaussian averages I2, I3, I4, J0: closed forms, quadrature, and checks against the outside.

Most calls run eagerly (no jit): a jitted quadrature call compiles for several seconds,
op-by-op execution of the same code takes well under one.
"""

from __future__ import annotations

import math

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from scipy import integrate, special

from harness.core.errors import InputError
from harness.equations.gaussian_averages import (
    Averages,
    gaussian_averages,
    generalisation_error,
    pair_averages,
)

jax.config.update("jax_enable_x64", True)  # harness/__init__ does this too; be explicit here


# --------------------------------------------------------------------------- helpers


def random_covariance(rng: np.random.Generator, P: int, diag: float, min_eigenvalue: float = 0.05) -> np.ndarray:
    """A correlation matrix (smallest eigenvalue >= min_eigenvalue) scaled to ``diag``."""
    while True:
        a = rng.normal(size=(P, P))
        c = a @ a.T
        d = np.sqrt(np.diag(c))
        c = c / np.outer(d, d)
        if np.linalg.eigvalsh(c).min() >= min_eigenvalue:
            return diag * c


def singular_covariances(rng: np.random.Generator) -> list[np.ndarray]:
    """K = M = 2 covariances that are only positive semi-definite."""
    w_teacher = rng.normal(size=(2, 6))
    student_is_teacher = np.vstack([w_teacher[0], w_teacher[1], w_teacher[0], w_teacher[1]])
    zero_student = np.zeros((4, 4))
    zero_student[2:, 2:] = np.eye(2)
    copies = np.vstack([w_teacher[0], w_teacher[0], w_teacher[1], 0.5 * w_teacher[0]])
    return [student_is_teacher @ student_is_teacher.T / 6, zero_student, copies @ copies.T / 6]


def erf_act(x):
    return special.erf(x / math.sqrt(2.0))


def erf_prime(x):
    return math.sqrt(2.0 / math.pi) * np.exp(-0.5 * x * x)


def max_abs_difference(a: Averages, b: Averages) -> float:
    return max(float(jnp.max(jnp.abs(x - y))) for x, y in zip(a, b, strict=True))


def full_space_gauss_hermite(cov: np.ndarray, K: int, g_student, g_teacher, dg, points: int) -> dict[str, np.ndarray]:
    """All four averages by one Gauss-Hermite product rule over the whole P-dim Gaussian.

    Independent of the module: numpy's probabilists' Gauss-Hermite nodes, u = A z with
    A from an eigen-decomposition of the full covariance, every index tuple summed at
    once with einsum. Only sensible for P <= 4 and smooth activations.
    """
    P = cov.shape[0]
    x, w = np.polynomial.hermite_e.hermegauss(points)
    w = w / math.sqrt(2.0 * math.pi)
    eigenvalues, vectors = np.linalg.eigh(cov)
    root = vectors * np.sqrt(np.clip(eigenvalues, 0.0, None))
    grids = np.meshgrid(*([x] * P), indexing="ij")
    z = np.stack([g.ravel() for g in grids])  # [P, n^P]
    weight = np.ones(1)
    for _ in range(P):
        weight = np.multiply.outer(weight, w)
    weight = weight.ravel()
    u = root @ z  # [P, nodes]
    g = np.vstack([g_student(u[:K]), g_teacher(u[K:])])
    d = dg(u[:K])
    return {
        "I2": np.einsum("n,an,bn->ab", weight, g, g),
        "I3": np.einsum("n,kn,bn,cn->kbc", weight, d, u, g),
        "I4": np.einsum("n,kn,ln,cn,dn->klcd", weight, d, d, g, g, optimize=True),
        "J0": np.einsum("n,kn,ln->kl", weight, d, d),
    }


# --------------------------------------------------------------------------- erf closed forms


@pytest.mark.parametrize("cov", [[[1.0, 0.3], [0.3, 0.5]], [[2.0, -1.2], [-1.2, 1.5]], [[0.7, 0.7], [0.7, 0.7]]])
def test_erf_pair_kernel_matches_scipy_dblquad(cov):
    # E[erf(u/sqrt2) erf(v/sqrt2)] = (2/pi) arcsin(C12 / sqrt((1+C11)(1+C22))):
    # Williams 1997, Neural Computation 10, "Computing with infinite networks".
    # Reference: scipy.integrate.dblquad over the whitened plane (the last covariance is singular).
    c = np.asarray(cov)
    eigenvalues, vectors = np.linalg.eigh(c)
    root = vectors * np.sqrt(np.clip(eigenvalues, 0.0, None))

    def integrand(z2, z1):
        u = root @ np.array([z1, z2])
        return erf_act(u[0]) * erf_act(u[1]) * math.exp(-0.5 * (z1 * z1 + z2 * z2)) / (2.0 * math.pi)

    reference, _ = integrate.dblquad(integrand, -9.0, 9.0, -9.0, 9.0, epsabs=1e-12, epsrel=1e-11)
    closed = pair_averages(jnp.asarray(c), 1, "erf", "erf")[0, 1]
    quadrature = pair_averages(jnp.asarray(c), 1, "erf", "erf", method="quadrature")[0, 1]
    assert abs(float(closed) - reference) < 1e-9
    assert abs(float(quadrature) - reference) < 1e-7


def test_erf_closed_forms_match_independent_gauss_hermite():
    # Closed forms of Saad & Solla 1995 (Phys. Rev. E 52, 4225), checked against numpy
    # Gauss-Hermite over the whole 4-dim Gaussian (written here, not the module's rule).
    # Diagonals <= 0.6 keep the 24-node product rule converged to ~2e-10 (measured against
    # 32 nodes: 28 nodes agree to 5e-12), so the tolerance can be tight.
    rng = np.random.default_rng(5)
    covariances = [random_covariance(rng, 4, 0.6), random_covariance(rng, 4, 0.6, 0.01)]
    covariances += [0.6 * c / np.max(np.diag(c)) for c in singular_covariances(rng)]
    for cov in covariances:
        reference = full_space_gauss_hermite(cov, 2, erf_act, erf_act, erf_prime, points=24)
        closed = gaussian_averages(jnp.asarray(cov), 2, "erf", "erf")
        for name in ("I2", "I3", "I4", "J0"):
            np.testing.assert_allclose(np.asarray(getattr(closed, name)), reference[name], atol=1e-9, err_msg=name)


def test_erf_noise_average_has_its_closed_form():
    # J0 = E[g'(a) g'(b)] = (2/pi) / sqrt((1+C11)(1+C22) - C12^2): Gaussian integral of
    # exp(-(a^2+b^2)/2) (common practice, no source); checked against scipy dblquad.
    c = np.array([[1.3, 0.4], [0.4, 0.6]])
    inverse = np.linalg.inv(c)
    norm = 1.0 / (2.0 * math.pi * math.sqrt(np.linalg.det(c)))

    def integrand(b, a):
        v = np.array([a, b])
        return erf_prime(a) * erf_prime(b) * norm * math.exp(-0.5 * v @ inverse @ v)

    reference, _ = integrate.dblquad(integrand, -12.0, 12.0, -12.0, 12.0, epsabs=1e-12, epsrel=1e-11)
    full = np.zeros((3, 3))
    full[:2, :2] = c
    full[2, 2] = 1.0
    J0 = gaussian_averages(jnp.asarray(full), 2, "erf", "erf").J0
    assert abs(float(J0[0, 1]) - reference) < 1e-9


# --------------------------------------------------------------------------- quadrature vs closed forms


@pytest.mark.parametrize("K, M", [(2, 1), (2, 2)])
def test_quadrature_reproduces_the_erf_closed_forms(K, M):
    rng = np.random.default_rng(10 * K + M)
    for diag in (0.5, 1.0, 2.0):
        cov = jnp.asarray(random_covariance(rng, K + M, diag))
        closed = gaussian_averages(cov, K, "erf", "erf")
        quadrature = gaussian_averages(cov, K, "erf", "erf", method="quadrature")
        assert max_abs_difference(closed, quadrature) < 1e-7, diag


def test_quadrature_reproduces_the_erf_closed_forms_at_singular_covariances():
    for cov in singular_covariances(np.random.default_rng(2)):
        closed = gaussian_averages(jnp.asarray(cov), 2, "erf", "erf")
        quadrature = gaussian_averages(jnp.asarray(cov), 2, "erf", "erf", method="quadrature")
        assert all(bool(jnp.all(jnp.isfinite(x))) for x in quadrature)
        assert max_abs_difference(closed, quadrature) < 1e-7


def test_linear_averages_are_covariances_on_both_routes():
    # g(x) = x, g' = 1: I2 = C12, I3 = C23, I4 = C34, J0 = 1 (docs/equations.md, section 2).
    cov = jnp.asarray(random_covariance(np.random.default_rng(3), 5, 1.7))
    K, P = 2, 5
    for method in ("auto", "quadrature"):
        avg = gaussian_averages(cov, K, "linear", "linear", method=method)
        np.testing.assert_allclose(avg.I2, cov, atol=1e-12)
        np.testing.assert_allclose(avg.I3, np.broadcast_to(cov, (K, P, P)), atol=1e-12)
        np.testing.assert_allclose(avg.I4, np.broadcast_to(cov, (K, K, P, P)), atol=1e-12)
        np.testing.assert_allclose(avg.J0, np.ones((K, K)), atol=1e-12)


# --------------------------------------------------------------------------- eps_g and the pair route


@pytest.mark.parametrize("M", [1, 2, 3])
@pytest.mark.parametrize("method", ["auto", "quadrature"])
def test_untrained_student_has_eps_g_of_M_over_six(M, method):
    # Q = R = 0: the student outputs erf(0) = 0, so eps_g = 1/2 sum_mn I2(nu_m, nu_n)
    # = 1/2 M (2/pi) arcsin(1/2) = M/6 for T = I and unit teacher weights (eps_g formula
    # of Saad & Solla 1995, Phys. Rev. E 52, 4225).
    K = 2
    cov = np.zeros((K + M, K + M))
    cov[K:, K:] = np.eye(M)
    a = jnp.concatenate([jnp.array([0.7, -1.3]), -jnp.ones(M)])
    eps = generalisation_error(jnp.asarray(cov), a, K, "erf", "erf", method=method)
    assert abs(float(eps) - M / 6.0) < 1e-9


def test_pair_route_and_eps_g_agree_with_the_full_set():
    cov = jnp.asarray(random_covariance(np.random.default_rng(4), 4, 1.2))
    a = jnp.array([0.5, 1.5, -1.0, -1.0])
    # The pair route may use other node counts than the full set, hence 1e-8, not rounding.
    for student, teacher in [("erf", "erf"), ("erf", "tanh"), ("relu", "relu")]:
        full = gaussian_averages(cov, 2, student, teacher)
        np.testing.assert_allclose(pair_averages(cov, 2, student, teacher), full.I2, atol=1e-8)
        eps = generalisation_error(cov, a, 2, student, teacher)
        assert abs(float(eps) - 0.5 * float(a @ full.I2 @ a)) < 1e-8


# --------------------------------------------------------------------------- other activations


def monte_carlo(cov: np.ndarray, K: int, student: str, teacher: str, samples: int, seed: int):
    """Sample means and standard errors of every average (numpy, one draw for all entries)."""
    functions = {
        "erf": (erf_act, erf_prime),
        "tanh": (np.tanh, lambda x: 1.0 - np.tanh(x) ** 2),
        "sigmoid": (special.expit, lambda x: special.expit(x) * (1.0 - special.expit(x))),
        "relu": (lambda x: np.maximum(x, 0.0), lambda x: (x > 0).astype(float)),
    }
    rng = np.random.default_rng(seed)
    u = rng.multivariate_normal(np.zeros(cov.shape[0]), cov, size=samples, method="eigh").T
    g = np.vstack([functions[student][0](u[:K]), functions[teacher][0](u[K:])])
    d = functions[student][1](u[:K])
    patterns = {"I2": ("an,bn->ab", g, g), "I3": ("kn,bn,cn->kbc", d, u, g), "J0": ("kn,ln->kl", d, d)}
    patterns["I4"] = ("kn,ln,cn,dn->klcd", d, d, g, g)
    out = {}
    for name, (pattern, *factors) in patterns.items():
        mean = np.einsum(pattern, *factors, optimize=True) / samples
        second = np.einsum(pattern, *(f * f for f in factors), optimize=True) / samples
        out[name] = (mean, np.sqrt(np.maximum(second - mean**2, 0.0) / samples))
    return out


@pytest.mark.parametrize("student, teacher, seed", [("erf", "tanh", 1), ("relu", "sigmoid", 3)])
def test_mixed_activations_match_monte_carlo(student, teacher, seed):
    # Monte Carlo with numpy, 10^6 samples: every entry within 5 standard errors
    # (common practice, no source). The SE floor covers entries that vanish exactly.
    rng = np.random.default_rng(100 + seed)
    cov = random_covariance(rng, 4, 1.0)
    avg = gaussian_averages(jnp.asarray(cov), 2, student, teacher)
    sampled = monte_carlo(cov, 2, student, teacher, samples=1_000_000, seed=seed)
    for name in ("I2", "I3", "I4", "J0"):
        mean, se = sampled[name]
        z = np.abs(np.asarray(getattr(avg, name)) - mean) / np.maximum(se, 1e-6)
        assert z.max() < 5.0, (name, float(z.max()))


def test_relu_pair_and_noise_averages_match_the_arc_cosine_kernels():
    # E[relu(u) relu(v)] = sqrt(C11 C22)/(2 pi) (sin t + (pi - t) cos t) and
    # E[1{u>0} 1{v>0}] = (pi - t)/(2 pi), cos t = C12/sqrt(C11 C22): arc-cosine kernels of
    # degree 1 and 0, Cho & Saul 2009 (NIPS 22). Singular covariances included.
    rng = np.random.default_rng(6)
    covariances = [random_covariance(rng, 4, diag, 0.01) for diag in (0.5, 1.0, 5.0)] + singular_covariances(rng)
    for cov in covariances:
        sd = np.sqrt(np.diag(cov))
        safe = np.where(sd > 0, sd, 1.0)
        cos_t = np.clip(cov / np.outer(safe, safe), -1.0, 1.0)
        t = np.arccos(cos_t)
        relu_kernel = np.outer(sd, sd) / (2.0 * math.pi) * (np.sin(t) + (math.pi - t) * cos_t)
        step_kernel = (math.pi - t) / (2.0 * math.pi)
        for method in ("auto", "quadrature"):  # closed forms (harness/equations/relu_averages.py) and quadrature
            avg = gaussian_averages(jnp.asarray(cov), 2, "relu", "relu", method=method)
            np.testing.assert_allclose(np.asarray(avg.I2), relu_kernel, atol=1e-7)
            if np.all(sd[:2] > 0):  # the step of an identically zero variable is a convention
                np.testing.assert_allclose(np.asarray(avg.J0), step_kernel[:2, :2], atol=1e-6)


@pytest.mark.parametrize("student, teacher", [("tanh", "tanh"), ("relu", "relu")])
def test_quadrature_converges_to_itself(student, teacher):
    # Default points against 40 per dimension at unit diagonal, K = 2, M = 1 (averages of
    # up to three dimensions): the accuracy the module docstring states.
    cov = jnp.asarray(random_covariance(np.random.default_rng(7), 3, 1.0))
    default = gaussian_averages(cov, 2, student, teacher, method="quadrature")
    fine = gaussian_averages(cov, 2, student, teacher, points=40, method="quadrature")
    assert max_abs_difference(default, fine) < 3e-7


def test_no_nan_at_singular_covariances_on_any_route():
    for cov in singular_covariances(np.random.default_rng(8)):
        for student, teacher in [("erf", "erf"), ("linear", "linear"), ("erf", "tanh"), ("relu", "sigmoid"),
                                 ("relu", "relu"), ("tanh", "tanh"), ("sigmoid", "sigmoid")]:
            avg = gaussian_averages(jnp.asarray(cov), 2, student, teacher)
            assert all(bool(jnp.all(jnp.isfinite(x))) for x in avg), (student, teacher)


def test_jit_and_vmap_over_a_batch_of_covariances():
    rng = np.random.default_rng(9)
    batch = jnp.asarray(np.stack([random_covariance(rng, 3, 1.0) for _ in range(3)]))
    for student, teacher, method in [("erf", "erf", "auto"), ("sigmoid", "linear", "auto")]:
        batched = jax.jit(jax.vmap(lambda c, s=student, t=teacher, m=method: gaussian_averages(c, 2, s, t, method=m)))
        out = batched(batch)
        assert out.I4.shape == (3, 2, 2, 3, 3) and out.I4.dtype == jnp.float64
        single = gaussian_averages(batch[1], 2, student, teacher, method=method)
        assert max_abs_difference(Averages(*(x[1] for x in out)), single) < 1e-12


# --------------------------------------------------------------------------- bad input


@pytest.mark.parametrize(
    "kwargs, fragment",
    [
        ({"student": "softplus"}, "student activation 'softplus'"),
        ({"teacher": "sign"}, "teacher activation 'sign'"),
        ({"K": 5}, "K must be"),
        ({"method": "magic"}, "method 'magic'"),
        ({"student": "tanh", "method": "closed_form"}, "closed_form"),
        ({"student": "relu", "method": "erf_sum"}, "erf_sum"),
        ({"points": 1}, "points must be"),
    ],
)
def test_bad_input_raises_one_line_input_errors(kwargs, fragment):
    args = {"K": 2, "student": "erf", "teacher": "erf"} | kwargs
    points = args.pop("points", None)
    method = args.pop("method", "auto")
    with pytest.raises(InputError, match=fragment) as info:
        gaussian_averages(jnp.eye(4), args["K"], args["student"], args["teacher"], points=points, method=method)
    assert "\n" not in str(info.value)


def test_non_square_covariance_is_rejected():
    with pytest.raises(InputError, match=r"cov must be one square"):
        gaussian_averages(jnp.ones((2, 4, 4)), 2, "erf", "erf")

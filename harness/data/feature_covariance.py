"""Second moments of latent-variable inputs and their eigen-projections.

A latent-variable data model draws c ~ N(0, I_D) and maps it to an input x in R^N.
What the theory needs from the map (docs/equations.md, sections 2 and 5) is

    mean   = E[x]                               (subtracted, so inputs are centred)
    Omega  = E[(x - mean)(x - mean)^T]          N x N
    Phi    = E[x c^T]                           N x D

computed once per seed (per draw of the generator's weights). Three routes:

* single layer x = f(F^T c / sqrt(D)) - E f: closed forms for sign, erf, relu and
  linear, Gauss-Hermite quadrature for every other element-wise map, and Phi from
  Stein's lemma (no sampling at all);
* deep random generator x = act_L(... act_1(W_1^T c / sqrt(D)) ...): Monte Carlo;
* any other sampler (e.g. a trained generator): the same Monte Carlo routine.

The eigen-projection of section 4 (Omega psi_tau = rho_tau psi_tau) and the order
parameters of section 2 live here too, so the exact finite-N theory and the
simulation read the same instance the same way.

Weight layout: a layer maps width_l -> width_{l+1} through a [width_l, width_{l+1}]
matrix, so the single-layer F (D x N) is exactly a one-layer deep generator.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from functools import cache
from typing import NamedTuple

import jax
import jax.numpy as jnp
import numpy as np

from harness.core.activations import ACTIVATIONS, get_activation
from harness.core.errors import InputError

CLOSED_FORM_MAPS: tuple[str, ...] = ("erf", "linear", "relu", "sign")
"""Feature maps whose Omega and E f' are known in closed form."""

METHODS: tuple[str, ...] = ("auto", "closed_form", "quadrature")
"""Routes accepted by ``single_layer_moments(method=...)``."""

DEFAULT_QUADRATURE_POINTS = 40
"""Gauss-Hermite nodes per dimension of the pair integrals. tanh converges slowly
(poles at +-i pi/2): with C_ii ~ 1 and |rho| <= 0.5, 40 nodes are within ~2e-7 of
160 nodes off the diagonal, 60 nodes within ~6e-9 (measured when this was written).
The equally spaced rule of harness/equations/gaussian_averages.py converges faster for tanh
(~1e-7 at 24 nodes, ~7e-11 at 40 on the same test); Gauss-Hermite is kept as specified
for this module (swapping the rule is a one-line change in _quadrature)."""

ONE_DIMENSIONAL_NODE_FACTOR = 4
"""The 1-D integrals (means, variances, E f') are cheap, so they use this many times
more nodes (capped at MAX_QUADRATURE_POINTS); they set the diagonal of Omega, which
dominates Q = w Omega w^T / N."""

MAX_QUADRATURE_POINTS = 300
"""numpy's Gauss-Hermite weights overflow somewhere between 300 and 400 nodes."""

DEFAULT_PAIR_CHUNK_ELEMENTS = 1 << 20
"""Upper bound on pairs x nodes^2 evaluated at once (8 MB per float64 buffer; larger
chunks fall out of cache and were slower on a 2-core CPU)."""

DEFAULT_MONTE_CARLO_CHUNK = 8192
"""Latent samples drawn and reduced at once by ``monte_carlo_moments``."""


class FeatureMoments(NamedTuple):
    """First and second moments of a latent-variable input model (docs/equations.md, section 2)."""

    omega: np.ndarray  # [N, N] covariance of the (centred) inputs
    phi: np.ndarray  # [N, D] E[x c^T]
    mean: np.ndarray  # [N] E[x] before centring; subtracted from the inputs
    method: str  # "closed_form" | "quadrature" | "monte_carlo"
    standard_error: float | None  # Monte Carlo only: max entry-wise std error of omega
    phi_standard_error: float | None = None  # Monte Carlo only: same for phi


class Projection(NamedTuple):
    """One instance projected on the eigenbasis of Omega (docs/equations.md, section 5)."""

    rho: np.ndarray  # [N] eigenvalues of Omega, ascending
    psi: np.ndarray  # [N, N] orthonormal eigenvectors, column tau <-> rho[tau]
    w_proj: np.ndarray  # [N, K] w_k^tau = psi_tau . w_k
    omega_proj: np.ndarray  # [N, M] om_m^tau = sqrt(N) psi_tau^T Phi wt_m / sqrt(D)


# --------------------------------------------------------------------------------------
# input checks


def _require_x64() -> None:
    # Quadrature and Monte Carlo run in JAX; in float32 the subtraction
    # E[f f] - E f E f would lose the precision the paired comparison needs.
    if not jax.config.jax_enable_x64:
        raise RuntimeError("feature_covariance needs jax_enable_x64 (enabled by importing the harness package)")


def _check_feature_map(feature_map: str, argument: str = "feature_map") -> None:
    if feature_map not in ACTIVATIONS:
        allowed = ", ".join(sorted(ACTIVATIONS))
        raise InputError(f"{argument} {feature_map!r} is unknown; allowed: {allowed}")


def _as_matrix(value: np.ndarray, name: str) -> np.ndarray:
    matrix = np.asarray(value, dtype=np.float64)
    if matrix.ndim != 2:
        raise InputError(f"{name} must be a 2-D array, got shape {matrix.shape}")
    if not np.all(np.isfinite(matrix)):
        raise InputError(f"{name} contains non-finite entries")
    return matrix


# --------------------------------------------------------------------------------------
# single-layer generator: x = f(F^T c / sqrt(D)) - E f


def latent_preactivation_covariance(F: np.ndarray) -> np.ndarray:
    """C = F^T F / D, the covariance of u = F^T c / sqrt(D) (docs/equations.md, section 5)."""
    F = _as_matrix(F, "F")
    return F.T @ F / F.shape[0]


def _closed_form(feature_map: str, C: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(mean, Omega, E f'(u_i)) for a map in CLOSED_FORM_MAPS, given C = Cov(u)."""
    var = np.diag(C).copy()
    n = C.shape[0]
    if feature_map == "linear":
        return np.zeros(n), C.copy(), np.ones(n)
    if feature_map == "sign":
        # Sheppard (1899): E[sign(u_i) sign(u_j)] = (2/pi) arcsin(rho_ij) with rho the
        # correlation coefficient; E sign(u) = 0 by symmetry. Stein's lemma with the
        # distributional derivative 2 delta(u): E f'(u) = E|u| / C_ii = sqrt(2/(pi C_ii)).
        scale = np.sqrt(var)
        rho = np.clip(C / np.outer(scale, scale), -1.0, 1.0)
        omega = (2.0 / math.pi) * np.arcsin(rho)
        np.fill_diagonal(omega, 1.0)
        return np.zeros(n), omega, np.sqrt(2.0 / (math.pi * var))
    if feature_map == "erf":
        # Arcsine kernel for g(x) = erf(x/sqrt2) (docs/equations.md, section 2, I2; Saad & Solla
        # 1995); it also holds on the diagonal. E g'(u) = sqrt(2/pi) E exp(-u^2/2)
        # = sqrt(2/pi) / sqrt(1 + C_ii).
        shifted = np.sqrt(1.0 + var)
        omega = (2.0 / math.pi) * np.arcsin(np.clip(C / np.outer(shifted, shifted), -1.0, 1.0))
        return np.zeros(n), omega, math.sqrt(2.0 / math.pi) / shifted
    if feature_map == "relu":
        # Degree-1 arc-cosine kernel (Cho & Saul 2009):
        # E[relu(u_i) relu(u_j)] = sqrt(C_ii C_jj) / (2 pi) (sin t + (pi - t) cos t),
        # t = arccos(rho_ij); E relu(u_i) = sqrt(C_ii / (2 pi)); E relu'(u) = P(u > 0) = 1/2.
        scale = np.sqrt(var)
        rho = np.clip(C / np.outer(scale, scale), -1.0, 1.0)
        angle = np.arccos(rho)
        second = np.outer(scale, scale) / (2.0 * math.pi) * (np.sin(angle) + (math.pi - angle) * rho)
        mean = scale / math.sqrt(2.0 * math.pi)
        omega = second - np.outer(mean, mean)
        # on the diagonal t = 0 exactly: E relu(u)^2 = C_ii / 2
        np.fill_diagonal(omega, var / 2.0 - mean**2)
        return mean, omega, np.full(n, 0.5)
    raise InputError(f"feature_map {feature_map!r} has no closed form; allowed: {', '.join(CLOSED_FORM_MAPS)}")


def _probabilists_hermite_rule(points: int) -> tuple[np.ndarray, np.ndarray]:
    """Nodes z and weights w with sum_k w_k h(z_k) ~ E h(z), z ~ N(0, 1)."""
    nodes, weights = np.polynomial.hermite_e.hermegauss(points)
    return nodes, weights / math.sqrt(2.0 * math.pi)


@cache
def _pair_expectation_kernel(feature_map: str) -> Callable:
    """Jitted E[f(u_1) f(u_2)] for a batch of bivariate Gaussians, one per pair."""
    fn = get_activation(feature_map).fn

    def kernel(var_a, cov_ab, var_b, nodes, weights):
        # Cholesky of [[a, b], [b, c]]: u1 = sqrt(a) z1, u2 = b/sqrt(a) z1 + sqrt(c - b^2/a) z2
        scale_a = jnp.sqrt(var_a)[:, None]
        loading = (cov_ab / jnp.sqrt(var_a))[:, None]
        residual = jnp.sqrt(jnp.maximum(var_b - cov_ab**2 / var_a, 0.0))[:, None]
        first = fn(scale_a * nodes[None, :])  # [P, Q]
        second = fn(
            (loading * nodes[None, :])[:, :, None] + (residual * nodes[None, :])[:, None, :]
        )  # [P, Q(z1), Q(z2)]
        inner = second @ weights  # integrate z2 first: [P, Q]
        return (first * inner) @ weights

    return jax.jit(kernel)


def _quadrature(
    feature_map: str, C: np.ndarray, points: int, chunk_elements: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(mean, Omega, E f'(u_i)) by Gauss-Hermite quadrature, 1-D on the diagonal, 2-D per pair."""
    _require_x64()
    fn = get_activation(feature_map).fn
    nodes, weights = _probabilists_hermite_rule(points)
    line_nodes, line_weights = _probabilists_hermite_rule(
        min(ONE_DIMENSIONAL_NODE_FACTOR * points, MAX_QUADRATURE_POINTS)
    )
    var = np.diag(C).copy()
    scale = np.sqrt(var)

    # 1-D rule for the means, variances and E f'. E f' goes through Stein's lemma,
    # E f'(u) = E[u f(u)] / C_ii, because the activation table's derivative of sign
    # is zero almost everywhere and would miss the delta at the origin.
    values = np.asarray(fn(jnp.asarray(scale[:, None] * line_nodes[None, :])))  # [N, Q1]
    mean = values @ line_weights
    variance = (values**2) @ line_weights - mean**2
    slope = (values * line_nodes[None, :]) @ line_weights / scale

    n = C.shape[0]
    omega = np.zeros((n, n))
    np.fill_diagonal(omega, variance)
    rows, cols = np.triu_indices(n, k=1)
    pair_count = rows.size
    if pair_count:
        chunk = max(1, min(pair_count, chunk_elements // (points * points)))
        kernel = _pair_expectation_kernel(feature_map)
        nodes_j, weights_j = jnp.asarray(nodes), jnp.asarray(weights)
        second_moment = np.empty(pair_count)
        for start in range(0, pair_count, chunk):
            stop = min(start + chunk, pair_count)
            # pad the last chunk with independent unit-variance pairs so the kernel
            # keeps one shape and compiles once
            pad = chunk - (stop - start)
            var_a = np.concatenate([var[rows[start:stop]], np.ones(pad)])
            var_b = np.concatenate([var[cols[start:stop]], np.ones(pad)])
            cov_ab = np.concatenate([C[rows[start:stop], cols[start:stop]], np.zeros(pad)])
            result = kernel(jnp.asarray(var_a), jnp.asarray(cov_ab), jnp.asarray(var_b), nodes_j, weights_j)
            second_moment[start:stop] = np.asarray(result)[: stop - start]
        off_diagonal = second_moment - mean[rows] * mean[cols]
        omega[rows, cols] = off_diagonal
        omega[cols, rows] = off_diagonal
    return mean, omega, slope


def single_layer_moments(
    F: np.ndarray,
    feature_map: str,
    *,
    method: str = "auto",
    quadrature_points: int = DEFAULT_QUADRATURE_POINTS,
    pair_chunk_elements: int = DEFAULT_PAIR_CHUNK_ELEMENTS,
) -> FeatureMoments:
    """Mean, Omega and Phi of x = f(F^T c / sqrt(D)) - E f for a fixed D x N matrix F.

    ``method="auto"`` uses the closed form when ``feature_map`` has one
    (CLOSED_FORM_MAPS) and Gauss-Hermite quadrature otherwise; "quadrature" forces
    quadrature (used to test it against the closed forms). Phi comes from Stein's
    lemma, Phi_i. = F_i^T / sqrt(D) * E f'(u_i) (docs/equations.md, section 5).
    """
    _check_feature_map(feature_map)
    if method not in METHODS:
        raise InputError(f"method {method!r} is unknown; allowed: {', '.join(METHODS)}")
    if not 2 <= quadrature_points <= MAX_QUADRATURE_POINTS:
        raise InputError(f"quadrature_points must be in [2, {MAX_QUADRATURE_POINTS}], got {quadrature_points}")
    if pair_chunk_elements < 1:
        raise InputError(f"pair_chunk_elements must be >= 1, got {pair_chunk_elements}")
    F = _as_matrix(F, "F")
    D = F.shape[0]
    C = F.T @ F / D
    if np.any(np.diag(C) <= 0.0):
        raise InputError("F has an all-zero column; every u_i needs positive variance")

    use_closed_form = method == "closed_form" or (method == "auto" and feature_map in CLOSED_FORM_MAPS)
    if use_closed_form:
        mean, omega, slope = _closed_form(feature_map, C)
        route = "closed_form"
    else:
        mean, omega, slope = _quadrature(feature_map, C, quadrature_points, pair_chunk_elements)
        route = "quadrature"
    phi = F.T / math.sqrt(D) * slope[:, None]
    return FeatureMoments(omega=omega, phi=phi, mean=mean, method=route, standard_error=None)


# --------------------------------------------------------------------------------------
# deep random generator and Monte Carlo moments


def deep_generator_init(
    key_or_seed: int | jax.Array, widths: Sequence[int], activations: Sequence[str]
) -> list[np.ndarray]:
    """Weights of a random generator with layer widths [D, h_1, ..., N], i.i.d. N(0, 1).

    Layer l is a [widths[l], widths[l + 1]] matrix; ``activations[l]`` follows it.
    """
    widths = [int(width) for width in widths]
    if len(widths) < 2 or any(width < 1 for width in widths):
        raise InputError(f"widths must list at least two positive sizes [D, ..., N], got {widths}")
    if len(activations) != len(widths) - 1:
        raise InputError(f"activations needs one name per layer ({len(widths) - 1}), got {len(activations)}")
    for name in activations:
        _check_feature_map(name, "activations entry")
    _require_x64()
    key = jax.random.PRNGKey(key_or_seed) if isinstance(key_or_seed, int) else key_or_seed
    layer_keys = jax.random.split(key, len(widths) - 1)
    return [
        np.asarray(jax.random.normal(layer_key, (fan_in, fan_out), dtype=jnp.float64))
        for layer_key, fan_in, fan_out in zip(layer_keys, widths[:-1], widths[1:], strict=True)
    ]


def deep_generator_apply(weights: Sequence[jax.Array], activations: Sequence[str], c: jax.Array) -> jax.Array:
    """Uncentred inputs x [B, N] for latents c [B, D]: x_{l+1} = act_l(x_l W_l / sqrt(width_l)).

    Pure and jit-able (the activation names are Python constants under tracing).
    """
    if len(weights) != len(activations):
        raise InputError(f"activations needs one name per weight matrix ({len(weights)}), got {len(activations)}")
    x = c
    for weight, name in zip(weights, activations, strict=True):
        weight = jnp.asarray(weight)
        x = get_activation(name).fn(x @ weight / math.sqrt(weight.shape[0]))
    return x


def deep_generator_sampler(
    weights: Sequence[np.ndarray], activations: Sequence[str]
) -> Callable[[jax.Array], jax.Array]:
    """A jitted c -> x closure over fixed weights, suitable for ``monte_carlo_moments``."""
    fixed = [jnp.asarray(weight, dtype=jnp.float64) for weight in weights]
    names = tuple(activations)
    return jax.jit(lambda c: deep_generator_apply(fixed, names, c))


@jax.jit
def _chunk_sum(x: jax.Array, mask: jax.Array) -> jax.Array:
    return mask @ x


@jax.jit
def _chunk_centred_sums(
    x: jax.Array, c: jax.Array, mask: jax.Array, mean: jax.Array
) -> tuple[jax.Array, jax.Array, jax.Array, jax.Array]:
    # masked rows (padding of the last chunk) contribute nothing
    y = (x - mean[None, :]) * mask[:, None]
    y2 = y * y
    return y.T @ y, y2.T @ y2, y.T @ c, y2.T @ (c * c)


def monte_carlo_moments(
    sample_fn: Callable[[jax.Array], jax.Array],
    D: int,
    samples: int,
    seed: int,
    *,
    chunk: int = DEFAULT_MONTE_CARLO_CHUNK,
) -> FeatureMoments:
    """Mean, Omega = Cov(x) and Phi = E[x c^T] of x = sample_fn(c), c ~ N(0, I_D), by sampling.

    ``sample_fn`` maps latents [B, D] (float64) to inputs [B, N]; it may be centred or
    not. Two passes over the same latents (regenerated from the same keys): the first
    estimates the mean, the second the centred sums, so Omega is the plain sample
    covariance and its standard error uses Var[(x_i - m_i)(x_j - m_j)] / samples
    (leading order in 1/samples). Reported errors are maxima over entries.
    """
    if D < 1:
        raise InputError(f"D must be a positive latent dimension, got {D}")
    if samples < 2:
        raise InputError(f"samples must be >= 2, got {samples}")
    if chunk < 1:
        raise InputError(f"chunk must be >= 1, got {chunk}")
    _require_x64()
    chunk = min(chunk, samples)
    chunk_count = -(-samples // chunk)
    chunk_keys = jax.random.split(jax.random.PRNGKey(seed), chunk_count)

    def draw(index: int) -> tuple[jax.Array, jax.Array, jax.Array]:
        c = jax.random.normal(chunk_keys[index], (chunk, D), dtype=jnp.float64)
        x = jnp.asarray(sample_fn(c), dtype=jnp.float64)
        if x.ndim != 2 or x.shape[0] != chunk:
            raise InputError(f"sample_fn must return shape [{chunk}, N], got {x.shape}")
        valid = min(chunk, samples - index * chunk)
        mask = (jnp.arange(chunk) < valid).astype(jnp.float64)
        return c, x, mask

    total = None
    for index in range(chunk_count):
        _, x, mask = draw(index)
        part = _chunk_sum(x, mask)
        total = part if total is None else total + part
    mean = total / samples

    sums = None
    for index in range(chunk_count):
        c, x, mask = draw(index)
        part = _chunk_centred_sums(x, c, mask, mean)
        sums = part if sums is None else tuple(a + b for a, b in zip(sums, part, strict=True))
    yy, y2y2, yc, y2c2 = (np.asarray(s) for s in sums)

    omega = yy / (samples - 1)
    product_variance = np.maximum(y2y2 / samples - (yy / samples) ** 2, 0.0)
    phi = yc / samples
    phi_variance = np.maximum(y2c2 / samples - phi**2, 0.0)
    return FeatureMoments(
        omega=omega,
        phi=phi,
        mean=np.asarray(mean),
        method="monte_carlo",
        standard_error=float(np.sqrt(product_variance.max() / samples)),
        phi_standard_error=float(np.sqrt(phi_variance.max() / samples)),
    )


def deep_generator_moments(
    weights: Sequence[np.ndarray],
    activations: Sequence[str],
    samples: int,
    seed: int,
    *,
    chunk: int = DEFAULT_MONTE_CARLO_CHUNK,
) -> FeatureMoments:
    """Monte Carlo moments of the deep random generator with the given weights."""
    D = int(np.shape(weights[0])[0])
    return monte_carlo_moments(deep_generator_sampler(weights, activations), D, samples, seed, chunk=chunk)


# --------------------------------------------------------------------------------------
# section 4: eigen-projection and order parameters


def _check_instance(
    omega: np.ndarray, phi: np.ndarray, teacher_weights: np.ndarray, student_weights: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    omega = _as_matrix(omega, "omega")
    phi = _as_matrix(phi, "phi")
    teacher_weights = _as_matrix(teacher_weights, "teacher_weights")
    student_weights = _as_matrix(student_weights, "student_weights")
    n, d = phi.shape
    if omega.shape != (n, n):
        raise InputError(f"omega must be [N, N] = [{n}, {n}] to match phi, got {omega.shape}")
    if teacher_weights.shape[1] != d:
        raise InputError(f"teacher_weights must be [M, D] with D = {d}, got {teacher_weights.shape}")
    if student_weights.shape[1] != n:
        raise InputError(f"student_weights must be [K, N] with N = {n}, got {student_weights.shape}")
    if not np.allclose(omega, omega.T, rtol=1e-10, atol=1e-12 * max(1.0, np.abs(omega).max())):
        raise InputError("omega must be symmetric")
    return omega, phi, teacher_weights, student_weights


def eigen_projection(
    omega: np.ndarray,
    phi: np.ndarray,
    teacher_weights: np.ndarray,
    student_weights: np.ndarray,
) -> Projection:
    """Project student and teacher on the eigenbasis of Omega (docs/equations.md, section 5).

    teacher_weights: wt [M, D]; student_weights: w [K, N].
    """
    omega, phi, teacher_weights, student_weights = _check_instance(omega, phi, teacher_weights, student_weights)
    n, d = phi.shape
    rho, psi = np.linalg.eigh(omega)
    w_proj = psi.T @ student_weights.T
    omega_proj = math.sqrt(n / d) * (psi.T @ (phi @ teacher_weights.T))
    return Projection(rho=rho, psi=psi, w_proj=w_proj, omega_proj=omega_proj)


def eigen_overlaps(projection: Projection) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per-eigenvalue overlaps q [N, K, K], r [N, K, M], t [N, M, M] (docs/equations.md, section 5)."""
    w_proj, om_proj = projection.w_proj, projection.omega_proj
    q = np.einsum("tk,tl->tkl", w_proj, w_proj)
    r = np.einsum("tk,tm->tkm", w_proj, om_proj)
    t = np.einsum("tm,tn->tmn", om_proj, om_proj)
    return q, r, t


def order_parameters(
    omega: np.ndarray,
    phi: np.ndarray,
    teacher_weights: np.ndarray,
    student_weights: np.ndarray,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Q = w Omega w^T / N, R = w Phi wt^T / sqrt(N D), T = wt wt^T / D (docs/equations.md, section 2)."""
    omega, phi, teacher_weights, student_weights = _check_instance(omega, phi, teacher_weights, student_weights)
    n, d = phi.shape
    Q = student_weights @ omega @ student_weights.T / n
    R = student_weights @ phi @ teacher_weights.T / math.sqrt(n * d)
    T = teacher_weights @ teacher_weights.T / d
    return Q, R, T

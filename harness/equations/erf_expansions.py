"""Gaussian averages of tanh and sigmoid networks as sums of erf closed forms.

Each activation g is written as a constant plus a short sum of scaled erfs,

    g(x) ~ c0 + sum_i alpha_i G(beta_i x),    G(x) = erf(x / sqrt(2)),
    g'(x) ~ sum_i alpha_i beta_i G'(beta_i x)  (the derivative of the same sum),

and then every average is a weighted sum of the erf closed forms (Saad & Solla 1995) at a
rescaled covariance: G(beta_i u_a) and G(beta_j u_b) are erf units whose fields have
covariance beta_i beta_j C_ab. So a network of P units with n terms each is evaluated as a
"virtual" erf network of n P units: C_v = B C B^T with B [nP, P] holding the scales, the erf
closed forms on C_v, and the result contracted with the weights alpha (alpha beta for g').
The constant c0 (sigmoid) enters only I2 and I4: g' is even and the erf sum odd, so
E[g'(l_k) u_b] = 0 and E[g'(l_k) g'(l_l) (erf sum)] = 0, leaving
    I2 += c0_a c0_b,   I4[k, l, c, d] += c0_c c0_d J0[k, l].
Mixed pairs (tanh student, erf teacher, ...) are the same computation with per-unit sums
(erf itself is the one-term sum alpha = beta = 1).

The sums, fitted once (module constants; ``fit_residuals`` recomputes their errors)
------------------------------------------------------------------------------------
tanh(x) ~ sum_i a_i erf(b_i x) and tanh'(x) ~ sum_i a_i b_i (2/sqrt(pi)) exp(-b_i^2 x^2),
fitted jointly on x in [0, 16] (both sides odd/even) by variable projection (the a_i by
linear least squares for given b_i) with Lawson's reweighting towards the minimax
solution. Worst absolute errors over the whole line:

    terms  tanh     tanh'
    4      4.5e-5   1.2e-4
    5      8.3e-6   6.8e-6     <- TANH_TERMS
    6      1.7e-6   1.6e-6

sigmoid(x) = (1 + tanh(x / 2)) / 2 reuses the tanh sum (errors halved, and quartered for
sigmoid'). Since tanh has exponential tails and each erf term Gaussian ones, each further
term gains only a factor ~5-8 (the accuracy table of harness/equations/gaussian_averages.py gives
what this means for the averages and the trajectories).

Cost: the four-index average I4 needs (nK)^2 (nP)^2 / 4 erf terms (pairs of virtual units
that differ only by order are computed once), n^4 / 4 times the erf network's count;
arcsin is the polynomial of harness/equations/fast_arcsin.py, 4x faster than XLA's on CPU.
"""

from __future__ import annotations

import math
from functools import cache
from typing import NamedTuple

import jax
import jax.numpy as jnp
import numpy as np

from harness.equations.fast_arcsin import arcsin

Array = jax.Array

# tanh(x) ~ sum a_i erf(b_i x): the joint fit of the module docstring (5 terms).
_TANH_B = (0.449221412045208, 0.6416364222499426, 0.8975650294998555, 1.234243885002554, 1.6909034284095754)
_TANH_A = (0.052410479068835586, 0.29431452594314256, 0.42339189736853505, 0.20778272189063213, 0.0220972890982562)
TANH_TERMS = len(_TANH_A)

EXPANDED_ACTIVATIONS: frozenset[str] = frozenset({"erf", "tanh", "sigmoid"})
"""Activations written as erf sums; any pair of them uses this route."""

_TWO_OVER_PI = 2.0 / math.pi


class Expansion(NamedTuple):
    """g(x) ~ offset + sum_i alpha_i G(beta_i x) with G(x) = erf(x / sqrt(2))."""

    offset: float
    alpha: tuple[float, ...]
    beta: tuple[float, ...]


def expansion(name: str) -> Expansion:
    """The erf sum of an activation (erf(b x) = G(sqrt(2) b x))."""
    root2 = math.sqrt(2.0)
    if name == "erf":
        return Expansion(0.0, (1.0,), (1.0,))
    if name == "tanh":
        return Expansion(0.0, _TANH_A, tuple(root2 * b for b in _TANH_B))
    if name == "sigmoid":  # (1 + tanh(x / 2)) / 2
        return Expansion(0.5, tuple(0.5 * a for a in _TANH_A), tuple(root2 * b / 2.0 for b in _TANH_B))
    raise ValueError(f"no erf expansion for {name!r}; have: {', '.join(sorted(EXPANDED_ACTIVATIONS))}")


def fit_residuals(name: str, x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(g_sum - g, g_sum' - g') on the points x (numpy): the fit's errors, for tests and tables."""
    from scipy import special

    e = expansion(name)
    alpha, beta = np.asarray(e.alpha), np.asarray(e.beta)
    z = beta[:, None] * x[None, :] / math.sqrt(2.0)
    value = e.offset + np.sum(alpha[:, None] * special.erf(z), axis=0)
    slope = np.sum((alpha * beta)[:, None] * math.sqrt(2.0 / math.pi) * np.exp(-z * z), axis=0)
    exact = {"erf": special.erf(x / math.sqrt(2.0)), "tanh": np.tanh(x), "sigmoid": special.expit(x)}[name]
    exact_slope = {
        "erf": math.sqrt(2.0 / math.pi) * np.exp(-0.5 * x * x),
        "tanh": 1.0 - np.tanh(x) ** 2,
        "sigmoid": special.expit(x) * (1.0 - special.expit(x)),
    }[name]
    return value - exact, slope - exact_slope


# --------------------------------------------------------------------------- static tables


class _Virtual(NamedTuple):
    """Static matrices of the virtual erf network for (K, P, student, teacher)."""

    scales: np.ndarray  # [V, P]: row v has beta_v at its unit's column (C_v = B C B^T)
    value_weights: np.ndarray  # [P, V]: alpha_v (the sum for g)
    slope_weights: np.ndarray  # [K, Vs]: alpha_v beta_v (the sum for g') over student virtual units
    offsets: np.ndarray  # [P]: c0
    student_pairs: np.ndarray  # [Ps, 2] virtual student pairs x <= y
    all_pairs: np.ndarray  # [Pa, 2] virtual pairs z <= w
    student_pair_weights: np.ndarray  # [Ps, K * K]
    all_pair_weights: np.ndarray  # [Pa, P * P]


@cache
def _virtual(K: int, P: int, student: str, teacher: str) -> _Virtual:
    units = [expansion(student)] * K + [expansion(teacher)] * (P - K)
    owner = np.concatenate([np.full(len(u.alpha), a) for a, u in enumerate(units)])
    alpha = np.concatenate([u.alpha for u in units])
    beta = np.concatenate([u.beta for u in units])
    V = owner.size
    Vs = sum(len(u.alpha) for u in units[:K])
    scales = np.zeros((V, P))
    scales[np.arange(V), owner] = beta
    value_weights = np.zeros((P, V))
    value_weights[owner, np.arange(V)] = alpha
    slope_weights = np.zeros((K, Vs))
    slope_weights[owner[:Vs], np.arange(Vs)] = (alpha * beta)[:Vs]

    def pairs(n: int) -> np.ndarray:
        return np.array([(x, y) for x in range(n) for y in range(x, n)], dtype=np.int64).reshape(-1, 2)

    def pair_weights(pair_list: np.ndarray, weights: np.ndarray) -> np.ndarray:
        # I[a, b] = sum_{x, y} w[a, x] w[b, y] I_v[x, y] over ordered pairs; a pair x < y stands for both orders.
        n_units = weights.shape[0]
        out = np.zeros((len(pair_list), n_units * n_units))
        for row, (x, y) in enumerate(pair_list):
            block = np.outer(weights[:, x], weights[:, y])
            if x != y:
                block = block + np.outer(weights[:, y], weights[:, x])
            out[row] = block.ravel()
        return out

    student_pairs, all_pairs = pairs(Vs), pairs(V)
    return _Virtual(
        scales, value_weights, slope_weights, np.array([u.offset for u in units]),
        student_pairs, all_pairs,
        pair_weights(student_pairs, slope_weights), pair_weights(all_pairs, value_weights),
    )


def _onehot(indices: np.ndarray, n: int, dtype) -> Array:
    """[len(indices), n] selection matrix: gathers as dots (XLA on CPU fuses gathers badly)."""
    out = np.zeros((indices.size, n))
    out[np.arange(indices.size), indices] = 1.0
    return jnp.asarray(out, dtype)


# --------------------------------------------------------------------------- averages


def expanded_averages(cov: Array, K: int, student: str, teacher: str, outputs: tuple[str, ...]) -> dict[str, Array]:
    """I2, I3, I4, J0 (those in ``outputs``) at one covariance, through the erf sums."""
    P = cov.shape[0]
    dtype = cov.dtype
    net = _virtual(K, P, student, teacher)
    B = jnp.asarray(net.scales, dtype)
    Vs = net.slope_weights.shape[1]
    virtual = B @ cov @ B.T  # [V, V]
    diag = jnp.diagonal(virtual)
    one_plus = 1.0 + diag
    A = jnp.asarray(net.value_weights, dtype)
    D = jnp.asarray(net.slope_weights, dtype)
    offsets = jnp.asarray(net.offsets, dtype)
    out: dict[str, Array] = {}

    J0 = None
    if "J0" in outputs or "I4" in outputs:
        q = virtual[:Vs, :Vs]
        J0_v = _TWO_OVER_PI / jnp.sqrt(one_plus[:Vs, None] * one_plus[None, :Vs] - q**2)
        J0 = D @ J0_v @ D.T
        if "J0" in outputs:
            out["J0"] = J0
    if "I2" in outputs:
        I2_v = _TWO_OVER_PI * arcsin(virtual / jnp.sqrt(one_plus[:, None] * one_plus[None, :]))
        out["I2"] = A @ I2_v @ A.T + offsets[:, None] * offsets[None, :]
    if "I3" in outputs:
        # E[G'(v_x) u_b G(v_y)]: variables (1, 2, 3) = (virtual student x, unit b, virtual y).
        cross = B @ cov  # [V, P]: Cov(v, u_b)
        c11 = diag[:Vs, None, None]
        c12 = cross[:Vs, :, None]
        c13 = virtual[:Vs, None, :]
        c23 = cross.T[None, :, :]
        c33 = diag[None, None, :]
        L3 = (1.0 + c11) * (1.0 + c33) - c13**2
        I3_v = _TWO_OVER_PI / jnp.sqrt(L3) * (c23 * (1.0 + c11) - c12 * c13) / (1.0 + c11)
        out["I3"] = jnp.einsum("kx,xby,cy->kbc", D, I3_v, A)
    if "I4" in outputs:
        # Pairs of virtual students (x, y) and of virtual units (z, w), each unordered.
        x, y = net.student_pairs.T
        z, w = net.all_pairs.T
        V = virtual.shape[0]
        Sx, Sy, Tz, Tw = (_onehot(i, V, dtype) for i in (x, y, z, w))
        e11, e22 = (Sx @ diag)[:, None], (Sy @ diag)[:, None]
        e12 = jnp.sum((Sx @ virtual) * Sy, axis=1)[:, None]
        e33, e44 = (Tz @ diag)[None, :], (Tw @ diag)[None, :]
        e34 = jnp.sum((Tz @ virtual) * Tw, axis=1)[None, :]
        e13, e14 = Sx @ virtual @ Tz.T, Sx @ virtual @ Tw.T
        e23, e24 = Sy @ virtual @ Tz.T, Sy @ virtual @ Tw.T
        L4 = (1.0 + e11) * (1.0 + e22) - e12**2
        L0 = L4 * e34 - e23 * e24 * (1.0 + e11) - e13 * e14 * (1.0 + e22) + e12 * e13 * e24 + e12 * e14 * e23
        L1 = L4 * (1.0 + e33) - e23**2 * (1.0 + e11) - e13**2 * (1.0 + e22) + 2.0 * e12 * e13 * e23
        L2 = L4 * (1.0 + e44) - e24**2 * (1.0 + e11) - e14**2 * (1.0 + e22) + 2.0 * e12 * e14 * e24
        I4_v = (4.0 / math.pi**2) * jax.lax.rsqrt(L4) * arcsin(L0 * jax.lax.rsqrt(L1 * L2))  # [Ps, Pa]
        I4 = (jnp.asarray(net.student_pair_weights.T, dtype) @ I4_v @ jnp.asarray(net.all_pair_weights, dtype))
        I4 = I4.reshape(K, K, P, P) + J0[:, :, None, None] * (offsets[:, None] * offsets[None, :])[None, None]
        out["I4"] = I4
    return out

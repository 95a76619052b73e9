"""Closed forms of the Gaussian averages I2, I3, I4, J0 for relu students and teachers.

With g(x) = relu(x) = x 1{x > 0} and g'(x) = 1{x > 0} (0 at 0, as in the simulator), every
factor of every average is a truncated power u^p 1{u > 0}, or the free u_b of I3; so the
averages are low moments of a Gaussian vector over a positive orthant. Write u = s y with
s_a = sqrt(C_aa) and y ~ N(0, R) (R the correlation matrix), theta(y) = 1{y > 0},
phi0 = 1/sqrt(2 pi) the standard normal density at 0.

Orthant probabilities, P_S = P(y_S > 0)
---------------------------------------
  P_1 = 1/2,  P_2(rho) = 1/4 + asin(rho) / (2 pi)       (Sheppard 1899)
  P_3 = 1/8 + (asin R12 + asin R13 + asin R23) / (4 pi)
The quadrivariate one has no closed form; Plackett's reduction (Biometrika 41, 1954) gives
dP_4/dR_ij = p2(R_ij) P_2(r_{ab|ij}), with p2(rho) = 1/(2 pi sqrt(1 - rho^2)) the density
of (y_i, y_j) at 0 and r_{ab|ij} the partial correlation of the other two given (y_i, y_j).
Along R(t) = (1 - t) I + t R (positive definite for t < 1 whatever R is) this is a
one-dimensional integral from P_4(I) = 1/16.

Moments (Stein's lemma E[y_a h(y)] = sum_m R_am E[d_m h(y)], common practice, no source)
---------------------------------------------------------------------------------------
* I2[a, b] = s_a s_b k1(R_ab), k1(rho) = rho P_2(rho) + sqrt(1 - rho^2) / (2 pi): the
  degree-1 arc-cosine kernel (Cho & Saul 2009). J0[k, l] = P_2(R_kl), the degree-0 one.
* I3[k, b, c] = E[theta_k u_b u_c theta_c]. Stein on u_b: d_k brings delta(y_k), whose
  conditional moment is E[y_c theta_c | y_k = 0] = phi0 sqrt(1 - R_kc^2); d_c brings P_2:
      I3 = s_b s_c [ R_bk sqrt(1 - R_kc^2) / (2 pi) + R_bc P_2(R_kc) ]
  (the same formula holds at c = k, where it is s_b s_k R_bk / 2).
* I4[k, l, c, d] = s_c s_d E[y_c y_d theta_S] with S the set of distinct indices.
  - |S| <= 3: pad S to three variables with independent dummies (each halves the average)
    and apply Stein twice; the conditional bivariate first moment
    E[z_1 theta_1 theta_2] = (phi0 / 2)(sqrt(S11) + S12 / sqrt(S22)) appears, and the
    divisions by sqrt(1 - R^2) cancel between the two terms (Tallis 1961's trivariate
    moments in a form without divisions), for {c, d, q} = S with c != d:
      E[y_c y_d theta] = R_cd P_3 + (1/(4 pi)) [sqrt(1 - R_cd^2) + R_cq sqrt(1 - R_dq^2)
                                                 + R_dq sqrt(1 - R_cq^2)]
    and for c = d with {c, b, q} = S:
      E[y_c^2 theta] = P_3 + (1/(4 pi)) [R_cb sqrt(1 - R_cb^2) + R_cq sqrt(1 - R_cq^2)
                        + (2 R_cb R_cq - R_bq (R_cb^2 + R_cq^2)) / sqrt(1 - R_bq^2)]
    The last fraction is O(sqrt(1 - R_bq)) as R_bq -> 1 and is set to 0 at R_bq = +-1
    exactly (its limit); in floating point its error is <= ~1e-16 / sqrt(2e-16) ~ 1e-8.
  - |S| = 4 (k, l, c, d distinct): the conditional partial correlations the endpoint
    Stein formula needs are 0/0 when R is singular, and it is singular in practice: the
    students of a trained network lie in the teachers' span, so late in training every four
    of the K + M fields are nearly linearly dependent. Instead Price's theorem (IRE Trans.
    Inf. Theory 4, 1958), dE[f]/dR_ij = E[d_i d_j f], is integrated along R(t) from the
    identity, where E[y_c y_d theta] = phi0^4 * 4 = 1/(8 pi):
      E_R[f] = 1/(8 pi) + int_0^1 sum_{i<j} R_ij E_{R(t)}[d_i d_j f] dt,  f = y_c y_d theta_S,
    with the six second derivatives (at R(t), conditioning written |):
      (k, l): p2 * E[y_c theta_c y_d theta_d | y_k = y_l = 0]  (a conditional arc-cosine kernel)
      (k, c): phi0 E[y_d theta_d theta_l theta_c | y_k = 0]   and likewise (k, d), (l, c), (l, d);
              a trivariate first moment, by Stein once more a sum of P_2's of partial
              correlations given two variables
      (c, d): P_4(R(t)), and int_0^1 P_4(R(t)) dt = 1/16 + int_0^1 (1 - t) dP_4/dt dt.
    Every quantity at t < 1 comes from the precision matrix of R(t) (partial correlation
    r_{ab|ij} = -Lambda_ab / sqrt(Lambda_aa Lambda_bb), conditional covariance of (a, b)
    given (i, j) = the inverse of Lambda's (a, b) block), which exists for any R.
    Near t = 1 the integrand may behave like sqrt(1 - t) or 1 / sqrt(1 - t) (singular R),
    so t = 1 - w^2 and Gauss-Legendre in w (``PATH_NODES`` nodes): the integrand is then
    smooth in w.

A variable of zero variance has theta = 0 (g'(0) = relu(0) = 0, as in the simulator), so
every average with a truncated factor on it is 0 - this is a convention at that single
covariance, not a limit. Measured accuracy: tests/test_relu_averages.py and the table in
harness/equations/gaussian_averages.py.
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

PATH_NODES = 16
"""Gauss-Legendre nodes in w = sqrt(1 - t) for the four-variable averages (module docstring)."""

_INV_2PI = 1.0 / (2.0 * math.pi)
_INV_4PI = 1.0 / (4.0 * math.pi)
_PHI0 = 1.0 / math.sqrt(2.0 * math.pi)


def _asin(x: Array) -> Array:
    return arcsin(x)  # clips to [-1, 1]; a polynomial, 4x faster than XLA's (harness/equations/fast_arcsin.py)


def _sqrt_one_minus_square(x: Array) -> Array:
    return jnp.sqrt(jnp.clip(1.0 - x * x, 0.0, None))


def _orthant2(rho: Array) -> Array:
    """P(y_1 > 0, y_2 > 0) at correlation rho (Sheppard 1899)."""
    return 0.25 + _INV_2PI * _asin(rho)


def _arc_cosine1(rho: Array) -> Array:
    """E[y_1 theta_1 y_2 theta_2] at unit variances and correlation rho (Cho & Saul 2009)."""
    return rho * _orthant2(rho) + _INV_2PI * _sqrt_one_minus_square(rho)


def _select(matrix: Array, *requests: tuple[np.ndarray, ...]) -> list[Array]:
    """``[matrix[request] for request in requests]``, each a tuple of static index arrays, as one dot.

    XLA on CPU fuses a gather with the elementwise work around it badly (measured: a
    225-entry gather at the end of I4 tripled its cost); a product with a one-hot matrix is
    never fused that way. One product for all the requests rather than one each: XLA compiles
    every dot as a kernel of its own (20-60 ms each), and the four-variable average alone
    makes thirteen selections.
    """
    sizes = [request[0].size for request in requests]
    onehot = np.zeros((matrix.size, sum(sizes)), np.float64)
    for start, request in zip(np.cumsum([0, *sizes[:-1]]), requests, strict=True):
        flat = np.ravel_multi_index(tuple(index.ravel() for index in request), matrix.shape)
        onehot[flat, start + np.arange(request[0].size)] = 1.0
    picked = jnp.split(matrix.reshape(-1) @ jnp.asarray(onehot, matrix.dtype), np.cumsum(sizes)[:-1])
    return [part.reshape(request[0].shape) for part, request in zip(picked, requests, strict=True)]


def _safe_divide(numerator: Array, denominator: Array) -> Array:
    """numerator / denominator, and 0 where the denominator is 0 (the limits used here)."""
    ok = denominator > 0
    return jnp.where(ok, numerator / jnp.where(ok, denominator, 1.0), 0.0)


# --------------------------------------------------------------------------- index tables


class _Tables(NamedTuple):
    """Static (numpy) description of the unique I4 entries, built once per (K, P)."""

    cross3: np.ndarray  # [n, 3] (c, d, q), c != d, |S| <= 3; dummies are P, P + 1
    cross3_factor: np.ndarray  # [n] 2^(number of dummies)
    cross3_scale: np.ndarray  # [n, 4] (k, l, c, d) of the entry: masks and s_c s_d
    square3: np.ndarray  # [n, 3] (c, b, q), c = d
    square3_factor: np.ndarray
    square3_scale: np.ndarray
    four: np.ndarray  # [n, 4] (k, l, c, d) all distinct
    index: np.ndarray  # [K, K, P, P] into concatenate([cross3, square3, four]) results


@cache
def _tables(K: int, P: int) -> _Tables:
    dummies = (P, P + 1)
    cross3, cross3_factor, cross3_scale = [], [], []
    square3, square3_factor, square3_scale = [], [], []
    four = []
    position: dict[tuple[int, int, int, int], tuple[str, int]] = {}
    for k in range(K):
        for l in range(K):
            for c in range(P):
                for d in range(P):
                    key = (min(k, l), max(k, l), min(c, d), max(c, d))  # I4 is symmetric in (k, l) and (c, d)
                    if key not in position:
                        kk, ll, cc, dd = key
                        S = sorted({kk, ll, cc, dd})
                        if len(S) == 4:
                            position[key] = ("four", len(four))
                            four.append(key)
                        elif cc != dd:
                            rest = [v for v in S if v not in (cc, dd)]
                            padded = rest + list(dummies[: 1 - len(rest)])
                            position[key] = ("cross3", len(cross3))
                            cross3.append((cc, dd, padded[0]))
                            cross3_factor.append(2.0 ** (1 - len(rest)))
                            cross3_scale.append(key)
                        else:
                            rest = [v for v in S if v != cc]
                            padded = rest + list(dummies[: 2 - len(rest)])
                            position[key] = ("square3", len(square3))
                            square3.append((cc, padded[0], padded[1]))
                            square3_factor.append(2.0 ** (2 - len(rest)))
                            square3_scale.append(key)
    # Flat positions in the concatenated results, now that the group sizes are known.
    n_cross, n_square = len(cross3), len(square3)
    index = np.zeros((K, K, P, P), np.int64)
    for k in range(K):
        for l in range(K):
            for c in range(P):
                for d in range(P):
                    key = (min(k, l), max(k, l), min(c, d), max(c, d))
                    kind, i = position[key]
                    index[k, l, c, d] = {"cross3": 0, "square3": n_cross, "four": n_cross + n_square}[kind] + i

    def array(rows: list, width: int, dtype=np.int64) -> np.ndarray:
        return np.asarray(rows, dtype).reshape(-1, width)

    return _Tables(
        array(cross3, 3), np.asarray(cross3_factor), array(cross3_scale, 4),
        array(square3, 3), np.asarray(square3_factor), array(square3_scale, 4),
        array(four, 4), index,
    )


# --------------------------------------------------------------------------- the moments


def _three_variable_cross(R: Array, cdq: np.ndarray) -> Array:
    """E[y_c y_d theta_c theta_d theta_q], c != d (module docstring)."""
    c, d, q = cdq.T
    r_cd, r_cq, r_dq = _select(R, (c, d), (c, q), (d, q))
    p3 = 0.125 + _INV_4PI * (_asin(r_cd) + _asin(r_cq) + _asin(r_dq))
    return r_cd * p3 + _INV_4PI * (
        _sqrt_one_minus_square(r_cd) + r_cq * _sqrt_one_minus_square(r_dq) + r_dq * _sqrt_one_minus_square(r_cq)
    )


def _three_variable_square(R: Array, cbq: np.ndarray) -> Array:
    """E[y_c^2 theta_c theta_b theta_q] (module docstring)."""
    c, b, q = cbq.T
    r_cb, r_cq, r_bq = _select(R, (c, b), (c, q), (b, q))
    p3 = 0.125 + _INV_4PI * (_asin(r_cb) + _asin(r_cq) + _asin(r_bq))
    numerator = 2.0 * r_cb * r_cq - r_bq * (r_cb**2 + r_cq**2)
    return p3 + _INV_4PI * (
        r_cb * _sqrt_one_minus_square(r_cb)
        + r_cq * _sqrt_one_minus_square(r_cq)
        + _safe_divide(numerator, _sqrt_one_minus_square(r_bq))
    )


@cache
def _path_rule(nodes: int) -> tuple[np.ndarray, np.ndarray]:
    """t = 1 - w^2 and the weights 2 w dw of Gauss-Legendre on w in [0, 1]."""
    x, w = np.polynomial.legendre.leggauss(nodes)
    w_nodes = 0.5 * (x + 1.0)
    return 1.0 - w_nodes**2, w * w_nodes  # 0.5 * weight * 2 w


# The six pairs (i, j) of four variables 0..3 (k, l, c, d) and their complementary pairs (a, b).
_PAIRS = np.array([(0, 1), (0, 2), (0, 3), (1, 2), (1, 3), (2, 3)])
_COMPLEMENTS = np.array([[v for v in range(4) if v not in pair] for pair in _PAIRS])
_PAIR_INDEX = {(int(i), int(j)): n for n, (i, j) in enumerate(_PAIRS)} | {
    (int(j), int(i)): n for n, (i, j) in enumerate(_PAIRS)
}
# The trivariate first moments of the (k, c), (k, d), (l, c), (l, d) terms: (target, given, coefficient
# pair); the coefficient of E[y_target theta | y_given = 0] is R_{given, the other of c and d}.
_MOMENTS = np.array([(3, 0, 2), (2, 0, 3), (3, 1, 2), (2, 1, 3)])


def _pick(values: Array, pairs: np.ndarray) -> Array:
    """values[:, pairs, :] for values [n, 6, m] and static pair indices, as one dot (see _select)."""
    onehot = np.zeros((6, pairs.size))
    onehot[pairs.ravel(), np.arange(pairs.size)] = 1.0
    return jnp.einsum("npm,pq->nqm", values, jnp.asarray(onehot, values.dtype))


def _four_variable(R: Array, klcd: np.ndarray, nodes: int) -> Array:
    """E[y_c y_d theta_k theta_l theta_c theta_d] for distinct (k, l, c, d), by the Price path.

    Positions 0, 1, 2, 3 stand for k, l, c, d; arrays are [tuples, pairs, path nodes]. The
    covariance of the pair (a, b) given (i, j) at R(t) is the 2 x 2 Schur complement, written
    out elementwise (a batched matrix inverse costs a library call per matrix on CPU), times
    1 - rho_ij^2 (a common factor of the partial correlation's numerator and denominator).
    """
    t, weights = (jnp.asarray(a, R.dtype) for a in _path_rule(nodes))

    def roles(first: np.ndarray, second: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """The indices into R between the roles ``first`` and ``second`` (static arrays of positions)."""
        return tuple(klcd[:, role.ravel()].reshape((-1,) + role.shape) for role in (first, second))

    i, j = _PAIRS.T
    a, b = _COMPLEMENTS.T
    # (k, c), (k, d), (l, c), (l, d): phi0 E[y_target theta | y_given = 0], Stein once more (below)
    target, given, partner = _MOMENTS.T
    others = np.array([[v for v in range(4) if v not in (tg, gv)] for tg, gv in zip(target, given, strict=True)])
    # every entry of R the average needs, in one selection: [n, ...] each
    (
        ends_ij, r_ai, r_aj, r_bi, r_bj, r_ab, r_tg, r_to0, r_go0, r_to1, r_go1, coefficients, r_cd
    ) = _select(R, *(roles(x, y) for x, y in (
        (i, j), (a, i), (a, j), (b, i), (b, j), (a, b), (target, given),
        (target, others[:, 0]), (given, others[:, 0]), (target, others[:, 1]), (given, others[:, 1]),
        (given, partner), (np.array(2), np.array(3)),
    )))
    at = lambda x: x[..., None] * t  # noqa: E731 - R(t) = I + t (R - I) off the diagonal
    r_ij, r_ai, r_aj, r_bi, r_bj, r_ab = (at(x) for x in (ends_ij, r_ai, r_aj, r_bi, r_bj, r_ab))
    one_minus = 1.0 - r_ij**2
    n_ab = r_ab * one_minus - (r_ai * r_bi + r_aj * r_bj) + r_ij * (r_ai * r_bj + r_aj * r_bi)
    n_aa = one_minus - (r_ai**2 + r_aj**2) + 2.0 * r_ij * r_ai * r_aj
    n_bb = one_minus - (r_bi**2 + r_bj**2) + 2.0 * r_ij * r_bi * r_bj
    root = jnp.sqrt(jnp.clip(n_aa * n_bb, 0.0, None))
    partial = _safe_divide(n_ab, root)  # r_{ab|ij}
    orthant = _orthant2(partial)  # P(y_a > 0, y_b > 0 | y_i = y_j = 0)
    density = _INV_2PI / jnp.sqrt(one_minus)  # of (y_i, y_j) at 0
    ends_ij = ends_ij[..., None]
    orthant_rate = jnp.sum(ends_ij * density * orthant, axis=1)  # dP_4/dt

    # (k, l): the conditional arc-cosine kernel of (c, d) given (k, l); pair 0 is (k, l).
    pair_kl = _PAIR_INDEX[(0, 1)]
    integrand = (
        ends_ij[:, pair_kl] * density[:, pair_kl] * root[:, pair_kl] / one_minus[:, pair_kl]
        * _arc_cosine1(partial[:, pair_kl])
    )
    # (k, c), (k, d), (l, c), (l, d)
    own_pair = [_PAIR_INDEX[(g, t_)] for t_, g in zip(target, given, strict=True)]
    other_pairs = [[_PAIR_INDEX[(g, o)] for g, o in zip(given, others[:, column], strict=True)] for column in (0, 1)]
    picked = _pick(orthant, np.array(own_pair + other_pairs[0] + other_pairs[1]))
    orthant_own, orthant_other0, orthant_other1 = jnp.split(picked, 3, axis=1)
    r_tg = at(r_tg)
    moment = _sqrt_one_minus_square(r_tg) * orthant_own
    for r_to, r_go, orthant_other in ((r_to0, r_go0, orthant_other0), (r_to1, r_go1, orthant_other1)):
        r_to, r_go = at(r_to), at(r_go)
        moment = moment + (r_to - r_tg * r_go) / _sqrt_one_minus_square(r_go) * orthant_other
    integrand = integrand + _PHI0**2 * jnp.sum(coefficients[..., None] * moment, axis=1)
    # (c, d): int_0^1 P_4(R(t)) dt = 1/16 + int_0^1 (1 - t) dP_4/dt dt.
    integrand = integrand + r_cd[:, None] * (1.0 - t) * orthant_rate
    return 1.0 / (8.0 * math.pi) + r_cd / 16.0 + jnp.sum(weights * integrand, axis=-1)


# --------------------------------------------------------------------------- public


def relu_averages(cov: Array, K: int, outputs: tuple[str, ...], path_nodes: int = PATH_NODES) -> dict[str, Array]:
    """The requested averages among I2, I3, I4, J0 at one covariance [P, P] (module docstring)."""
    P = cov.shape[0]
    dtype = cov.dtype
    variance = jnp.clip(jnp.diagonal(cov), 0.0, None)
    s = jnp.sqrt(variance)
    positive = variance > 0
    safe_s = jnp.where(positive, s, 1.0)
    R = jnp.clip(cov / (safe_s[:, None] * safe_s[None, :]), -1.0, 1.0)
    R = jnp.where(positive[:, None] & positive[None, :], R, 0.0)
    R = jnp.where(np.eye(P, dtype=bool), 1.0, R)
    mask = positive.astype(dtype)
    out: dict[str, Array] = {}
    if "I2" in outputs:
        out["I2"] = s[:, None] * s[None, :] * _arc_cosine1(R)
    if "J0" in outputs:
        out["J0"] = _orthant2(R[:K, :K]) * mask[:K, None] * mask[None, :K]
    if "I3" in outputs:
        r_kc = R[:K, None, :]  # [k, 1, c]
        r_bk = R[:K, :, None]  # [k, b, 1]: R_kb = R_bk
        r_bc = R[None, :, :]  # [1, b, c]
        inner = r_bk * _sqrt_one_minus_square(r_kc) * _INV_2PI + r_bc * _orthant2(r_kc)
        out["I3"] = s[None, :, None] * s[None, None, :] * inner * mask[:K, None, None]
    if "I4" in outputs:
        tables = _tables(K, P)
        augmented = jnp.pad(R, ((0, 2), (0, 2))) + jnp.diag(jnp.asarray([0.0] * P + [1.0, 1.0], dtype))
        values, scales = [], []
        for rows, factor, keys, fn in (
            (tables.cross3, tables.cross3_factor, tables.cross3_scale, _three_variable_cross),
            (tables.square3, tables.square3_factor, tables.square3_scale, _three_variable_square),
        ):
            if len(rows):
                scales.append(keys)
                values.append(factor * fn(augmented, rows))
        if len(tables.four):
            scales.append(tables.four)
            values.append(_four_variable(R, tables.four, path_nodes))
        k, l, c, d = np.concatenate(scales).T
        # s_c s_d, and 0 if a truncated variable has zero variance (module docstring).
        scales_and_masks = jnp.stack([jnp.outer(s, s), jnp.outer(mask, mask)])
        scale, truncated = _select(scales_and_masks, (np.zeros_like(c), c, d), (np.ones_like(k), k, l))
        value = jnp.concatenate(values) * scale * truncated
        expand = np.zeros((tables.index.size, value.shape[0]))
        expand[np.arange(tables.index.size), tables.index.ravel()] = 1.0
        out["I4"] = (jnp.asarray(expand, dtype) @ value).reshape(tables.index.shape)
    return out

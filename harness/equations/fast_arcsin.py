"""arcsin as a polynomial, because XLA's arcsin on CPU costs ~20 multiply-adds.

The Gaussian averages evaluate arcsin tens of thousands of times per step of the theory's
ODE (harness/equations/erf_expansions.py, harness/equations/relu_averages.py), and XLA's CPU arcsin (about
33 ns per element, measured; atan2 of the same argument 35 ns, sqrt 1.7 ns) dominated
their cost. Here, for |x| <= 1/2,

    arcsin(x) = x + x^3 p(x^2),   p(t) = (arcsin(sqrt t) - sqrt t) / t^(3/2),

with p a degree-11 polynomial in t on [0, 1/4] (a Chebyshev least-squares fit of p computed
in 40-digit arithmetic with mpmath, converted to monomials; the Taylor coefficients
1/6, 3/40, 15/336, ... are its first entries). For 1/2 < |x| <= 1 the half-angle identity
arcsin(x) = pi/2 - 2 arcsin(sqrt((1 - x) / 2)) (common practice, no source) brings the
argument back to [0, 1/2]. Worst absolute error on [-1, 1] against mpmath: 2.2e-16
(tests/test_fast_arcsin.py checks 1e-15 against numpy).
"""

from __future__ import annotations

import math

import jax
import jax.numpy as jnp

Array = jax.Array

_P = (
    0.16666666666666663, 0.0750000000001781, 0.044642857105710254, 0.03038194728920473,
    0.022372048998238716, 0.0173552475588635, 0.013929693136067529, 0.011875756441358633,
    0.007799653111741951, 0.016050063607294236, -0.01077988258489197, 0.028195364999339084,
)


def arcsin(x: Array) -> Array:
    """arcsin of x clipped to [-1, 1] (rounding can leave it), elementwise, to ~2e-16."""
    a = jnp.clip(jnp.abs(x), 0.0, 1.0)
    large = a > 0.5
    z = jnp.where(large, jnp.sqrt(0.5 * (1.0 - a)), a)
    t = z * z
    p = jnp.full_like(t, _P[-1])
    for coefficient in _P[-2::-1]:
        p = p * t + coefficient
    r = z + z * t * p
    return jnp.sign(x) * jnp.where(large, 0.5 * math.pi - 2.0 * r, r)

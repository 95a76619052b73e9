"""Element-wise activation functions shared by teachers, students and feature maps.

Every activation is a pair (g, g') of JAX functions acting element-wise. The
derivative is written out rather than taken with ``jax.grad`` so that it is also
defined at kinks (relu at 0: 0, sign at 0: 0 in the distributional sense we never
need) and is cheap inside quadrature loops.

Conventions (docs/equations.md, section 1): ``erf`` means g(x) = erf(x / sqrt(2)), so that
g'(x) = sqrt(2 / pi) exp(-x^2 / 2).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from typing import NamedTuple

import jax.numpy as jnp
from jax.scipy.special import erf as _erf

Array = jnp.ndarray


class Activation(NamedTuple):
    """An element-wise nonlinearity and its derivative."""

    name: str
    fn: Callable[[Array], Array]
    derivative: Callable[[Array], Array]


_SQRT2 = math.sqrt(2.0)
_SQRT_2_OVER_PI = math.sqrt(2.0 / math.pi)


def _erf_scaled(x: Array) -> Array:
    return _erf(x / _SQRT2)


def _erf_scaled_derivative(x: Array) -> Array:
    return _SQRT_2_OVER_PI * jnp.exp(-0.5 * x * x)


def _sigmoid(x: Array) -> Array:
    return 0.5 * (1.0 + jnp.tanh(0.5 * x))


def _sigmoid_derivative(x: Array) -> Array:
    s = _sigmoid(x)
    return s * (1.0 - s)


ACTIVATIONS: dict[str, Activation] = {
    "erf": Activation("erf", _erf_scaled, _erf_scaled_derivative),
    "linear": Activation("linear", lambda x: x, jnp.ones_like),
    "relu": Activation(
        "relu", lambda x: jnp.maximum(x, 0.0), lambda x: (x > 0).astype(x.dtype)
    ),
    "tanh": Activation("tanh", jnp.tanh, lambda x: 1.0 - jnp.tanh(x) ** 2),
    "sigmoid": Activation("sigmoid", _sigmoid, _sigmoid_derivative),
    # sign is offered as a feature map of latent data models; as a network
    # activation its derivative vanishes almost everywhere and SGD cannot train it.
    "sign": Activation("sign", jnp.sign, jnp.zeros_like),
}

NETWORK_ACTIVATIONS: tuple[str, ...] = ("erf", "linear", "relu", "tanh", "sigmoid")
"""Activations allowed for teacher and student hidden units."""


def get_activation(name: str) -> Activation:
    """Look an activation up by name; raises ``KeyError`` naming the allowed ones."""
    try:
        return ACTIVATIONS[name]
    except KeyError:
        allowed = ", ".join(sorted(ACTIVATIONS))
        raise KeyError(f"unknown activation {name!r}; allowed: {allowed}") from None

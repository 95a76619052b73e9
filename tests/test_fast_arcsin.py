"""The polynomial arcsin (harness/equations/fast_arcsin.py) against numpy's."""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np

from harness.equations.fast_arcsin import arcsin

jax.config.update("jax_enable_x64", True)


def test_polynomial_arcsin_matches_numpy_on_the_whole_interval():
    # numpy.arcsin (libm) as the reference; the half-angle switch at 1/2 and both ends included.
    x = np.concatenate([np.linspace(-1.0, 1.0, 400001), [0.5, -0.5, np.nextafter(0.5, 1), 1e-300, -1e-300]])
    assert float(jnp.max(jnp.abs(arcsin(jnp.asarray(x)) - np.arcsin(x)))) < 1e-15


def test_arguments_rounded_past_one_are_clipped():
    assert float(arcsin(jnp.asarray(1.0 + 1e-15))) == float(np.pi / 2)
    assert float(arcsin(jnp.asarray(-1.0 - 1e-15))) == float(-np.pi / 2)

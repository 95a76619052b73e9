"""harness.core.threefry draws the very bits of jax.random (threefry2x32, partitionable mode).

The reference is JAX itself (jax.random.normal / uniform / fold_in / split): if a JAX upgrade
changes its stream, these tests fail instead of the harness's results changing silently.
"""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import harness  # noqa: F401  (enables float64 as the package does)
from harness.core import threefry


def _same_bits(a, b) -> None:
    a, b = np.atleast_1d(np.asarray(a)), np.atleast_1d(np.asarray(b))
    assert a.dtype == b.dtype and a.shape == b.shape
    np.testing.assert_array_equal(a.view(np.uint8), b.view(np.uint8))


@pytest.mark.parametrize("dtype", [jnp.float32, jnp.float64])
@pytest.mark.parametrize("shape", [(), (7,), (2, 3, 50)])
def test_normal_and_uniform_are_bit_identical_to_jax_random(dtype, shape):
    key = jax.random.PRNGKey(11)
    _same_bits(threefry.normal(key, shape, dtype), jax.random.normal(key, shape, dtype))
    _same_bits(
        jax.jit(lambda k: threefry.normal(k, shape, dtype))(key),
        jax.jit(lambda k: jax.random.normal(k, shape, dtype))(key),
    )
    _same_bits(threefry.uniform(key, shape, dtype, -2.0, 3.0), jax.random.uniform(key, shape, dtype, -2.0, 3.0))


def test_leading_key_axes_draw_for_many_keys_at_once():
    keys = jax.random.split(jax.random.PRNGKey(5), 6).reshape(2, 3, 2)
    expected = jax.vmap(jax.vmap(lambda k: jax.random.normal(k, (4, 9), jnp.float32)))(keys)
    _same_bits(threefry.normal(keys, (4, 9), jnp.float32), expected)


@pytest.mark.parametrize("data", [0, 12345, 2**32 - 1])
def test_fold_in_and_split_are_bit_identical_to_jax_random(data):
    key = jax.random.PRNGKey(2)
    _same_bits(threefry.fold_in(key, jnp.uint32(data)), jax.random.fold_in(key, data))
    first, second = threefry.split_pair(key)
    reference = jax.random.split(key)
    _same_bits(first, reference[0])
    _same_bits(second, reference[1])


def test_typed_keys_are_accepted():
    key = jax.random.key(4)
    _same_bits(threefry.normal(key, (6,), jnp.float32), jax.random.normal(key, (6,), jnp.float32))

"""Gaussian draws bit-identical to ``jax.random`` (threefry keys), fused into one loop on CPU.

Why this module exists. The simulator's speed is bound by drawing its inputs: N Gaussian
numbers per SGD step and seed against O(K N) arithmetic for the update. On CPU, JAX lowers
its Threefry-2x32 hash as a rolled 5-iteration loop over whole arrays (to keep compile
times short), which XLA cannot fuse with the bits-to-float transform; every round trips
through memory. Written out here as plain element-wise ``lax`` operations, the hash,
the mantissa trick and the inverse error function compile into a single vectorised
loop that draws several times faster. The numbers are *the same bits* as
``jax.random.normal`` / ``fold_in`` / ``split`` with the default ``threefry2x32``
implementation and ``jax_threefry_partitionable`` (the default since JAX 0.5), and they
compile several times faster too (JAX's rolled loops are slow to compile on CPU):
tests/test_threefry.py compares them bit for bit, so a JAX upgrade that changes the
stream fails a test instead of silently changing results.

Algorithm: Threefry-2x32 with 20 rounds, Salmon, Moraes, Dror & Shaw, "Parallel random
numbers: as easy as 1, 2, 3", SC'11 (rotation constants and key schedule from there,
as in JAX). Keys are raw ``uint32[..., 2]`` arrays (``jax.random.PRNGKey`` style); leading
axes of a key broadcast against the drawn shape's counters, so one call draws for many
keys (seeds) at once.
"""

from __future__ import annotations

import math
from functools import partial
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np
from jax import lax

Array = jax.Array

_ROTATIONS = ((13, 15, 26, 6), (17, 29, 16, 24))
_PARITY = np.uint32(0x1BD11BDA)  # the key-schedule constant of Threefry (SC'11)


def _rotate_left(x: Array, r: int) -> Array:
    return lax.shift_left(x, np.uint32(r)) | lax.shift_right_logical(x, np.uint32(32 - r))


def hash_pair(k1: Array, k2: Array, x1: Array, x2: Array) -> tuple[Array, Array]:
    """Threefry-2x32 (20 rounds) of the counter pair (x1, x2) under the key (k1, k2); all uint32, broadcast."""
    ks = (k1, k2, k1 ^ k2 ^ _PARITY)
    x1 = x1 + ks[0]
    x2 = x2 + ks[1]
    for group in range(5):
        for r in _ROTATIONS[group % 2]:
            x1 = x1 + x2
            x2 = _rotate_left(x2, r) ^ x1
        x1 = x1 + ks[(group + 1) % 3]
        x2 = x2 + ks[(group + 2) % 3] + np.uint32(group + 1)
    return x1, x2


def _key_halves(key: Array) -> tuple[Array, Array]:
    key = jnp.asarray(key)
    if jnp.issubdtype(key.dtype, jax.dtypes.prng_key):
        key = jax.random.key_data(key)
    return key[..., 0], key[..., 1]


# fold_in and split are jit-compiled even when called eagerly (seed keys, instance keys):
# op by op, the 20 rounds are ~100 dispatches per call, ~0.05 s each time (1.3 s of a
# default run before). Integer arithmetic, so compiled and eager give the same bits.
@partial(jax.jit, inline=True)
def fold_in(key: Array, data: Array) -> Array:
    """``jax.random.fold_in(key, data)`` for raw keys ``[..., 2]``; ``data`` taken modulo 2**32, broadcast."""
    k1, k2 = _key_halves(key)
    data = jnp.asarray(data).astype(jnp.uint32)
    o1, o2 = hash_pair(k1, k2, jnp.zeros_like(data), data)
    return jnp.stack([o1, o2], axis=-1)


@partial(jax.jit, static_argnames=("count",), inline=True)
def split(key: Array, count: int) -> Array:
    """``jax.random.split(key, count)`` for raw keys ``[..., 2]``: new keys ``[..., count, 2]``."""
    k1, k2 = _key_halves(key)
    index = lax.iota(np.uint32, count)
    o1, o2 = hash_pair(k1[..., None], k2[..., None], jnp.zeros_like(index), index)
    return jnp.stack([o1, o2], axis=-1)


def split_pair(key: Array) -> tuple[Array, Array]:
    """``jax.random.split(key)`` (two new keys) for raw keys ``[..., 2]``."""
    keys = split(key, 2)
    return keys[..., 0, :], keys[..., 1, :]


def _bits(key: Array, shape: tuple[int, ...], width: int) -> Array:
    """``jax.random.bits``: the flat index of each entry is the 64-bit counter (hi, lo)."""
    size = math.prod(shape)
    if size >= 2**32:
        raise ValueError(f"cannot draw {size} numbers with one key (at most 2**32 - 1)")
    k1, k2 = _key_halves(key)
    lead = k1.shape
    k1 = k1.reshape(lead + (1,) * len(shape))
    k2 = k2.reshape(lead + (1,) * len(shape))
    lo = lax.iota(np.uint32, max(size, 1))[:size].reshape(shape)
    b1, b2 = hash_pair(k1, k2, jnp.zeros_like(lo), lo)
    if width == 32:
        return b1 ^ b2
    return lax.shift_left(b1.astype(jnp.uint64), np.uint64(32)) | b2.astype(jnp.uint64)


@partial(jax.jit, static_argnames=("shape", "dtype"), inline=True)
def uniform(key: Array, shape: tuple[int, ...], dtype: Any, low: float = 0.0, high: float = 1.0) -> Array:
    """``jax.random.uniform(key, shape, dtype, low, high)`` for float32 / float64, leading key axes first.

    Compiled even when called eagerly, like JAX's: XLA contracts ``u * (high - low) + low``
    into one fused multiply-add, which op-by-op execution would round twice.
    """
    dtype = jnp.dtype(dtype)
    info = jnp.finfo(dtype)
    width, mantissa = info.bits, info.nmant
    if width not in (32, 64):
        raise ValueError(f"uniform draws support float32 and float64, not {dtype}")
    uint = jnp.uint32 if width == 32 else jnp.uint64
    bits = _bits(key, shape, width)
    # Random mantissa under the exponent of 1.0 gives [1, 2); shift to [0, 1) (as JAX does).
    one_bits = np.array(1.0, dtype).view(uint)
    float_bits = lax.shift_right_logical(bits, uint(width - mantissa)) | one_bits
    floats = lax.bitcast_convert_type(float_bits, dtype) - jnp.asarray(1.0, dtype)
    low_ = jnp.asarray(low, dtype)
    high_ = jnp.asarray(high, dtype)
    return lax.max(low_, floats * (high_ - low_) + low_)


@partial(jax.jit, static_argnames=("shape", "dtype"), inline=True)
def normal(key: Array, shape: tuple[int, ...], dtype: Any) -> Array:
    """``jax.random.normal(key, shape, dtype)``: sqrt(2) erfinv(u), u uniform on (-1, 1)."""
    dtype = jnp.dtype(dtype)
    low = np.nextafter(np.array(-1.0, dtype), np.array(0.0, dtype), dtype=dtype)
    u = uniform(key, shape, dtype, low, 1.0)
    # The barrier keeps the whole draw in one fused loop whose result is stored once:
    # otherwise XLA may split erf_inv over several loops and recompute the hash in each,
    # or fuse the draw into every consumer (it looks cheap; it is the dominant cost).
    return lax.optimization_barrier(lax.mul(jnp.asarray(np.sqrt(2), dtype), lax.erf_inv(u)))

"""Splitting an ensemble's seeds across the host's CPU devices.

Seeds are independent, so the simulator and the theory's solver give each device its share
of them (harness.core.configure exposes one XLA CPU device per core).
"""

from __future__ import annotations

from typing import Any

import jax
import numpy as np
from jax.sharding import Mesh, NamedSharding, PartitionSpec


def seed_mesh(count: int) -> Mesh | None:
    """The host devices an ensemble of ``count`` seeds is split across (None: one device).

    harness.configure() exposes one XLA CPU device per core; seeds are independent, so
    each device trains its share of them in its own loop, in parallel. The number of
    devices used is the largest that divides the seed count (every shard the same shape)
    and leaves each device at least two seeds: XLA compiles a batch of one seed to other
    instructions (rounding differently), and a seed's results should not depend on how
    many cores the machine has.
    """
    devices = jax.devices()
    used = max((d for d in range(1, len(devices) + 1) if count % d == 0 and count // d >= 2), default=1)
    return None if used <= 1 else Mesh(np.array(devices[:used]), ("seeds",))


def place_on_devices(tree: Any, count: int) -> Any:
    """Put arrays with a leading seed axis of length ``count`` on the seed mesh (no-op for one device)."""
    mesh = seed_mesh(count)
    return tree if mesh is None else jax.device_put(tree, NamedSharding(mesh, PartitionSpec("seeds")))


def split_over_seeds(fn: Any, count: int, replicated: int = 0) -> Any:
    """``fn`` run on each device's share of the seeds (all arguments but the last ``replicated`` are split)."""
    mesh = seed_mesh(count)
    if mesh is None:
        return fn

    def call(*args: Any) -> Any:
        split = len(args) - replicated
        specs = (PartitionSpec("seeds"),) * split + (PartitionSpec(),) * replicated
        # check_vma off: data models may start loops from constants, which are the same on every device.
        return jax.shard_map(fn, mesh=mesh, in_specs=specs, out_specs=PartitionSpec("seeds"), check_vma=False)(*args)

    return call

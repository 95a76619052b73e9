"""harness: online-SGD simulations of two-layer networks held against their order-parameter ODEs."""

import os

import jax

# The theory and every order parameter are computed in float64; simulations choose their
# own dtype explicitly (run.dtype), so enabling 64-bit types here changes no default draw.
jax.config.update("jax_enable_x64", True)


def _host_devices() -> int | None:
    """How many XLA CPU devices to expose; the simulator splits its seeds across them.

    One device per core the process may use, so an ensemble's seeds train in parallel
    (harness.simulation.seed_mesh). ``HARNESS_CPU_DEVICES=n`` chooses n; a process whose
    XLA_FLAGS are set by someone else (e.g. a sweep worker pinned to one thread) keeps
    what those flags say (None: leave JAX's setting alone).
    """
    chosen = os.environ.get("HARNESS_CPU_DEVICES", "")
    if chosen.strip():
        try:
            return max(1, int(chosen))
        except ValueError:
            return 1
    if "XLA_FLAGS" in os.environ:
        return None
    return max(1, len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1))


try:
    if _host_devices() is not None:
        jax.config.update("jax_num_cpu_devices", _host_devices())
except RuntimeError:  # JAX already started its backends (imported and used before harness): keep them
    pass

__version__ = "0.1.0"

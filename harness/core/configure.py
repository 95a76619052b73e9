"""The one place that sets process-wide JAX options: :func:`configure`.

Importing ``harness`` changes nothing in the caller's world. The command line and the Python
API (harness.run, harness.theory, ...) call :func:`configure` before their first JAX
computation; a notebook that calls lower-level functions directly calls it once itself.
It sets, unless told otherwise:

* 64-bit floating point (``jax_enable_x64``): the theory and every order parameter are
  computed in float64; simulations choose their own dtype explicitly (``run.dtype``), so
  this changes no default draw;
* one XLA CPU device per core the process may use (``jax_num_cpu_devices``), so an
  ensemble's seeds train in parallel (harness.core.devices.seed_mesh). This only takes
  effect before JAX has started its backends; when it is too late a one-line warning says so;
* the persistent compilation cache (``jax_compilation_cache_dir``) for every program that
  took 0.1 s or more to compile, so a second run of the same shapes skips most of XLA's
  compilation (tracing and lowering remain, a second or two for a run);
* equinox's run-time checks as NaN instead of host callbacks (``EQX_ON_ERROR=nan``): JAX
  keeps no program with a host callback in its persistent cache, and a failed solve already
  returns NaN here. It must be set before equinox is first imported; a value the user set is
  kept.

Environment: ``HARNESS_CPU_DEVICES=n`` chooses the device count (a process whose XLA_FLAGS
someone else set keeps them), ``HARNESS_COMPILATION_CACHE=DIR`` moves the cache and ``=off``
turns it off.
"""

from __future__ import annotations

import hashlib
import os
import platform
import warnings
from typing import NamedTuple


class Configuration(NamedTuple):
    float64: bool
    devices: int | None  # None: left to JAX (someone else's XLA_FLAGS, or already started)
    compilation_cache: str | None


_DONE: Configuration | None = None


def host_devices() -> int | None:
    """How many XLA CPU devices to expose (see the module docstring); None: leave JAX's setting."""
    chosen = os.environ.get("HARNESS_CPU_DEVICES", "")
    if chosen.strip():
        try:
            return max(1, int(chosen))
        except ValueError:
            return 1
    if "XLA_FLAGS" in os.environ:
        return None
    return max(1, len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1))


def compilation_cache_dir() -> str | None:
    """Where compiled programs are kept between runs (None: nowhere).

    ``HARNESS_COMPILATION_CACHE`` = a folder, or ``off``; by default
    ``$XDG_CACHE_HOME/harness/xla`` (``~/.cache/harness/xla``). Compiled CPU code depends on the
    processor, so each processor model (and JAX version) gets its own subfolder: a home folder
    shared by a cluster's different nodes never hands one node another's code.
    """
    import jax

    chosen = os.environ.get("HARNESS_COMPILATION_CACHE", "").strip()
    if chosen.lower() in ("off", "0", "no", "false"):
        return None
    base = chosen or os.path.join(os.environ.get("XDG_CACHE_HOME") or os.path.expanduser("~/.cache"), "harness", "xla")
    try:
        with open("/proc/cpuinfo") as handle:
            processor = "".join(line for line in handle if line.startswith(("model name", "flags")))[:100_000]
    except OSError:
        processor = platform.processor() + platform.machine()
    tag = hashlib.sha256(f"{processor}|{jax.__version__}".encode()).hexdigest()[:16]
    return os.path.join(base, tag)


def configure(*, float64: bool = True, devices: int | None = None, compilation_cache: bool = True) -> Configuration:
    """Set the process-wide JAX options the tool relies on (module docstring). Idempotent.

    Args:
        float64: enable 64-bit types (the theory needs them).
        devices: XLA CPU devices to expose (default: one per usable core, or HARNESS_CPU_DEVICES).
        compilation_cache: keep compiled programs in the persistent cache.

    Returns:
        What was set.
    """
    global _DONE
    if _DONE is not None:
        return _DONE
    os.environ.setdefault("EQX_ON_ERROR", "nan")
    import jax

    jax.config.update("jax_enable_x64", float64)
    wanted = devices if devices is not None else host_devices()
    if wanted is not None:
        try:
            jax.config.update("jax_num_cpu_devices", wanted)
        except RuntimeError:  # JAX already started its backends: it keeps the devices it has
            have = jax.local_device_count()
            if have != wanted:
                warnings.warn(f"JAX was used before harness.configure(): it keeps {have} CPU device(s), not "
                              f"{wanted}; seeds run on {have}", RuntimeWarning, stacklevel=2)
            wanted = None
    cache = compilation_cache_dir() if compilation_cache else None
    if cache is not None:
        jax.config.update("jax_compilation_cache_dir", cache)
        # Programs that took 0.1 s or more to compile. A run is made of dozens of small ones
        # (drawing keys, weights and test sets) at 0.1-0.3 s each: with 0.5 s (our setting
        # before) a second default run still compiled them, 3.9 s of its start (measured: 1.7 s
        # at 0.1). At 0 every eager array operation was cached too: the start fell to 1.3 s, but
        # the test suite, thousands of tiny programs written and read back, took 10 min
        # instead of 7.7 (two workers, measured twice each).
        jax.config.update("jax_persistent_cache_min_compile_time_secs", 0.1)
    _DONE = Configuration(float64, wanted, cache)
    return _DONE

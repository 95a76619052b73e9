"""harness: online-SGD simulations of two-layer networks held against their order-parameter ODEs."""

import os

import jax

# The theory and every order parameter are computed in float64; simulations choose their
# own dtype explicitly (run.dtype), so enabling 64-bit types here changes no default draw.
jax.config.update("jax_enable_x64", True)

# Equinox (which diffrax uses) turns its run-time checks into host callbacks by default, and
# JAX will not keep a program with a host callback in its persistent compilation cache, so
# every process would compile the theory's solver again (about 1.5 s of a default run). With
# "nan" a failed check returns NaN instead of raising, which is what a failed solve already
# returns here (harness.theory.iid.solve). It must be set before equinox is first imported;
# a value the user set is kept.
os.environ.setdefault("EQX_ON_ERROR", "nan")


def _host_devices() -> int | None:
    """How many XLA CPU devices to expose; the simulator splits its seeds across them.

    One device per core the process may use, so an ensemble's seeds train in parallel
    (harness.sim.simulation.seed_mesh). ``HARNESS_CPU_DEVICES=n`` chooses n; a process whose
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


def _compilation_cache() -> str | None:
    """Where compiled programs are kept between runs (None: nowhere).

    ``HARNESS_COMPILATION_CACHE`` = a folder, or ``off``; by default
    ``$XDG_CACHE_HOME/harness/xla`` (``~/.cache/harness/xla``). A run then compiles its
    simulator once per scenario shape and machine instead of once per process, which is
    what a sweep of many same-shaped points pays most. Compiled CPU code depends on the
    processor, so each processor model (and JAX version) gets its own subfolder: a home
    folder shared by a cluster's different nodes never hands one node another's code.
    """
    chosen = os.environ.get("HARNESS_COMPILATION_CACHE", "").strip()
    if chosen.lower() in ("off", "0", "no", "false"):
        return None
    base = chosen or os.path.join(os.environ.get("XDG_CACHE_HOME") or os.path.expanduser("~/.cache"), "harness", "xla")
    processor = ""
    try:
        with open("/proc/cpuinfo") as handle:
            processor = "".join(line for line in handle if line.startswith(("model name", "flags")))[:100_000]
    except OSError:
        import platform

        processor = platform.processor() + platform.machine()
    import hashlib

    tag = hashlib.sha256(f"{processor}|{jax.__version__}".encode()).hexdigest()[:16]
    return os.path.join(base, tag)


_cache = _compilation_cache()
if _cache is not None:
    jax.config.update("jax_compilation_cache_dir", _cache)
    jax.config.update("jax_persistent_cache_min_compile_time_secs", 0.5)  # skip trivial programs

__version__ = "0.1.0"

"""Online SGD for an ensemble of two-layer students, one seed per ensemble member.

The simulation is a pair of pure functions over explicit state, vmapped over seeds and
jit-compiled once per shape:

* :func:`init_ensemble` draws each seed's fixed *instance* (teacher, data-model
  parameters, held-out test set) and its initial *state* (student weights, optimizer
  state, step counter);
* ``advance`` (:func:`make_advance`) runs SGD until a target step, one fresh sample per step;
* ``observe`` (:func:`make_observe`) measures the test error and the order parameters.

Random numbers. Each seed ``s`` has its own key ``fold_in(PRNGKey(run.seed), s)``, split
into teacher / student / data-model / training-stream / test-set keys (the teacher and
data-model keys come from one run-wide key when ``run.shared_teacher`` is set). The
sample used at SGD step ``i`` is drawn from ``fold_in(training_key, i)`` (steps from 2**32
on fold in their high word too), so the training stream depends neither on how steps are
grouped into blocks nor on the evaluation times nor on the number of devices:
``run.block_steps`` is a pure speed setting, and a run can stop and resume anywhere with
bit-identical results. All draws go through :mod:`harness.core.threefry`, which gives the bits of
``jax.random`` (tested) several times faster on CPU.

Speed. The cost of a step is dominated by drawing its N Gaussian inputs; the update is
O(K N). So the loop is built around the draw (benchmarks/RESULTS.md has the figures):

* blocks of ``block_steps`` steps are drawn at once, seed by seed in a ``lax.map`` so that
  each input is computed once and stored (XLA would otherwise recompute the draw for each
  of its consumers), and the teacher's labels follow as one matrix product per block;
* a ``fori_loop`` applies the block's steps one by one (jax.grad of the per-sample loss,
  through the optax transformation), while the next block is drawn: the two are
  independent, so XLA may overlap them; a block that overshoots the target masks its
  extra steps;
* all seeds are at the same step, so the loop runs on one scalar counter;
* seeds are split across XLA CPU devices (one per core, set up in harness/__init__.py),
  each device running its share of the seeds in its own loop (:func:`seed_mesh`);
* the block size defaults to what keeps a device's block in cache (:func:`default_block_steps`).
"""

from __future__ import annotations

import functools
import math
import os
from collections.abc import Callable
from typing import Any, NamedTuple

import jax
import jax.numpy as jnp
import numpy as np
import optax

from harness.core import threefry
from harness.core.activations import get_activation
from harness.core.devices import place_on_devices, seed_mesh, split_over_seeds
from harness.core.errors import InputError
from harness.core.scenario import Scenario
from harness.data.model import DataModel, build_data_model
from harness.sim.engines import ENGINES, Engine, register_engine
from harness.sim.optimizers import make_optimizer

Array = jax.Array

SHARED_KEY_INDEX = 2**31 - 1
"""fold_in index of the run-wide key used for a shared teacher and data instance."""


class Instance(NamedTuple):
    """What stays fixed for one seed during training (leading axis: seeds)."""

    teacher_w: Array  # [S, M, D]
    teacher_v: Array  # [S, M]
    data_params: Any  # data-model parameters, leading axis S
    train_key: Array  # [S, 2]
    test_x: Array  # [S, P, N]
    test_y: Array  # [S, P] clean teacher labels


class State(NamedTuple):
    """What SGD changes (leading axis: seeds)."""

    params: dict[str, Array]  # {"w": [S, K, N], "v": [S, K]}
    opt_state: Any
    step: Array  # [S] int32 or int64: the number of SGD steps taken


class Observation(NamedTuple):
    """Measurements of every seed at one time (float64)."""

    test_error: Array  # [S]
    Q: Array  # [S, K, K]
    R: Array  # [S, K, M]
    T: Array  # [S, M, M]
    v: Array  # [S, K]
    finite: Array  # [S] bool: every weight is finite


class Simulator(NamedTuple):
    """The compiled pieces of one scenario's simulation."""

    model: DataModel
    optimizer: optax.GradientTransformation
    block_steps: int
    dtype: Any
    scenario: Scenario


def dtype_of(scenario: Scenario) -> Any:
    return jnp.float64 if scenario.run.dtype == "float64" else jnp.float32


def default_block_steps(scenario: Scenario) -> int:
    """Steps per drawn block when ``run.block_steps`` is 0 (measured: benchmarks/RESULTS.md).

    i.i.d. inputs: a block of one device's inputs (its seeds x block x N numbers) is kept
    near 256 KiB, so that it is drawn and read back while still in the core's cache; for
    N = 500, 16 seeds, blocks of 8-32 steps ran up to 20% faster than blocks of 128-256.
    Other data models compute their inputs with a product of the latent draws and the
    instance's matrices (x = f(F^T c / sqrt(D)) for latent models): long blocks make that a
    matrix-matrix product instead of re-reading F every few steps (N = 1000, D = 500:
    block 128 ran twice as fast as block 8), so their blocks are kept near 4 MiB. Large
    inputs get blocks down to a single step, whose draw alone dwarfs the loop's overhead.
    """
    chosen = scenario.run.block_steps
    if chosen > 0:
        return chosen
    seeds = scenario.run.seeds
    mesh = seed_mesh(seeds)
    per_device = seeds // (1 if mesh is None else mesh.size)
    itemsize = 8 if scenario.run.dtype == "float64" else 4
    data = scenario.data
    floats = per_device * max(data["input_dim"], data.get("latent_dim", 0) or 0) * itemsize
    target = (1 << 18) if data["kind"] == "gaussian" else (1 << 22)
    return int(np.clip(2 ** round(math.log2(max(1.0, target / floats))), 1, 256))


def make_simulator(scenario: Scenario) -> Simulator:
    dtype = dtype_of(scenario)
    return Simulator(
        model=build_data_model(scenario, dtype),
        optimizer=make_optimizer(scenario),
        block_steps=default_block_steps(scenario),
        dtype=dtype,
        scenario=scenario,
    )


# ------------------------------------------------------------------------- networks


def student_output(scenario: Scenario, params: dict[str, Array], x: Array) -> Array:
    """f(x) = sum_k v_k g(w_k . x / sqrt(N)) for a batch x of shape [..., N]."""
    g = get_activation(scenario.student.activation).fn
    lam = x @ params["w"].T / math.sqrt(x.shape[-1])
    return g(lam) @ params["v"]


def teacher_output(scenario: Scenario, w: Array, v: Array, c: Array) -> Array:
    """Clean teacher label sum_m vt_m g~(wt_m . c / sqrt(D)) for a batch c of shape [..., D]."""
    g = get_activation(scenario.teacher.activation).fn
    nu = c @ w.T / math.sqrt(c.shape[-1])
    return g(nu) @ v


def clean_labels(sim: Simulator, w: Array, v: Array, c: Array) -> Array:
    """Noise-free labels of a batch: the teacher's output on c, or c itself when the data model gives labels."""
    if sim.model.labels_given:
        return c[..., 0]
    return teacher_output(sim.scenario, w, v, c)


def sample_loss(scenario: Scenario, params: dict[str, Array], x: Array, y: Array) -> Array:
    """The per-sample loss 1/2 (f(x) - y)^2 (docs/equations.md, section 1)."""
    return 0.5 * (student_output(scenario, params, x) - y) ** 2


# ------------------------------------------------------------------------ init/draws


def seed_keys(scenario: Scenario, seed_indices: np.ndarray) -> Array:
    """Each seed's key, ``fold_in(PRNGKey(run.seed), seed)``: ``[S, 2]``."""
    base = jax.random.PRNGKey(scenario.run.seed)
    return threefry.fold_in(base, jnp.asarray(seed_indices, jnp.uint32))


def split_seed_key(scenario: Scenario, key: Array) -> dict[str, Array]:
    """A seed's key split into its teacher / student / data / train / test keys (shared teacher: run-wide)."""
    names = ("teacher", "student", "data", "train", "test")
    split = threefry.split(key, len(names))
    keys = {name: split[..., i, :] for i, name in enumerate(names)}
    if scenario.run.shared_teacher:
        shared = threefry.fold_in(jax.random.PRNGKey(scenario.run.seed), jnp.uint32(SHARED_KEY_INDEX))
        keys["teacher"], keys["data"] = threefry.split_pair(shared)
    return keys


SCENARIO_ONLY_KINDS: tuple[str, ...] = ("gaussian", "latent", "deep_latent")
"""Data kinds whose model is made from the scenario alone (no file or generator store read)."""


def _draw_program(sim: Simulator) -> Callable[..., Any]:
    """The seed-vmapped, jitted draw of every seed's teacher, student and data instance."""
    s = sim.scenario
    k, m = s.student.hidden, s.teacher.hidden
    n, d = sim.model.input_dim, sim.model.teacher_dim

    def one(key: Array, teacher_std: Array, student_std: Array) -> tuple[Array, ...]:
        keys = split_seed_key(s, key)
        teacher_w = teacher_std * threefry.normal(keys["teacher"], (m, d), sim.dtype)
        student_w = student_std * threefry.normal(keys["student"], (k, n), sim.dtype)
        data_params = sim.model.init(keys["data"])
        return teacher_w, student_w, data_params

    return jax.jit(jax.vmap(one, in_axes=(0, None, None)))


@functools.lru_cache(maxsize=16)
def _shared_draw_program(scenario: Scenario) -> Callable[..., Any]:
    return _draw_program(make_simulator(scenario))


def draw_initial_weights(sim: Simulator, seed_indices: np.ndarray) -> tuple[Array, Array, Array, Array, Any]:
    """Teacher and initial student weights for the given seeds, without any test set.

    Returns ``(teacher_w, teacher_v, student_w, student_v, data_params)`` with a leading
    seed axis; this is all the theory needs to start from the same initial conditions.

    A run draws them more than once (for the theory's start and for the simulation); the
    compiled draw is kept per scenario when the data model depends on the scenario alone.
    A latent model's draw holds a host callback (its moments), which the persistent
    compilation cache does not keep: without this, each draw of a latent run recompiled it
    (5-6 s at N = 300).
    """
    s = sim.scenario
    draw = _shared_draw_program(s) if s.data.kind in SCENARIO_ONLY_KINDS else _draw_program(sim)
    # The widths enter as run-time values: as compile-time constants XLA would fold them
    # into the draw's own sqrt(2) factor, rounding differently from std * N(0, 1).
    stds = [jnp.asarray(s[role]["init_std"], sim.dtype) for role in ("teacher", "student")]
    teacher_w, student_w, data_params = draw(seed_keys(s, seed_indices), *stds)
    count = len(seed_indices)
    teacher_v = jnp.tile(jnp.asarray(s.teacher.second_layer, sim.dtype), (count, 1))
    student_v = jnp.tile(jnp.asarray(s.student.second_layer, sim.dtype), (count, 1))
    return teacher_w, teacher_v, student_w, student_v, data_params


def available_memory_bytes() -> int | None:
    """Memory the machine can give this process now (Linux MemAvailable), or None if unknown."""
    try:
        with open("/proc/meminfo") as handle:
            for line in handle:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        pass
    try:
        return os.sysconf("SC_AVPHYS_PAGES") * os.sysconf("SC_PAGE_SIZE")
    except (ValueError, OSError, AttributeError):
        return None


def check_test_set_fits(sim: Simulator, seeds: int) -> None:
    """Refuse, before drawing anything, a held-out set larger than the machine's free memory.

    Every seed keeps ``run.test_samples`` inputs of dimension N in memory for the whole run
    (16 seeds x 10,000 samples x N = 100,000 in float32 is 64 GB); failing half-way through
    the draw would take the machine down with it instead of saying what to change.
    """
    s = sim.scenario
    needed = seeds * s.run.test_samples * s.data.input_dim * jnp.dtype(sim.dtype).itemsize
    available = available_memory_bytes()
    chain = ENGINES.get("chain")
    chain_would_do = chain is not None and chain.why_not(s) is None
    if available is not None and needed > 0.8 * available:
        raise InputError(
            f"scenario key 'run.test_samples': the held-out sets need {needed / 2**30:.1f} GiB "
            f"(seeds x test_samples x input_dim x {jnp.dtype(sim.dtype).itemsize} bytes) and this machine has "
            f"{available / 2**30:.1f} GiB free; lower run.test_samples or run.seeds"
            + (', or use run.engine = "chain"' if chain_would_do else "")
        )


def init_ensemble(sim: Simulator, seed_indices: np.ndarray | None = None) -> tuple[Instance, State]:
    """Draw every seed's instance (teacher, data model, test set) and initial state."""
    s = sim.scenario
    if seed_indices is None:
        seed_indices = np.arange(s.run.seeds)
    check_test_set_fits(sim, len(seed_indices))
    teacher_w, teacher_v, student_w, student_v, data_params = draw_initial_weights(sim, seed_indices)
    test_samples = s.run.test_samples

    def test_set(key: Array, tw: Array, tv: Array, params: Any) -> tuple[Array, Array]:
        x, c = sim.model.sample(params, split_seed_key(s, key)["test"], test_samples)
        return x, clean_labels(sim, tw, tv, c)

    keys = seed_keys(s, seed_indices)
    test_x, test_y = jax.jit(jax.vmap(test_set))(keys, teacher_w, teacher_v, data_params)
    train_key = jax.vmap(lambda key: split_seed_key(s, key)["train"])(keys)
    params = {"w": student_w, "v": student_v}
    opt_state = jax.vmap(sim.optimizer.init)(params)
    step = jnp.zeros(len(seed_indices), dtype=jnp.int64)
    instance = Instance(teacher_w, teacher_v, data_params, train_key, test_x, test_y)
    return place_on_devices((instance, State(params, opt_state, step)), len(seed_indices))


def step_keys(train_key: Array, steps: Array) -> Array:
    """The key of each absolute SGD step: ``fold_in(train_key, step)``.

    ``fold_in`` takes 32-bit data; steps from 2**32 on fold in their high word too, so
    the stream never repeats (earlier steps keep the plain ``fold_in`` key).
    """
    steps = jnp.asarray(steps, jnp.int64)
    low = threefry.fold_in(train_key, steps & 0xFFFFFFFF)
    high = (steps >> 32).astype(jnp.uint32)
    return jnp.where((high > 0)[..., None], threefry.fold_in(low, high), low)


def draw_block(sim: Simulator, instance: Instance, steps: Array) -> tuple[Array, Array]:
    """The training samples of every seed at the given absolute steps: x ``[S, B, N]``, noisy y ``[S, B]``.

    Step ``i`` of a seed uses the key ``fold_in(train_key, i)`` split into a sample key and
    a label-noise key. The inputs are drawn seed by seed in a ``lax.map`` whose body
    returns nothing else: the loop boundary makes XLA store each draw once. Were the draw
    fused into its consumers (the student's update and the teacher's labels), XLA would
    recompute the random numbers, the dominant cost, for each of them.
    """
    s = sim.scenario

    def inputs_of_seed(args: tuple[Array, Any]) -> tuple[Array, Array | None]:
        train_key, data_params = args
        sample_keys, _ = threefry.split_pair(step_keys(train_key, steps))
        x, c = jax.vmap(lambda key: sim.model.sample(data_params, key, 1))(sample_keys)
        return x[:, 0], (None if c is x else c[:, 0])  # i.i.d. inputs: the teacher reads x itself

    x, c = jax.lax.map(inputs_of_seed, (instance.train_key, instance.data_params))
    c = x if c is None else c
    _, noise_keys = threefry.split_pair(jax.vmap(lambda key: step_keys(key, steps))(instance.train_key))
    noise = threefry.normal(noise_keys, (), sim.dtype)
    clean = jax.vmap(lambda w, v, cs: clean_labels(sim, w, v, cs))(instance.teacher_w, instance.teacher_v, c)
    return x, clean + s.teacher.noise_std * noise


def draw_steps(sim: Simulator, instance_one: Instance, steps: Array) -> tuple[Array, Array]:
    """The training samples (x, noisy label) of one seed at the given absolute steps.

    Shapes ``[len(steps), N]`` and ``[len(steps)]``. This is the training stream itself
    (:func:`draw_block` for one seed), exposed so that tests can replay it through an
    independent implementation.
    """
    one = jax.tree_util.tree_map(lambda leaf: jnp.asarray(leaf)[None], instance_one)
    x, y = draw_block(sim, one, jnp.asarray(steps))
    return x[0], y[0]


# --------------------------------------------------------------------------- dynamics


def _sgd_step(sim: Simulator):
    """One seed's SGD step on one sample: jax.grad of the per-sample loss through the optimizer."""
    s = sim.scenario
    grad_fn = jax.grad(lambda p, x, y: sample_loss(s, p, x, y))

    def step(params: Any, opt_state: Any, x: Array, y: Array, active: Array) -> tuple[Any, Any]:
        grads = grad_fn(params, x, y)
        updates, new_opt_state = sim.optimizer.update(grads, opt_state, params)
        new_params = optax.apply_updates(params, updates)
        keep = lambda new, old: jnp.where(active, new, old)  # noqa: E731
        return jax.tree_util.tree_map(keep, new_params, params), jax.tree_util.tree_map(keep, new_opt_state, opt_state)

    return step


def make_advance(sim: Simulator):
    """``advance(instance, state, target) -> state`` for all seeds, jit-compiled once.

    Every seed is at the same step (they advance in lockstep), so the loop runs on one
    scalar step counter and only the per-step arithmetic is vmapped over seeds. Blocks
    of ``block_steps`` samples are drawn one ahead: the draw of block b + 1 does not
    depend on the updates of block b, so XLA can run the two side by side. A block that
    overshoots the target masks its extra steps (the samples are keyed by absolute step,
    so nothing else depends on where blocks start).
    The state's buffers are donated: the caller must use the returned state.
    """
    block = sim.block_steps
    seed_step = jax.vmap(_sgd_step(sim), in_axes=(0, 0, 0, 0, None))

    def advance_shard(instance: Instance, state: State, target: Array) -> State:
        start = state.step[0]
        target = jnp.asarray(target, start.dtype)
        offsets = jnp.arange(block, dtype=start.dtype)

        def update(params: Any, opt_state: Any, first: Array, x: Array, y: Array) -> tuple[Any, Any]:
            def one(i: Array, carry: tuple[Any, Any]) -> tuple[Any, Any]:
                x_i = jax.lax.dynamic_index_in_dim(x, i, axis=1, keepdims=False)
                y_i = jax.lax.dynamic_index_in_dim(y, i, axis=1, keepdims=False)
                return seed_step(*carry, x_i, y_i, first + i < target)

            return jax.lax.fori_loop(0, block, one, (params, opt_state))

        def body(carry: tuple[Any, ...]) -> tuple[Any, ...]:
            params, opt_state, first, x, y = carry
            x_next, y_next = draw_block(sim, instance, first + block + offsets)
            params, opt_state = update(params, opt_state, first, x, y)
            return params, opt_state, first + block, x_next, y_next

        x, y = draw_block(sim, instance, start + offsets)
        params, opt_state, *_ = jax.lax.while_loop(
            lambda carry: carry[2] < target, body, (state.params, state.opt_state, start, x, y)
        )
        return State(params, opt_state, jnp.full_like(state.step, jnp.maximum(start, target)))

    def advance(instance: Instance, state: State, target: Array) -> State:
        return split_over_seeds(advance_shard, state.step.shape[0], replicated=1)(instance, state, target)

    return jax.jit(advance, donate_argnums=(1,))


def _observe_one(sim: Simulator, instance: Instance, state: State) -> Observation:
    s = sim.scenario
    params = state.params
    out = student_output(s, params, instance.test_x).astype(jnp.float64)
    test_error = 0.5 * jnp.mean((out - instance.test_y.astype(jnp.float64)) ** 2)
    w64 = params["w"].astype(jnp.float64)
    wt64 = instance.teacher_w.astype(jnp.float64)
    q, r, t = sim.model.order_parameters(instance.data_params, w64, wt64)
    finite = jnp.all(jnp.isfinite(params["w"])) & jnp.all(jnp.isfinite(params["v"]))
    return Observation(test_error, q, r, t, params["v"].astype(jnp.float64), finite)


def make_observe(sim: Simulator):
    """``observe(instance, state) -> Observation`` for all seeds, jit-compiled once."""
    observe_shard = jax.vmap(lambda i, st: _observe_one(sim, i, st))

    def observe(instance: Instance, state: State) -> Observation:
        return split_over_seeds(observe_shard, state.step.shape[0])(instance, state)

    return jax.jit(observe)


register_engine("full", Engine(make_simulator, init_ensemble, make_advance, make_observe, lambda scenario: None))

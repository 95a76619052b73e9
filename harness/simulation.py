"""Online SGD for an ensemble of two-layer students, one seed per ensemble member.

The simulation is a pair of pure functions over explicit state, vmapped over seeds and
jit-compiled once per shape:

* :func:`init_ensemble` draws each seed's fixed *instance* (teacher, data-model
  parameters, held-out test set) and its initial *state* (student weights, optimizer
  state, step counter);
* :func:`advance` runs SGD until a target step, one fresh sample per step;
* :func:`observe` measures the test error and the order parameters.

Random numbers. Each seed ``s`` has its own key ``fold_in(PRNGKey(run.seed), s)``, split
into teacher / student / data-model / training-stream / test-set keys (the teacher and
data-model keys come from one run-wide key when ``run.shared_teacher`` is set). The
sample used at SGD step ``i`` is drawn from ``fold_in(training_key, i)``, so the training
stream depends neither on how steps are grouped into blocks nor on the evaluation times:
``run.block_steps`` is a pure speed setting, and a run can stop and resume anywhere.

Blocks. Samples are drawn ``block_steps`` at a time (teacher labels computed as one
matrix product for the block), then a ``lax.scan`` applies the steps one by one. A block
that straddles the current step or the target masks the steps outside ``[step, target)``.
"""

from __future__ import annotations

import math
from typing import Any, NamedTuple

import jax
import jax.numpy as jnp
import numpy as np
import optax

from harness.activations import get_activation
from harness.data_models import DataModel, build_data_model
from harness.optimizers import make_optimizer
from harness.scenario import Scenario

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
    return jnp.float64 if scenario["run"]["dtype"] == "float64" else jnp.float32


def total_steps(scenario: Scenario) -> int:
    """Number of SGD steps for the scenario's time: round(time * N), at least 1."""
    return max(1, round(scenario["sgd"]["time"] * scenario["data"]["input_dim"]))


def evaluation_steps(scenario: Scenario) -> np.ndarray:
    """Strictly increasing SGD step counts at which to measure, 0 and the end included.

    Log spacing places ``evaluations - 1`` points geometrically between
    t_1 = max(time / 1000, 1 / N) and the final time, after t = 0. Rounding to whole
    steps can merge early points; they are then pushed one step apart, and if that
    overshoots the end, fewer evaluations result (never duplicates).
    """
    n = scenario["data"]["input_dim"]
    end = total_steps(scenario)
    count = scenario["run"]["evaluations"]
    if scenario["run"]["spacing"] == "linear":
        steps = np.rint(np.linspace(0, end, count)).astype(np.int64)
    else:
        first = max(scenario["sgd"]["time"] / 1000.0, 1.0 / n) * n
        grid = np.geomspace(first, end, count - 1) if count > 2 else np.array([end])
        steps = np.concatenate([[0], np.rint(grid).astype(np.int64)])
    steps[-1] = end
    for i in range(1, len(steps)):  # force strictly increasing
        steps[i] = max(steps[i], steps[i - 1] + 1)
    return np.unique(steps[steps <= end])


def default_block_steps(scenario: Scenario) -> int:
    """Steps per drawn block when ``run.block_steps`` is 0.

    Large enough to amortise the per-block overhead (the teacher's matrix product and
    the loop), small enough to keep a block of all seeds' inputs within a few MiB.
    """
    chosen = scenario["run"]["block_steps"]
    if chosen > 0:
        return chosen
    floats_per_step = scenario["data"]["input_dim"] * scenario["run"]["seeds"]
    return int(np.clip(2 ** round(math.log2(max(1, (1 << 20) / floats_per_step))), 16, 512))


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
    g = get_activation(scenario["student"]["activation"]).fn
    lam = x @ params["w"].T / math.sqrt(x.shape[-1])
    return g(lam) @ params["v"]


def teacher_output(scenario: Scenario, w: Array, v: Array, c: Array) -> Array:
    """Clean teacher label sum_m vt_m g~(wt_m . c / sqrt(D)) for a batch c of shape [..., D]."""
    g = get_activation(scenario["teacher"]["activation"]).fn
    nu = c @ w.T / math.sqrt(c.shape[-1])
    return g(nu) @ v


def clean_labels(sim: Simulator, w: Array, v: Array, c: Array) -> Array:
    """Noise-free labels of a batch: the teacher's output on c, or c itself when the data model gives labels."""
    if sim.model.labels_given:
        return c[..., 0]
    return teacher_output(sim.scenario, w, v, c)


def sample_loss(scenario: Scenario, params: dict[str, Array], x: Array, y: Array) -> Array:
    """The per-sample loss 1/2 (f(x) - y)^2 (notes, section 1)."""
    return 0.5 * (student_output(scenario, params, x) - y) ** 2


# ------------------------------------------------------------------------ init/draws


def seed_keys(scenario: Scenario, seed_indices: np.ndarray) -> Array:
    base = jax.random.PRNGKey(scenario["run"]["seed"])
    return jax.vmap(lambda s: jax.random.fold_in(base, s))(jnp.asarray(seed_indices, jnp.uint32))


def _split_seed_key(scenario: Scenario, key: Array) -> dict[str, Array]:
    names = ("teacher", "student", "data", "train", "test")
    keys = dict(zip(names, jax.random.split(key, len(names))))
    if scenario["run"]["shared_teacher"]:
        shared = jax.random.fold_in(jax.random.PRNGKey(scenario["run"]["seed"]), SHARED_KEY_INDEX)
        keys["teacher"], keys["data"] = jax.random.split(shared, 2)
    return keys


def draw_initial_weights(sim: Simulator, seed_indices: np.ndarray) -> tuple[Array, Array, Array, Array, Any]:
    """Teacher and initial student weights for the given seeds, without any test set.

    Returns ``(teacher_w, teacher_v, student_w, student_v, data_params)`` with a leading
    seed axis; this is all the theory needs to start from the same initial conditions.
    """
    s = sim.scenario
    k, m = s["student"]["hidden"], s["teacher"]["hidden"]
    n, d = sim.model.input_dim, sim.model.teacher_dim

    def one(key: Array) -> tuple[Array, ...]:
        keys = _split_seed_key(s, key)
        teacher_w = s["teacher"]["init_std"] * jax.random.normal(keys["teacher"], (m, d), sim.dtype)
        student_w = s["student"]["init_std"] * jax.random.normal(keys["student"], (k, n), sim.dtype)
        data_params = sim.model.init(keys["data"])
        return teacher_w, student_w, data_params

    teacher_w, student_w, data_params = jax.jit(jax.vmap(one))(seed_keys(s, seed_indices))
    count = len(seed_indices)
    teacher_v = jnp.tile(jnp.asarray(s["teacher"]["second_layer"], sim.dtype), (count, 1))
    student_v = jnp.tile(jnp.asarray(s["student"]["second_layer"], sim.dtype), (count, 1))
    return teacher_w, teacher_v, student_w, student_v, data_params


def init_ensemble(sim: Simulator, seed_indices: np.ndarray | None = None) -> tuple[Instance, State]:
    """Draw every seed's instance (teacher, data model, test set) and initial state."""
    s = sim.scenario
    if seed_indices is None:
        seed_indices = np.arange(s["run"]["seeds"])
    teacher_w, teacher_v, student_w, student_v, data_params = draw_initial_weights(sim, seed_indices)
    test_samples = s["run"]["test_samples"]

    def test_set(key: Array, tw: Array, tv: Array, params: Any) -> tuple[Array, Array]:
        x, c = sim.model.sample(params, _split_seed_key(s, key)["test"], test_samples)
        return x, clean_labels(sim, tw, tv, c)

    keys = seed_keys(s, seed_indices)
    test_x, test_y = jax.jit(jax.vmap(test_set))(keys, teacher_w, teacher_v, data_params)
    train_key = jax.vmap(lambda key: _split_seed_key(s, key)["train"])(keys)
    params = {"w": student_w, "v": student_v}
    opt_state = jax.vmap(sim.optimizer.init)(params)
    step = jnp.zeros(len(seed_indices), dtype=jnp.int64)
    instance = Instance(teacher_w, teacher_v, data_params, train_key, test_x, test_y)
    return instance, State(params, opt_state, step)


def draw_steps(sim: Simulator, instance_one: Instance, steps: Array) -> tuple[Array, Array]:
    """The training samples (x, noisy label) of one seed at the given absolute steps.

    Shapes ``[len(steps), N]`` and ``[len(steps)]``. This is the training stream itself,
    exposed so that tests can replay it through an independent implementation.
    """
    s = sim.scenario

    def one(step: Array) -> tuple[Array, Array, Array]:
        key = jax.random.fold_in(instance_one.train_key, step)
        sample_key, noise_key = jax.random.split(key)
        x, c = sim.model.sample(instance_one.data_params, sample_key, 1)
        noise = jax.random.normal(noise_key, (), sim.dtype)
        return x[0], c[0], noise

    x, c, noise = jax.vmap(one)(steps)
    y = clean_labels(sim, instance_one.teacher_w, instance_one.teacher_v, c)
    return x, y + s["teacher"]["noise_std"] * noise


# --------------------------------------------------------------------------- dynamics


def _advance_one(sim: Simulator, instance: Instance, state: State, target: Array) -> State:
    """Run one seed's SGD from ``state.step`` up to (not including) step ``target``."""
    s = sim.scenario
    block = sim.block_steps
    grad_fn = jax.grad(lambda p, x, y: sample_loss(s, p, x, y))

    def sgd_step(carry: tuple[Any, Any], inputs: tuple[Array, Array, Array]) -> tuple[tuple[Any, Any], None]:
        params, opt_state = carry
        x, y, active = inputs
        grads = grad_fn(params, x, y)
        updates, new_opt_state = sim.optimizer.update(grads, opt_state, params)
        new_params = optax.apply_updates(params, updates)
        keep = lambda new, old: jnp.where(active, new, old)  # noqa: E731
        return (
            jax.tree_util.tree_map(keep, new_params, params),
            jax.tree_util.tree_map(keep, new_opt_state, opt_state),
        ), None

    def run_block(st: State) -> State:
        first = (st.step // block) * block
        steps = first + jnp.arange(block, dtype=st.step.dtype)
        x, y = draw_steps(sim, instance, steps)
        active = (steps >= st.step) & (steps < target)
        (params, opt_state), _ = jax.lax.scan(sgd_step, (st.params, st.opt_state), (x, y, active))
        return State(params, opt_state, jnp.minimum(first + block, target))

    return jax.lax.while_loop(lambda st: st.step < target, run_block, state)


def make_advance(sim: Simulator):
    """``advance(instance, state, target) -> state`` for all seeds, jit-compiled once.

    The state's buffers are donated: the caller must use the returned state.
    """

    def advance(instance: Instance, state: State, target: Array) -> State:
        return jax.vmap(lambda i, st: _advance_one(sim, i, st, target))(instance, state)

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
    return jax.jit(jax.vmap(lambda i, st: _observe_one(sim, i, st)))

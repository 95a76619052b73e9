"""The full simulation against the floor of drawing its inputs and against a plain NumPy loop.

Scenario: i.i.d. Gaussian inputs, N = 500, K = M = 2, erf, 16 seeds, float32 (issue 7).

* (a) ``harness``: ``experiment.simulate`` on the scenario (two evaluations, 1,000 test
  samples so that measuring costs nothing), sample-steps per second = steps x seeds /
  ``simulation_s`` (compilation excluded, as the run manifest reports it).
* (b) ``floor``: drawing the very same inputs and nothing else: the same per-step keys
  (``fold_in(train_key, step)``, split), the same generator (``harness.core.threefry``, the
  bits of ``jax.random.normal``), dtype, block size and split of the seeds across devices,
  summed into a checksum so that nothing is optimised away. Also, for reference, stock
  ``jax.random.normal`` drawing the same count in large calls.
* (c) ``NumPy loop``: a plain per-sample loop over seeds and steps (NumPy's default
  generator, float32, scipy's erf), the way one would write it without the harness.

(a), (b) and (c) are measured in turn, best of five each, so that load from other
processes hits all three alike (the machine's speed drifts by +-10% over minutes).
"""

from __future__ import annotations

import math
from collections.abc import Callable

import jax
import jax.numpy as jnp
import numpy as np
from scipy.special import erf

from benchmarks import Timing, row
from harness.core import devices, threefry
from harness.core import scenario as scenario_lib
from harness.runner import experiment
from harness.sim import simulation

N, K, M, SEEDS = 500, 2, 2, 16
NAME = "full simulation"


def scenario(steps: int, seeds: int = SEEDS, n: int = N, **overrides) -> dict:
    values = {
        "data.input_dim": n, "student.hidden": K, "teacher.hidden": M, "run.seeds": seeds,
        "sgd.time": steps / n, "run.evaluations": 2, "run.test_samples": 1000, "run.dtype": "float32",
        "run.checkpoint_minutes": 0.0,
    }
    values.update(overrides)
    return scenario_lib.with_overrides(scenario_lib.resolve({}), values)


def harness_run(steps: int, **overrides) -> tuple[float, float, int]:
    """(simulation_s, compile_s, block) of experiment.simulate for ``steps`` steps."""
    s = scenario(steps, **overrides)
    result = experiment.simulate(s)
    return result.simulation_s, result.compile_s, simulation.make_simulator(s).block_steps


class Advancer:
    """The harness's compiled ``advance`` on the scenario, stepped ``steps`` further per call."""

    def __init__(self, steps: int, **overrides) -> None:
        s = scenario(steps, **overrides)
        self.sim = simulation.make_simulator(s)
        self.instance, self.state = simulation.init_ensemble(self.sim)
        self.advance = simulation.make_advance(self.sim)
        self.steps = steps
        self.call(self.sim.block_steps)  # compile and warm up

    def call(self, steps: int | None = None) -> None:
        target = int(self.state.step[0]) + (self.steps if steps is None else steps)
        self.state = self.advance(self.instance, self.state, jnp.asarray(target, self.state.step.dtype))
        jax.block_until_ready(self.state)


def make_floor(steps: int, **overrides):
    """A compiled function drawing the inputs of ``steps`` steps for every seed, and its arguments."""
    s = scenario(steps, **overrides)
    sim = simulation.make_simulator(s)
    instance, state = simulation.init_ensemble(sim)
    block = sim.block_steps
    blocks = math.ceil(steps / block)

    def draw_inputs(train_key: jax.Array, first: jax.Array) -> jax.Array:
        step_numbers = first + jnp.arange(block, dtype=jnp.int64)
        sample_keys, _ = threefry.split_pair(simulation.step_keys(train_key, step_numbers))
        x, _ = jax.vmap(lambda key: sim.model.sample((), key, 1))(sample_keys)
        return x[:, 0]

    def shard(train_key: jax.Array) -> jax.Array:
        def body(b: jax.Array, total: jax.Array) -> jax.Array:
            x = jax.lax.map(lambda key: draw_inputs(key, b * block), train_key)  # [S, B, N], as the simulator
            return total + jnp.sum(x, axis=(1, 2))

        return jax.lax.fori_loop(0, blocks, body, jnp.zeros(train_key.shape[0], sim.dtype))

    split = devices.split_over_seeds(shard, s["run"]["seeds"])
    compiled = jax.jit(split).lower(instance.train_key).compile()
    return compiled, (instance.train_key,), blocks * block


def stock_normal_rate(samples: int, n: int = N) -> Timing:
    """Stock jax.random.normal drawing ``samples`` x n float32 numbers, in calls of 2**22 numbers."""
    per_call = max(1, (1 << 22) // n)
    calls = math.ceil(samples / per_call)
    draw = jax.jit(lambda key: jnp.sum(jax.random.normal(key, (per_call, n), jnp.float32)))
    keys = jax.random.split(jax.random.PRNGKey(0), calls)
    jax.block_until_ready(draw(keys[0]))
    timing = Timing()
    for _ in range(2):
        timing.measure(lambda: [jax.block_until_ready(draw(key)) for key in keys])
    timing.samples = calls * per_call
    return timing


def numpy_loop(steps: int, seeds: int = 2, n: int = N, eta: float = 0.5) -> Callable[[], None]:
    """Plain per-sample online SGD in NumPy (docs/equations.md, section 1), seed after seed: the loop to time."""
    rng = np.random.default_rng(0)
    sqrt_n, root2, slope = math.sqrt(n), math.sqrt(2.0), math.sqrt(2.0 / math.pi)

    def loop() -> None:
        for _ in range(seeds):
            w = (0.1 * rng.standard_normal((K, n))).astype(np.float32)
            teacher = rng.standard_normal((M, n)).astype(np.float32)
            v = np.ones(K, np.float32)
            vt = np.ones(M, np.float32)
            for _ in range(steps):
                x = rng.standard_normal(n, dtype=np.float32)
                lam = w @ x / sqrt_n
                y = vt @ erf(teacher @ x / sqrt_n / root2)
                delta = v @ erf(lam / root2) - y
                w -= np.outer((eta / sqrt_n) * v * slope * np.exp(-lam * lam / 2) * delta, x)

    return loop


def run(steps: int = 20_000, numpy_steps: int = 3_000, repeats: int = 5) -> list[dict]:
    advancer = Advancer(steps)
    floor, args, floor_steps = make_floor(steps)
    jax.block_until_ready(floor(*args))
    loop, loop_best = numpy_loop(numpy_steps), Timing()
    harness_best, floor_best = Timing(), Timing()
    for _ in range(repeats):  # alternate, so that other load hits all three alike; keep the best of each
        harness_best.measure(advancer.call)
        floor_best.measure(lambda: jax.block_until_ready(floor(*args)))
        loop_best.measure(loop)
    a = steps * SEEDS / harness_best.wall
    b = floor_steps * SEEDS / floor_best.wall
    simulation_s, compile_s, block = harness_run(steps)  # the same through experiment.simulate, as a run reports it
    stock = stock_normal_rate(floor_steps * SEEDS // 4)
    stock_rate = stock.samples / stock.wall
    c = 2 * numpy_steps / loop_best.wall
    setting = f"N={N}, K=M={K}, erf, {SEEDS} seeds, float32, block {block}, {len(jax.devices())} XLA devices"
    cpu_ratio = lambda t: f"cpu/wall {t.cpu / t.wall:.2f}"  # noqa: E731
    return [
        row(NAME, "(a) harness", a, "sample-steps/s",
            f"{setting}; best of {repeats} x {steps} steps; {cpu_ratio(harness_best)}", harness_best.load),
        row(NAME, "(a) through experiment.simulate", steps * SEEDS / simulation_s, "sample-steps/s",
            f"simulation_s of one run (2 evaluations); compile_s {compile_s:.1f} s"),
        row(NAME, "(b) floor: the same input draws", b, "sample-steps/s",
            f"threefry, per-step keys, same blocks and devices; {cpu_ratio(floor_best)}", floor_best.load),
        row(NAME, "(b') stock jax.random.normal, large calls", stock_rate, "sample-steps/s",
            "reference: JAX's own lowering of the same generator", stock.load),
        row(NAME, "(c) NumPy per-sample loop", c, "sample-steps/s",
            f"2 seeds x {numpy_steps} steps, float32, default_rng; {cpu_ratio(loop_best)}", loop_best.load),
        row(NAME, "(a)/(b)", a / b, "ratio", "target >= 0.7", harness_best.load),
        row(NAME, "(a)/(c)", a / c, "ratio", "target >= 15", harness_best.load),
    ]


def block_sweep(
    blocks: tuple[int, ...] = (4, 8, 16, 32, 64, 128, 256), steps: int = 8192, repeats: int = 4
) -> list[dict]:
    """(a) for several block sizes, measured alternately: how run.block_steps' default was chosen."""
    advancers = {block: Advancer(steps, **{"run.block_steps": block}) for block in blocks}
    timings = {block: Timing() for block in blocks}
    for _ in range(repeats):
        for block, advancer in advancers.items():
            timings[block].measure(advancer.call)
    default = simulation.make_simulator(scenario(steps)).block_steps
    return [
        row(NAME, f"(a) with block_steps = {block}" + (" (default)" if block == default else ""),
            steps * SEEDS / t.wall, "sample-steps/s", f"best of {repeats}; cpu/wall {t.cpu / t.wall:.2f}", t.load)
        for block, t in timings.items()
    ]


if __name__ == "__main__":
    for r in run():
        print(r)

"""Benchmark of the latent-variable data model (issue 3): simulation speed and the projected solve.

Measures, in one process:

* ``latent simulation``: online SGD on x = sign(F^T c / sqrt(D)) - E f, N = 1000, D = 500,
  K = M = 2, 16 seeds (float32): sample-steps per second (seeds x steps / wall time),
  after compilation;
* ``floor: matmul``: the same count if every sample cost only its F-product
  (2 D N flops) at the matrix-multiply rate measured here on [4096, D] x [D, N] float32;
* ``latent draws``: drawing only the latents, one key per step as the simulator does
  (fold_in(train_key, step), split, normal), 16 seeds;
* ``floor: latents + F-product``: 1 / (1 / latent-draw rate + 2 D N / matmul rate), the
  rate if a step cost nothing but its latent draw and its F-product;
* ``projected solve``: the section-4 equations for N = 1000, K = M = 2 to t = 100
  (diffrax Tsit5, rtol 1e-6, atol 1e-9), seconds per seed after compilation, and the
  eigen-decomposition per seed.

Every figure is the best of a few repeats, reported per wall-clock second and per CPU
second of this process (all threads): on a shared machine the wall-clock figures drop
with the load, the CPU-second figures much less, so the ratios between rows are best
read in the CPU column.

Run ``python benchmarks/latent.py``; :func:`run` returns the rows as dicts.
"""

from __future__ import annotations

import math
import time

import jax
import jax.numpy as jnp
import numpy as np

from harness.core import scenario as scenario_lib
from harness.core import threefry
from harness.core import times as time_grid
from harness.equations import iid as iid_theory
from harness.equations import latent as latent_theory
from harness.sim import simulation
from harness.sim.initial import initial_state

N, D, K, M, SEEDS = 1000, 500, 2, 2, 16


def _scenario(time_: float, seeds: int) -> dict:
    return scenario_lib.resolve({
        "data": {"kind": "latent", "input_dim": N, "latent_dim": D, "feature_map": "sign"},
        "student": {"hidden": K}, "teacher": {"hidden": M},
        "sgd": {"time": time_},
        "run": {"seeds": seeds, "evaluations": 20, "test_samples": 1000},
    })


def _best_of(repeats: int, fn) -> tuple[float, float]:
    """(wall seconds, CPU seconds) of fn(), each the minimum over ``repeats`` calls."""
    wall = cpu = math.inf
    for _ in range(repeats):
        started, started_cpu = time.perf_counter(), time.process_time()
        jax.block_until_ready(fn())
        wall = min(wall, time.perf_counter() - started)
        cpu = min(cpu, time.process_time() - started_cpu)
    return wall, cpu


def _row(measure: str, work: float, seconds: tuple[float, float], unit: str, note: str) -> dict:
    """A rate row: ``work`` per wall second (value) and per CPU second (per_cpu_second)."""
    return {"measure": measure, "value": work / seconds[0], "per_cpu_second": work / seconds[1],
            "unit": unit, "note": note}


def simulation_rate(steps: int = 2048, repeats: int = 3) -> dict:
    scenario = _scenario(repeats * steps / N + 1.0, SEEDS)
    sim = simulation.make_simulator(scenario)
    instance, state = simulation.init_ensemble(sim)
    advance = simulation.make_advance(sim)
    state = advance(instance, state, jnp.asarray(sim.block_steps, state.step.dtype))  # compile + warm up
    jax.block_until_ready(state)
    box = [state]

    def stretch():  # the advance donates its state: keep the latest one
        target = int(box[0].step[0]) + steps
        box[0] = advance(instance, box[0], jnp.asarray(target, box[0].step.dtype))
        return box[0]

    seconds = _best_of(repeats, stretch)
    return _row("latent simulation", SEEDS * steps, seconds, "sample-steps/s",
                f"N={N}, D={D}, K=M={K}, {SEEDS} seeds, block {sim.block_steps}, float32")


def matmul_seconds() -> tuple[tuple[float, float], float]:
    """Best (wall, CPU) seconds of a [4096, D] x [D, N] float32 product, and its flop count."""
    a = jnp.ones((4096, D), jnp.float32)
    b = jnp.ones((D, N), jnp.float32)
    product = jax.jit(lambda a, b: a @ b)
    product(a, b).block_until_ready()
    return _best_of(5, lambda: product(a, b)), 2.0 * 4096 * D * N


def latent_draw_seconds(block: int, blocks: int = 40) -> tuple[tuple[float, float], int]:
    """Sample-steps/s of drawing the latents alone, one key per step as the simulator does, 16 seeds."""
    keys = jax.random.split(jax.random.PRNGKey(1), SEEDS)

    def one_step(key, step):
        sample_key, _ = jax.random.split(jax.random.fold_in(key, step))
        return threefry.normal(sample_key, (1, D), jnp.float32)[0]  # the simulator's draw

    @jax.jit
    def draw_blocks(keys):
        def one_seed(key):
            def body(i, total):
                steps = i * block + jnp.arange(block)
                return total + jnp.sum(jax.vmap(lambda s: one_step(key, s))(steps), axis=0)
            return jax.lax.fori_loop(0, blocks, body, jnp.zeros(D, jnp.float32))
        return jax.vmap(one_seed)(keys)

    draw_blocks(keys).block_until_ready()
    return _best_of(3, lambda: draw_blocks(keys)), SEEDS * block * blocks


def projected_solve(seeds: int = 4, time_: float = 100.0) -> list[dict]:
    scenario = _scenario(time_, seeds)
    sim = simulation.make_simulator(scenario)
    start = initial_state(sim, np.arange(seeds))
    started = time.perf_counter()
    spectra = latent_theory.exact_spectra(start)
    eigen_s = (time.perf_counter() - started) / seeds
    times = time_grid.evaluation_steps(scenario) / N
    dyn = iid_theory.dynamics_of(scenario)

    def solve():
        return latent_theory.solve_projected(
            dyn, spectra, start.order_parameters, start.teacher_v, times, rtol=1e-6, atol=1e-9
        )

    started = time.perf_counter()
    _, steps = solve()  # compiles
    compile_s = time.perf_counter() - started
    wall, cpu = _best_of(2, lambda: solve()[0].Q)
    return [
        {"measure": "projected solve", "value": wall / seeds, "per_cpu_second": cpu / seeds, "unit": "s/seed",
         "note": f"N={N}, K=M={K}, t={time_:g}, {seeds} seeds vmapped, {int(steps.max())} steps, "
                 f"first call (with compile) {compile_s:.1f} s; CPU column: CPU s/seed"},
        {"measure": "eigen-decomposition of Omega", "value": eigen_s, "per_cpu_second": float("nan"),
         "unit": "s/seed", "note": f"N={N}, numpy eigh (wall)"},
    ]


def run() -> list[dict]:
    rows = [simulation_rate()]
    block = simulation.default_block_steps(_scenario(1.0, SEEDS))
    (matmul_wall, matmul_cpu), flops = matmul_seconds()
    rows.append(_row("matmul rate", flops / 1e9, (matmul_wall, matmul_cpu), "GFLOP/s",
                     f"[4096, {D}] x [{D}, {N}] float32"))
    per_sample = 2.0 * D * N / flops  # matmul seconds per sample-step = per_sample * measured seconds
    rows.append(_row("floor: matmul", 1.0, (per_sample * matmul_wall, per_sample * matmul_cpu), "sample-steps/s",
                     "F-product alone at the matmul rate"))
    (draw_wall, draw_cpu), draws = latent_draw_seconds(block)
    rows.append(_row("latent draws", draws, (draw_wall, draw_cpu), "sample-steps/s",
                     f"threefry.normal, per-step keys, {SEEDS} seeds"))
    floor = (draw_wall / draws + per_sample * matmul_wall, draw_cpu / draws + per_sample * matmul_cpu)
    rows.append(_row("floor: latents + F-product", 1.0, floor, "sample-steps/s",
                     "latent draw time + F-product time at the matmul rate"))
    rows.extend(projected_solve())
    return rows


if __name__ == "__main__":
    results = run()
    width = max(len(row["measure"]) for row in results)
    print(f"{'':<{width}}  {'per wall s':>12} {'per CPU s':>12}")
    for row in results:
        print(f"{row['measure']:<{width}}  {row['value']:>12.4g} {row['per_cpu_second']:>12.4g} "
              f"{row['unit']:<15} {row['note']}")

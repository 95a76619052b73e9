"""The exact order-parameter chain against the full simulation at large N (issue 7).

Both engines run the same scenario (i.i.d. Gaussian inputs, K = M = 2, erf, 16 seeds) at
N = 100,000; sample-steps per second = steps x seeds / wall time of ``advance`` after
compilation, best of three. The full simulation draws N numbers per step and seed, the
chain K + M + 2 (and runs in float64), so the ratio grows like N.
"""

from __future__ import annotations

import jax
import jax.numpy as jnp

from benchmarks import Timing, row
from harness.core import scenario as scenario_lib
from harness.sim import chain, simulation

N, SEEDS = 100_000, 16
NAME = "chain vs full"


def _scenario(engine: str, steps: int) -> dict:
    return scenario_lib.with_overrides(scenario_lib.resolve({}), {
        "run.engine": engine, "data.input_dim": N, "run.seeds": SEEDS, "sgd.time": steps / N,
        "run.test_samples": 1, "run.dtype": "float32", "run.checkpoint_minutes": 0.0,
    })


def _rate(engine: str, steps: int, repeats: int = 3) -> tuple[float, Timing, int]:
    module = chain if engine == "chain" else simulation
    s = _scenario(engine, steps)
    sim = module.make_simulator(s)
    instance, state = module.init_ensemble(sim)
    advance = module.make_advance(sim)
    state = advance(instance, state, jnp.asarray(sim.block_steps, state.step.dtype))  # compile + warm up
    jax.block_until_ready(state)
    timing = Timing()
    for _ in range(repeats):
        target = int(state.step[0]) + steps

        def call(target=target):
            nonlocal state
            state = advance(instance, state, jnp.asarray(target, state.step.dtype))
            jax.block_until_ready(state)

        timing.measure(call)
    return steps * SEEDS / timing.wall, timing, sim.block_steps


def run(chain_steps: int = 50_000, full_steps: int = 200) -> list[dict]:
    chain_rate, chain_timing, chain_block = _rate("chain", chain_steps)
    full_rate, full_timing, full_block = _rate("full", full_steps)
    setting = f"N={N}, K=M=2, erf, {SEEDS} seeds"
    return [
        row(NAME, "chain", chain_rate, "sample-steps/s",
            f"{setting}, float64, block {chain_block}, {chain_steps} steps; cpu/wall "
            f"{chain_timing.cpu / chain_timing.wall:.2f}", chain_timing.load),
        row(NAME, "full simulation", full_rate, "sample-steps/s",
            f"{setting}, float32, block {full_block}, {full_steps} steps; cpu/wall "
            f"{full_timing.cpu / full_timing.wall:.2f}", full_timing.load),
        row(NAME, "chain / full", chain_rate / full_rate, "ratio", "grows like N", chain_timing.load),
    ]


if __name__ == "__main__":
    for r in run():
        print(r)

"""One experiment: simulate a scenario's ensemble and pair it with its theory.

This is the orchestration layer between the pure pieces: it compiles the simulator
once, steps it from one evaluation time to the next, records observations, computes
the simulation's overlap error from its own order parameters, asks the theory for
predictions from the very same initial conditions, and returns paired
:class:`~harness.core.trajectories.Trajectories` with timings.
"""

from __future__ import annotations

import time
import warnings
from collections.abc import Callable
from pathlib import Path
from typing import NamedTuple

import jax
import jax.numpy as jnp
import numpy as np

from harness.core import times as time_grid
from harness.core.scenario import Scenario, run_id
from harness.core.trajectories import Trajectories, observable_names, stack_observables
from harness.equations import iid as iid_theory
from harness.equations.sources import InitialState, predict
from harness.runner.checkpoint import Checkpointer
from harness.runner.compile_clock import CompileClock
from harness.sim import simulation
from harness.sim.engines import engine_of
from harness.sim.initial import initial_state

ProgressFn = Callable[[int, int], None]


class SimulationResult(NamedTuple):
    seeds: np.ndarray  # [S]
    steps: np.ndarray  # [E]
    t: np.ndarray  # [E]
    values: np.ndarray  # [S, E, O], NaN from the time a seed diverged
    diverged_at: np.ndarray  # [S] time of divergence, NaN if never
    compile_s: float
    simulation_s: float
    resumed_from_step: int = 0  # > 0: the run continued from a checkpoint taken at this step


class ExperimentResult(NamedTuple):
    trajectories: Trajectories
    diverged_at: np.ndarray  # [S]
    timings: dict[str, float]
    resumed_from_step: int = 0
    data_notes: dict | None = None  # the data model's description of its instances (manifest "data_model")


def simulate(
    scenario: Scenario, *, progress: ProgressFn | None = None, checkpoint_dir: str | Path | None = None
) -> SimulationResult:
    """Train every seed's student and record observables at the evaluation times.

    With ``checkpoint_dir``, the state is saved there every ``run.checkpoint_minutes``
    and a matching checkpoint found there is resumed from (:mod:`harness.runner.checkpoint`);
    the results are bit-identical either way.
    """
    # run.engine: "full" trains the weights, "chain" steps the order parameters exactly; same interface.
    engine = engine_of(scenario)
    sim = engine.make_simulator(scenario)
    seeds = np.arange(scenario.run.seeds)
    steps = time_grid.evaluation_steps(scenario)
    t = steps / scenario.data.input_dim

    started = time.perf_counter()
    instance, state = engine.init_ensemble(sim, seeds)
    target0 = jnp.asarray(0, dtype=state.step.dtype)
    advance = engine.make_advance(sim).lower(instance, state, target0).compile()
    observe = engine.make_observe(sim).lower(instance, state).compile()
    jax.block_until_ready(instance)
    compile_s = time.perf_counter() - started

    started = time.perf_counter()
    records = []
    checkpointer, first, resumed_from_step = None, 0, 0
    if checkpoint_dir is not None:
        checkpointer = Checkpointer(
            checkpoint_dir, 60.0 * scenario.run.checkpoint_minutes, run_id(scenario), steps, instance.train_key
        )
        restored = checkpointer.restore(state, observe.out_info)
        if restored is not None:
            state, records, first = restored.state, restored.records, restored.evaluations_done
            resumed_from_step = int(steps[first - 1]) if first > 0 else 0
    for index in range(first, len(steps)):
        step = steps[index]
        state = advance(instance, state, jnp.asarray(step, dtype=state.step.dtype))
        records.append(jax.device_get(observe(instance, state)))
        if checkpointer is not None and 0 < step < steps[-1]:  # nothing to save at the start or the end
            checkpointer.maybe_save(index + 1, state, records)
        if progress is not None:
            progress(int(step), int(steps[-1]))
    simulation_s = time.perf_counter() - started

    stacked = jax.tree_util.tree_map(lambda *xs: np.stack(xs, axis=1), *records)  # [S, E, ...]
    dyn = iid_theory.dynamics_of(scenario)
    teacher_v = np.broadcast_to(
        np.asarray(scenario.teacher.second_layer, np.float64),
        stacked.v.shape[:2] + (scenario.teacher.hidden,),
    )
    ops = iid_theory.OrderParameters(stacked.Q, stacked.R, stacked.T, stacked.v)
    with np.errstate(invalid="ignore"):
        overlap = np.asarray(iid_theory.overlap_error(dyn, ops, teacher_v))
    trained = scenario.student.train_second_layer
    values = stack_observables(
        stacked.test_error, overlap, stacked.Q, stacked.R, stacked.T, stacked.v if trained else None
    )

    # A seed is diverged from the first evaluation at which a weight is not finite (or
    # a measured value overflowed); it is NaN from then on and leaves every average.
    # Observables undefined from the start for every seed (R, T and overlap_error of a user
    # data model that gives labels, without a teacher: harness.data.user) are no divergence.
    defined = np.any(np.isfinite(values[:, 0, :]), axis=0)
    bad = ~stacked.finite | ~np.all(np.isfinite(values[..., defined]), axis=-1)
    first_bad = np.where(bad.any(axis=1), bad.argmax(axis=1), len(steps))
    diverged_at = np.where(first_bad < len(steps), t[np.minimum(first_bad, len(t) - 1)], np.nan)
    mask = np.arange(len(steps))[None, :] >= first_bad[:, None]
    values[mask] = np.nan
    if np.any(np.isfinite(diverged_at)):
        count = int(np.sum(np.isfinite(diverged_at)))
        warnings.warn(
            f"{count} of {len(seeds)} seeds diverged (weights became non-finite; "
            "learning rate too large?); they are left out of every average from then on",
            RuntimeWarning,
            stacklevel=2,
        )
    return SimulationResult(seeds, steps, t, values, diverged_at, compile_s, simulation_s, resumed_from_step)


def theory_only(scenario: Scenario) -> tuple[np.ndarray, InitialState, np.ndarray, CompileClock]:
    """Solve the theory alone from the initial conditions a run would draw.

    Returns ``(t, start, values [S, E, O], clock)``; ``clock`` splits the theory's time
    into compiling and solving (:class:`~harness.runner.compile_clock.CompileClock`).
    """
    sim = simulation.make_simulator(scenario)
    seeds = np.arange(scenario.run.seeds)
    t = time_grid.evaluation_steps(scenario) / scenario.data.input_dim
    start = initial_state(sim, seeds)
    with CompileClock() as clock:
        prediction = predict(scenario, start, t)
    return t, start, prediction.values, clock


def run_experiment(
    scenario: Scenario, *, progress: ProgressFn | None = None, checkpoint_dir: str | Path | None = None
) -> ExperimentResult:
    """Simulation and paired theory of a resolved scenario (checkpointed in ``checkpoint_dir``).

    The theory is solved first: it needs only the initial conditions, and a user theory
    that fails or returns the wrong shapes is then reported before any simulation time is
    spent.
    """
    sim = simulation.make_simulator(scenario)
    seeds = np.arange(scenario.run.seeds)
    if scenario.run.engine == "full":
        simulation.check_test_set_fits(sim, len(seeds))  # before the theory's time is spent
    times = time_grid.evaluation_steps(scenario) / scenario.data.input_dim
    start = initial_state(sim, seeds)
    with CompileClock() as theory_clock:
        prediction = predict(scenario, start, times)
    data_notes = None if sim.model.describe is None else sim.model.describe(start.data_params)
    del start  # latent models: the theory's copy of Omega and Phi ([S, N, N]) is not needed while simulating
    simulated = simulate(scenario, progress=progress, checkpoint_dir=checkpoint_dir)
    assert np.array_equal(simulated.t, times) and np.array_equal(simulated.seeds, seeds)
    trajectories = Trajectories(
        simulated.seeds,
        simulated.t,
        _observables(scenario),
        simulated.values,
        prediction.values,
        prediction.paired,
    )
    timings = theory_timings(theory_clock) | {
        "simulation_s": simulated.simulation_s,
        "compile_s": simulated.compile_s,
    }
    return ExperimentResult(trajectories, simulated.diverged_at, timings, simulated.resumed_from_step, data_notes)


def theory_timings(clock: CompileClock) -> dict[str, float]:
    """A theory's cost as a run records it: solving (theory_s) apart from compiling (theory_compile_s)."""
    return {"theory_s": clock.total_s - clock.compile_s, "theory_compile_s": clock.compile_s}


def _observables(scenario: Scenario) -> list[str]:
    return observable_names(
        scenario.student.hidden, scenario.teacher.hidden, scenario.student.train_second_layer
    )

"""One experiment: simulate a scenario's ensemble and pair it with its theory.

This is the orchestration layer between the pure pieces: it compiles the simulator
once, steps it from one evaluation time to the next (in slices short enough to hear a
Ctrl-C, harness.core.interrupts), records observations, computes the simulation's overlap
error from its own order parameters, asks the theory for predictions from the very same
initial conditions, and returns paired :class:`~harness.core.trajectories.Trajectories`
with timings. An interrupted run keeps what it finished (harness.runner.checkpoint): the
simulation's progress, or the whole simulation when the theory was being solved.
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

from harness.core import interrupts
from harness.core import times as time_grid
from harness.core.scenario import Scenario, run_id
from harness.core.trajectories import Trajectories, observable_names, stack_observables
from harness.equations import iid as iid_theory
from harness.equations.ode_solve import ProgressReport as SolveProgress
from harness.equations.ode_solve import reporting_progress
from harness.equations.sources import InitialState, Prediction, check_before_simulating, predict
from harness.runner.checkpoint import Checkpointer, load_finished, save_finished
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


SLICE_S = 0.25
"""Wall time aimed at per call of the simulator: a Ctrl-C is heard between calls (harness.core.interrupts)."""
KEEP_START_BYTES = 256 * 2**20
"""Initial conditions larger than this (latent models' Omega and Phi) are drawn again for the theory
after the simulation instead of being held in memory during it."""


def simulate(
    scenario: Scenario, *, progress: ProgressFn | None = None, checkpoint_dir: str | Path | None = None
) -> SimulationResult:
    """Train every seed's student and record observables at the evaluation times.

    With ``checkpoint_dir`` (and ``run.checkpoint_minutes`` > 0), the state is saved there
    every ``run.checkpoint_minutes`` and when a Ctrl-C stops the loop, and a matching
    checkpoint found there is resumed from (:mod:`harness.runner.checkpoint`); a finished
    simulation is kept there until its run is stored, and found again instead of simulating.
    The results are bit-identical either way.

    The simulator is called in slices of about :data:`SLICE_S` seconds between evaluation
    times (the step at which a call stops changes nothing: every sample is keyed by its
    absolute step), so that a Ctrl-C is heard within a slice.
    """
    # run.engine: "full" trains the weights, "chain" steps the order parameters exactly; same interface.
    engine = engine_of(scenario)
    seeds = np.arange(scenario.run.seeds)
    steps = time_grid.evaluation_steps(scenario)
    t = steps / scenario.data.input_dim
    identity = run_id(scenario)
    keeping = checkpoint_dir is not None and scenario.run.checkpoint_minutes > 0
    if keeping:
        finished = load_finished(checkpoint_dir, identity, steps)
        if finished is not None and set(finished[0]) == set(simulation.Observation._fields):
            observations, timings = finished
            return _simulation_result(
                scenario, seeds, steps, t, simulation.Observation(**observations),
                timings.get("compile_s", 0.0), timings.get("simulation_s", 0.0), int(steps[-1]),
            )

    sim = engine.make_simulator(scenario)
    # compile_s is JAX's tracing and compiling alone (CompileClock). Drawing the instances is
    # computation that grows with seeds x test_samples x N (1.5 s for 8 seeds of the default
    # scenario, 3.3 s for 48): it counts as simulation time, as it once hid in compile_s.
    with CompileClock() as setup:
        instance, state = engine.init_ensemble(sim, seeds)
        target0 = jnp.asarray(0, dtype=state.step.dtype)
        advance = engine.make_advance(sim).lower(instance, state, target0).compile()
        observe = engine.make_observe(sim).lower(instance, state).compile()
        jax.block_until_ready(instance)
    compile_s = setup.compile_s

    started = time.perf_counter() - (setup.total_s - setup.compile_s)
    records = []
    checkpointer, first, resumed_from_step = None, 0, 0
    if checkpoint_dir is not None:
        checkpointer = Checkpointer(
            checkpoint_dir, 60.0 * scenario.run.checkpoint_minutes, identity, steps, instance.train_key
        )
        restored = checkpointer.restore(state, observe.out_info)
        if restored is not None:
            state, records, first = restored.state, restored.records, restored.evaluations_done
            resumed_from_step = int(np.asarray(state.step)[0])
    block = max(1, int(getattr(sim, "block_steps", 1)))
    slice_steps, current = 8 * block, int(np.asarray(state.step)[0])
    try:
        for index in range(first, len(steps)):
            target = int(steps[index])
            while current < target:
                stop = min(target, current + slice_steps)
                began = time.perf_counter()
                with interrupts.deferred():  # the old state's buffers are donated: replace it whole
                    state = jax.block_until_ready(advance(instance, state, jnp.asarray(stop, dtype=state.step.dtype)))
                    done, current = stop - current, stop
                rate = done / max(time.perf_counter() - began, 1e-6)
                slice_steps = int(np.clip(rate * SLICE_S, block, 8 * slice_steps))  # grow gently
            records.append(jax.device_get(observe(instance, state)))
            if checkpointer is not None and 0 < target < steps[-1]:  # nothing to save at the start or the end
                checkpointer.maybe_save(index + 1, state, records)
            if progress is not None:
                progress(target, int(steps[-1]))
        simulation_s = time.perf_counter() - started
        stacked = _stack(records)
        if keeping:
            with interrupts.deferred():
                save_finished(checkpoint_dir, identity, steps, stacked._asdict(),
                              {"compile_s": compile_s, "simulation_s": simulation_s})
    except KeyboardInterrupt:  # keep what is done for the next run
        if keeping and len(records) == len(steps):
            save_finished(checkpoint_dir, identity, steps, _stack(records)._asdict(),
                          {"compile_s": compile_s, "simulation_s": time.perf_counter() - started})
        elif checkpointer is not None and checkpointer.enabled and 0 < current < steps[-1]:
            checkpointer.save(len(records), state, records)
        raise
    return _simulation_result(scenario, seeds, steps, t, stacked, compile_s, simulation_s, resumed_from_step)


def _stack(records: list[simulation.Observation]) -> simulation.Observation:
    """The observations of every evaluation, ``[S, E, ...]``."""
    return jax.tree_util.tree_map(lambda *xs: np.stack(xs, axis=1), *records)


def _simulation_result(
    scenario: Scenario,
    seeds: np.ndarray,
    steps: np.ndarray,
    t: np.ndarray,
    stacked: simulation.Observation,
    compile_s: float,
    simulation_s: float,
    resumed_from_step: int,
) -> SimulationResult:
    """Observables, overlap errors and divergence times from the recorded observations ``[S, E, ...]``."""
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
            stacklevel=3,
        )
    return SimulationResult(seeds, steps, t, values, diverged_at, compile_s, simulation_s, resumed_from_step)


def theory_only(
    scenario: Scenario, *, progress: SolveProgress | None = None
) -> tuple[np.ndarray, InitialState, Prediction, CompileClock]:
    """Solve the theory alone from the initial conditions a run would draw.

    Returns ``(t, start, prediction, clock)`` (``prediction.values`` is ``[S, E, O]``);
    ``clock`` splits the theory's time into compiling and solving
    (:class:`~harness.runner.compile_clock.CompileClock`).
    ``progress(t_covered, t_total)`` follows the built-in theories' solves.
    """
    sim = simulation.make_simulator(scenario)
    seeds = np.arange(scenario.run.seeds)
    t = time_grid.evaluation_steps(scenario) / scenario.data.input_dim
    start = initial_state(sim, seeds)
    with CompileClock() as clock, reporting_progress(progress):
        prediction = predict(scenario, start, t)
    return t, start, prediction, clock


def run_experiment(
    scenario: Scenario,
    *,
    progress: ProgressFn | None = None,
    checkpoint_dir: str | Path | None = None,
    theory_progress: SolveProgress | None = None,
) -> ExperimentResult:
    """Simulation and paired theory of a resolved scenario (checkpointed in ``checkpoint_dir``).

    Order: the initial conditions; what can be checked of the theory without solving it
    (:func:`harness.equations.sources.check_before_simulating`: a user theory is tried on the
    first two evaluation times, so one that fails or returns the wrong shapes is reported
    before any simulation time is spent); the simulation, kept in ``checkpoint_dir`` once
    finished; the theory, whose progress ``theory_progress(t_covered, t_total)`` follows. A
    Ctrl-C during the theory therefore leaves the finished simulation for the next run.
    """
    sim = simulation.make_simulator(scenario)
    seeds = np.arange(scenario.run.seeds)
    if scenario.run.engine == "full":
        simulation.check_test_set_fits(sim, len(seeds))  # before anything else is spent
    times = time_grid.evaluation_steps(scenario) / scenario.data.input_dim
    start = initial_state(sim, seeds)
    with CompileClock() as check_clock:
        check_before_simulating(scenario, start, times)
    data_notes = None if sim.model.describe is None else sim.model.describe(start.data_params)
    if _nbytes(start) > KEEP_START_BYTES:
        start = None  # latent models: Omega and Phi ([S, N, N]) are drawn again after the simulation
    simulated = simulate(scenario, progress=progress, checkpoint_dir=checkpoint_dir)
    assert np.array_equal(simulated.t, times) and np.array_equal(simulated.seeds, seeds)
    if start is None:
        start = initial_state(sim, seeds)  # deterministic: the very same draws
    with CompileClock() as theory_clock, reporting_progress(theory_progress):
        prediction = predict(scenario, start, times)
    trajectories = Trajectories(
        simulated.seeds,
        simulated.t,
        _observables(scenario),
        simulated.values,
        prediction.values,
        prediction.paired,
    )
    timings = theory_timings(check_clock, theory_clock) | {
        "simulation_s": simulated.simulation_s,
        "compile_s": simulated.compile_s,
    }
    return ExperimentResult(trajectories, simulated.diverged_at, timings, simulated.resumed_from_step, data_notes)


def _nbytes(tree: object) -> int:
    return sum(int(getattr(leaf, "nbytes", 0)) for leaf in jax.tree_util.tree_leaves(tree))


def theory_timings(*clocks: CompileClock) -> dict[str, float]:
    """A theory's cost as a run records it: solving (theory_s) apart from compiling (theory_compile_s)."""
    compile_s = sum(clock.compile_s for clock in clocks)
    return {"theory_s": sum(clock.total_s for clock in clocks) - compile_s, "theory_compile_s": compile_s}


def _observables(scenario: Scenario) -> list[str]:
    return observable_names(
        scenario.student.hidden, scenario.teacher.hidden, scenario.student.train_second_layer
    )

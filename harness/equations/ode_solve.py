"""How every built-in theory integrates its order-parameter ODEs.

One solver for all theories, so that their accuracy is set by the same two numbers
(``theory.rtol`` and ``theory.atol``): diffrax's Tsit5, the 5th-order explicit Runge-Kutta
pair of Tsitouras (2011) with an embedded 4th-order error estimate, stepped by a PID
controller that keeps each step's estimated local error below atol + rtol |y|
(Soederlind 2002; with diffrax's default coefficients this is the classic integral
controller). Values at the evaluation times come from the solver's dense output.

A solve that fails (step budget spent, step size collapsed) returns NaN rather than the
partial solution: a theory must never pass a comparison with numbers it did not compute.
Equinox's run-time checks inside diffrax give NaN too (``EQX_ON_ERROR=nan``, set by
``harness.configure()``), which also keeps host callbacks out of the compiled program.

**Solving in pieces.** The theories do not integrate in one call: they run the solver
:data:`harness.equations.iid.STEPS_PER_PIECE` steps at a time (:func:`integrate_piece`, driven by
:func:`solve_in_pieces`). Between pieces control comes back to Python, which reports how
much of the time range is covered (:func:`reporting_progress`, the run's progress line) and
lets a Ctrl-C through within a piece's time. A piece ends wherever its last step ended,
and the next one continues from everything the solver had there: the state, Tsit5's
first-same-as-last derivative, the controller's error history and its proposal for the
next step (kept by :class:`_PIDRememberingProposal`). The steps are therefore the very steps
of one uninterrupted solve, and so are the results: bit for bit, whatever the piece size
(tests/test_solve_pieces.py), with no step restarted, no interpolation at the joins and no
effect on accuracy. What pieces cost is one call and one copy of the values to the host per
piece (~5 ms each; the default scenario's theory takes seven pieces). The first step is a
fixed small fraction of the time range (:func:`start_carry`), not diffrax's estimate.

**Compile time.** A piece is one compiled program per shape, and compiling it is most of a
first run's theory time, so two choices keep it small: the seeds are solved one after
another inside the program (:func:`one_seed_at_a_time`), not vmapped, and there is no
automatic first-step estimate (two more copies of the right-hand side); each is measured where
it is defined. Skipping LLVM's optimisation passes (``xla_backend_optimization_level=0``) was
tried and not kept: 0.1-1.7 s less compiling, but the relu solve ran 2.8x slower.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from contextlib import contextmanager
from contextvars import ContextVar
from typing import Any, NamedTuple

import diffrax
import jax
import jax.numpy as jnp
import numpy as np

Array = jax.Array
PyTree = Any

def integrate(
    field: Callable[[Array, PyTree], PyTree],
    y0: PyTree,
    ts: Array,
    *,
    rtol: float,
    atol: float,
    max_steps: int,
    observe: Callable[[Array, PyTree], PyTree] | None = None,
) -> tuple[PyTree, Array]:
    """Solve dy/dt = field(t, y) from y0 at ts[0], returning (observe(t, y) at every ts, accepted steps).

    ``observe`` defaults to the state itself. Every leaf of the result is NaN if the solve
    failed. Traceable: call it inside jit/vmap. One piece, for short solves inside other
    programs (fixed points); the theories use :func:`integrate_piece` and :func:`solve_in_pieces`.
    """
    saveat = diffrax.SaveAt(ts=ts) if observe is None else diffrax.SaveAt(ts=ts, fn=lambda t, y, args: observe(t, y))
    solution = diffrax.diffeqsolve(
        diffrax.ODETerm(lambda t, y, args: field(t, y)),
        diffrax.Tsit5(),
        t0=ts[0],
        t1=ts[-1],
        dt0=None,
        y0=y0,
        saveat=saveat,
        stepsize_controller=diffrax.PIDController(rtol=rtol, atol=atol),
        max_steps=max_steps,
        throw=False,
    )
    nan = jnp.where(solution.result == diffrax.RESULTS.successful, 0.0, jnp.nan)
    return jax.tree_util.tree_map(lambda leaf: leaf + nan, solution.ys), solution.stats["num_steps"]



# ----------------------------------------------------------------- solving in pieces


class _PIDRememberingProposal(diffrax.PIDController):
    """diffrax's PID controller that also keeps, in its state, where it proposes the next step to end.

    A piece of a solve stops after a fixed number of steps; the next piece passes this
    proposal back as its first step (with the rest of the controller's state and the
    solver's first-same-as-last derivative), so the pieces step exactly where one solve would.
    """

    def init(self, terms, t0, t1, y0, dt0, args, func, error_order):  # noqa: ANN001, ANN201
        tnext, state = super().init(terms, t0, t1, y0, dt0, args, func, error_order)
        return tnext, (state, tnext)

    def adapt_step_size(self, t0, t1, y0, y1_candidate, args, y_error, error_order, controller_state):  # noqa: ANN001, ANN201
        keep, next_t0, next_t1, made_jump, state, result = super().adapt_step_size(
            t0, t1, y0, y1_candidate, args, y_error, error_order, controller_state[0]
        )
        return keep, next_t0, next_t1, made_jump, (state, next_t1), result


class Carry(NamedTuple):
    """Where one seed's solve stands between pieces (a leading seed axis when batched)."""

    t: Array  # the time reached
    y: PyTree  # the state there
    controller: PyTree  # the step-size controller's state, its next proposed step end included
    solver: PyTree  # Tsit5's state: (first step?, the derivative at t)


PIECE_COMPILER_OPTIONS: dict[str, Any] = {"xla_cpu_use_fusion_emitters": False}
"""XLA options for compiling a piece (``jax.jit(..., compiler_options=PIECE_COMPILER_OPTIONS)``).

XLA's CPU backend emits its fused loops through either its newer MLIR-based emitters or its
older LLVM IR emitters; for a piece (a while loop of small element-wise fusions) the older
ones compile 1-1.8 s faster and run 10-30 % slower. A theory's solve is tenths of a second
and its compile is seconds, so the older emitters win. Measured on the benchmark scenarios
(benchmarks/scenarios), one piece for 16 (relu, erf) or 8 (tanh) seeds, compile then one call,
new emitters against old: relu K = 3 5.1-5.3 s and 77-85 ms against 3.4-3.7 s and 86-100 ms;
tanh K = 2 3.5 s and 262 ms against 2.6 s and 293 ms; erf K = 3 3.5 s and 16 ms against
2.5 s and 21 ms. The option changes how XLA writes its loops, not what they compute, so the
results agree to rounding (the baselines and the scipy references hold).
"""


RUNNING, DONE, FAILED = 0, 1, 2
"""A seed's status after a piece: steps left to take, the final time reached, the solve failed."""


FIRST_STEP = 1e-6
"""A solve's first step, as a fraction of its time range (the controller then grows it by at most 10x a step)."""


def start_carry(t0: np.ndarray, y0: PyTree, t1: np.ndarray) -> Carry:
    """The carry before the first piece of solves from ``t0`` to ``t1``, as host (numpy) arrays.

    Element-wise, so one call makes every seed's carry (``t0``, ``t1`` of shape ``[S]``, the
    leaves of ``y0`` ``[S, ...]``). Built on the host, not in a compiled program: the pieces'
    jit places host arrays on the devices as it splits the seeds, where arrays already on one
    device would first be resharded (a small program compiled for each argument's shape).

    The first step is :data:`FIRST_STEP` of the range. The usual automatic choice (Hairer,
    Norsett & Wanner, Solving ODEs I, section II.4) costs two evaluations of the right-hand
    side, and each evaluation written into a program is compiled again (1.5 s for the relu
    averages at K = 3, M = 2); a step that is surely small enough costs instead the few steps
    the controller needs to grow it (factor 10 at most per step). On the default scenario a
    seed's solve takes 89-102 steps, against 86-103 with the estimate, and every step is held
    to the same tolerance either way.
    """
    t0 = np.asarray(t0, np.float64)
    y0 = jax.tree_util.tree_map(lambda leaf: np.asarray(leaf, np.float64), y0)
    one = np.ones_like(t0)
    first_end = t0 + FIRST_STEP * (np.asarray(t1, np.float64) - t0)
    return Carry(
        t0, y0, ((one, one, np.zeros_like(t0, dtype=bool)), first_end),
        (np.ones_like(t0, dtype=bool), jax.tree_util.tree_map(np.zeros_like, y0)),
    )


def one_seed_at_a_time(solve_one: Callable[..., Any], shared: int) -> Callable[..., Any]:
    """``solve_one`` applied to each seed in turn (``lax.map``); the last ``shared`` arguments are common to all.

    Why not ``vmap``: a vmapped solve is a batched while loop, whose every branch becomes a
    select over all seeds; tracing it costs ~40 % more and it compiles slower, while the solve
    runs about as fast. Measured on the benchmark scenarios (benchmarks/scenarios), a theory's
    compile time from a cold cache and then its solve, in turn against vmapped: relu K = 3,
    16 seeds 7.3 s and 0.17 s against 9.3 s and 0.15 s; tanh K = 2, 8 seeds 6.7 s and 0.34 s
    against 7.7 s and 0.46 s; erf K = 3 6.4 s and 0.06 s against 9.2 s and 0.05 s. In turn, a
    seed's numbers also cannot depend on which other seeds share its batch.
    """

    def each(*args: Any) -> Any:
        own, common = args[: len(args) - shared], args[len(args) - shared :]
        return jax.lax.map(lambda per_seed: solve_one(*per_seed, *common), own)

    return each


def integrate_piece(
    field: Callable[[Array, PyTree], PyTree],
    carry: Carry,
    times: Array,
    *,
    rtol: float,
    atol: float,
    steps: int,
    observe: Callable[[Array, PyTree], PyTree] | None = None,
) -> tuple[PyTree, Carry, Array, Array]:
    """At most ``steps`` more steps of a solve towards ``times[-1]``: (observed, carry, status, steps taken).

    ``observed`` holds ``observe(t, y)`` at every one of ``times``; entries before the
    carry's time or beyond the time reached are meaningless (the caller keeps the new ones).
    Every piece continues from the carry (:func:`start_carry` for the first). A state that is
    not finite (a failed seed) is not stepped. Traceable: call it inside jit/vmap.
    """
    observe = observe if observe is not None else (lambda t, y: y)
    term = diffrax.ODETerm(lambda t, y, args: field(t, y))
    solver = diffrax.Tsit5()
    controller = _PIDRememberingProposal(rtol=rtol, atol=atol)
    t_end = times[-1]
    finite = jnp.all(jnp.stack([jnp.all(jnp.isfinite(leaf)) for leaf in jax.tree_util.tree_leaves(carry.y)]))
    end = jnp.where(finite, t_end, carry.t)
    dt0 = jnp.clip(carry.controller[1] - carry.t, 0.0, end - carry.t)
    solution = diffrax.diffeqsolve(
        term, solver, t0=carry.t, t1=end, dt0=dt0, y0=carry.y,
        saveat=diffrax.SaveAt(
            subs=[
                diffrax.SubSaveAt(ts=jnp.clip(times, carry.t, end), fn=lambda t, y, args: observe(t, y)),
                diffrax.SubSaveAt(t1=True),
            ],
            controller_state=True, solver_state=True,
        ),
        stepsize_controller=controller, solver_state=carry.solver, controller_state=carry.controller,
        made_jump=False, max_steps=steps, throw=False,
        # nothing differentiates a piece: the forward-only loop traces its body once, not twice (~0.2 s)
        adjoint=diffrax.ForwardMode(),
    )
    going_on = solution.result == diffrax.RESULTS.max_steps_reached
    ok = finite & ((solution.result == diffrax.RESULTS.successful) | going_on)
    status = jnp.where(ok, jnp.where(going_on, RUNNING, DONE), FAILED)
    nan = jnp.where(ok, 0.0, jnp.nan)
    observed, final = solution.ys
    new = Carry(
        jnp.where(ok, solution.ts[1][0], carry.t),
        jax.tree_util.tree_map(lambda leaf: leaf[0] + nan, final),
        solution.controller_state,
        solution.solver_state,
    )
    return observed, new, status, solution.stats["num_steps"]


ProgressReport = Callable[[float, float], None]
"""``report(t_covered, t_total)``: called after each piece of a solve."""

_REPORT: ContextVar[ProgressReport | None] = ContextVar("harness_solve_progress", default=None)


@contextmanager
def reporting_progress(report: ProgressReport | None) -> Iterator[None]:
    """Within the block, every solve in pieces calls ``report(t_covered, t_total)`` after each piece.

    The theories are called as ``theory(scenario, start, times)``; this is how a caller
    (harness.runner.experiment) sees their progress without a change to that signature.
    """
    token = _REPORT.set(report)
    try:
        yield
    finally:
        _REPORT.reset(token)


def solve_in_pieces(
    run_piece: Callable[[Carry], tuple[PyTree, Carry, Any, Any]],
    carry: Carry,
    times: np.ndarray,
    *,
    max_steps: int,
) -> tuple[PyTree, np.ndarray]:
    """Call a compiled piece until every seed is done; (observed ``[S, E, ...]``, accepted steps ``[S]``).

    ``run_piece(carry)`` runs :func:`integrate_piece` for every seed (leading seed
    axis S) over the evaluation ``times`` and returns ``(observed [S, E, ...], carry,
    status [S], steps [S])``. Each piece's new values (the evaluation times it passed) are
    gathered on the host; the carry stays on the devices. A seed whose solve fails, or that
    has taken ``max_steps`` steps without reaching the end, is NaN at every time.
    """
    times = np.asarray(times, np.float64)
    report = _REPORT.get()
    span = float(times[-1] - times[0])
    result: Any = None
    taken = None
    first = True
    while True:
        before = np.asarray(carry.t)
        observed, carry, status, steps = run_piece(carry)
        after, status = np.asarray(carry.t), np.asarray(status)
        taken = np.asarray(steps) if taken is None else taken + np.asarray(steps)
        # new values: the evaluation times this piece passed (and, in the first, the start itself)
        new = (times[None, :] <= after[:, None]) & ((times[None, :] > before[:, None]) | (first & (times == times[0])))
        observed = jax.tree_util.tree_map(np.asarray, observed)
        if result is None:
            result = jax.tree_util.tree_map(lambda leaf: np.full(leaf.shape, np.nan), observed)
        for kept, fresh in zip(jax.tree_util.tree_leaves(result), jax.tree_util.tree_leaves(observed), strict=True):
            where = new.reshape(new.shape + (1,) * (fresh.ndim - 2))
            np.copyto(kept, fresh, where=np.broadcast_to(where, fresh.shape))
        first = False
        failed = (status == FAILED) | ((status == RUNNING) & (taken >= max_steps))
        running = (status == RUNNING) & ~failed
        if report is not None:
            report(float((after[running].min() if running.any() else times[-1]) - times[0]), span)
        if not running.any():
            break
    for leaf in jax.tree_util.tree_leaves(result):
        leaf[failed] = np.nan
    return result, taken

"""How every built-in theory integrates its order-parameter ODEs.

One solver for all theories, so that their accuracy is set by the same two numbers
(``theory.rtol`` and ``theory.atol``): diffrax's Tsit5, the 5th-order explicit Runge-Kutta
pair of Tsitouras (2011) with an embedded 4th-order error estimate, stepped by a PID
controller that keeps each step's estimated local error below atol + rtol |y|
(Soederlind 2002; with diffrax's default coefficients this is the classic integral
controller). Values at the evaluation times come from the solver's dense output.

A solve that fails (step budget spent, step size collapsed) returns NaN rather than the
partial solution: a theory must never pass a comparison with numbers it did not compute.
Equinox's run-time checks inside diffrax give NaN too (``EQX_ON_ERROR=nan``, set in
``harness/__init__.py``), which also keeps host callbacks out of the compiled program.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import diffrax
import jax
import jax.numpy as jnp

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
    failed. Traceable: call it inside jit/vmap.
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

"""Each seed's initial conditions, drawn exactly as the simulation draws them.

The simulation draws each seed's teacher, initial student and data instance from the
seed's keys (harness.sim.simulation.draw_initial_weights); :func:`initial_state` turns those
weights into the exact initial order parameters, computed in float64, which every theory
starts from (harness.equations.sources.InitialState).
"""

from __future__ import annotations

from typing import Any

import jax
import jax.numpy as jnp
import numpy as np

from harness.equations import iid as iid_theory
from harness.equations.sources import InitialState
from harness.sim.simulation import draw_initial_weights


def initial_order_parameters(sim: Any, data_params: Any, student_w: Any, teacher_w: Any) -> tuple[Any, Any, Any]:
    """Q, R, T of every seed (leading seed axis) from its weights, computed in float64."""
    w64 = jnp.asarray(student_w, jnp.float64)
    wt64 = jnp.asarray(teacher_w, jnp.float64)
    # One compiled program for every seed (a Python loop of eager calls cost ~2 ms a seed).
    return jax.jit(jax.vmap(sim.model.order_parameters))(data_params, w64, wt64)


def initial_state(sim: Any, seed_indices: np.ndarray) -> InitialState:
    """Draw the seeds' initial weights exactly as the simulation does; overlaps in float64."""
    teacher_w, teacher_v, student_w, student_v, data_params = draw_initial_weights(sim, seed_indices)
    w64 = jnp.asarray(student_w, jnp.float64)
    wt64 = jnp.asarray(teacher_w, jnp.float64)
    Q, R, T = initial_order_parameters(sim, data_params, w64, wt64)
    ops = iid_theory.OrderParameters(
        np.asarray(Q), np.asarray(R), np.asarray(T), np.asarray(student_v, np.float64)
    )
    spectra = sim.model.spectra
    return InitialState(
        np.asarray(seed_indices), ops, np.asarray(teacher_v, np.float64),
        np.asarray(wt64), np.asarray(w64), data_params,
        None if spectra is None else spectra(data_params, np.asarray(w64), np.asarray(wt64)),
    )

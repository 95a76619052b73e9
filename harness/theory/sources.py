"""Theory predictions started from each seed's own initial conditions.

The simulation draws each seed's teacher and initial student; :func:`initial_state`
turns those weights into the exact initial order parameters, computed in float64, and
:func:`predict` hands them to the theory the scenario names (``theory.source``). Every
theory returns values in the :mod:`harness.core.trajectories` layout ``[S, E, O]``, NaN for
observables it does not predict.

Theory sources register in :data:`SOURCES` by prefix (``builtin``, and later
``python:`` and ``file:``); built-in theories register per data kind in
:data:`BUILTIN_THEORIES`.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any, NamedTuple

import jax
import jax.numpy as jnp
import numpy as np

from harness.core.scenario import Scenario
from harness.core.trajectories import observable_names, stack_observables
from harness.sim.optimizers import warn_if_not_plain_sgd
from harness.theory import iid as iid_theory

Array = Any


class InitialState(NamedTuple):
    """Everything a theory may start from, with a leading seed axis (float64 arrays)."""

    seeds: np.ndarray  # [S] seed indices
    order_parameters: iid_theory.OrderParameters  # Q [S,K,K], R [S,K,M], T [S,M,M], v [S,K]
    teacher_v: np.ndarray  # [S, M]
    teacher_w: np.ndarray  # [S, M, D]
    student_w: np.ndarray  # [S, K, N]
    data_params: Any  # the data model's per-seed parameters (e.g. F for latent models)
    # Optional, for latent models: Omega's eigen-decomposition and the weights' projections on
    # it (notes, section 4) when the data model provides them; None otherwise.
    spectrum: Any = None


class Prediction(NamedTuple):
    values: np.ndarray  # [S, E, O] in observable_names order, NaN where not predicted
    paired: bool  # False: one mean curve repeated for every seed


def initial_state(sim: Any, seed_indices: np.ndarray) -> InitialState:
    """Draw the seeds' initial weights exactly as the simulation does; overlaps in float64."""
    from harness.sim.simulation import draw_initial_weights

    teacher_w, teacher_v, student_w, student_v, data_params = draw_initial_weights(sim, seed_indices)
    w64 = jnp.asarray(student_w, jnp.float64)
    wt64 = jnp.asarray(teacher_w, jnp.float64)
    # One compiled program for every seed (a Python loop of eager calls cost ~2 ms a seed).
    Q, R, T = jax.jit(jax.vmap(sim.model.order_parameters))(data_params, w64, wt64)
    ops = iid_theory.OrderParameters(
        np.asarray(Q), np.asarray(R), np.asarray(T), np.asarray(student_v, np.float64)
    )
    spectra = sim.model.spectra
    return InitialState(
        np.asarray(seed_indices), ops, np.asarray(teacher_v, np.float64),
        np.asarray(wt64), np.asarray(w64), data_params,
        None if spectra is None else spectra(data_params, np.asarray(w64), np.asarray(wt64)),
    )


def values_from_order_parameters(
    scenario: Scenario, ops: iid_theory.OrderParameters, teacher_v: np.ndarray
) -> np.ndarray:
    """Theory observables from order-parameter trajectories ``[S, E, ...]``.

    The theory's ``test_error`` is its predicted eps_g, and so is its ``overlap_error``.
    """
    dyn = iid_theory.dynamics_of(scenario)
    e = ops.Q.shape[1]
    vt = np.broadcast_to(teacher_v[:, None, :], (teacher_v.shape[0], e, teacher_v.shape[1]))
    eps = np.asarray(iid_theory.overlap_error(dyn, ops, vt))
    trained = scenario["student"]["train_second_layer"]
    return stack_observables(eps, eps, ops.Q, ops.R, ops.T, ops.v if trained else None)


def builtin_iid(scenario: Scenario, start: InitialState, times: np.ndarray, **options: Any) -> Prediction:
    """Notes section 3, one solve per seed from its own initial order parameters."""
    dyn = iid_theory.dynamics_of(scenario, **options)
    ops = iid_theory.solve(
        dyn, start.order_parameters, start.teacher_v, times,
        rtol=scenario["theory"]["rtol"], atol=scenario["theory"]["atol"],
    )
    ops = iid_theory.OrderParameters(*(np.asarray(x) for x in ops))
    return Prediction(values_from_order_parameters(scenario, ops, start.teacher_v), paired=True)


TheoryFn = Callable[..., Prediction]

def _builtin_latent(scenario: Scenario, start: InitialState, times: np.ndarray, **options: Any) -> Prediction:
    from harness.theory.latent import builtin_latent  # lazily: it imports this module

    return builtin_latent(scenario, start, times, **options)


BUILTIN_THEORIES: dict[str, TheoryFn] = {
    "gaussian": builtin_iid, "latent": _builtin_latent, "deep_latent": _builtin_latent,
    "trained_latent": _builtin_latent,
}


def _builtin(scenario: Scenario, start: InitialState, times: np.ndarray) -> Prediction:
    kind = scenario["data"]["kind"]
    warn_if_not_plain_sgd(scenario)
    if kind not in BUILTIN_THEORIES:
        raise ValueError(
            f"theory.source = 'builtin' has no theory for data.kind = {kind!r}; "
            f"built-in theories exist for: {', '.join(BUILTIN_THEORIES)}"
        )
    return BUILTIN_THEORIES[kind](scenario, start, times)


def _no_theory(scenario: Scenario, start: InitialState, times: np.ndarray) -> Prediction:
    s = len(start.seeds)
    k, m = scenario["student"]["hidden"], scenario["teacher"]["hidden"]
    o = len(observable_names(k, m, scenario["student"]["train_second_layer"]))
    return Prediction(np.full((s, len(times), o), np.nan), paired=True)


def _user_theory(scenario: Scenario, start: InitialState, times: np.ndarray) -> Prediction:
    from harness.theory.user import predict_user  # lazily: user theories import this module

    return predict_user(scenario, start, times)


SOURCES: dict[str, TheoryFn] = {"builtin": _builtin, "none": _no_theory, "python": _user_theory, "file": _user_theory}


def predict(scenario: Scenario, start: InitialState, times: np.ndarray) -> Prediction:
    """Ask the scenario's theory source for predictions at ``times``."""
    source = scenario["theory"]["source"]
    prefix = source.split(":", 1)[0] if ":" in source else source
    if prefix not in SOURCES:
        raise ValueError(f"theory.source {source!r} is not available; known: {', '.join(SOURCES)}")
    return SOURCES[prefix](scenario, start, times)

"""Theory predictions started from each seed's own initial conditions.

The simulation draws each seed's teacher and initial student and turns those weights into
the exact initial order parameters (harness.sim.initial, an :class:`InitialState`);
:func:`predict` hands them to the theory the scenario names (``theory.source``). Every
theory returns values in the :mod:`harness.core.trajectories` layout ``[S, E, O]``, NaN for
observables it does not predict.

A theory source declares itself in one place with :func:`register_source` (``builtin`` and
``none`` here; ``python:`` and ``file:`` in harness.equations.user); the built-in theory of
each data kind with :func:`register_builtin_theory` (i.i.d. inputs here, the latent kinds
in harness.equations.latent).
"""

from __future__ import annotations

import warnings
from collections.abc import Callable
from typing import Any, NamedTuple

import numpy as np

from harness.core.keys import Key
from harness.core.scenario import Scenario, ScenarioError, chosen, declare_keys, register_choice
from harness.core.trajectories import observable_names, stack_observables
from harness.equations import iid as iid_theory

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
    # it (docs/equations.md, section 5) when the data model provides them; None otherwise.
    spectrum: Any = None


class Prediction(NamedTuple):
    values: np.ndarray  # [S, E, O] in observable_names order, NaN where not predicted
    paired: bool  # False: one mean curve repeated for every seed


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
    trained = scenario.student.train_second_layer
    return stack_observables(eps, eps, ops.Q, ops.R, ops.T, ops.v if trained else None)


def builtin_iid(scenario: Scenario, start: InitialState, times: np.ndarray, **options: Any) -> Prediction:
    """Notes section 3, one solve per seed from its own initial order parameters."""
    dyn = iid_theory.dynamics_of(scenario, **options)
    ops = iid_theory.solve(
        dyn, start.order_parameters, start.teacher_v, times,
        rtol=scenario.theory.rtol, atol=scenario.theory.atol,
    )
    ops = iid_theory.OrderParameters(*(np.asarray(x) for x in ops))
    return Prediction(values_from_order_parameters(scenario, ops, start.teacher_v), paired=True)


TheoryFn = Callable[..., Prediction]
"""``theory(scenario, start, times) -> Prediction``."""

SOURCES: dict[str, TheoryFn] = {}
"""Every registered ``theory.source`` (a key ending in ":" is a prefix: "python:", "file:")."""
BUILTIN_THEORIES: dict[str, TheoryFn] = {}
"""The built-in theory of each data kind (``theory.source = "builtin"``)."""
START_CHECKS: dict[str, Callable[[Scenario, InitialState], None]] = {}
"""Checks of the initial conditions a built-in theory needs (raise InputError), by data kind."""


def register_source(
    name: str,
    theory: TheoryFn,
    *,
    keys: dict[str, Key] | None = None,
    check: Callable[[Scenario], None] | None = None,
) -> None:
    """Make ``theory.source = name`` available (a name ending in ":" is a prefix, e.g. "file:").

    Args:
        name: the value of ``theory.source``.
        theory: ``theory(scenario, start, times) -> Prediction``.
        keys: ``[theory]`` keys this source brings.
        check: run on every resolved scenario that selects this source (raise ScenarioError).
    """
    declare_keys("theory", keys or {})
    register_choice("theory.source", name, check)
    SOURCES[name] = theory


def register_builtin_theory(
    data_kind: str, theory: TheoryFn, *, check_start: Callable[[Scenario, InitialState], None] | None = None
) -> None:
    """The theory ``theory.source = "builtin"`` uses for ``data.kind = data_kind``.

    ``check_start(scenario, start)``, if given, refuses initial conditions the theory cannot
    start from (raise InputError); :func:`check_before_simulating` runs it before a run simulates.
    """
    BUILTIN_THEORIES[data_kind] = theory
    if check_start is not None:
        START_CHECKS[data_kind] = check_start


def is_plain_sgd(scenario: Scenario) -> bool:
    """True when the simulation runs the plain SGD update the built-in theories describe."""
    return scenario.sgd.optimizer == "sgd" and scenario.sgd.weight_decay == 0.0


def warn_if_not_plain_sgd(scenario: Scenario, theory: str = "the built-in theory") -> None:
    """Warn that ``theory`` describes plain SGD when the scenario trains otherwise."""
    if is_plain_sgd(scenario):
        return
    sgd = scenario.sgd
    what = [f"sgd.optimizer = {sgd.optimizer!r}"] if sgd.optimizer != "sgd" else []
    if sgd.weight_decay != 0.0:
        what.append(f"sgd.weight_decay = {sgd.weight_decay:g}")
    warnings.warn(
        f"{theory} describes plain SGD (no momentum, no Adam, no weight decay), but the simulation uses "
        + " and ".join(what) + "; expect them to disagree",
        UserWarning,
        stacklevel=3,
    )


def _builtin(scenario: Scenario, start: InitialState, times: np.ndarray) -> Prediction:
    kind = scenario.data.kind
    warn_if_not_plain_sgd(scenario)
    if kind not in BUILTIN_THEORIES:
        raise ValueError(
            f"theory.source = 'builtin' has no theory for data.kind = {kind!r}; "
            f"built-in theories exist for: {', '.join(BUILTIN_THEORIES)}"
        )
    return BUILTIN_THEORIES[kind](scenario, start, times)


def _no_theory(scenario: Scenario, start: InitialState, times: np.ndarray) -> Prediction:
    s = len(start.seeds)
    o = len(observable_names(scenario.student.hidden, scenario.teacher.hidden, scenario.student.train_second_layer))
    return Prediction(np.full((s, len(times), o), np.nan), paired=True)


def _builtin_exists(scenario: Scenario) -> None:
    if scenario.data.kind.startswith("python:") or chosen("data.kind", scenario.data.kind) in BUILTIN_THEORIES:
        return  # a user data kind says for itself which sources work with it
    raise ScenarioError(
        f"scenario key 'theory.source': 'builtin' has no theory for data.kind = {scenario.data.kind!r}; "
        f"built-in theories exist for: {', '.join(BUILTIN_THEORIES)}"
    )


register_source("builtin", _builtin, check=_builtin_exists)
register_source("none", _no_theory)
register_builtin_theory("gaussian", builtin_iid)


def check_before_simulating(scenario: Scenario, start: InitialState, times: np.ndarray) -> None:
    """Refuse a theory that cannot work before a run spends time simulating (a run solves it afterwards).

    A built-in theory runs its checks of the initial conditions; any other source (a user's
    Python theory, a file) is asked for the first two evaluation times only, so that a theory
    that raises or returns the wrong shapes is reported at once, at the cost of a short solve.
    """
    source = chosen("theory.source", scenario.theory.source)
    if source == "none":
        return
    if source == "builtin" and scenario.data.kind in BUILTIN_THEORIES:
        check = START_CHECKS.get(scenario.data.kind)
        if check is not None:
            check(scenario, start)
        return
    predict(scenario, start, np.asarray(times)[:2])


def predict(scenario: Scenario, start: InitialState, times: np.ndarray) -> Prediction:
    """Ask the scenario's theory source for predictions at ``times``."""
    source = scenario.theory.source
    theory = SOURCES.get(chosen("theory.source", source) or "")
    if theory is None:
        raise ValueError(f"theory.source {source!r} is not available; known: {', '.join(SOURCES)}")
    return theory(scenario, start, times)

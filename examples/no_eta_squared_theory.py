"""A deliberately wrong theory: the section-3 equations without the eta^2 term.

The theory notes (section 3) point out that a hasty derivation drops the term
eta^2 v_k v_l J[k, l] from dQ_kl/dt; without it the equations are wrong at any finite
learning rate. This module exists to check that the tool *notices*: ``harness scale``
must call it inconsistent (the gap to the simulation stays finite as N grows), while the
built-in theory comes out consistent. It is not a theory to use.

    [theory]
    source = "python:examples.no_eta_squared_theory:predict"

(run from the repository root, or with this folder's parent on the Python path).
The drift and the overlap error are the built-in ones (harness.equations.iid), solved per seed
from that seed's initial conditions, so the comparison is paired.
"""

from __future__ import annotations

import numpy as np

from harness.core.trajectories import observable_names
from harness.equations.sources import InitialState, builtin_iid


def predict(scenario: dict, start: InitialState, times: np.ndarray) -> dict[str, np.ndarray]:
    """Every observable ``[S, E]`` of the section-3 equations with the eta^2 term dropped."""
    prediction = builtin_iid(scenario, start, times, second_order=False)
    names = observable_names(
        scenario["student"]["hidden"], scenario["teacher"]["hidden"], scenario["student"]["train_second_layer"]
    )
    return {name: prediction.values[:, :, i] for i, name in enumerate(names)}

"""Paired trajectories: simulation and theory for every seed, time and observable.

Observables are named as in the results tables: ``test_error``, ``overlap_error``,
``Q[i,j]``, ``R[i,m]``, ``T[m,n]`` and, when the second layer is trained, ``v[k]``
(indices from 0). In memory a run's trajectories are two arrays of shape
``[seeds, times, observables]`` (NaN marks a seed after it diverged, or a theory that
does not predict an observable); on disk they are the long table
``seed, t, observable, sim, theory``.
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np
import pandas as pd


class Trajectories(NamedTuple):
    """Simulation and theory values of one run."""

    seeds: np.ndarray  # [S] seed indices
    t: np.ndarray  # [E] evaluation times, t = steps / N
    observables: list[str]  # [O]
    sim: np.ndarray  # [S, E, O]
    theory: np.ndarray  # [S, E, O]
    paired: bool = True  # False: the theory is one mean curve, identical for every seed

    def column(self, observable: str) -> int:
        return self.observables.index(observable)

    def to_frame(self) -> pd.DataFrame:
        """The long table ``seed, t, observable, sim, theory``."""
        s, e, o = self.sim.shape
        return pd.DataFrame(
            {
                "seed": np.repeat(self.seeds, e * o).astype(np.int64),
                "t": np.tile(np.repeat(self.t, o), s),
                "observable": np.tile(np.asarray(self.observables, dtype=object), s * e),
                "sim": self.sim.reshape(-1),
                "theory": self.theory.reshape(-1),
            }
        )


def from_frame(frame: pd.DataFrame, *, paired: bool = True) -> Trajectories:
    """Rebuild :class:`Trajectories` from the long table (inverse of ``to_frame``)."""
    seeds = np.unique(frame["seed"].to_numpy())
    t = np.unique(frame["t"].to_numpy())
    observables = list(dict.fromkeys(frame["observable"]))
    index = pd.MultiIndex.from_product([seeds, t, observables], names=["seed", "t", "observable"])
    table = frame.set_index(["seed", "t", "observable"]).reindex(index)
    shape = (len(seeds), len(t), len(observables))
    return Trajectories(
        seeds, t, observables, table["sim"].to_numpy().reshape(shape),
        table["theory"].to_numpy().reshape(shape), paired,
    )


def observable_names(K: int, M: int, second_layer_trained: bool) -> list[str]:
    """Every recorded observable, in table order."""
    names = ["test_error", "overlap_error"]
    names += [f"Q[{i},{j}]" for i in range(K) for j in range(K)]
    names += [f"R[{i},{m}]" for i in range(K) for m in range(M)]
    names += [f"T[{m},{n}]" for m in range(M) for n in range(M)]
    if second_layer_trained:
        names += [f"v[{k}]" for k in range(K)]
    return names


def stack_observables(
    test_error: np.ndarray,
    overlap_error: np.ndarray,
    Q: np.ndarray,
    R: np.ndarray,
    T: np.ndarray,
    v: np.ndarray | None,
) -> np.ndarray:
    """Arrange per-seed, per-time values ``[S, E, ...]`` in :func:`observable_names` order."""
    s, e = np.shape(test_error)
    parts = [
        np.asarray(test_error)[..., None],
        np.asarray(overlap_error)[..., None],
        np.asarray(Q).reshape(s, e, -1),
        np.asarray(R).reshape(s, e, -1),
        np.asarray(T).reshape(s, e, -1),
    ]
    if v is not None:
        parts.append(np.asarray(v).reshape(s, e, -1))
    return np.concatenate(parts, axis=-1).astype(np.float64)


def observable_group(name: str) -> str:
    """``Q[0,1]`` -> ``Q``; ``test_error`` -> ``test_error``."""
    return name.split("[", 1)[0]

"""Checkpoints of a long simulation, so an interrupted run resumes where it stopped.

A run that takes hours should not start over because its machine went away. While it
simulates, :func:`harness.runner.experiment.simulate` hands its state to a :class:`Checkpointer`
after every evaluation; at most every ``run.checkpoint_minutes`` (0: never) the
checkpointer writes everything needed to continue exactly:

* the SGD state (student weights, optimizer state, step counters of every seed),
* the observations recorded so far,
* the seeds' training-stream keys and the evaluation steps, as a consistency check.

The instance (teacher, data-model parameters, test set) is not saved: it is drawn again
from the scenario's keys, identically. Because every training sample is drawn from a key
folded with its absolute step (see :mod:`harness.sim.simulation`), a resumed run feeds the
students the very same samples in the very same blocks, and its results are
bit-identical to an uninterrupted run.

Format: one ``checkpoint.npz`` per run in ``DIR/.checkpoints/<run_id>/``: arrays named
``<tree>/<leaf index>`` plus a JSON ``meta`` entry. It is written to a temporary file
and moved into place with ``os.replace``, so a reader sees the previous checkpoint or
the next one, never a part. A checkpoint that does not match the run (another run_id,
other evaluation steps or keys, other shapes) is ignored with a warning, never trusted.
"""

from __future__ import annotations

import io
import json
import shutil
import time
import warnings
from pathlib import Path
from typing import Any, NamedTuple

import jax
import numpy as np

from harness.core.files import atomic_write_bytes, json_text

FILE_NAME = "checkpoint.npz"
FORMAT_VERSION = 1


def checkpoint_folder(out_dir: str | Path, run_id: str) -> Path:
    """Where a run's checkpoint lives while it is computed: ``DIR/.checkpoints/<run_id>/``."""
    return Path(out_dir) / ".checkpoints" / run_id


def discard_checkpoint(folder: str | Path) -> None:
    """Remove a run's checkpoint folder (after its results are stored), and ``.checkpoints/`` once empty.

    The shared ``DIR/.checkpoints/`` goes with the last run's folder, so a finished run
    leaves nothing behind. ``os.rmdir`` removes only an empty folder, so the checkpoints of
    runs still going on (other points of a sweep) stay; a writer that creates its folder at
    the very moment the empty parent is removed fails to save once, warns and goes on
    without checkpoints (Checkpointer.save).
    """
    folder = Path(folder)
    shutil.rmtree(folder, ignore_errors=True)
    try:
        folder.parent.rmdir()
    except OSError:  # not empty (other runs' checkpoints) or already gone
        pass


class Restored(NamedTuple):
    """What a checkpoint gives back: the state and the records up to ``evaluations_done``."""

    evaluations_done: int
    state: Any
    records: list[Any]


def _flatten(tree: Any) -> list[np.ndarray]:
    return [np.asarray(leaf) for leaf in jax.tree_util.tree_leaves(jax.device_get(tree))]


def _signature(leaves: list[Any]) -> list[list[Any]]:
    """Shapes and dtypes of arrays (or of ``jax.ShapeDtypeStruct`` placeholders)."""
    return [[list(np.shape(leaf)), str(np.dtype(getattr(leaf, "dtype", None) or np.asarray(leaf).dtype))]
            for leaf in leaves]


class Checkpointer:
    """Saves a simulation's progress at most every ``interval_s`` seconds; restores it.

    ``identity`` holds the values a checkpoint must match to be used (run_id,
    evaluation steps, training keys); they are compared exactly on restore.
    """

    def __init__(self, folder: str | Path, interval_s: float, run_id: str, steps: np.ndarray, train_key: Any):
        self.folder = Path(folder)
        self.interval_s = float(interval_s)
        self.run_id = run_id
        self.steps = np.asarray(steps, np.int64)
        self.train_key = np.asarray(jax.device_get(train_key))
        self.last_save = time.monotonic()
        self.enabled = self.interval_s > 0
        self.saves = 0

    @property
    def path(self) -> Path:
        return self.folder / FILE_NAME

    # ------------------------------------------------------------------ writing

    def due(self) -> bool:
        return self.enabled and time.monotonic() - self.last_save >= self.interval_s

    def maybe_save(self, evaluations_done: int, state: Any, records: list[Any]) -> bool:
        """Save if the interval has passed since the last save; True if it saved."""
        if not self.due():
            return False
        self.save(evaluations_done, state, records)
        return True

    def save(self, evaluations_done: int, state: Any, records: list[Any]) -> None:
        """Write the checkpoint atomically (a failure to write warns and turns saving off)."""
        state_leaves = _flatten(state)
        stacked = jax.tree_util.tree_map(lambda *xs: np.stack(xs), *records) if records else None
        record_leaves = _flatten(stacked) if stacked is not None else []
        meta = {
            "format": FORMAT_VERSION,
            "run_id": self.run_id,
            "evaluations_done": int(evaluations_done),
            "state": _signature(state_leaves),
            "records": _signature([leaf[0] for leaf in record_leaves]),
            "saved_at": time.time(),
        }
        arrays = {f"state/{i}": leaf for i, leaf in enumerate(state_leaves)}
        arrays.update({f"records/{i}": leaf for i, leaf in enumerate(record_leaves)})
        arrays["identity/steps"] = self.steps
        arrays["identity/train_key"] = self.train_key
        arrays["meta"] = np.frombuffer(json_text(meta, indent=None).encode("utf-8"), dtype=np.uint8)
        buffer = io.BytesIO()
        np.savez(buffer, **arrays)
        try:
            atomic_write_bytes(self.path, buffer.getvalue())
        except OSError as error:
            warnings.warn(f"cannot write checkpoint '{self.path}' ({error}); going on without checkpoints",
                          RuntimeWarning, stacklevel=2)
            self.enabled = False
            return
        self.last_save = time.monotonic()
        self.saves += 1

    # ------------------------------------------------------------------ reading

    def restore(self, state_template: Any, record_template: Any) -> Restored | None:
        """The saved progress, shaped like the templates; ``None`` if there is none usable.

        ``state_template`` is the freshly initialised state, ``record_template`` one
        observation (or its ``jax.eval_shape``); their tree structures are used to
        rebuild the saved leaves, whose shapes and dtypes must match exactly.
        """
        if not self.path.is_file():
            return None
        try:
            with np.load(self.path, allow_pickle=False) as saved:
                arrays = {name: saved[name] for name in saved.files}
            meta = json.loads(arrays.pop("meta").tobytes().decode("utf-8"))
        except Exception as error:  # a damaged file is never trusted
            return self._reject(f"it cannot be read ({type(error).__name__})")
        if meta.get("format") != FORMAT_VERSION or meta.get("run_id") != self.run_id:
            return self._reject("it belongs to another run or format")
        if not np.array_equal(arrays.get("identity/steps"), self.steps):
            return self._reject("its evaluation steps differ")
        if not np.array_equal(arrays.get("identity/train_key"), self.train_key):
            return self._reject("its training-stream keys differ")
        done = int(meta["evaluations_done"])
        state_leaves, state_def = jax.tree_util.tree_flatten(jax.device_get(state_template))
        record_leaves, record_def = jax.tree_util.tree_flatten(record_template)
        if meta["state"] != _signature(state_leaves):
            return self._reject("its state has other shapes or types")
        if done > 0 and meta["records"] != _signature(record_leaves):
            return self._reject("its records have other shapes or types")
        state = jax.tree_util.tree_unflatten(
            state_def, [jax.numpy.asarray(arrays[f"state/{i}"]) for i in range(len(state_leaves))]
        )
        stacked = [arrays[f"records/{i}"] for i in range(len(record_leaves))] if done > 0 else []
        records = [
            jax.tree_util.tree_unflatten(record_def, [leaf[e] for leaf in stacked]) for e in range(done)
        ]
        return Restored(done, state, records)

    def _reject(self, why: str) -> None:
        warnings.warn(f"ignoring checkpoint '{self.path}': {why}", RuntimeWarning, stacklevel=3)
        return None


# ------------------------------------------------------------- a finished simulation

FINISHED_NAME = "simulation.npz"
"""A finished simulation's observations, kept beside the checkpoint until the run is stored."""


def save_finished(
    folder: str | Path, run_id: str, steps: np.ndarray, observations: dict[str, np.ndarray], timings: dict[str, float]
) -> None:
    """Keep a finished simulation's observations (``[S, E, ...]`` arrays by name) until its run is stored.

    A run interrupted after its simulation (in the theory, the comparison, the storing) then
    reruns without simulating again: :func:`load_finished` hands the observations back. The
    weights are not kept (nothing continues from them), so this is small whatever N is; the
    state checkpoint, of no more use, is removed. A failure to write warns, and the run goes on.
    """
    folder = Path(folder)
    meta = {"format": FORMAT_VERSION, "run_id": run_id, "fields": list(observations), "timings": timings,
            "saved_at": time.time()}
    arrays = {f"observations/{name}": np.asarray(value) for name, value in observations.items()}
    arrays["identity/steps"] = np.asarray(steps, np.int64)
    arrays["meta"] = np.frombuffer(json_text(meta, indent=None).encode("utf-8"), dtype=np.uint8)
    buffer = io.BytesIO()
    np.savez(buffer, **arrays)
    try:
        atomic_write_bytes(folder / FINISHED_NAME, buffer.getvalue())
    except OSError as error:
        warnings.warn(f"cannot keep the finished simulation in '{folder}' ({error}); an interrupted run "
                      "would simulate again", RuntimeWarning, stacklevel=2)
        return
    (folder / FILE_NAME).unlink(missing_ok=True)


def load_finished(
    folder: str | Path, run_id: str, steps: np.ndarray
) -> tuple[dict[str, np.ndarray], dict[str, float]] | None:
    """The observations and timings :func:`save_finished` kept for this run, or None (warned if unusable)."""
    path = Path(folder) / FINISHED_NAME
    if not path.is_file():
        return None
    try:
        with np.load(path, allow_pickle=False) as saved:
            arrays = {name: saved[name] for name in saved.files}
        meta = json.loads(arrays.pop("meta").tobytes().decode("utf-8"))
        observations = {name: arrays[f"observations/{name}"] for name in meta["fields"]}
    except Exception as error:  # a damaged file is never trusted
        warnings.warn(f"ignoring '{path}': it cannot be read ({type(error).__name__})", RuntimeWarning, stacklevel=2)
        return None
    if meta.get("format") != FORMAT_VERSION or meta.get("run_id") != run_id:
        warnings.warn(f"ignoring '{path}': it belongs to another run or format", RuntimeWarning, stacklevel=2)
        return None
    if not np.array_equal(arrays.get("identity/steps"), np.asarray(steps, np.int64)):
        warnings.warn(f"ignoring '{path}': its evaluation steps differ", RuntimeWarning, stacklevel=2)
        return None
    return observations, dict(meta.get("timings") or {})

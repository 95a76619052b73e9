"""Checkpoints of long runs: atomic, checked before use, and resumed bit-identically."""

from __future__ import annotations

import warnings

import jax.numpy as jnp
import numpy as np
import pandas as pd
import pytest

from harness.core import scenario as scenario_lib
from harness.core.trajectories import Trajectories
from harness.runner.checkpoint import FILE_NAME, Checkpointer, checkpoint_folder, discard_checkpoint
from harness.runner.experiment import simulate
from harness.runner.pipeline import run_and_store

TINY = {
    "data": {"input_dim": 50},
    "sgd": {"time": 6.0},
    "run": {"seeds": 2, "evaluations": 9, "test_samples": 200, "checkpoint_minutes": 1e-9},
}


class Interrupted(Exception):
    pass


def test_interrupted_run_resumes_from_its_checkpoint_bit_identically(tmp_path):
    scenario = scenario_lib.resolve(TINY | {"theory": {"source": "none"}})
    reference = simulate(scenario)  # uninterrupted, no checkpoints
    folder = checkpoint_folder(tmp_path, scenario_lib.run_id(scenario))
    crash_step = int(reference.steps[3])

    def crash_after_four(done: int, total: int) -> None:
        if done == crash_step:
            raise Interrupted  # the machine goes away right after the fourth evaluation

    with pytest.raises(Interrupted):
        simulate(scenario, progress=crash_after_four, checkpoint_dir=folder)
    assert (folder / FILE_NAME).is_file()

    resumed_steps: list[int] = []
    with warnings.catch_warnings():
        warnings.simplefilter("error", RuntimeWarning)  # a usable checkpoint raises no warning
        stored = run_and_store(scenario, tmp_path, progress=lambda done, total: resumed_steps.append(done))
    # `harness run` continued from the fourth evaluation: the first four were not simulated again.
    assert stored.manifest["resumed_from_step"] == crash_step
    assert resumed_steps == [int(s) for s in reference.steps[4:]]
    assert not folder.exists()  # stored: the checkpoint is of no more use
    assert sorted(p.name for p in tmp_path.iterdir() if p.name.startswith(".")) == [".runs.lock"]  # no .checkpoints/
    # Bit-identical, not merely close: same samples, same blocks, same arithmetic.
    table = pd.read_parquet(stored.folder / "trajectories.parquet")
    expected = Trajectories(reference.seeds, reference.t, table["observable"].unique().tolist(),
                            reference.values, reference.values).to_frame()
    assert np.array_equal(table["sim"].to_numpy(), expected["sim"].to_numpy(), equal_nan=True)
    assert np.array_equal(table["t"].to_numpy(), expected["t"].to_numpy())


def _state():
    return {"w": jnp.arange(6.0, dtype=jnp.float32).reshape(2, 3), "step": jnp.array([5, 5], dtype=jnp.int64)}


def _checkpointer(folder, *, run_id="abc", steps=(0, 5, 10), key=(1, 2), interval_s=1e-9):
    return Checkpointer(folder, interval_s, run_id, np.array(steps), np.array(key, dtype=np.uint32))


def test_discarding_the_last_checkpoint_removes_the_checkpoints_folder(tmp_path):
    # Two runs in one results folder (a sweep's points): the first stored keeps the other's checkpoint.
    first, second = checkpoint_folder(tmp_path, "run-a"), checkpoint_folder(tmp_path, "run-b")
    for folder in (first, second):
        assert _checkpointer(folder).maybe_save(1, _state(), [{"e": np.array([0.5])}])
    discard_checkpoint(first)
    assert not first.exists() and (second / FILE_NAME).is_file()
    discard_checkpoint(second)
    assert not (tmp_path / ".checkpoints").exists()
    discard_checkpoint(second)  # nothing left to discard: no error
    assert list(tmp_path.iterdir()) == []


def test_checkpoint_round_trip_and_atomic_file(tmp_path):
    records = [{"e": np.array([0.5, 0.25])}, {"e": np.array([0.125, 1.0])}]
    writer = _checkpointer(tmp_path)
    assert writer.maybe_save(2, _state(), records)
    # Only the final file is there: the temporary one was moved into place.
    assert sorted(p.name for p in tmp_path.iterdir()) == [FILE_NAME]
    restored = _checkpointer(tmp_path).restore(_state(), {"e": np.zeros(2)})
    assert restored is not None and restored.evaluations_done == 2
    np.testing.assert_array_equal(restored.state["w"], np.asarray(_state()["w"]))
    assert restored.state["w"].dtype == jnp.float32 and restored.state["step"].dtype == jnp.int64
    assert [float(r["e"][0]) for r in restored.records] == [0.5, 0.125]


@pytest.mark.parametrize(
    "change, why",
    [
        ({"run_id": "other"}, "another run"),
        ({"steps": (0, 5, 11)}, "evaluation steps differ"),
        ({"key": (1, 3)}, "keys differ"),
    ],
)
def test_a_checkpoint_of_something_else_is_ignored_with_a_warning(tmp_path, change, why):
    _checkpointer(tmp_path).save(1, _state(), [{"e": np.zeros(2)}])
    with pytest.warns(RuntimeWarning, match=why):
        assert _checkpointer(tmp_path, **change).restore(_state(), {"e": np.zeros(2)}) is None


def test_damaged_or_reshaped_checkpoints_are_never_trusted(tmp_path):
    _checkpointer(tmp_path).save(1, _state(), [{"e": np.zeros(2)}])
    other_shape = {"w": jnp.zeros((2, 4), jnp.float32), "step": jnp.zeros(2, jnp.int64)}
    with pytest.warns(RuntimeWarning, match="other shapes"):
        assert _checkpointer(tmp_path).restore(other_shape, {"e": np.zeros(2)}) is None
    (tmp_path / FILE_NAME).write_bytes(b"PK\x03\x04 not really a zip file")
    with pytest.warns(RuntimeWarning, match="cannot be read"):
        assert _checkpointer(tmp_path).restore(_state(), {"e": np.zeros(2)}) is None


def test_interval_zero_never_saves_and_an_interval_is_respected(tmp_path):
    off = _checkpointer(tmp_path, interval_s=0.0)
    assert not off.maybe_save(1, _state(), [])
    hourly = _checkpointer(tmp_path, interval_s=3600.0)
    assert not hourly.maybe_save(1, _state(), [])  # the first save comes an interval after the start
    assert not (tmp_path / FILE_NAME).exists()


def test_unwritable_checkpoint_folder_warns_and_the_run_goes_on(tmp_path):
    blocker = tmp_path / "not-a-folder"
    blocker.write_text("a file where the checkpoint folder should be")
    writer = _checkpointer(blocker / "run")
    with pytest.warns(RuntimeWarning, match="going on without checkpoints"):
        writer.save(1, _state(), [])
    assert not writer.enabled

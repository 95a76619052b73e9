"""Ctrl-C: heard within two seconds in every phase of a run, nothing half-written, finished work kept.

The end-to-end test drives ``harness run`` in a subprocess and sends it SIGINT during the
simulation and during the theory (harness.core.interrupts, harness.runner.experiment); the
others check the pieces in-process.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from harness.cli.main import main
from harness.core import interrupts
from harness.core import scenario as scenario_lib
from harness.runner import experiment
from harness.runner.checkpoint import FILE_NAME, FINISHED_NAME, checkpoint_folder
from harness.runner.pipeline import run_and_store

REPO = Path(__file__).resolve().parents[1]
TINY = {
    "data": {"input_dim": 50},
    "sgd": {"time": 6.0},
    "run": {"seeds": 2, "evaluations": 9, "test_samples": 200},
}


def test_deferred_holds_a_ctrl_c_until_the_state_is_replaced():
    replaced = []
    with pytest.raises(KeyboardInterrupt):
        with interrupts.deferred():
            os.kill(os.getpid(), signal.SIGINT)
            time.sleep(0.05)  # Python runs its handler here: held, not raised
            replaced.append(True)
    assert replaced == [True]
    assert signal.getsignal(signal.SIGINT) is signal.default_int_handler


def test_slices_of_the_simulation_change_no_bit(monkeypatch):
    # The simulator stops between evaluation times wherever a slice of ~SLICE_S seconds ends;
    # every sample is keyed by its absolute step, so the results cannot depend on where.
    scenario = scenario_lib.resolve(TINY | {"theory": {"source": "none"}})
    whole = experiment.simulate(scenario)
    monkeypatch.setattr(experiment, "SLICE_S", 1e-9)  # slices of one block of steps
    sliced = experiment.simulate(scenario)
    assert np.array_equal(whole.values, sliced.values, equal_nan=True)


def test_a_ctrl_c_in_the_theory_keeps_the_finished_simulation_for_the_next_run(tmp_path):
    scenario = scenario_lib.resolve(TINY)
    folder = checkpoint_folder(tmp_path, scenario_lib.run_id(scenario))

    def interrupt(covered: float, total: float) -> None:
        raise KeyboardInterrupt  # as a Ctrl-C heard between two pieces of the solve

    with pytest.raises(KeyboardInterrupt):
        experiment.run_experiment(scenario, checkpoint_dir=folder, theory_progress=interrupt)
    assert (folder / FINISHED_NAME).is_file() and not (folder / FILE_NAME).exists()
    assert not (tmp_path / scenario_lib.run_id(scenario)).exists()

    simulated_steps: list[int] = []
    stored = run_and_store(scenario, tmp_path, progress=lambda done, total: simulated_steps.append(done))
    assert simulated_steps == []  # not simulated again
    final_step = int(experiment.time_grid.evaluation_steps(scenario)[-1])
    assert stored.manifest["resumed_from_step"] == final_step
    assert stored.manifest["timings"]["simulation_s"] > 0  # the simulation's own cost, kept with it
    assert not folder.exists()
    reference = experiment.simulate(scenario)
    table = pd.read_parquet(stored.folder / "trajectories.parquet")
    assert np.array_equal(table["sim"].to_numpy(), reference.values.reshape(-1), equal_nan=True)


# ------------------------------------------------------------------ the command, end to end


def _start(scenario_file: Path, out: Path, env: dict[str, str]) -> tuple[subprocess.Popen, list[str]]:
    """``harness run`` in a subprocess whose stderr lines are collected as they come."""
    # Ctrl-C's handler set in the child itself: a process started in the background inherits
    # SIGINT ignored, and Python then installs none (a preexec_fn would fork a threaded process)
    command = ("import runpy, signal; signal.signal(signal.SIGINT, signal.default_int_handler); "
               "runpy.run_module('harness', run_name='__main__')")
    process = subprocess.Popen(
        [sys.executable, "-c", command, "run", str(scenario_file), "--out", str(out)],
        cwd=REPO, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
    )
    lines: list[str] = []
    threading.Thread(target=lambda: lines.extend(process.stderr), daemon=True).start()
    return process, lines


def _interrupt_when(process: subprocess.Popen, lines: list[str], seen) -> tuple[float, list[str]]:
    """Wait until ``seen(line)`` for some stderr line, send SIGINT; (seconds until exit, stderr lines)."""
    deadline = time.monotonic() + 300
    while not any(seen(line) for line in list(lines)):
        assert process.poll() is None, "".join(lines)
        assert time.monotonic() < deadline, "".join(lines)
        time.sleep(0.02)
    sent = time.monotonic()
    process.send_signal(signal.SIGINT)
    try:
        process.wait(timeout=60)
    except subprocess.TimeoutExpired:
        process.kill()
        raise
    took = time.monotonic() - sent
    time.sleep(0.2)  # the reader thread takes the last lines
    return took, [line.rstrip("\n") for line in lines]


def _nothing_half_written(out: Path, run_id: str) -> None:
    assert not (out / run_id).exists() and not (out / "runs.parquet").exists()
    assert [p for p in out.rglob("*") if ".partial" in p.name or ".retired" in p.name] == []


def _interrupt_line(lines: list[str]) -> str:
    messages = [line for line in lines if line.startswith("harness: ")]
    assert len(messages) == 1 and lines[-1] == messages[0], lines  # one line, the last one
    assert messages[0].startswith(interrupts.MESSAGE)
    return messages[0]


def test_ctrl_c_in_the_simulation_and_in_the_theory_exits_fast_and_a_rerun_goes_on(tmp_path, capsys):
    scenario_file = tmp_path / "scenario.toml"
    scenario_file.write_text(
        "[data]\ninput_dim = 200\n[sgd]\ntime = 1000.0\n[run]\nseeds = 2\ntest_samples = 200\n"
        '[theory]\nsource = "python:interrupt_theory:predict"\n'
    )
    out = tmp_path / "results"
    scenario = scenario_lib.load(scenario_file)
    run_id = scenario_lib.run_id(scenario)
    kept = checkpoint_folder(out, run_id)
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(REPO), str(REPO / "tests")]))

    # 1. Ctrl-C while simulating (after a tenth of the steps): its progress is saved.
    process, lines = _start(scenario_file, out, env)
    took, lines = _interrupt_when(process, lines, lambda line: line.startswith("simulating") and " 0.0%" not in line)
    assert process.returncode == 130 and took < 2.0, (took, lines)
    assert "progress is kept" in _interrupt_line(lines)
    _nothing_half_written(out, run_id)
    assert (kept / FILE_NAME).is_file()

    # 2. The rerun continues the simulation, finishes it, and is stopped in a theory stuck in
    #    one long compiled call: the watchdog ends it, and the finished simulation is kept.
    process, lines = _start(scenario_file, out, env | {"HARNESS_TEST_SLOW_THEORY": "1"})
    took, lines = _interrupt_when(process, lines, lambda line: line.startswith("simulating") and "100.0%" in line)
    simulating = [line for line in lines if line.startswith("simulating")]
    assert " 0.0%" not in simulating[0], simulating  # resumed, not started again
    assert process.returncode == 130 and took < 2.0, (took, lines)
    assert "finished simulation is kept" in _interrupt_line(lines)
    _nothing_half_written(out, run_id)
    assert (kept / FINISHED_NAME).is_file()

    # 3. The last rerun only solves the theory, judges and stores. No signal is sent, so it
    #    runs in this process (the same command, its exit status main's return value), which
    #    saves starting a third interpreter.
    capsys.readouterr()
    status = main(["run", str(scenario_file), "--out", str(out)])
    lines = capsys.readouterr().err.splitlines()
    assert status in (0, 1, 3), "\n".join(lines)
    assert not any(line.startswith("simulating") for line in lines), lines
    assert any(line.startswith("theory") for line in lines), lines  # progress is shown: the check sees it
    manifest = json.loads((out / run_id / "manifest.json").read_text())
    assert manifest["resumed_from_step"] == round(1000.0 * 200)
    assert not kept.exists()

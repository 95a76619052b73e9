"""Sweeps: files validated point by point, executors, crash safety, determinism, CRN."""

from __future__ import annotations

import contextlib
import io
import json
import os
import re
import signal
import subprocess
import sys
import threading
import time
import types
from pathlib import Path

import jax
import numpy as np
import pandas as pd
import pytest
from real_results import InProcessExecutor

from harness.cli.main import main
from harness.core import scenario as scenario_lib
from harness.core.files import is_abandoned, staging_folder
from harness.results.store import append_index_row, is_complete_run, read_index, remove_index_leftovers
from harness.runner.checkpoint import FILE_NAME
from harness.runner.experiment import simulate
from harness.sim import simulation
from harness.studies import sweep

# Tiny points: N = 50, 2 seeds, t = 12, a checkpoint after every evaluation.
TINY = """
[data]
input_dim = 50
[sgd]
time = 12.0
[run]
seeds = 2
evaluations = 10
test_samples = 200
checkpoint_minutes = 1e-9
"""


def _write(path: Path, text: str) -> Path:
    path.write_text(text)
    return path


def _error_of(path: Path) -> str:
    with pytest.raises(scenario_lib.ScenarioError) as caught:
        sweep.load_sweep(path)
    message = str(caught.value)
    assert "\n" not in message
    return message


# ------------------------------------------------------------------- sweep files


def test_grid_is_the_product_last_key_fastest_and_zip_pairs(tmp_path):
    grid = sweep.load_sweep(_write(tmp_path / "g.toml", TINY + """
[sweep]
"sgd.learning_rate" = [0.1, 0.2, 0.3]
student.hidden = [1, 2]
"""))
    assert grid.mode == "grid" and grid.swept_keys == ["sgd.learning_rate", "student.hidden"]
    assert grid.points == [{"sgd.learning_rate": lr, "student.hidden": k} for lr in (0.1, 0.2, 0.3) for k in (1, 2)]
    assert [s["student"]["hidden"] for s in grid.scenarios] == [1, 2] * 3
    # The derived default second layer follows the swept hidden size.
    assert grid.scenarios[1]["student"]["second_layer"] == (1.0, 1.0)
    assert len(set(grid.run_ids)) == 6

    paired = sweep.load_sweep(_write(tmp_path / "z.toml", TINY + """
[sweep]
mode = "zip"
"sgd.learning_rate" = [0.1, 0.2]
"data.input_dim" = [40, 80]
"""))
    assert [(s["sgd"]["learning_rate"], s["data"]["input_dim"]) for s in paired.scenarios] == [(0.1, 40), (0.2, 80)]
    # Keys not swept keep the file's values.
    assert all(s["run"]["seeds"] == 2 for s in paired.scenarios)


@pytest.mark.parametrize(
    "table, expected",
    [
        ('"sgd.learning_rte" = [0.1]', "sweep key 'sgd.learning_rte' in '*' is not a scenario key"),
        ('"learning_rate" = [0.1]', "sweep key 'learning_rate' in '*' is not a scenario key"),
        ('"sgd.learning_rate" = 0.1', "sweep key 'sgd.learning_rate' in '*': expected a list of values, got 0.1"),
        ('"sgd.learning_rate" = []', "sweep key 'sgd.learning_rate' in '*': expected a non-empty list"),
        ('mode = "product"\n"sgd.learning_rate" = [0.1]', "sweep key 'mode' in '*': must be one of 'grid', 'zip'"),
        ('mode = "grid"', "[sweep] names no scenario key to vary"),
        ('mode = "zip"\n"sgd.learning_rate" = [0.1, 0.2]\n"student.hidden" = [1, 2, 3]',
         "every list must have the same length; 'sgd.learning_rate' has 2, 'student.hidden' has 3"),
        ('jobqueue = 3\n"sgd.learning_rate" = [0.1]', "sweep key 'jobqueue' in '*': must be a table"),
    ],
)
def test_bad_sweep_tables_are_one_line_errors_naming_the_key(tmp_path, table, expected):
    path = _write(tmp_path / "s.toml", TINY + "[sweep]\n" + table + "\n")
    assert expected.replace("'*'", f"'{path}'") in _error_of(path)


def test_an_invalid_point_names_its_index_values_and_key(tmp_path):
    path = _write(tmp_path / "s.toml", TINY + """
[sweep]
"student.hidden" = [1, 2]
"sgd.learning_rate" = [0.5, -1.0]
""")
    assert _error_of(path) == (
        "sweep point 1 (student.hidden=1, sgd.learning_rate=-1.0): "
        "scenario key 'sgd.learning_rate': must be a finite number > 0, got -1.0"
    )
    typed = _write(tmp_path / "t.toml", TINY + '[sweep]\n"data.input_dim" = [50, 60.5]\n')
    assert _error_of(typed) == (
        "sweep point 1 (data.input_dim=60.5): scenario key 'data.input_dim': expected an integer, got 60.5"
    )


def test_base_problems_are_reported_as_such_and_repeats_refused(tmp_path):
    typo = _write(tmp_path / "b.toml", TINY + '[sgd2]\nx = 1\n[sweep]\n"sgd.learning_rate" = [0.1]\n')
    assert _error_of(typo).startswith(f"sweep file '{typo}': scenario section 'sgd2' is unknown")
    missing = _write(tmp_path / "m.toml", TINY)
    assert "has no [sweep] table" in _error_of(missing)
    repeat = _write(tmp_path / "r.toml", TINY + '[sweep]\n"sgd.learning_rate" = [0.1, 0.2, 0.1]\n')
    assert "sweep points 0 (sgd.learning_rate=0.1) and 2 (sgd.learning_rate=0.1) are the same scenario" in _error_of(
        repeat
    )


def test_common_random_numbers_off_gives_each_point_its_own_stable_seed(tmp_path):
    on = sweep.load_sweep(_write(tmp_path / "on.toml", TINY + '[sweep]\n"sgd.learning_rate" = [0.1, 0.2]\n'))
    assert [s["run"]["seed"] for s in on.scenarios] == [0, 0]
    off_text = TINY.replace("[run]", "[run]\ncommon_random_numbers = false\nseed = 7") + (
        '[sweep]\n"sgd.learning_rate" = [0.1, 0.2]\n'
    )
    off = sweep.load_sweep(_write(tmp_path / "off.toml", off_text))
    seeds = [s["run"]["seed"] for s in off.scenarios]
    assert seeds[0] != seeds[1] and all(0 <= s < 2**31 for s in seeds)
    assert seeds == [sweep.independent_seed(7, p) for p in off.points]
    assert off.run_ids == sweep.load_sweep(tmp_path / "off.toml").run_ids  # stable: a rerun resumes


def test_cli_rejects_a_bad_sweep_file_with_one_line_and_status_2(tmp_path, capsys):
    path = _write(tmp_path / "s.toml", TINY + '[sweep]\n"sgd.learning_rate" = [0.5, 0.0]\n')
    assert main(["sweep", str(path), "--out", str(tmp_path / "out")]) == 2
    err = capsys.readouterr().err.strip()
    assert err.count("\n") == 0 and "sweep point 1 (sgd.learning_rate=0.0)" in err
    assert not (tmp_path / "out").exists()  # nothing was started


def test_cli_list_shows_points_and_runs_nothing(tmp_path, capsys):
    path = _write(tmp_path / "s.toml", TINY + '[sweep]\n"sgd.learning_rate" = [0.5, 0.25]\n')
    assert main(["sweep", str(path), "--out", str(tmp_path / "out"), "--list"]) == 0
    lines = capsys.readouterr().out.strip().splitlines()
    assert len(lines) == 2 and "to do" in lines[0] and "sgd.learning_rate=0.25" in lines[1]
    assert not (tmp_path / "out").exists()


# --------------------------------------------------------------------- jobqueue


def test_jobqueue_options_come_from_the_config_section():
    options, jobs = sweep.jobqueue_options({
        "cores": 8, "memory": "16GB", "walltime": "02:00:00", "queue": "short", "account": "proj42", "jobs": 3,
        "extra_directives": ["--constraint=cpu"], "setup_commands": ["module load python"],
    })
    assert jobs == 3
    assert options == {
        "cores": 8, "memory": "16GB", "walltime": "02:00:00", "queue": "short", "account": "proj42",
        "job_extra_directives": ["--constraint=cpu"],
        "processes": 8,  # one single-threaded worker process per core
        "job_script_prologue": [f"export XLA_FLAGS='{sweep.SINGLE_THREAD_XLA_FLAGS}'",
                                "export HARNESS_CPU_DEVICES='1'", "module load python"],
    }


@pytest.mark.parametrize(
    "table, expected",
    [
        ({"cores": 4}, "sweep key 'jobqueue.memory' is missing"),
        ({"cores": 4, "memory": "8GB", "nodes": 2}, "sweep key 'jobqueue.nodes' is unknown"),
        ({"cores": 0, "memory": "8GB"}, "sweep key 'jobqueue.cores': must be an integer >= 1, got 0"),
        ({"cores": 2, "memory": "8GB", "processes": 4}, "must be at most jobqueue.cores"),
    ],
)
def test_bad_jobqueue_sections_are_one_line_errors(table, expected):
    with pytest.raises(sweep.SweepError, match=expected.replace("[", r"\[")):
        sweep.jobqueue_options(table)


def test_jobqueue_builds_the_cluster_it_is_configured_for(monkeypatch):
    # A stand-in for dask-jobqueue that records how it is called; the real package
    # starts batch jobs, which no test machine can do.
    made = []

    class FakeCluster:
        def __init__(self, **options):
            self.options, self.scaled = options, None
            made.append(self)

        def scale(self, jobs):
            self.scaled = jobs

    fake = types.SimpleNamespace(SLURMCluster=type("SLURMCluster", (FakeCluster,), {}),
                                 PBSCluster=type("PBSCluster", (FakeCluster,), {}))
    monkeypatch.setitem(sys.modules, "dask_jobqueue", fake)

    class FakeClient:
        def __init__(self, cluster):
            self.cluster = cluster

    monkeypatch.setattr("distributed.Client", FakeClient)
    executor = sweep.jobqueue_executor("pbs", {"cores": 2, "memory": "4GB", "jobs": 5})
    (cluster,) = made
    assert type(cluster).__name__ == "PBSCluster" and cluster.scaled == 5
    assert cluster.options["processes"] == 2 and cluster.options["memory"] == "4GB"
    assert executor.client.cluster is cluster and "5 jobs" in executor.describe()


def test_jobqueue_without_the_optional_package_is_a_clear_error(tmp_path, monkeypatch, capsys):
    monkeypatch.setitem(sys.modules, "dask_jobqueue", None)  # as if it were not installed
    path = _write(tmp_path / "s.toml", TINY + '[sweep]\n"sgd.learning_rate" = [0.5]\n[sweep.jobqueue]\ncores = 4\n'
                  'memory = "8GB"\n')
    assert main(["sweep", str(path), "--out", str(tmp_path / "out"), "--jobqueue", "slurm"]) == 2
    err = capsys.readouterr().err.strip()
    assert err == (
        "harness: error: --jobqueue slurm needs the optional package dask-jobqueue; install it with "
        "pip install 'harness[jobqueue]' (or pip install dask-jobqueue)"
    )


# ------------------------------------------------------------ common random numbers


def test_points_differing_in_shape_free_keys_draw_the_same_random_numbers():
    base = {"data": {"input_dim": 40}, "run": {"seeds": 3, "test_samples": 50}}
    a = scenario_lib.resolve(base | {"sgd": {"learning_rate": 0.3}, "teacher": {"noise_std": 0.1}})
    b = scenario_lib.resolve(base | {
        "sgd": {"learning_rate": 0.7},
        "teacher": {"noise_std": 0.3, "init_std": 2.0},
        "student": {"init_std": 0.4, "activation": "relu"},
    })
    sims = [simulation.make_simulator(s) for s in (a, b)]
    (ia, sa), (ib, sb) = (simulation.init_ensemble(sim) for sim in sims)
    # Same directions, scaled by the initial widths.
    np.testing.assert_allclose(np.asarray(ib.teacher_w) / 2.0, np.asarray(ia.teacher_w), rtol=1e-6)
    np.testing.assert_allclose(np.asarray(sb.params["w"]) / 0.4, np.asarray(sa.params["w"]) / 0.1, rtol=1e-5)
    np.testing.assert_array_equal(np.asarray(ib.test_x), np.asarray(ia.test_x))
    steps = jax.numpy.arange(7, 40, dtype=jax.numpy.int64)
    seed0 = [jax.tree_util.tree_map(lambda leaf: leaf[0], inst) for inst in (ia, ib)]
    (xa, ya), (xb, yb) = (simulation.draw_steps(sim, inst, steps) for sim, inst in zip(sims, seed0, strict=True))
    np.testing.assert_array_equal(np.asarray(xb), np.asarray(xa))  # the very same input stream
    clean_a = simulation.teacher_output(a, seed0[0].teacher_w, seed0[0].teacher_v, xa)
    clean_b = simulation.teacher_output(b, seed0[1].teacher_w, seed0[1].teacher_v, xb)
    # The same standard normal label noise, scaled by each point's noise level.
    np.testing.assert_allclose(np.asarray(yb - clean_b) / 0.3, np.asarray(ya - clean_a) / 0.1, rtol=1e-4, atol=1e-5)


def test_common_random_numbers_reduce_the_variance_of_a_difference_between_points(tmp_path):
    # Final test error at learning rates 0.3 and 0.5, 16 seeds each. With common random
    # numbers the per-seed difference has far less spread than with independent points.
    variances = {}
    for crn in ("true", "false"):
        text = TINY.replace("seeds = 2", "seeds = 16").replace("evaluations = 10", "evaluations = 2") + (
            f'common_random_numbers = {crn}\n[sweep]\n"sgd.learning_rate" = [0.3, 0.5]\n'
        )
        plan = sweep.load_sweep(_write(tmp_path / f"{crn}.toml", text.replace("time = 12.0", "time = 5.0")))
        final = [simulate(s).values[:, -1, 0] for s in plan.scenarios]  # test_error at the end
        variances[crn] = np.var(final[1] - final[0], ddof=1)
    assert variances["true"] < variances["false"] / 3


# ----------------------------------------------------- running: crashes, resume, Dask

SWEPT = '[sweep]\n"sgd.learning_rate" = [0.2, 0.4, 0.8]\n'


def _visible_state_is_consistent(out: Path, run_ids: list[str]) -> pd.DataFrame:
    """Everything under a final name is whole: complete run folders and readable tables."""
    for entry in out.iterdir():
        if entry.name.startswith("."):
            continue
        if entry.is_dir():
            assert is_complete_run(entry), f"half-written run folder {entry}"
        else:
            assert entry.name in ("runs.parquet", "sweep.json"), entry
    index = read_index(out)
    if not index.empty:
        assert index["run_id"].is_unique
        assert all(is_complete_run(out / run_id) for run_id in index["run_id"])
        assert set(index["run_id"]) <= set(run_ids)
    return index


def test_copies_of_the_index_left_by_a_killed_writer_go_however_young(tmp_path):
    # A writer killed while replacing runs.parquet leaves its temporary copy; the next writer
    # (or a sweep starting) holds the index lock, so it knows the copy is nobody's and removes it.
    leftover = tmp_path / ".runs.parquet.x1y2z3.partial"
    leftover.write_bytes(b"half a parquet file")
    other = tmp_path / ".abcdef.tmp.partial"  # a run folder being staged: may be someone's, kept
    other.mkdir()
    append_index_row(tmp_path, {"run_id": "r1", "value": 1.0})
    assert not leftover.exists() and other.exists()
    assert list(read_index(tmp_path)["run_id"]) == ["r1"]
    leftover.write_bytes(b"again")
    remove_index_leftovers(tmp_path)
    assert not leftover.exists() and other.exists()
    remove_index_leftovers(tmp_path / "no such folder")  # nothing to do, nothing created
    assert not (tmp_path / "no such folder").exists()


def test_temporary_names_tell_a_dead_writers_leftovers_from_live_work(tmp_path):
    # A process that creates a temporary file the way the store does and dies without
    # cleaning up: its leftover is abandoned. Our own, another host's, or an unknown name: not.
    code = (
        "import sys, tempfile; from harness.core.files import _temporary_prefix; "
        "print(tempfile.mkstemp(prefix=_temporary_prefix('runs.parquet'), suffix='.partial', dir=sys.argv[1])[1])"
    )
    dead = subprocess.run([sys.executable, "-c", code, str(tmp_path)], capture_output=True, text=True, check=True)
    leftover = Path(dead.stdout.strip())
    assert leftover.exists() and is_abandoned(leftover)
    with staging_folder(tmp_path, "some_run") as live:
        assert not is_abandoned(live)
    assert not is_abandoned(tmp_path / ".abc.otherhost-1.x1y2z3.partial")
    assert not is_abandoned(tmp_path / ".abc.x1y2z3.partial")
    sweep._remove_stale_partials(tmp_path)  # young, but its writer is gone: removed
    assert not leftover.exists()


@pytest.fixture(scope="module")
def killed_and_resumed(tmp_path_factory):
    """A `harness sweep` SIGKILLed mid-way (with its worker process), then run again.

    One worker process: the points are computed one after the other, so the kill comes while
    point 1 simulates from its checkpoints with point 0 stored, as with two workers, but the
    sweep does not compete for the two cores with a second worker (and another test). The
    rerun gets no signal: it is the same command run in this process (its exit status main's
    return value), which saves starting and importing a second client.
    """
    folder = tmp_path_factory.mktemp("sweep")
    path = _write(folder / "lr.toml", TINY + SWEPT)
    plan = sweep.load_sweep(path)
    out = folder / "out"
    arguments = ["sweep", str(path), "--out", str(out), "--processes", "1", "--quiet"]
    command = [sys.executable, "-m", "harness", *arguments]
    process = subprocess.Popen(command, start_new_session=True, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    deadline = time.monotonic() + 600
    while True:
        complete = [r for r in plan.run_ids if is_complete_run(out / r)]
        started = [r for r in plan.run_ids if r not in complete and (out / ".checkpoints" / r / FILE_NAME).exists()]
        if complete and started:
            break
        assert process.poll() is None, "the sweep ended before it could be killed: " + process.stderr.read().decode()
        assert time.monotonic() < deadline
        time.sleep(0.01)
    os.killpg(process.pid, signal.SIGKILL)  # the sweep and its worker processes, at once
    process.wait()
    process.stdout.close(), process.stderr.close()
    _visible_state_is_consistent(out, plan.run_ids)
    before = {r: (out / r / "manifest.json").read_bytes() for r in plan.run_ids if is_complete_run(out / r)}
    stale = out / ".0123456789ab.tmpxyz.partial"  # a leftover as a killed writer leaves it, an hour old
    stale.mkdir()
    os.utime(stale, (time.time() - 3600, time.time() - 3600))
    printed, errors = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(printed), contextlib.redirect_stderr(errors):
        status = main(arguments)
    rerun = types.SimpleNamespace(returncode=status, stdout=printed.getvalue(), stderr=errors.getvalue())
    return plan, out, before, rerun


def test_a_sweep_killed_at_any_moment_is_completed_by_running_it_again(killed_and_resumed):
    plan, out, before, rerun = killed_and_resumed
    assert rerun.returncode == 0, rerun.stderr
    assert f"{len(before)} already complete" in rerun.stdout
    index = _visible_state_is_consistent(out, plan.run_ids)
    assert sorted(index["run_id"]) == sorted(plan.run_ids)  # every point exactly once
    for run_id, manifest in before.items():  # finished points were not computed again
        assert (out / run_id / "manifest.json").read_bytes() == manifest
    manifests = [json.loads((out / r / "manifest.json").read_text()) for r in plan.run_ids]
    # The point that had a checkpoint when the sweep was killed continued from it.
    assert any(m.get("resumed_from_step", 0) > 0 for m in manifests), rerun.stderr
    assert [m["sweep"]["index"] for m in manifests] == [0, 1, 2]
    assert not list((out / ".checkpoints").glob("*/*"))  # checkpoints of stored runs are gone
    assert not list(out.glob(".*.partial"))
    record = json.loads((out / "sweep.json").read_text())
    assert record["swept_keys"] == ["sgd.learning_rate"] and record["run_ids"] == plan.run_ids
    assert record["mode"] == "grid" and record["points"] == plan.points
    assert record["counts"] == {"total": 3, "computed": 3 - len(before), "reused": len(before), "failed": 0,
                                "pending": 0}


def test_a_complete_folder_whose_index_row_was_lost_is_stored_again(killed_and_resumed, tmp_path):
    import shutil

    plan, out, _, _ = killed_and_resumed
    copy = tmp_path / "copy"
    shutil.copytree(out, copy)
    kept = read_index(copy)
    lost = plan.run_ids[1]
    kept[kept["run_id"] != lost].to_parquet(copy / "runs.parquet")  # died between folder and row
    # The lost point is computed again in this process (the sweep's own storing and index code;
    # no worker process to start and import): its trajectories must still equal, bit for bit,
    # the ones a sweep worker process computed.
    outcome = sweep.run_sweep(plan, copy, InProcessExecutor(), show_progress=False)
    assert (outcome.computed, outcome.reused, outcome.failed) == (1, 2, 0)
    again = read_index(copy)
    assert sorted(again["run_id"]) == sorted(plan.run_ids)
    pd.testing.assert_frame_equal(again.set_index("run_id").loc[kept["run_id"]], kept.set_index("run_id"),
                                  check_like=True)
    pd.testing.assert_frame_equal(pd.read_parquet(copy / lost / "trajectories.parquet"),
                                  pd.read_parquet(out / lost / "trajectories.parquet"), check_exact=True)
    assert not list(copy.glob(".*retired*"))


def test_a_worker_killed_mid_sweep_on_dask_loses_and_duplicates_nothing(killed_and_resumed, tmp_path):
    import logging

    import dask
    from distributed import Client, LocalCluster

    plan, local_out, _, _ = killed_and_resumed
    plan = plan._replace(points=plan.points[:2], scenarios=plan.scenarios[:2], run_ids=plan.run_ids[:2])
    # Each worker is given its point at once (no queue on the scheduler) and keeps what it is
    # given (no stealing): the killed worker's point goes to the surviving worker, whose
    # programs are compiled by then, not to the replacement the nanny starts, which would
    # import and compile everything again (~10 s). Either way the scheduler computes the point
    # again and the client must store each point once.
    with dask.config.set({"distributed.scheduler.worker-saturation": float("inf"),
                          "distributed.scheduler.work-stealing": False}):
        cluster = LocalCluster(n_workers=2, processes=True, threads_per_worker=1, dashboard_address=None,
                               silence_logs=logging.CRITICAL, env=dict(sweep.WORKER_ENVIRONMENT))
    client = Client(cluster)
    # The worker processes' pids from their nannies (in this process): asking a worker itself
    # waits for it while it imports and compiles, holding the interpreter lock.
    pids = {nanny.worker_address: nanny.process.pid for nanny in cluster.workers.values()}
    killed: list[str] = []

    def kill_a_busy_worker() -> None:
        deadline = time.monotonic() + 300
        while time.monotonic() < deadline:
            busy = [worker for worker, keys in client.processing().items() if keys]
            if busy:
                time.sleep(1.0)  # well into the point: importing, compiling, simulating
                if client.processing().get(busy[0]):
                    os.kill(pids[busy[0]], signal.SIGKILL)  # a worker process this test started
                    killed.append(busy[0])
                    return
            time.sleep(0.05)

    killer = threading.Thread(target=kill_a_busy_worker, daemon=True)
    killer.start()
    out = tmp_path / "out"
    outcome = sweep.run_sweep(plan, out, sweep.DaskExecutor(client, cluster), show_progress=False)
    killer.join()
    assert killed, "no worker was busy long enough to be killed"
    assert outcome.ok and outcome.computed == 2
    index = _visible_state_is_consistent(out, plan.run_ids)
    assert sorted(index["run_id"]) == sorted(plan.run_ids)
    # Determinism: Dask (one point's worker killed) and the local executor (killed and
    # resumed from checkpoints) give identical trajectories, bit for bit.
    for run_id in plan.run_ids:
        dask_table = pd.read_parquet(out / run_id / "trajectories.parquet")
        local_table = pd.read_parquet(local_out / run_id / "trajectories.parquet")
        pd.testing.assert_frame_equal(dask_table, local_table, check_exact=True)


THEORY_THAT_FAILS_AT_LARGE_RATES = '''
import time
from pathlib import Path

import jax
import numpy as np


def predict(scenario, start, times):
    # Where it runs: the worker process's XLA CPU devices (a sweep worker has one).
    Path(__file__).with_name("worker_devices.txt").write_text(str(jax.device_count()))
    if scenario["sgd"]["learning_rate"] > 1.0:
        time.sleep(2.5)  # long enough for the progress line to show this point running
        raise RuntimeError("no theory beyond eta = 1")
    teacher_overlap = start.order_parameters.T[:, 0, 0]  # T does not change during training
    return {"T[0,0]": np.repeat(teacher_overlap[:, None], len(times), axis=1)}
'''


def _worker_processes_of(parent: int) -> list[int]:
    """Pids of the spawned pool workers that are children of ``parent`` (Linux /proc)."""
    found = []
    for entry in Path("/proc").iterdir():
        if not entry.name.isdigit():
            continue
        try:
            stat = (entry / "stat").read_text()
            command = (entry / "cmdline").read_bytes().decode(errors="replace")
        except OSError:
            continue
        ppid = int(stat.rsplit(")", 1)[1].split()[1])
        if ppid == parent and "spawn_main" in command and "resource_tracker" not in command:
            found.append(int(entry.name))
    return found


def test_a_failing_point_is_reported_and_the_others_complete(tmp_path, monkeypatch, capsys):
    (tmp_path / "theory_until_one.py").write_text(THEORY_THAT_FAILS_AT_LARGE_RATES)
    monkeypatch.syspath_prepend(str(tmp_path))  # worker processes get the same import path
    path = _write(tmp_path / "s.toml", TINY + '[theory]\nsource = "python:theory_until_one:predict"\n'
                  '[sweep]\n"sgd.learning_rate" = [0.5, 2.0]\n')
    out = tmp_path / "out"
    killed: list[int] = []

    def kill_the_worker_once() -> None:
        # The local worker process dies while computing point 0 (as if out of memory):
        # the pool is replaced and the point computed again.
        deadline = time.monotonic() + 300
        while time.monotonic() < deadline and not killed:
            workers = _worker_processes_of(os.getpid())
            if workers:
                time.sleep(1.0)
                os.kill(workers[0], signal.SIGKILL)  # a process this test started
                killed.append(workers[0])
            time.sleep(0.05)

    killer = threading.Thread(target=kill_the_worker_once, daemon=True)
    killer.start()
    environment_before = {name: os.environ.get(name) for name in sweep.WORKER_ENVIRONMENT}
    assert main(["sweep", str(path), "--out", str(out), "--processes", "1"]) == 1
    killer.join()
    assert killed
    captured = capsys.readouterr()
    assert "sweep point 1 (sgd.learning_rate=2.0) failed: " in captured.err
    assert "no theory beyond eta = 1" in captured.err
    assert "sweep point 0" not in captured.err  # its lost worker was replaced, not reported as a failure
    # The progress line counts done / running / failed and, once a point is finished, the time left.
    progress = [line for line in captured.err.splitlines() if line.startswith("sweep ") and "running" in line]
    # (Point 0, resubmitted after its worker died, may come after point 1.)
    half = r"(1 done, 1 running, 0 failed|0 done, 1 running, 1 failed), 1 left .*~\d+s left"
    assert any(re.search(half, line) for line in progress), captured.err
    assert "1 computed, 0 already complete, 1 failed" in captured.out
    record = json.loads((out / "sweep.json").read_text())
    assert record["status"] == ["computed", "failed"] and "no theory beyond eta = 1" in record["errors"]["1"]
    assert list(read_index(out)["run_id"]) == [record["run_ids"][0]]
    # Each worker process computes on one XLA CPU device, whatever this process uses.
    assert (tmp_path / "worker_devices.txt").read_text() == "1"
    assert {name: os.environ.get(name) for name in sweep.WORKER_ENVIRONMENT} == environment_before

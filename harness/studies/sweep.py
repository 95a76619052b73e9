"""Sweeps: many scenarios from one file, computed in parallel, stored like single runs.

A *sweep file* is a scenario file with one more table, ``[sweep]``, whose keys are
dotted scenario keys and whose values are lists::

    [data]
    input_dim = 500

    [sweep]
    "sgd.learning_rate" = [0.1, 0.5, 1.0]
    "student.hidden" = [2, 4]
    mode = "grid"            # every combination (default); "zip" pairs equal-length lists

Every point (one value per swept key) is the base scenario with those values put in. All
points are resolved and checked before anything runs (:func:`load_sweep`); an invalid
point is a one-line error naming the point's index, its values and the offending key.

Running (:func:`run_sweep`): each point is one task for an *executor*; the task computes
the point's experiment on a worker (:func:`compute_point`) and returns the tables to the
client, which writes the run folder and the ``runs.parquet`` row exactly as
``harness run`` does, as each point finishes. The client is the only writer, so a
point is written once even if a worker dies and its task is computed again elsewhere.
Executors:

* :class:`LocalExecutor` (default): worker processes on this machine (``spawn``: JAX and
  ``fork`` do not mix), one per core, each limited to one XLA thread so that points,
  not threads, share the cores. No server.
* :class:`DaskExecutor`: a dask.distributed client, either to a ``LocalCluster`` it
  starts (``--workers N``), to a running scheduler (``--scheduler ADDRESS``), or to a
  batch-queue cluster built by dask-jobqueue (``--jobqueue slurm|pbs``, optional extra).

Never lose, never duplicate: a point whose run folder is complete in the output folder
is not computed again (a complete folder whose index row was lost is re-indexed);
nothing is ever half-written (see :mod:`harness.core.files`), so a sweep killed at any
moment, even with SIGKILL, is finished by running it again. Long points also checkpoint
their state (:mod:`harness.runner.checkpoint`) and resume from it.

Common random numbers: every seed's random keys derive from ``run.seed`` and the seed
index only, so with ``run.common_random_numbers = true`` (the default) points that differ
only in keys that leave array shapes alone (learning rates, noise level, activations,
initial scales, second layers, optimizer settings, run length) draw the very same
teacher and initial student directions, the same input samples and the same standard
normal label noise; differences between such points are then free of most sampling
noise. Keys that change shapes or the float type (input_dim, hidden sizes, test_samples,
dtype, the data kind) change the draws. With ``false`` every point gets its own
``run.seed`` = base seed + an offset hashed from the point's values, so points are
statistically independent; the seed used is stored with the point's scenario.
"""

from __future__ import annotations

import concurrent.futures
import copy
import datetime as _dt
import fcntl
import hashlib
import itertools
import json
import math
import multiprocessing
import os
import shutil
import sys
import time
import warnings
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any, NamedTuple, TextIO

from harness.core import scenario as scenario_lib
from harness.core.errors import InputError
from harness.core.files import atomic_write_json, is_abandoned, read_json
from harness.results.store import append_index_row, is_complete_run, read_index, remove_index_leftovers
from harness.runner.checkpoint import checkpoint_folder, discard_checkpoint

SWEEP_MODES = ("grid", "zip")
MAX_POINTS = 100_000
SWEEP_JSON = "sweep.json"
SINGLE_THREAD_XLA_FLAGS = "--xla_cpu_multi_thread_eigen=false intra_op_parallelism_threads=1"
WORKER_ENVIRONMENT = {"XLA_FLAGS": SINGLE_THREAD_XLA_FLAGS, "HARNESS_CPU_DEVICES": "1"}
"""Set in every worker process before it starts: one XLA CPU device and no multi-threaded
Eigen, so that a sweep parallelises over points, not inside them."""
MAX_LOST_ATTEMPTS = 3
"""A point whose worker process died this many times while computing it is reported failed."""
STALE_PARTIAL_S = 300.0
"""Hidden ``*.partial`` leftovers older than this (seconds) are removed when a sweep starts."""
JOBQUEUE_KINDS = ("slurm", "pbs")


class SweepError(scenario_lib.ScenarioError):
    """A sweep file or one of its points is invalid; the message is one line."""


# ----------------------------------------------------------------------- sweep files


class SweepPlan(NamedTuple):
    """A validated sweep: every point resolved, nothing run yet."""

    source: Path
    mode: str
    swept_keys: list[str]
    points: list[dict[str, Any]]  # the swept values of each point
    scenarios: list[scenario_lib.Scenario]  # each point's resolved scenario
    run_ids: list[str]
    jobqueue: dict[str, Any]  # the [sweep.jobqueue] table (checked only when used)


def _show(value: Any) -> str:
    text = json.dumps(value) if isinstance(value, (list, str)) else repr(value)
    return text if len(text) <= 40 else text[:37] + "..."


def describe_point(point: dict[str, Any]) -> str:
    """``sgd.learning_rate=0.5, student.hidden=2``."""
    return ", ".join(f"{key}={_show(value)}" for key, value in point.items())


def parse_sweep_table(table: Any, source: str = "sweep file") -> tuple[str, dict[str, list[Any]], dict[str, Any]]:
    """Check a ``[sweep]`` table; return ``(mode, {dotted key: values}, jobqueue table)``.

    Both ``"sgd.learning_rate" = [...]`` (a quoted key) and ``sgd.learning_rate = [...]``
    (a TOML dotted key, read as a nested table) are accepted.
    """
    if not isinstance(table, dict):
        raise SweepError(f"'{source}': [sweep] must be a table, got {_show(table)}")
    mode = table.get("mode", "grid")
    if mode not in SWEEP_MODES:
        raise SweepError(f"sweep key 'mode' in '{source}': must be one of 'grid', 'zip', got {_show(mode)}")
    jobqueue = table.get("jobqueue", {})
    if not isinstance(jobqueue, dict):
        raise SweepError(
            f"sweep key 'jobqueue' in '{source}': must be a table ([sweep.jobqueue]), got {_show(jobqueue)}"
        )
    axes: dict[str, list[Any]] = {}
    for name, value in table.items():
        if name in ("mode", "jobqueue"):
            continue
        if name in scenario_lib.builtin_schema() and isinstance(value, dict):
            entries = [(f"{name}.{key}", values) for key, values in value.items()]
        else:
            entries = [(name, value)]
        for dotted, values in entries:
            section, _, key = dotted.partition(".")
            if section not in scenario_lib.builtin_schema() or key not in scenario_lib.builtin_schema()[section]:
                raise SweepError(
                    f"sweep key '{dotted}' in '{source}' is not a scenario key; "
                    "expected 'section.key' such as 'sgd.learning_rate', or 'mode'"
                )
            if section in scenario_lib.JUDGING_SECTIONS:
                raise SweepError(
                    f"sweep key '{dotted}' in '{source}': [{section}] says how runs are judged and changes no "
                    "computation, so it is not swept; set it once in the sweep file (stored runs are judged again)"
                )
            if not isinstance(values, list):
                raise SweepError(f"sweep key '{dotted}' in '{source}': expected a list of values, got {_show(values)}")
            if not values:
                raise SweepError(f"sweep key '{dotted}' in '{source}': expected a non-empty list of values, got []")
            axes[dotted] = values
    if not axes:
        raise SweepError(f"'{source}': [sweep] names no scenario key to vary, e.g. \"sgd.learning_rate\" = [0.1, 0.5]")
    if mode == "zip":
        lengths = {key: len(values) for key, values in axes.items()}
        if len(set(lengths.values())) > 1:
            shown = ", ".join(f"'{key}' has {n}" for key, n in lengths.items())
            raise SweepError(f"sweep in '{source}' with mode = \"zip\": every list must have the same length; {shown}")
    return mode, axes, jobqueue


def expand_points(mode: str, axes: dict[str, list[Any]]) -> list[dict[str, Any]]:
    """The sweep's points in order: the grid product (last key fastest) or the zipped lists."""
    keys = list(axes)
    if mode == "zip":
        return [dict(zip(keys, values, strict=True)) for values in zip(*axes.values(), strict=True)]
    count = math.prod(len(values) for values in axes.values())
    if count > MAX_POINTS:
        raise SweepError(
            f"sweep grid has {count} points, more than the {MAX_POINTS} allowed; split it into several sweeps"
        )
    return [dict(zip(keys, values, strict=True)) for values in itertools.product(*axes.values())]


def independent_seed(base_seed: int, point: dict[str, Any]) -> int:
    """``run.seed`` of a point when common random numbers are off: base + a hash of its values."""
    digest = hashlib.sha256(json.dumps(point, sort_keys=True).encode("utf-8")).digest()
    return (base_seed + int.from_bytes(digest[:4], "big")) % 2**31


def _resolve_point(base_table: dict[str, Any], point: dict[str, Any]) -> scenario_lib.Scenario:
    table = copy.deepcopy(base_table)
    for dotted, value in point.items():
        section, _, key = dotted.partition(".")
        table.setdefault(section, {})[key] = value
    scenario = scenario_lib.resolve(table)
    if not scenario.run.common_random_numbers:
        table.setdefault("run", {})["seed"] = independent_seed(scenario.run.seed, point)
        scenario = scenario_lib.resolve(table)
    return scenario


def load_sweep(path: str | Path) -> SweepPlan:
    """Read a sweep file and resolve every point; the first problem raises :class:`SweepError`."""
    path = Path(path)
    table = scenario_lib.read_table(path)
    if "sweep" not in table:
        raise SweepError(
            f"sweep file '{path}' has no [sweep] table; add one, e.g. [sweep] \"sgd.learning_rate\" = [0.1, 0.5]"
        )
    mode, axes, jobqueue = parse_sweep_table(table.pop("sweep"), str(path))
    # A relative theory file is relative to the sweep file, as for scenario files.
    scenario_lib.anchor_theory_file(table, path.absolute().parent)
    points = expand_points(mode, axes)
    try:
        scenario_lib.resolve(table)
        base_problem = None
    except scenario_lib.ScenarioError as error:
        base_problem = str(error)
    scenarios: list[scenario_lib.Scenario] = []
    for index, point in enumerate(points):
        try:
            scenarios.append(_resolve_point(table, point))
        except scenario_lib.ScenarioError as error:
            if str(error) == base_problem:  # not about the swept values: report it as it is
                raise scenario_lib.ScenarioError(f"sweep file '{path}': {error}") from None
            raise SweepError(f"sweep point {index} ({describe_point(point)}): {error}") from None
    run_ids = [scenario_lib.run_id(s) for s in scenarios]
    first_index: dict[str, int] = {}
    for index, run_id in enumerate(run_ids):
        if run_id in first_index:
            raise SweepError(
                f"sweep points {first_index[run_id]} ({describe_point(points[first_index[run_id]])}) and {index} "
                f"({describe_point(points[index])}) are the same scenario (run_id {run_id}); remove the repeat"
            )
        first_index[run_id] = index
    return SweepPlan(path, mode, list(axes), points, scenarios, run_ids, jobqueue)


# ------------------------------------------------------------------------- the task


class PointTask(NamedTuple):
    """What a worker needs to compute one point (picklable)."""

    index: int
    run_id: str
    scenario: scenario_lib.Scenario
    extra_manifest: dict[str, Any]
    checkpoint_dir: str


@contextmanager
def _worker_environment() -> Iterator[None]:
    """:data:`WORKER_ENVIRONMENT` in ``os.environ`` while worker processes are started.

    Workers must have it when they start: ``harness`` reads it at import, before any
    code of ours runs in the worker. It is restored afterwards, so this process and the
    other programs it starts keep their own setting.
    """
    saved = {name: os.environ.get(name) for name in WORKER_ENVIRONMENT}
    os.environ.update(WORKER_ENVIRONMENT)
    try:
        yield
    finally:
        for name, value in saved.items():
            if value is None:
                os.environ.pop(name, None)
            else:
                os.environ[name] = value


def compute_point(task: PointTask):
    """Run on a worker: compute one point and return its tables (a ``ComputedRun``)."""
    from harness.core.configure import configure
    from harness.runner.pipeline import compute_run

    configure()  # a worker is a process of its own: JAX's options are set there too
    with warnings.catch_warnings():
        # Diverged seeds are recorded in the manifest; the client reports them.
        warnings.filterwarnings("ignore", message=".*seeds diverged", category=RuntimeWarning)
        return compute_run(task.scenario, extra_manifest=task.extra_manifest, checkpoint_dir=task.checkpoint_dir)


# ------------------------------------------------------------------------ executors


class Outcome(NamedTuple):
    kind: str  # "ok", "error" (the point failed), "lost" (its worker died: compute again)
    value: Any  # the ComputedRun, or the error text


def _error_text(error: BaseException) -> str:
    lines = str(error).strip().splitlines()
    return f"{type(error).__name__}: {lines[0] if lines else ''}".rstrip(": ")


def usable_cores() -> int:
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:  # not on Linux
        return os.cpu_count() or 1


class LocalExecutor:
    """Worker processes on this machine, started with ``spawn``, one XLA device and thread each.

    If a worker process dies (killed, out of memory), the pool breaks; the executor
    starts a new pool and the points that were in flight are computed again.
    """

    def __init__(self, processes: int | None = None):
        self.processes = processes or usable_cores()
        self._pool: concurrent.futures.ProcessPoolExecutor | None = None
        self._origin: dict[concurrent.futures.Future, concurrent.futures.ProcessPoolExecutor] = {}
        self._in_flight: set[concurrent.futures.Future] = set()

    def describe(self) -> str:
        return f"{self.processes} local worker process{'es' if self.processes != 1 else ''}"

    def prepare(self, points: int) -> None:
        """Start no more processes than there are points to compute."""
        if self._pool is None:
            self.processes = max(1, min(self.processes, points))

    def submit(self, task: PointTask) -> concurrent.futures.Future:
        with _worker_environment():  # worker processes are started inside submit
            if self._pool is None:
                self._pool = concurrent.futures.ProcessPoolExecutor(
                    self.processes, mp_context=multiprocessing.get_context("spawn")
                )
            future = self._pool.submit(compute_point, task)
        self._origin[future] = self._pool
        return future

    def wait(self, handles: list, timeout: float) -> list:
        done, _ = concurrent.futures.wait(handles, timeout=timeout, return_when=concurrent.futures.FIRST_COMPLETED)
        return list(done)

    def running(self, handles: list) -> int:
        # Futures are marked running when queued to a worker (at most one extra is queued).
        self._in_flight = {h for h in handles if h.running()}
        return min(len(self._in_flight), self.processes)

    def was_running(self, handle) -> bool:
        return handle in self._in_flight

    def outcome(self, handle: concurrent.futures.Future) -> Outcome:
        pool = self._origin.pop(handle, None)
        try:
            return Outcome("ok", handle.result())
        except concurrent.futures.process.BrokenProcessPool:
            if pool is not None and pool is self._pool:
                self._terminate(pool)
                self._pool = None
            return Outcome("lost", "a worker process died")
        except Exception as error:  # the point's own failure, reported, never fatal
            return Outcome("error", _error_text(error))

    @staticmethod
    def _terminate(pool: concurrent.futures.ProcessPoolExecutor) -> None:
        processes = list((getattr(pool, "_processes", None) or {}).values())
        pool.shutdown(wait=False, cancel_futures=True)
        for process in processes:  # our own children, by their handles
            if process.is_alive():
                process.terminate()
        for process in processes:
            process.join(timeout=5)

    def close(self) -> None:
        """Let idle workers exit; stop busy ones (an interrupted or failed sweep)."""
        if self._pool is not None:
            if any(not future.done() for future in self._origin):
                self._terminate(self._pool)
            else:
                self._pool.shutdown(wait=True)
            self._pool = None


class DaskExecutor:
    """Points as dask.distributed tasks. The scheduler re-runs a task whose worker died
    (up to its ``allowed-failures``); the client still writes each point once."""

    def __init__(self, client, cluster=None, description: str = "dask"):
        self.client = client
        self.cluster = cluster
        self.description = description
        self.token = os.urandom(4).hex()

    def describe(self) -> str:
        return self.description

    def prepare(self, points: int) -> None:
        """The cluster's size is the user's choice; nothing to adapt."""

    def submit(self, task: PointTask):
        key = f"harness-point-{task.index}-{task.run_id}-{self.token}"
        return self.client.submit(compute_point, task, key=key, pure=False)

    def wait(self, handles: list, timeout: float) -> list:
        from distributed import wait

        try:
            wait(handles, timeout=timeout, return_when="FIRST_COMPLETED")
        except TimeoutError:
            pass
        return [h for h in handles if h.done()]

    def running(self, handles: list) -> int:
        keys = {h.key for h in handles}
        try:
            processing = self.client.processing()
        except Exception:  # the scheduler is busy or gone: show nothing rather than fail
            return 0
        return sum(1 for tasks in processing.values() for key in tasks if key in keys)

    def was_running(self, handle) -> bool:
        return True

    def outcome(self, handle) -> Outcome:
        from distributed import KilledWorker

        if handle.status == "finished":
            return Outcome("ok", handle.result())
        if handle.status == "cancelled":
            return Outcome("lost", "its task was cancelled by the scheduler")
        error = handle.exception()
        if isinstance(error, KilledWorker):
            return Outcome("error", "its worker died while computing it, every time it was tried")
        return Outcome("error", _error_text(error))

    def close(self) -> None:
        self.client.close()
        if self.cluster is not None:
            self.cluster.close()


def local_dask_executor(workers: int) -> DaskExecutor:
    """A dask LocalCluster of ``workers`` processes with one thread (and one XLA thread) each."""
    import logging

    from distributed import Client, LocalCluster

    cluster = LocalCluster(
        n_workers=workers, processes=True, threads_per_worker=1, dashboard_address=None,
        silence_logs=logging.ERROR, env=dict(WORKER_ENVIRONMENT),
    )
    plural = "es" if workers != 1 else ""
    return DaskExecutor(Client(cluster), cluster, f"dask LocalCluster of {workers} worker process{plural}")


def scheduler_executor(address: str) -> DaskExecutor:
    """A client of a running dask.distributed scheduler."""
    from distributed import Client

    try:
        client = Client(address, timeout="20s")
    except (OSError, TimeoutError) as error:
        raise InputError(
            f"--scheduler '{address}': cannot reach a dask scheduler there ({_error_text(error)})"
        ) from None
    return DaskExecutor(client, None, f"dask scheduler at {address}")


# ---------------------------------------------------------------- batch-queue clusters

_JOBQUEUE_KEYS = {
    # our key: (kind, dask-jobqueue keyword, what it is)
    "cores": ("int", "cores", "cores per batch job"),
    "memory": ("str", "memory", "memory per batch job, e.g. '8GB'"),
    "processes": ("int", "processes", "worker processes per job (default: cores, one thread each)"),
    "walltime": ("str", "walltime", "time limit per job, e.g. '04:00:00'"),
    "queue": ("str", "queue", "partition or queue name"),
    "account": ("str", "account", "account to charge"),
    "jobs": ("int", None, "number of batch jobs to start (default 1)"),
    "extra_directives": ("str_list", "job_extra_directives", "extra scheduler directives, one per line"),
    "setup_commands": ("str_list", "job_script_prologue", "shell lines run before the worker starts"),
    "interface": ("str", "interface", "network interface of the workers, e.g. 'ib0'"),
    "local_directory": ("str", "local_directory", "scratch folder on the compute nodes"),
}


def jobqueue_options(table: dict[str, Any]) -> tuple[dict[str, Any], int]:
    """dask-jobqueue cluster keywords and the number of jobs, from ``[sweep.jobqueue]``.

    Every job runs ``processes`` worker processes with one thread each (``processes``
    defaults to ``cores``), and its script exports the single-thread XLA flags first.
    """
    options: dict[str, Any] = {}
    for key, value in table.items():
        if key not in _JOBQUEUE_KEYS:
            raise SweepError(f"sweep key 'jobqueue.{key}' is unknown; allowed: {', '.join(_JOBQUEUE_KEYS)}")
        kind = _JOBQUEUE_KEYS[key][0]
        fine = {
            "int": isinstance(value, int) and not isinstance(value, bool) and value >= 1,
            "str": isinstance(value, str) and value != "",
            "str_list": isinstance(value, list) and all(isinstance(v, str) for v in value),
        }[kind]
        if not fine:
            wanted = {"int": "an integer >= 1", "str": "a non-empty string", "str_list": "a list of strings"}[kind]
            raise SweepError(f"sweep key 'jobqueue.{key}': must be {wanted}, got {_show(value)}")
    for required in ("cores", "memory"):
        if required not in table:
            raise SweepError(
                f"sweep key 'jobqueue.{required}' is missing; --jobqueue needs [sweep.jobqueue] with "
                "cores and memory (e.g. cores = 8, memory = \"16GB\")"
            )
    for key, value in table.items():
        keyword = _JOBQUEUE_KEYS[key][1]
        if keyword is not None:
            options[keyword] = list(value) if isinstance(value, list) else value
    options.setdefault("processes", table["cores"])
    if options["processes"] > table["cores"]:
        raise SweepError("sweep key 'jobqueue.processes': must be at most jobqueue.cores (one thread per process)")
    exports = [f"export {name}='{value}'" for name, value in WORKER_ENVIRONMENT.items()]
    options["job_script_prologue"] = exports + options.get("job_script_prologue", [])
    return options, int(table.get("jobs", 1))


def jobqueue_executor(kind: str, table: dict[str, Any]) -> DaskExecutor:
    """Start batch jobs through dask-jobqueue (the optional ``jobqueue`` extra)."""
    options, jobs = jobqueue_options(table)
    try:
        import dask_jobqueue
    except ImportError:
        raise InputError(
            f"--jobqueue {kind} needs the optional package dask-jobqueue; install it with "
            "pip install 'harness[jobqueue]' (or pip install dask-jobqueue)"
        ) from None
    from distributed import Client

    cluster_class = {"slurm": dask_jobqueue.SLURMCluster, "pbs": dask_jobqueue.PBSCluster}[kind]
    cluster = cluster_class(**options)
    cluster.scale(jobs=jobs)
    return DaskExecutor(Client(cluster), cluster, f"{kind} cluster of {jobs} job{'s' if jobs != 1 else ''}")


# -------------------------------------------------------------------------- running


class SweepOutcome(NamedTuple):
    total: int
    computed: int
    reused: int  # already complete in the output folder
    failed: int
    errors: dict[int, str]  # point index -> error text
    seconds: float

    @property
    def ok(self) -> bool:
        return self.failed == 0


@contextmanager
def _sweep_lock(out_dir: Path) -> Iterator[None]:
    """One sweep client per output folder at a time (released even on SIGKILL)."""
    out_dir.mkdir(parents=True, exist_ok=True)
    with open(out_dir / ".sweep.lock", "a+") as lock:
        try:
            fcntl.flock(lock, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            raise InputError(
                f"another harness sweep is writing into '{out_dir}'; wait for it to finish or choose another --out"
            ) from None
        try:
            yield
        finally:
            fcntl.flock(lock, fcntl.LOCK_UN)


def _remove_stale_partials(out_dir: Path, older_than_s: float = STALE_PARTIAL_S) -> None:
    """Remove temporary ``.*.partial`` files and folders that a killed writer left behind.

    Old ones, and young ones whose writer is known to have ended (results_store.is_abandoned);
    any other young one may belong to a writer still at work. Copies of the index go whatever
    their age, as its writers hold a lock (results_store.remove_index_leftovers).
    """
    remove_index_leftovers(out_dir)
    now = time.time()
    places = [out_dir] + [p for p in (out_dir / ".checkpoints").glob("*") if p.is_dir()]
    for place in places:
        for leftover in place.glob(".*.partial"):
            try:
                if now - leftover.lstat().st_mtime < older_than_s and not is_abandoned(leftover):
                    continue
                if leftover.is_dir():
                    shutil.rmtree(leftover, ignore_errors=True)
                else:
                    leftover.unlink(missing_ok=True)
            except OSError:
                continue


def _take_stock(plan: SweepPlan, out_dir: Path, status: list[str]) -> list[int]:
    """Mark the points already stored in ``out_dir`` as reused; return the others' indices.

    A point is stored when its folder is complete *and* its row is in ``runs.parquet``.
    If the client was killed between the two, the row it had set aside is added now; a
    complete folder without any row to add (written by someone else) is computed again
    and replaced. Also removes stale temporary files and the checkpoints of stored runs.
    """
    from harness.runner.pipeline import judge_stored_run

    _remove_stale_partials(out_dir)
    indexed = _indexed_run_ids(out_dir)
    todo: list[int] = []
    for i, run_id in enumerate(plan.run_ids):
        complete = is_complete_run(out_dir / run_id)
        set_aside = _set_aside_row_path(out_dir, run_id)
        if complete and run_id not in indexed and set_aside.is_file():
            try:
                append_index_row(out_dir, read_json(set_aside, null_as_nan=True))  # null: a NaN metric
                indexed.add(run_id)
            except (OSError, ValueError):
                pass  # unreadable: computed again below
        if complete and run_id in indexed:
            discard_checkpoint(checkpoint_folder(out_dir, run_id))
            judge_stored_run(out_dir / run_id, plan.scenarios[i], out_dir)  # its verdict under this file's margin
            status[i] = "reused"
        else:
            todo.append(i)
    return todo


def _set_aside_row_path(out_dir: Path, run_id: str) -> Path:
    """The index row of a point being stored, kept until the row is in ``runs.parquet``."""
    return checkpoint_folder(out_dir, run_id) / "index_row.json"


def _indexed_run_ids(out_dir: Path) -> set[str]:
    index = read_index(out_dir)
    return set(index["run_id"]) if "run_id" in index.columns else set()


def _store(computed, out_dir: Path) -> None:
    """Write a computed point unless an identical run was stored meanwhile by another writer."""
    from harness.runner.pipeline import store_run

    folder = out_dir / computed.run_id
    if is_complete_run(folder) and computed.run_id in _indexed_run_ids(out_dir):
        discard_checkpoint(checkpoint_folder(out_dir, computed.run_id))
        return
    # Set the row aside first: if this process dies after publishing the folder but
    # before adding the row, the next run of the sweep adds it without recomputing.
    atomic_write_json(_set_aside_row_path(out_dir, computed.run_id), computed.index_row)
    store_run(computed, out_dir, force=folder.exists())  # its checkpoint folder goes last


def _sweep_record(plan: SweepPlan, status: list[str], errors: dict[int, str], executor: str) -> dict[str, Any]:
    counts = {name: status.count(name) for name in ("computed", "reused", "failed", "pending")}
    return {
        "sweep_file": str(plan.source),
        "mode": plan.mode,
        "swept_keys": plan.swept_keys,
        "points": plan.points,
        "run_ids": plan.run_ids,
        "status": status,
        "counts": {"total": len(status), **counts},
        "errors": {str(index): text for index, text in sorted(errors.items())},
        "executor": executor,
        "updated": _dt.datetime.now(_dt.UTC).isoformat(timespec="seconds"),
    }


def run_sweep(
    plan: SweepPlan,
    out_dir: str | Path,
    executor,
    *,
    show_progress: bool = True,
    stream: TextIO | None = None,
    poll_s: float = 1.0,
) -> SweepOutcome:
    """Compute every point not yet complete in ``out_dir`` and store each as it finishes.

    ``executor`` is a :class:`LocalExecutor` or :class:`DaskExecutor`; it is closed at
    the end. Failing points are reported on ``stream`` and in ``sweep.json``; they do
    not stop the others.
    """
    from harness.runner.progress import Progress

    stream = stream if stream is not None else sys.stderr
    out_dir = Path(out_dir).absolute()
    started = time.perf_counter()
    status = ["pending"] * len(plan.points)
    errors: dict[int, str] = {}
    with _sweep_lock(out_dir):
        try:
            todo = _take_stock(plan, out_dir, status)
            record_path = out_dir / SWEEP_JSON
            atomic_write_json(record_path, _sweep_record(plan, status, errors, executor.describe()))
            last_record = time.monotonic()

            def task(i: int) -> PointTask:
                extra = {
                    "command": list(sys.argv),
                    "sweep": {"file": str(plan.source), "index": i, "values": plan.points[i]},
                }
                checkpoints = str(checkpoint_folder(out_dir, plan.run_ids[i]))
                return PointTask(i, plan.run_ids[i], plan.scenarios[i], extra, checkpoints)

            executor.prepare(len(todo))
            pending = {executor.submit(task(i)): i for i in todo}
            lost_attempts: dict[int, int] = {}
            done = failed = 0
            with Progress("sweep", max(len(todo), 1), stream=stream, enabled=show_progress and bool(todo)) as bar:
                while pending:
                    finished = executor.wait(list(pending), poll_s)
                    for handle in finished:
                        i = pending.pop(handle)
                        was_running = executor.was_running(handle)
                        outcome = executor.outcome(handle)
                        if outcome.kind == "lost":
                            lost_attempts[i] = lost_attempts.get(i, 0) + int(was_running)
                            if lost_attempts[i] < MAX_LOST_ATTEMPTS:
                                pending[executor.submit(task(i))] = i
                                continue
                            outcome = Outcome("error", f"{outcome.value} while computing it, {MAX_LOST_ATTEMPTS} times")
                        if outcome.kind == "ok":
                            try:
                                _store(outcome.value, out_dir)
                            except OSError as error:
                                outcome = Outcome("error", f"cannot store it: {_error_text(error)}")
                        if outcome.kind == "ok":
                            status[i] = "computed"
                            done += 1
                            diverged = outcome.value.manifest.get("diverged_count", 0)
                            if diverged:
                                stream.write(f"harness: warning: sweep point {i} ({describe_point(plan.points[i])}): "
                                             f"{diverged} seed(s) diverged and left the averages\n")
                        else:
                            status[i] = "failed"
                            errors[i] = outcome.value
                            failed += 1
                            stream.write(
                                f"harness: sweep point {i} ({describe_point(plan.points[i])}) failed: {outcome.value}\n"
                            )
                            stream.flush()
                    running = executor.running(list(pending)) if pending else 0
                    finished_count = done + failed  # the bar's time left extrapolates from these
                    note = f"{done} done, {running} running, {failed} failed, {len(todo) - finished_count} left"
                    bar.update(finished_count, note)
                    if finished and time.monotonic() - last_record > 2.0:
                        atomic_write_json(record_path, _sweep_record(plan, status, errors, executor.describe()))
                        last_record = time.monotonic()
        finally:
            executor.close()
            if (out_dir / SWEEP_JSON).exists() or any(state != "pending" for state in status):
                atomic_write_json(out_dir / SWEEP_JSON, _sweep_record(plan, status, errors, executor.describe()))
    return SweepOutcome(
        len(plan.points), status.count("computed"), status.count("reused"), status.count("failed"),
        errors, time.perf_counter() - started,
    )


def verdict_tally(out_dir: str | Path, run_ids: list[str]) -> str:
    """'5 agree, 2 inconclusive, 1 disagree' over the sweep's stored points (runs.parquet)."""
    index = read_index(out_dir)
    if "verdict" not in index.columns:
        return ""
    verdicts = index[index["run_id"].isin(run_ids)]["verdict"].dropna()
    counts = verdicts.value_counts()
    return ", ".join(f"{int(counts[v])} {v}" for v in ("agree", "disagree", "inconclusive", "n/a") if v in counts)

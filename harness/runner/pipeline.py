"""From a resolved scenario to a stored run: experiment, comparison, results store.

:func:`run_and_store` is what ``harness run`` (and every sweep point) does;
:func:`theory_and_store` is ``harness theory``. Both return a :class:`StoredRun`.
"""

from __future__ import annotations

import datetime as _dt
import json
import platform
import sys
import warnings
from importlib import metadata
from pathlib import Path
from typing import Any, NamedTuple

import jax
import numpy as np
import pandas as pd

from harness.core import interrupts
from harness.core import scenario as scenario_lib
from harness.core.errors import InputError
from harness.core.files import atomic_write_json, atomic_write_parquet, atomic_write_text
from harness.core.trajectories import Trajectories, from_frame, observable_names
from harness.results import comparison, paired_landmarks
from harness.results.judgement import Margin
from harness.results.store import LANDMARKS_NAME, append_index_row, is_complete_run, write_run_folder
from harness.results.stored import divergence_times, judgement_record
from harness.runner.checkpoint import checkpoint_folder, discard_checkpoint
from harness.runner.experiment import ProgressFn, SolveProgress, run_experiment, theory_only, theory_timings

PACKAGES = ("harness", "numpy", "jax", "jaxlib", "optax", "diffrax", "equinox", "pandas", "pyarrow", "scipy")


class StoredRun(NamedTuple):
    run_id: str
    folder: Path
    skipped: bool  # True: an identical complete run already existed (re-judged if the margin changed)
    metrics: pd.DataFrame | None
    manifest: dict[str, Any] | None
    judgement: dict[str, Any] | None = None  # judgement.json


def package_versions() -> dict[str, str]:
    versions = {}
    for name in PACKAGES:
        try:
            versions[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            versions[name] = "not installed"
    return versions


def base_manifest(scenario: scenario_lib.Scenario, run_id: str, started: _dt.datetime) -> dict[str, Any]:
    device = jax.devices()[0]
    return {
        "run_id": run_id,
        "started": started.isoformat(timespec="seconds"),
        "command": sys.argv,
        "packages": package_versions(),
        "python": platform.python_version(),
        "machine": {"platform": platform.platform(), "processor": platform.machine()},
        "jax_backend": jax.default_backend(),
        "jax_device": f"{device.platform}:{device.device_kind}",
        "dtype": scenario.run.dtype,
        "seeds": scenario.run.seeds,
    }


def index_row(
    run_id: str, scenario: scenario_lib.Scenario, comp: comparison.Comparison, kind: str = "run"
) -> dict[str, Any]:
    """The run's row in ``runs.parquet``: id, flattened scenario, verdicts, test_error metrics, gaps."""
    row: dict[str, Any] = {"run_id": run_id, "kind": kind}
    row.update(scenario_lib.flatten(scenario))
    judgement = comp.judgement
    row["verdict"] = judgement.verdict
    # NaN also where no number of seeds would settle it (with verdict "inconclusive"), as in
    # judgement.json: the row must read back the same through strict JSON (a sweep's set-aside row)
    needed = float(judgement.seeds_needed)
    row["verdict.seeds_needed"] = needed if np.isfinite(needed) else float("nan")
    for group in judgement.groups:
        row[f"verdict.{group.group}"] = group.verdict
    test = comp.metrics[comp.metrics["observable"] == "test_error"]
    if not test.empty:
        for column in comparison.METRIC_COLUMNS[1:] + ["band_reach", "band_inner", "detected_t"]:
            row[f"test_error.{column}"] = float(test.iloc[0][column])
    final = comp.summary[comp.summary["observable"] == "test_error"].sort_values("t").iloc[-1]
    row["final_test_error"] = float(final["sim_mean"])
    row["final_test_error_sem"] = float(final["sim_sem"])
    row["final_theory_error"] = float(final["theory_mean"])
    for name in ("gaussian_equivalence", "dynamics", "theory"):
        gap = comp.gaps.get(name)
        if gap is not None:
            row[f"{name}.verdict"] = gap["verdict"]
            row[f"{name}.relative"] = float(gap["relative"])
    row.update(paired_landmarks.index_columns(comp.landmarks))
    return row


class ComputedRun(NamedTuple):
    """A run computed but not yet stored: everything :func:`store_run` writes (picklable)."""

    run_id: str
    scenario_toml: str
    manifest: dict[str, Any]
    trajectories: pd.DataFrame
    summary: pd.DataFrame
    metrics: pd.DataFrame
    judgement: dict[str, Any]
    index_row: dict[str, Any]
    landmarks: pd.DataFrame | None = None  # landmarks.parquet (harness.results.paired_landmarks)


def compute_run(
    scenario: scenario_lib.Scenario,
    *,
    progress: ProgressFn | None = None,
    extra_manifest: dict[str, Any] | None = None,
    checkpoint_dir: str | Path | None = None,
    theory_progress: SolveProgress | None = None,
) -> ComputedRun:
    """Simulate, pair with theory and compare, writing nothing but optional checkpoints.

    This is the half of :func:`run_and_store` that a sweep runs on a worker; the client
    then calls :func:`store_run`. With ``checkpoint_dir`` the simulation saves its state
    there every ``run.checkpoint_minutes`` and resumes from a checkpoint it finds.
    """
    started = _dt.datetime.now(_dt.UTC)
    result = run_experiment(
        scenario, progress=progress, checkpoint_dir=checkpoint_dir, theory_progress=theory_progress
    )
    extra: dict[str, Any] = {}
    if result.resumed_from_step:
        extra["resumed_from_step"] = result.resumed_from_step
    if result.data_notes:
        extra["data_model"] = result.data_notes
    return computed_run(
        scenario, result.trajectories, started=started, timings=result.timings, diverged_at=result.diverged_at,
        extra_manifest=extra | (extra_manifest or {}),
    )


def computed_run(
    scenario: scenario_lib.Scenario,
    traj: Trajectories,
    *,
    started: _dt.datetime,
    timings: dict[str, float],
    diverged_at: np.ndarray | None = None,
    kind: str = "run",
    extra_manifest: dict[str, Any] | None = None,
) -> ComputedRun:
    """Judge trajectories and assemble every file of their run (``kind`` "run" or "theory")."""
    run_id = scenario_lib.run_id(scenario) + ("-theory" if kind == "theory" else "")
    diverged_at = np.full(len(traj.seeds), np.nan) if diverged_at is None else np.asarray(diverged_at)
    comp = comparison.compare(traj, Margin.from_scenario(scenario), diverged_at,
                              paired_landmarks.LandmarkOptions.from_scenario(scenario))
    diverged = [
        {"seed": int(s), "t": float(t)} for s, t in zip(traj.seeds, diverged_at, strict=True) if np.isfinite(t)
    ]
    manifest = base_manifest(scenario, run_id, started)
    manifest.update(
        {
            "kind": kind,
            "diverged_seeds": diverged,
            "diverged_count": len(diverged),
            "paired": traj.paired,
            "evaluations": len(traj.t),
            "timings": timings,
        }
    )
    manifest.update(extra_manifest or {})
    return ComputedRun(
        run_id, scenario_lib.to_toml(scenario), manifest, traj.to_frame(), comp.summary, comp.metrics,
        judgement_record(comp), index_row(run_id, scenario, comp, kind=kind),
        comp.landmarks.frame() if comp.landmarks is not None else None,
    )


def store_run(computed: ComputedRun, out_dir: str | Path, *, force: bool = False) -> StoredRun:
    """Write a computed run's folder and index row atomically, then drop its checkpoint.

    A Ctrl-C waits until all three are done (harness.core.interrupts.uninterrupted): a run
    folder without its index row, or a stored run with its checkpoint, is never left.
    """
    with interrupts.uninterrupted():
        folder = write_run_folder(
            out_dir, computed.run_id,
            scenario_toml=computed.scenario_toml, manifest=computed.manifest,
            trajectories=computed.trajectories, summary=computed.summary, metrics=computed.metrics,
            judgement=computed.judgement, replace=force, landmarks=computed.landmarks,
        )
        append_index_row(out_dir, computed.index_row)
        discard_checkpoint(checkpoint_folder(out_dir, computed.run_id))
    return StoredRun(computed.run_id, folder, False, computed.metrics, computed.manifest, computed.judgement)


def run_and_store(
    scenario: scenario_lib.Scenario,
    out_dir: str | Path,
    *,
    force: bool = False,
    progress: ProgressFn | None = None,
    extra_manifest: dict[str, Any] | None = None,
    theory_progress: SolveProgress | None = None,
) -> StoredRun:
    """Simulate, pair with theory, compare, and write ``out_dir/<run_id>/`` atomically."""
    run_id = scenario_lib.run_id(scenario)
    folder = Path(out_dir) / run_id
    if is_complete_run(folder) and not force:
        return judge_stored_run(folder, scenario, out_dir)
    checkpoints = checkpoint_folder(out_dir, run_id)
    if force:
        discard_checkpoint(checkpoints)  # redo from the start, as asked
    computed = compute_run(scenario, progress=progress, extra_manifest=extra_manifest, checkpoint_dir=checkpoints,
                           theory_progress=theory_progress)
    return store_run(computed, out_dir, force=force)


def theory_and_store(
    scenario: scenario_lib.Scenario,
    out_dir: str | Path,
    *,
    force: bool = False,
    progress: SolveProgress | None = None,
) -> StoredRun:
    """Solve the theory alone, pair it with the stored simulation if there is one, and store it.

    The run's folder ``out_dir/<run_id>/``, when complete, gives the simulation: the theory
    is then judged against it exactly as ``harness run`` judges (the initial conditions are
    drawn again from the scenario, bit for bit those the run drew). Without one the ``sim``
    columns are NaN and nothing is judged. Stored in ``out_dir/<run_id>-theory/``; an
    identical stored theory run paired with the same simulation is reused unless ``force``.
    """
    identity = scenario_lib.run_id(scenario)
    simulated = Path(out_dir) / identity
    simulated = simulated if is_complete_run(simulated) else None
    folder = Path(out_dir) / (identity + "-theory")
    exists = is_complete_run(folder)
    if exists and not force and _paired_with(folder) == _simulation_of(simulated):
        return judge_stored_run(folder, scenario, out_dir)
    return store_run(compute_theory(scenario, simulation=simulated, progress=progress), out_dir, force=force or exists)


def _simulation_of(folder: Path | None) -> dict[str, Any] | None:
    """What identifies a stored simulation for a theory paired with it (None: no simulation)."""
    if folder is None:
        return None
    manifest = json.loads((folder / "manifest.json").read_text())
    return {"run_id": folder.name, "started": manifest.get("started")}


def _paired_with(theory_folder: Path) -> dict[str, Any] | None:
    return json.loads((theory_folder / "manifest.json").read_text()).get("simulation")


def compute_theory(
    scenario: scenario_lib.Scenario,
    *,
    simulation: str | Path | None = None,
    progress: SolveProgress | None = None,
) -> ComputedRun:
    """Solve the theory alone from the initial conditions a run would draw; nothing is written.

    With ``simulation`` (a complete run folder of the same scenario), the theory is paired
    with its stored simulation values and judged. The stored run's theory at t = 0 is the
    initial conditions themselves: it is compared with the new one, and a difference (a
    random stream that changed between versions) is warned about, since the pairing would
    then not be exact.
    """
    started = _dt.datetime.now(_dt.UTC)
    t, start, prediction, clock = theory_only(scenario, progress=progress)
    names = observable_names(scenario.student.hidden, scenario.teacher.hidden, scenario.student.train_second_layer)
    sim_values = np.full_like(prediction.values, np.nan)
    diverged_at, extra = None, {}
    if simulation is not None:
        folder = Path(simulation)
        manifest = json.loads((folder / "manifest.json").read_text())
        stored = from_frame(pd.read_parquet(folder / "trajectories.parquet"), paired=bool(manifest.get("paired", True)))
        if not (np.array_equal(stored.seeds, start.seeds) and np.array_equal(stored.t, t)
                and list(stored.observables) == list(names)):
            raise InputError(f"run folder '{folder}': its seeds, times or observables are not those its scenario "
                             "gives now; rerun it (harness run --force)")
        _warn_if_start_moved(folder, stored.theory[:, 0], prediction.values[:, 0])
        sim_values, diverged_at = stored.sim, divergence_times(stored, manifest)
        extra["simulation"] = _simulation_of(folder)
    traj = Trajectories(start.seeds, t, names, sim_values, prediction.values, prediction.paired)
    return computed_run(scenario, traj, started=started, timings=theory_timings(clock), diverged_at=diverged_at,
                        kind="theory", extra_manifest=extra)


def _warn_if_start_moved(folder: Path, stored_start: np.ndarray, start: np.ndarray) -> None:
    both = np.isfinite(stored_start) & np.isfinite(start)
    if both.any() and not np.array_equal(stored_start[both], start[both]):
        warnings.warn(
            f"the initial conditions drawn now differ from those run '{folder.name}' started from (by up to "
            f"{np.max(np.abs(stored_start[both] - start[both])):.2g}; another version of JAX or harness?): "
            "the theory is paired with a simulation that started elsewhere",
            RuntimeWarning, stacklevel=3,
        )


def judge_stored_run(folder: Path, scenario: scenario_lib.Scenario, out_dir: str | Path) -> StoredRun:
    """A complete stored run, judged with ``scenario``'s ``[agreement]`` and ``[landmarks]`` settings.

    Judging changes no computation (the settings are not part of the run_id), so a run
    stored under other settings, or before judgement.json (or its landmarks) existed, is judged
    again from its stored trajectories; its summary, metrics, judgement, landmarks, scenario copy
    and index row are rewritten atomically. Otherwise the stored files are read back as they are.
    """
    manifest = json.loads((folder / "manifest.json").read_text())
    stored_judgement = folder / "judgement.json"
    margin = Margin.from_scenario(scenario)
    landmark_options = paired_landmarks.LandmarkOptions.from_scenario(scenario)
    if stored_judgement.is_file():
        record = json.loads(stored_judgement.read_text())
        if Margin(record["margin"], record["floor"], record["alpha"]) == margin \
                and paired_landmarks.is_current(record, landmark_options):
            return StoredRun(folder.name, folder, True, pd.read_parquet(folder / "metrics.parquet"), manifest, record)
    traj = from_frame(pd.read_parquet(folder / "trajectories.parquet"), paired=bool(manifest.get("paired", True)))
    comp = comparison.compare(traj, margin, divergence_times(traj, manifest), landmark_options)
    record = judgement_record(comp)
    if comp.landmarks is not None:
        atomic_write_parquet(folder / LANDMARKS_NAME, comp.landmarks.frame())
    atomic_write_parquet(folder / "summary.parquet", comp.summary)
    atomic_write_parquet(folder / "metrics.parquet", comp.metrics)
    atomic_write_json(folder / "judgement.json", record)
    atomic_write_text(folder / "scenario.toml", scenario_lib.to_toml(scenario))
    append_index_row(out_dir, index_row(folder.name, scenario, comp, kind=manifest.get("kind", "run")))
    return StoredRun(folder.name, folder, True, comp.metrics, manifest, record)

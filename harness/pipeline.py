"""From a resolved scenario to a stored run: experiment, comparison, results store.

:func:`run_and_store` is what ``harness run`` (and every sweep point) does;
:func:`theory_and_store` is ``harness theory``. Both return a :class:`StoredRun`.
"""

from __future__ import annotations

import datetime as _dt
import platform
import sys
from importlib import metadata
from pathlib import Path
from typing import Any, NamedTuple

import jax
import numpy as np
import pandas as pd

from harness import comparison
from harness import scenario as scenario_lib
from harness.checkpoint import checkpoint_folder, discard_checkpoint
from harness.experiment import ProgressFn, run_experiment, theory_only, theory_timings
from harness.results_store import append_index_row, is_complete_run, write_run_folder
from harness.trajectories import Trajectories, observable_names

PACKAGES = ("harness", "numpy", "jax", "jaxlib", "optax", "diffrax", "equinox", "pandas", "pyarrow", "scipy")


class StoredRun(NamedTuple):
    run_id: str
    folder: Path
    skipped: bool  # True: an identical complete run already existed
    metrics: pd.DataFrame | None
    manifest: dict[str, Any] | None


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
        "dtype": scenario["run"]["dtype"],
        "seeds": scenario["run"]["seeds"],
    }


def index_row(run_id: str, scenario: scenario_lib.Scenario, summary: pd.DataFrame, metric_table: pd.DataFrame,
              kind: str = "run") -> dict[str, Any]:
    """The run's row in ``runs.parquet``: id, flattened scenario, test_error metrics."""
    row: dict[str, Any] = {"run_id": run_id, "kind": kind}
    row.update(scenario_lib.flatten(scenario))
    test = metric_table[metric_table["observable"] == "test_error"]
    if not test.empty:
        for column in comparison.METRIC_COLUMNS[1:] + comparison.METRIC_EXTRA_COLUMNS:
            row[f"test_error.{column}"] = float(test.iloc[0][column])
    final = summary[summary["observable"] == "test_error"].sort_values("t").iloc[-1]
    row["final_test_error"] = float(final["sim_mean"])
    row["final_theory_error"] = float(final["theory_mean"])
    return row


class ComputedRun(NamedTuple):
    """A run computed but not yet stored: everything :func:`store_run` writes (picklable)."""

    run_id: str
    scenario_toml: str
    manifest: dict[str, Any]
    trajectories: pd.DataFrame
    summary: pd.DataFrame
    metrics: pd.DataFrame
    index_row: dict[str, Any]


def compute_run(
    scenario: scenario_lib.Scenario,
    *,
    progress: ProgressFn | None = None,
    extra_manifest: dict[str, Any] | None = None,
    checkpoint_dir: str | Path | None = None,
) -> ComputedRun:
    """Simulate, pair with theory and compare, writing nothing but optional checkpoints.

    This is the half of :func:`run_and_store` that a sweep runs on a worker; the client
    then calls :func:`store_run`. With ``checkpoint_dir`` the simulation saves its state
    there every ``run.checkpoint_minutes`` and resumes from a checkpoint it finds.
    """
    run_id = scenario_lib.run_id(scenario)
    started = _dt.datetime.now(_dt.UTC)
    result = run_experiment(scenario, progress=progress, checkpoint_dir=checkpoint_dir)
    traj = result.trajectories
    summary = comparison.summarise(traj)
    metric_table = comparison.metrics(summary)
    diverged = [
        {"seed": int(s), "t": float(t)} for s, t in zip(traj.seeds, result.diverged_at, strict=True) if np.isfinite(t)
    ]
    manifest = base_manifest(scenario, run_id, started)
    manifest.update(
        {
            "kind": "run",
            "diverged_seeds": diverged,
            "diverged_count": len(diverged),
            "paired": traj.paired,
            "evaluations": len(traj.t),
            "timings": result.timings,
        }
    )
    if result.resumed_from_step:
        manifest["resumed_from_step"] = result.resumed_from_step
    if result.data_notes:
        manifest["data_model"] = result.data_notes
    gaps = comparison.equivalence_gaps(traj)  # notes, section 5: which of the two ways a theory fails
    manifest.update({name: value if np.isfinite(value) else None for name, value in gaps.items()})  # strict JSON
    manifest.update(extra_manifest or {})
    return ComputedRun(
        run_id, scenario_lib.to_toml(scenario), manifest, traj.to_frame(), summary, metric_table,
        {**index_row(run_id, scenario, summary, metric_table), **gaps},
    )


def store_run(computed: ComputedRun, out_dir: str | Path, *, force: bool = False) -> StoredRun:
    """Write a computed run's folder and index row atomically, then drop its checkpoint."""
    folder = write_run_folder(
        out_dir, computed.run_id,
        scenario_toml=computed.scenario_toml, manifest=computed.manifest,
        trajectories=computed.trajectories, summary=computed.summary, metrics=computed.metrics, replace=force,
    )
    append_index_row(out_dir, computed.index_row)
    discard_checkpoint(checkpoint_folder(out_dir, computed.run_id))
    return StoredRun(computed.run_id, folder, False, computed.metrics, computed.manifest)


def run_and_store(
    scenario: scenario_lib.Scenario,
    out_dir: str | Path,
    *,
    force: bool = False,
    progress: ProgressFn | None = None,
    extra_manifest: dict[str, Any] | None = None,
) -> StoredRun:
    """Simulate, pair with theory, compare, and write ``out_dir/<run_id>/`` atomically."""
    run_id = scenario_lib.run_id(scenario)
    folder = Path(out_dir) / run_id
    if is_complete_run(folder) and not force:
        return StoredRun(run_id, folder, True, None, None)
    checkpoints = checkpoint_folder(out_dir, run_id)
    if force:
        discard_checkpoint(checkpoints)  # redo from the start, as asked
    computed = compute_run(scenario, progress=progress, extra_manifest=extra_manifest, checkpoint_dir=checkpoints)
    return store_run(computed, out_dir, force=force)


def theory_and_store(scenario: scenario_lib.Scenario, out_dir: str | Path, *, force: bool = False) -> StoredRun:
    """Solve the theory alone and write the same tables (``sim`` columns are NaN)."""
    run_id = scenario_lib.run_id(scenario) + "-theory"
    folder = Path(out_dir) / run_id
    if is_complete_run(folder) and not force:
        return StoredRun(run_id, folder, True, None, None)
    started = _dt.datetime.now(_dt.UTC)
    t, start, values, clock = theory_only(scenario)
    names = observable_names(
        scenario["student"]["hidden"], scenario["teacher"]["hidden"], scenario["student"]["train_second_layer"]
    )
    traj = Trajectories(start.seeds, t, names, np.full_like(values, np.nan), values)
    summary = comparison.summarise(traj)
    metric_table = comparison.metrics(summary)
    manifest = base_manifest(scenario, run_id, started)
    manifest.update(
        {"kind": "theory", "diverged_seeds": [], "diverged_count": 0, "paired": True, "evaluations": len(t),
         "timings": theory_timings(clock) | {"simulation_s": 0.0, "compile_s": 0.0}}
    )
    write_run_folder(
        out_dir, run_id,
        scenario_toml=scenario_lib.to_toml(scenario), manifest=manifest,
        trajectories=traj.to_frame(), summary=summary, metrics=metric_table, replace=force,
    )
    append_index_row(out_dir, index_row(run_id, scenario, summary, metric_table, kind="theory"))
    return StoredRun(run_id, folder, False, metric_table, manifest)

"""The results store: run folders and the run index ``runs.parquet``, written atomically.

A run folder is assembled under a hidden temporary name and renamed into place only when
every file in it is complete (harness.core.files), so a folder named after a run_id is
always a complete run. The index ``runs.parquet`` is rewritten under an exclusive lock, so
concurrent writers (a sweep's points finishing together) never lose a row.
"""

from __future__ import annotations

import fcntl
import os
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import pandas as pd

from harness.core.files import (
    atomic_write_json,
    atomic_write_parquet,
    atomic_write_text,
    publish_folder,
    staging_folder,
)

RUN_FILES = ("scenario.toml", "manifest.json", "trajectories.parquet", "summary.parquet", "metrics.parquet")
INDEX_NAME = "runs.parquet"
LANDMARKS_NAME = "landmarks.parquet"
KEPT_ON_REPLACE = ("figures",)
"""What a run folder keeps when ``--force`` replaces its run (write_run_folder)."""


def is_complete_run(folder: str | Path) -> bool:
    """A run folder is complete when it exists under its final name with every file."""
    folder = Path(folder)
    return folder.is_dir() and all((folder / name).is_file() for name in RUN_FILES)


def write_run_folder(
    out_dir: str | Path,
    name: str,
    *,
    scenario_toml: str,
    manifest: dict[str, Any],
    trajectories: pd.DataFrame,
    summary: pd.DataFrame,
    metrics: pd.DataFrame,
    judgement: dict[str, Any] | None = None,
    replace: bool = False,
    landmarks: pd.DataFrame | None = None,
) -> Path:
    """Write the files of a run and publish the folder ``out_dir/name`` atomically.

    ``judgement.json`` (the verdict, harness.results.judgement) and ``landmarks.parquet`` (each
    seed's landmarks, harness.results.paired_landmarks) are derived from the trajectories and can
    be rewritten later, so they are not among the :data:`RUN_FILES` that make a run complete.
    With ``replace`` the folder of an earlier run of the same name is replaced, except for its
    ``figures/`` (:data:`KEPT_ON_REPLACE`): drawn by the user, perhaps at a chosen size, they
    are kept, and marked stale by dating them a second before the new tables (a figure older
    than its tables is what ``harness report`` redraws, harness.plot.report), so they are
    redrawn even when the replacement came within the file system's clock resolution.
    """
    final = Path(out_dir) / name
    with staging_folder(out_dir, name) as staging:
        atomic_write_text(staging / "scenario.toml", scenario_toml)
        atomic_write_parquet(staging / "trajectories.parquet", trajectories)
        atomic_write_parquet(staging / "summary.parquet", summary)
        atomic_write_parquet(staging / "metrics.parquet", metrics)
        atomic_write_json(staging / "manifest.json", manifest)
        if judgement is not None:
            atomic_write_json(staging / "judgement.json", judgement)
        if landmarks is not None:
            atomic_write_parquet(staging / LANDMARKS_NAME, landmarks)
        publish_folder(staging, final, replace=replace, keep=KEPT_ON_REPLACE)
    if replace:
        _mark_stale(final)
    return final


def _mark_stale(folder: Path) -> None:
    """Date every kept figure a second before the run's summary table (see write_run_folder)."""
    tables = (folder / "summary.parquet").stat().st_mtime
    for kept in KEPT_ON_REPLACE:
        for path in (folder / kept).rglob("*") if (folder / kept).is_dir() else ():
            if path.is_file():
                status = path.stat()
                os.utime(path, (status.st_atime, min(status.st_mtime, tables - 1.0)))


@contextmanager
def _index_lock(out_dir: Path) -> Iterator[None]:
    out_dir.mkdir(parents=True, exist_ok=True)
    with open(out_dir / ".runs.lock", "a+") as lock:
        fcntl.flock(lock, fcntl.LOCK_EX)
        try:
            yield
        finally:
            fcntl.flock(lock, fcntl.LOCK_UN)


def _remove_index_copies(out_dir: Path) -> None:
    """Delete temporary copies of the index that killed writers left (call with the lock held).

    Every writer of ``runs.parquet`` holds the index lock while its copy exists, and a
    killed process's lock is released by the kernel; so while we hold the lock, any copy
    found is a leftover, however young.
    """
    for leftover in out_dir.glob(f".{INDEX_NAME}.*.partial"):
        leftover.unlink(missing_ok=True)


def remove_index_leftovers(out_dir: str | Path) -> None:
    """Delete the index's temporary copies that killed writers left in ``out_dir`` (if it exists)."""
    out_dir = Path(out_dir)
    if out_dir.is_dir():
        with _index_lock(out_dir):
            _remove_index_copies(out_dir)


def append_index_row(out_dir: str | Path, row: dict[str, Any], *, key: str = "run_id") -> None:
    """Add ``row`` to ``out_dir/runs.parquet``, replacing an earlier row with the same key."""
    out_dir = Path(out_dir)
    with _index_lock(out_dir):
        _remove_index_copies(out_dir)
        path = out_dir / INDEX_NAME
        new = pd.DataFrame([row])
        if path.exists():
            old = pd.read_parquet(path)
            if key in old.columns:
                old = old[old[key] != row[key]]
            frames = [frame for frame in (old, new) if not frame.empty]
            new = pd.concat(frames, ignore_index=True) if len(frames) > 1 else frames[0]
        atomic_write_parquet(path, new)


def read_index(out_dir: str | Path) -> pd.DataFrame:
    """The run index of a results folder (empty if there is none yet)."""
    path = Path(out_dir) / INDEX_NAME
    return pd.read_parquet(path) if path.exists() else pd.DataFrame()

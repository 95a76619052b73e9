"""Reading a stored run back: its verdict, and what its verdict was computed from.

A run folder (harness.results.store) holds ``judgement.json``, the verdict the run was
judged with. Runs stored before that file existed are judged from their stored trajectories
when read (nothing is written).
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from harness.core import scenario as scenario_lib
from harness.core.files import strict_json_value
from harness.core.trajectories import Trajectories, from_frame
from harness.results import comparison
from harness.results.judgement import Margin
from harness.results.paired_landmarks import LandmarkOptions


def judgement_record(comp: comparison.Comparison) -> dict[str, Any]:
    """What ``judgement.json`` holds: the verdict, its settings and band, the groups, the gaps and the landmarks.

    Non-finite numbers are None, as in the file (strict JSON): a ``seeds_needed`` of None
    means "no number of seeds would settle it" where the verdict is inconclusive.
    """
    record = {**comp.judgement.to_dict(), "gaps": comp.gaps}
    if comp.landmarks is not None:
        record["landmarks"] = comp.landmarks.to_dict()  # harness.results.paired_landmarks
    return strict_json_value(record)


def read_judgement(folder: Path) -> dict[str, Any] | None:
    """A stored run's judgement.json; for a run stored before it existed, its verdict computed now.

    The verdict is then judged from the stored trajectories with the ``[agreement]`` settings
    of the stored scenario (defaults where it has none); nothing is written. None when the
    folder has no trajectories to judge.
    """
    path = Path(folder) / "judgement.json"
    if path.is_file():
        return json.loads(path.read_text())
    if not (Path(folder) / "trajectories.parquet").is_file():
        return None
    manifest = json.loads((Path(folder) / "manifest.json").read_text())
    table = scenario_lib.read_table(Path(folder) / "scenario.toml") if (Path(folder) / "scenario.toml").is_file() \
        else {}
    margin = Margin.from_scenario(table)
    traj = from_frame(pd.read_parquet(Path(folder) / "trajectories.parquet"), paired=bool(manifest.get("paired", True)))
    return judgement_record(comparison.compare(traj, margin, divergence_times(traj, manifest),
                                               LandmarkOptions.from_scenario(table)))


def divergence_times(traj: Trajectories, manifest: dict[str, Any]) -> np.ndarray:
    """Each seed's divergence time from the manifest (NaN: never diverged)."""
    diverged_at = np.full(len(traj.seeds), np.nan)
    seeds = list(traj.seeds)
    for entry in manifest.get("diverged_seeds", []):
        if isinstance(entry, dict) and entry.get("seed") in seeds:
            diverged_at[seeds.index(entry["seed"])] = entry["t"]
    return diverged_at



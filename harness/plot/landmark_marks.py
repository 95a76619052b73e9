"""Landmarks drawn onto a learning curve: where the plateau lies, and when each side leaves it.

The marks come from the landmarks section of a run's judgement.json
(harness.results.paired_landmarks): no statistics are done here.

* the plateau: a light vertical band from the simulation's mean plateau entry to its mean exit,
  and a thin line at its mean height;
* the exit: the simulation's and the theory's mean exit times, each with its pointwise 95 %
  interval as a horizontal error bar, just above (simulation) and below (theory) the error
  level that defines the exit, (1 - exit_fraction) x the plateau height, so the bars sit where
  the curves cross that level without hiding each other.
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any

from matplotlib.axes import Axes

from harness.core.files import nulls_as_nan
from harness.plot.reading import read_json
from harness.plot.style import SIM_COLOR, THEORY_COLOR

PLATEAU_COLOR = "#ececec"
MARK_SHIFT = 1.3
"""The exit marks sit this factor above (simulation) and below (theory) the exit level (a log axis)."""


def read_landmarks(run_dir: Path) -> dict[str, Any] | None:
    """The landmarks section of a run's judgement.json (None: the run has none)."""
    path = Path(run_dir) / "judgement.json"
    if not path.is_file():
        return None
    section = nulls_as_nan(read_json(path)).get("landmarks")
    return section if isinstance(section, dict) else None


def _finite(value: Any) -> bool:
    return value is not None and isinstance(value, int | float) and math.isfinite(value)


def draw_landmarks(ax: Axes, landmarks: dict[str, Any] | None) -> None:
    """Mark the plateau and the exit times (module docstring) on the learning-curve axes ``ax``."""
    if not landmarks:
        return
    rows = {row["landmark"]: row for row in landmarks.get("table", [])}
    entry, exit_, height = (rows.get(name, {}) for name in ("plateau_entry", "plateau_exit", "plateau_height"))
    if _finite(entry.get("sim_mean")) and _finite(exit_.get("sim_mean")) and 0 < entry["sim_mean"] < exit_["sim_mean"]:
        ax.axvspan(entry["sim_mean"], exit_["sim_mean"], color=PLATEAU_COLOR, linewidth=0, zorder=0,
                   label="plateau, sim.")
    level = height.get("sim_mean") if _finite(height.get("sim_mean")) else height.get("theory_mean")
    if not _finite(level) or level <= 0:
        return
    if _finite(entry.get("sim_mean")) and _finite(exit_.get("sim_mean")):
        ax.hlines(level, entry["sim_mean"], exit_["sim_mean"], color=SIM_COLOR, linewidth=0.5, alpha=0.6, zorder=1)
    exit_level = level * (1.0 - float(landmarks.get("options", {}).get("exit_fraction", 0.5)))
    sides = (("sim", SIM_COLOR, "v", MARK_SHIFT), ("theory", THEORY_COLOR, "^", 1 / MARK_SHIFT))
    for side, color, marker, shift in sides:
        mean, low, high = exit_.get(f"{side}_mean"), exit_.get(f"{side}_low"), exit_.get(f"{side}_high")
        if not _finite(mean) or mean <= 0:
            continue
        xerr = [[mean - low], [high - mean]] if _finite(low) and _finite(high) else None
        ax.errorbar([mean], [exit_level * shift], xerr=xerr, fmt=marker, color=color, markersize=3.5, elinewidth=0.9,
                    capsize=2.0, zorder=4, label=f"plateau exit ± 95 %, {'sim.' if side == 'sim' else 'theory'}")

"""The stored tables a figure is drawn from, read with one-line errors naming the file.

Three kinds of result folder are told apart by which files exist (:func:`folder_kind`):
a run folder (manifest.json + summary.parquet + metrics.parquet), a finite-size-scaling
folder (verdict.json) and a sweep folder (sweep.json + runs.parquet). A missing file or
column is a :class:`~harness.plot.style.FigureInputError` that names it.
"""

from __future__ import annotations

import json
from collections.abc import Iterable, Sequence
from pathlib import Path

import numpy as np
import pandas as pd

from harness.plot.style import FigureInputError
from harness.results import comparison


def folder_kind(path: Path) -> str:
    """Return "run", "scaling" or "sweep" from the files present; raise FigureInputError otherwise."""
    path = Path(path)
    if not path.is_dir():
        raise FigureInputError(f"{path}: not a folder; expected a run, scaling or sweep result folder")
    if (path / "verdict.json").is_file():
        return "scaling"
    if (path / "sweep.json").is_file():
        if not (path / "runs.parquet").is_file():
            raise FigureInputError(
                f"{path / 'runs.parquet'}: missing; a sweep folder needs sweep.json and runs.parquet"
            )
        return "sweep"
    if (path / "manifest.json").is_file():
        for table in ("summary.parquet", "metrics.parquet"):
            if not (path / table).is_file():
                raise FigureInputError(
                    f"{path / table}: missing; a run folder needs manifest.json, summary.parquet and metrics.parquet"
                )
        return "run"
    raise FigureInputError(
        f"{path}: not a result folder; expected manifest.json + summary.parquet (run), "
        "verdict.json (scaling) or sweep.json + runs.parquet (sweep)"
    )


def read_parquet_table(path: Path, columns: Iterable[str], **kwargs: object) -> pd.DataFrame:
    try:
        frame = pd.read_parquet(path, **kwargs)
    except FileNotFoundError:
        raise FigureInputError(f"{path}: missing table") from None
    except Exception as error:  # pyarrow raises several types for unreadable files
        raise FigureInputError(f"{path}: not a readable Parquet table ({type(error).__name__})") from None
    missing = [column for column in columns if column not in frame.columns]
    if missing:
        raise FigureInputError(f"{path}: missing column(s) {', '.join(missing)}")
    return frame


SUMMARY_COLUMNS = tuple(comparison.SUMMARY_COLUMNS)
TRAJECTORY_COLUMNS = ("seed", "t", "observable", "sim", "theory")
METRIC_COLUMNS = tuple(comparison.METRIC_COLUMNS)


def read_summary(run_dir: Path) -> pd.DataFrame:
    return read_parquet_table(Path(run_dir) / "summary.parquet", SUMMARY_COLUMNS)


def read_metrics(run_dir: Path) -> pd.DataFrame:
    return read_parquet_table(Path(run_dir) / "metrics.parquet", METRIC_COLUMNS)


def read_trajectories(run_dir: Path, observables: Sequence[str]) -> pd.DataFrame:
    """Per-seed rows of the given observables only (the full table can be large)."""
    return read_parquet_table(
        Path(run_dir) / "trajectories.parquet",
        TRAJECTORY_COLUMNS,
        filters=[("observable", "in", list(observables))],
    )


def read_json(path: Path) -> dict:
    try:
        content = json.loads(Path(path).read_text())
    except FileNotFoundError:
        raise FigureInputError(f"{path}: missing") from None
    except json.JSONDecodeError as error:
        raise FigureInputError(f"{path}: not valid JSON ({error.msg} at line {error.lineno})") from None
    if not isinstance(content, dict):
        raise FigureInputError(f"{path}: expected a JSON object")
    return content


def observable_rows(summary: pd.DataFrame, name: str) -> pd.DataFrame:
    """Rows of one observable at t > 0, sorted by time (t = 0 dropped for the log axis)."""
    part = summary[(summary["observable"] == name) & (summary["t"] > 0)]
    return part.sort_values("t")


def is_theory_only(summary: pd.DataFrame) -> bool:
    """True for a run with no simulation (``harness theory``): no finite simulated test error."""
    test = summary[summary["observable"] == "test_error"]
    return not np.isfinite(test["sim_mean"].to_numpy(dtype=float)).any()

"""Comparison figures drawn from stored result tables alone, in the project's house style.

Three kinds of folder are understood (the kind is told by which files exist,
:func:`folder_kind`), each drawn by its own module:

- a run folder (manifest.json + summary.parquet): the learning curve over a residual panel,
  and the order parameters (:mod:`harness.plot.run_figures`);
- a finite-size-scaling folder (verdict.json): the gap against N with the fitted law
  a N^-b + c, the band of the offset c and the verdict (:mod:`harness.plot.scaling_figure`);
- a sweep folder (sweep.json + runs.parquet): final values of simulation and theory, or one
  metric, over the swept keys (:mod:`harness.plot.sweep_figure`).

The house style, sizes and saving are in :mod:`harness.plot.style`, the readers of the
tables in :mod:`harness.plot.reading`; this module gathers their public names and
:func:`write_figures`, which draws whatever a folder holds.

Nothing is recomputed: every figure is a pure function of the tables in the folder, so
figures can be redrawn at another size or in another format at any time. No matplotlib
backend is chosen on import or while drawing; each file is written by its format's own
backend when it is saved (harness.plot.style).
"""

from __future__ import annotations

from pathlib import Path

from harness.plot.reading import (
    METRIC_COLUMNS,
    SUMMARY_COLUMNS,
    TRAJECTORY_COLUMNS,
    folder_kind,
    is_theory_only,
    observable_rows,
    read_json,
    read_metrics,
    read_parquet_table,
    read_summary,
    read_trajectories,
)
from harness.plot.run_figures import (
    RUN_FIGURES,
    constant_families,
    order_parameter_entries,
    overlap_differs,
    plot_learning_curve,
    plot_order_parameters,
    write_run_figures,
)
from harness.plot.scaling_figure import (
    SCALING_KEYS,
    gap_label,
    plot_scaling,
    read_scaling,
    value_with_error,
    write_scaling_figure,
)
from harness.plot.style import (
    DEFAULT_OPTIONS,
    FORMATS,
    HOUSE_RC,
    FigureInputError,
    FigureOptions,
    FigureSize,
    parse_formats,
    parse_size,
    save_figure,
)
from harness.plot.sweep_figure import (
    FINAL_METRIC,
    GROUPS,
    SWEEP_METRICS,
    VERDICT_MARKERS,
    check_request,
    final_values,
    parse_groups,
    plot_sweep,
    read_sweep,
    sweep_figure_stem,
    sweep_metric_column,
    write_sweep_figure,
)

__all__ = [
    "DEFAULT_OPTIONS", "FINAL_METRIC", "FORMATS", "GROUPS", "HOUSE_RC", "METRIC_COLUMNS", "RUN_FIGURES",
    "SCALING_KEYS", "SUMMARY_COLUMNS", "SWEEP_METRICS", "TRAJECTORY_COLUMNS", "VERDICT_MARKERS",
    "FigureInputError", "FigureOptions", "FigureSize", "check_folder", "check_request", "constant_families",
    "final_values", "folder_kind", "gap_label", "is_theory_only", "observable_rows", "order_parameter_entries",
    "overlap_differs", "parse_formats", "parse_groups", "parse_size", "plot_learning_curve",
    "plot_order_parameters", "plot_scaling", "plot_sweep", "read_json", "read_metrics", "read_parquet_table",
    "read_scaling", "read_summary", "read_sweep", "read_trajectories", "save_figure", "sweep_figure_stem",
    "sweep_metric_column", "value_with_error", "write_figures", "write_run_figures", "write_scaling_figure",
    "write_sweep_figure",
]

_WRITERS = {"run": write_run_figures, "scaling": write_scaling_figure, "sweep": write_sweep_figure}


def check_folder(folder: Path, options: FigureOptions = DEFAULT_OPTIONS) -> str:
    """Check before drawing that ``folder`` is a result folder whose figures can be drawn as asked.

    Returns its kind. Raises FigureInputError (the folder's tables, a sweep's --metric,
    --sweep-axes or --groups) or InputError (``folder/figures`` cannot be written) in one line.
    """
    from harness.core.destinations import check_output_folder

    kind = folder_kind(folder)
    if kind == "sweep":
        check_request(folder, options)
    check_output_folder(Path(folder) / "figures", "figure folder")
    return kind


def write_figures(folder: Path, options: FigureOptions = DEFAULT_OPTIONS) -> list[Path]:
    """Write the figures of any result folder (kind detected from its files)."""
    return _WRITERS[folder_kind(folder)](Path(folder), options)

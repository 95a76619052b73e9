"""The sweep figure: what a sweep's runs ended with, over the swept keys.

Drawn from a sweep folder's sweep.json and runs.parquet (harness.studies.sweep), and, for
order-parameter groups, from the run folders it holds (``<sweep>/<run_id>/summary.parquet``).

Over one swept key (curves), the default shows, for each observable group asked for
(``--groups``, default ``test_error``), one panel of its final value: the simulation's mean
over seeds with SEM error bars and the theory's mean on the same axes, one colour per
combination of the other swept keys. Each simulation point's marker says the verdict
(harness.results.judgement) of that group in its run, or of the run when the group's own is
not stored: filled agree, open inconclusive, a cross disagree. Other metrics
(``--metric max_abs_z`` and so on) are one panel of that metric, with the same markers.
Over two swept keys, a heat map of the metric, one panel per combination of the others
(a heat map has no room for error bars: it shows the simulation's mean).
A NaN divergence time means "never departed" and is drawn as such, not as a missing value.
"""

from __future__ import annotations

import math
import re
from collections.abc import Sequence
from pathlib import Path

import numpy as np
import pandas as pd
from matplotlib import rc_context
from matplotlib.axes import Axes
from matplotlib.figure import Figure

from harness.core.trajectories import observable_group
from harness.plot.reading import read_json, read_parquet_table
from harness.plot.run_figures import order_parameter_entries
from harness.plot.style import (
    DEFAULT_OPTIONS,
    DEFAULT_SIZE,
    ENTRY_PALETTE,
    FAMILY_LABELS,
    HEAT_MAP,
    HOUSE_RC,
    INK,
    MUTED,
    THEORY_DASHES,
    FigureInputError,
    FigureOptions,
    FigureSize,
    new_figure,
    save_figure,
)

SWEEP_METRICS = {
    "final_test_error": ("final_test_error", r"final $\varepsilon_g$ (simulation)"),
    "max_abs_z": ("test_error.max_abs_z", r"max $|z|$ of $\varepsilon_g$ (detectability)"),
    "band_reach": ("test_error.band_reach", r"band of $\varepsilon_g$ reaches (× margin)"),
    "final_rel_err": ("test_error.final_rel_err", r"final relative error of $\varepsilon_g$"),
    "divergence_t": ("test_error.divergence_t", r"divergence time $t$"),
}
FINAL_METRIC = "final_test_error"
"""The metric whose curves show final values of simulation and theory per group (module docstring)."""
GROUPS = ("test_error", "overlap_error", "Q", "R", "T", "v")
"""Observable groups a sweep figure can show (those of harness.results.judgement)."""
GROUP_LABELS = {"test_error": r"$\varepsilon_g$", "overlap_error": r"$\varepsilon_g(Q,R,T)$", **FAMILY_LABELS}
# Marker of a sweep point by its verdict (harness.results.judgement), so the figure shows the
# verdict the tables give: filled agree, open inconclusive, a cross disagree.
VERDICT_MARKERS = {"agree": ("o", True), "inconclusive": ("o", False), "disagree": ("X", True), "n/a": ("s", False)}
MISSING_CELL = "#d8d8d8"
MAX_LEGEND_CURVES = 8


def read_sweep(folder: Path) -> tuple[list[str], pd.DataFrame]:
    """The swept keys and the runs.parquet rows of this sweep's runs."""
    folder = Path(folder)
    spec = read_json(folder / "sweep.json")
    for key in ("swept_keys", "run_ids"):
        if not isinstance(spec.get(key), list):
            raise FigureInputError(f"{folder / 'sweep.json'}: key {key!r} must be a list")
    keys = [str(key) for key in spec["swept_keys"]]
    if not keys:
        raise FigureInputError(f"{folder / 'sweep.json'}: swept_keys is empty")
    runs = read_parquet_table(folder / "runs.parquet", ["run_id", *keys])
    runs = runs[runs["run_id"].isin(spec["run_ids"])]
    if runs.empty:
        raise FigureInputError(f"{folder / 'runs.parquet'}: none of the sweep's run_ids has a row")
    return keys, runs


def sweep_metric_column(metric: str, runs: pd.DataFrame, where: Path | str = "runs.parquet") -> tuple[str, str]:
    """Resolve a metric name (short name or runs.parquet column) to (column, axis label)."""
    if metric in SWEEP_METRICS:
        column, label = SWEEP_METRICS[metric]
    elif metric in runs.columns and pd.api.types.is_numeric_dtype(runs[metric]):
        column, label = metric, metric
    else:
        raise FigureInputError(
            f"--metric {metric!r}: expected one of {', '.join(SWEEP_METRICS)} or a numeric column of {where}"
        )
    if column not in runs.columns:
        raise FigureInputError(f"{where}: missing column {column!r} for metric {metric!r}")
    return column, label


def _key_label(key: str) -> str:
    known = {
        "sgd.learning_rate": r"learning rate $\eta$",
        "sgd.second_layer_learning_rate": r"$\eta_v$",
        "data.input_dim": r"$N$",
        "student.hidden": r"$K$",
        "teacher.hidden": r"$M$",
        "teacher.noise_std": r"$\sigma$",
        "sgd.weight_decay": r"weight decay $\kappa$",
        "sgd.time": r"training time $t$",
    }
    return known.get(key, key)


def _format_value(value: object) -> str:
    if isinstance(value, (float, np.floating)):
        if float(value).is_integer() and abs(value) < 1e6:
            return str(int(value))
        return f"{value:.3g}"
    return str(value)


def _wants_log(values: np.ndarray) -> bool:
    numeric = pd.to_numeric(pd.Series(values), errors="coerce").to_numpy(dtype=float)
    return bool(np.all(np.isfinite(numeric)) and np.all(numeric > 0) and numeric.max() / numeric.min() >= 20.0)


def parse_groups(text: str) -> tuple[str, ...]:
    """Parse ``--groups``: comma-separated observable groups (test_error, overlap_error, Q, R, T, v)."""
    groups = tuple(dict.fromkeys(part.strip() for part in text.split(",") if part.strip()))
    bad = [group for group in groups if group not in GROUPS]
    if not groups or bad:
        raise FigureInputError(f"--groups {text!r}: expected a comma-separated list from {', '.join(GROUPS)}")
    return groups


def chosen_axes(swept_keys: Sequence[str], axes_keys: Sequence[str] | None) -> list[str]:
    """The swept key(s) to lay out: ``axes_keys`` (one or two of the swept keys) or the first two."""
    chosen = list(axes_keys) if axes_keys else list(swept_keys[:2])
    unknown = [key for key in chosen if key not in swept_keys]
    if unknown or not 1 <= len(chosen) <= 2:
        raise FigureInputError(
            f"--sweep-axes {','.join(chosen)!r}: expected one or two of the swept keys {', '.join(swept_keys)}"
        )
    return chosen


def check_request(folder: Path, options: FigureOptions) -> tuple[list[str], pd.DataFrame]:
    """Everything ``harness figure`` asks of a sweep folder, checked before anything is drawn.

    Returns the swept keys and the runs; raises FigureInputError naming the option otherwise.
    """
    keys, runs = read_sweep(folder)
    sweep_metric_column(options.metric, runs, Path(folder) / "runs.parquet")
    chosen = chosen_axes(keys, options.sweep_axes)
    if tuple(options.groups) != ("test_error",):
        if options.metric != FINAL_METRIC:
            raise FigureInputError(f"--groups applies to --metric {FINAL_METRIC} only, not to {options.metric!r}")
        if len(chosen) != 1:
            raise FigureInputError(
                "--groups: a heat map over two swept keys shows the final test error only; "
                "pick one key with --sweep-axes for a panel per group"
            )
        for group in options.groups:
            final_values(folder, runs, group)  # the runs store it (read from their folders)
    return keys, runs


def final_values(folder: Path | None, runs: pd.DataFrame, group: str) -> pd.DataFrame:
    """Each run's final value of ``group``: columns run_id, observable, label, sim, sem, theory.

    The test error comes from runs.parquet (final_test_error, final_test_error_sem,
    final_theory_error; NaN where an older table lacks one); every other group from the
    final time of each run folder's summary.parquet in ``folder`` (Q and T keep i <= j).
    """
    columns = ["run_id", "observable", "label", "sim", "sem", "theory"]
    if group == "test_error":
        frame = pd.DataFrame({
            "run_id": runs["run_id"].to_numpy(),
            "observable": "test_error",
            "label": GROUP_LABELS["test_error"],
            "sim": pd.to_numeric(runs["final_test_error"], errors="coerce").to_numpy(dtype=float),
            "sem": _column(runs, "final_test_error_sem"),
            "theory": _column(runs, "final_theory_error"),
        })
        return frame[columns]
    parts = []
    for run_id in runs["run_id"] if folder is not None else ():
        path = Path(folder) / str(run_id) / "summary.parquet"
        if not path.is_file():
            continue
        summary = read_parquet_table(path, ("t", "observable", "sim_mean", "sim_sem", "theory_mean"))
        summary = summary[summary["observable"].map(observable_group) == group]
        if summary.empty:
            continue
        labels = dict(order_parameter_entries(summary["observable"].unique()).get(group, []))
        if group == "overlap_error":
            labels = {"overlap_error": GROUP_LABELS["overlap_error"]}
        final = summary[summary["t"] == summary["t"].max()]
        final = final[final["observable"].isin(labels)]
        parts.append(pd.DataFrame({
            "run_id": run_id, "observable": final["observable"].to_numpy(),
            "label": final["observable"].map(labels).to_numpy(), "sim": final["sim_mean"].to_numpy(dtype=float),
            "sem": final["sim_sem"].to_numpy(dtype=float), "theory": final["theory_mean"].to_numpy(dtype=float),
        }))
    if not parts:
        raise FigureInputError(
            f"--groups {group}: no run of the sweep in '{folder}' stores {group} (each <run_id>/summary.parquet)"
        )
    return pd.concat(parts, ignore_index=True)[columns]


def _column(runs: pd.DataFrame, name: str) -> np.ndarray:
    if name not in runs.columns:
        return np.full(len(runs), np.nan)
    return pd.to_numeric(runs[name], errors="coerce").to_numpy(dtype=float)


def plot_sweep(
    swept_keys: Sequence[str],
    runs: pd.DataFrame,
    *,
    metric: str = FINAL_METRIC,
    axes_keys: Sequence[str] | None = None,
    size: FigureSize = DEFAULT_SIZE,
    groups: Sequence[str] = ("test_error",),
    finals: dict[str, pd.DataFrame] | None = None,
) -> Figure:
    """The sweep's outcome over one swept key (curves) or two (a heat map), see the module docstring.

    ``axes_keys`` picks the swept key(s) to lay out (default: the first two swept keys).
    With curves, every combination of the remaining swept keys gets its own colour; with a
    heat map, each combination gets its own panel. Repeated rows of one cell are averaged.
    With the final test error over one key, ``groups`` gives the panels and ``finals`` their
    values (group -> :func:`final_values`; the test error is read from ``runs`` if absent).
    """
    column, label = sweep_metric_column(metric, runs)
    chosen = chosen_axes(swept_keys, axes_keys)
    others = [key for key in swept_keys if key not in chosen]
    split = list(runs.groupby(others, sort=True)) if others else [((), runs)]

    with rc_context(HOUSE_RC):
        if len(chosen) == 1 and metric == FINAL_METRIC:
            finals = dict(finals or {})
            if "test_error" in groups and "test_error" not in finals:
                finals["test_error"] = final_values(None, runs, "test_error")
            width, height = size.inches("sweep")
            if size.preset is not None:
                height *= 1.0 + 0.7 * (len(groups) - 1)
            fig = Figure(figsize=(width, height))
            axes = fig.subplots(len(groups), 1, squeeze=False, sharex=True)
            for index, group in enumerate(groups):
                _final_panel(axes[index, 0], split, others, chosen[0], group, finals[group],
                             show_x=index == len(groups) - 1)
        elif len(chosen) == 1:
            fig, axes = new_figure("sweep", size)
            _sweep_curves(axes[0, 0], split, others, chosen[0], column, label)
        else:
            panels = len(split)
            columns = min(panels, 3)
            rows = math.ceil(panels / columns)
            width, height = size.inches("sweep")
            if size.preset is not None:
                height = height * rows / max(1, columns) if panels > 1 else height
            fig = Figure(figsize=(width, max(height, 1.2 * rows)))
            axes = fig.subplots(rows, columns, squeeze=False)
            values = pd.to_numeric(runs[column], errors="coerce")
            finite = values[np.isfinite(values)]
            vmin = float(finite.min()) if len(finite) else 0.0
            vmax = float(finite.max()) if len(finite) else 1.0
            image = None
            for ax, (group_key, part) in zip(axes.ravel(), split, strict=False):
                image = _sweep_heat_map(ax, part, chosen, column, vmin, vmax, metric)
                if others:
                    ax.set_title(_group_title(others, group_key), fontsize=7)
            for ax in axes.ravel()[panels:]:
                ax.set_visible(False)
            if image is not None and len(finite):  # an all-empty map has no scale to show
                bar = fig.colorbar(image, ax=axes.ravel().tolist(), shrink=0.9, pad=0.03)
                bar.set_label(label)
                bar.outline.set_linewidth(0.4)
    return fig


def _final_panel(
    ax: Axes, split: list, others: Sequence[str], key: str, group: str, finals: pd.DataFrame, *, show_x: bool
) -> None:
    """One group's final values: simulation mean +- SEM (markers by verdict) and theory, per curve."""
    all_values = np.unique(np.concatenate([part[key].to_numpy() for _, part in split]))
    if _wants_log(all_values):
        ax.set_xscale("log")
    verdict_column = f"verdict.{group}"
    curves = []  # (curve name, rows): one per combination of the other keys and entry of the group
    for combo, part in split:
        rows = finals.merge(part[["run_id", key, *_present(part, ("verdict", verdict_column))]], on="run_id")
        for _, entry in rows.groupby("observable", sort=False):
            curves.append((combo, entry))
    several_entries = finals["observable"].nunique() > 1
    names = [", ".join(([entry["label"].iloc[0]] if several_entries else [])
                       + ([_group_title(others, combo)] if others else [])) for combo, entry in curves]
    shown_verdicts: set[str] = set()
    for index, ((_, entry), name) in enumerate(zip(curves, names, strict=True)):
        colour = ENTRY_PALETTE[index % len(ENTRY_PALETTE)]
        cell = entry.groupby(key, sort=True)[["sim", "sem", "theory"]].mean()
        x = cell.index.to_numpy()
        sim, sem, theory = (cell[c].to_numpy(dtype=float) for c in ("sim", "sem", "theory"))
        ax.errorbar(x, sim, yerr=None if np.isnan(sem).all() else sem, fmt="none", ecolor=colour, elinewidth=0.8,
                    zorder=2)
        ax.plot(x, sim, color=colour, linewidth=0.8, label=name or None)
        if np.isfinite(theory).any():
            ax.plot(x, theory, color=colour, dashes=THEORY_DASHES, linewidth=1.0)
        column = verdict_column if verdict_column in entry and entry[verdict_column].notna().any() else "verdict"
        verdicts = entry[column].fillna("n/a").to_numpy() if column in entry else np.full(len(entry), "n/a")
        for verdict, (marker, filled) in VERDICT_MARKERS.items():
            picked = entry[verdicts == verdict]
            if picked.empty:
                continue
            shown_verdicts.add(verdict)
            ax.plot(picked[key].to_numpy(), picked["sim"].to_numpy(dtype=float), linestyle="none", marker=marker,
                    markersize=4.0, color=colour, markerfacecolor=colour if filled else "white",
                    markeredgewidth=0.9, zorder=3)
    # The key to the glyphs: what a solid and a dashed line are, and each verdict's marker.
    ax.plot([], [], color=MUTED, linewidth=0.8, label=r"simulation $\pm$ SEM")
    ax.plot([], [], color=MUTED, dashes=THEORY_DASHES, linewidth=1.0, label="theory")
    for verdict, (marker, filled) in VERDICT_MARKERS.items():
        if verdict in shown_verdicts:
            ax.plot([], [], linestyle="none", marker=marker, markersize=4.0, color=MUTED,
                    markerfacecolor=MUTED if filled else "white", label=verdict)
    _pad_x(ax, all_values)
    ax.set_ylabel(f"final {GROUP_LABELS[group]}")
    if show_x:
        ax.set_xlabel(_key_label(key))
    if len(curves) > MAX_LEGEND_CURVES:  # too many to name: the glyphs' key only, and a count
        handles, labels = ax.get_legend_handles_labels()
        keep = [i for i, text in enumerate(labels) if text not in names]
        ax.legend([handles[i] for i in keep], [labels[i] for i in keep], loc="best", fontsize=6.5)
        ax.text(0.02, 0.97, f"{len(curves)} curves", transform=ax.transAxes, va="top", fontsize=6.5, color=MUTED)
    else:
        ax.legend(loc="best", fontsize=6.5)


def _present(frame: pd.DataFrame, names: Sequence[str]) -> list[str]:
    return [name for name in names if name in frame.columns]


def _pad_x(ax: Axes, values: np.ndarray) -> None:
    """A little room left and right of the outermost swept values (in log or linear terms)."""
    if values.size > 1 and np.issubdtype(values.dtype, np.number):
        low, high = float(values.min()), float(values.max())
        if ax.get_xscale() == "log":
            pad = (high / low) ** 0.05
            ax.set_xlim(low / pad, high * pad)
        else:
            margin = 0.05 * (high - low)
            ax.set_xlim(low - margin, high + margin)


def _group_title(keys: Sequence[str], values: object) -> str:
    values = values if isinstance(values, tuple) else (values,)
    return ", ".join(f"{_key_label(key)} = {_format_value(value)}" for key, value in zip(keys, values, strict=False))


def _sweep_curves(ax: Axes, groups: list, others: Sequence[str], key: str, column: str, label: str) -> None:
    all_values = np.unique(np.concatenate([part[key].to_numpy() for _, part in groups]))
    if _wants_log(all_values):
        ax.set_xscale("log")
    never_points: list[tuple[np.ndarray, str]] = []
    for index, (group_key, part) in enumerate(groups):
        cell = part.groupby(key, sort=True)[column].mean()
        colour = ENTRY_PALETTE[index % len(ENTRY_PALETTE)]
        ax.plot(
            cell.index.to_numpy(),
            cell.to_numpy(),
            marker="o",
            markersize=3.0,
            markerfacecolor="white",
            markeredgewidth=0.8,
            color=colour,
            linewidth=1.0,
            label=_group_title(others, group_key) if others else None,
        )
        if column.endswith("divergence_t"):
            never = cell.index.to_numpy()[~np.isfinite(cell.to_numpy(dtype=float))]
            if never.size:
                never_points.append((never, colour))
    never_drawn = bool(never_points)
    if never_drawn:
        # A NaN divergence time means the theory never departed: those settings are marked in
        # a strip above the finite values (in data coordinates, so the legend avoids them).
        low, high = ax.get_ylim()
        if not np.isfinite(low) or high <= low:
            low, high = 0.0, 1.0
        span = high - low
        ax.set_ylim(low, high + 0.14 * span)
        for never, colour in never_points:
            ax.plot(
                never,
                np.full(never.size, high + 0.08 * span),
                linestyle="none",
                marker="^",
                markersize=3.5,
                color=colour,
            )
        ax.plot([], [], linestyle="none", marker="^", markersize=3.5, color=MUTED, label="never departs")
    marked = any("verdict" in part and part["verdict"].notna().any() for _, part in groups)
    if marked:
        _mark_verdicts(ax, groups, key, column)
    _pad_x(ax, all_values)
    ax.set_xlabel(_key_label(key))
    ax.set_ylabel(label)
    if others or never_drawn or marked:
        ax.legend(loc="best", fontsize=6.5)


def _mark_verdicts(ax: Axes, groups: list, key: str, column: str) -> None:
    """Each point's marker says its run's verdict (filled agree, open inconclusive, cross disagree)."""
    for index, (_, part) in enumerate(groups):
        colour = ENTRY_PALETTE[index % len(ENTRY_PALETTE)]
        for verdict, (marker, filled) in VERDICT_MARKERS.items():
            rows = part[part["verdict"] == verdict]
            if rows.empty:
                continue
            ax.plot(rows[key].to_numpy(), pd.to_numeric(rows[column], errors="coerce").to_numpy(dtype=float),
                    linestyle="none", marker=marker, markersize=4.0, color=colour,
                    markerfacecolor=colour if filled else "white", markeredgewidth=0.9, zorder=3)
    shown = set().union(*(set(part["verdict"].dropna()) for _, part in groups))
    for verdict, (marker, filled) in VERDICT_MARKERS.items():
        if verdict in shown:
            ax.plot([], [], linestyle="none", marker=marker, markersize=4.0, color=MUTED,
                    markerfacecolor=MUTED if filled else "white", label=verdict)


def _sweep_heat_map(
    ax: Axes,
    part: pd.DataFrame,
    keys: Sequence[str],
    column: str,
    vmin: float,
    vmax: float,
    metric: str,
):
    x_key, y_key = keys
    grid = (
        part.pivot_table(index=y_key, columns=x_key, values=column, aggfunc="mean", dropna=False)
        .sort_index()
        .sort_index(axis=1)
    )
    data = grid.to_numpy(dtype=float)
    ax.set_facecolor(MISSING_CELL)
    image = ax.imshow(
        np.ma.masked_invalid(data),
        cmap=HEAT_MAP,
        vmin=vmin,
        vmax=vmax if vmax > vmin else vmin + 1.0,
        origin="lower",
        aspect="auto",
        interpolation="nearest",
    )
    ax.set_xticks(range(data.shape[1]), [_format_value(v) for v in grid.columns])
    ax.set_yticks(range(data.shape[0]), [_format_value(v) for v in grid.index])
    ax.set_xlabel(_key_label(x_key))
    ax.set_ylabel(_key_label(y_key))
    for side in ("top", "right", "bottom", "left"):
        ax.spines[side].set_visible(False)
    ax.tick_params(length=0)
    if data.size <= 64:
        # Values in the cells: the reader of a small sweep wants numbers, not just colours.
        midpoint = vmin + 0.55 * (vmax - vmin)
        for row in range(data.shape[0]):
            for col in range(data.shape[1]):
                value = data[row, col]
                text = ("never" if metric == "divergence_t" else "—") if not np.isfinite(value) else f"{value:.2g}"
                ax.text(
                    col,
                    row,
                    text,
                    ha="center",
                    va="center",
                    fontsize=6,
                    color="white" if np.isfinite(value) and value > midpoint else INK,
                )
    return image



def sweep_figure_stem(folder: Path, metric: str, groups: Sequence[str] = ("test_error",)) -> Path:
    """``folder/figures/sweep_<metric>`` (with the groups, when other than the test error, in the name)."""
    name = metric if tuple(groups) == ("test_error",) else f"final_{'_'.join(groups)}"
    safe = re.sub(r"[^A-Za-z0-9_.-]+", "_", name)
    return Path(folder) / "figures" / f"sweep_{safe}"


def write_sweep_figure(folder: Path, options: FigureOptions = DEFAULT_OPTIONS) -> list[Path]:
    """Draw the sweep figure of ``folder`` for ``options`` (metric, axes, groups)."""
    keys, runs = check_request(folder, options)
    finals = None
    if options.metric == FINAL_METRIC and len(chosen_axes(keys, options.sweep_axes)) == 1:
        finals = {group: final_values(folder, runs, group) for group in options.groups}
    fig = plot_sweep(keys, runs, metric=options.metric, axes_keys=options.sweep_axes, size=options.size,
                     groups=options.groups, finals=finals)
    return save_figure(fig, sweep_figure_stem(folder, options.metric, options.groups), options.formats)

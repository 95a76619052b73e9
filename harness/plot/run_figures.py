"""The figures of one run: the learning curve over its residual panel, and the order parameters.

Both are pure functions of the run folder's tables (summary.parquet, metrics.parquet,
judgement.json; trajectories.parquet for per-seed curves).

Time axis: learning curves use a logarithmic t axis (t = steps / N). Points at t = 0 are
dropped from the log-scaled panels rather than drawn on a symlog axis: at t = 0 student
and theory start from the same initial condition, so the difference and z are zero or
undefined there and carry no information, while a symlog axis would squeeze the first
decades of learning into a linear stub and misplace the plateau. The t = 0 values remain
in the tables.

What is drawn is what the run holds. A theory-only run (``harness theory``: no
simulation, its ``sim`` columns NaN) gets the theory alone: no simulation legend entry and
no residual panel, which would be empty. The order-parameter figure gives a panel to each
family (Q, R, T, v) that changes over time; a family that stays at its initial value in
both simulation and theory (T, the teacher's own overlaps, for a fixed teacher; v when the
second layer is not trained) is named in a note instead of filling a panel with flat lines.
Panels are stacked in one column up to three, in a 2 x 2 grid for four, so none is left empty.

Index convention: observable entries are labelled with the indices of the stored tables
(from 0), so Q_01 in a figure is the column "Q[0,1]" in summary.parquet.
"""

from __future__ import annotations

import math
from collections.abc import Iterable
from pathlib import Path

import numpy as np
import pandas as pd
from matplotlib import rc_context
from matplotlib.axes import Axes
from matplotlib.figure import Figure
from matplotlib.legend_handler import HandlerTuple
from matplotlib.lines import Line2D

from harness.plot.landmark_marks import draw_landmarks, read_landmarks
from harness.plot.reading import (
    is_theory_only,
    observable_rows,
    read_metrics,
    read_summary,
    read_trajectories,
)
from harness.plot.style import (
    BAND_GREY,
    DEFAULT_OPTIONS,
    DEFAULT_SIZE,
    ENTRY_PALETTE,
    EPS_LABEL,
    FAMILY_LABELS,
    FAMILY_ORDER,
    HEAT_MAP,
    HOUSE_RC,
    INK,
    MUTED,
    OBSERVABLE_RE,
    OVERLAP_COLOR,
    SIM_COLOR,
    T_LABEL,
    THEORY_COLOR,
    THEORY_DASHES,
    FigureInputError,
    FigureOptions,
    FigureSize,
    new_figure,
    save_figure,
)

RUN_FIGURES = ("learning_curve", "order_parameters")
CONSTANT_RTOL = 1e-9
"""A family whose every entry stays within this fraction of its size of its first value is constant."""


# ---------------------------------------------------------------------------------------
# Learning curve with residual panel
# ---------------------------------------------------------------------------------------


def overlap_differs(summary: pd.DataFrame, rtol: float = 1e-6) -> bool:
    """True if overlap_error is stored and its simulation mean is not numerically test_error's.

    For i.i.d. Gaussian inputs the simulator may compute the test error from the order
    parameters, making the two curves identical; drawing both would only double a line.
    """
    test = observable_rows(summary, "test_error")
    overlap = observable_rows(summary, "overlap_error")
    if overlap.empty or len(overlap) != len(test):
        return not overlap.empty
    return not np.allclose(test["sim_mean"].to_numpy(), overlap["sim_mean"].to_numpy(), rtol=rtol, atol=0.0)


def plot_learning_curve(
    summary: pd.DataFrame,
    *,
    trajectories: pd.DataFrame | None = None,
    seeds_shown: int = 8,
    show_overlap: bool | None = None,
    divergence_t: float | None = None,
    verdict: str | None = None,
    size: FigureSize = DEFAULT_SIZE,
    landmarks: dict | None = None,
) -> Figure:
    """Test error against t (log axis) with SEM band and theory; below it, the verdict's residuals.

    ``trajectories`` (rows of test_error per seed) adds thin per-seed simulation curves,
    each with its own paired theory in the same hue, for at most ``seeds_shown`` seeds.
    ``show_overlap`` None draws overlap_error only when it differs from test_error.
    The lower panel shows theory - simulation divided by the agreement margin with its
    simultaneous band (harness.results.judgement); ``verdict`` (e.g. "test error: agree · run: agree")
    titles it.
    ``divergence_t`` (metrics.parquet: the first time the band lies wholly outside the
    margin) is marked by a vertical line in the residual panel.
    Non-finite values (a diverged seed can make a mean infinite) are left out of the lines.
    ``landmarks`` (judgement.json's landmarks section) marks the plateau and the exit times
    (harness.plot.landmark_marks).
    A theory-only run gets one panel with the theory alone (module docstring).
    """
    test = observable_rows(summary, "test_error")
    if test.empty:
        raise FigureInputError("summary.parquet: no test_error rows at t > 0")
    if is_theory_only(summary):
        return _theory_only_curve(test, trajectories, seeds_shown, size)
    if show_overlap is None:
        show_overlap = overlap_differs(summary)
    overlap = observable_rows(summary, "overlap_error") if show_overlap else None

    with rc_context(HOUSE_RC):
        fig, axes = new_figure(
            "learning_curve", size, 2, 1, sharex=True, gridspec_kw={"height_ratios": (2.3, 1.0)}
        )
        curve_ax, residual_ax = axes[:, 0]
        fig.get_layout_engine().set(hspace=0.0, h_pad=0.03)

        if trajectories is not None:
            _draw_seed_pairs(curve_ax, trajectories, seeds_shown)

        t = test["t"].to_numpy()
        mean, sem, theory = (_finite_or_nan(test[c]) for c in ("sim_mean", "sim_sem", "theory_mean"))
        curve_ax.fill_between(t, mean - sem, mean + sem, color=SIM_COLOR, alpha=0.22, linewidth=0)
        curve_ax.plot(t, mean, color=SIM_COLOR, label=r"simulation $\pm$ SEM")
        if overlap is not None and not overlap.empty:
            o_t = overlap["t"].to_numpy()
            o_mean, o_sem = _finite_or_nan(overlap["sim_mean"]), _finite_or_nan(overlap["sim_sem"])
            curve_ax.fill_between(o_t, o_mean - o_sem, o_mean + o_sem, color=OVERLAP_COLOR, alpha=0.18, linewidth=0)
            curve_ax.plot(
                o_t, o_mean, color=OVERLAP_COLOR, linestyle=":", linewidth=1.3,
                label=r"$\varepsilon_g(Q,R,T)$ of simulation",
            )
        curve_ax.plot(t, theory, color=THEORY_COLOR, dashes=THEORY_DASHES, label="theory")
        draw_landmarks(curve_ax, landmarks)

        curve_ax.set_xscale("log")
        _log_if_positive(curve_ax, np.concatenate([mean, theory]))
        curve_ax.set_ylabel(EPS_LABEL)
        # With per-seed curves a second legend sits upper right; a falling curve leaves lower left free.
        curve_ax.legend(loc="lower left" if trajectories is not None else "best")

        _draw_residuals(residual_ax, test, overlap, divergence_t, verdict)
        residual_ax.set_xscale("log")
        residual_ax.set_xlabel(T_LABEL)
        fig.align_ylabels(axes[:, 0])
    return fig


def _log_if_positive(ax: Axes, values: np.ndarray) -> None:
    """A log y axis when every finite value is positive (a band reaching below zero is clipped)."""
    finite = values[np.isfinite(values)]
    if finite.size and np.all(finite > 0):
        ax.set_yscale("log", nonpositive="clip")


def _theory_only_curve(
    test: pd.DataFrame, trajectories: pd.DataFrame | None, seeds_shown: int, size: FigureSize
) -> Figure:
    """The learning curve of a run without simulation: the theory's mean (and per-seed theories)."""
    with rc_context(HOUSE_RC):
        fig, axes = new_figure("learning_curve", size)
        ax = axes[0, 0]
        t = test["t"].to_numpy()
        theory = _finite_or_nan(test["theory_mean"])
        if trajectories is not None:
            rows = trajectories[(trajectories["observable"] == "test_error") & (trajectories["t"] > 0)]
            for index, seed in enumerate(sorted(rows["seed"].unique())[: max(seeds_shown, 0)]):
                one = rows[rows["seed"] == seed].sort_values("t")
                ax.plot(one["t"], one["theory"], color=ENTRY_PALETTE[index % len(ENTRY_PALETTE)], linewidth=0.5,
                        alpha=0.8, dashes=(2.0, 1.2), zorder=1, label="one seed's theory" if index == 0 else None)
        ax.plot(t, theory, color=THEORY_COLOR, dashes=THEORY_DASHES, label="theory (mean over seeds)")
        ax.set_xscale("log")
        _log_if_positive(ax, theory)
        ax.set_xlabel(T_LABEL)
        ax.set_ylabel(EPS_LABEL)
        ax.legend(loc="best")
        ax.set_title("theory alone (no simulation in this run)", loc="right", fontsize=7, color=MUTED)
    return fig


def _draw_residuals(
    ax: Axes, test: pd.DataFrame, overlap: pd.DataFrame | None, divergence_t: float | None, verdict: str | None
) -> None:
    """The verdict's own picture: theory - simulation in units of the margin, with its band.

    Agreement is shown where the band stays inside +-1 at every time, disagreement where it
    lies wholly outside somewhere (harness.results.judgement). Runs stored without margin and band
    columns show z instead.
    """
    t = test["t"].to_numpy()
    judged = "margin" in test and "band" in test and np.any(np.isfinite(test["band"].to_numpy(dtype=float)))
    ax.axhline(0.0, color=MUTED, linewidth=0.5, zorder=1)
    if judged:
        margin = test["margin"].to_numpy(dtype=float)
        with np.errstate(invalid="ignore", divide="ignore"):
            centre = test["diff_mean"].to_numpy(dtype=float) / margin
            half = test["band"].to_numpy(dtype=float) / margin
        ok = np.isfinite(centre) & np.isfinite(half)
        ax.axhspan(-1.0, 1.0, color=BAND_GREY, linewidth=0, zorder=0, label="margin")
        ax.fill_between(t[ok], (centre - half)[ok], (centre + half)[ok], color=THEORY_COLOR, alpha=0.25,
                        linewidth=0, label="simultaneous band")
        ax.plot(t[ok], centre[ok], color=THEORY_COLOR, linewidth=0.9)
        ax.set_ylabel("(theory − sim.) / margin")
        bound = max(1.6, float(np.nanmax(np.abs(np.concatenate([centre[ok] - half[ok], centre[ok] + half[ok]]))))
                    if ok.any() else 1.6)
        ax.set_ylim(-min(bound, 8.0) * 1.05, min(bound, 8.0) * 1.05)
        if verdict:
            ax.set_title(verdict, loc="right", fontsize=7, pad=2)
    else:
        ax.axhspan(-2.0, 2.0, color=BAND_GREY, linewidth=0, zorder=0)
        z = test["z"].to_numpy(dtype=float)
        finite = np.isfinite(z)
        ax.plot(t[finite], z[finite], color=SIM_COLOR, linewidth=0.9, label=r"$\varepsilon_g$")
        if overlap is not None and not overlap.empty:
            oz = overlap["z"].to_numpy(dtype=float)
            keep = np.isfinite(oz)
            ax.plot(overlap["t"].to_numpy()[keep], oz[keep], color=OVERLAP_COLOR, linestyle=":", linewidth=1.1)
        low, high = ax.get_ylim()
        bound = max(3.0, abs(low), abs(high))
        ax.set_ylim(-bound, bound)
        ax.set_ylabel(r"$z$")
    if divergence_t is not None and np.isfinite(divergence_t) and divergence_t > 0:
        ax.axvline(divergence_t, color=INK, linewidth=0.6, linestyle=(0, (1, 1.5)))
        ax.annotate("departs", xy=(divergence_t, 1.0), xycoords=("data", "axes fraction"), xytext=(2, -2),
                    textcoords="offset points", ha="left", va="top", fontsize=6.5, color=INK)


def _finite_or_nan(column: pd.Series) -> np.ndarray:
    values = column.to_numpy(dtype=float)
    return np.where(np.isfinite(values), values, np.nan)


def _draw_seed_pairs(ax: Axes, trajectories: pd.DataFrame, seeds_shown: int) -> None:
    """Thin per-seed simulation curves (solid) with each seed's own theory (dashed), same hue."""
    rows = trajectories[(trajectories["observable"] == "test_error") & (trajectories["t"] > 0)]
    seeds = sorted(rows["seed"].unique())[: max(seeds_shown, 0)]
    for index, seed in enumerate(seeds):
        one = rows[rows["seed"] == seed].sort_values("t")
        colour = ENTRY_PALETTE[index % len(ENTRY_PALETTE)]
        ax.plot(one["t"], one["sim"], color=colour, linewidth=0.5, alpha=0.45, zorder=1)
        ax.plot(one["t"], one["theory"], color=colour, linewidth=0.5, alpha=0.8, dashes=(2.0, 1.2), zorder=1)
    if seeds:
        # Legend proxies in a neutral grey: the hue only pairs a seed with its own theory.
        ax.add_artist(
            ax.legend(
                [
                    Line2D([], [], color=MUTED, linewidth=0.6),
                    Line2D([], [], color=MUTED, linewidth=0.6, dashes=(2.0, 1.2)),
                ],
                ["one seed (simulation)", "its paired theory"],
                loc="upper right",
                fontsize=6.5,
            )
        )


# ---------------------------------------------------------------------------------------
# Order parameters
# ---------------------------------------------------------------------------------------


def order_parameter_entries(observables: Iterable[str]) -> dict[str, list[tuple[str, str]]]:
    """Group observable names by family; Q and T keep only i <= j (they are symmetric).

    Returns family -> [(observable name, mathtext label)], families in the order Q, R, T, v.
    """
    grouped: dict[str, list[tuple[tuple[int, int], str, str]]] = {}
    for name in observables:
        match = OBSERVABLE_RE.match(name)
        if match is None:
            continue
        family, first, second = match.group(1), int(match.group(2)), match.group(3)
        if family == "v":
            if second is not None:
                continue
            key, label = (first, 0), rf"$v_{{{first}}}$"
        else:
            if second is None:
                continue
            j = int(second)
            if family in "QT" and j < first:
                continue
            # Two-digit indices need a separator to stay unambiguous (Q_{1,12} vs Q_{11,2}).
            separator = "," if max(first, j) >= 10 else ""
            key, label = (first, j), rf"${family}_{{{first}{separator}{j}}}$"
        grouped.setdefault(family, []).append((key, name, label))
    return {
        family: [(name, label) for _, name, label in sorted(grouped[family])]
        for family in FAMILY_ORDER
        if family in grouped
    }


def constant_families(summary: pd.DataFrame, families: dict[str, list[tuple[str, str]]]) -> list[str]:
    """The families whose every entry keeps its first value, in simulation and theory alike.

    "Keeps" means within :data:`CONSTANT_RTOL` of the family's largest magnitude: the
    simulation stores T from the very teacher weights at every time, so a fixed teacher's T
    is constant to the last digit, while any learning moves an entry by far more.
    """
    constant = []
    for family, entries in families.items():
        rows = summary[summary["observable"].isin([name for name, _ in entries])]
        values = rows[["sim_mean", "theory_mean"]].to_numpy(dtype=float)
        finite = values[np.isfinite(values)]
        if not finite.size:
            continue
        scale = max(float(np.max(np.abs(finite))), np.finfo(float).tiny)
        spread = 0.0
        for column in ("sim_mean", "theory_mean"):
            per_entry = rows.groupby("observable")[column]  # max and min skip NaN (a theory-only run's sim)
            spread = max(spread, float((per_entry.max() - per_entry.min()).fillna(0.0).max()))
        if spread <= CONSTANT_RTOL * scale:
            constant.append(family)
    return constant


def _marker_times(times: np.ndarray, count: int = 14) -> np.ndarray:
    """Indices of about ``count`` records spread evenly in log t, for sparse error bars."""
    if times.size <= count:
        return np.arange(times.size)
    targets = np.geomspace(times[0], times[-1], count)
    return np.unique(np.searchsorted(times, targets).clip(0, times.size - 1))


def plot_order_parameters(summary: pd.DataFrame, *, size: FigureSize = DEFAULT_SIZE, max_legend: int = 8) -> Figure:
    """A panel per family that changes over time: simulation markers with SEM error bars, theory lines.

    Families constant in time are named in a note, not drawn (module docstring); if nothing
    changes at all, every family is drawn. Entries get distinct hues up to ``max_legend``
    per panel; larger families are drawn from a sequential map without a per-entry legend.
    A theory-only run shows theory lines alone.
    """
    families = order_parameter_entries(summary["observable"].unique())
    if not families:
        raise FigureInputError("summary.parquet: no order-parameter observables (Q[i,j], R[i,m], T[m,n], v[k])")
    constant = constant_families(summary, families)
    if len(constant) < len(families):
        families = {family: entries for family, entries in families.items() if family not in constant}
    else:
        constant = []  # nothing moves: show it all rather than an empty figure
    theory_only = is_theory_only(summary)
    panels = len(families)
    columns = 2 if panels == 4 else 1
    rows = math.ceil(panels / columns)
    with rc_context(HOUSE_RC):
        fig, axes = new_figure("order_parameters", size, rows, columns, sharex=True)
        flat_axes = axes.ravel()
        for ax, (family, entries) in zip(flat_axes, families.items(), strict=True):
            _draw_family(ax, summary, family, entries, max_legend, theory_only)
        for index, ax in enumerate(flat_axes):
            if index + columns >= panels:  # the lowest panel of each column labels the time axis
                ax.set_xlabel(T_LABEL)
                ax.xaxis.set_tick_params(labelbottom=True)
        # Key to the glyphs, once for all panels; as a suptitle the layout engine makes room.
        key = "lines: theory (no simulation in this run)" if theory_only else \
            "markers: simulation $\\pm$ SEM    lines: theory"
        if constant:
            names = ", ".join(FAMILY_LABELS[family] for family in constant)
            key += f"\n{names} constant in $t$ (at its initial value): not drawn"
        fig.suptitle(key, x=0.99, ha="right", fontsize=6.5, color=MUTED)
    return fig


def _draw_family(
    ax: Axes, summary: pd.DataFrame, family: str, entries: list[tuple[str, str]], max_legend: int, theory_only: bool
) -> None:
    many = len(entries) > max_legend
    colours = (
        [HEAT_MAP(x) for x in np.linspace(0.3, 1.0, len(entries))]
        if many
        else [ENTRY_PALETTE[i % len(ENTRY_PALETTE)] for i in range(len(entries))]
    )
    handles, labels = [], []
    for (name, label), colour in zip(entries, colours, strict=True):
        part = observable_rows(summary, name)
        if part.empty:
            continue
        t = part["t"].to_numpy()
        (line,) = ax.plot(t, part["theory_mean"].to_numpy(), color=colour, linewidth=0.9)
        if theory_only:
            handles.append(line)
        else:
            picks = _marker_times(t)
            markers = ax.errorbar(
                t[picks], part["sim_mean"].to_numpy()[picks], yerr=part["sim_sem"].to_numpy()[picks],
                fmt="o", markersize=2.6, markerfacecolor="white", markeredgewidth=0.7, elinewidth=0.6, color=colour,
            )
            handles.append((line, markers[0]))
        labels.append(label)
    ax.set_xscale("log")
    ax.set_ylabel(FAMILY_LABELS[family])
    if many:
        ax.text(0.02, 0.97, f"{len(entries)} entries", transform=ax.transAxes, va="top", fontsize=6.5, color=MUTED)
    else:
        ax.legend(
            handles, labels, handler_map={tuple: HandlerTuple(ndivide=1)}, loc="best",
            ncols=2 if len(entries) > 3 else 1, fontsize=6.5, handlelength=1.6, columnspacing=0.8,
        )


# ---------------------------------------------------------------------------------------
# Writing a run folder's figures
# ---------------------------------------------------------------------------------------


def write_run_figures(run_dir: Path, options: FigureOptions = DEFAULT_OPTIONS) -> list[Path]:
    """Draw the learning curve and the order-parameter panels into ``run_dir/figures``."""
    run_dir = Path(run_dir)
    summary = read_summary(run_dir)
    metrics = read_metrics(run_dir)
    trajectories = read_trajectories(run_dir, ["test_error"]) if options.per_seed else None
    test_metrics = metrics[metrics["observable"] == "test_error"]
    divergence = float(test_metrics["divergence_t"].iloc[0]) if len(test_metrics) else None
    verdict = None
    if "group_verdict" in test_metrics and len(test_metrics):
        from harness.results.stored import read_judgement

        record = read_judgement(run_dir) or {}
        verdict = f"test error: {test_metrics['group_verdict'].iloc[0]}" + (
            f" · run: {record['verdict']}" if record.get("verdict") else "")
    out = run_dir / "figures"
    try:
        fig = plot_learning_curve(
            summary, trajectories=trajectories, seeds_shown=options.seeds_shown, divergence_t=divergence,
            verdict=verdict, size=options.size, landmarks=read_landmarks(run_dir),
        )
    except FigureInputError as error:
        raise FigureInputError(f"{run_dir}/{error}") from None
    written = save_figure(fig, out / "learning_curve", options.formats)
    if order_parameter_entries(summary["observable"].unique()):
        written += save_figure(plot_order_parameters(summary, size=options.size), out / "order_parameters",
                               options.formats)
    return written

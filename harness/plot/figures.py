"""Comparison figures drawn from stored result tables alone, in the project's house style.

Three kinds of folder are understood (the kind is told by which files exist):
- a run folder (manifest.json + summary.parquet): learning curve with a residual panel
  underneath, and a grid of order-parameter panels;
- a finite-size-scaling folder (verdict.json): the gap against N on log-log axes with the
  fitted law a N^-b + c, the band of the offset c and the verdict in the title;
- a sweep folder (sweep.json + runs.parquet): one metric as curves over one swept key or
  as a heat map over two.

Nothing is recomputed: every figure is a pure function of the tables in the folder, so
figures can be redrawn at another size or in another format at any time.

Time axis: learning curves use a logarithmic t axis (t = steps / N). Points at t = 0 are
dropped from the log-scaled panels rather than drawn on a symlog axis: at t = 0 student
and theory start from the same initial condition, so the difference and z are zero or
undefined there and carry no information, while a symlog axis would squeeze the first
decades of learning into a linear stub and misplace the plateau. The t = 0 values remain
in the tables.

Index convention: observable entries are labelled with the indices of the stored tables
(from 0), so Q_01 in a figure is the column "Q[0,1]" in summary.parquet.
"""

from __future__ import annotations

import io
import json
import math
import re
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from pathlib import Path

import matplotlib

matplotlib.use("Agg")  # figures are written to files only; never open a screen

import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
from matplotlib.axes import Axes  # noqa: E402
from matplotlib.colors import LinearSegmentedColormap  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402
from matplotlib.legend_handler import HandlerTuple  # noqa: E402
from matplotlib.lines import Line2D  # noqa: E402

from harness.results import comparison  # noqa: E402
from harness.core.errors import InputError  # noqa: E402
from harness.core.files import atomic_write_bytes, nulls_as_nan  # noqa: E402

# ---------------------------------------------------------------------------------------
# House style
# ---------------------------------------------------------------------------------------

INK = "#1f1f1f"
MUTED = "#8c8c8c"
SIM_COLOR = "#1d5a85"  # simulation: deep blue, solid
THEORY_COLOR = "#d9731a"  # theory: burnt orange, dashed (blue/orange survive colour blindness)
OVERLAP_COLOR = "#7a3f8f"  # eps_g from the simulation's own order parameters: plum, dotted
BAND_GREY = "#e4e4e4"
# Entries of one order-parameter family; the first two match simulation and theory hues.
ENTRY_PALETTE = (
    "#1d5a85",
    "#d9731a",
    "#4f8a3a",
    "#a8345e",
    "#3c9fb0",
    "#b8922c",
    "#6b5ba5",
    "#6e6e6e",
)
THEORY_DASHES = (4.0, 1.6)
# Marker of a sweep point by its run's verdict (harness.results.judgement), so the figure shows the
# verdict the tables give: filled agree, open inconclusive, a cross disagree.
VERDICT_MARKERS = {"agree": ("o", True), "inconclusive": ("o", False), "disagree": ("X", True), "n/a": ("s", False)}
# Sequential map for heat maps: pale sand to deep blue, monotone in lightness.
HEAT_MAP = LinearSegmentedColormap.from_list("harness_heat", ["#f7f1e1", "#e9c46a", "#d9731a", "#8a3b5c", "#1d3557"])
MISSING_CELL = "#d8d8d8"

# A journal column is about 3.4 in wide, a full page width about 7 in; the font stays at
# 8 pt whatever the width, as it does in print.
COLUMN_WIDTH_IN = {"single": 3.4, "double": 7.0}
# Height / width per figure kind, at single and at double width.
_ASPECT = {
    "learning_curve": {"single": 0.95, "double": 0.55},
    "order_parameters": {"single": 0.95, "double": 0.62},
    "scaling": {"single": 0.78, "double": 0.5},
    "sweep": {"single": 0.85, "double": 0.5},
}

HOUSE_RC: dict[str, object] = {
    "font.family": "serif",
    "font.serif": ["STIXGeneral", "DejaVu Serif"],
    "mathtext.fontset": "stix",
    "font.size": 8.0,
    "axes.labelsize": 8.0,
    "axes.titlesize": 8.0,
    "legend.fontsize": 7.0,
    "xtick.labelsize": 7.0,
    "ytick.labelsize": 7.0,
    "axes.edgecolor": INK,
    "axes.labelcolor": INK,
    "axes.linewidth": 0.6,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.grid": False,
    "axes.titlepad": 4.0,
    "xtick.color": INK,
    "ytick.color": INK,
    "xtick.direction": "out",
    "ytick.direction": "out",
    "xtick.major.width": 0.6,
    "ytick.major.width": 0.6,
    "xtick.minor.width": 0.4,
    "ytick.minor.width": 0.4,
    "xtick.major.size": 3.0,
    "ytick.major.size": 3.0,
    "xtick.minor.size": 1.6,
    "ytick.minor.size": 1.6,
    "lines.linewidth": 1.2,
    "lines.markersize": 3.0,
    "errorbar.capsize": 0.0,
    "legend.frameon": False,
    "legend.handlelength": 1.8,
    "legend.borderaxespad": 0.3,
    "legend.labelspacing": 0.3,
    "figure.dpi": 100,
    "savefig.dpi": 300,
    # The layout engine fits labels inside the requested size; no tight bounding box at
    # save time, so a "single" figure is exactly one column wide.
    "figure.constrained_layout.use": True,
    "figure.constrained_layout.h_pad": 0.02,
    "figure.constrained_layout.w_pad": 0.02,
    "pdf.fonttype": 42,  # embed TrueType so text stays text (editable, searchable) in the PDF
    "ps.fonttype": 42,
}

T_LABEL = r"$t = \mathrm{steps}/N$"
EPS_LABEL = r"$\varepsilon_g$"
FAMILY_LABELS = {"Q": r"$Q_{ij}$", "R": r"$R_{in}$", "T": r"$T_{nm}$", "v": r"$v_i$"}
FAMILY_ORDER = ("Q", "R", "T", "v")

RUN_FIGURES = ("learning_curve", "order_parameters")
FORMATS = ("png", "pdf")
SWEEP_METRICS = {
    "final_test_error": ("final_test_error", r"final $\varepsilon_g$ (simulation)"),
    "max_abs_z": ("test_error.max_abs_z", r"max $|z|$ of $\varepsilon_g$ (detectability)"),
    "band_reach": ("test_error.band_reach", r"band of $\varepsilon_g$ reaches (× margin)"),
    "final_rel_err": ("test_error.final_rel_err", r"final relative error of $\varepsilon_g$"),
    "divergence_t": ("test_error.divergence_t", r"divergence time $t$"),
}

_OBSERVABLE_RE = re.compile(r"^([QRTv])\[(\d+)(?:,(\d+))?\]$")


class FigureInputError(InputError):
    """A folder or table that the figure code cannot use; the message names path and expectation."""


# ---------------------------------------------------------------------------------------
# Sizes and saving
# ---------------------------------------------------------------------------------------


@dataclass(frozen=True)
class FigureSize:
    """A width preset ("single" or "double" column) or explicit width and height in inches."""

    preset: str | None = "single"
    width_in: float | None = None
    height_in: float | None = None

    def inches(self, kind: str) -> tuple[float, float]:
        if self.preset is None:
            assert self.width_in is not None and self.height_in is not None
            return self.width_in, self.height_in
        width = COLUMN_WIDTH_IN[self.preset]
        return width, width * _ASPECT[kind][self.preset]


def parse_size(text: str) -> FigureSize:
    """Parse "single", "double" or "W,H" (inches)."""
    if text in COLUMN_WIDTH_IN:
        return FigureSize(preset=text)
    parts = text.split(",")
    try:
        width, height = (float(part) for part in parts)
    except ValueError:
        raise FigureInputError(
            f"--size {text!r}: expected 'single', 'double' or 'W,H' in inches (e.g. 3.4,2.8)"
        ) from None
    if not (0.5 <= width <= 40.0 and 0.5 <= height <= 40.0):
        raise FigureInputError(f"--size {text!r}: width and height must be between 0.5 and 40 inches")
    return FigureSize(preset=None, width_in=width, height_in=height)


def parse_formats(text: str) -> tuple[str, ...]:
    """Parse a comma-separated list of output formats (png, pdf)."""
    formats = tuple(dict.fromkeys(part.strip().lower() for part in text.split(",") if part.strip()))
    bad = [fmt for fmt in formats if fmt not in FORMATS]
    if not formats or bad:
        raise FigureInputError(f"--format {text!r}: expected a comma-separated list from {', '.join(FORMATS)}")
    return formats


def save_figure(fig: Figure, stem: Path, formats: Sequence[str]) -> list[Path]:
    """Write ``stem.<fmt>`` for each format atomically (temporary file, then os.replace)."""
    written = []
    for fmt in formats:
        target = stem.with_suffix(f".{fmt}")
        # Fixed metadata so that redrawing from unchanged tables gives identical files.
        metadata = {"CreationDate": None} if fmt == "pdf" else {"Software": None}
        buffer = io.BytesIO()
        # Saving draws the figure again, so the house settings must be in force here too
        # (resolution, math font).
        with plt.rc_context(HOUSE_RC):
            fig.savefig(buffer, format=fmt, metadata=metadata)
        atomic_write_bytes(target, buffer.getvalue())
        written.append(target)
    return written


def _new_figure(kind: str, size: FigureSize, **subplot_kw: object) -> tuple[Figure, np.ndarray]:
    fig, axes = plt.subplots(figsize=size.inches(kind), squeeze=False, **subplot_kw)
    return fig, axes


# ---------------------------------------------------------------------------------------
# Folder kinds and table loading
# ---------------------------------------------------------------------------------------


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


def _read_parquet(path: Path, columns: Iterable[str], **kwargs: object) -> pd.DataFrame:
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
    return _read_parquet(Path(run_dir) / "summary.parquet", SUMMARY_COLUMNS)


def read_metrics(run_dir: Path) -> pd.DataFrame:
    return _read_parquet(Path(run_dir) / "metrics.parquet", METRIC_COLUMNS)


def read_trajectories(run_dir: Path, observables: Sequence[str]) -> pd.DataFrame:
    """Per-seed rows of the given observables only (the full table can be large)."""
    return _read_parquet(
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


def _observable(summary: pd.DataFrame, name: str) -> pd.DataFrame:
    """Rows of one observable at t > 0, sorted by time (t = 0 dropped for the log axis)."""
    part = summary[(summary["observable"] == name) & (summary["t"] > 0)]
    return part.sort_values("t")


# ---------------------------------------------------------------------------------------
# Learning curve with residual panel
# ---------------------------------------------------------------------------------------


def overlap_differs(summary: pd.DataFrame, rtol: float = 1e-6) -> bool:
    """True if overlap_error is stored and its simulation mean is not numerically test_error's.

    For i.i.d. Gaussian inputs the simulator may compute the test error from the order
    parameters, making the two curves identical; drawing both would only double a line.
    """
    test = _observable(summary, "test_error")
    overlap = _observable(summary, "overlap_error")
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
    size: FigureSize = FigureSize(),
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
    """
    test = _observable(summary, "test_error")
    if test.empty:
        raise FigureInputError("summary.parquet: no test_error rows at t > 0")
    if show_overlap is None:
        show_overlap = overlap_differs(summary)
    overlap = _observable(summary, "overlap_error") if show_overlap else None

    with plt.rc_context(HOUSE_RC):
        fig, axes = plt.subplots(
            2,
            1,
            sharex=True,
            figsize=size.inches("learning_curve"),
            gridspec_kw={"height_ratios": (2.3, 1.0)},
        )
        curve_ax, residual_ax = axes
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
                o_t,
                o_mean,
                color=OVERLAP_COLOR,
                linestyle=":",
                linewidth=1.3,
                label=r"$\varepsilon_g(Q,R,T)$ of simulation",
            )
        curve_ax.plot(
            t,
            theory,
            color=THEORY_COLOR,
            dashes=THEORY_DASHES,
            label="theory",
        )

        curve_ax.set_xscale("log")
        positive = np.concatenate([mean, theory])
        positive = positive[np.isfinite(positive)]
        if positive.size and np.all(positive > 0):
            # A band reaching below zero is clipped at the bottom of the log axis, not dropped.
            curve_ax.set_yscale("log", nonpositive="clip")
        curve_ax.set_ylabel(EPS_LABEL)
        # With per-seed curves a second legend sits upper right; a falling curve leaves lower left free.
        curve_ax.legend(loc="lower left" if trajectories is not None else "best")

        _draw_residuals(residual_ax, test, overlap, divergence_t, verdict)
        residual_ax.set_xscale("log")
        residual_ax.set_xlabel(T_LABEL)
        fig.align_ylabels(axes)
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
        ax.plot(
            one["t"],
            one["theory"],
            color=colour,
            linewidth=0.5,
            alpha=0.8,
            dashes=(2.0, 1.2),
            zorder=1,
        )
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
        match = _OBSERVABLE_RE.match(name)
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


def _marker_times(times: np.ndarray, count: int = 14) -> np.ndarray:
    """Indices of about ``count`` records spread evenly in log t, for sparse error bars."""
    if times.size <= count:
        return np.arange(times.size)
    targets = np.geomspace(times[0], times[-1], count)
    return np.unique(np.searchsorted(times, targets).clip(0, times.size - 1))


def plot_order_parameters(summary: pd.DataFrame, *, size: FigureSize = FigureSize(), max_legend: int = 8) -> Figure:
    """One panel per family (Q, R, T, v): simulation markers with SEM error bars, theory lines.

    Entries get distinct hues up to ``max_legend`` per panel; larger families are drawn from
    a sequential map without a per-entry legend.
    """
    families = order_parameter_entries(summary["observable"].unique())
    if not families:
        raise FigureInputError("summary.parquet: no order-parameter observables (Q[i,j], R[i,m], T[m,n], v[k])")
    panels = len(families)
    columns = 1 if panels == 1 else 2
    rows = math.ceil(panels / columns)
    with plt.rc_context(HOUSE_RC):
        fig, axes = plt.subplots(rows, columns, sharex=True, squeeze=False, figsize=size.inches("order_parameters"))
        flat_axes = axes.ravel()
        for ax, (family, entries) in zip(flat_axes, families.items(), strict=False):
            many = len(entries) > max_legend
            colours = (
                [HEAT_MAP(x) for x in np.linspace(0.3, 1.0, len(entries))]
                if many
                else [ENTRY_PALETTE[i % len(ENTRY_PALETTE)] for i in range(len(entries))]
            )
            handles, labels = [], []
            for (name, label), colour in zip(entries, colours, strict=False):
                part = _observable(summary, name)
                if part.empty:
                    continue
                t = part["t"].to_numpy()
                (line,) = ax.plot(t, part["theory_mean"].to_numpy(), color=colour, linewidth=0.9)
                picks = _marker_times(t)
                markers = ax.errorbar(
                    t[picks],
                    part["sim_mean"].to_numpy()[picks],
                    yerr=part["sim_sem"].to_numpy()[picks],
                    fmt="o",
                    markersize=2.6,
                    markerfacecolor="white",
                    markeredgewidth=0.7,
                    elinewidth=0.6,
                    color=colour,
                )
                handles.append((line, markers[0]))
                labels.append(label)
            ax.set_xscale("log")
            ax.set_ylabel(FAMILY_LABELS[family])
            if many:
                ax.text(
                    0.02,
                    0.97,
                    f"{len(entries)} entries",
                    transform=ax.transAxes,
                    va="top",
                    fontsize=6.5,
                    color=MUTED,
                )
            else:
                ax.legend(
                    handles,
                    labels,
                    handler_map={tuple: HandlerTuple(ndivide=1)},
                    loc="best",
                    ncols=2 if len(entries) > 3 else 1,
                    fontsize=6.5,
                    handlelength=1.6,
                    columnspacing=0.8,
                )
        for ax in flat_axes[panels:]:
            ax.set_visible(False)
        for ax in flat_axes[:panels]:
            # Label the time axis on the lowest visible panel of each column.
            index = list(flat_axes).index(ax)
            below = index + columns
            if below >= panels:
                ax.set_xlabel(T_LABEL)
                ax.xaxis.set_tick_params(labelbottom=True)
        # Legend for the glyphs, once: markers are simulation, lines are theory.
        # Key to the glyphs, once for all panels; as a suptitle the layout engine makes room.
        fig.suptitle("markers: simulation $\\pm$ SEM    lines: theory", x=0.99, ha="right", fontsize=6.5, color=MUTED)
    return fig


# ---------------------------------------------------------------------------------------
# Finite-size scaling
# ---------------------------------------------------------------------------------------

SCALING_KEYS = (
    "verdict",
    "exponent",
    "exponent_err",
    "offset",
    "offset_err",
    "amplitude",
    "amplitude_err",
    "sizes",
    "gaps",
    "gap_errs",
)


def read_scaling(folder: Path) -> dict:
    path = Path(folder) / "verdict.json"
    content = nulls_as_nan(read_json(path))  # strict JSON writes a non-finite number as null
    missing = [key for key in SCALING_KEYS if key not in content]
    if missing:
        raise FigureInputError(f"{path}: missing key(s) {', '.join(missing)}")
    lengths = {len(content[key]) for key in ("sizes", "gaps", "gap_errs")}
    if len(lengths) != 1 or not content["sizes"]:
        raise FigureInputError(f"{path}: sizes, gaps and gap_errs must be non-empty lists of equal length")
    return content


def value_with_error(value: float, error: float) -> tuple[str, str, int | None]:
    """Mantissas of value and error rounded to the error's two leading digits, and a power of ten.

    Two significant digits on the error, the value to the same decimal place: common
    practice, no source. The power is None when plain decimals read well.
    """
    if not (math.isfinite(value) and math.isfinite(error)) or error <= 0:
        return f"{value:.3g}", "", None
    exponent = None
    scale = 1.0
    largest = max(abs(value), error)
    if largest >= 1e4 or largest < 1e-2:
        exponent = int(math.floor(math.log10(largest)))
        scale = 10.0**exponent
    digits = max(0, 1 - int(math.floor(math.log10(error / scale))))
    return f"{value / scale:.{digits}f}", f"{error / scale:.{digits}f}", exponent


def _pm(value: float, error: float) -> str:
    """value ± error as mathtext (without the enclosing dollars)."""
    mantissa, spread, exponent = value_with_error(value, error)
    if not spread:
        return mantissa
    if exponent is None:
        return rf"{mantissa} \pm {spread}"
    return rf"({mantissa} \pm {spread})\times 10^{{{exponent}}}"


def _gap_label(verdict: dict) -> str:
    """Axis label in the trade's notation from the observable whose gap was measured."""
    observable = str(verdict.get("observable", ""))
    match = _OBSERVABLE_RE.match(observable)
    if observable == "test_error":
        symbol = EPS_LABEL
    elif observable == "overlap_error":
        symbol = r"$\varepsilon_g(Q,R,T)$"
    elif match:
        indices = ",".join(part for part in match.groups()[1:] if part is not None)
        symbol = rf"${match.group(1)}_{{{indices}}}$"
    else:
        # An explicit short label is used as given; the long explanation belongs on the page.
        label = str(verdict.get("gap_label", ""))
        return label if label and len(label) <= 30 else "gap"
    return f"gap of {symbol}"


def _exponent_text(verdict: dict) -> str:
    """b with its error, or marked as held fixed when too few sizes could fit it."""
    if not verdict.get("exponent_fitted", True):
        return f"{float(verdict['exponent']):.2g}" + r"\ \mathrm{(fixed)}"
    error = verdict.get("exponent_err")
    return _pm(float(verdict["exponent"]), float("nan") if error is None else float(error))


def plot_scaling(verdict: dict, *, size: FigureSize = FigureSize()) -> Figure:
    """Gap against N (log-log) with the fitted law a N^-b + c, the offset band and the verdict."""
    sizes = np.asarray(verdict["sizes"], dtype=float)
    gaps = np.asarray(verdict["gaps"], dtype=float)
    errors = np.asarray(verdict["gap_errs"], dtype=float)
    a, b, c = float(verdict["amplitude"]), float(verdict["exponent"]), float(verdict["offset"])
    c_err = float(verdict["offset_err"])
    with plt.rc_context(HOUSE_RC):
        fig, axes = _new_figure("scaling", size)
        ax = axes[0, 0]
        ax.set_xscale("log")
        ax.set_yscale("log", nonpositive="clip")
        # Clip error bars at a tenth of the gap so a large error does not run below zero.
        lower = np.minimum(errors, 0.9 * gaps)
        ax.errorbar(
            sizes,
            gaps,
            yerr=(lower, errors),
            fmt="o",
            color=SIM_COLOR,
            markersize=3.5,
            elinewidth=0.8,
            label="measured gap",
            zorder=3,
        )
        # The fitted law is drawn past the largest N so its approach to the offset shows.
        dense = np.geomspace(sizes.min() / 1.3, sizes.max() * 4.0, 240)
        law = a * dense**-b + c
        positive = law > 0
        ax.plot(
            dense[positive],
            law[positive],
            color=THEORY_COLOR,
            dashes=THEORY_DASHES,
            label=rf"$a N^{{-b}} + c$,  $b = {_exponent_text(verdict)}$",
        )
        ax.relim()
        ax.autoscale_view()
        low, high = ax.get_ylim()
        band_low, band_high = c - c_err, c + c_err
        offset_label = rf"offset $c = {_pm(c, c_err)}$"
        # Bring the band into view when it lies within two decades below the data; an
        # offset compatible with zero sits at minus infinity on a log axis and is only named.
        if band_high > 0 and band_high >= low / 100.0:
            low = min(low, 0.7 * (band_low if band_low > 0 else band_high / 3.0))
            ax.axhspan(
                max(band_low, low),
                band_high,
                color=THEORY_COLOR,
                alpha=0.16,
                linewidth=0,
                zorder=0,
                label=offset_label,
            )
            if c > 0:
                ax.axhline(c, color=THEORY_COLOR, linewidth=0.6, linestyle=(0, (1, 1.5)), zorder=0)
            ax.set_ylim(low, high)
        else:
            ax.plot([], [], " ", label=offset_label + " (below range)")
            ax.set_ylim(low, high)
        ax.set_xlabel(r"$N$")
        ax.set_ylabel(_gap_label(verdict))
        ax.legend(loc="best")
        ax.set_title(f"finite-size scaling: {verdict['verdict']}", color=INK)
    return fig


# ---------------------------------------------------------------------------------------
# Sweeps
# ---------------------------------------------------------------------------------------


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
    runs = _read_parquet(folder / "runs.parquet", ["run_id", *keys])
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


def plot_sweep(
    swept_keys: Sequence[str],
    runs: pd.DataFrame,
    *,
    metric: str = "final_test_error",
    axes_keys: Sequence[str] | None = None,
    size: FigureSize = FigureSize(),
) -> Figure:
    """One metric over the sweep: curves over one key, or a heat map over two.

    ``axes_keys`` picks the swept key(s) to lay out (default: the first two swept keys).
    With curves, every combination of the remaining swept keys gets its own curve; with a
    heat map, each combination gets its own panel. Repeated rows of one cell are averaged.
    A NaN divergence time means "never diverged" and is drawn as an empty (grey) cell.
    """
    column, label = sweep_metric_column(metric, runs)
    chosen = list(axes_keys) if axes_keys else list(swept_keys[:2])
    unknown = [key for key in chosen if key not in swept_keys]
    if unknown or not 1 <= len(chosen) <= 2:
        raise FigureInputError(
            f"--sweep-axes {','.join(chosen)!r}: expected one or two of the swept keys {', '.join(swept_keys)}"
        )
    others = [key for key in swept_keys if key not in chosen]
    groups = list(runs.groupby(others, sort=True)) if others else [((), runs)]

    with plt.rc_context(HOUSE_RC):
        if len(chosen) == 1:
            fig, axes = _new_figure("sweep", size)
            _sweep_curves(axes[0, 0], groups, others, chosen[0], column, label)
        else:
            panels = len(groups)
            columns = min(panels, 3)
            rows = math.ceil(panels / columns)
            width, height = size.inches("sweep")
            if size.preset is not None:
                height = height * rows / max(1, columns) if panels > 1 else height
            fig, axes = plt.subplots(rows, columns, squeeze=False, figsize=(width, max(height, 1.2 * rows)))
            values = pd.to_numeric(runs[column], errors="coerce")
            finite = values[np.isfinite(values)]
            vmin = float(finite.min()) if len(finite) else 0.0
            vmax = float(finite.max()) if len(finite) else 1.0
            image = None
            for ax, (group_key, part) in zip(axes.ravel(), groups, strict=False):
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
    if all_values.size > 1 and np.issubdtype(all_values.dtype, np.number):
        low, high = float(all_values.min()), float(all_values.max())
        pad = (high / low) ** 0.05 if ax.get_xscale() == "log" else None
        if pad is not None:
            ax.set_xlim(low / pad, high * pad)
        else:
            margin = 0.05 * (high - low)
            ax.set_xlim(low - margin, high + margin)
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


# ---------------------------------------------------------------------------------------
# Writing a folder's figures
# ---------------------------------------------------------------------------------------


@dataclass(frozen=True)
class FigureOptions:
    formats: tuple[str, ...] = FORMATS
    size: FigureSize = FigureSize()
    per_seed: bool = False
    seeds_shown: int = 8
    metric: str = "final_test_error"
    sweep_axes: tuple[str, ...] | None = None


def write_run_figures(run_dir: Path, options: FigureOptions = FigureOptions()) -> list[Path]:
    """Draw the learning curve and the order-parameter grid into ``run_dir/figures``."""
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
    written: list[Path] = []
    try:
        fig = plot_learning_curve(
            summary,
            trajectories=trajectories,
            seeds_shown=options.seeds_shown,
            divergence_t=divergence,
            verdict=verdict,
            size=options.size,
        )
    except FigureInputError as error:
        raise FigureInputError(f"{run_dir}/{error}") from None
    try:
        written += save_figure(fig, out / "learning_curve", options.formats)
    finally:
        plt.close(fig)
    if order_parameter_entries(summary["observable"].unique()):
        fig = plot_order_parameters(summary, size=options.size)
        try:
            written += save_figure(fig, out / "order_parameters", options.formats)
        finally:
            plt.close(fig)
    return written


def write_scaling_figure(folder: Path, options: FigureOptions = FigureOptions()) -> list[Path]:
    fig = plot_scaling(read_scaling(folder), size=options.size)
    try:
        return save_figure(fig, Path(folder) / "figures" / "scaling", options.formats)
    finally:
        plt.close(fig)


def sweep_figure_stem(folder: Path, metric: str) -> Path:
    safe = re.sub(r"[^A-Za-z0-9_.-]+", "_", metric)
    return Path(folder) / "figures" / f"sweep_{safe}"


def write_sweep_figure(folder: Path, options: FigureOptions = FigureOptions()) -> list[Path]:
    keys, runs = read_sweep(folder)
    sweep_metric_column(options.metric, runs, Path(folder) / "runs.parquet")
    fig = plot_sweep(keys, runs, metric=options.metric, axes_keys=options.sweep_axes, size=options.size)
    try:
        return save_figure(fig, sweep_figure_stem(folder, options.metric), options.formats)
    finally:
        plt.close(fig)


def write_figures(folder: Path, options: FigureOptions = FigureOptions()) -> list[Path]:
    """Write the figures of any result folder (kind detected from its files)."""
    kind = folder_kind(folder)
    writer = {
        "run": write_run_figures,
        "scaling": write_scaling_figure,
        "sweep": write_sweep_figure,
    }[kind]
    return writer(Path(folder), options)

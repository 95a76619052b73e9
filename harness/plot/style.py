"""The house style of every figure, their sizes, and how they are saved.

Figures are built as :class:`matplotlib.figure.Figure` objects, never through pyplot, so
drawing one chooses no backend and opens no window: importing :mod:`harness.plot` or calling
``harness.load_run(...).figure()`` in a notebook leaves matplotlib's settings as they were.
:func:`save_figure` is the one place a backend is chosen: each file is written by the
backend of its format (Agg for PNG, matplotlib's PDF writer for PDF), named explicitly.
The house settings (:data:`HOUSE_RC`) are applied while a figure is built and again while
it is saved, since saving draws it anew.

Sizes: a journal column is about 3.4 in wide and a page about 7 in; the font stays at 8 pt
whatever the width, as in print. Files are written atomically (harness.core.files) with
fixed metadata, so redrawing from unchanged tables gives identical files.
"""

from __future__ import annotations

import io
import re
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from matplotlib.colors import LinearSegmentedColormap
from matplotlib.figure import Figure

from harness.core.errors import InputError
from harness.core.files import atomic_write_bytes

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
# Sequential map for heat maps: pale sand to deep blue, monotone in lightness.
HEAT_MAP = LinearSegmentedColormap.from_list("harness_heat", ["#f7f1e1", "#e9c46a", "#d9731a", "#8a3b5c", "#1d3557"])

# A journal column is about 3.4 in wide, a full page width about 7 in; the font stays at
# 8 pt whatever the width, as it does in print.
COLUMN_WIDTH_IN = {"single": 3.4, "double": 7.0}
# Height / width per figure kind, at single and at double width.
ASPECT = {
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
OBSERVABLE_RE = re.compile(r"^([QRTv])\[(\d+)(?:,(\d+))?\]$")
"""An order-parameter entry's stored name: Q[i,j], R[i,n], T[n,m] or v[i] (indices from 0)."""

FORMATS = ("png", "pdf")
_WRITERS = {"png": "agg", "pdf": "pdf"}  # the backend that writes each format


class FigureInputError(InputError):
    """A folder or table that the figure code cannot use; the message names path and expectation."""


# ---------------------------------------------------------------------------------------
# Sizes, options, new figures and saving
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
        return width, width * ASPECT[kind][self.preset]


DEFAULT_SIZE = FigureSize()


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



@dataclass(frozen=True)
class FigureOptions:
    """What ``harness figure`` was asked for (formats, size, per-seed curves, the sweep's metric and layout)."""

    formats: tuple[str, ...] = FORMATS
    size: FigureSize = FigureSize()
    per_seed: bool = False
    seeds_shown: int = 8
    metric: str = "final_test_error"
    sweep_axes: tuple[str, ...] | None = None
    groups: tuple[str, ...] = ("test_error",)


DEFAULT_OPTIONS = FigureOptions()


def new_figure(
    kind: str, size: FigureSize, rows: int = 1, columns: int = 1, **subplot_kw: object
) -> tuple[Figure, np.ndarray]:
    """A figure of ``rows`` x ``columns`` panels (an array of axes), sized for ``kind``; call within HOUSE_RC."""
    fig = Figure(figsize=size.inches(kind))
    axes = fig.subplots(rows, columns, squeeze=False, **subplot_kw)
    return fig, axes


def save_figure(fig: Figure, stem: Path, formats: Sequence[str]) -> list[Path]:
    """Write ``stem.<fmt>`` for each format atomically (temporary file, then os.replace).

    The layout found while saving the first format is kept for the others: constrained
    layout measures every label again at each save, which was 45 % of drawing a report's
    figures, and the positions it finds do not depend on the format.
    """
    from matplotlib import rc_context

    written = []
    for index, fmt in enumerate(formats):
        if index == 1 and fig.get_layout_engine() is not None:
            fig.set_layout_engine("none")  # keeps the axes where the first save put them
        target = stem.with_suffix(f".{fmt}")
        # Fixed metadata so that redrawing from unchanged tables gives identical files.
        metadata = {"CreationDate": None} if fmt == "pdf" else {"Software": None}
        buffer = io.BytesIO()
        # Saving draws the figure again, so the house settings must be in force here too
        # (resolution, math font).
        with rc_context(HOUSE_RC):
            fig.savefig(buffer, format=fmt, metadata=metadata, backend=_WRITERS.get(fmt))
        atomic_write_bytes(target, buffer.getvalue())
        written.append(target)
    return written

"""The finite-size-scaling figure: the gap between theory and simulation against N.

Drawn from a scaling folder's verdict.json alone (``harness scale``, harness.studies.scaling):
the measured gaps with their (asymmetric, when stored) error bars, the fitted law
a N^-b + c drawn past the largest N, the band of the offset c, and the verdict as title.

The y axis is logarithmic when every gap is positive, so a power-law decay is a straight
line. The reported gap is sqrt(max(U, 0)), zero where the unbiased estimate U of the squared
gap falls below zero (no gap beyond the noise); a log axis cannot show zero and would drop
those sizes (matplotlib then warns that the data have no positive values). With any gap at
or below zero the axis is linear instead, and a note on the figure says why and at which N.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
from matplotlib import rc_context
from matplotlib.figure import Figure
from matplotlib.ticker import NullFormatter

from harness.core.files import nulls_as_nan
from harness.plot.reading import read_json
from harness.plot.style import (
    DEFAULT_OPTIONS,
    DEFAULT_SIZE,
    EPS_LABEL,
    HOUSE_RC,
    INK,
    MUTED,
    OBSERVABLE_RE,
    SIM_COLOR,
    THEORY_COLOR,
    THEORY_DASHES,
    FigureInputError,
    FigureOptions,
    FigureSize,
    new_figure,
    save_figure,
)

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
    if content.get("kind") == "landmark":  # a landmark across sizes (harness.plot.landmark_growth)
        return content
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


def gap_label(verdict: dict) -> str:
    """Axis label in the trade's notation from the observable whose gap was measured."""
    observable = str(verdict.get("observable", ""))
    match = OBSERVABLE_RE.match(observable)
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


def _error_bars(verdict: dict, gaps: np.ndarray, log_axis: bool) -> tuple[np.ndarray, np.ndarray]:
    """Lower and upper error bars: the stored asymmetric ones if present, else gap_errs both ways.

    A gap is never below zero, so a bar stops there; on a log axis it stops at a tenth of
    the gap, so a large error does not run off the axis.
    """
    errors = np.asarray(verdict["gap_errs"], dtype=float)
    low = np.asarray(verdict.get("gap_errs_low", errors), dtype=float)
    high = np.asarray(verdict.get("gap_errs_high", errors), dtype=float)
    if low.shape != gaps.shape or high.shape != gaps.shape:
        low, high = errors, errors
    floor = 0.9 * gaps if log_axis else np.maximum(gaps, 0.0)
    return np.minimum(low, floor), high


def _sizes_text(sizes: np.ndarray) -> str:
    return ", ".join(f"{int(n)}" if float(n).is_integer() else f"{n:g}" for n in sizes)


def plot_scaling(verdict: dict, *, size: FigureSize = DEFAULT_SIZE) -> Figure:
    """Gap against N with the fitted law a N^-b + c, the offset band and the verdict.

    Log-log when every gap is positive; a linear gap axis otherwise, with a note saying
    which sizes showed no gap (module docstring).
    """
    if verdict.get("kind") == "landmark":  # a landmark across sizes, not a gap
        from harness.plot.landmark_growth import plot_landmark_scaling

        return plot_landmark_scaling(verdict, size=size)
    sizes = np.asarray(verdict["sizes"], dtype=float)
    gaps = np.asarray(verdict["gaps"], dtype=float)
    a, b, c = float(verdict["amplitude"]), float(verdict["exponent"]), float(verdict["offset"])
    c_err = float(verdict["offset_err"])
    finite = np.isfinite(gaps)
    log_axis = bool(finite.any() and np.all(gaps[finite] > 0))
    with rc_context(HOUSE_RC):
        fig, axes = new_figure("scaling", size)
        ax = axes[0, 0]
        ax.set_xscale("log")
        if log_axis:
            ax.set_yscale("log", nonpositive="clip")
        else:
            zero = sizes[finite & (gaps <= 0)]
            why = ("no gap beyond the noise at any N" if zero.size == finite.sum()
                   else f"no gap beyond the noise at N = {_sizes_text(zero)}")
            fig.suptitle(f"{why}: linear gap axis (a log axis cannot show a gap of 0)",
                         x=0.99, ha="right", fontsize=6.5, color=MUTED)
        lower, upper = _error_bars(verdict, gaps, log_axis)
        ax.errorbar(sizes[finite], gaps[finite], yerr=(lower[finite], upper[finite]), fmt="o", color=SIM_COLOR,
                    markersize=3.5, elinewidth=0.8, label="measured gap", zorder=3)
        # The fitted law is drawn past the largest N so its approach to the offset shows.
        dense = np.geomspace(sizes.min() / 1.3, sizes.max() * 4.0, 240)
        law = a * dense**-b + c
        shown = np.isfinite(law) & (law > 0 if log_axis else True)
        ax.plot(dense[shown], law[shown], color=THEORY_COLOR, dashes=THEORY_DASHES,
                label=rf"$a N^{{-b}} + c$,  $b = {_exponent_text(verdict)}$")
        ax.autoscale_view()  # from the data limits, which include the error bars (relim() would drop them)
        low, high = ax.get_ylim()
        band_low, band_high = c - c_err, c + c_err
        offset_label = rf"offset $c = {_pm(c, c_err)}$"
        if not log_axis:
            low = min(low, 0.0)
            if np.isfinite(band_high):
                ax.axhspan(max(band_low, low), band_high, color=THEORY_COLOR, alpha=0.16, linewidth=0, zorder=0,
                           label=offset_label)
                high = max(high, band_high)
            if c > 0:
                ax.axhline(c, color=THEORY_COLOR, linewidth=0.6, linestyle=(0, (1, 1.5)), zorder=0)
        # On a log axis, bring the band into view when it lies within two decades below the
        # data; an offset compatible with zero sits at minus infinity there and is only named.
        elif band_high > 0 and band_high >= low / 100.0:
            low = min(low, 0.7 * (band_low if band_low > 0 else band_high / 3.0))
            ax.axhspan(max(band_low, low), band_high, color=THEORY_COLOR, alpha=0.16, linewidth=0, zorder=0,
                       label=offset_label)
            if c > 0:
                ax.axhline(c, color=THEORY_COLOR, linewidth=0.6, linestyle=(0, (1, 1.5)), zorder=0)
        else:
            ax.plot([], [], " ", label=offset_label + " (below range)")
        ax.set_ylim(low, high)
        # Ticks at the sizes measured, in plain numbers (a few sizes within a decade or two
        # would otherwise be labelled 2 x 10^1, 3 x 10^1, ...).
        ax.set_xticks(sizes, [_sizes_text(np.array([n])) for n in sizes])
        ax.xaxis.set_minor_formatter(NullFormatter())
        ax.set_xlabel(r"$N$")
        ax.set_ylabel(gap_label(verdict))
        ax.legend(loc="best")
        ax.set_title(f"finite-size scaling: {verdict['verdict']}", color=INK)
    return fig


def write_scaling_figure(folder: Path, options: FigureOptions = DEFAULT_OPTIONS) -> list[Path]:
    """Draw ``folder/figures/scaling`` from ``folder/verdict.json``."""
    fig = plot_scaling(read_scaling(folder), size=options.size)
    return save_figure(fig, Path(folder) / "figures" / "scaling", options.formats)

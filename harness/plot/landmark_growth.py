"""The figure of a landmark across sizes (``harness scale --observable landmark:NAME``).

Both sides' mean landmark at each N with its pointwise 95 % interval (simulation: filled
circles; theory: open squares, nudged apart in N so the bars do not hide each other), each
with its fitted law a + b ln N (harness.studies.landmark_scaling), on a logarithmic N axis
where that law is a straight line. The title carries the verdict. Everything drawn is read
from verdict.json; no statistics here.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from matplotlib import rc_context
from matplotlib.figure import Figure

from harness.plot.style import (
    DEFAULT_SIZE,
    HOUSE_RC,
    INK,
    SIM_COLOR,
    THEORY_COLOR,
    THEORY_DASHES,
    FigureSize,
    new_figure,
)

NUDGE = 1.04
"""Factor in N between the simulation's and the theory's markers."""


def _law(fits: dict[str, Any], side: str) -> tuple[float, float] | None:
    params = fits.get(side, {}).get("a + b ln N", {}).get("params", {})
    a, b = params.get("a"), params.get("b")
    return (a, b) if a is not None and b is not None and math.isfinite(a) and math.isfinite(b) else None


def plot_landmark_scaling(verdict: dict[str, Any], *, size: FigureSize = DEFAULT_SIZE) -> Figure:
    """Landmark against N for both sides, with the fitted growth laws and the verdict."""
    sizes = np.asarray(verdict["sizes"], dtype=float)
    name = str(verdict["landmark"])
    with rc_context(HOUSE_RC):
        fig, axes = new_figure("scaling", size)
        ax = axes[0, 0]
        ax.set_xscale("log")
        dense = np.geomspace(sizes.min() / 1.2, sizes.max() * 1.2, 100)
        sides = (("sim", "simulation", SIM_COLOR, "o", True, 1.0 / NUDGE),
                 ("theory", "theory", THEORY_COLOR, "s", False, NUDGE))
        for side, label, color, marker, filled, nudge in sides:
            mean = np.asarray(verdict[f"{side}_means"], dtype=float)
            low = np.asarray(verdict[f"{side}_lows"], dtype=float)
            high = np.asarray(verdict[f"{side}_highs"], dtype=float)
            errors = np.where(np.isfinite(low) & np.isfinite(high), [mean - low, high - mean], 0.0)
            ax.errorbar(sizes * nudge, mean, yerr=errors, fmt=marker, color=color, markersize=3.5, elinewidth=0.8,
                        capsize=1.5, markerfacecolor=color if filled else "white", label=f"{label} ± 95 %", zorder=3)
            law = _law(verdict.get("fits", {}), side)
            if law is not None:
                ax.plot(dense, law[0] + law[1] * np.log(dense), color=color, linewidth=0.8,
                        dashes=THEORY_DASHES if side == "theory" else (None, None),
                        label=rf"$a + b \ln N$, $b = {law[1]:.3g}$")
        ax.set_xlabel(r"$N$")
        ax.set_ylabel(name.replace("_", " "))
        ax.legend(loc="best")
        ax.set_title(f"{name.replace('_', ' ')} across sizes: {verdict['verdict']}", color=INK)
    return fig

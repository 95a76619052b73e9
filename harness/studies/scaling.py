"""Finite-size scaling verdict: does the gap between simulation and theory vanish as N grows?

``harness scale SCENARIO --sizes 250,500,1000,2000`` runs the scenario at each input size
N (everything else equal; each size is an ordinary stored run, reused when complete),
measures a gap between simulation and theory at each N, fits gap(N) = a N^-b + c and
decides whether the offset c (the gap left at N -> infinity) is zero. With ``--observable
landmark:NAME`` the question is a landmark's law of growth instead (the escape time growing like
ln N), answered by harness.studies.landmark_scaling on the same stored runs.

The gap and why it is built this way
------------------------------------
For seed s of a run at size N let d_s(t) = theory_s(t) - sim_s(t) be the paired difference
of one observable (default ``test_error``) at the evaluation times t_1..t_E (t > 0, on the
range common to all sizes). Write d_s(t) = mu(t) + e_s(t): mu is the systematic difference
(what a wrong theory leaves) and e_s the seed's noise (SGD and test-set fluctuations, zero
mean, independent between seeds, variance O(1/N)). The quantity of interest is

    G^2 = <mu, mu>,   <f, g> = (1/E) sum_t f(t) g(t)     (the mean square over time of mu).

The obvious estimators are biased upward by the noise: the mean over seeds of <d_s, d_s>
estimates G^2 + <var e>, and even the square of the seed mean dbar estimates
G^2 + <var e> / S. The noise floor shrinks like 1/N, so a biased gap falls with N even when
mu does not, which is exactly the wrong way to be fooled. We therefore use the U-statistic
over *distinct* seed pairs

    U = 1 / (S (S - 1)) * sum_{s != s'} <d_s, d_s'>  =  <dbar, dbar> - <sem^2>,

which is unbiased, E[U] = G^2, because E<e_s, e_s'> = 0 for s != s' (Hoeffding 1948, Ann.
Math. Stat. 19, 293; common practice, no source, for its use here). U can be negative when
G^2 is small against the noise. Its standard error comes from the delete-one-seed
jackknife (Efron & Stein 1981, Ann. Stat. 9, 586: the jackknife variance of a U-statistic
is conservative). The *reported* gap is sqrt(max(U, 0)); mapping the band U +- sigma_U
through the square root gives asymmetric errors (``gap_errs_low``/``gap_errs_high``), and
``gap_errs`` is the larger of the two: sigma_U / (2 gap) when the gap is resolved, the gap
itself when U is within one sigma of zero, sqrt(sigma_U) (the resolution) when U <= 0.
The fit and the verdict use U itself.

Which observable: ``test_error`` (the default) carries the noise of each seed's finite
held-out set, constant in time for a seed and not shrinking with N; U removes it from the
mean but not from the error bars. ``--observable overlap_error`` (eps_g from the simulation's
own order parameters, docs/equations.md, section 5.9) tests the dynamics without that noise.

The fit
-------
With G(N) = a N^-b + c the measurements are U_i ~ Normal(G(N_i)^2, sigma_i^2), so

    chi^2(a, b, c) = sum_i ((a N_i^-b + c)^2 - U_i)^2 / sigma_i^2

is minimised in the squared space, where the data are unbiased and close to Gaussian (a
fit to sqrt(max(U, 0)) would inherit the clipping at zero). Bounds: a >= 0 and c >= 0
because G is a norm (it cannot fall below zero, and a consistent theory approaches 0 from
above); a gap that *rises* towards its limit is then fitted with a = 0 and a constant c,
which is exactly what the verdict needs to see. b is kept in [1/2, 3] (``--min-exponent``
changes the floor): finite-size corrections to averages are O(1/N) and fluctuations
O(1/sqrt(N)) (common practice, no source); the U-statistic removes the fluctuations, so
b ~ 1 is expected, 1/2 is the slowest decay any finite-size effect has, and 3 is a generous
ceiling. The floor matters: over a factor 8 in N a term a N^-0.05 is indistinguishable
from a constant, so with b free down to 0 *no* offset could ever be told apart from a
slowly decaying amplitude and every verdict would be inconclusive.

Caveat (plateaus): when the run starts near a symmetric saddle (the K = M = 2 plateau from
a small initialisation), the escape time is set by an asymmetry of order N^-1/2 that SGD
noise and the initial draw share in N-independent proportion, so the paired difference at
the escape need not decay like a power of N at fixed times. This is a caution, not a
measured failure (the default K = M = 2 erf scenario at eta = 1, t = 60, N = 100..800 and
8 seeds came out consistent), but scaling studies are cleanest on scenarios without such an
escape inside the time window.

The covariance matrix of curve_fit (``sigma = sigma_U``, ``absolute_sigma = True``) is used
for the amplitude and the exponent only: it is meaningless at a bound, and at a = 0 the
exponent is undetermined. The offset's uncertainty and its significance come from the
*profile* chi^2, chi2_p(c) = min over a >= 0, b in [1/2, 3] of chi^2 (exact in a: for fixed
b and c, chi^2 is a quartic in a; b on a fine grid), which stays valid at the bound c = 0:

    significance z0 = sqrt(chi2_p(0) - chi2_min)   (likelihood-ratio test of c = 0; one
                                                   sided, Chernoff 1954, Ann. Math. Stat. 25, 573)
    offset interval  chi2_p(c) - chi2_min <= 1,     offset_err = c_hi - c (upper one-sigma)
    offset_upper     chi2_p(c) - chi2_min  = 4      (two-sigma upper limit on the offset)

When chi2_min / dof > 1 (dof = sizes - 3) every error is inflated by S = sqrt(chi2_min / dof)
(the thresholds 1 and 4 become S^2 and 4 S^2, z0 is divided by S): the scale-factor
convention of the Particle Data Group. The jackknife errors from a handful of seeds are
themselves noisy (their spread across sizes is what makes chi^2 large by chance), and this
keeps the intervals honest instead of declaring the law wrong.

Three sizes
-----------
Three points cannot fit three parameters (a fit through every point has chi^2 = 0 and an
exponent error of hundreds). With fewer than four sizes b is not fitted: for each b on a
grid over [b_min, 3] the two-parameter law is fitted (one degree of freedom) and each
claim takes the least favourable b: the smallest offset significance for "inconsistent",
the largest upper limit for "consistent". The exponent printed is the best-fitting grid
value, marked as held fixed.

The paired shrink test
----------------------
Whatever the number of sizes, the same seeds see the same random keys at every size
(common random numbers), so their gaps at different sizes are correlated, and the ratio
rho = U(N_max) / U(N_min) of the squared gaps of the *same* seeds is far more precise than
either gap. Its error comes from the delete-one-seed jackknife with the seed removed at both
sizes at once (Efron & Stein 1981). A gap that vanishes like N^-b with b >= b_min has
rho <= (N_min / N_max)^(2 b_min) (1/4 over a factor 4 in N at b_min = 1/2). When the gap is
clearly there at the largest size (U / sigma_U >= 3) and rho exceeds that bound by three
jackknife errors, the gap does not shrink as a finite-size gap must: ``inconsistent``,
whatever the fit says (a flat gap with large per-size errors can fit an offset compatible
with zero). Two errors above the bound already forbid ``consistent``.

The verdict
-----------
The three outcomes are those of harness.results.judgement, said of the limit N -> infinity, and
the exit status is shared with it: consistent (agree) 0, inconsistent (disagree) 1,
inconclusive 3.

tolerance tau = resolution * (rms over t of the theory's mean curve at the largest size);
``--resolution`` (default 0.05) is the smallest asymptotic offset worth detecting, relative
to the observable's own size.

* ``inconsistent``: z0 >= 3, the offset is significantly above zero, or the paired shrink
  test finds the gap flat;
* ``consistent``: z0 < 2 (offset compatible with 0), offset_upper <= tau (any offset left is
  below the tolerance: the measurement resolves it), and the gap does not rise with N (the
  squared gap at the largest size is not 2 sigma above the smallest). "Falling" is asked in
  this weak form on purpose: a correct theory's gap is often below the noise already at the
  smallest size (the U-statistic removes the noise, not the need to resolve it), and then
  no decay can be seen although nothing is wrong. The reason printed says which case it is
  (a decay resolved at 2 sigma, or no gap beyond noise at any size);
* ``inconclusive``: anything else. The advice then says what would settle it, from an
  "Asimov" forecast: take the fitted law as the truth, shrink the errors, and redo the
  profile. Errors shrink like 1/sqrt(seeds) when a gap is present, so with seeds multiplied
  by k every profile chi^2 difference is multiplied by k; settling needs k * chi2_A(0) >= 9
  (an offset shows at 3 sigma) or k * chi2_A(tau) >= 4 (an offset above tau is excluded). When the gap
  is pure noise sigma_U falls like 1/S instead and sqrt(k) times the seeds suffice, so the
  advice gives the range sqrt(k) S .. k S. Extra sizes (2 and 4 times the largest) are
  forecast with sigma_U(N) extrapolated by a power law in N.
"""

from __future__ import annotations

import hashlib
import json
import math
import sys
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any, NamedTuple

import numpy as np

from harness.core import scenario as scenario_lib
from harness.core.errors import InputError
from harness.results.judgement import AGREE, DISAGREE, INCONCLUSIVE, NOT_JUDGED, Margin
from harness.results.judgement import EXIT_STATUS as VERDICT_EXIT_STATUS
from harness.studies.landmark_scaling import (
    LANDMARK_PREFIX,
    check_observable,
    format_landmark_verdict,
    landmark_name,
    landmark_scaling,
)

DEFAULT_OBSERVABLE = "test_error"
DEFAULT_RESOLUTION = 0.05
EXPONENT_BOUNDS = (0.5, 3.0)
"""Range of the exponent b (see the module docstring for why b >= 1/2)."""
Z_INCONSISTENT = 3.0
"""Offset significance (sigma) from which the theory is declared inconsistent."""
Z_COMPATIBLE = 2.0
"""Offset significance below which the offset is called compatible with zero."""
UPPER_LIMIT_CHI2 = 4.0
"""Profile chi^2 rise defining the upper limit on the offset (two sigma)."""
MIN_FIT_P_VALUE = 1e-3
MIN_SEEDS = 3
MIN_SIZES = 3
FORECAST_SIZE_FACTORS = (2, 4)
EXPONENT_GRID_POINTS = 251
FIXED_EXPONENT_GRID_POINTS = 26
MIN_SIZES_FOR_EXPONENT = 4
"""With fewer sizes the exponent b is not fitted (three parameters need at least one spare point)."""

SCALE_OUTCOMES = {"consistent": AGREE, "inconsistent": DISAGREE, "inconclusive": INCONCLUSIVE}
"""The three scaling outcomes are the verdict's three (harness.results.judgement), said of the limit N -> infinity."""
EXIT_STATUS = {name: VERDICT_EXIT_STATUS[outcome] for name, outcome in SCALE_OUTCOMES.items()}


# --------------------------------------------------------------------------- the gap


class SizeGap(NamedTuple):
    """The gap measured at one input size."""

    size: int
    squared_gap: float  # U, unbiased for G^2 (may be negative)
    squared_gap_err: float  # jackknife standard error of U
    seeds_used: int
    times_used: int
    scale: float  # rms over t of the theory's mean curve (the observable's size)
    naive_gap: float  # sqrt(<dbar, dbar>): the biased estimate, for comparison
    noise_floor: float  # sqrt(<sem^2>): what the biased estimate carries from noise alone

    @property
    def gap(self) -> float:
        return math.sqrt(max(self.squared_gap, 0.0))

    @property
    def gap_err_low(self) -> float:
        """gap - sqrt(max(U - sigma_U, 0)): down to where the one-sigma band of U reaches."""
        return self.gap - math.sqrt(max(self.squared_gap - self.squared_gap_err, 0.0))

    @property
    def gap_err_high(self) -> float:
        """sqrt(max(U, 0) + sigma_U) - gap: up to where the one-sigma band of U reaches."""
        return math.sqrt(max(self.squared_gap, 0.0) + self.squared_gap_err) - self.gap

    @property
    def gap_err(self) -> float:
        """The larger of the two one-sigma errors: symmetric, and never overstating a resolved gap."""
        return max(self.gap_err_low, self.gap_err_high)


def squared_gap(diff: np.ndarray) -> tuple[float, float]:
    """(U, jackknife standard error of U) for paired differences ``diff`` [S, E].

    U = 1/(S(S-1)) sum_{s != s'} <d_s, d_s'> with <f, g> the mean over the E times.
    """
    u, leave_one_out = squared_gap_and_leave_one_out(diff)
    s = len(leave_one_out)
    jackknife_var = (s - 1) / s * np.sum((leave_one_out - leave_one_out.mean()) ** 2)
    return float(u), float(np.sqrt(jackknife_var))


def squared_gap_and_leave_one_out(diff: np.ndarray) -> tuple[float, np.ndarray]:
    """U and its delete-one-seed values U_(-s) [S], the ingredients of every jackknife here."""
    diff = np.asarray(diff, dtype=np.float64)
    s, e = diff.shape
    if s < MIN_SEEDS:
        raise ValueError(f"the gap needs at least {MIN_SEEDS} seeds, got {s}")
    inner = diff @ diff.T / e  # [S, S] inner products <d_s, d_s'>
    off_diagonal = inner.sum() - np.trace(inner)
    u = off_diagonal / (s * (s - 1))
    # Delete-one-seed values: remove row and column s from the off-diagonal sum.
    row = inner.sum(axis=1) - np.diag(inner)
    return float(u), (off_diagonal - 2.0 * row) / ((s - 1) * (s - 2))


def finite_differences(traj: Any, observable: str, t_min: float) -> tuple[np.ndarray, np.ndarray]:
    """(seed indices, theory - simulation [S, E]) at times t >= t_min > 0, seeds finite throughout."""
    column = traj.column(observable)
    times = (traj.t >= t_min) & (traj.t > 0)
    diff = traj.theory[:, times, column] - traj.sim[:, times, column]
    finite = np.all(np.isfinite(diff), axis=1)  # diverged seeds (NaN from then on) leave the gap
    return np.asarray(traj.seeds)[finite], diff[finite]


def gap_of_trajectories(traj: Any, size: int, observable: str, t_min: float) -> SizeGap:
    """The gap of one run's :class:`~harness.core.trajectories.Trajectories` at times t >= t_min > 0."""
    column = traj.column(observable)
    times = (traj.t >= t_min) & (traj.t > 0)
    _, diff = finite_differences(traj, observable, t_min)
    if len(diff) < MIN_SEEDS:
        raise InputError(
            f"scale: at data.input_dim = {size} only {len(diff)} seed(s) have a finite {observable} "
            f"trajectory and theory; need at least {MIN_SEEDS} (diverged seeds, or a theory that does not "
            f"predict {observable})"
        )
    u, u_err = squared_gap(diff)
    theory_mean = np.nanmean(traj.theory[:, times, column], axis=0)
    mean = diff.mean(axis=0)
    sem2 = diff.var(axis=0, ddof=1) / len(diff)
    return SizeGap(
        size=int(size),
        squared_gap=u,
        squared_gap_err=u_err,
        seeds_used=int(len(diff)),
        times_used=int(times.sum()),
        scale=float(np.sqrt(np.mean(theory_mean**2))),
        naive_gap=float(np.sqrt(np.mean(mean**2))),
        noise_floor=float(np.sqrt(np.mean(sem2))),
    )


# --------------------------------------------------------------------------- the fit


class ScalingFit(NamedTuple):
    amplitude: float  # a in a N^-b + c
    amplitude_err: float  # NaN when undetermined (a at its bound, or b undetermined)
    exponent: float
    exponent_err: float
    offset: float
    offset_err: float  # upper one-sigma error from the profile chi^2
    offset_interval: tuple[float, float]  # profile chi^2 - min <= 1
    offset_upper: float  # two-sigma upper limit (profile chi^2 - min = 4)
    offset_significance: float  # z0 = sqrt(chi2_p(0) - chi2_min)
    chi2: float
    dof: int
    p_value: float  # NaN when dof = 0
    scale_factor: float  # sqrt(chi^2 / dof) when above 1: every error above is inflated by it
    exponent_bounds: tuple[float, float]
    exponent_fitted: bool = True  # False with three sizes: b is the best of a grid, held fixed, not fitted


def _gap_model(sizes: np.ndarray, a: float, b: float, c: float) -> np.ndarray:
    return a * sizes ** (-b) + c


def _profile_over_amplitude(
    x: np.ndarray, c: float | np.ndarray, u: np.ndarray, w: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """For every row of x = N^-b (one per exponent), min over A >= 0 of sum w ((A x + c)^2 - u)^2.

    ``c`` is one offset or one per row.

    d chi^2 / dA = 4 sum_i w_i x_i (A x_i + c)((A x_i + c)^2 - u_i), a cubic in A whose
    coefficients are below; the minimum is at A = 0 or at a real non-negative root.
    Returns (chi^2 [B], A [B]).
    """
    wx = w * x
    c = np.broadcast_to(np.asarray(c, dtype=np.float64), (len(x),))[:, None]
    cubic = np.stack(
        [
            (wx * x**3).sum(axis=1),
            (wx * 3 * x**2 * c).sum(axis=1),
            (wx * (3 * x * c**2 - u * x)).sum(axis=1),
            (wx * (c**3 - u * c)).sum(axis=1),
        ],
        axis=1,
    )
    # Roots of the monic cubic as eigenvalues of its companion matrix, for all rows at once.
    lead = cubic[:, :1]
    monic = cubic[:, 1:] / lead
    companion = np.zeros((len(x), 3, 3))
    companion[:, 0, :] = -monic
    companion[:, 1, 0] = 1.0
    companion[:, 2, 1] = 1.0
    roots = np.linalg.eigvals(companion)
    candidates = np.where(
        (np.abs(roots.imag) <= 1e-9 * (1 + np.abs(roots.real))) & (roots.real > 0), roots.real, 0.0
    )
    candidates = np.concatenate([np.zeros((len(x), 1)), candidates], axis=1)  # [B, 4]
    model = (candidates[:, :, None] * x[:, None, :] + c[:, :, None]) ** 2  # [B, 4, n]
    chi2 = (w[None, None, :] * (model - u[None, None, :]) ** 2).sum(axis=-1)
    best = np.argmin(chi2, axis=1)
    rows = np.arange(len(x))
    return chi2[rows, best], candidates[rows, best]


class _Profile:
    """chi^2 of the squared-gap data, profiled over amplitude and exponent, as a function of c.

    Sizes are divided by their geometric mean N_ref inside (a N^-b = A (N / N_ref)^-b), which
    keeps the amplitude of order one whatever b is.
    """

    def __init__(
        self, sizes: np.ndarray, u: np.ndarray, u_err: np.ndarray, exponent_bounds: tuple[float, float],
        exponents: np.ndarray | None = None,
    ):
        self.exponents = np.linspace(*exponent_bounds, EXPONENT_GRID_POINTS) if exponents is None \
            else np.asarray(exponents, dtype=np.float64)
        self.sizes = np.asarray(sizes, dtype=np.float64)
        self.reference = float(np.exp(np.mean(np.log(self.sizes))))
        self.u = np.asarray(u, dtype=np.float64)
        self.w = 1.0 / np.asarray(u_err, dtype=np.float64) ** 2
        self.x = (self.sizes[None, :] / self.reference) ** (-self.exponents[:, None])  # [B, n]

    def at(self, c: float) -> tuple[float, float, float]:
        """(chi^2, A, b) minimised over A >= 0 and b on the grid, at offset c."""
        chi2, amplitude = _profile_over_amplitude(self.x, c, self.u, self.w)
        best = int(np.argmin(chi2))
        return float(chi2[best]), float(amplitude[best]), float(self.exponents[best])

    def chi2(self, c: float) -> float:
        return self.at(c)[0]

    def chi2_many(self, offsets: np.ndarray) -> np.ndarray:
        """Profile chi^2 at many offsets at once (one batched cubic solve)."""
        offsets = np.asarray(offsets, dtype=np.float64)
        x = np.broadcast_to(self.x[None], (len(offsets),) + self.x.shape).reshape(-1, self.x.shape[1])
        c = np.repeat(offsets, self.x.shape[0])
        chi2, _ = _profile_over_amplitude(x, c, self.u, self.w)
        return chi2.reshape(len(offsets), -1).min(axis=1)

    def offset_range(self) -> float:
        """An offset beyond which the profile is certainly far above its minimum."""
        top = np.sqrt(np.maximum(self.u, 0.0) + 5.0 / np.sqrt(self.w))
        return float(3.0 * np.max(top) + 1e-300)

    def minimum(self) -> tuple[float, float, float, float]:
        """(chi2_min, A, b, c) over c >= 0: a grid in c, then a bounded scalar refinement."""
        from scipy.optimize import minimize_scalar

        grid = np.concatenate([[0.0], np.geomspace(self.offset_range() * 1e-6, self.offset_range(), 400)])
        values = self.chi2_many(grid)
        i = int(np.argmin(values))
        low, high = grid[max(i - 1, 0)], grid[min(i + 1, len(grid) - 1)]
        best_c, best_chi2 = float(grid[i]), float(values[i])
        if high > low:
            refined = minimize_scalar(self.chi2, bounds=(low, high), method="bounded", options={"xatol": 1e-14})
            if refined.fun < best_chi2:
                best_c, best_chi2 = float(refined.x), float(refined.fun)
        chi2, amplitude, exponent = self.at(best_c)
        return chi2, amplitude, exponent, best_c

    def crossing(self, level: float, start: float, upward: bool) -> float:
        """The offset where the profile chi^2 reaches ``level``, moving up (or down) from ``start``."""
        from scipy.optimize import brentq

        if not upward:
            if start <= 0 or self.chi2(0.0) <= level:
                return 0.0
            return float(brentq(lambda c: self.chi2(c) - level, 0.0, start, xtol=1e-15))
        high = max(start, self.offset_range() * 1e-3)
        while self.chi2(high) < level:
            high *= 2.0
            if high > 1e300:
                return float("inf")
        return float(brentq(lambda c: self.chi2(c) - level, start, high, xtol=1e-15))


def fit_scaling(
    sizes: Sequence[int],
    squared_gaps: Sequence[float],
    squared_gap_errs: Sequence[float],
    *,
    exponent_bounds: tuple[float, float] = EXPONENT_BOUNDS,
) -> ScalingFit:
    """Fit G(N) = a N^-b + c to unbiased squared gaps (see the module docstring)."""
    from scipy.optimize import curve_fit
    from scipy.special import chdtrc  # chi^2 survival function, lighter to import than scipy.stats

    sizes = np.asarray(sizes, dtype=np.float64)
    u = np.asarray(squared_gaps, dtype=np.float64)
    u_err = np.asarray(squared_gap_errs, dtype=np.float64)
    if np.any(~np.isfinite(u_err)) or np.any(u_err <= 0):
        raise ValueError("squared-gap errors must be finite and positive")
    if len(sizes) < MIN_SIZES_FOR_EXPONENT:
        return _fit_without_exponent(sizes, u, u_err, exponent_bounds)
    profile = _Profile(sizes, u, u_err, exponent_bounds)
    chi2_min, amplitude, exponent, offset = profile.minimum()

    # Polish with curve_fit from the profile's optimum (exponent off the grid) and take the
    # amplitude/exponent uncertainties from its covariance where they are determined.
    amplitude_err = exponent_err = float("nan")
    reference = profile.reference

    def squared_model(n: np.ndarray, big_a: float, b: float, c: float) -> np.ndarray:
        return (big_a * (n / reference) ** (-b) + c) ** 2

    try:
        params, cov = curve_fit(
            squared_model, sizes, u, p0=[max(amplitude, 1e-12), exponent, offset], sigma=u_err,
            absolute_sigma=True, bounds=([0.0, exponent_bounds[0], 0.0], [np.inf, exponent_bounds[1], np.inf]),
        )
        polished = float(np.sum((squared_model(sizes, *params) - u) ** 2 / u_err**2))
        if polished < chi2_min:
            amplitude, exponent, chi2_min = float(params[0]), float(params[1]), polished
            offset = float(params[2])
        interior = amplitude > 0 and exponent_bounds[0] < exponent < exponent_bounds[1]
        if interior and np.all(np.isfinite(np.diag(cov[:2, :2]))):
            var_big_a, var_b, cov_ab = cov[0, 0], cov[1, 1], cov[0, 1]
            # a = A N_ref^b: propagate (A, b) to a.
            log_ref = math.log(reference)
            a_value = amplitude * reference**exponent
            var_a = a_value**2 * (var_big_a / amplitude**2 + 2 * log_ref * cov_ab / amplitude + log_ref**2 * var_b)
            amplitude_err, exponent_err = float(math.sqrt(max(var_a, 0.0))), float(math.sqrt(var_b))
    except (RuntimeError, ValueError):
        pass  # the profile optimum stands; amplitude/exponent errors stay undetermined

    dof = len(sizes) - 3
    p_value = float(chdtrc(dof, chi2_min)) if dof > 0 else float("nan")
    # A fit worse than its errors allow (chi^2 / dof > 1) inflates every error by
    # S = sqrt(chi^2 / dof): the scale-factor convention of the Particle Data Group
    # (Review of Particle Physics, Introduction, "unconstrained averaging").
    scale_factor = math.sqrt(max(1.0, chi2_min / dof)) if dof > 0 else 1.0
    amplitude_err *= scale_factor
    exponent_err *= scale_factor
    significance = math.sqrt(max(profile.chi2(0.0) - chi2_min, 0.0)) / scale_factor
    c_low = profile.crossing(chi2_min + scale_factor**2, offset, upward=False)
    c_high = profile.crossing(chi2_min + scale_factor**2, offset, upward=True)
    c_upper = profile.crossing(chi2_min + UPPER_LIMIT_CHI2 * scale_factor**2, offset, upward=True)
    return ScalingFit(
        amplitude=float(amplitude * reference**exponent),
        amplitude_err=amplitude_err,
        exponent=float(exponent),
        exponent_err=exponent_err,
        offset=float(offset),
        offset_err=float(c_high - offset),
        offset_interval=(float(c_low), float(c_high)),
        offset_upper=float(c_upper),
        offset_significance=float(significance),
        chi2=float(chi2_min),
        dof=dof,
        p_value=p_value,
        scale_factor=scale_factor,
        exponent_bounds=tuple(exponent_bounds),
    )


def _fit_without_exponent(
    sizes: np.ndarray, u: np.ndarray, u_err: np.ndarray, exponent_bounds: tuple[float, float]
) -> ScalingFit:
    """Three sizes cannot fix three parameters: the offset is bounded for every fixed exponent.

    For each b on a grid over ``exponent_bounds`` the two-parameter law a N^-b + c is fitted
    (one degree of freedom). The verdict then uses the least favourable b for each claim: the
    smallest offset significance (for "inconsistent") and the largest two-sigma upper limit
    (for "consistent"). The exponent and amplitude reported are those of the best-fitting
    fixed b, marked as not fitted (no error).
    """
    from scipy.special import chdtrc

    dof = len(sizes) - 2
    best: tuple | None = None
    significance, upper = math.inf, 0.0
    for b in np.linspace(*exponent_bounds, FIXED_EXPONENT_GRID_POINTS):
        profile = _Profile(sizes, u, u_err, exponent_bounds, exponents=np.array([b]))
        chi2_min, amplitude, _, offset = profile.minimum()
        scale_factor = math.sqrt(max(1.0, chi2_min / dof)) if dof > 0 else 1.0
        significance = min(significance, math.sqrt(max(profile.chi2(0.0) - chi2_min, 0.0)) / scale_factor)
        upper = max(upper, profile.crossing(chi2_min + UPPER_LIMIT_CHI2 * scale_factor**2, offset, upward=True))
        if best is None or chi2_min < best[0]:
            low = profile.crossing(chi2_min + scale_factor**2, offset, upward=False)
            high = profile.crossing(chi2_min + scale_factor**2, offset, upward=True)
            p_value = float(chdtrc(dof, chi2_min)) if dof > 0 else math.nan
            best = (chi2_min, offset, (low, high), scale_factor, p_value, amplitude * profile.reference**b, b)
    chi2_min, offset, interval, scale_factor, p_value, amplitude, exponent = best
    nan = float("nan")
    return ScalingFit(
        amplitude=float(amplitude), amplitude_err=nan, exponent=float(exponent), exponent_err=nan,
        offset=float(offset), offset_err=float(interval[1] - offset), offset_interval=interval,
        offset_upper=float(upper), offset_significance=float(significance), chi2=float(chi2_min), dof=dof,
        p_value=p_value, scale_factor=scale_factor, exponent_bounds=tuple(exponent_bounds), exponent_fitted=False,
    )


# ----------------------------------------------------------------- the paired shrink test


class ShrinkTest(NamedTuple):
    """Does the gap fall between the smallest and the largest size as a finite-size gap must?"""

    small: int  # the smallest N
    large: int  # the largest N
    ratio: float  # U(large) / U(small), the squared gaps of the same seeds
    ratio_err: float  # delete-one-seed jackknife, the seed deleted at both sizes at once
    bound: float  # (small / large)^(2 b_min): the largest ratio a finite-size gap allows
    excess: float  # (ratio - bound) / ratio_err
    large_significance: float  # U(large) / its jackknife error: is the gap there at all?
    seeds: int

    @property
    def flat(self) -> bool:
        """The gap is clearly there at the largest size and clearly falls slower than allowed."""
        return self.large_significance >= Z_INCONSISTENT and self.excess >= Z_INCONSISTENT


def shrink_test(small: tuple[int, np.ndarray], large: tuple[int, np.ndarray], min_exponent: float) -> ShrinkTest:
    """The paired test of the module docstring on differences [S, E] of the same S seeds at two sizes.

    Seed s sees the same random keys at every size (common random numbers), so its gaps at
    two sizes are correlated; deleting the seed from both at once lets the jackknife
    (Efron & Stein 1981) carry that correlation, which makes the ratio far more precise
    than either gap alone.
    """
    (n_small, d_small), (n_large, d_large) = small, large
    u_small, loo_small = squared_gap_and_leave_one_out(d_small)
    u_large, loo_large = squared_gap_and_leave_one_out(d_large)
    s = len(loo_small)
    with np.errstate(invalid="ignore", divide="ignore"):
        ratio = u_large / u_small
        loo_ratio = loo_large / loo_small
    ratio_err = math.sqrt((s - 1) / s * float(np.sum((loo_ratio - loo_ratio.mean()) ** 2)))
    large_err = math.sqrt((s - 1) / s * float(np.sum((loo_large - loo_large.mean()) ** 2)))
    bound = (n_small / n_large) ** (2.0 * min_exponent)
    finite = u_small > 0 and math.isfinite(ratio) and ratio_err > 0
    return ShrinkTest(
        small=int(n_small), large=int(n_large), ratio=float(ratio), ratio_err=ratio_err, bound=float(bound),
        excess=float((ratio - bound) / ratio_err) if finite else math.nan,
        large_significance=float(u_large / large_err) if large_err > 0 else math.nan, seeds=s,
    )


def paired_shrink_test(
    small: Any, large: Any, n_small: int, n_large: int, observable: str, t_min: float, min_exponent: float
) -> ShrinkTest | None:
    """:func:`shrink_test` on the seeds finite at both sizes (None when fewer than MIN_SEEDS are)."""
    seeds_small, d_small = finite_differences(small, observable, t_min)
    seeds_large, d_large = finite_differences(large, observable, t_min)
    common = np.intersect1d(seeds_small, seeds_large)
    if len(common) < MIN_SEEDS:
        return None
    pick_small = np.searchsorted(seeds_small, common)
    pick_large = np.searchsorted(seeds_large, common)
    return shrink_test((n_small, d_small[pick_small]), (n_large, d_large[pick_large]), min_exponent)


# ----------------------------------------------------------------------- the verdict


class Verdict(NamedTuple):
    verdict: str  # consistent | inconsistent | inconclusive
    reason: str
    advice: list[str]
    forecast: dict[str, Any]


def _power_law_errors(sizes: np.ndarray, errors: np.ndarray) -> tuple[float, float]:
    """log sigma = log s0 - p log N, least squares; returns (s0, p)."""
    slope, intercept = np.polyfit(np.log(sizes), np.log(errors), 1)
    return float(math.exp(intercept)), float(-slope)


def _asimov_chi2(sizes: np.ndarray, errors: np.ndarray, fit: ScalingFit, offsets: Sequence[float]) -> list[float]:
    """Profile chi^2 at ``offsets`` for data equal to the fitted law (its minimum is 0)."""
    truth = _gap_model(sizes, fit.amplitude, fit.exponent, fit.offset) ** 2
    profile = _Profile(sizes, truth, errors, fit.exponent_bounds)
    return [float(x) for x in profile.chi2_many(np.asarray(offsets, dtype=np.float64))]


def _seed_factor(chi2_zero: float, chi2_tolerance: float, fit: ScalingFit, tolerance: float) -> tuple[str, float]:
    """Which decision the forecast aims at and the factor on the seeds that reaches it."""
    if fit.offset >= tolerance or fit.offset_significance >= Z_COMPATIBLE:
        target = "inconsistent"
        factor = Z_INCONSISTENT**2 / chi2_zero if chi2_zero > 0 else float("inf")
    else:
        target = "consistent"
        factor = UPPER_LIMIT_CHI2 / chi2_tolerance if chi2_tolerance > 0 else float("inf")
    return target, factor


class _Trend(NamedTuple):
    """How the squared gap moves from the smallest to the largest size."""

    first: int
    last: int
    rise: float  # U(largest N) - U(smallest N)
    rise_err: float

    @property
    def rising(self) -> bool:
        return self.rise > 2.0 * self.rise_err

    @property
    def falling(self) -> bool:
        return -self.rise > 2.0 * self.rise_err


def decide(
    gaps: Sequence[SizeGap], fit: ScalingFit, tolerance: float, *, seeds: int, shrink: ShrinkTest | None = None
) -> Verdict:
    """Apply the verdict rule of the module docstring and forecast what would settle it."""
    sizes = np.array([g.size for g in gaps], dtype=np.float64)
    u = np.array([g.squared_gap for g in gaps])
    u_err = np.array([g.squared_gap_err for g in gaps])
    first, last = 0, int(np.argmax(sizes))
    trend = _Trend(first, last, float(u[last] - u[first]), math.hypot(u_err[last], u_err[first]))
    settled = _settled(sizes, u, u_err, fit, tolerance, shrink, trend)
    if settled is not None:
        return settled
    reasons = _open_reasons(sizes, fit, tolerance, shrink, trend)
    advice, forecast = _forecast(sizes, u_err, fit, tolerance, seeds, trend.rising)
    return Verdict("inconclusive", "; ".join(reasons) or "not enough resolution", advice, forecast)


def _suspicious(shrink: ShrinkTest | None) -> bool:
    """The paired shrink test leans against a finite-size gap (two sigma), without showing it flat."""
    return shrink is not None and shrink.excess >= Z_COMPATIBLE and shrink.large_significance >= Z_COMPATIBLE


def _settled(
    sizes: np.ndarray, u: np.ndarray, u_err: np.ndarray, fit: ScalingFit, tolerance: float,
    shrink: ShrinkTest | None, trend: _Trend,
) -> Verdict | None:
    """The rule's decisive outcomes, inconsistent or consistent (None: neither is shown)."""
    z0 = fit.offset_significance
    if shrink is not None and shrink.flat:
        return Verdict(
            "inconsistent",
            f"the gap does not shrink as a finite-size gap must: the squared gap of the same {shrink.seeds} seeds "
            f"goes from N = {shrink.small} to N = {shrink.large} by a factor {shrink.ratio:.3g} +- "
            f"{shrink.ratio_err:.2g}, while a gap falling at least like N^-{fit.exponent_bounds[0]:g} allows at "
            f"most {shrink.bound:.3g} ({shrink.excess:.1f} sigma above), and it is {shrink.large_significance:.1f} "
            f"sigma above zero at N = {shrink.large}",
            [], {},
        )
    if z0 >= Z_INCONSISTENT:
        return Verdict(
            "inconsistent",
            f"offset c = {fit.offset:.3g} is {z0:.1f} sigma above zero (threshold {Z_INCONSISTENT:g}): "
            "the gap does not vanish as N grows",
            [], {},
        )
    if not (z0 < Z_COMPATIBLE and fit.offset_upper <= tolerance and not trend.rising and not _suspicious(shrink)):
        return None
    first, last = trend.first, trend.last
    if trend.falling:
        how = (
            f"the gap falls from {math.sqrt(max(u[first], 0)):.3g} at N = {int(sizes[first])} "
            f"to {math.sqrt(max(u[last], 0)):.3g} at N = {int(sizes[last])} ({-trend.rise / trend.rise_err:.1f} sigma)"
        )
    elif np.all(u < 2.0 * u_err):
        how = "no size shows a gap beyond its noise, so the decay itself is not resolved"
    else:
        how = "the gap does not rise with N"
    return Verdict(
        "consistent",
        f"offset c = {fit.offset:.3g} is compatible with zero ({z0:.1f} sigma) and below "
        f"{fit.offset_upper:.3g} at two sigma, within the tolerance {tolerance:.3g}; {how}",
        [], {"gap_falls": trend.falling},
    )


def _open_reasons(
    sizes: np.ndarray, fit: ScalingFit, tolerance: float, shrink: ShrinkTest | None, trend: _Trend
) -> list[str]:
    """Why neither outcome is shown, in words."""
    z0 = fit.offset_significance
    reasons = []
    if Z_COMPATIBLE <= z0:
        reasons.append(
            f"offset c = {fit.offset:.3g} is {z0:.1f} sigma above zero: suggestive, below {Z_INCONSISTENT:g} sigma"
        )
    elif fit.offset_upper > tolerance:
        reasons.append(
            f"offset compatible with zero but only bounded by {fit.offset_upper:.3g} (two sigma), "
            f"above the tolerance {tolerance:.3g}"
        )
    if _suspicious(shrink):
        reasons.append(
            f"the squared gap of the same seeds falls from N = {shrink.small} to N = {shrink.large} only by a "
            f"factor {shrink.ratio:.3g} +- {shrink.ratio_err:.2g} ({shrink.excess:.1f} sigma above the "
            f"{shrink.bound:.3g} a finite-size gap allows)"
        )
    if trend.rising:
        reasons.append(
            f"the squared gap rises from N = {int(sizes[trend.first])} to N = {int(sizes[trend.last])} "
            f"({trend.rise / trend.rise_err:.1f} sigma)"
        )
    if fit.dof > 0 and fit.p_value < MIN_FIT_P_VALUE:  # reported; the errors are already inflated
        reasons.append(
            f"a N^-b + c describes the gaps poorly (chi^2 = {fit.chi2:.1f} for {fit.dof} dof; "
            f"errors inflated by {fit.scale_factor:.2g})"
        )
    return reasons


def _forecast(
    sizes: np.ndarray, u_err: np.ndarray, fit: ScalingFit, tolerance: float, seeds: int, rising: bool
) -> tuple[list[str], dict[str, Any]]:
    """The Asimov forecast of the module docstring: the fitted law as truth, errors scaled down."""
    chi2_zero, chi2_tolerance = _asimov_chi2(sizes, u_err, fit, [0.0, tolerance])
    target, factor = _seed_factor(chi2_zero, chi2_tolerance, fit, tolerance)
    advice: list[str] = []
    forecast: dict[str, Any] = {"target": target, "seed_factor": factor}

    def seed_range(k: float) -> tuple[int, int]:
        # Errors fall like 1/sqrt(seeds) when a gap is present (k times the seeds) and like
        # 1/seeds when it is pure noise (sqrt(k) times): the range brackets the need.
        k = max(k, 1.0)
        return int(math.ceil(math.sqrt(k) * seeds)), int(math.ceil(k * seeds))

    within_reach = False
    if math.isfinite(factor) and (rising or factor > 1):
        low, high = seed_range(factor)
        forecast["seeds_needed"] = [low, high]
        within_reach |= low <= 100 * seeds
        advice.append(f"{low}-{high} seeds at every size (now {seeds}) would show the theory {target}")
    error_scale, error_power = _power_law_errors(sizes, u_err)
    extra_forecasts = {}
    for multiple in FORECAST_SIZE_FACTORS:
        extra = float(sizes.max() * multiple)
        more_sizes = np.append(sizes, extra)
        more_errors = np.append(u_err, error_scale * extra ** (-error_power))
        chi2_zero_x, chi2_tol_x = _asimov_chi2(more_sizes, more_errors, fit, [0.0, tolerance])
        _, factor_x = _seed_factor(chi2_zero_x, chi2_tol_x, fit, tolerance)
        extra_forecasts[int(extra)] = factor_x
        if not math.isfinite(factor_x):
            continue
        cost = f"a seed there costs about {multiple**2}x one at N = {int(sizes.max())}"
        if factor_x <= 1:
            within_reach = True
            advice.append(f"adding N = {int(extra)} ({cost}) would show the theory {target} with the current seeds")
        else:
            low, high = seed_range(factor_x)
            within_reach |= low <= 100 * seeds
            advice.append(f"adding N = {int(extra)} ({cost}) and {low}-{high} seeds at every size would show the "
                          f"theory {target}")
    forecast["extra_sizes"] = extra_forecasts
    if target == "consistent" and not within_reach:
        advice.append(
            f"a tolerance of {tolerance:.3g} is out of practical reach here; "
            "a larger --resolution is the realistic change"
        )
    if not advice:
        advice.append("the forecast finds no affordable setting that decides: check the observable and the time range")
    return advice, forecast


# ------------------------------------------------------------------------ the command


def parse_sizes(text: str) -> list[int]:
    """``"250,500,1000"`` -> [250, 500, 1000]; InputError naming --sizes otherwise."""
    allowed = f"a comma-separated list of at least {MIN_SIZES} distinct integers >= 2, e.g. 250,500,1000,2000"
    try:
        sizes = [int(part) for part in text.split(",") if part.strip()]
    except ValueError:
        raise InputError(f"--sizes: expected {allowed}, got {text!r}") from None
    if len(sizes) < MIN_SIZES or len(set(sizes)) != len(sizes) or min(sizes) < 2:
        raise InputError(f"--sizes: expected {allowed}, got {text!r}")
    return sorted(sizes)


def scale_id(scenario: Mapping[str, Any], sizes: Sequence[int], observable: str, resolution: float,
             min_exponent: float) -> str:
    """``scale-<hash>`` of everything the gaps depend on (the judging sections, like in run_id, are not)."""
    canonical = json.dumps(
        {"scenario": scenario_lib.computed_table(scenario), "sizes": list(sizes), "observable": observable,
         "resolution": resolution, "min_exponent": min_exponent},
        sort_keys=True, separators=(",", ":"),
    )
    return "scale-" + hashlib.sha256(canonical.encode("utf-8")).hexdigest()[:12]


def validate(
    scenario: dict, sizes: Sequence[int], observable: str, resolution: float, min_exponent: float = EXPONENT_BOUNDS[0]
) -> list[dict]:
    """Every per-size scenario, checked before any work (InputError on bad input)."""
    from harness.core.trajectories import observable_names

    if not (math.isfinite(resolution) and resolution > 0):
        raise InputError(f"--resolution: must be a finite number > 0, got {resolution!r}")
    if not (0 <= min_exponent < EXPONENT_BOUNDS[1]):
        raise InputError(f"--min-exponent: must be a number in [0, {EXPONENT_BOUNDS[1]:g}), got {min_exponent!r}")
    if scenario.run.seeds < MIN_SEEDS:
        raise InputError(
            f"scenario key 'run.seeds': scale needs at least {MIN_SEEDS} seeds to measure a gap "
            f"and its error, got {scenario['run']['seeds']}"
        )
    if scenario.theory.source == "none":
        raise InputError("scenario key 'theory.source': scale needs a theory to compare with, got 'none'")
    names = observable_names(
        scenario.student.hidden, scenario.teacher.hidden, scenario.student.train_second_layer
    )
    if observable.startswith(LANDMARK_PREFIX):
        check_observable(observable)
    elif observable not in names:
        raise InputError(f"--observable: must be one of {', '.join(names)}, or landmark:NAME; got {observable!r}")
    return [scenario_lib.with_overrides(scenario, {"data.input_dim": n}) for n in sizes]


class SizeRun(NamedTuple):
    """One size's stored run, as the scaling reads it."""

    size: int
    run_id: str
    verdict: str  # the run's own verdict (harness.results.judgement)
    folder: Path
    trajectories: Any  # harness.core.trajectories.Trajectories


def run_sizes(
    per_size: Sequence[Any], sizes: Sequence[int], out_dir: Path, *, force: bool, log: Any, show_progress: bool
) -> list[SizeRun]:
    """Run (or reuse) every size's scenario as an ordinary stored run, in order of size."""
    import pandas as pd

    from harness.core.trajectories import from_frame
    from harness.runner.pipeline import run_and_store
    from harness.runner.progress import Progress

    runs = []
    for index, (size, size_scenario) in enumerate(zip(sizes, per_size, strict=True), start=1):
        log.write(f"scale: size {index}/{len(sizes)}, N = {size}\n")
        log.flush()
        with Progress(f"N = {size}", 1, stream=log, enabled=show_progress) as bar:

            def report(done: int, total: int, bar=bar) -> None:
                bar.total = total
                bar.update(done, f"step {done}/{total}")

            stored = run_and_store(size_scenario, out_dir, force=force, progress=report)
        log.write(f"scale: N = {size}: run {stored.run_id} {'reused' if stored.skipped else 'done'}\n")
        frame = pd.read_parquet(stored.folder / "trajectories.parquet")
        paired = bool(json.loads((stored.folder / "manifest.json").read_text()).get("paired", True))
        runs.append(SizeRun(int(size), stored.run_id, stored.judgement["verdict"] if stored.judgement else NOT_JUDGED,
                            stored.folder, from_frame(frame, paired=paired)))
    return runs


def measure_gaps(runs: Sequence[SizeRun], observable: str) -> tuple[list[SizeGap], float]:
    """Every size's gap on the time range all sizes cover, and the range's first time t_min."""
    # The gap is a mean over time: use the range every size covers (early grids can differ).
    t_min = max(float(np.min(run.trajectories.t[run.trajectories.t > 0])) for run in runs)
    gaps = [gap_of_trajectories(run.trajectories, run.size, observable, t_min) for run in runs]
    for g in gaps:
        if not (g.squared_gap_err > 0):
            raise InputError(
                f"scale: the gap at N = {g.size} has no measurable spread across seeds "
                f"(is {observable} constant?); choose another --observable"
            )
    return gaps, t_min


def gap_scaling(
    runs: Sequence[SizeRun], observable: str, resolution: float, min_exponent: float
) -> tuple[dict[str, Any], dict[str, Any]]:
    """Measure, fit and decide the gap's scaling: the verdict record and the run index's columns."""
    sizes = [run.size for run in runs]
    gaps, t_min = measure_gaps(runs, observable)
    fit = fit_scaling(
        sizes, [g.squared_gap for g in gaps], [g.squared_gap_err for g in gaps],
        exponent_bounds=(min_exponent, EXPONENT_BOUNDS[1]),
    )
    tolerance = resolution * gaps[-1].scale
    seeds = min(g.seeds_used for g in gaps)
    shrink = paired_shrink_test(runs[0].trajectories, runs[-1].trajectories, sizes[0], sizes[-1], observable, t_min,
                                min_exponent)
    decision = decide(gaps, fit, tolerance, seeds=seeds, shrink=shrink)
    record = {
        "verdict": decision.verdict,
        "reason": decision.reason,
        "advice": decision.advice,
        "exponent": fit.exponent,
        "exponent_err": fit.exponent_err,
        "offset": fit.offset,
        "offset_err": fit.offset_err,
        "offset_interval": list(fit.offset_interval),
        "offset_upper": fit.offset_upper,
        "offset_significance": fit.offset_significance,
        "amplitude": fit.amplitude,
        "amplitude_err": fit.amplitude_err,
        "chi2": fit.chi2,
        "dof": fit.dof,
        "p_value": fit.p_value,
        "exponent_bounds": list(fit.exponent_bounds),
        "tolerance": tolerance,
        "resolution": resolution,
        "observable": observable,
        "gap_label": f"gap of {observable} (rms over t of theory - simulation)",
        "sizes": [g.size for g in gaps],
        "gaps": [g.gap for g in gaps],
        "gap_errs": [g.gap_err for g in gaps],
        "gap_errs_low": [g.gap_err_low for g in gaps],
        "gap_errs_high": [g.gap_err_high for g in gaps],
        "squared_gaps": [g.squared_gap for g in gaps],
        "squared_gap_errs": [g.squared_gap_err for g in gaps],
        "naive_gaps": [g.naive_gap for g in gaps],
        "noise_floors": [g.noise_floor for g in gaps],
        "scales": [g.scale for g in gaps],
        "seeds_used": [g.seeds_used for g in gaps],
        "t_min": t_min,
        "forecast": decision.forecast,
        "exponent_fitted": fit.exponent_fitted,
        "shrink": None if shrink is None else {**shrink._asdict(), "flat": shrink.flat},
    }
    columns = {
        "scale.offset": fit.offset,
        "scale.offset_err": fit.offset_err,
        "scale.offset_significance": fit.offset_significance,
        "scale.exponent": fit.exponent,
        "scale.exponent_err": fit.exponent_err,
    }
    return record, columns


def record_verdict(
    out_dir: Path, identifier: str, scenario: Any, runs: Sequence[SizeRun], observable: str,
    record: dict[str, Any], columns: dict[str, Any],
) -> dict[str, Any]:
    """Write ``out_dir/<scale_id>/verdict.json`` and the scaling's row of runs.parquet; return the record."""
    from harness.core.files import atomic_write_json
    from harness.results.store import append_index_row

    verdict = {
        **record,
        "run_ids": [run.run_id for run in runs],
        "run_verdicts": [run.verdict for run in runs],
        "scale_id": identifier,
        "scenario": scenario_lib.to_dict(scenario),
    }
    atomic_write_json(out_dir / identifier / "verdict.json", verdict)
    row: dict[str, Any] = {"run_id": identifier, "kind": "scale"}
    row.update(scenario_lib.flatten(scenario))
    row.update({
        "scale.verdict": verdict["verdict"],
        "scale.sizes": json.dumps([run.size for run in runs]),
        "scale.observable": observable,
        **columns,
    })
    append_index_row(out_dir, row)
    return verdict


def run_scaling(
    scenario: dict,
    sizes: Sequence[int],
    out_dir: str | Path,
    *,
    observable: str = DEFAULT_OBSERVABLE,
    resolution: float = DEFAULT_RESOLUTION,
    min_exponent: float = EXPONENT_BOUNDS[0],
    force: bool = False,
    log: Any = None,
    show_progress: bool = True,
) -> dict[str, Any]:
    """Run (or reuse) every size, measure the gaps, fit, decide, write verdict.json; return it."""
    log = log or sys.stderr
    sizes = sorted(sizes)
    per_size = validate(scenario, sizes, observable, resolution, min_exponent)
    identifier = scale_id(scenario, sizes, observable, resolution, min_exponent)
    out_dir = Path(out_dir)
    runs = run_sizes(per_size, sizes, out_dir, force=force, log=log, show_progress=show_progress)
    landmark = landmark_name(observable)
    if landmark is not None:  # the law of growth of a landmark (harness.studies.landmark_scaling)
        record, columns = landmark_scaling(runs, landmark, Margin.from_scenario(scenario), min_exponent)
    else:
        record, columns = gap_scaling(runs, observable, resolution, min_exponent)
    return record_verdict(out_dir, identifier, scenario, runs, observable, record, columns)


def format_verdict(verdict: dict[str, Any]) -> str:
    """The closing lines of ``harness scale``: per-size gaps, the fit and the verdict."""
    if verdict.get("kind") == "landmark":
        return format_landmark_verdict(verdict)
    lines = [f"finite-size scaling of {verdict['observable']} -> {verdict['scale_id']}"]
    lines.append(
        f"  {'N':>7}  {'gap':>10}  {'-err':>8}  {'+err':>8}  {'squared gap U':>14}  {'+-':>8}  "
        f"{'biased gap':>10}  {'noise floor':>11}  seeds  run verdict"
    )
    run_verdicts = verdict.get("run_verdicts") or [""] * len(verdict["sizes"])
    for n, g, low, high, u, u_err, naive, floor, s, run_verdict in zip(
        verdict["sizes"], verdict["gaps"], verdict["gap_errs_low"], verdict["gap_errs_high"],
        verdict["squared_gaps"], verdict["squared_gap_errs"], verdict["naive_gaps"],
        verdict["noise_floors"], verdict["seeds_used"], run_verdicts, strict=True,
    ):
        lines.append(
            f"  {n:>7}  {g:>10.4g}  {low:>8.2g}  {high:>8.2g}  {u:>14.3g}  {u_err:>8.2g}  "
            f"{naive:>10.4g}  {floor:>11.4g}  {s:>5}  {run_verdict}"
        )
    exponent_err = verdict["exponent_err"]
    b_text = f"{verdict['exponent']:.2f}"
    if not verdict.get("exponent_fitted", True):
        b_text += f" (held fixed: {len(verdict['sizes'])} sizes cannot fit it; the offset is bounded for every b)"
    elif exponent_err is not None and math.isfinite(exponent_err):
        b_text += f" +- {exponent_err:.2f}"
    else:
        b_text += " (error undetermined)"
    lines.append(
        f"  fit a N^-b + c: a = {verdict['amplitude']:.3g}, b = {b_text}, "
        f"c = {verdict['offset']:.3g} +{verdict['offset_err']:.2g} "
        f"(z = {verdict['offset_significance']:.1f}, c < {verdict['offset_upper']:.3g} at 2 sigma, "
        f"tolerance {verdict['tolerance']:.3g}), chi^2 = {verdict['chi2']:.2f} / {verdict['dof']} dof"
    )
    shrink = verdict.get("shrink")
    if shrink:
        lines.append(
            f"  paired shrink test: U(N = {shrink['large']}) / U(N = {shrink['small']}) = {shrink['ratio']:.3g} "
            f"+- {shrink['ratio_err']:.2g} over the same {shrink['seeds']} seeds; a finite-size gap allows at most "
            f"{shrink['bound']:.3g}"
        )
    lines.append(f"verdict: {verdict['verdict']}: {verdict['reason']}")
    for item in verdict["advice"]:
        lines.append(f"  to settle it: {item}")
    return "\n".join(lines)

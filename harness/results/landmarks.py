"""Landmarks of learning curves: plateau, escape, specialisation and the asymptotic phase.

One definition serves simulated and theoretical trajectories alike: every function takes the
evaluation times t [E] and per-seed arrays [S, E] (the :mod:`harness.core.trajectories` layout, one
observable at a time), and returns one number per seed. NaN means "none": a curve without a
plateau has no plateau height, never a made-up one. Every threshold is a field of
:class:`LandmarkSettings`.

Definitions
-----------
Log-slope. s(t) = d ln eps / d ln t, the exponent of the error's local power law, as the central
difference quotient [L(ln t + h) - L(ln t - h)] / (2 h), L the piecewise-linear interpolant of
ln eps in ln t through the evaluations and h = ``slope_window``. The window makes the slope of a
noisy simulated curve usable (a 1% error noise at evaluations 0.12 apart in ln t would otherwise
move s by about 0.1) and does not depend on how densely the times are spaced. Undefined (NaN) at
t = 0, within h of either end, and wherever eps <= ``error_floor`` or is not finite.

Plateau. A stretch where |s| <= ``plateau_slope`` that begins after the error has been falling
(s < -plateau_slope at an earlier evaluation) and lasts at least a factor ``plateau_min_span``
in t. The condition "after a fall" is what tells a plateau from the start of every curve: on a
log-t axis any curve is flat as t -> 0 (eps(t) = eps(0) - c t gives s = -c t / eps -> 0).
- entry: the time |s| crosses ``plateau_slope`` downwards at the start of the first such stretch;
- height: the median of eps over the stretch (up to its last flat evaluation);
- exit: the first time after entry that eps falls to (1 - ``exit_fraction``) x height.
Without label noise (``noisy=False``) a plateau that is never left is reported with exit NaN
(e.g. a student started exactly symmetric). With label noise the error ends on a flat stretch
anyway, its asymptote, so a flat stretch that is never left is the asymptote, not a plateau.

Specialisation. The statistic is the spread of R across student units relative to its size,

    sigma_R = sqrt( sum_{k,m} (R_km - Rbar_m)^2 / sum_{k,m} R_km^2 ),   Rbar_m = (1/K) sum_k R_km,

which lies in [0, 1]: 0 exactly when every student unit has the same overlaps with every teacher
unit (the unspecialised, symmetric state of the plateau), sqrt(1 - 1/K) when R is a permutation
matrix (each student unit has taken over one teacher unit; 0.71 for K = 2). Small random initial
weights give sigma_R near sqrt(1 - 1/K) too, but R then grows along its symmetric part and
sigma_R falls; specialisation is the first time sigma_R rises through ``specialisation_threshold``
after having been below it. NaN if it never is below, never rises, K = 1 (no symmetry to break), or
R is not given.

Asymptotic phase. The last stretch is the evaluations with (1 - ``tail_fraction``) t_end <= t <=
t_end, t_end the last time with a finite error above ``error_floor``. Without noise the decay
rate is -slope of the least-squares line through (t, ln eps) there, so eps ~ exp(-rate t); with
label noise the asymptotic error is the mean of eps there. A curve still on a plateau (not left,
or left only inside the last stretch) has no asymptotic decay rate (NaN).

Crossing times are interpolated linearly in ln t between the two evaluations that bracket them.
:func:`sampling_warning` says when those brackets, the plateau or the last stretch hold too few
evaluations to trust the numbers.

The scenario's ``[landmarks]`` table
-----------------------------------
Every threshold above is a key of ``[landmarks]`` with the default of :class:`LandmarkSettings`,
plus ``error`` (which curve's landmarks: ``test_error``, the measured error, or
``overlap_error``, the Gaussian formula on the order parameters) and ``judged`` (which landmarks
are held against the theory, harness.results.paired_landmarks). Measuring landmarks changes no
computation, so the section is a judging section (harness.core.scenario.JUDGING_SECTIONS): it is
not part of the run_id, and a stored run is measured again when these keys change.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Mapping
from dataclasses import dataclass, fields
from typing import Any, NamedTuple

import numpy as np

from harness.core import keys as k
from harness.core.keys import Key
from harness.core.scenario import declare_keys
from harness.core.trajectories import observable_group
from harness.results import judgement as _judgement  # noqa: F401  declares [agreement], which [landmarks] follows

LANDMARKS: dict[str, str] = {
    "plateau_entry": "time the plateau begins",
    "plateau_height": "error on the plateau (median over it)",
    "plateau_exit": "time the error falls to (1 - exit_fraction) x the plateau height",
    "specialisation": "time the spread of R across student units rises through specialisation_threshold",
    "final_error": "error at the last evaluation",
    "decay_rate": "rate of the exponential decay over the last stretch (no label noise)",
    "asymptotic_error": "mean error over the last stretch (label noise)",
}
"""The landmarks measured on every curve and held against the theory, with their meaning."""
ERROR_CURVES: tuple[str, ...] = ("test_error", "overlap_error")
"""The curves whose landmarks can be measured."""


@dataclass(frozen=True)
class LandmarkSettings:
    """Every threshold of the landmark definitions (module docstring), with its default."""

    plateau_slope: float = 0.1
    """Largest |d ln eps / d ln t| on a plateau; also the fall that must precede it."""
    slope_window: float = 0.25
    """Half-width h, in ln t, of the difference quotient for d ln eps / d ln t (t e^-h .. t e^h)."""
    plateau_min_span: float = 1.5
    """A plateau lasts at least this factor in t (last flat time / entry time)."""
    exit_fraction: float = 0.5
    """The plateau is left when eps falls to (1 - exit_fraction) x its height."""
    specialisation_threshold: float = 0.3
    """sigma_R above which the student units count as specialised (sigma_R in [0, 1])."""
    tail_fraction: float = 0.5
    """The last stretch is t >= (1 - tail_fraction) t_end."""
    error_floor: float = 1e-8
    """Errors at or below this are numerical noise: no slopes, no fits there. The theory at its
    default tolerances (theory.atol = 1e-9) gives eps to about 1e-8 (measured: a K = M = 2 erf
    curve levels off there); float32 simulations floor near 1e-11..1e-9."""
    min_points: int = 3
    """Fewest evaluations that resolve a plateau or a last stretch (sampling_warning)."""
    max_bracket_ratio: float = 1.5
    """Largest ratio t_after / t_before of the evaluations bracketing a crossing (sampling_warning)."""

    def __post_init__(self) -> None:
        for field in fields(self):
            value = getattr(self, field.name)
            if not (np.isfinite(value) and value > 0):
                raise ValueError(f"LandmarkSettings.{field.name} = {value!r}: must be a finite number > 0")
        for name in ("exit_fraction", "tail_fraction", "specialisation_threshold"):
            if not getattr(self, name) < 1:
                raise ValueError(f"LandmarkSettings.{name} = {getattr(self, name)!r}: must be < 1")
        if self.plateau_min_span <= 1 or self.max_bracket_ratio <= 1:
            raise ValueError("LandmarkSettings.plateau_min_span and max_bracket_ratio must be > 1")


    @classmethod
    def from_scenario(cls, scenario: Mapping[str, Any]) -> LandmarkSettings:
        """The settings of a scenario's ``[landmarks]`` table (a resolved scenario or a plain table;
        keys it lacks take their defaults)."""
        section = scenario.get("landmarks", {}) if hasattr(scenario, "get") else {}
        names = [field.name for field in fields(cls)]
        return cls(**{name: section[name] for name in names if name in section})

    def to_dict(self) -> dict[str, float]:
        return {field.name: getattr(self, field.name) for field in fields(self)}


def _open_unit_interval(value: float) -> str | None:
    return None if 0.0 < value < 1.0 else "a number in (0, 1)"


def _above_one(value: float) -> str | None:
    return None if math.isfinite(value) and value > 1.0 else "a finite number > 1"


_CHECKS: dict[str, k.Check] = {
    "exit_fraction": _open_unit_interval,
    "specialisation_threshold": _open_unit_interval,
    "tail_fraction": _open_unit_interval,
    "plateau_min_span": _above_one,
    "max_bracket_ratio": _above_one,
    "min_points": k.positive,
}
_KEY_DOCS: dict[str, str] = {
    "plateau_slope": "largest |d ln eps / d ln t| on a plateau; also the fall that must precede it",
    "slope_window": "half-width in ln t of the difference quotient for d ln eps / d ln t",
    "plateau_min_span": "a plateau lasts at least this factor in t",
    "exit_fraction": "the plateau is left when eps falls to (1 - exit_fraction) x its height",
    "specialisation_threshold": "sigma_R (spread of R across student units, in [0, 1]) above which units are "
                                "specialised",
    "tail_fraction": "the last stretch (decay rate, asymptotic error) is t >= (1 - tail_fraction) t_end",
    "error_floor": "errors at or below this are numerical noise: no slopes, no fits there",
    "min_points": "fewest evaluations that resolve a plateau or a last stretch (else a warning)",
    "max_bracket_ratio": "largest t_after / t_before around a crossing time (else a warning)",
}
KEYS: dict[str, Key] = {
    "error": Key("str", "test_error", "the error curve whose landmarks are measured", k.one_of(*ERROR_CURVES)),
    "judged": Key("str_list", list(LANDMARKS), "landmarks held against the theory (paired, with a verdict)",
                  k.names_from(tuple(LANDMARKS))),
    **{
        field.name: Key("int" if field.type in ("int", int) else "float", field.default, _KEY_DOCS[field.name],
                        _CHECKS.get(field.name, k.positive_finite))
        for field in fields(LandmarkSettings)
    },
}
"""The [landmarks] table: how landmarks are measured and which are judged (not part of the run_id)."""
declare_keys("landmarks", KEYS)


class Landmarks(NamedTuple):
    """One value per seed (NaN: none); times in units of t, rates per unit t."""

    plateau_entry: np.ndarray  # [S]
    plateau_exit: np.ndarray  # [S] NaN: no plateau, or a plateau never left
    plateau_height: np.ndarray  # [S]
    specialisation: np.ndarray  # [S]
    final_error: np.ndarray  # [S] eps at the last evaluation
    decay_rate: np.ndarray  # [S] eps ~ exp(-decay_rate t) over the last stretch (noiseless)
    asymptotic_error: np.ndarray  # [S] mean eps over the last stretch (label noise)
    tail_points: np.ndarray  # [S] evaluations in the last stretch (int)


# --------------------------------------------------------------------------- statistics


def log_slope(t: np.ndarray, error: np.ndarray, window: float, floor: float = 0.0) -> np.ndarray:
    """d ln eps / d ln t [S, E] by the windowed central difference (module docstring)."""
    t = np.asarray(t, np.float64)
    error = np.asarray(error, np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        log_error = np.where(np.isfinite(error) & (error > floor), np.log(np.where(error > 0, error, 1.0)), np.nan)
    slope = np.full(error.shape, np.nan)
    positive = np.flatnonzero(t > 0)
    if len(positive) < 2:
        return slope
    x = np.log(t[positive])
    y = log_error[:, positive]
    upper = _interpolate(x, y, x + window)
    lower = _interpolate(x, y, x - window)
    slope[:, positive] = (upper - lower) / (2.0 * window)
    return slope


def _interpolate(x: np.ndarray, y: np.ndarray, at: np.ndarray) -> np.ndarray:
    """Piecewise-linear y(at) for every row of y [S, n] (NaN outside [x_0, x_-1]); x shared by all rows."""
    inside = (at >= x[0]) & (at <= x[-1])
    right = np.clip(np.searchsorted(x, at, side="right"), 1, len(x) - 1)
    left = right - 1
    weight = np.where(inside, (at - x[left]) / (x[right] - x[left]), np.nan)
    return y[:, left] * (1.0 - weight) + y[:, right] * weight


def specialisation_index(R: np.ndarray) -> np.ndarray:
    """sigma_R of the module docstring for R [..., K, M] (NaN where R = 0 or K = 1)."""
    R = np.asarray(R, np.float64)
    if R.shape[-2] == 1:
        return np.full(R.shape[:-2], np.nan)
    spread = np.sum((R - R.mean(axis=-2, keepdims=True)) ** 2, axis=(-2, -1))
    size = np.sum(R**2, axis=(-2, -1))
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(size > 0, np.sqrt(spread / size), np.nan)


# --------------------------------------------------------------------------- helpers


def _first(mask: np.ndarray) -> np.ndarray:
    """Index of the first True in each row, -1 if none."""
    return np.where(mask.any(axis=1), mask.argmax(axis=1), -1)


def _crossing_time(t: np.ndarray, quantity: np.ndarray, level: np.ndarray, index: np.ndarray) -> np.ndarray:
    """Time where ``quantity`` passes ``level`` between evaluations index - 1 and index, linear in ln t.

    ``index`` [S] is the first evaluation past the level (-1: none -> NaN). When the evaluation
    before it is missing (t = 0, first point, or a NaN value) the crossing is put at t[index].
    """
    s = np.arange(quantity.shape[0])
    found = index >= 0
    i = np.where(found, index, 0)
    before = np.maximum(i - 1, 0)
    q1, q0 = quantity[s, i], quantity[s, before]
    usable = found & (i > 0) & (t[before] > 0) & np.isfinite(q0) & (q1 != q0)
    with np.errstate(divide="ignore", invalid="ignore"):
        fraction = np.clip((level - q0) / (q1 - q0), 0.0, 1.0)
        log_t = np.where(usable, np.log(np.where(t[before] > 0, t[before], 1.0)) * (1 - fraction)
                         + np.log(np.where(t[i] > 0, t[i], 1.0)) * fraction, np.nan)
    return np.where(found, np.where(usable, np.exp(log_t), t[i]), np.nan)


def _runs_end(mask: np.ndarray) -> np.ndarray:
    """For each evaluation, the index of the last True of the run of Trues starting there (-1 if False)."""
    s, e = mask.shape
    breaks = np.where(mask, e, np.arange(e)[None, :])  # index of each False, e for True
    next_break = np.minimum.accumulate(breaks[:, ::-1], axis=1)[:, ::-1]
    return np.where(mask, next_break - 1, -1)


# --------------------------------------------------------------------------- landmarks


def find_landmarks(
    t: np.ndarray,
    error: np.ndarray,
    R: np.ndarray | None = None,
    *,
    settings: LandmarkSettings | None = None,
    noisy: bool = False,
) -> Landmarks:
    """Landmarks of every seed's curve.

    ``t`` [E] evaluation times (increasing; t = 0 allowed), ``error`` [S, E] the error (test or
    theory), ``R`` [S, E, K, M] the student-teacher overlaps or None, ``noisy`` whether the labels
    carry noise (changes what a final flat stretch is, and asymptotic rate vs error).
    """
    settings = settings or LandmarkSettings()
    t = np.asarray(t, np.float64)
    error = np.atleast_2d(np.asarray(error, np.float64))
    S, E = error.shape
    if t.shape != (E,) or np.any(np.diff(t) <= 0):
        raise ValueError(f"times must be increasing with one per evaluation ({E}); got shape {t.shape}")
    index = np.arange(E)[None, :]
    rows = np.arange(S)

    # plateau
    slope = log_slope(t, error, settings.slope_window, settings.error_floor)
    flat = np.abs(slope) <= settings.plateau_slope  # NaN -> False
    falling = slope < -settings.plateau_slope
    fell_before = np.zeros_like(falling)
    fell_before[:, 1:] = np.logical_or.accumulate(falling, axis=1)[:, :-1]
    run_end = _runs_end(flat)
    long_enough = flat & (t[np.maximum(run_end, 0)] >= settings.plateau_min_span * t[None, :])
    entry = _first(flat & fell_before & long_enough)
    has = entry >= 0
    last_flat = np.where(has, run_end[rows, np.maximum(entry, 0)], -1)
    on_plateau = has[:, None] & (index >= entry[:, None]) & (index <= last_flat[:, None])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN rows: seeds without a plateau
        height = np.nanmedian(np.where(on_plateau, error, np.nan), axis=1)
    threshold = (1.0 - settings.exit_fraction) * height
    with np.errstate(invalid="ignore"):
        below = (index > entry[:, None]) & has[:, None] & (error <= threshold[:, None])
    exit_index = _first(below)
    with np.errstate(divide="ignore", invalid="ignore"):
        log_error = np.log(np.where(error > 0, error, np.nan))
        exit_time = _crossing_time(t, log_error, np.log(threshold), exit_index)
    keep = has & ((exit_index >= 0) | (not noisy))
    entry_time = _crossing_time(t, np.abs(slope), np.full(S, settings.plateau_slope), entry)
    entry_time, exit_time, height = (np.where(keep, a, np.nan) for a in (entry_time, exit_time, height))

    # specialisation
    specialisation = np.full(S, np.nan)
    if R is not None:
        sigma = specialisation_index(R)
        with np.errstate(invalid="ignore"):
            below_threshold = sigma < settings.specialisation_threshold
            been_below = np.logical_or.accumulate(below_threshold, axis=1)
            rises = _first((sigma >= settings.specialisation_threshold) & been_below)
        specialisation = _crossing_time(t, sigma, np.full(S, settings.specialisation_threshold), rises)

    # asymptotic phase
    usable = np.isfinite(error) & (error > settings.error_floor)
    last = np.where(usable.any(axis=1), E - 1 - np.argmax(usable[:, ::-1], axis=1), -1)
    t_end = np.where(last >= 0, t[np.maximum(last, 0)], np.nan)
    start = (1.0 - settings.tail_fraction) * t_end
    tail = usable & (t[None, :] >= start[:, None]) & (index <= last[:, None])
    tail_points = tail.sum(axis=1)
    still_on_plateau = np.isfinite(entry_time) & ~(exit_time < start)
    with np.errstate(invalid="ignore", divide="ignore"):
        weights = tail.astype(np.float64)
        count = np.maximum(weights.sum(axis=1), 1.0)
        t_mean = (weights * t).sum(axis=1) / count
        y = np.where(tail, np.log(np.where(usable, error, 1.0)), 0.0)
        y_mean = y.sum(axis=1) / count
        dt = np.where(tail, t[None, :] - t_mean[:, None], 0.0)
        slope_fit = (dt * (y - y_mean[:, None])).sum(axis=1) / (dt**2).sum(axis=1)
        mean_tail = np.where(tail, error, 0.0).sum(axis=1) / count
    decay_rate = np.where((tail_points >= 2) & ~still_on_plateau & (not noisy), -slope_fit, np.nan)
    asymptotic_error = np.where((tail_points >= 1) & ~still_on_plateau & noisy, mean_tail, np.nan)

    return Landmarks(entry_time, exit_time, height, specialisation, error[:, -1].copy(),
                     decay_rate, asymptotic_error, tail_points)


def landmarks_of(
    t: np.ndarray,
    values: np.ndarray,
    observables: list[str],
    *,
    error: str = "test_error",
    settings: LandmarkSettings | None = None,
    noisy: bool = False,
) -> Landmarks:
    """:func:`find_landmarks` from values [S, E, O] in :mod:`harness.core.trajectories` order.

    ``error`` names the observable to use (``test_error`` or ``overlap_error``); R is read from
    the ``R[k,m]`` columns when present.
    """
    if error not in observables:
        raise ValueError(f"observable {error!r} not in the trajectories; present: {', '.join(observables)}")
    values = np.asarray(values, np.float64)
    r_names = [name for name in observables if observable_group(name) == "R"]
    R = None
    if r_names:
        pairs = [tuple(int(i) for i in name[2:-1].split(",")) for name in r_names]
        K, M = max(k for k, _ in pairs) + 1, max(m for _, m in pairs) + 1
        R = np.full(values.shape[:2] + (K, M), np.nan)
        for name, (k, m) in zip(r_names, pairs, strict=True):
            R[:, :, k, m] = values[:, :, observables.index(name)]
    return find_landmarks(t, values[:, :, observables.index(error)], R, settings=settings, noisy=noisy)


# --------------------------------------------------------------------------- sampling


def sampling_warning(t: np.ndarray, found: Landmarks, settings: LandmarkSettings | None = None) -> str | None:
    """One line saying which landmarks the evaluation times are too sparse to resolve, or None."""
    settings = settings or LandmarkSettings()
    t = np.asarray(t, np.float64)
    problems: list[str] = []
    seeds = lambda mask: ",".join(str(s) for s in np.flatnonzero(mask)[:5]) + ("..." if mask.sum() > 5 else "")  # noqa: E731

    def bracket_ratio(times: np.ndarray) -> np.ndarray:
        """t_after / t_before of the evaluations around each time (NaN where not finite or at t_0)."""
        ratio = np.full(times.shape, np.nan)
        ok = np.isfinite(times) & (times > t[0]) & (times <= t[-1])
        after = np.clip(np.searchsorted(t, np.where(ok, times, t[-1]), side="left"), 1, len(t) - 1)
        with np.errstate(divide="ignore"):
            ratio[ok] = np.where(t[after - 1] > 0, t[after] / t[after - 1], np.inf)[ok]
        return ratio

    for name, times in (("plateau entry", found.plateau_entry), ("plateau exit", found.plateau_exit),
                        ("specialisation", found.specialisation)):
        coarse = bracket_ratio(times) > settings.max_bracket_ratio
        if coarse.any():
            widest = np.nanmax(bracket_ratio(times)[coarse])
            problems.append(f"{name} of seed(s) {seeds(coarse)} lies between evaluations a factor "
                            f"{widest:.3g} apart in t (> {settings.max_bracket_ratio:g})")
    with np.errstate(invalid="ignore"):
        end = np.where(np.isfinite(found.plateau_exit), found.plateau_exit, t[-1])
        inside = ((t[None, :] >= found.plateau_entry[:, None]) & (t[None, :] <= end[:, None])).sum(axis=1)
    short = np.isfinite(found.plateau_entry) & (inside < settings.min_points)
    if short.any():
        problems.append(f"the plateau of seed(s) {seeds(short)} holds fewer than {settings.min_points} evaluations")
    sparse_tail = found.tail_points < settings.min_points
    if sparse_tail.any():
        problems.append(f"the last stretch of seed(s) {seeds(sparse_tail)} holds fewer than "
                        f"{settings.min_points} evaluations")
    positive = t[t > 0]
    if np.all(np.isnan(found.plateau_entry)) and len(positive) > 1:
        widest = float(np.max(positive[1:] / positive[:-1]))
        if widest > settings.plateau_min_span:
            problems.append(f"no plateau found, but evaluations lie up to a factor {widest:.3g} apart in t, "
                            f"so a plateau shorter than that (plateau_min_span {settings.plateau_min_span:g}) "
                            "could fall between two")
    return "evaluation times too sparse: " + "; ".join(problems) if problems else None

"""Landmarks of simulation and theory, seed by seed, held against each other with a verdict.

Every landmark of harness.results.landmarks (plateau entry, height and exit, specialisation,
final error, decay rate or asymptotic error) is measured by one definition, with the scenario's
``[landmarks]`` settings, on each seed's simulated curve and on the theory started from that
seed's own initial conditions. For landmark l and seed s this gives x_s^sim(l) and
x_s^theory(l) (NaN: the curve has no such landmark, e.g. a plateau not left before the end).

Presence. A landmark is *present* on one side when more than half of that side's seeds have it
(diverged seeds left out of the simulation's count). It is reported as present on one side only
("theory only": the theory escapes the plateau in 30 of 32 seeds, the simulation in 3; or
"simulation only") when the majorities differ *and* the difference is shown: among the seeds
where exactly one side has the landmark, b have it in the theory only and c in the simulation
only, and the exact two-sided sign test of b against c (McNemar 1947, Psychometrika 12, 153, in
its exact binomial form: p = min(1, 2 P[Bin(b + c, 1/2) <= min(b, c)])) rejects at ``alpha``.
Then no mean difference can stand for the comparison: the verdict is *inconclusive*, with no
forecast of seeds (more seeds do not help; a longer time window, or other thresholds, might).
Majorities that differ without a shown difference (a landmark near the end of the window,
found in 33 of 64 simulated seeds and 31 of 64 theoretical ones) are "about half", and like
"both" and "neither" the landmark is judged on the seeds where both sides have it (at least two).

The verdict (harness.results.judgement, "Scalars"). Over the seeds where both sides have it,
d_s(l) = x_s^theory(l) - x_s^sim(l), with mean m and standard error se. The margin is the
scenario's ``[agreement]`` margin relative to the landmark's simulated size,

    delta_l = agreement.margin * |mean of x_s^sim(l) over the same seeds|,

so with the default 5 % a plateau left at t = 170 must be matched to within 8.5 in t, a decay
rate of 0.043 to within 0.0022. Error-valued landmarks (plateau height, final and asymptotic
error) keep the floor their curve has, delta_l >= agreement.floor * max_t |mean simulated error|,
so that an error decayed to rounding level (1e-13 in a noiseless run) is not held to 5 % of it.
The simultaneous band m +- c se covers every judged landmark of
the run at once (c from judgement.band_factor: bootstrap-t from 12 seeds, Sidak below), and the
outcome per landmark is the same three-way rule as for the curves: agree when the band lies
inside +-delta, disagree when it lies wholly outside, inconclusive otherwise (with about how many
seeds would settle it). The landmarks' outcomes combine into the run's *landmark verdict* as the
groups' do. It is reported beside the run's verdict and does not change it nor the exit status:
the landmarks are functionals of the curves the run's verdict already judges at every time,
and are a separate family with their own error rate alpha.

An unpaired theory (one mean curve) has its landmarks measured on that curve, the same for every
seed, so se is the simulation's spread alone.

Each side's mean is also given with its pointwise 1 - alpha Student-t interval (over the seeds that
have the landmark), for figures and tables; the verdict rests on the paired band only.
"""

from __future__ import annotations

import json
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any, NamedTuple

import numpy as np
import pandas as pd
from scipy import special

from harness.core.files import strict_json_value
from harness.core.trajectories import Trajectories
from harness.results.judgement import (
    INCONCLUSIVE,
    NOT_JUDGED,
    Margin,
    ScalarJudgement,
    ScalarVerdict,
    combine_verdicts,
    judge_scalars,
    mean_sem,
    pointwise_interval,
)
from harness.results.landmarks import LANDMARKS, Landmarks, LandmarkSettings, landmarks_of, sampling_warning

ERROR_VALUED = ("plateau_height", "final_error", "asymptotic_error")
"""Landmarks that are values of the error curve, whose margin has the curve's floor."""

LANDMARK_COLUMNS = ["seed", "landmark", "sim", "theory"]
"""The columns of landmarks.parquet: each seed's landmarks, simulated and theoretical (NaN: none)."""
TIMES: frozenset[str] = frozenset({"plateau_entry", "plateau_exit", "specialisation"})
"""The landmarks that are times (the others are errors or rates)."""

BOTH, THEORY_ONLY, SIMULATION_ONLY, NEITHER = "both", "theory only", "simulation only", "neither"
ABOUT_HALF, NO_SIMULATION, NO_THEORY = "about half", "no simulation", "no theory"
"""Presence of a landmark: on which side more than half of the seeds have it (or a side is missing)."""


@dataclass(frozen=True)
class LandmarkOptions:
    """What the scenario says about landmarks: the thresholds, the curve, which are judged, label noise."""

    settings: LandmarkSettings = field(default_factory=LandmarkSettings)
    error: str = "test_error"
    judged: tuple[str, ...] = tuple(LANDMARKS)
    noisy: bool = False  # the labels carry noise (teacher.noise_std > 0): the error ends on an asymptote

    @classmethod
    def from_scenario(cls, scenario: Mapping[str, Any]) -> LandmarkOptions:
        """From a resolved scenario or a plain table (a stored scenario.toml); missing keys take defaults."""
        section = scenario.get("landmarks", {}) or {}
        teacher = scenario.get("teacher", {}) or {}
        judged = section.get("judged", tuple(LANDMARKS))
        return cls(
            LandmarkSettings.from_scenario(scenario),
            str(section.get("error", "test_error")),
            tuple(dict.fromkeys(judged)),
            float(teacher.get("noise_std", 0.0)) > 0,
        )

    def to_dict(self) -> dict[str, Any]:
        """Everything the measured landmarks depend on (judgement.json compares it to the scenario's)."""
        return {**self.settings.to_dict(), "error": self.error, "judged": list(self.judged), "noisy": self.noisy}


class LandmarkRow(NamedTuple):
    """One landmark of a run: both sides' means and intervals, the paired difference and its verdict."""

    landmark: str
    verdict: str
    presence: str  # both / theory only / simulation only / about half / neither / no simulation / no theory
    judged: bool  # listed in [landmarks] judged
    seeds: int  # seeds of the run
    sim_seeds: int  # seeds whose simulation has the landmark
    theory_seeds: int
    paired_seeds: int  # seeds where both have it (the verdict's seeds)
    sim_mean: float
    sim_low: float  # pointwise 1 - alpha Student-t interval of the mean
    sim_high: float
    theory_mean: float
    theory_low: float
    theory_high: float
    diff_mean: float  # mean over paired seeds of theory - simulation
    diff_sem: float
    band: float  # c * diff_sem, the simultaneous band's half-width (NaN: not judged)
    margin: float  # delta = agreement.margin x |simulated mean over the paired seeds|
    reach: float  # (|m| + band) / margin
    worst_ratio: float  # |m| / margin
    seeds_needed: float  # inconclusive: about how many seeds would settle it (inf: none would)


class PairedLandmarks(NamedTuple):
    """A run's landmarks, seed by seed, and their verdict."""

    seeds: np.ndarray  # [S]
    names: list[str]  # [L], every landmark of harness.results.landmarks.LANDMARKS
    sim: np.ndarray  # [S, L] NaN: none (or a diverged seed)
    theory: np.ndarray  # [S, L]
    rows: list[LandmarkRow]
    verdict: str
    seeds_needed: float
    judgement: ScalarJudgement
    options: LandmarkOptions
    sampling_warning: str | None

    def frame(self) -> pd.DataFrame:
        """landmarks.parquet: one row per seed and landmark (:data:`LANDMARK_COLUMNS`)."""
        s, n = self.sim.shape
        return pd.DataFrame({
            "seed": np.repeat(np.asarray(self.seeds), n).astype(np.int64),
            "landmark": np.tile(np.asarray(self.names, dtype=object), s),
            "sim": self.sim.reshape(-1),
            "theory": self.theory.reshape(-1),
        }, columns=LANDMARK_COLUMNS)

    def row(self, name: str) -> LandmarkRow | None:
        return next((r for r in self.rows if r.landmark == name), None)

    def to_dict(self) -> dict[str, Any]:
        """The landmarks section of judgement.json."""
        band = self.judgement.band
        return {
            "verdict": self.verdict,
            "seeds_needed": self.seeds_needed,
            "margin": self.judgement.margin.margin,
            "floor": self.judgement.margin.floor,
            "alpha": self.judgement.margin.alpha,
            "band_factor": band.factor,
            "band_method": band.method,
            "band_seeds": band.seeds,
            "band_cells": band.cells,
            "options": self.options.to_dict(),
            "sampling_warning": self.sampling_warning,
            "table": [r._asdict() for r in self.rows],
        }


def _measure(t: np.ndarray, values: np.ndarray, observables: list[str], options: LandmarkOptions) -> Landmarks:
    return landmarks_of(t, values, observables, error=options.error, settings=options.settings, noisy=options.noisy)


def _as_array(found: Landmarks, names: Sequence[str]) -> np.ndarray:
    return np.stack([np.asarray(getattr(found, name), np.float64) for name in names], axis=1)


def presence(sim: np.ndarray, theory: np.ndarray, has_sim: np.ndarray, has_theory: np.ndarray,
              alpha: float) -> str:
    """Which sides have the landmark (finite in ``sim`` / ``theory`` [S]) in most seeds (module docstring)."""
    sim_seeds, theory_seeds = int(has_sim.sum()), int(has_theory.sum())
    if not sim_seeds:
        return NO_SIMULATION
    if not theory_seeds:
        return NO_THEORY
    on_sim = np.isfinite(sim).sum() > sim_seeds / 2
    on_theory = np.isfinite(theory).sum() > theory_seeds / 2
    if on_sim == on_theory:
        return BOTH if on_sim else NEITHER
    both_seeds = has_sim & has_theory
    theory_alone = int(np.sum(both_seeds & np.isfinite(theory) & ~np.isfinite(sim)))
    sim_alone = int(np.sum(both_seeds & np.isfinite(sim) & ~np.isfinite(theory)))
    return (THEORY_ONLY if on_theory else SIMULATION_ONLY) if sign_test(theory_alone, sim_alone) < alpha \
        else ABOUT_HALF


def sign_test(b: int, c: int) -> float:
    """Exact two-sided p-value of b against c successes in b + c fair coin tosses (McNemar's exact test)."""
    if b + c == 0:
        return 1.0
    return float(min(1.0, 2.0 * special.bdtr(min(b, c), b + c, 0.5)))


def pair_landmarks(
    traj: Trajectories, options: LandmarkOptions, margin: Margin, diverged_at: np.ndarray | None = None
) -> PairedLandmarks | None:
    """Measure every seed's landmarks on both sides and judge them (module docstring).

    None when the trajectories lack the error curve the options name.
    """
    observables = list(traj.observables)
    if options.error not in observables:
        return None
    t = np.asarray(traj.t, np.float64)
    names = list(LANDMARKS)
    error = traj.column(options.error)
    diverged = np.zeros(len(traj.seeds), bool) if diverged_at is None else np.isfinite(np.asarray(diverged_at))
    sim_values = np.where(diverged[:, None, None], np.nan, traj.sim)
    has_sim = np.any(np.isfinite(sim_values[:, :, error]), axis=1)  # [S] seeds with a simulation at all
    sim_found = _measure(t, sim_values, observables, options)
    if traj.paired:
        theory_found = _measure(t, traj.theory, observables, options)
        theory = _as_array(theory_found, names)
    else:  # one mean curve: its landmarks stand for every seed
        theory_found = _measure(t, mean_sem(traj.theory)[0][None], observables, options)
        theory = np.repeat(_as_array(theory_found, names), len(traj.seeds), axis=0)
    sim = np.where(has_sim[:, None], _as_array(sim_found, names), np.nan)
    has_theory = np.any(np.isfinite(traj.theory[:, :, error]), axis=1)

    sim_count = np.isfinite(sim).sum(axis=0)
    theory_count = np.isfinite(theory).sum(axis=0)
    presences = [presence(sim[:, i], theory[:, i], has_sim, has_theory, margin.alpha) for i in range(len(names))]
    mismatched = [p in (THEORY_ONLY, SIMULATION_ONLY) for p in presences]
    judged_columns = [i for i, name in enumerate(names) if name in options.judged and not mismatched[i]]
    diff = theory[:, judged_columns] - sim[:, judged_columns]
    paired = np.isfinite(diff)
    size = np.array([np.mean(sim[paired[:, j], c]) if paired[:, j].any() else np.nan
                     for j, c in enumerate(judged_columns)])
    # error-valued landmarks share their curve's floor (harness.results.judgement): floor x its peak
    peak = np.nanmax(np.abs(mean_sem(sim_values[:, :, error])[0]), initial=0.0)
    floor = np.array([margin.floor * peak if names[c] in ERROR_VALUED else 0.0 for c in judged_columns])
    scalar = judge_scalars(diff, size, [names[c] for c in judged_columns], margin, floor)
    by_name = {item.name: item for item in scalar.items}

    rows: list[LandmarkRow] = []
    items: list[Any] = list(scalar.items)
    for i, name in enumerate(names):
        paired_seeds = int(np.sum(np.isfinite(sim[:, i]) & np.isfinite(theory[:, i])))
        item = by_name.get(name)
        if item is None:  # not listed in [landmarks] judged, or present on one side only
            verdict = INCONCLUSIVE if name in options.judged else NOT_JUDGED
            item = ScalarVerdict(name, verdict, math.nan, math.nan, paired_seeds, *([math.nan] * 5),
                                 math.inf if verdict == INCONCLUSIVE else math.nan)
            if verdict == INCONCLUSIVE:
                items.append(item)
        if not math.isfinite(item.mean) and paired_seeds:  # the paired difference, shown though not judged
            mean, sem, _ = mean_sem(theory[:, i] - sim[:, i])
            item = item._replace(mean=float(mean), sem=float(sem))
        sim_stats = pointwise_interval(sim[:, i], margin.alpha)
        theory_stats = pointwise_interval(theory[:, i], margin.alpha)
        rows.append(LandmarkRow(
            landmark=name, verdict=item.verdict, presence=presences[i], judged=name in options.judged,
            seeds=len(traj.seeds), sim_seeds=int(sim_count[i]), theory_seeds=int(theory_count[i]),
            paired_seeds=paired_seeds, sim_mean=sim_stats[0], sim_low=sim_stats[2], sim_high=sim_stats[3],
            theory_mean=theory_stats[0], theory_low=theory_stats[2], theory_high=theory_stats[3],
            diff_mean=item.mean, diff_sem=item.sem, band=item.half_width, margin=item.delta, reach=item.reach,
            worst_ratio=item.worst_ratio, seeds_needed=item.seeds_needed,
        ))
    verdict, needed = combine_verdicts(items)
    warning = _sampling_warning(t, sim_found if has_sim.any() else None, theory_found if has_theory.any() else None,
                                options.settings)
    return PairedLandmarks(np.asarray(traj.seeds), names, sim, theory, rows, verdict, needed, scalar, options,
                           warning)


SPARSE_PREFIX = "evaluation times too sparse: "


def _sampling_warning(
    t: np.ndarray, sim: Landmarks | None, theory: Landmarks | None, settings: LandmarkSettings
) -> str | None:
    """One line naming what the evaluation times cannot resolve, on either side (None: nothing)."""
    parts = []
    for side, found in (("simulation", sim), ("theory", theory)):
        message = sampling_warning(t, found, settings) if found is not None else None
        if message:
            parts.append(f"{side}: {message.removeprefix(SPARSE_PREFIX)}")
    return "evaluation times too sparse for the landmarks: " + "; ".join(parts) if parts else None


# ------------------------------------------------------------------ stored runs, runs.parquet


def landmark_record(paired: PairedLandmarks | None) -> dict[str, Any] | None:
    """The landmarks section of judgement.json (strict JSON: non-finite numbers are None)."""
    return None if paired is None else strict_json_value(paired.to_dict())


def is_current(record: Mapping[str, Any] | None, options: LandmarkOptions) -> bool:
    """Whether a stored judgement.json was measured with these landmark options (else: measure again)."""
    stored = (record or {}).get("landmarks") or {}
    return stored.get("options") == json.loads(json.dumps(options.to_dict()))


def index_columns(paired: PairedLandmarks | None) -> dict[str, Any]:
    """The run's landmark columns in runs.parquet: the landmark verdict, each landmark's means and verdict."""
    if paired is None:
        return {}
    columns: dict[str, Any] = {"verdict.landmarks": paired.verdict}
    for row in paired.rows:
        columns[f"{row.landmark}.sim_mean"] = float(row.sim_mean)
        columns[f"{row.landmark}.theory_mean"] = float(row.theory_mean)
        columns[f"{row.landmark}.verdict"] = row.verdict
    return columns

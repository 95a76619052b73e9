"""The verdict: does the theory agree with the simulation within a stated margin?

Every verdict the tool shows (terminal, metrics.parquet, runs.parquet, report page, figures,
sweeps, ``harness scale``) comes from this module. There are three outcomes:

* ``agree``: the theory is *shown* to be within the margin of the simulation at every time;
* ``disagree``: it is *shown* to differ by more than the margin at some time;
* ``inconclusive``: neither is shown. The verdict then says roughly how many seeds would
  settle it, estimated from the measured spread.

A fourth label, ``n/a``, means there was nothing to judge (no simulation, no theory, or an
observable the theory does not predict).

"No significant difference" is *not* evidence of agreement: with few or scattered seeds the
error bars are wide and any theory would pass a significance test. Agreement is therefore an
equivalence test: the burden of proof is on "agree".

The statistics
--------------
For seed s = 1..S, evaluation time t and observable o, the paired difference is
d_s(t, o) = theory_s(t, o) - sim_s(t, o) (the theory started from seed s's own initial
conditions; an unpaired theory is one curve, the same for every seed). With n(t, o) finite
seeds, m = mean_s d_s and se = std_s(d_s) / sqrt(n) (ddof = 1).

Margin. The user states how close is close enough, ``agreement.margin`` (default 0.05):

    error curves (test_error, overlap_error):   delta(t) = max( margin * |simmean(t)|,  floor * max_t |simmean| )
    order parameters (groups Q, R, T, v):        delta    = margin * max_{t, o in group} |simmean(t, o)|

Error curves span decades and are read on logarithmic axes, so their margin is relative at
each time; ``agreement.floor`` (default 0.001) keeps it from vanishing where an error decays
towards zero. Order parameters are read on linear axes and often start near zero (R from a
small initialisation, off-diagonal Q), where a margin relative to the current value would ask
for the impossible; their margin is a fraction of the largest magnitude their group reaches.
The sizes come from the simulation, so a wrong theory cannot widen its own margin.

Simultaneous band. m(t, o) +- c * se(t, o) covers the true mean difference at *every* judged
cell (t, o) at once with probability >= 1 - alpha (``agreement.alpha``, default 0.05). The
cells are the (time, observable) pairs with se > 0, over all observables of the run (one
family, so the run's verdict, not only each group's, is controlled at alpha). Two ways to
find c:

* with S >= :data:`BOOTSTRAP_MIN_SEEDS` seeds, the bootstrap distribution of the studentised
  maximum, T* = max_{t,o} |m* - m| / se* over B = :data:`BOOTSTRAP_RESAMPLES` resamples of
  the seeds with replacement (bootstrap-t, Efron & Tibshirani 1993, An Introduction to the
  Bootstrap, ch. 12; the max-|t| form for simultaneous inference: Westfall & Young 1993,
  Resampling-Based Multiple Testing). c is its 1 - alpha quantile. The times of a learning
  curve are strongly correlated, so this c is far below a Bonferroni bound. The resampling
  uses a fixed random stream, so a verdict is reproducible;
* with fewer seeds the bootstrap has too few distinct resamples to be trusted, and c is the
  Sidak bound with Student's t: c = F_t^{-1}(1 - (1 - (1 - alpha)^(1/J)) / 2; n - 1) for J
  cells (Sidak 1967, J. Am. Stat. Assoc. 62, 626). It ignores the correlation and is
  conservative, which with 2-8 seeds is the honest answer: such runs are mostly inconclusive.

In both cases c is at least the pointwise Student-t quantile F_t^{-1}(1 - alpha/2; n - 1),
n the smallest number of finite seeds of a judged cell.

Outcomes of a group (two one-sided tests, Schuirmann 1987, J. Pharmacokinet. Biopharm. 15,
657, in their interval-inclusion form):

    agree         |m| + c se <= delta   at every cell of the group
    disagree      |m| - c se >  delta   at some cell (the band lies wholly outside +-delta)
    inconclusive  otherwise

The run agrees when every judged group agrees, disagrees when some group disagrees, and is
inconclusive otherwise. Because the band covers all cells jointly, a correct theory is
called ``disagree`` with probability at most alpha, and a theory off by more than the margin
at some time is called ``agree`` with probability at most alpha (in fact at most alpha at the
single worst time: the intersection-union argument of Berger 1982, Technometrics 24, 295,
so "agree" is conservative here). Both rates are checked by simulation in
tests/test_judgement_calibration.py and documented in docs/judgement.md.

Separately, a difference is *detectable* where the band excludes zero (|m| > c se): a small
finite-size offset well inside the margin is information, not a failure.

Scalars (landmarks). The same rule judges quantities that are one number per seed, such as the
plateau's exit time (harness.results.paired_landmarks): d_s(l) = theory_s(l) - sim_s(l) over
the seeds where both sides have quantity l, one cell per quantity (E = 1), the band factor c
over the judged quantities as above (below the bootstrap's seeds each quantity's Sidak factor
uses its own seeds: the counts differ from quantity to quantity), and a margin relative to each quantity's own simulated
size, delta_l = margin * |mean_s sim_s(l)| (mean over the same seeds). The quantities' outcomes
combine into one as the groups' do (:func:`combine_verdicts`).

Seeds needed. The band's half-width shrinks like 1/sqrt(S). Agreement needs, at every cell,
c' se sqrt(S/S') <= delta - |m|, i.e. S' >= S (c' se / (delta - |m|))^2 (impossible where
|m| >= delta); disagreement needs one cell with S' >= S (c' se / (|m| - delta))^2. c' is the
band factor at S' seeds, found by iterating with the t quantile at the same tail probability
as c. |m| is taken as max(|m| - se, 0), since noise alone inflates it; the estimate is rough
and is reported as "about".
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any, NamedTuple

import numpy as np
from scipy import special

from harness.core import keys as k
from harness.core.keys import Key
from harness.core.scenario import declare_keys
from harness.core.trajectories import observable_group

AGREE, DISAGREE, INCONCLUSIVE, NOT_JUDGED = "agree", "disagree", "inconclusive", "n/a"
OUTCOMES: tuple[str, ...] = (AGREE, DISAGREE, INCONCLUSIVE)
EXIT_STATUS: dict[str, int] = {AGREE: 0, DISAGREE: 1, INCONCLUSIVE: 3, NOT_JUDGED: 0}
"""Exit status of a command that prints a verdict (2 is bad input, shared by every command)."""

BOOTSTRAP_MIN_SEEDS = 12
"""From this many seeds the band factor comes from the bootstrap; below it, from the Sidak bound."""
BOOTSTRAP_RESAMPLES = 2000
BOOTSTRAP_STREAM = 20_170_501
"""Seed of the bootstrap's random stream: a fixed stream makes verdicts reproducible."""
MAX_SEEDS_FORECAST = 1_000_000


KEYS: dict[str, Key] = {
    "margin": Key("float", 0.05, "how close is close enough: fraction of an error's value at each time, "
                  "and of an order-parameter group's largest size", k.positive_finite),
    "floor": Key("float", 0.001, "an error curve's margin never falls below this fraction of its largest value",
                 k.non_negative_finite),
    "alpha": Key("float", 0.05, "error rate of the verdict, joint over every time and observable",
                 k.open_half_interval),
}
"""The [agreement] table: how a run is judged (not part of its run_id, harness.core.scenario)."""
declare_keys("agreement", KEYS)


@dataclass(frozen=True)
class Margin:
    """How close is close enough (the scenario's ``[agreement]`` table)."""

    margin: float = 0.05  # fraction of the observable group's size at each time
    floor: float = 0.001  # an error curve's margin never falls below this fraction of its largest value
    alpha: float = 0.05  # error rate of the verdict, joint over all times and observables

    @classmethod
    def from_scenario(cls, scenario: dict) -> Margin:
        section = scenario.get("agreement", {})
        return cls(**{name: float(section[name]) for name in ("margin", "floor", "alpha") if name in section})

    def describe(self) -> str:
        return (
            f"margin {self.margin:.3g} x each error's value at each time (at least {self.floor:.3g} x its largest) "
            f"and {self.margin:.3g} x each order-parameter group's largest size; simultaneous "
            f"{100 * (1 - self.alpha):.3g} % band"
        )


class Band(NamedTuple):
    """The simultaneous band's factor c (half-width = c * se) and how it was found."""

    factor: float
    method: str  # "bootstrap" or "sidak"
    seeds: int  # smallest number of finite seeds over the judged cells
    cells: int  # judged cells (time, observable) with se > 0
    alpha: float


class GroupVerdict(NamedTuple):
    group: str
    verdict: str
    reach: float  # max over cells of (|m| + c se) / delta: <= 1 means agreement is shown
    inner: float  # max over cells of (|m| - c se) / delta: > 1 means disagreement is shown
    worst_ratio: float  # max over cells of |m| / delta: above 1 the measured difference exceeds the margin
    worst_t: float  # time of that largest |m| / delta
    max_rel_diff: float  # max over cells of |m| / (delta / margin): the largest difference, relative to the size
    detected_t: float  # first time the band excludes zero (NaN: no difference detectable)
    departs_t: float  # first time the band lies wholly outside the margin (NaN: never)
    seeds_needed: float  # inconclusive only: about how many seeds would settle it (inf: none would)


class Judgement(NamedTuple):
    """Everything a verdict rests on: per cell, per observable, per group and for the run."""

    verdict: str
    seeds_needed: float
    band: Band
    margin: Margin
    observables: list[str]
    t: np.ndarray  # [E]
    mean: np.ndarray  # [E, O] paired mean difference theory - simulation
    sem: np.ndarray  # [E, O]
    delta: np.ndarray  # [E, O] the margin
    half_width: np.ndarray  # [E, O] c * se (NaN where not judged)
    judged: np.ndarray  # [O] bool: the observable takes part
    groups: list[GroupVerdict]

    def group(self, name: str) -> GroupVerdict | None:
        return next((g for g in self.groups if g.group == name), None)

    def observable_verdicts(self) -> list[str]:
        """The outcome of each observable judged on its own cells (same band, same rule)."""
        return [
            _outcome(self.mean[:, o], self.half_width[:, o], self.delta[:, o]) if self.judged[o] else NOT_JUDGED
            for o in range(len(self.observables))
        ]

    def to_dict(self) -> dict:
        """The verdict, its settings and band, and every group's outcome (judgement.json)."""
        return {
            "verdict": self.verdict,
            "seeds_needed": self.seeds_needed,
            "margin": self.margin.margin,
            "floor": self.margin.floor,
            "alpha": self.margin.alpha,
            "band_factor": self.band.factor,
            "band_method": self.band.method,
            "band_seeds": self.band.seeds,
            "band_cells": self.band.cells,
            "groups": [g._asdict() for g in self.groups],
        }


# --------------------------------------------------------------------------- statistics


def mean_sem(values: np.ndarray, axis: int = 0) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """NaN-aware mean, standard error of the mean (ddof = 1) and count along ``axis``."""
    finite = np.isfinite(values)
    n = finite.sum(axis=axis)
    filled = np.where(finite, values, 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(n > 0, filled.sum(axis=axis) / np.maximum(n, 1), np.nan)
        deviations = np.where(finite, values - np.expand_dims(mean, axis), 0.0)
        var = (deviations**2).sum(axis=axis) / (n - 1)
        sem = np.where(n >= 2, np.sqrt(var / np.maximum(n, 1)), np.nan)
    return mean, sem, n


ERROR_GROUPS: frozenset[str] = frozenset({"test_error", "overlap_error"})
"""Groups judged relative to their value at each time; every other group relative to its largest size."""


def group_margins(sim_mean: np.ndarray, observables: list[str], margin: Margin) -> np.ndarray:
    """delta [E, O], the agreement margin of every cell (module docstring)."""
    delta = np.full(sim_mean.shape, np.nan)
    names = [observable_group(o) for o in observables]
    for group in dict.fromkeys(names):
        columns = [i for i, name in enumerate(names) if name == group]
        size = np.abs(sim_mean[:, columns])
        if not _any_finite(size):
            continue
        peak = float(np.nanmax(size))
        if group in ERROR_GROUPS:
            delta[:, columns] = np.maximum(margin.margin * size, margin.floor * peak)
        else:
            delta[:, columns] = margin.margin * peak
    return delta


def _any_finite(values: np.ndarray) -> bool:
    return bool(np.any(np.isfinite(values)))


def _t_upper_quantile(tail: float, dof: float) -> float:
    """x with P(T > x) = tail for Student's t with ``dof`` degrees of freedom."""
    return float(-special.stdtrit(dof, tail))


def _t_tail(x: float, dof: float) -> float:
    """P(T > x) for Student's t with ``dof`` degrees of freedom."""
    return float(special.stdtr(dof, -x))


def _sidak_factor(alpha: float, cells: int, seeds: int) -> float:
    per_cell = -np.expm1(np.log1p(-alpha) / max(cells, 1))  # 1 - (1 - alpha)^(1/J), without cancellation
    return _t_upper_quantile(per_cell / 2.0, seeds - 1)


def _pointwise_factor(alpha: float, seeds: int) -> float:
    return _t_upper_quantile(alpha / 2.0, seeds - 1)


def _bootstrap_factor(diff: np.ndarray, cells: np.ndarray, alpha: float) -> float:
    """1 - alpha quantile of max over ``cells`` of |m* - m| / se* over seed resamples.

    Each resample is a vector of counts w (how often each seed is drawn), so the resampled
    sums are matrix products: n* = w @ finite, m* = (w @ d) / n*, and
    se*^2 = (w @ d^2 - n* m*^2) / ((n* - 1) n*).
    """
    s = diff.shape[0]
    flat = diff[:, cells]  # [S, J]
    finite = np.isfinite(flat)
    values = np.where(finite, flat, 0.0)
    mean, _, _ = mean_sem(flat)
    rng = np.random.default_rng(BOOTSTRAP_STREAM)
    maxima = []
    chunk = max(1, min(BOOTSTRAP_RESAMPLES, 4_000_000 // max(flat.shape[1], 1)))  # a few large products
    for start in range(0, BOOTSTRAP_RESAMPLES, chunk):
        size = min(chunk, BOOTSTRAP_RESAMPLES - start)
        counts = rng.multinomial(s, np.full(s, 1.0 / s), size=size).astype(np.float64)  # [B, S]
        n = counts @ finite
        total = counts @ values
        square = counts @ values**2
        with np.errstate(invalid="ignore", divide="ignore"):
            m = total / n
            var = (square - n * m**2) / (n - 1)
            se = np.sqrt(np.maximum(var, 0.0) / n)
            ratio = np.abs(m - mean) / se
        ratio = np.where(np.isfinite(ratio) & (n >= 2), ratio, 0.0)  # a resample with one distinct seed
        maxima.append(ratio.max(axis=1))
    return float(np.quantile(np.concatenate(maxima), 1.0 - alpha))


def band_factor(diff: np.ndarray, sem: np.ndarray, n: np.ndarray, judged: np.ndarray, alpha: float) -> Band:
    """The simultaneous band's factor c for differences ``diff`` [S, E, O] (module docstring)."""
    cells = judged[None, :] & np.isfinite(sem) & (sem > 0) & (n >= 2)
    count = int(cells.sum())
    if count == 0:
        seeds = int(n[judged[None, :] & (n >= 1)].min()) if np.any(judged[None, :] & (n >= 1)) else 0
        return Band(0.0 if seeds >= 2 else math.nan, "exact", seeds, 0, alpha)
    seeds = int(n[cells].min())
    floor = _pointwise_factor(alpha, seeds)
    if seeds >= BOOTSTRAP_MIN_SEEDS:
        return Band(max(_bootstrap_factor(diff, cells, alpha), floor), "bootstrap", seeds, count, alpha)
    return Band(max(_sidak_factor(alpha, count, seeds), floor), "sidak", seeds, count, alpha)


def _outcome(mean: np.ndarray, half_width: np.ndarray, delta: np.ndarray) -> str:
    """agree / disagree / inconclusive for a set of cells (NaN half-width: not judged there)."""
    known = np.isfinite(mean)
    if not np.any(known):
        return NOT_JUDGED
    with np.errstate(invalid="ignore"):
        outside = np.abs(mean) - half_width > delta
        inside = np.abs(mean) + half_width <= delta
    if np.any(outside & known):
        return DISAGREE
    if np.all(inside[known]) and np.all(np.isfinite(half_width[known])):
        return AGREE
    return INCONCLUSIVE


def _band_factor_at(band: Band, seeds: float) -> float:
    """c at ``seeds`` seeds: the same normal-scale tail as c now, with seeds - 1 degrees of freedom."""
    if band.seeds < 2 or not math.isfinite(band.factor):
        return band.factor
    return _t_upper_quantile(_t_tail(band.factor, band.seeds - 1), max(seeds, 2.0) - 1)


def _seeds_for(gap: np.ndarray, sem: np.ndarray, band: Band, seeds: int, worst: bool) -> float:
    """Seeds at which c' se sqrt(S / S') fits in ``gap`` (at every cell if ``worst``, else at one)."""
    ok = np.isfinite(gap) & np.isfinite(sem) & (gap > 0)
    if not np.any(ok):
        return math.inf
    need = float(seeds)
    for _ in range(30):
        factor = _band_factor_at(band, need)
        per_cell = seeds * (factor * sem[ok] / gap[ok]) ** 2
        new = float(np.max(per_cell) if worst else np.min(per_cell))
        new = max(math.ceil(new), seeds + 1)
        if new > MAX_SEEDS_FORECAST:
            return math.inf
        if new == need:
            break
        need = new
    return float(need)


def _seeds_needed(mean: np.ndarray, sem: np.ndarray, delta: np.ndarray, band: Band, seeds: int) -> float:
    """About how many seeds would settle an inconclusive set of cells (inf: none would).

    The measured |m| is taken less one standard error: noise alone makes |m| about 0.8 se
    where the true difference is zero, and the largest of many such cells would otherwise
    set the forecast.
    """
    known = np.isfinite(mean) & np.isfinite(sem)
    mean, sem, delta = mean[known], sem[known], delta[known]
    if mean.size == 0:
        return math.inf
    plausible = np.maximum(np.abs(mean) - sem, 0.0)
    beyond = plausible > delta
    if np.any(beyond):  # the difference exceeds the margin somewhere: disagreement can be shown
        return _seeds_for(plausible[beyond] - delta[beyond], sem[beyond], band, seeds, worst=False)
    return _seeds_for(delta - plausible, sem, band, seeds, worst=True)


def _first_time(t: np.ndarray, mask: np.ndarray) -> float:
    hits = np.flatnonzero(mask)
    return float(t[hits[0]]) if hits.size else math.nan


def judge_differences(
    t: np.ndarray, diff: np.ndarray, sim_mean: np.ndarray, observables: list[str], margin: Margin
) -> Judgement:
    """Judge paired differences ``diff`` [S, E, O] (theory - simulation) against the margin.

    ``sim_mean`` [E, O] is the simulation's mean curve, the reference for each group's size.
    An observable takes part when both sides have finite values somewhere.
    """
    mean, sem, n = mean_sem(diff)
    delta = group_margins(sim_mean, observables, margin)
    judged = np.any(np.isfinite(mean), axis=0) & np.any(np.isfinite(delta), axis=0)
    band = band_factor(diff, sem, n, judged, margin.alpha)
    with np.errstate(invalid="ignore"):
        half_width = np.where(judged[None, :] & (n >= 2), band.factor * np.where(sem > 0, sem, 0.0), np.nan)
    mean = np.where(judged[None, :], mean, np.nan)
    names = [observable_group(o) for o in observables]
    groups = []
    for group in dict.fromkeys(names):
        columns = [i for i, name in enumerate(names) if name == group and judged[i]]
        if not columns:
            groups.append(GroupVerdict(group, NOT_JUDGED, *([math.nan] * 8)))
            continue
        m, h, d, s = (a[:, columns] for a in (mean, half_width, delta, sem))
        verdict = _outcome(m, h, d)
        with np.errstate(invalid="ignore", divide="ignore"):
            reach = (np.abs(m) + h) / d
            inner = (np.abs(m) - h) / d
            relative = np.abs(m) / (d / margin.margin)
            detected = np.any(np.abs(m) > h, axis=1)
            departs = np.any(inner > 1, axis=1)
        by_time = np.nanmax(np.where(np.isfinite(m), np.abs(m) / d, -np.inf), axis=1)
        needed = _seeds_needed(m, s, d, band, band.seeds) if verdict == INCONCLUSIVE else math.nan
        groups.append(
            GroupVerdict(
                group=group,
                verdict=verdict,
                reach=_nanmax(reach),
                inner=_nanmax(inner),
                worst_ratio=float(np.max(by_time)),
                worst_t=float(t[int(np.argmax(by_time))]),
                max_rel_diff=_nanmax(relative),
                detected_t=_first_time(t, detected),
                departs_t=_first_time(t, departs),
                seeds_needed=needed,
            )
        )
    verdict, needed = _run_outcome(groups)
    return Judgement(verdict, needed, band, margin, list(observables), np.asarray(t), mean, sem, delta,
                     half_width, judged, groups)


def _nanmax(values: np.ndarray) -> float:
    values = values[np.isfinite(values)]
    return float(values.max()) if values.size else math.nan


def _run_outcome(groups: list[GroupVerdict]) -> tuple[str, float]:
    """The run's outcome from its groups', and the seeds that would settle an inconclusive run."""
    return combine_verdicts(groups)


def combine_verdicts(items: Sequence[Any]) -> tuple[str, float]:
    """One outcome from several (groups, landmarks), and the seeds that would settle it if inconclusive.

    Each item has ``verdict``, ``worst_ratio`` (|m| / delta at its worst) and ``seeds_needed``.
    Agree when every judged item agrees, disagree when one disagrees, inconclusive otherwise.
    """
    judged = [g for g in items if g.verdict != NOT_JUDGED]
    if not judged:
        return NOT_JUDGED, math.nan
    if any(g.verdict == DISAGREE for g in judged):
        return DISAGREE, math.nan
    if all(g.verdict == AGREE for g in judged):
        return AGREE, math.nan
    open_items = [g for g in judged if g.verdict == INCONCLUSIVE]
    # One item shown to disagree settles it; agreement needs every open item to agree.
    leaning = [g.seeds_needed for g in open_items if g.worst_ratio > 1.0]
    if leaning:
        return INCONCLUSIVE, float(min(leaning))
    return INCONCLUSIVE, float(max(g.seeds_needed for g in open_items))


class ScalarVerdict(NamedTuple):
    """The verdict on one scalar quantity per seed (a landmark), module docstring "Scalars"."""

    name: str
    verdict: str
    mean: float  # mean paired difference theory - simulation
    sem: float
    seeds: int  # seeds with a finite difference
    delta: float  # the margin: margin x |the simulation's mean|
    half_width: float  # c * sem (NaN: not judged)
    reach: float  # (|m| + c se) / delta: <= 1 means agreement is shown
    inner: float  # (|m| - c se) / delta: > 1 means disagreement is shown
    worst_ratio: float  # |m| / delta
    seeds_needed: float  # inconclusive only: about how many seeds would settle it (inf: none would)


class ScalarJudgement(NamedTuple):
    verdict: str
    seeds_needed: float
    band: Band
    margin: Margin
    items: list[ScalarVerdict]


def judge_scalars(
    diff: np.ndarray, size: np.ndarray, names: Sequence[str], margin: Margin, floor: np.ndarray | None = None
) -> ScalarJudgement:
    """Judge per-seed paired differences ``diff`` [S, L] of L scalar quantities (module docstring).

    ``size`` [L] is each quantity's simulated size (the mean over the seeds with a finite
    difference); NaN in ``diff`` marks a seed where either side lacks the quantity. A quantity
    is judged when at least two seeds have it and its size is finite and not zero. ``floor``
    [L] (default 0) is an absolute lower bound of each margin, delta = max(margin |size|, floor):
    an error-valued quantity takes the floor its error curve has, so that an error that has
    decayed to rounding level is not held to 5 % of that level.
    """
    diff = np.asarray(diff, np.float64)
    size = np.asarray(size, np.float64)
    mean, sem, n = mean_sem(diff)
    delta = margin.margin * np.abs(size)
    if floor is not None:
        delta = np.maximum(delta, np.asarray(floor, np.float64))
    judged = (n >= 2) & np.isfinite(mean) & np.isfinite(delta) & (delta > 0)
    band = band_factor(diff[:, None, :], sem[None, :], n[None, :], judged, margin.alpha)
    # Below the bootstrap's seeds each quantity's Sidak factor takes its own degrees of freedom:
    # the quantities' seeds differ (a decay rate measured in 4 seeds, an exit time in 60), and the
    # Sidak inequality holds cell by cell, so one quantity's few seeds need not widen every band.
    bands = [band._replace(factor=max(_sidak_factor(margin.alpha, band.cells, int(n[i])),
                                      _pointwise_factor(margin.alpha, int(n[i]))), seeds=int(n[i]))
             if band.method == "sidak" and judged[i] else band for i in range(len(names))]
    half_width = np.where(judged, np.array([b.factor for b in bands]) * np.where(sem > 0, sem, 0.0), np.nan)
    items = []
    for i, name in enumerate(names):
        if not judged[i]:
            items.append(ScalarVerdict(name, NOT_JUDGED, float(mean[i]), float(sem[i]), int(n[i]), float(delta[i]),
                                       *([math.nan] * 5)))
            continue
        verdict = _outcome(mean[i : i + 1], half_width[i : i + 1], delta[i : i + 1])
        # each quantity's own seeds (they differ from landmark to landmark), not the band's fewest
        needed = _seeds_needed(mean[i : i + 1], sem[i : i + 1], delta[i : i + 1], bands[i], int(n[i])) \
            if verdict == INCONCLUSIVE else math.nan
        items.append(ScalarVerdict(
            name, verdict, float(mean[i]), float(sem[i]), int(n[i]), float(delta[i]), float(half_width[i]),
            float((abs(mean[i]) + half_width[i]) / delta[i]), float((abs(mean[i]) - half_width[i]) / delta[i]),
            float(abs(mean[i]) / delta[i]), needed,
        ))
    verdict, needed = combine_verdicts(items)
    return ScalarJudgement(verdict, needed, band, margin, items)


def pointwise_interval(values: np.ndarray, alpha: float) -> tuple[float, float, float, float, int]:
    """(mean, sem, low, high, n) of the finite ``values`` [S]: the pointwise 1 - alpha Student-t interval.

    For showing one side's spread (a figure's error bar); verdicts use the simultaneous band.
    """
    mean, sem, n = mean_sem(np.asarray(values, np.float64))
    half = _pointwise_factor(alpha, int(n)) * float(sem) if n >= 2 else math.nan
    return float(mean), float(sem), float(mean) - half, float(mean) + half, int(n)


def judge(traj, margin: Margin) -> Judgement:
    """Judge a run's :class:`~harness.core.trajectories.Trajectories` (paired or a mean-curve theory)."""
    sim_mean, _, _ = mean_sem(traj.sim)
    if traj.paired:
        diff = traj.theory - traj.sim
    else:
        theory_mean, _, _ = mean_sem(traj.theory)
        diff = theory_mean[None] - traj.sim
    return judge_differences(np.asarray(traj.t), diff, sim_mean, list(traj.observables), margin)


# ------------------------------------------------------------------ relative gap per seed


class RelativeGap(NamedTuple):
    """A gap's size relative to its reference, seed by seed (for instance-to-instance disorder)."""

    mean: float  # mean over seeds of rho_s = sum_t d_s(t) / sum_t |ref_s(t)|
    low: float  # 1 - alpha interval (Student's t over seeds)
    high: float
    same_sign: int  # seeds whose rho_s has the sign of the mean
    seeds: int


def relative_gap(diff: np.ndarray, reference: np.ndarray, alpha: float) -> RelativeGap:
    """Per-seed relative size of a gap ``diff`` [S, E] against ``reference`` [S, E].

    Where each seed has its own instance (features, teacher) a gap of one sign can vary in
    size from seed to seed, which inflates its standard error; rho_s, the seed's gap
    integrated over the evaluation times relative to its own reference, is far steadier.
    Seeds with a non-finite value anywhere are left out.
    """
    keep = np.all(np.isfinite(diff), axis=1) & np.all(np.isfinite(reference), axis=1)
    diff, reference = diff[keep], reference[keep]
    with np.errstate(invalid="ignore", divide="ignore"):
        rho = diff.sum(axis=1) / np.abs(reference).sum(axis=1)
    rho = rho[np.isfinite(rho)]
    s = len(rho)
    if s < 2:
        return RelativeGap(float(rho[0]) if s else math.nan, math.nan, math.nan, s, s)
    mean = float(rho.mean())
    half = _pointwise_factor(alpha, s) * float(rho.std(ddof=1)) / math.sqrt(s)
    same = int(np.sum(np.sign(rho) == np.sign(mean))) if mean != 0 else 0
    return RelativeGap(mean, mean - half, mean + half, same, s)

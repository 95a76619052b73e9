"""A landmark across input sizes: does the theory's landmark follow the simulation's as N grows?

``harness scale SCENARIO --sizes 250,500,1000 --observable landmark:plateau_exit`` runs the
scenario at each size (ordinary stored runs, as for a gap) and reads each run's landmarks
(landmarks.parquet, harness.results.paired_landmarks). For a landmark the question is not
whether a gap vanishes but how the landmark grows: from a small initialisation the plateau is
left when an asymmetry of order N^-1/2 has grown by a factor N^1/2, so the escape time grows
like a + b ln N, in the simulation and in the theory started from the same initial conditions.

What is judged
--------------
For seed s and size N_i, d_s(N_i) = x_s^theory(N_i) - x_s^sim(N_i) (the seed's landmark in the
theory minus in the simulation; seed s sees the same random keys at every size). Two kinds of
item are judged together, as one family, by harness.results.judgement's rule for scalars
(``judge_scalars``: one simultaneous 1 - alpha band over all items, outcome per item by the
interval-inclusion rule):

* the landmark at each size: d_s(N_i), margin ``agreement.margin`` x |mean x^sim(N_i)|, exactly
  as a run judges its landmarks;
* its growth: the per-seed least-squares slope beta_s of d_s(N) against ln N (seeds with the
  landmark at every size), the difference of the two growth rates b_theory - b_sim per e-fold
  of N. Its margin is the slope that would move the landmark by the margin across the sizes,
  ``agreement.margin`` x |mean x^sim(N_max)| / ln(N_max / N_min), so that a landmark that does not
  grow (b = 0, a plateau height) is judged on the same footing as one that does. Taking the
  slope seed by seed keeps the correlation between sizes that common random numbers create.

A size where the landmark is shown to be present on one side only (harness.results.paired_landmarks,
"Presence") is an inconclusive item. The outcomes, those of harness.results.judgement said of
the law of growth:

* ``consistent`` (agree): at every size and for the growth rate, the band lies inside the margin;
* ``inconsistent`` (disagree): at some size, or for the growth rate, it lies wholly outside;
* ``inconclusive``: otherwise, with about how many seeds at every size would settle it.

The growth laws (reported, not judged)
--------------------------------------
Each side's mean landmark m(N_i), with its standard error, is fitted by weighted least squares
with two laws: a + b ln N (closed form, covariance (X^T W X)^-1 with W = 1/se^2) and a N^-b + c
(scipy's curve_fit, b in [b_min, 3] with b_min = ``--min-exponent``, as for the gap; errors of a
and b are left undetermined when b sits at a bound), each with chi^2 and its degrees of
freedom. A landmark that grows without bound is described by the first and not the second (c,
the limit the second implies, runs away); one that settles is described by the second. The
standard errors of different sizes are treated as independent here, which common random
numbers make approximately true at best: the fits describe, the verdict above (seed by seed)
judges. With three sizes the power law has no degree of freedom left.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any, NamedTuple

import numpy as np
import pandas as pd

from harness.core.errors import InputError
from harness.results.judgement import (
    AGREE,
    DISAGREE,
    INCONCLUSIVE,
    NOT_JUDGED,
    Margin,
    ScalarVerdict,
    combine_verdicts,
    judge_scalars,
    pointwise_interval,
)
from harness.results.landmarks import LANDMARKS
from harness.results.paired_landmarks import SIMULATION_ONLY, THEORY_ONLY, presence
from harness.results.store import LANDMARKS_NAME

LANDMARK_PREFIX = "landmark:"
"""``--observable landmark:NAME`` scales a landmark instead of a gap."""
GROWTH = "growth per e-fold of N"
"""The name of the growth item in the verdict."""
MIN_SEEDS = 3
OUTCOME_NAMES = {AGREE: "consistent", DISAGREE: "inconsistent", INCONCLUSIVE: "inconclusive",
                 NOT_JUDGED: "inconclusive"}
POWER_EXPONENT_MAX = 3.0


def landmark_name(observable: str) -> str | None:
    """``"landmark:plateau_exit"`` -> ``"plateau_exit"``; None for an observable that is not a landmark."""
    return observable.removeprefix(LANDMARK_PREFIX) if observable.startswith(LANDMARK_PREFIX) else None


def check_observable(observable: str) -> None:
    """InputError naming --observable unless it is ``landmark:`` and a landmark's name."""
    name = landmark_name(observable)
    if name not in LANDMARKS:
        allowed = ", ".join(LANDMARK_PREFIX + n for n in LANDMARKS)
        raise InputError(f"--observable: a landmark must be one of {allowed}; got {observable!r}")


# --------------------------------------------------------------------------- the laws


class LawFit(NamedTuple):
    law: str  # "a + b ln N" or "a N^-b + c"
    params: dict[str, float]
    errors: dict[str, float]  # one-sigma errors (NaN: undetermined)
    chi2: float
    dof: int


def fit_log_law(sizes: Sequence[float], values: Sequence[float], errors: Sequence[float]) -> LawFit:
    """a + b ln N by weighted least squares (module docstring), errors from (X^T W X)^-1."""
    x = np.log(np.asarray(sizes, np.float64))
    y = np.asarray(values, np.float64)
    w = 1.0 / np.asarray(errors, np.float64) ** 2
    design = np.stack([np.ones_like(x), x], axis=1)
    normal = design.T @ (w[:, None] * design)
    covariance = np.linalg.inv(normal)
    a, b = covariance @ (design.T @ (w * y))
    chi2 = float(np.sum(w * (y - a - b * x) ** 2))
    return LawFit("a + b ln N", {"a": float(a), "b": float(b)},
                  {"a": float(math.sqrt(covariance[0, 0])), "b": float(math.sqrt(covariance[1, 1]))},
                  chi2, len(x) - 2)


def fit_power_law(
    sizes: Sequence[float], values: Sequence[float], errors: Sequence[float], min_exponent: float
) -> LawFit:
    """a N^-b + c by curve_fit with b in [min_exponent, 3] (NaN parameters if it does not converge)."""
    from scipy.optimize import curve_fit

    n = np.asarray(sizes, np.float64)
    y = np.asarray(values, np.float64)
    sigma = np.asarray(errors, np.float64)
    reference = float(np.exp(np.mean(np.log(n))))  # a (N / N_ref)^-b keeps the amplitude of order one
    low = max(min_exponent, 1e-3)

    def law(size: np.ndarray, amplitude: float, b: float, c: float) -> np.ndarray:
        return amplitude * (size / reference) ** (-b) + c

    nan = {"a": math.nan, "b": math.nan, "c": math.nan}
    b0 = min(max(1.0, low), POWER_EXPONENT_MAX)
    span = float(y[np.argmax(n)] - y[np.argmin(n)])
    try:
        params, covariance = curve_fit(
            law, n, y, p0=[-span, b0, float(y[np.argmax(n)]) + span], sigma=sigma, absolute_sigma=True,
            bounds=([-np.inf, low, -np.inf], [np.inf, POWER_EXPONENT_MAX, np.inf]), maxfev=20000,
        )
    except (RuntimeError, ValueError):
        return LawFit("a N^-b + c", nan, dict(nan), math.nan, len(n) - 3)
    amplitude, b, c = (float(p) for p in params)
    chi2 = float(np.sum(((law(n, *params) - y) / sigma) ** 2))
    with np.errstate(invalid="ignore"):
        spread = np.sqrt(np.diag(covariance)) if np.all(np.isfinite(covariance)) else np.full(3, np.nan)
    a = amplitude * reference**b
    if not low * (1 + 1e-6) < b < POWER_EXPONENT_MAX * (1 - 1e-6):  # a covariance is meaningless at a bound
        spread = np.array([np.nan, np.nan, spread[2]])
    # a = A N_ref^b: its error from A's alone (b's share is left out: the errors describe, not judge)
    return LawFit("a N^-b + c", {"a": a, "b": b, "c": c},
                  {"a": float(abs(spread[0]) * reference**b), "b": float(spread[1]), "c": float(spread[2])},
                  chi2, len(n) - 3)


# --------------------------------------------------------------------------- the verdict


class SizeLandmarks(NamedTuple):
    """One landmark of every seed at one size, read from the run's landmarks.parquet."""

    size: int
    seeds: np.ndarray  # [S]
    sim: np.ndarray  # [S] NaN: none
    theory: np.ndarray  # [S]
    has_sim: np.ndarray  # [S] bool: the seed has a simulation (not diverged)
    has_theory: np.ndarray


def read_size_landmarks(folder: Any, size: int, name: str) -> SizeLandmarks:
    """The landmark ``name`` of every seed of a stored run (InputError if the run has no landmarks)."""
    path = folder / LANDMARKS_NAME
    if not path.is_file():
        raise InputError(f"scale: the run at data.input_dim = {size} ({folder}) has no {LANDMARKS_NAME}")
    frame = pd.read_parquet(path)
    table = frame.pivot(index="seed", columns="landmark")
    seeds = table.index.to_numpy()
    # Every seed with a curve has a final error, so it says which seeds have a side at all.
    return SizeLandmarks(
        int(size), seeds, table[("sim", name)].to_numpy(float), table[("theory", name)].to_numpy(float),
        np.isfinite(table[("sim", "final_error")].to_numpy(float)),
        np.isfinite(table[("theory", "final_error")].to_numpy(float)),
    )


def per_seed_slopes(sizes: Sequence[float], values: np.ndarray) -> np.ndarray:
    """Least-squares slope of each row of ``values`` [S, n] against ln N (NaN where a size is missing)."""
    x = np.log(np.asarray(sizes, np.float64))
    dx = x - x.mean()
    complete = np.all(np.isfinite(values), axis=1)
    filled = np.where(np.isfinite(values), values, 0.0)
    slopes = (filled - filled.mean(axis=1, keepdims=True)) @ dx / float(dx @ dx)
    return np.where(complete, slopes, np.nan)


def _aligned(per_size: Sequence[SizeLandmarks]) -> tuple[np.ndarray, ...]:
    """[S, n] arrays of sim, theory, has_sim, has_theory over the seeds every size has."""
    seeds = per_size[0].seeds
    for entry in per_size[1:]:
        seeds = np.intersect1d(seeds, entry.seeds)
    picks = [np.searchsorted(entry.seeds, seeds) for entry in per_size]
    stack = lambda field: np.stack([getattr(e, field)[p] for e, p in zip(per_size, picks, strict=True)], 1)  # noqa: E731
    return seeds, stack("sim"), stack("theory"), stack("has_sim"), stack("has_theory")


def judge_growth(
    sizes: Sequence[int], sim: np.ndarray, theory: np.ndarray, has_sim: np.ndarray, has_theory: np.ndarray,
    margin: Margin,
) -> tuple[str, float, list[ScalarVerdict], list[str], Any]:
    """The landmark at every size and its growth, judged as one family (module docstring).

    ``sim``, ``theory`` [S, n] (seeds aligned across the n sizes), ``has_*`` [S, n] which seeds
    have a side at all. Returns (outcome, seeds needed, the items in size order and the growth
    last, the presence at each size, the band).
    """
    sizes = np.asarray(sizes, np.float64)
    presences = [presence(sim[:, i], theory[:, i], has_sim[:, i], has_theory[:, i], margin.alpha)
                 for i in range(len(sizes))]
    mismatched = [p in (THEORY_ONLY, SIMULATION_ONLY) for p in presences]
    diff = theory - sim
    columns = [i for i in range(len(sizes)) if not mismatched[i]]
    paired = np.isfinite(diff)
    size_of = [float(np.mean(sim[paired[:, i], i])) if paired[:, i].any() else math.nan for i in range(len(sizes))]
    slopes = per_seed_slopes(sizes, diff)
    largest = int(np.argmax(sizes))
    growth_size = size_of[largest] / math.log(sizes.max() / sizes.min())
    names = [f"N = {int(sizes[i])}" for i in columns] + [GROWTH]
    scalar = judge_scalars(np.column_stack([diff[:, columns], slopes]), np.array([size_of[i] for i in columns]
                                                                                + [growth_size]), names, margin)
    by_name = {item.name: item for item in scalar.items}
    items = []
    for i in range(len(sizes)):
        name = f"N = {int(sizes[i])}"
        items.append(by_name.get(name) or ScalarVerdict(name, INCONCLUSIVE, math.nan, math.nan,
                                                        int(paired[:, i].sum()), *([math.nan] * 5), math.inf))
    items.append(by_name[GROWTH])
    outcome, needed = combine_verdicts(items)
    return outcome, needed, items, presences, scalar.band


def landmark_scaling(
    runs: Sequence[Any], name: str, margin: Margin, min_exponent: float
) -> tuple[dict[str, Any], dict[str, Any]]:
    """The landmark's scaling over the stored runs (harness.studies.scaling.SizeRun): record and index columns."""
    sizes = [run.size for run in runs]
    per_size = [read_size_landmarks(run.folder, run.size, name) for run in runs]
    for entry in per_size:
        both = int(np.sum(np.isfinite(entry.sim) & np.isfinite(entry.theory)))
        if both < MIN_SEEDS:
            raise InputError(
                f"scale: at data.input_dim = {entry.size} the landmark {name} is found in both simulation and "
                f"theory in {both} seed(s); need at least {MIN_SEEDS} (a longer sgd.time, or other [landmarks] "
                "thresholds)"
            )
    seeds, sim, theory, has_sim, has_theory = _aligned(per_size)
    outcome, needed, items, presences, band = judge_growth(sizes, sim, theory, has_sim, has_theory, margin)
    sim_stats = [pointwise_interval(entry.sim, margin.alpha) for entry in per_size]
    theory_stats = [pointwise_interval(entry.theory, margin.alpha) for entry in per_size]
    fits = {}
    for side, stats in (("sim", sim_stats), ("theory", theory_stats)):
        means, errors = [s[0] for s in stats], [s[1] for s in stats]
        if all(math.isfinite(e) and e > 0 for e in errors):
            fits[side] = {law.law: law._asdict() for law in (fit_log_law(sizes, means, errors),
                                                             fit_power_law(sizes, means, errors, min_exponent))}
        else:
            fits[side] = {}
    verdict = OUTCOME_NAMES[outcome]
    reason, advice = _explain(name, verdict, needed, items, presences, seeds=len(seeds))
    growth = items[-1]
    record = {
        "kind": "landmark",
        "verdict": verdict,
        "reason": reason,
        "advice": advice,
        "observable": LANDMARK_PREFIX + name,
        "landmark": name,
        "sizes": sizes,
        "margin": margin.margin,
        "alpha": margin.alpha,
        "band_factor": band.factor,
        "band_method": band.method,
        "seeds_needed": needed,
        "seeds_used": int(len(seeds)),
        "sim_means": [s[0] for s in sim_stats],
        "sim_lows": [s[2] for s in sim_stats],
        "sim_highs": [s[3] for s in sim_stats],
        "sim_seeds": [s[4] for s in sim_stats],
        "theory_means": [s[0] for s in theory_stats],
        "theory_lows": [s[2] for s in theory_stats],
        "theory_highs": [s[3] for s in theory_stats],
        "theory_seeds": [s[4] for s in theory_stats],
        "presence": presences,
        "items": [item._asdict() for item in items],
        "growth": {"difference": growth.mean, "band": growth.half_width, "margin": growth.delta,
                   "verdict": growth.verdict, "seeds": growth.seeds},
        "fits": fits,
    }
    log_fits = {side: fits[side].get("a + b ln N", {}).get("params", {}) for side in ("sim", "theory")}
    columns = {
        "scale.growth_sim": log_fits["sim"].get("b", math.nan),
        "scale.growth_theory": log_fits["theory"].get("b", math.nan),
        "scale.growth_difference": growth.mean,
    }
    return record, columns


def _explain(
    name: str, verdict: str, needed: float, items: list[ScalarVerdict], presences: list[str], *, seeds: int
) -> tuple[str, list[str]]:
    """The verdict's reason and, when inconclusive, what would settle it."""
    sizes = [item for item in items if item.name != GROWTH]
    growth = items[-1]
    if verdict == "consistent":
        return (f"the theory's {name} lies within the margin of the simulation's at every size, and its growth "
                f"per e-fold of N within {growth.delta:.3g} of the simulation's (band {growth.half_width:.3g})", [])
    if verdict == "inconsistent":
        shown = [item.name for item in items if item.verdict == DISAGREE]
        what = ", ".join(f"at {n}" if n != GROWTH else "in its growth per e-fold of N" for n in shown)
        return f"the theory's {name} is shown to differ from the simulation's by more than the margin {what}", []
    open_items = [item.name for item in items if item.verdict in (INCONCLUSIVE, NOT_JUDGED)]
    one_sided = [f"{item.name} ({p})" for item, p in zip(sizes, presences, strict=True)
                 if p in (THEORY_ONLY, SIMULATION_ONLY)]
    reason = "neither agreement nor disagreement is shown " + ("for " + ", ".join(open_items) if open_items else "")
    if one_sided:
        reason += f"; found on one side only at {', '.join(one_sided)}"
    advice = []
    if math.isfinite(needed):
        advice.append(f"about {int(needed)} seeds at every size (now {seeds}) would settle it")
    else:
        advice.append("more seeds alone would not settle it (a landmark found on one side only: a longer sgd.time "
                      "or other [landmarks] thresholds)")
    return reason, advice


# --------------------------------------------------------------------------- the terminal


def _fmt(value: Any, digits: int = 3) -> str:
    return "-" if value is None or value != value else f"{value:.{digits}g}"


def format_landmark_verdict(verdict: dict[str, Any]) -> str:
    """The closing lines of ``harness scale --observable landmark:NAME``."""
    name = verdict["landmark"]
    lines = [f"{name} across sizes -> {verdict['scale_id']}",
             f"  {'N':>7}  {'simulation [95 %]':<26}{'theory [95 %]':<26}{'theory - sim. ± band':<22}"
             f"{'margin':<9}{'found in':<17}{'verdict':<14}run verdict"]
    run_verdicts = verdict.get("run_verdicts") or [""] * len(verdict["sizes"])
    for i, n in enumerate(verdict["sizes"]):
        item = verdict["items"][i]
        sim = f"{_fmt(verdict['sim_means'][i])} [{_fmt(verdict['sim_lows'][i])}, {_fmt(verdict['sim_highs'][i])}]"
        theory = (f"{_fmt(verdict['theory_means'][i])} [{_fmt(verdict['theory_lows'][i])}, "
                  f"{_fmt(verdict['theory_highs'][i])}]")
        diff = f"{_fmt(item['mean'], 2)} ± {_fmt(item['half_width'], 2)}"
        lines.append(f"  {n:>7}  {sim:<26}{theory:<26}{diff:<22}{_fmt(item['delta'], 2):<9}"
                     f"{verdict['presence'][i]:<17}{item['verdict']:<14}{run_verdicts[i]}")
    growth = verdict["growth"]
    lines.append(f"  growth per e-fold of N, theory - sim.: {_fmt(growth['difference'], 2)} "
                 f"± {_fmt(growth['band'], 2)} (margin {_fmt(growth['margin'], 2)}, {growth['seeds']} seeds): "
                 f"{growth['verdict']}")
    for side, label in (("sim", "simulation"), ("theory", "theory")):
        for law in verdict["fits"].get(side, {}).values():
            params = ", ".join(f"{k} = {_fmt(v)} ± {_fmt(law['errors'][k], 2)}" for k, v in law["params"].items())
            lines.append(f"  {label:<10} {law['law']:<11}: {params}; chi^2 = {_fmt(law['chi2'])} / {law['dof']} dof")
    lines.append(f"  (margin {verdict['margin']:g} x the simulated landmark at each size; growth margin: the "
                 f"slope that moves it by that across the sizes; {100 * (1 - verdict['alpha']):.3g} % simultaneous "
                 "band, "
                 f"c = {_fmt(verdict['band_factor'])} ({verdict['band_method']}))")
    lines.append(f"verdict: {verdict['verdict']}: {verdict['reason']}")
    for item in verdict["advice"]:
        lines.append(f"  to settle it: {item}")
    return "\n".join(lines)

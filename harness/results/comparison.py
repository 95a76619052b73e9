"""Simulation against theory: per-time summaries, per-observable metrics, the run's gaps.

Paired comparison (the default): for every seed s the difference
d_s(t) = theory_s(t) - sim_s(t) is taken between the theory started from seed s's own
initial conditions and seed s's simulation, so the seed-to-seed spread of the initial
conditions cancels. With n seeds whose values are finite,

  diff_mean = mean_s d_s,  diff_sem = std_s(d_s) / sqrt(n)  (ddof = 1),  z = diff_mean / diff_sem.

When the theory is a single mean curve (unpaired), diff_mean = theory - sim_mean and
diff_sem is the SEM of the simulation. z is 0 where both the difference and its SEM are
exactly zero (e.g. T, which neither side changes), +-inf where only the SEM is zero, and
NaN with fewer than two seeds.

z measures how *detectable* a difference is, not whether theory and simulation agree: the
verdict (agree within a margin / disagree / inconclusive) is :mod:`harness.results.judgement`'s, and
the tables here carry its margin, band and outcome beside the z-scores.
"""

from __future__ import annotations

import math
from typing import Any, NamedTuple

import numpy as np
import pandas as pd

from harness.core.trajectories import Trajectories, observable_group
from harness.results.judgement import (
    AGREE,
    DISAGREE,
    NOT_JUDGED,
    Judgement,
    Margin,
    judge,
    judge_differences,
    mean_sem,
    relative_gap,
)
from harness.results.paired_landmarks import LandmarkOptions, PairedLandmarks, pair_landmarks

SUMMARY_COLUMNS = ["t", "observable", "sim_mean", "sim_sem", "theory_mean", "diff_mean", "diff_sem", "z"]
"""The fixed columns of summary.parquet (other tools read them); the extra columns follow them."""
SUMMARY_EXTRA_COLUMNS = ["n_seeds", "margin", "band"]
"""n_seeds: finite seeds of the difference; margin: the agreement margin delta(t); band: the
half-width c * diff_sem of the simultaneous band (NaN where not judged)."""
METRIC_COLUMNS = [
    "observable", "max_abs_z", "rms_z", "frac_within_2sem", "max_rel_err", "final_rel_err", "divergence_t",
]
"""The fixed columns of metrics.parquet. divergence_t: the first time the band lies wholly
outside the margin (the theory is shown to depart from there), NaN if never."""
METRIC_EXTRA_COLUMNS = ["group", "verdict", "group_verdict", "band_reach", "band_inner", "detected_t"]
"""verdict: the observable's own outcome; group_verdict: its group's; band_reach / band_inner:
max over t of (|m| +- c se) / margin (reach <= 1: agreement shown; inner > 1: disagreement
shown); detected_t: first time the band excludes zero."""


class Comparison(NamedTuple):
    summary: pd.DataFrame
    metrics: pd.DataFrame
    judgement: Judgement
    gaps: dict[str, Any]  # :func:`gap_report`
    landmarks: PairedLandmarks | None = None  # harness.results.paired_landmarks (None: not measured)


def _ratio(numerator: np.ndarray, denominator: np.ndarray) -> np.ndarray:
    """numerator / denominator with 0/0 = 0 and x/0 = sign(x) * inf."""
    with np.errstate(invalid="ignore", divide="ignore"):
        out = numerator / denominator
    return np.where((numerator == 0) & (denominator == 0), 0.0, out)


def summarise(traj: Trajectories, judgement: Judgement) -> pd.DataFrame:
    """The per-time, per-observable table (:data:`SUMMARY_COLUMNS` + :data:`SUMMARY_EXTRA_COLUMNS`)."""
    sim_mean, sim_sem, _ = mean_sem(traj.sim)  # [E, O]
    theory_mean, _, _ = mean_sem(traj.theory)
    if traj.paired:
        diff_mean, diff_sem, n_seeds = mean_sem(traj.theory - traj.sim)
    else:
        diff_mean, diff_sem = theory_mean - sim_mean, sim_sem
        n_seeds = np.isfinite(traj.sim).sum(axis=0)
    z = _ratio(diff_mean, diff_sem)
    e, o = sim_mean.shape
    return pd.DataFrame(
        {
            "t": np.repeat(traj.t, o),
            "observable": np.tile(np.asarray(traj.observables, dtype=object), e),
            "sim_mean": sim_mean.reshape(-1),
            "sim_sem": sim_sem.reshape(-1),
            "theory_mean": theory_mean.reshape(-1),
            "diff_mean": diff_mean.reshape(-1),
            "diff_sem": diff_sem.reshape(-1),
            "z": z.reshape(-1),
            "n_seeds": n_seeds.reshape(-1).astype(np.int64),
            "margin": judgement.delta.reshape(-1),
            "band": judgement.half_width.reshape(-1),
        }
    )


def metrics(summary: pd.DataFrame, judgement: Judgement) -> pd.DataFrame:
    """Per-observable metrics (:data:`METRIC_COLUMNS` + :data:`METRIC_EXTRA_COLUMNS`), in table order."""
    own = dict(zip(judgement.observables, judgement.observable_verdicts(), strict=True))
    group_verdict = {g.group: g.verdict for g in judgement.groups}
    rows = []
    for observable, group in summary.groupby("observable", sort=False):
        group = group.sort_values("t")
        t = group["t"].to_numpy(float)
        z = group["z"].to_numpy(dtype=float)
        mean, band, margin = (group[c].to_numpy(float) for c in ("diff_mean", "band", "margin"))
        rel = np.abs(_ratio(mean, np.abs(group["sim_mean"].to_numpy(float)))) if judgement.judged[
            judgement.observables.index(observable)] else np.full(len(t), np.nan)
        finite_z = z[~np.isnan(z)]
        finite_rel = rel[~np.isnan(rel)]
        with np.errstate(invalid="ignore", divide="ignore"):
            reach = (np.abs(mean) + band) / margin
            inner = (np.abs(mean) - band) / margin
        rows.append(
            {
                "observable": observable,
                "max_abs_z": float(np.max(np.abs(finite_z))) if finite_z.size else np.nan,
                "rms_z": float(np.sqrt(np.mean(finite_z**2))) if finite_z.size else np.nan,
                "frac_within_2sem": float(np.mean(np.abs(finite_z) <= 2)) if finite_z.size else np.nan,
                "max_rel_err": float(np.max(finite_rel)) if finite_rel.size else np.nan,
                "final_rel_err": float(rel[-1]),
                "divergence_t": _first(t, inner > 1),
                "group": observable_group(observable),
                "verdict": own[observable],
                "group_verdict": group_verdict[observable_group(observable)],
                "band_reach": _nanmax(reach),
                "band_inner": _nanmax(inner),
                "detected_t": _first(t, np.abs(mean) > band),
            }
        )
    return pd.DataFrame(rows, columns=METRIC_COLUMNS + METRIC_EXTRA_COLUMNS)


def _first(t: np.ndarray, mask: np.ndarray) -> float:
    hits = np.flatnonzero(mask)
    return float(t[hits[0]]) if hits.size else math.nan


def _nanmax(values: np.ndarray) -> float:
    values = values[np.isfinite(values)]
    return float(values.max()) if values.size else math.nan


def compare(
    traj: Trajectories,
    margin: Margin,
    diverged_at: np.ndarray | None = None,
    landmarks: LandmarkOptions | None = None,
) -> Comparison:
    """Summary, metrics, verdict and gaps of one run's trajectories, and its landmarks when ``landmarks`` is given."""
    judgement = judge(traj, margin)
    summary = summarise(traj, judgement)
    paired = pair_landmarks(traj, landmarks, margin, diverged_at) if landmarks is not None else None
    return Comparison(summary, metrics(summary, judgement), judgement, gap_report(traj, margin, diverged_at), paired)


# ------------------------------------------------------------------------------ the gaps


def _gap(diff: np.ndarray, reference: np.ndarray, t: np.ndarray, name: str, margin: Margin) -> dict[str, Any]:
    """One gap [S, E] judged by the verdict's rule, with its per-seed relative size."""
    ref_mean, _, _ = mean_sem(reference)
    judged = judge_differences(t, diff[:, :, None], ref_mean[:, None], [name], margin)
    group = judged.groups[0]
    relative = relative_gap(diff, reference, margin.alpha)
    mean, sem, _ = mean_sem(diff)
    z = np.abs(_ratio(mean, sem))
    z = z[np.isfinite(z)]
    return {
        "verdict": group.verdict,
        "seeds_needed": group.seeds_needed,
        "max_abs_z": float(z.max()) if z.size else math.nan,
        "relative": relative.mean,
        "relative_low": relative.low,
        "relative_high": relative.high,
        "same_sign": relative.same_sign,
        "seeds": relative.seeds,
    }


def gap_report(traj: Trajectories, margin: Margin, diverged_at: np.ndarray | None = None) -> dict[str, Any]:
    """The two ways a theory can fail (docs/equations.md, "three curves"), judged and sized.

    * ``gaussian_equivalence``: the simulation's test_error (held-out samples) against its
      overlap_error (the Gaussian formula on the same seed's Q, R, T), d_s = test - overlap:
      beyond the margin when the data are not Gaussian-equivalent;
    * ``dynamics``: the theory's overlap_error against the simulation's: beyond the margin
      when the equations or their integration are wrong;
    * ``theory``: the theory's test_error against the simulation's, sized per seed.

    Each is judged by :mod:`harness.results.judgement`'s rule (margin relative to the reference curve)
    and sized seed by seed (mean of the relative gap, its interval, and how many seeds share
    its sign). Only seeds that never diverged take part: a diverged seed is reported as such,
    never as a gap. Empty when an observable is missing.
    """
    names = list(traj.observables)
    diverged = np.zeros(len(traj.seeds), bool) if diverged_at is None else np.isfinite(np.asarray(diverged_at))
    report: dict[str, Any] = {"diverged": int(diverged.sum()), "seeds": int(len(traj.seeds))}
    if "test_error" not in names or "overlap_error" not in names:
        return report
    keep = ~diverged
    t = np.asarray(traj.t)
    sim_test = traj.sim[keep][:, :, names.index("test_error")]
    sim_overlap = traj.sim[keep][:, :, names.index("overlap_error")]
    if np.sum(np.all(np.isfinite(sim_test), axis=1)) >= 2 and np.any(np.isfinite(sim_overlap)):
        report["gaussian_equivalence"] = _gap(sim_test - sim_overlap, sim_overlap, t, "test_error", margin)
    theory_overlap = traj.theory[keep][:, :, names.index("overlap_error")]
    theory_test = traj.theory[keep][:, :, names.index("test_error")]
    if not traj.paired:
        theory_overlap = np.broadcast_to(mean_sem(theory_overlap)[0], sim_overlap.shape)
        theory_test = np.broadcast_to(mean_sem(theory_test)[0], sim_test.shape)
    if np.any(np.isfinite(theory_overlap - sim_overlap)):
        report["dynamics"] = _gap(theory_overlap - sim_overlap, sim_overlap, t, "overlap_error", margin)
    if np.any(np.isfinite(theory_test - sim_test)):
        report["theory"] = _gap(theory_test - sim_test, sim_test, t, "test_error", margin)
    return report


def _number(value: Any) -> float:
    """A stored number, None (strict JSON's NaN) read as NaN."""
    return math.nan if value is None else float(value)


def _percent(value: float) -> str:
    return f"{100 * value:+.0f} %" if math.isfinite(value) else "-"


def _sized(gap: dict[str, Any], what: str) -> str:
    """'test_error - formula: -58 % on average [-64 %, -52 %], same sign in 16 of 16 seeds'."""
    if not math.isfinite(_number(gap.get("relative"))):
        return ""
    text = f"{what} {_percent(_number(gap['relative']))} on average"
    if math.isfinite(_number(gap.get("relative_low"))):
        text += f" [{_percent(_number(gap['relative_low']))}, {_percent(_number(gap['relative_high']))}]"
    return text + f", same sign in {gap['same_sign']} of {gap['seeds']} seeds"


def describe_gaps(report: dict[str, Any]) -> list[str]:
    """Plain sentences: which of the two ways a theory can fail shows, seeds that diverged."""
    lines = []
    diverged, seeds = report.get("diverged", 0), report.get("seeds", 0)
    if diverged:
        lines.append(
            f"{diverged} of {seeds} seeds diverged (weights became non-finite); they are left out of the "
            "gaps below" + ("" if diverged < seeds else ": no gap can be measured (learning rate too large?)")
        )
    ge, dyn = report.get("gaussian_equivalence"), report.get("dynamics")
    if ge is None and dyn is None:
        if not diverged:
            lines.append("no gaps to report (too few seeds, no theory, or no overlap_error)")
        return lines
    if ge is not None:
        lines.append(
            f"Gaussian equivalence (measured test_error against the Gaussian formula on the simulation's own "
            f"overlaps): {ge['verdict']}; " + _sized(ge, "test_error - formula:")
        )
    if dyn is not None:
        lines.append(
            f"dynamics (theory against the simulation's own overlap_error): {dyn['verdict']}; "
            + _sized(dyn, "theory - simulation:")
        )
    ge_v = ge["verdict"] if ge else NOT_JUDGED
    dyn_v = dyn["verdict"] if dyn else NOT_JUDGED
    if ge_v == DISAGREE and dyn_v != DISAGREE:
        lines.append("so the data are not Gaussian-equivalent at this size; the equations follow the overlaps"
                     if dyn_v == AGREE else "so the data are not Gaussian-equivalent at this size")
    elif dyn_v == DISAGREE and ge_v != DISAGREE:
        lines.append("so the equations, or their integration, do not follow the simulation's own order parameters")
    elif dyn_v == DISAGREE and ge_v == DISAGREE:
        lines.append("so the data are not Gaussian-equivalent at this size, and the dynamics (which rest on the "
                     "same Gaussian averages) differ as well")
    elif ge_v == AGREE and dyn_v == AGREE:
        lines.append("the data behave as Gaussian-equivalent and the equations follow the simulation")
    return lines

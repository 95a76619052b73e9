"""Simulation against theory: per-time summaries, per-observable metrics, verdicts.

Paired comparison (the default): for every seed s the difference
d_s(t) = theory_s(t) - sim_s(t) is taken between the theory started from seed s's own
initial conditions and seed s's simulation, so the seed-to-seed spread of the initial
conditions cancels. With n seeds whose values are finite,

  diff_mean = mean_s d_s,  diff_sem = std_s(d_s) / sqrt(n)  (ddof = 1),  z = diff_mean / diff_sem.

When the theory is a single mean curve (unpaired), diff_mean = theory - sim_mean and
diff_sem is the SEM of the simulation. z is 0 where both the difference and its SEM are
exactly zero (e.g. T, which neither side changes), +-inf where only the SEM is zero, and
NaN with fewer than two seeds.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from harness.trajectories import Trajectories, observable_group

AGREEMENT_Z = 4.0
"""|z| at or below which theory and simulation are said to agree at every time."""

DIVERGENCE_Z = 3.0
DIVERGENCE_RUN = 3
"""Divergence time: the first t from which |z| > DIVERGENCE_Z at DIVERGENCE_RUN consecutive evaluations."""

SUMMARY_COLUMNS = ["t", "observable", "sim_mean", "sim_sem", "theory_mean", "diff_mean", "diff_sem", "z"]
METRIC_COLUMNS = [
    "observable", "max_abs_z", "rms_z", "frac_within_2sem", "max_rel_err", "final_rel_err", "divergence_t",
]


def _mean_sem(values: np.ndarray, axis: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """NaN-aware mean and standard error of the mean along ``axis``."""
    finite = np.isfinite(values)
    n = finite.sum(axis=axis)
    total = np.where(finite, values, 0.0).sum(axis=axis)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(n > 0, total / np.maximum(n, 1), np.nan)
        deviations = np.where(finite, values - np.expand_dims(mean, axis), 0.0)
        var = (deviations**2).sum(axis=axis) / (n - 1)
        sem = np.where(n >= 2, np.sqrt(var / np.maximum(n, 1)), np.nan)
    return mean, sem


def _ratio(numerator: np.ndarray, denominator: np.ndarray) -> np.ndarray:
    """numerator / denominator with 0/0 = 0 and x/0 = sign(x) * inf."""
    with np.errstate(invalid="ignore", divide="ignore"):
        out = numerator / denominator
    out = np.where((numerator == 0) & (denominator == 0), 0.0, out)
    return out


def summarise(traj: Trajectories) -> pd.DataFrame:
    """The per-time, per-observable table (columns :data:`SUMMARY_COLUMNS`)."""
    sim_mean, sim_sem = _mean_sem(traj.sim)  # [E, O]
    theory_mean, _ = _mean_sem(traj.theory)
    if traj.paired:
        diff = traj.theory - traj.sim
        diff_mean, diff_sem = _mean_sem(diff)
    else:
        diff_mean, diff_sem = theory_mean - sim_mean, sim_sem
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
        }
    )


def divergence_time(t: np.ndarray, z: np.ndarray) -> float:
    """First t from which |z| > 3 holds at 3 consecutive evaluations; NaN if never."""
    beyond = np.abs(np.nan_to_num(z, nan=0.0)) > DIVERGENCE_Z
    for i in range(len(t) - DIVERGENCE_RUN + 1):
        if beyond[i : i + DIVERGENCE_RUN].all():
            return float(t[i])
    return float("nan")


def metrics(summary: pd.DataFrame) -> pd.DataFrame:
    """Per-observable metrics (columns :data:`METRIC_COLUMNS`), in first-seen order."""
    rows = []
    for observable, group in summary.groupby("observable", sort=False):
        group = group.sort_values("t")
        z = group["z"].to_numpy(dtype=float)
        rel = np.abs(_ratio(
            (group["theory_mean"] - group["sim_mean"]).to_numpy(float), np.abs(group["sim_mean"].to_numpy(float))
        ))
        finite_z = z[~np.isnan(z)]
        finite_rel = rel[~np.isnan(rel)]
        rows.append(
            {
                "observable": observable,
                "max_abs_z": float(np.max(np.abs(finite_z))) if finite_z.size else np.nan,
                "rms_z": float(np.sqrt(np.mean(finite_z**2))) if finite_z.size else np.nan,
                "frac_within_2sem": float(np.mean(np.abs(finite_z) <= 2)) if finite_z.size else np.nan,
                "max_rel_err": float(np.max(finite_rel)) if finite_rel.size else np.nan,
                "final_rel_err": float(rel[-1]),
                "divergence_t": divergence_time(group["t"].to_numpy(float), z),
            }
        )
    return pd.DataFrame(rows, columns=METRIC_COLUMNS)


def group_verdicts(metric_table: pd.DataFrame) -> pd.DataFrame:
    """Per observable group (test_error, Q, R, ...): the worst |z| and whether they agree."""
    table = metric_table.assign(group=metric_table["observable"].map(observable_group))
    rows = []
    for group, part in table.groupby("group", sort=False):
        worst = part["max_abs_z"].max(skipna=True)
        rows.append(
            {
                "group": group,
                "max_abs_z": worst,
                "agree": bool(np.isfinite(worst) and worst <= AGREEMENT_Z) if part["max_abs_z"].notna().any() else None,
                "divergence_t": part["divergence_t"].min(skipna=True),
            }
        )
    return pd.DataFrame(rows)

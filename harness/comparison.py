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

Agreement. With n seeds, z is Student-t distributed with n - 1 degrees of freedom when the
theory is right (the SEM is itself estimated from the n seeds), whose tails are far heavier
than a Gaussian's for small n. The verdict therefore uses the *adjusted* z: |z| mapped to
the standard normal with the same tail probability, z_adj = Phi^{-1}(1 - F_t(|z|; n - 1)),
and calls theory and simulation in agreement when z_adj <= AGREEMENT_Z at every time.
For n >~ 30 the two barely differ; for n = 8, |z| = 4 corresponds to z_adj ~ 2.6.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy import stats

from harness.trajectories import Trajectories, observable_group

AGREEMENT_Z = 4.0
"""|z| at or below which theory and simulation are said to agree at every time."""

DIVERGENCE_Z = 3.0
DIVERGENCE_RUN = 3
"""Divergence time: the first t from which |z| > DIVERGENCE_Z at DIVERGENCE_RUN consecutive evaluations."""

SUMMARY_COLUMNS = ["t", "observable", "sim_mean", "sim_sem", "theory_mean", "diff_mean", "diff_sem", "z"]
"""The fixed columns of summary.parquet (other tools read them); ``n_seeds`` follows them."""
METRIC_COLUMNS = [
    "observable", "max_abs_z", "rms_z", "frac_within_2sem", "max_rel_err", "final_rel_err", "divergence_t",
]
"""The fixed columns of metrics.parquet; ``max_abs_z_adjusted`` follows them."""
SUMMARY_EXTRA_COLUMNS = ["n_seeds"]
METRIC_EXTRA_COLUMNS = ["max_abs_z_adjusted"]


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
    """The per-time, per-observable table (:data:`SUMMARY_COLUMNS` + :data:`SUMMARY_EXTRA_COLUMNS`)."""
    sim_mean, sim_sem = _mean_sem(traj.sim)  # [E, O]
    theory_mean, _ = _mean_sem(traj.theory)
    if traj.paired:
        diff = traj.theory - traj.sim
        diff_mean, diff_sem = _mean_sem(diff)
    else:
        diff = traj.sim
        diff_mean, diff_sem = theory_mean - sim_mean, sim_sem
    n_seeds = np.isfinite(diff).sum(axis=0)
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
        }
    )


def adjusted_z(z: np.ndarray, n_seeds: np.ndarray) -> np.ndarray:
    """|z| mapped to the standard normal through Student's t with n - 1 degrees of freedom."""
    z = np.abs(np.asarray(z, dtype=float))
    dof = np.asarray(n_seeds, dtype=float) - 1
    with np.errstate(invalid="ignore", divide="ignore"):
        tail = stats.t.sf(z, np.where(dof >= 1, dof, np.nan))
        out = stats.norm.isf(tail)
    out = np.where(z == 0, 0.0, out)
    return np.where(np.isinf(z) & (dof >= 1), np.inf, out)


def divergence_time(t: np.ndarray, z: np.ndarray) -> float:
    """First t from which |z| > 3 holds at 3 consecutive evaluations; NaN if never."""
    beyond = np.abs(np.nan_to_num(z, nan=0.0)) > DIVERGENCE_Z
    for i in range(len(t) - DIVERGENCE_RUN + 1):
        if beyond[i : i + DIVERGENCE_RUN].all():
            return float(t[i])
    return float("nan")


def metrics(summary: pd.DataFrame) -> pd.DataFrame:
    """Per-observable metrics (:data:`METRIC_COLUMNS` + :data:`METRIC_EXTRA_COLUMNS`), in first-seen order."""
    rows = []
    for observable, group in summary.groupby("observable", sort=False):
        group = group.sort_values("t")
        z = group["z"].to_numpy(dtype=float)
        rel = np.abs(_ratio(
            (group["theory_mean"] - group["sim_mean"]).to_numpy(float), np.abs(group["sim_mean"].to_numpy(float))
        ))
        finite_z = z[~np.isnan(z)]
        finite_rel = rel[~np.isnan(rel)]
        n_seeds = group["n_seeds"].to_numpy() if "n_seeds" in group else np.full(len(z), np.inf)
        z_adj = adjusted_z(z, n_seeds)
        z_adj = z_adj[~np.isnan(z_adj)]
        rows.append(
            {
                "observable": observable,
                "max_abs_z": float(np.max(np.abs(finite_z))) if finite_z.size else np.nan,
                "rms_z": float(np.sqrt(np.mean(finite_z**2))) if finite_z.size else np.nan,
                "frac_within_2sem": float(np.mean(np.abs(finite_z) <= 2)) if finite_z.size else np.nan,
                "max_rel_err": float(np.max(finite_rel)) if finite_rel.size else np.nan,
                "final_rel_err": float(rel[-1]),
                "divergence_t": divergence_time(group["t"].to_numpy(float), z),
                "max_abs_z_adjusted": float(np.max(z_adj)) if z_adj.size else np.nan,
            }
        )
    return pd.DataFrame(rows, columns=METRIC_COLUMNS + METRIC_EXTRA_COLUMNS)


def _max_abs_z(diff_mean: np.ndarray, diff_sem: np.ndarray) -> float:
    z = np.abs(_ratio(diff_mean, diff_sem))
    z = z[~np.isnan(z)]
    return float(z.max()) if z.size else float("nan")


def equivalence_gaps(traj: Trajectories) -> dict[str, float]:
    """The two run-level gaps of theory notes section 5, as max |z| over the evaluation times.

    * ``gaussian_equivalence_gap``: the simulation's test_error (measured on held-out
      samples) against its overlap_error (the Gaussian formula on the same seed's Q, R, T),
      paired seed by seed: d_s = test_error_s - overlap_error_s, z = mean_s d_s / SEM.
      Large when the data are not Gaussian-equivalent; for Gaussian-equivalent data it
      is finite-test-set noise.
    * ``dynamics_gap``: the theory's overlap_error against the simulation's (the summary's
      z of observable overlap_error): large when the equations or their integration are wrong.

    NaN when an observable is missing or fewer than two seeds are finite.
    """
    names = list(traj.observables)
    if "test_error" not in names or "overlap_error" not in names:
        return {"gaussian_equivalence_gap": float("nan"), "dynamics_gap": float("nan")}
    test, overlap = traj.sim[:, :, names.index("test_error")], traj.sim[:, :, names.index("overlap_error")]
    ge_mean, ge_sem = _mean_sem(test - overlap)
    theory = traj.theory[:, :, names.index("overlap_error")]
    if traj.paired:
        dyn_mean, dyn_sem = _mean_sem(theory - overlap)
    else:
        sim_mean, dyn_sem = _mean_sem(overlap)
        dyn_mean = _mean_sem(theory)[0] - sim_mean
    return {
        "gaussian_equivalence_gap": _max_abs_z(ge_mean, ge_sem),
        "dynamics_gap": _max_abs_z(dyn_mean, dyn_sem),
    }


def describe_gaps(gaps: dict[str, float], n_seeds: int | None = None) -> str:
    """One plain sentence saying which gap of :func:`equivalence_gaps` dominates.

    A gap is "within noise" when its |z|, adjusted for ``n_seeds`` like the verdicts
    (:func:`adjusted_z`; unadjusted when ``n_seeds`` is None), is at most AGREEMENT_Z.
    """
    ge, dyn = (gaps.get(name) for name in ("gaussian_equivalence_gap", "dynamics_gap"))
    ge, dyn = (np.nan if value is None else float(value) for value in (ge, dyn))  # manifests store NaN as null

    def adjusted(z: float) -> float:
        return z if n_seeds is None else float(adjusted_z(np.array([z]), np.array([n_seeds]))[0])

    def quiet(z: float) -> bool:
        return bool(adjusted(z) <= AGREEMENT_Z)

    def show(z: float) -> str:  # the raw |z| and, with few seeds, the adjusted one the verdict uses
        return f"{z:.2f}" if n_seeds is None or np.isnan(z) else f"{z:.2f} [adjusted {adjusted(z):.2f}]"

    if np.isnan(ge) and np.isnan(dyn):
        return "no gaps to report (too few seeds or no theory)"
    if np.isnan(dyn):
        return (
            "Gaussian equivalence: test_error and the Gaussian formula on the simulation's own overlaps "
            + ("agree" if quiet(ge) else "DISAGREE") + f" (max |z| {show(ge)}); no theory to compare"
        )
    if np.isnan(ge):
        return (
            "the theory and the simulation's own overlap_error " + ("agree" if quiet(dyn) else "DISAGREE")
            + f" (max |z| {show(dyn)}); no Gaussian-equivalence gap to report"
        )
    if quiet(ge) and quiet(dyn):
        return (
            f"both gaps are within noise (max |z|: Gaussian equivalence {show(ge)}, dynamics {show(dyn)}): "
            "the data behave as Gaussian-equivalent and the equations follow the simulation"
        )
    if dyn >= ge:
        return (
            f"the dynamics gap dominates (max |z|: dynamics {show(dyn)}, Gaussian equivalence {show(ge)}): "
            "the equations, or their integration, do not follow the simulation's own order parameters"
        )
    return (
        f"the Gaussian-equivalence gap dominates (max |z|: Gaussian equivalence {show(ge)}, dynamics {show(dyn)}): "
        "the measured test error departs from the Gaussian formula on the simulation's own overlaps, "
        "so these data are not Gaussian-equivalent at this size"
        + ("; the dynamics disagree too" if not quiet(dyn) else "; the equations themselves follow the overlaps")
    )


def group_verdicts(metric_table: pd.DataFrame) -> pd.DataFrame:
    """Per observable group (test_error, Q, R, ...): the worst |z| and whether they agree.

    Agreement uses the adjusted z (see the module docstring) against :data:`AGREEMENT_Z`.
    """
    table = metric_table.assign(group=metric_table["observable"].map(observable_group))
    rows = []
    for group, part in table.groupby("group", sort=False):
        worst = part["max_abs_z"].max(skipna=True)
        adjusted = part["max_abs_z_adjusted"].max(skipna=True)
        rows.append(
            {
                "group": group,
                "max_abs_z": worst,
                "max_abs_z_adjusted": adjusted,
                "agree": bool(adjusted <= AGREEMENT_Z) if part["max_abs_z_adjusted"].notna().any() else None,
                "divergence_t": part["divergence_t"].min(skipna=True),
            }
        )
    return pd.DataFrame(rows)

"""Writers of synthetic run, scaling and sweep folders in the briefed on-disk format.

The figure and report tests must not depend on the simulator or the theory being
finished, so these helpers write folders that look like real ones: a run folder with
scenario.toml, manifest.json, trajectories.parquet, summary.parquet and metrics.parquet;
a scaling folder with verdict.json; a sweep folder with sweep.json and runs.parquet.

The numbers are made up but shaped like the real thing: a generalisation error that
falls through a plateau, order parameters drifting towards the teacher, a simulation that
scatters around its paired per-seed theory with an SEM that shrinks with the number of
seeds, and (optionally) a theory that departs from the simulation late in training.
This is a plain module (not a pytest conftest) imported by the figure and report tests.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd


def _toml_value(value: object) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return json.dumps(value)
    return repr(value)


def write_toml(path: Path, sections: dict[str, dict[str, object]]) -> None:
    """Write a flat two-level TOML document (sections of scalars), enough for a scenario."""
    lines: list[str] = []
    for section, entries in sections.items():
        lines.append(f"[{section}]")
        lines.extend(f"{key} = {_toml_value(value)}" for key, value in entries.items())
        lines.append("")
    path.write_text("\n".join(lines))


def observable_names(students: int, teachers: int, train_second_layer: bool) -> list[str]:
    """All observable names in the briefed naming scheme (indices from 0, no spaces)."""
    names = ["test_error", "overlap_error"]
    names += [f"Q[{i},{j}]" for i in range(students) for j in range(students)]
    names += [f"R[{i},{m}]" for i in range(students) for m in range(teachers)]
    names += [f"T[{m},{n}]" for m in range(teachers) for n in range(teachers)]
    if train_second_layer:
        names += [f"v[{k}]" for k in range(students)]
    return names


def _theory_curves(
    names: list[str], times: np.ndarray, rng: np.random.Generator, students: int
) -> dict[str, np.ndarray]:
    """Smooth per-seed 'theory' trajectories: a plateau then a specialisation transition."""
    onset = 30.0 * rng.uniform(0.8, 1.25)  # where the plateau ends, varies with the seed
    escape = 1.0 / (1.0 + np.exp(-(times - onset) / 6.0))
    start = 1.0 / (1.0 + np.exp(onset / 6.0))
    escape = (escape - start) / (1.0 - start)
    eps = 0.3 * np.exp(-times / 2.0) + 0.05 * (1.0 - np.exp(-times / 2.0)) * (1.0 - escape)
    eps += 0.02 * np.exp(-times / 200.0) * escape + 0.004
    curves: dict[str, np.ndarray] = {"test_error": eps, "overlap_error": eps}
    q0 = rng.uniform(0.05, 0.2, size=(students, students))
    for name in names:
        family, indices = name[0], name[2:-1]
        if family not in "QRTv":
            continue
        i, *rest = (int(part) for part in indices.split(","))
        j = rest[0] if rest else i
        if family == "Q":
            base = q0[min(i, j), max(i, j)] * (1.0 if i == j else 0.1)
            target = 1.0 if i == j else 0.0
            curves[name] = base + (target - base) * (1.0 - np.exp(-times / 8.0)) * (0.4 + 0.6 * escape)
        elif family == "R":
            target = 1.0 if i == j else 0.0
            curves[name] = 0.01 + (target - 0.01) * (0.5 * (1.0 - np.exp(-times / 5.0)) + 0.5 * escape) * (
                1.0 if i == j else 0.6
            )
        elif family == "T":
            curves[name] = np.full_like(times, 1.0 if i == j else 0.0)
        else:
            curves[name] = 1.0 + 0.3 * (1.0 - np.exp(-times / 10.0))
    return curves


def write_run_folder(
    root: Path,
    run_id: str,
    *,
    input_dim: int = 100,
    students: int = 2,
    teachers: int = 2,
    seeds: int = 4,
    learning_rate: float = 0.5,
    train_second_layer: bool = False,
    theory_bias: float = 0.0,
    gaussian_equivalence_gap: float = 0.0,
    times: int = 40,
    t_max: float = 200.0,
    rng_seed: int = 0,
) -> Path:
    """Write one synthetic run folder ``root/run_id`` and return its path.

    ``theory_bias`` multiplies the theory's test error by (1 + bias * late) where late rises
    from 0 to 1 after t ~ 20, so a nonzero bias makes the theory depart from simulation.
    ``gaussian_equivalence_gap`` shifts the measured test error away from the overlap error
    (what a failing Gaussian equivalence looks like).
    """
    rng = np.random.default_rng(rng_seed)
    run_dir = root / run_id
    run_dir.mkdir(parents=True)
    grid = np.concatenate([[0.0], np.geomspace(1.0 / input_dim, t_max, times - 1)])
    names = observable_names(students, teachers, train_second_layer)
    late = 1.0 / (1.0 + np.exp(-(np.log(np.maximum(grid, 1e-9)) - np.log(20.0)) * 3.0))

    rows = []
    for seed in range(seeds):
        curves = _theory_curves(names, grid, rng, students)
        noise_scale = np.sqrt(np.maximum(grid, 0.0) / (grid + 1.0)) / np.sqrt(input_dim)
        for name in names:
            theory = curves[name]
            if name.startswith("T["):
                sim = theory.copy()
            else:
                sim = theory * (1.0 + noise_scale * rng.standard_normal(grid.size))
                sim = sim + 0.2 * noise_scale * rng.standard_normal(grid.size) * (name[0] in "QR")
            if name == "test_error":
                sim = sim * (1.0 + gaussian_equivalence_gap * late)
            if name in ("test_error", "overlap_error"):
                theory = theory * (1.0 + theory_bias * late)
            sim[0] = theory[0]  # the pair starts from the same initial condition
            rows.append(pd.DataFrame({"seed": seed, "t": grid, "observable": name, "sim": sim, "theory": theory}))
    trajectories = pd.concat(rows, ignore_index=True)
    trajectories["seed"] = trajectories["seed"].astype("int64")
    trajectories.to_parquet(run_dir / "trajectories.parquet", index=False)

    summary, metrics = summarise(trajectories)
    summary.to_parquet(run_dir / "summary.parquet", index=False)
    metrics.to_parquet(run_dir / "metrics.parquet", index=False)

    write_toml(
        run_dir / "scenario.toml",
        {
            "data": {"kind": "gaussian", "input_dim": input_dim},
            "teacher": {"hidden": teachers, "activation": "erf", "noise_std": 0.0},
            "student": {
                "hidden": students,
                "activation": "erf",
                "train_second_layer": train_second_layer,
                "init_scale": 0.1,
            },
            "sgd": {"learning_rate": learning_rate, "second_layer_learning_rate": learning_rate, "time": t_max},
            "run": {"seeds": seeds, "evaluations": times, "dtype": "float64"},
            "theory": {"source": "builtin"},
        },
    )
    manifest = {
        "versions": {"python": "3.11", "jax": "0.10.2", "numpy": np.__version__},
        "jax_backend": "cpu",
        "jax_device": "cpu:cpu",
        "dtype": "float64",
        "seeds": list(range(seeds)),
        "diverged_seeds": [],
        "start_time": "2024-01-01T00:00:00+00:00",
        "command_line": ["harness", "run", "scenario.toml"],
        "timings": {"simulation_s": 1.5, "theory_s": 0.7, "compile_s": 2.0},
    }
    (run_dir / "manifest.json").write_text(json.dumps(manifest, indent=2))
    return run_dir


def summarise(trajectories: pd.DataFrame) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Seed averages, SEMs and z-scores (z = mean difference / its SEM), plus the metrics table."""
    frame = trajectories.assign(diff=trajectories["sim"] - trajectories["theory"])
    grouped = frame.groupby(["t", "observable"], sort=True)
    summary = pd.DataFrame(
        {
            "sim_mean": grouped["sim"].mean(),
            "sim_sem": grouped["sim"].sem(),
            "theory_mean": grouped["theory"].mean(),
            "diff_mean": grouped["diff"].mean(),
            "diff_sem": grouped["diff"].sem(),
        }
    ).reset_index()
    with np.errstate(divide="ignore", invalid="ignore"):
        z = summary["diff_mean"] / summary["diff_sem"]
    summary["z"] = z.where(summary["diff_sem"] > 0, 0.0)
    metric_rows = []
    for name, part in summary.groupby("observable", sort=False):
        part = part.sort_values("t")
        abs_z = part["z"].abs()
        scale = part["theory_mean"].abs().where(part["theory_mean"].abs() > 0, 1.0)
        rel = (part["sim_mean"] - part["theory_mean"]).abs() / scale
        beyond = part.loc[abs_z > 4.0, "t"]
        metric_rows.append(
            {
                "observable": name,
                "max_abs_z": float(abs_z.max()),
                "rms_z": float(np.sqrt((part["z"] ** 2).mean())),
                "frac_within_2sem": float((abs_z <= 2.0).mean()),
                "max_rel_err": float(rel.max()),
                "final_rel_err": float(rel.iloc[-1]),
                "divergence_t": float(beyond.iloc[0]) if len(beyond) else float("nan"),
            }
        )
    return summary[
        ["t", "observable", "sim_mean", "sim_sem", "theory_mean", "diff_mean", "diff_sem", "z"]
    ], pd.DataFrame(metric_rows)


def write_scaling_folder(root: Path, name: str = "scaling_erf", *, offset: float = 0.0) -> Path:
    """A finite-size-scaling result: gaps shrinking like N^-1 towards ``offset``."""
    folder = root / name
    folder.mkdir(parents=True)
    sizes = [50, 100, 200, 400, 800, 1600]
    amplitude, exponent = 2.0, 1.0
    rng = np.random.default_rng(3)
    gaps = [amplitude * n**-exponent + offset for n in sizes]
    gaps = [g * (1.0 + 0.05 * rng.standard_normal()) for g in gaps]
    verdict = {
        "verdict": "consistent" if offset == 0.0 else "inconsistent",
        "exponent": exponent,
        "exponent_err": 0.06,
        "offset": offset if offset else 1.0e-5,
        "offset_err": 2.0e-5,
        "amplitude": amplitude,
        "amplitude_err": 0.1,
        "sizes": sizes,
        "gaps": gaps,
        "gap_errs": [0.08 * g for g in gaps],
    }
    (folder / "verdict.json").write_text(json.dumps(verdict, indent=2))
    return folder


def write_sweep_folder(
    root: Path,
    name: str = "sweep_lr",
    *,
    swept: dict[str, list[float]] | None = None,
) -> Path:
    """A sweep result: sweep.json plus runs.parquet rows over the product of ``swept`` values."""
    swept = swept or {"sgd.learning_rate": [0.1, 0.3, 1.0, 3.0], "student.hidden": [2, 3, 4]}
    folder = root / name
    folder.mkdir(parents=True)
    keys = list(swept)
    grids = np.meshgrid(*[np.asarray(v, dtype=float) for v in swept.values()], indexing="ij")
    flat = [g.ravel() for g in grids]
    rows = []
    for index in range(flat[0].size):
        values = {key: flat[k][index] for k, key in enumerate(keys)}
        eta = values.get("sgd.learning_rate", 0.5)
        width = values.get("student.hidden", 2)
        row: dict[str, object] = {"run_id": f"{name}-{index:03d}"}
        row.update(values)
        row["data.input_dim"] = 100
        row["final_test_error"] = 0.01 * width / (1.0 + eta)
        row["test_error.max_abs_z"] = 0.8 + eta**2 * 0.6
        row["test_error.final_rel_err"] = 0.002 * eta * width
        row["test_error.divergence_t"] = 50.0 / eta if eta > 1.0 else float("nan")
        rows.append(row)
    pd.DataFrame(rows).to_parquet(folder / "runs.parquet", index=False)
    (folder / "sweep.json").write_text(json.dumps({"swept_keys": keys, "run_ids": [row["run_id"] for row in rows]}))
    return folder

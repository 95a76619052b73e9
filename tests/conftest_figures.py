"""Writers of synthetic run, scaling and sweep folders in the tool's on-disk format.

The figure and report tests should not pay for a simulation, so these helpers make up the
trajectories and let the tool's own code do the rest: a run folder is judged and written by
harness.runner.pipeline (scenario.toml, manifest.json, judgement.json and the Parquet tables); a
scaling folder holds verdict.json; a sweep folder sweep.json and runs.parquet.

The numbers are made up but shaped like the real thing: a generalisation error that
falls through a plateau, order parameters drifting towards the teacher, a simulation that
scatters around its paired per-seed theory with an SEM that shrinks with the number of
seeds, and (optionally) a theory that departs from the simulation late in training.
This is a plain module (not a pytest conftest) imported by the figure and report tests.
"""

from __future__ import annotations

import datetime
import json
from pathlib import Path

import numpy as np
import pandas as pd

from harness.core.trajectories import observable_names


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
    theory_only: bool = False,
    replace: bool = False,
) -> Path:
    """Write one run folder ``root/run_id`` of synthetic trajectories and return its path.

    Only the trajectories are made up; the comparison, the verdict and every file come from
    the tool's own code (harness.runner.pipeline.computed_run and store_run), so the figure and
    report tests read exactly the format the writer produces.

    ``theory_bias`` multiplies the theory's test error by (1 + bias * late) where late rises
    from 0 to 1 after t ~ 20, so a nonzero bias makes the theory depart from simulation.
    ``gaussian_equivalence_gap`` shifts the measured test error away from the overlap error
    (what a failing Gaussian equivalence looks like).
    ``theory_only`` makes the run of ``harness theory``: the simulation columns NaN, kind "theory".
    ``replace`` replaces a stored run of the same name, as ``--force`` does.
    """
    from harness.core import scenario as scenario_lib
    from harness.core.trajectories import from_frame
    from harness.runner.pipeline import computed_run, store_run

    rng = np.random.default_rng(rng_seed)
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
    frame = pd.concat(rows, ignore_index=True)
    frame["seed"] = frame["seed"].astype("int64")
    if theory_only:
        frame["sim"] = np.nan
    traj = from_frame(frame, paired=not theory_only)

    scenario = scenario_lib.resolve({
        "data": {"kind": "gaussian", "input_dim": input_dim},
        "teacher": {"hidden": teachers, "activation": "erf", "noise_std": 0.0},
        "student": {"hidden": students, "activation": "erf", "train_second_layer": train_second_layer},
        "sgd": {"learning_rate": learning_rate, "time": t_max},
        "run": {"seeds": seeds, "evaluations": times, "dtype": "float64"},
    })
    computed = computed_run(
        scenario, traj, started=datetime.datetime(2024, 1, 1, tzinfo=datetime.UTC),
        timings={"simulation_s": 1.5, "theory_s": 0.7, "compile_s": 2.0, "theory_compile_s": 0.4},
        kind="theory" if theory_only else "run",
    )
    computed = computed._replace(
        run_id=run_id, manifest=computed.manifest | {"run_id": run_id},
        index_row=computed.index_row | {"run_id": run_id},
    )
    return store_run(computed, root, force=replace).folder


def write_sweep_of_runs(root: Path, learning_rates: list[float], *, name: str = "sweep_runs", **run_options) -> Path:
    """A sweep folder over ``sgd.learning_rate`` whose points are run folders of :func:`write_run_folder`.

    runs.parquet holds the rows the tool's own writer made for those runs (final values of
    simulation and theory, verdicts), as a real sweep's does; sweep.json names them.
    """
    folder = root / name
    run_ids = []
    for index, rate in enumerate(learning_rates):
        run_id = f"{name}-{index:03d}"
        write_run_folder(folder, run_id, learning_rate=rate, rng_seed=index, **run_options)
        run_ids.append(run_id)
    (folder / "sweep.json").write_text(json.dumps({"swept_keys": ["sgd.learning_rate"], "run_ids": run_ids}))
    return folder


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
        row["final_test_error_sem"] = 0.001 * width
        row["final_theory_error"] = row["final_test_error"] * (1.0 + 0.2 * (eta > 1.0))
        row["test_error.max_abs_z"] = 0.8 + eta**2 * 0.6
        row["test_error.final_rel_err"] = 0.002 * eta * width
        row["test_error.divergence_t"] = 50.0 / eta if eta > 1.0 else float("nan")
        row["verdict"] = "disagree" if eta > 1.0 else ("inconclusive" if eta > 0.4 else "agree")
        rows.append(row)
    pd.DataFrame(rows).to_parquet(folder / "runs.parquet", index=False)
    (folder / "sweep.json").write_text(json.dumps({"swept_keys": keys, "run_ids": [row["run_id"] for row in rows]}))
    return folder

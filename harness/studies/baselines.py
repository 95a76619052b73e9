"""Regression baselines for theory solvers: store reference trajectories, re-solve, compare.

A *baseline* is a folder that a user commits next to their code::

    BASELINES/<name>/scenario.toml       the resolved scenario (every default filled in)
    BASELINES/<name>/theory.parquet      seed, t, observable, theory: the reference trajectories
    BASELINES/<name>/initial_state.npz   every seed's initial conditions (the leaves of
                                         harness.equations.sources.InitialState, in order)
    BASELINES/<name>/tolerances.toml     how far ``harness check`` lets each observable move
    BASELINES/<name>/manifest.json       when and with which package versions it was made

``harness baseline save SCENARIO...`` solves the theory alone (no simulation) and writes
one folder per scenario; ``harness check`` re-solves every baseline from its *stored*
initial conditions and compares. Solving from the stored initial conditions keeps the
check about the solver and the equations: if the random stream of a newer JAX draws
different weights, the check says so in a note and still compares like with like. The
note speaks only of real differences: the weights are compared at the precision they were
drawn in (a few units in the last place of float32 are the same draw), and the order
parameters are recomputed from the stored weights and compared in float64
(:func:`initial_state_notes`).

A point passes when ``|now - stored| <= atol + rtol * |stored|`` (the rule of
``numpy.isclose``); NaN matches only NaN. ``tolerances.toml``::

    rtol = 0.0001          # defaults for every observable of this baseline
    atol = 0.0001
    [observables]          # exceptions, by exact name or by group (test_error, Q, R, T, v, ...)
    "R" = { atol = 1e-3 }
    "Q[0,1]" = { rtol = 1e-3, atol = 1e-3 }

Precedence: an exact name, then a group, then ``harness check --rtol/--atol``, then the
file's defaults, then the built-in defaults. The built-in defaults are
rtol = atol = 100 x the baseline's ``theory.rtol``: the ODE's global error was measured at
1-30 x theory.rtol relative to an observable's own size (Tsit5 with a PID controller,
default tolerances, against a solve at rtol = 1e-10), so a factor 100 lets a different but
equally accurate solver pass while a changed equation (a dropped term moves observables by
1e-2 and more) fails.

In a test suite::

    from harness.studies.baselines import assert_matches_baseline

    def test_my_solver_has_not_moved():
        assert_matches_baseline("results/baselines")          # every baseline in the folder
        assert_matches_baseline("results/baselines/erf-k2m2", rtol=1e-5)   # or one
"""

from __future__ import annotations

import datetime as _dt
import io
import math
import sys
import tomllib
from collections.abc import Sequence
from pathlib import Path
from typing import Any, NamedTuple

import numpy as np

from harness.core import times as time_grid
from harness.core.errors import InputError

DEFAULT_DIR = Path("results") / "baselines"
BASELINE_FILES = ("scenario.toml", "theory.parquet", "initial_state.npz", "tolerances.toml", "manifest.json")
TOLERANCE_FACTOR = 100.0
"""Built-in check tolerances: rtol = atol = TOLERANCE_FACTOR x the baseline's theory.rtol."""
SHOWN_DEVIATIONS = 12
TIME_MATCH_RTOL = 1e-12
DRAW_ULPS = 4
"""Initial weights within this many units in the last place (of the run's dtype) are the same draw.

A weight is std x a transformed uniform: a few roundings, each within half an ulp, whose
order a compiler may change (measured on the committed baselines: JAX's current build draws
the float32 student weights up to 2 ulps away from the stored ones)."""
DERIVED_RTOL = 1e-10
"""Order parameters recomputed from the stored weights match the stored ones to this fraction of
each seed's largest entry: float64 sums of N <= 10^5 products carry round-off near N x 1.1e-16."""

# The project's own baselines (results/baselines/, committed): name -> scenario table.
# Adding one is one line here plus `harness baseline save --builtin NAME`; the test suite
# checks that every entry has a committed folder and that `harness check` passes on them.
# Small and quick on purpose: N = 50, two seeds, a few evaluations, short times.
_SMALL = {"data": {"input_dim": 50}, "run": {"seeds": 2, "evaluations": 8}}


def _small(**sections: dict[str, Any]) -> dict[str, Any]:
    table = {name: dict(values) for name, values in _SMALL.items()}
    for name, values in sections.items():
        table.setdefault(name, {}).update(values)
    return table


BUILTIN_BASELINES: dict[str, dict[str, Any]] = {
    "erf-k2m2": _small(sgd={"learning_rate": 1.0, "time": 20.0}),
    "erf-trained-second-layer-noise": _small(
        student={"hidden": 3, "train_second_layer": True}, teacher={"noise_std": 0.3},
        sgd={"learning_rate": 0.8, "time": 10.0},
    ),
    "linear-k1m1": _small(
        student={"hidden": 1, "activation": "linear"}, teacher={"hidden": 1, "activation": "linear"},
        sgd={"learning_rate": 0.5, "time": 5.0},
    ),
    "tanh-quadrature": _small(
        student={"hidden": 1, "activation": "tanh"}, teacher={"hidden": 1, "activation": "tanh"},
        sgd={"learning_rate": 0.8, "time": 5.0},
    ),
    "relu-quadrature": _small(
        student={"hidden": 1, "activation": "relu"}, teacher={"hidden": 1, "activation": "relu"},
        sgd={"learning_rate": 0.3, "time": 5.0},
    ),
    "latent-sign-finite": _small(
        data={"kind": "latent", "latent_dim": 25, "feature_map": "sign"}, sgd={"learning_rate": 0.5, "time": 5.0}
    ),
    "latent-erf-limit": _small(
        data={"kind": "latent", "latent_dim": 25, "feature_map": "erf"}, sgd={"learning_rate": 0.5, "time": 5.0},
        theory={"limit": "infinite", "bins": 40},
    ),
}


# ------------------------------------------------------------------------ tolerances


class Tolerance(NamedTuple):
    rtol: float | None  # None (in a command-line override only): keep the baseline's value
    atol: float | None


class ToleranceTable(NamedTuple):
    """A baseline's tolerances: file-level defaults (None: not set) and per-observable entries."""

    rtol: float | None
    atol: float | None
    observables: dict[str, dict[str, float]]  # name or group -> {"rtol": .., "atol": ..}

    def for_observable(self, observable: str, builtin: Tolerance, override: Tolerance | None) -> Tolerance:
        """Resolve the tolerance of one observable (precedence in the module docstring)."""
        from harness.core.trajectories import observable_group

        rtol = self.rtol if self.rtol is not None else builtin.rtol
        atol = self.atol if self.atol is not None else builtin.atol
        if override is not None:
            rtol = override.rtol if override.rtol is not None else rtol
            atol = override.atol if override.atol is not None else atol
        for key in (observable_group(observable), observable):  # the exact name wins
            entry = self.observables.get(key, {})
            rtol = entry.get("rtol", rtol)
            atol = entry.get("atol", atol)
        return Tolerance(rtol, atol)


def _tolerance_value(value: Any, where: str) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value) or value < 0:
        raise InputError(f"{where}: must be a finite number >= 0, got {value!r}")
    return float(value)


def read_tolerances(path: Path, observables: Sequence[str]) -> ToleranceTable:
    """Parse and check ``tolerances.toml`` (a missing file means: built-in defaults)."""
    from harness.core.trajectories import observable_group

    if not path.exists():
        return ToleranceTable(None, None, {})
    try:
        table = tomllib.loads(path.read_text(encoding="utf-8"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as error:
        first = str(error).splitlines()[0] if str(error) else "invalid TOML"
        raise InputError(f"tolerance file '{path}' is not valid TOML: {first}") from None
    allowed = ("rtol", "atol", "observables")
    for key in table:
        if key not in allowed:
            raise InputError(f"tolerance file '{path}': key '{key}' is unknown; allowed: {', '.join(allowed)}")
    rtol = _tolerance_value(table["rtol"], f"tolerance file '{path}', key 'rtol'") if "rtol" in table else None
    atol = _tolerance_value(table["atol"], f"tolerance file '{path}', key 'atol'") if "atol" in table else None
    entries = table.get("observables", {})
    if not isinstance(entries, dict):
        raise InputError(f"tolerance file '{path}': [observables] must be a table of {{ rtol = .., atol = .. }}")
    known = set(observables) | {observable_group(name) for name in observables}
    parsed: dict[str, dict[str, float]] = {}
    for name, entry in entries.items():
        where = f"tolerance file '{path}', observable '{name}'"
        if name not in known:
            raise InputError(
                f"{where}: not an observable or group of this baseline; known: {', '.join(sorted(known))}"
            )
        if not isinstance(entry, dict) or not entry or any(k not in ("rtol", "atol") for k in entry):
            raise InputError(f"{where}: expected {{ rtol = .., atol = .. }} (either or both), got {entry!r}")
        parsed[name] = {k: _tolerance_value(v, f"{where}, key '{k}'") for k, v in entry.items()}
    return ToleranceTable(rtol, atol, parsed)


def builtin_tolerance(scenario: dict) -> Tolerance:
    value = TOLERANCE_FACTOR * scenario.theory.rtol
    return Tolerance(value, value)


def _tolerance_text(scenario: dict) -> str:
    default = builtin_tolerance(scenario)
    return (
        "# Tolerances for `harness check`: a point passes when |now - stored| <= atol + rtol * |stored|.\n"
        f"# Built-in defaults: rtol = atol = {TOLERANCE_FACTOR:g} x theory.rtol of this baseline.\n"
        f"rtol = {default.rtol:.6g}\n"
        f"atol = {default.atol:.6g}\n"
        "\n"
        "# Exceptions per observable, by exact name or by group (test_error, overlap_error, Q, R, T, v):\n"
        "[observables]\n"
        '# "test_error" = { rtol = 1e-5 }\n'
        '# "Q[0,1]" = { atol = 1e-3 }\n'
    )


# ------------------------------------------------------------------------ one baseline


class Baseline(NamedTuple):
    """A baseline read from disk and checked for form (nothing solved yet)."""

    name: str
    folder: Path
    scenario: dict
    seeds: np.ndarray  # [S]
    t: np.ndarray  # [E]
    observables: list[str]  # [O]
    theory: np.ndarray  # [S, E, O]
    start_leaves: list[np.ndarray]
    tolerances: ToleranceTable


class Deviation(NamedTuple):
    """The worst point of one observable: where the re-solved trajectory moved most."""

    baseline: str
    observable: str
    seed: int
    t: float
    stored: float
    now: float
    abs_dev: float
    rel_dev: float
    tolerance: Tolerance
    ratio: float  # abs_dev / (atol + rtol |stored|); > 1 fails

    @property
    def failed(self) -> bool:
        return not self.ratio <= 1.0


class CheckResult(NamedTuple):
    name: str
    deviations: list[Deviation]  # one per observable, worst first
    problems: list[str]  # structural failures (times, observables, seeds changed)
    notes: list[str]  # information that is not a failure (initial conditions redrawn differently)

    @property
    def passed(self) -> bool:
        return not self.problems and not any(d.failed for d in self.deviations)


def read_baseline(folder: str | Path) -> Baseline:
    """Read one baseline folder, checking every file; InputError naming the file otherwise."""
    import pandas as pd

    from harness.core import scenario as scenario_lib
    from harness.core.trajectories import observable_names

    folder = Path(folder)
    if not folder.is_dir():
        raise InputError(f"baseline '{folder}' is not a folder (expected {', '.join(BASELINE_FILES)})")
    for required in ("scenario.toml", "theory.parquet", "initial_state.npz"):
        if not (folder / required).is_file():
            raise InputError(f"baseline '{folder}' has no {required}; re-create it with 'harness baseline save'")
    try:
        scenario = scenario_lib.load(folder / "scenario.toml")
    except InputError as error:
        raise InputError(f"baseline '{folder}': {error}") from None
    try:
        frame = pd.read_parquet(folder / "theory.parquet")
    except Exception as error:  # pyarrow raises several types for a damaged file
        raise InputError(f"baseline file '{folder / 'theory.parquet'}' cannot be read: {error}") from None
    columns = ["seed", "t", "observable", "theory"]
    if list(frame.columns) != columns:
        raise InputError(
            f"baseline file '{folder / 'theory.parquet'}': expected columns {', '.join(columns)}, "
            f"got {', '.join(map(str, frame.columns))}"
        )
    seeds = np.unique(frame["seed"].to_numpy())
    t = np.unique(frame["t"].to_numpy(dtype=np.float64))
    observables = list(dict.fromkeys(frame["observable"]))
    expected = observable_names(
        scenario.student.hidden, scenario.teacher.hidden, scenario.student.train_second_layer
    )
    if observables != expected:
        raise InputError(
            f"baseline file '{folder / 'theory.parquet'}': observables {observables} do not match "
            f"the scenario's {expected}"
        )
    if len(frame) != len(seeds) * len(t) * len(observables):
        raise InputError(f"baseline file '{folder / 'theory.parquet'}': expected one row per seed, time and observable")
    frame = frame.sort_values(["seed", "t"], kind="stable")
    index = {name: i for i, name in enumerate(observables)}
    theory = np.full((len(seeds), len(t), len(observables)), np.nan)
    s_pos = np.searchsorted(seeds, frame["seed"].to_numpy())
    t_pos = np.searchsorted(t, frame["t"].to_numpy(dtype=np.float64))
    o_pos = frame["observable"].map(index).to_numpy()
    theory[s_pos, t_pos, o_pos] = frame["theory"].to_numpy(dtype=np.float64)
    try:
        with np.load(folder / "initial_state.npz") as stored:
            leaves = [stored[f"leaf_{i}"] for i in range(len(stored.files))]
    except Exception as error:
        raise InputError(f"baseline file '{folder / 'initial_state.npz'}' cannot be read: {error}") from None
    tolerances = read_tolerances(folder / "tolerances.toml", observables)
    return Baseline(folder.name, folder, scenario, seeds, t, observables, theory, leaves, tolerances)


def check_source(scenario: dict, where: str) -> None:
    source = scenario.theory.source
    if source == "none" or source.startswith("file:"):
        raise InputError(
            f"{where}: theory.source = {source!r} solves nothing; a baseline stores a solver's output "
            "('builtin' or 'python:package.module:function')"
        )


def solve_theory(scenario: dict, start: Any | None = None) -> tuple[np.ndarray, Any, np.ndarray]:
    """``(t, start, values [S, E, O])``: the theory alone, from ``start`` or freshly drawn conditions."""
    from harness.equations.sources import predict
    from harness.sim import simulation
    from harness.sim.initial import initial_state

    t = time_grid.evaluation_steps(scenario) / scenario.data.input_dim
    if start is None:
        sim = simulation.make_simulator(scenario)
        start = initial_state(sim, np.arange(scenario.run.seeds))
    prediction = predict(scenario, start, t)
    return t, start, np.asarray(prediction.values, dtype=np.float64)


def _leaves(start: Any) -> tuple[list[np.ndarray], Any]:
    """The arrays of an InitialState, without its spectrum (derived data, rebuilt on load)."""
    import jax

    leaves, treedef = jax.tree_util.tree_flatten(start._replace(spectrum=None))
    return [np.asarray(leaf) for leaf in leaves], treedef


def _rebuild_start(sim: Any, treedef: Any, leaves: list[np.ndarray]) -> Any:
    """An InitialState from stored arrays, its spectrum recomputed as initial_state does."""
    import jax

    start = jax.tree_util.tree_unflatten(treedef, leaves)
    spectra = sim.model.spectra
    if spectra is not None:
        start = start._replace(spectrum=spectra(start.data_params, start.student_w, start.teacher_w))
    return start


def save_baseline(scenario: dict, directory: str | Path, name: str, *, force: bool = False) -> Path:
    """Solve ``scenario``'s theory and write ``directory/name/`` atomically; returns the folder."""
    import pandas as pd

    from harness.core import scenario as scenario_lib
    from harness.core.files import (
        atomic_write_bytes,
        atomic_write_json,
        atomic_write_parquet,
        atomic_write_text,
        publish_folder,
        staging_folder,
    )
    from harness.core.trajectories import observable_names
    from harness.runner.pipeline import package_versions

    directory = Path(directory)
    final = directory / name
    check_name(name)
    check_source(scenario, f"baseline '{name}'")
    if final.exists() and not force:
        raise InputError(f"baseline '{final}' exists; use --force to replace its reference trajectories")
    # A user's edited tolerances survive a re-save.
    old_tolerances = final / "tolerances.toml"
    kept_tolerances = old_tolerances.read_text(encoding="utf-8") if old_tolerances.is_file() else None

    started = _dt.datetime.now(_dt.UTC)
    t, start, values = solve_theory(scenario)
    names = observable_names(
        scenario.student.hidden, scenario.teacher.hidden, scenario.student.train_second_layer
    )
    if not np.any(np.isfinite(values)):
        raise InputError(f"baseline '{name}': the theory predicted nothing finite; nothing to keep as a reference")
    s, e, o = values.shape
    frame = pd.DataFrame(
        {
            "seed": np.repeat(np.asarray(start.seeds), e * o).astype(np.int64),
            "t": np.tile(np.repeat(t, o), s),
            "observable": np.tile(np.asarray(names, dtype=object), s * e),
            "theory": values.reshape(-1),
        }
    )
    leaves, _ = _leaves(start)
    buffer = io.BytesIO()
    np.savez_compressed(buffer, **{f"leaf_{i}": leaf for i, leaf in enumerate(leaves)})
    manifest = {
        "name": name,
        "created": started.isoformat(timespec="seconds"),
        "command": sys.argv,
        "packages": package_versions(),
        "theory_source": scenario.theory.source,
        "seeds": int(s),
        "evaluations": int(e),
    }
    directory.mkdir(parents=True, exist_ok=True)
    with staging_folder(directory, name) as staging:
        atomic_write_text(staging / "scenario.toml", scenario_lib.to_toml(scenario))
        atomic_write_parquet(staging / "theory.parquet", frame)
        atomic_write_bytes(staging / "initial_state.npz", buffer.getvalue())
        atomic_write_text(staging / "tolerances.toml", kept_tolerances or _tolerance_text(scenario))
        atomic_write_json(staging / "manifest.json", manifest)
        publish_folder(staging, final, replace=force)
    return final


def check_name(name: str) -> None:
    if not name or name.startswith(".") or any(c in name for c in "/\\\0") or name != name.strip():
        raise InputError(f"baseline name {name!r}: must be a plain folder name (no '/', not starting with '.')")


def compare(
    name: str,
    observables: Sequence[str],
    seeds: np.ndarray,
    t: np.ndarray,
    stored: np.ndarray,
    now: np.ndarray,
    tolerances: ToleranceTable,
    builtin: Tolerance,
    override: Tolerance | None = None,
) -> list[Deviation]:
    """Per observable, the point with the largest deviation relative to its tolerance (worst first)."""
    deviations = []
    for index, observable in enumerate(observables):
        tol = tolerances.for_observable(observable, builtin, override)
        a, b = stored[:, :, index], now[:, :, index]
        both_nan = np.isnan(a) & np.isnan(b)
        with np.errstate(invalid="ignore", over="ignore"):
            diff = np.where(both_nan, 0.0, np.abs(b - a))
            diff = np.where(np.isnan(diff), np.inf, diff)  # NaN on one side only: a failure
            allowed = tol.atol + tol.rtol * np.abs(np.nan_to_num(a))
            ratio = np.where(diff == 0, 0.0, diff / np.where(allowed > 0, allowed, np.finfo(float).tiny))
        s, e = np.unravel_index(int(np.argmax(ratio)), ratio.shape)
        stored_value, now_value = float(a[s, e]), float(b[s, e])
        abs_dev = float(diff[s, e])
        with np.errstate(divide="ignore", invalid="ignore"):
            rel_dev = abs_dev / abs(stored_value) if stored_value != 0 else (0.0 if abs_dev == 0 else math.inf)
        deviations.append(
            Deviation(name, observable, int(seeds[s]), float(t[e]), stored_value, now_value, abs_dev,
                      float(rel_dev), tol, float(ratio[s, e]))
        )
    deviations.sort(key=lambda d: -d.ratio if not math.isnan(d.ratio) else -math.inf)
    return deviations


def _ulps(now: Any, stored: Any, dtype: Any) -> float:
    """Largest |now - stored| in units of the spacing of ``dtype`` at the larger magnitude (0 if equal)."""
    now, stored = np.asarray(now, np.float64), np.asarray(stored, np.float64)
    if now.size == 0:
        return 0.0
    difference = np.abs(now - stored)
    spacing = np.spacing(np.maximum(np.abs(now), np.abs(stored)).astype(dtype)).astype(np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        ulps = np.where(difference == 0, 0.0, difference / spacing)
    return float(np.nanmax(np.where(np.isnan(now) & np.isnan(stored), 0.0, ulps)))


def initial_state_notes(sim: Any, drawn: Any, stored: Any) -> list[str]:
    """What changed between the initial state drawn now and the stored one, if anything (module docstring).

    The weights, second layers and data-model parameters are compared at the precision they
    are drawn in (the run's dtype): within :data:`DRAW_ULPS` units in the last place of
    each value they are the same draw. The order parameters Q, R, T are sums over N
    products, so a last-place change in the weights moves a small R (a nearly orthogonal
    student and teacher) by many of its own last places; they are therefore computed anew
    from the *stored* weights and compared with the stored ones, to :data:`DERIVED_RTOL` of
    each seed's largest entry (float64 round-off, whatever order the sums are taken in).
    """
    import jax

    from harness.sim.initial import initial_order_parameters

    dtype = np.dtype(sim.dtype)
    notes = []
    draws = {
        "teacher_w": (drawn.teacher_w, stored.teacher_w),
        "student_w": (drawn.student_w, stored.student_w),
        "teacher_v": (drawn.teacher_v, stored.teacher_v),
        "v": (drawn.order_parameters.v, stored.order_parameters.v),
    }
    for index, (now, then) in enumerate(zip(jax.tree_util.tree_leaves(drawn.data_params),
                                            jax.tree_util.tree_leaves(stored.data_params), strict=True)):
        draws[f"data_params[{index}]"] = (now, then)
    moved = {name: _ulps(now, then, dtype) for name, (now, then) in draws.items()
             if np.asarray(now).dtype.kind == "f"}
    moved.update({name: (0.0 if np.array_equal(now, then) else math.inf) for name, (now, then) in draws.items()
                  if np.asarray(now).dtype.kind != "f"})
    worst = max(moved, key=moved.get, default=None)
    if worst is not None and moved[worst] > DRAW_ULPS:
        notes.append(
            f"the initial weights drawn now differ from the stored ones by up to {moved[worst]:.3g} {dtype.name} "
            f"ulps (in {worst}; same draw: <= {DRAW_ULPS}): the random stream changed; solving from the stored ones"
        )
    recomputed = initial_order_parameters(sim, stored.data_params, stored.student_w, stored.teacher_w)
    worst_rel, where = 0.0, ""
    for name, now, then in zip("QRT", recomputed, stored.order_parameters[:3], strict=True):
        now, then = np.asarray(now, np.float64), np.asarray(then, np.float64)
        scale = np.max(np.abs(then).reshape(len(then), -1), axis=1, initial=0.0).reshape(-1, *[1] * (then.ndim - 1))
        with np.errstate(invalid="ignore", divide="ignore"):
            relative = np.where(now == then, 0.0, np.abs(now - then) / scale)
        if relative.size and float(np.nanmax(relative)) > worst_rel:
            worst_rel, where = float(np.nanmax(relative)), name
    if worst_rel > DERIVED_RTOL:
        notes.append(
            f"the initial order parameters computed now from the stored weights differ from the stored ones by up "
            f"to {worst_rel:.2g} of their largest entry (in {where}): the initial-state code changed; solving from "
            "the stored ones"
        )
    return notes


def check_baseline(baseline: Baseline, override: Tolerance | None = None) -> CheckResult:
    """Re-solve one baseline from its stored initial conditions and compare."""

    from harness.sim import simulation
    from harness.sim.initial import initial_state

    problems: list[str] = []
    notes: list[str] = []
    scenario = baseline.scenario
    sim = simulation.make_simulator(scenario)
    drawn = initial_state(sim, np.arange(scenario.run.seeds))
    drawn_leaves, treedef = _leaves(drawn)
    shapes_now = [leaf.shape for leaf in drawn_leaves]
    shapes_stored = [leaf.shape for leaf in baseline.start_leaves]
    if shapes_now != shapes_stored:
        problems.append(
            f"the initial state has a different layout now ({len(shapes_now)} arrays {shapes_now}) than when "
            f"the baseline was saved ({len(shapes_stored)} arrays {shapes_stored}); re-save it deliberately"
        )
        return CheckResult(baseline.name, [], problems, notes)
    start = _rebuild_start(sim, treedef, baseline.start_leaves)
    notes += initial_state_notes(sim, drawn, start)
    t, _, now = solve_theory(scenario, start)
    if len(t) != len(baseline.t) or not np.allclose(t, baseline.t, rtol=TIME_MATCH_RTOL, atol=0.0):
        problems.append(
            f"evaluation times changed: {len(baseline.t)} stored in [{baseline.t[0]:g}, {baseline.t[-1]:g}], "
            f"{len(t)} now in [{t[0]:g}, {t[-1]:g}]"
        )
        return CheckResult(baseline.name, [], problems, notes)
    if now.shape != baseline.theory.shape:
        problems.append(f"the theory returned shape {now.shape}, the baseline holds {baseline.theory.shape}")
        return CheckResult(baseline.name, [], problems, notes)
    deviations = compare(
        baseline.name, baseline.observables, baseline.seeds, baseline.t, baseline.theory, now,
        baseline.tolerances, builtin_tolerance(scenario), override,
    )
    return CheckResult(baseline.name, deviations, problems, notes)


# ----------------------------------------------------------------------- many baselines


def find_baselines(path: str | Path) -> list[Path]:
    """One baseline folder, or every baseline folder directly inside ``path`` (sorted)."""
    path = Path(path)
    if not path.exists():
        raise InputError(f"baseline folder '{path}' does not exist (create baselines with 'harness baseline save')")
    if not path.is_dir():
        raise InputError(f"baseline folder '{path}' is not a folder")
    if (path / "scenario.toml").is_file():
        return [path]
    folders = sorted(p for p in path.iterdir() if p.is_dir() and not p.name.startswith("."))
    if not folders:
        raise InputError(f"baseline folder '{path}' holds no baselines (create them with 'harness baseline save')")
    return folders


def check_baselines(
    path: str | Path, *, override: Tolerance | None = None, log: Any = None
) -> list[CheckResult]:
    """Read (and check the form of) every baseline first, then re-solve and compare each."""
    baselines = [read_baseline(folder) for folder in find_baselines(path)]
    results = []
    for index, baseline in enumerate(baselines, start=1):
        if log is not None:
            log.write(f"check: {index}/{len(baselines)} {baseline.name}\n")
            log.flush()
        results.append(check_baseline(baseline, override))
    return results


def _format_number(value: float) -> str:
    return f"{value:.6g}" if math.isfinite(value) else str(value)


def format_report(results: Sequence[CheckResult], *, limit: int = SHOWN_DEVIATIONS) -> str:
    """A table of the worst deviations (all failures, then the closest passes) and a line per baseline."""
    lines = []
    every = sorted((d for r in results for d in r.deviations if d.ratio > 0), key=lambda d: -d.ratio)
    failing = [d for d in every if d.failed]
    shown = failing + [d for d in every if not d.failed][: max(0, limit - len(failing))]
    if shown:
        header = (
            f"{'baseline':<26} {'observable':<14} {'seed':>4} {'t':>10} {'stored':>14} {'now':>14} "
            f"{'abs dev':>10} {'rel dev':>10} {'dev/tol':>8}"
        )
        lines += ["worst deviations (dev/tol > 1 fails; tol = atol + rtol |stored|):", header]
        for d in shown:
            lines.append(
                f"{d.baseline:<26} {d.observable:<14} {d.seed:>4} {d.t:>10.4g} {_format_number(d.stored):>14} "
                f"{_format_number(d.now):>14} {d.abs_dev:>10.3g} {d.rel_dev:>10.3g} {d.ratio:>8.3g}"
                + ("  FAIL" if d.failed else "")
            )
    if not shown and any(r.deviations for r in results):
        lines.append("every re-solved value equals its stored value exactly")
    for r in results:
        count = sum(d.failed for d in r.deviations)
        if r.passed:
            lines.append(f"ok      {r.name}")
        else:
            what = "; ".join(r.problems) if r.problems else f"{count} observable(s) beyond tolerance"
            lines.append(f"FAILED  {r.name}: {what}")
        lines.extend(f"        note: {note}" for note in r.notes)
    passed = sum(r.passed for r in results)
    lines.append(f"{passed} of {len(results)} baseline(s) match")
    return "\n".join(lines)


def assert_matches_baseline(
    path: str | Path, *, rtol: float | None = None, atol: float | None = None
) -> list[CheckResult]:
    """pytest helper: re-solve the baseline(s) at ``path`` and fail with the worst deviations.

    ``path`` is one baseline folder or a folder of baselines. ``rtol``/``atol`` replace the
    baselines' default tolerances (per-observable entries in tolerances.toml still apply).
    The AssertionError names, for every observable that moved too far, the seed and time
    of its worst point with the stored and the new value.
    """
    override = Tolerance(rtol, atol) if (rtol is not None or atol is not None) else None
    results = check_baselines(path, override=override)
    failed = [r for r in results if not r.passed]
    if failed:
        parts = []
        for r in failed:
            parts.extend(f"{r.name}: {problem}" for problem in r.problems)
            for d in r.deviations:
                if d.failed:
                    parts.append(
                        f"{r.name}: {d.observable} at t = {d.t:.6g} (seed {d.seed}) moved from "
                        f"{_format_number(d.stored)} to {_format_number(d.now)} (abs {d.abs_dev:.3g}, rel "
                        f"{d.rel_dev:.3g}; allowed {d.tolerance.atol:.3g} + {d.tolerance.rtol:.3g} |stored|)"
                    )
        raise AssertionError("theory trajectories moved away from their baselines:\n  " + "\n  ".join(parts))
    return results

"""Theories the user brings: a Python function, or a precomputed trajectory file.

``[theory] source = "python:package.module:function"``
    The function is called once per run as ``function(scenario, start, times)`` with

    * ``scenario``: the resolved scenario (a nested ``dict``, every default filled in; a
      copy, so changing it has no effect);
    * ``start``: :class:`harness.equations.sources.InitialState`, every seed's initial
      conditions in float64 with a leading seed axis S: ``start.order_parameters`` holds
      ``Q [S, K, K]``, ``R [S, K, M]``, ``T [S, M, M]`` and ``v [S, K]`` (docs/equations.md, section 2),
      ``start.teacher_v [S, M]``, the weights ``start.student_w [S, K, N]`` and
      ``start.teacher_w [S, M, D]``, the data model's per-seed parameters
      ``start.data_params`` (e.g. the feature matrix of a latent model) and the optional
      ``start.spectrum`` (latent models: the eigen-decomposition of Omega and the weights'
      projections on it, when the data model provides them; ``None`` otherwise);
    * ``times``: the evaluation times t = steps / N, a float64 array ``[E]`` starting at 0.

    It returns a ``dict`` mapping observable names (``"test_error"``, ``"overlap_error"``,
    ``"Q[i,j]"``, ``"R[i,m]"``, ``"T[m,n]"``, ``"v[k]"``: see
    :func:`harness.core.trajectories.observable_names`) to arrays, for any subset of the
    observables. Each array is either

    * ``[S, E]``: one prediction per seed, started from that seed's initial conditions;
      the comparison is *paired* (z from the spread of the per-seed differences), or
    * ``[E]``: a single mean curve; the comparison is then *unpaired* (z uses the SEM of
      the simulation). One mean curve makes the whole run unpaired: every per-seed array
      is then compared through its mean over seeds.

    Observables left out are recorded as NaN (not compared). Values must be finite;
    a diffrax solve that fails inside the function returns NaN rather than raising (the
    harness sets ``EQX_ON_ERROR=nan``, see harness/__init__.py) and is reported as such.
    The module is imported normally; the working directory is searched after the
    installed packages, so ``python:examples.weight_decay_theory:predict`` works from the
    repository root.

``[theory] source = "file:PATH"``
    A CSV (``.csv``) or Parquet (``.parquet``, ``.pq``) table with a column ``t`` and one
    column per observable (same names as above; any subset). ``t`` must be strictly
    increasing, start at 0 or before the run does, and reach the run's final time. Values
    are interpolated onto the evaluation times monotonically in log t (PCHIP on
    log t, :class:`scipy.interpolate.PchipInterpolator`); log t is undefined at t = 0, so
    between a row at t = 0 and the first positive time the interpolation is linear in t.
    The file holds one mean curve: the comparison is unpaired. A relative PATH is relative
    to the folder of the scenario file it is written in (``harness.core.scenario.load`` makes it
    absolute); for scenarios built in code, to the working directory.

Every problem (a module that cannot be imported, a missing function, a function that
raises or returns the wrong thing, a bad file) is a one-line :class:`InputError` naming
the function or file and what was expected. Sources are checked when the scenario is
resolved (import, callable, readable well-formed file) so that nothing runs in vain.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from scipy.interpolate import PchipInterpolator

from harness.core.errors import InputError
from harness.core.scenario import Scenario, ScenarioError
from harness.core.trajectories import observable_names
from harness.core.user_code import describe_error, load_user_callable
from harness.equations.sources import InitialState, Prediction, register_source

FILE_SUFFIXES = {".csv": "CSV", ".parquet": "Parquet", ".pq": "Parquet"}
TIME_TOLERANCE = 1e-9
"""Relative slack when checking that a file's times cover the run (rounding of t = steps / N)."""


# ------------------------------------------------------------------ user Python code


def describe_observables(scenario: Scenario) -> str:
    """The observable names of a scenario as patterns with index ranges, for error messages."""
    k, m = scenario.student.hidden, scenario.teacher.hidden
    text = f"test_error, overlap_error, Q[i,j] (i,j < {k}), R[i,m] (i < {k}, m < {m}), T[m,n] (m,n < {m})"
    if scenario.student.train_second_layer:
        text += f", v[k] (k < {k})"
    return text


def _names_of(scenario: Scenario) -> list[str]:
    return observable_names(
        scenario.student.hidden, scenario.teacher.hidden, scenario.student.train_second_layer
    )


def python_theory(scenario: Scenario, start: InitialState, times: np.ndarray) -> Prediction:
    """Call the user's theory function named by ``theory.source`` and arrange its answer."""
    spec = scenario.theory.source
    function = load_user_callable(spec, "theory.source", "function")
    return call_theory(function, scenario, start, times, f"theory function '{spec[len('python:'):]}'")


def call_theory(function: Callable[..., Any], scenario: Scenario, start: InitialState, times: np.ndarray,
                label: str) -> Prediction:
    """Call a theory function ``function(scenario, start, times)`` and lay out its answer.

    The answer is a :class:`Prediction` or a mapping ``{observable: [S, E] or [E]}``
    (:func:`arrange_prediction`); an exception it raises becomes a one-line InputError.
    """
    times = np.array(times, dtype=np.float64)
    try:
        answer = function(scenario, start, times.copy())
    except Exception as error:
        raise InputError(f"{label} raised {describe_error(error)}") from None
    if isinstance(answer, Prediction):
        return answer
    return arrange_prediction(scenario, answer, len(start.seeds), times, label)


def arrange_prediction(
    scenario: Scenario, answer: Any, seeds: int, times: np.ndarray, label: str
) -> Prediction:
    """Check a user theory's ``{observable: [S, E] or [E]}`` and lay it out as ``[S, E, O]``."""
    names = _names_of(scenario)
    e = len(times)
    expected = f"a dict {{observable: array [S, E] = [{seeds}, {e}] or [E] = [{e}]}}"
    if not isinstance(answer, Mapping):
        raise InputError(f"{label} returned a {type(answer).__name__}, expected {expected}")
    if not answer:
        raise InputError(f"{label} returned an empty dict, expected {expected} with at least one observable")
    values = np.full((seeds, e, len(names)), np.nan)
    paired = True
    for name, raw in answer.items():
        if name not in names:
            raise InputError(
                f"{label} returned unknown observable {name!r}; known for this scenario: "
                + describe_observables(scenario)
            )
        try:
            array = np.asarray(raw, dtype=np.float64)
        except (TypeError, ValueError):
            raise InputError(
                f"{label} returned a non-numeric value for {name!r}, expected an array [S, E] or [E]"
            ) from None
        if array.shape == (e,):
            paired = False
            array = np.broadcast_to(array, (seeds, e))
        elif array.shape != (seeds, e):
            raise InputError(
                f"{label} returned shape {tuple(array.shape)} for {name!r}, "
                f"expected [S, E] = [{seeds}, {e}] or [E] = [{e}]"
            )
        bad = ~np.isfinite(array)
        if bad.any():
            seed, when = np.argwhere(bad)[0]
            raise InputError(
                f"{label} returned a non-finite value ({array[seed, when]}) for {name!r} "
                f"at t = {times[when]:g} (seed position {seed}); every value must be finite"
            )
        values[:, :, names.index(name)] = array
    return Prediction(values, paired=paired)


# ----------------------------------------------------------------- trajectory files


def file_path(scenario: Scenario) -> Path:
    """The path a ``file:PATH`` source names (relative paths: the working directory)."""
    return Path(scenario.theory.source[len("file:"):])


def read_theory_file(path: Path, scenario: Scenario) -> tuple[np.ndarray, dict[str, np.ndarray]]:
    """Read and check a trajectory file: ``(t [R], {observable: values [R]})``.

    Every check the issue lists is made here with a one-line message naming the file:
    missing file, unsupported format, no ``t`` column, unknown or no observable columns,
    non-numeric / NaN / infinite values, t not strictly increasing, and a time range that
    does not cover ``[0, final time]`` of the run.
    """
    where = f"theory file {str(path)!r}"  # repr: a path never breaks the one-line message
    suffix = path.suffix.lower()
    if suffix not in FILE_SUFFIXES:
        raise InputError(f"{where}: unsupported format {suffix or '(no suffix)'!r}; expected .csv, .parquet or .pq")
    if not path.exists():
        raise InputError(f"{where} does not exist")
    if not path.is_file():
        raise InputError(f"{where} is not a file")
    try:
        table = pd.read_csv(path) if suffix == ".csv" else pd.read_parquet(path)
    except Exception as error:  # pandas / pyarrow raise many types for malformed files
        raise InputError(f"{where} cannot be read as {FILE_SUFFIXES[suffix]}: {describe_error(error)}") from None
    columns = [str(c).strip() for c in table.columns]
    table.columns = columns
    if "t" not in columns:
        raise InputError(f"{where} has no column 't'; expected a column 't' and one column per observable")
    if len(set(columns)) != len(columns):
        raise InputError(f"{where} has repeated column names")
    known = _names_of(scenario)
    unknown = [c for c in columns if c != "t" and c not in known]
    if unknown:
        raise InputError(
            f"{where}: column {unknown[0]!r} is not an observable of this scenario; known: "
            + describe_observables(scenario)
        )
    observables = [c for c in columns if c != "t"]
    if not observables:
        raise InputError(f"{where} has no observable column besides 't'; expected some of: "
                         + describe_observables(scenario))
    if len(table) < 2:
        raise InputError(f"{where} has {len(table)} row(s); at least two times are needed to interpolate")
    data = {}
    for column in columns:
        try:
            numbers = pd.to_numeric(table[column], errors="raise").to_numpy(dtype=np.float64)
        except (TypeError, ValueError):
            raise InputError(f"{where}: column {column!r} is not numeric") from None
        bad = ~np.isfinite(numbers)
        if bad.any():
            row = int(np.argmax(bad))
            raise InputError(
                f"{where}: column {column!r} has a NaN or infinite value at row {row}; every value must be finite"
            )
        data[column] = numbers
    t = data.pop("t")
    if t[0] < 0:
        raise InputError(f"{where}: t must be >= 0, got t = {t[0]:g} in row 0")
    steps = np.diff(t)
    if np.any(steps <= 0):
        row = int(np.argmax(steps <= 0)) + 1
        raise InputError(f"{where}: t must be strictly increasing, but row {row} has t = {t[row]:g} "
                         f"after t = {t[row - 1]:g}")
    end = _final_time(scenario)
    if t[0] > 0 or t[-1] < end * (1 - TIME_TOLERANCE):
        raise InputError(
            f"{where}: t covers [{t[0]:g}, {t[-1]:g}] but the run needs [0, {end:g}] "
            "(a row at t = 0 and one at or after the final time)"
        )
    return t, data


def _final_time(scenario: Scenario) -> float:
    from harness.core.times import total_steps

    return total_steps(scenario) / scenario.data.input_dim


def interpolate_log_time(t: np.ndarray, values: np.ndarray, times: np.ndarray) -> np.ndarray:
    """Monotone interpolation of ``values(t)`` onto ``times``, in log t.

    PCHIP (a monotone piecewise-cubic Hermite interpolant: it never overshoots the data
    between two knots) on (log t, values) for the knots with t > 0; between t = 0 and the
    first positive knot, where log t is undefined, linear in t. ``times`` must lie within
    ``[t[0], t[-1]]`` up to rounding (they are clipped).
    """
    times = np.clip(np.asarray(times, np.float64), t[0], t[-1])
    out = np.empty_like(times)
    positive = t > 0
    tp, vp = t[positive], values[positive]
    late = times >= tp[0]
    if len(tp) >= 2:
        out[late] = PchipInterpolator(np.log(tp), vp)(np.log(times[late]))
    else:  # the only positive knot is the last one, reached exactly
        out[late] = vp[0]
    early = ~late  # only possible when the file has a row at t = 0
    if early.any():
        out[early] = np.interp(times[early], [t[0], tp[0]], [values[0], vp[0]])
    return out


def file_theory(scenario: Scenario, start: InitialState, times: np.ndarray) -> Prediction:
    """A precomputed mean trajectory, interpolated onto the evaluation times (unpaired)."""
    names = _names_of(scenario)
    t, data = read_theory_file(file_path(scenario), scenario)
    values = np.full((len(start.seeds), len(times), len(names)), np.nan)
    for name, column in data.items():
        values[:, :, names.index(name)] = interpolate_log_time(t, column, times)[None, :]
    return Prediction(values, paired=False)


# -------------------------------------------------------------------- entry points


def check_python_source(scenario: Scenario) -> None:
    """Before any work: the ``python:`` theory function imports."""
    load_user_callable(scenario.theory.source, "theory.source", "function")


def check_file_source(scenario: Scenario) -> None:
    """Before any work: the ``file:`` theory can be read and covers the run's times."""
    if not scenario.theory.source[len("file:"):].strip():
        raise ScenarioError("scenario key 'theory.source': expected 'file:PATH' with a path, got 'file:'")
    try:
        read_theory_file(file_path(scenario), scenario)
    except InputError as error:
        raise ScenarioError(f"scenario key 'theory.source': {error}") from None


def register_theory(name: str, theory: Callable[..., Any]) -> None:
    """Make a theory function available as ``theory.source = name``.

    Args:
        name: the name scenarios use (not "builtin", "none", or one starting "python:" / "file:").
        theory: ``theory(scenario, start, times)`` returning a ``{observable: [S, E] or [E]}``
            mapping or a :class:`~harness.equations.sources.Prediction` (as a ``python:`` theory).
    """
    if name in ("builtin", "none") or ":" in name or not name.strip():
        raise ValueError(f"theory name {name!r}: must be a plain name, not 'builtin', 'none' or contain ':'")
    register_source(name, lambda scenario, start, times: call_theory(theory, scenario, start, times,
                                                                      f"theory '{name}'"))


register_source("python:", python_theory, check=check_python_source)
register_source("file:", file_theory, check=check_file_source)

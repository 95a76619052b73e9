"""Data models the user brings: ``[data] kind = "python:package.module:factory"``.

The protocol. The factory is called as ``factory(scenario, dtype)`` with the resolved
scenario (a copy) and the simulation's floating-point type (``jnp.float32`` or
``jnp.float64``), and returns either a :class:`UserData` or just its sampler:

* ``sample(key, n) -> (x, c)``: ``n`` fresh i.i.d. samples from a ``jax.random`` key, ``x``
  of shape ``[n, N]`` (N = ``data.input_dim``) fed to the student and ``c`` of shape
  ``[n, D]`` fed to the teacher, which draws its weights as usual (``teacher.*`` keys),
  labels y = sum_m vt_m g(wt_m . c / sqrt(D)) (+ ``teacher.noise_std`` noise);
* with ``UserData(..., labels=True)``: ``sample(key, n) -> (x, y)``, ``y`` of shape ``[n]``
  the labels themselves. There is then no teacher: R, T and the overlap error (the
  Gaussian formula needs R and T) are undefined and reported as NaN (a warning says so);
  ``test_error`` is measured against the given labels (``teacher.noise_std`` is still
  added to training labels; leave it 0 unless intended), and Q is measured as usual.

The sampler must be a pure JAX function (it is traced, vmapped and jit-compiled; use
``key`` for every random draw, with explicit dtypes) and may close over a fixed data
instance (cluster centres, a feature matrix, ...) that the factory draws, e.g. from
``scenario.run.seed``. That instance is shared by every seed.

Optionally ``UserData(omega=..., phi=..., latent_cov=...)`` gives Omega = E[x x^T]
``[N, N]``, Phi = E[x c^T] ``[N, D]`` and C = E[c c^T] ``[D, D]``, which define the order
parameters as the covariance of the local fields (lambda, nu) (docs/equations.md, section 2):
Q = w Omega w^T / N, R = w Phi wt^T / sqrt(N D), T = wt C wt^T / D. docs/equations.md takes
c ~ N(0, I_D), i.e. C = I (pass ``latent_cov=np.eye(D)``); when the teacher acts on x
itself (c = x), Phi = C = Omega. Whatever is not given is estimated once by Monte Carlo
from :data:`MOMENT_SAMPLES` samples (a warning says so; the order parameters then carry
a relative error of order sqrt(2 / MOMENT_SAMPLES), ~1%).

There is no built-in theory for user data: set ``theory.source`` to ``"none"``, a
``python:`` theory or a ``file:`` trajectory. Problems are one-line :class:`InputError`
naming the factory and what was expected.
"""

from __future__ import annotations

import copy
import math
import warnings
from collections.abc import Callable
from typing import Any, NamedTuple

import jax
import jax.numpy as jnp
import numpy as np

from harness.core.errors import InputError
from harness.core.scenario import Scenario, ScenarioError, run_id
from harness.core.user_code import describe_error, load_user_callable
from harness.data.model import DataModel, register_data_kind

Array = jax.Array

MOMENT_SAMPLES = 20_000
"""Samples used to estimate Omega and Phi when the factory does not give them."""
MOMENT_CHUNK = 1_000
"""Samples drawn at a time while estimating Omega and Phi (bounds memory)."""
MOMENT_KEY_INDEX = 2**31 - 2
"""fold_in index, on PRNGKey(run.seed), of the key for the Monte Carlo estimate of Omega, Phi."""


class UserData(NamedTuple):
    """What a user's data factory returns (see the module docstring)."""

    sample: Callable[[Array, int], tuple[Array, Array]]
    labels: bool = False  # True: sample returns (x [n, N], y [n]) and there is no teacher
    omega: Any = None  # [N, N] E[x x^T], or None to estimate
    phi: Any = None  # [N, D] E[x c^T], or None to estimate (meaningless with labels=True)
    latent_cov: Any = None  # [D, D] E[c c^T] (identity in docs/equations.md), or None to estimate


def check_data_kind(scenario: Scenario) -> None:
    """Before any work: the factory imports, and the theory source can work with user data."""
    kind = scenario.data.kind
    load_user_callable(kind, "data.kind", "factory")
    if scenario.theory.source == "builtin":
        raise ScenarioError(
            f"scenario key 'theory.source': there is no built-in theory for data.kind = {kind!r}; "
            "use 'none', 'python:package.module:function' or 'file:PATH'"
        )


_CACHE: dict[tuple[str, str], DataModel] = {}
_CACHE_SIZE = 2
"""Built models kept: a run builds its data model twice (simulation, then the theory's initial
state); caching calls the factory, and estimates moments, once. Small: models may hold N x N arrays."""


def build_user_data_model(scenario: Scenario, dtype: Any) -> DataModel:
    """Adapt the user's factory into a :class:`~harness.data.model.DataModel` (cached per scenario)."""
    cache_key = (run_id(scenario), jnp.dtype(dtype).name)
    if cache_key not in _CACHE:
        if len(_CACHE) >= _CACHE_SIZE:
            _CACHE.pop(next(iter(_CACHE)))
        _CACHE[cache_key] = _build(scenario, dtype)
    return _CACHE[cache_key]


def _build(scenario: Scenario, dtype: Any) -> DataModel:
    kind = scenario.data.kind
    label = f"data factory '{kind[len('python:'):]}'"
    factory = load_user_callable(kind, "data.kind", "factory")
    try:
        made = factory(copy.deepcopy(scenario), dtype)
    except Exception as error:
        raise InputError(f"{label} raised {describe_error(error)}") from None
    if isinstance(made, UserData):
        data = made
    elif callable(made):
        data = UserData(made)
    else:
        raise InputError(
            f"{label} returned a {type(made).__name__}, expected harness.data.user.UserData "
            "or a sampler sample(key, n) -> (x, c)"
        )
    n = scenario.data.input_dim
    teacher_dim = _check_sampler(data, n, dtype, label)
    omega, phi, latent_cov = _moments(scenario, data, n, teacher_dim, label)
    return _data_model(kind, data, n, teacher_dim, dtype, omega, phi, latent_cov)


def _check_sampler(data: UserData, n: int, dtype: Any, label: str) -> int:
    """Trace the sampler abstractly (no computation) and check what it returns; gives D."""
    if not callable(data.sample):
        raise InputError(f"{label}: UserData.sample is a {type(data.sample).__name__}, expected a function")
    probe = 3
    second = "y [n]" if data.labels else "c [n, D]"
    expected = f"a pair (x [n, {n}], {second}) of floating-point arrays"
    try:
        shapes = jax.eval_shape(lambda key: data.sample(key, probe), jax.random.PRNGKey(0))
    except Exception as error:
        raise InputError(f"{label}: its sampler raised {describe_error(error)} for sample(key, {probe})") from None
    if not (isinstance(shapes, tuple) and len(shapes) == 2 and all(hasattr(a, "shape") for a in shapes)):
        raise InputError(f"{label}: its sampler returned {type(shapes).__name__}, expected {expected}")
    x, second_part = shapes
    if not all(jnp.issubdtype(a.dtype, jnp.floating) for a in shapes):
        raise InputError(f"{label}: its sampler returned dtypes {x.dtype}, {second_part.dtype}, expected {expected}")
    if x.shape != (probe, n):
        raise InputError(f"{label}: its sampler returned x of shape {x.shape} for n = {probe}, expected {expected}")
    if data.labels:
        if second_part.shape != (probe,):
            raise InputError(
                f"{label}: its sampler returned labels of shape {second_part.shape} for n = {probe}, "
                f"expected {expected}"
            )
        return 1
    if len(second_part.shape) != 2 or second_part.shape[0] != probe or second_part.shape[1] < 1:
        raise InputError(
            f"{label}: its sampler returned c of shape {second_part.shape} for n = {probe}, expected {expected}"
        )
    return int(second_part.shape[1])


def _given_matrix(value: Any, shape: tuple[int, int], name: str, label: str) -> np.ndarray:
    try:
        matrix = np.asarray(value, dtype=np.float64)
    except (TypeError, ValueError):
        raise InputError(f"{label}: UserData.{name} is not a numeric array, expected shape {shape}") from None
    if matrix.shape != shape:
        raise InputError(f"{label}: UserData.{name} has shape {matrix.shape}, expected {shape}")
    if not np.all(np.isfinite(matrix)):
        raise InputError(f"{label}: UserData.{name} has NaN or infinite entries")
    return matrix


def _moments(
    scenario: Scenario, data: UserData, n: int, d: int, label: str
) -> tuple[np.ndarray, np.ndarray | None, np.ndarray | None]:
    """Omega [N, N], Phi [N, D], C [D, D] (the last two None with labels): given, or estimated."""
    if data.labels and (data.phi is not None or data.latent_cov is not None):
        raise InputError(f"{label}: UserData.phi / latent_cov were given but labels=True (there is no teacher input c)")
    given = {}
    for name, value, shape in (("omega", data.omega, (n, n)), ("phi", data.phi, (n, d)),
                               ("latent_cov", data.latent_cov, (d, d))):
        if value is not None:
            given[name] = _given_matrix(value, shape, name, label)
    for name in ("omega", "latent_cov"):
        if name in given and not np.allclose(given[name], given[name].T, rtol=1e-6, atol=1e-9):
            raise InputError(f"{label}: UserData.{name} is not symmetric; a second-moment matrix must be")
    wanted = ("omega",) if data.labels else ("omega", "phi", "latent_cov")
    missing = [name for name in wanted if name not in given]
    if missing:
        key = jax.random.fold_in(jax.random.PRNGKey(scenario.run.seed), MOMENT_KEY_INDEX)
        estimated = estimate_moments(data.sample, key, n, d, labels=data.labels)
        for name in missing:
            given[name] = estimated[name]
        warnings.warn(
            f"data.kind = {scenario['data']['kind']!r} gives no {', '.join(missing)}: estimated from "
            f"{MOMENT_SAMPLES} samples, so the order parameters carry ~{100 * math.sqrt(2 / MOMENT_SAMPLES):.0f}% "
            "relative error; return them from the factory (UserData fields) for exact values",
            UserWarning,
            stacklevel=2,
        )
    if data.labels:
        warnings.warn(
            f"data.kind = {scenario['data']['kind']!r} gives labels directly: there is no teacher, so R, T "
            "and overlap_error are reported as NaN",
            UserWarning,
            stacklevel=2,
        )
    return given["omega"], given.get("phi"), given.get("latent_cov")


def estimate_moments(
    sample: Callable[[Array, int], tuple[Array, Array]], key: Array, n: int, d: int, *, labels: bool = False
) -> dict[str, np.ndarray]:
    """Monte Carlo E[x x^T], E[x c^T], E[c c^T] from :data:`MOMENT_SAMPLES` samples, in float64.

    Keys ``omega``, ``phi``, ``latent_cov`` (only ``omega`` with ``labels``).
    """
    chunks = MOMENT_SAMPLES // MOMENT_CHUNK
    width = 0 if labels else d

    def accumulate(total: tuple[Array, ...], chunk_key: Array) -> tuple[tuple[Array, ...], None]:
        x, c = sample(chunk_key, MOMENT_CHUNK)
        x = x.astype(jnp.float64)
        c = jnp.zeros((MOMENT_CHUNK, 0), jnp.float64) if labels else c.astype(jnp.float64)
        return (total[0] + x.T @ x, total[1] + x.T @ c, total[2] + c.T @ c), None

    zeros = tuple(jnp.zeros(shape, jnp.float64) for shape in ((n, n), (n, width), (width, width)))
    sums, _ = jax.jit(lambda keys: jax.lax.scan(accumulate, zeros, keys))(jax.random.split(key, chunks))
    xx, xc, cc = (np.asarray(m) / (chunks * MOMENT_CHUNK) for m in sums)
    symmetric = lambda m: 0.5 * (m + m.T)  # noqa: E731
    if labels:
        return {"omega": symmetric(xx)}
    return {"omega": symmetric(xx), "phi": xc, "latent_cov": symmetric(cc)}


def _data_model(
    kind: str, data: UserData, n: int, d: int, dtype: Any,
    omega: np.ndarray, phi: np.ndarray | None, latent_cov: np.ndarray | None,
) -> DataModel:
    user_sample = data.sample
    labels = data.labels

    def init(key: Array) -> tuple[()]:
        del key
        return ()  # one data instance for every seed, closed over by the sampler

    def sample(params: Any, key: Array, count: int) -> tuple[Array, Array]:
        del params
        x, second = user_sample(key, count)
        c = second[:, None] if labels else second  # labels travel as a one-column c
        return jnp.asarray(x, dtype), jnp.asarray(c, dtype)

    def order_parameters(params: Any, w: Array, wt: Array) -> tuple[Array, Array, Array]:
        """Notes, section 2, with the data's Omega and Phi; R, T are NaN without a teacher."""
        del params
        q = w @ jnp.asarray(omega, w.dtype) @ w.T / n
        if labels:
            nan = jnp.asarray(jnp.nan, w.dtype)
            return q, jnp.full((w.shape[0], wt.shape[0]), nan), jnp.full((wt.shape[0], wt.shape[0]), nan)
        r = w @ jnp.asarray(phi, w.dtype) @ wt.T / math.sqrt(n * d)
        return q, r, wt @ jnp.asarray(latent_cov, wt.dtype) @ wt.T / d

    return DataModel(kind, n, d, init, sample, order_parameters, labels_given=labels)



register_data_kind("python:", build_user_data_model, check=check_data_kind)

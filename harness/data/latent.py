"""Latent-variable data models: x = G(c) - E G(c) with c ~ N(0, I_D); the teacher acts on c.

Kinds (docs/equations.md, sections 1 and 5):

* ``latent``: one layer, G(c) = f(F^T c / sqrt(D)) with F a D x N matrix of i.i.d.
  N(0, 1) entries drawn per seed (the hidden-manifold model), f = ``data.feature_map``.
  Omega and Phi are exact: closed forms for sign, erf, relu and linear, Gauss-Hermite
  quadrature for any other map (:func:`harness.data.feature_covariance.single_layer_moments`).
* ``deep_latent``: a random multi-layer generator with widths [D, *data.layers, N],
  i.i.d. N(0, 1) weights drawn per seed, ``data.layer_activations`` after each layer
  (empty: ``data.feature_map`` everywhere). Omega and Phi by Monte Carlo with
  ``data.moment_samples`` samples; the standard error goes to the run manifest.
* ``trained_latent``: the decoder of a generator trained by the tool on the bundled
  handwritten digits (:mod:`harness.data.trained_generator`; ``harness generator train``),
  named by ``data.generator`` and read from the generator store (``$HARNESS_GENERATORS``
  or the user cache). The same generator serves every seed; D is its latent dimension
  and ``data.input_dim`` must be its number of pixels. The pixels are centred and scaled
  by one number so that tr(Omega) / N = 1; Omega and Phi by Monte Carlo (one estimate,
  shared by every seed).

D is ``data.latent_dim``, 0 meaning N // 2. Weights are drawn from the seed's data key,
so ``run.shared_teacher`` shares them between seeds together with the teacher.

Per-seed parameters (:class:`LatentParams`) hold the generator weights in the simulation
dtype (what the samples are made from), the mean E G(c) that centres the inputs, and
Omega [N, N] and Phi [N, D] in float64, computed from the very weights the simulation
uses (cast to float64). The moments are not computed in JAX: ``init`` draws the weights
inside the compiled, seed-vmapped initialisation and hands them to the float64 numpy
routines of :mod:`harness.data.feature_covariance` through a host callback
(``jax.pure_callback``, one call per seed). A run draws its initial weights twice (for the
simulation and for the theory), so moments that are expensive to compute (quadrature,
Monte Carlo) are cached by a digest of the weights.

Sampling stays a pure JAX function: x = G(c) - mean, drawn a block at a time by the
simulator like the Gaussian model's inputs; for ``latent`` a sample costs one
[n, D] x [D, N] matrix product and N evaluations of f.
"""

from __future__ import annotations

import hashlib
import math
from collections import OrderedDict
from collections.abc import Callable, Sequence
from typing import Any, NamedTuple

import jax
import jax.numpy as jnp
import numpy as np

from harness.core import keys as k
from harness.core import threefry
from harness.core.activations import ACTIVATIONS
from harness.core.keys import Key
from harness.core.scenario import Scenario, ScenarioError
from harness.data import feature_covariance
from harness.data.model import DataModel, register_data_kind

Array = jax.Array

LATENT_KINDS: tuple[str, ...] = ("latent", "deep_latent", "trained_latent")
"""Data kinds whose inputs are made from latent Gaussian variables."""

MOMENT_CACHE_BYTES = 512 * 2**20
"""Upper bound on the float64 moments kept by the cache of expensive moments."""

_SINGLE_OR_DEEP = ("data.kind", ("latent", "deep_latent"))
KEYS: dict[str, Key] = {
    "latent_dim": Key("int", 0, "D, latent dimension of latent kinds (0: input_dim // 2)", k.non_negative_int,
                      only_with=_SINGLE_OR_DEEP),
    "feature_map": Key("str", "sign", "f in x = f(F^T c / sqrt(D)) - E f (latent kinds)", k.one_of(*ACTIVATIONS),
                       only_with=_SINGLE_OR_DEEP),
    "layers": Key("int_list", [], "hidden widths of the deep_latent generator, latent side first", k.positive_list,
                  only_with=("data.kind", ("deep_latent",))),
    "layer_activations": Key("str_list", [], "deep_latent: activation after each layer, len(layers) + 1 names "
                             "(empty: feature_map everywhere)", k.names_from(tuple(ACTIVATIONS)),
                             only_with=("data.kind", ("deep_latent",))),
    "moment_samples": Key("int", 100000, "Monte Carlo samples for Omega and Phi (deep_latent, trained_latent)",
                          k.at_least(1000), only_with=("data.kind", ("deep_latent", "trained_latent"))),
    "generator": Key("str", "digits", "trained_latent: name of a generator made by 'harness generator train'",
                     k.non_empty, only_with=("data.kind", ("trained_latent",))),
}
"""The [data] keys of the latent kinds, each tied to the kinds it means something for."""

TRAINED_MOMENT_SEED = 0
"""Monte Carlo seed of a trained generator's moments: one estimate for every seed of every run."""


class LatentParams(NamedTuple):
    """One seed's fixed data instance (a leading seed axis inside the simulator)."""

    weights: Any  # the generator's weights, simulation dtype
    mean: Array  # [N] E G(c), simulation dtype (subtracted from every sample)
    scale: Array  # [] inputs are (G(c) - mean) / scale; 1 except for trained generators
    omega: Array  # [N, N] float64, E[x x^T]
    phi: Array  # [N, D] float64, E[x c^T]
    omega_standard_error: Array  # [] float64, NaN when Omega is exact
    phi_standard_error: Array  # [] float64, NaN when Phi is exact


# ---------------------------------------------------------------------------- scenario


def latent_dim(scenario: Scenario) -> int:
    """D: ``data.latent_dim``, or N // 2 (at least 1) when it is 0."""
    chosen = scenario.data.latent_dim
    return chosen if chosen > 0 else max(1, scenario.data.input_dim // 2)


def layer_activations(scenario: Scenario) -> list[str]:
    """One activation per weight layer of a deep generator (len(layers) + 1 of them)."""
    chosen = scenario.data.layer_activations
    return list(chosen) if chosen else [scenario.data.feature_map] * (len(scenario.data.layers) + 1)


def check_latent_scenario(s: Scenario) -> None:
    """What a latent scenario must satisfy beyond its keys' own checks."""
    layers, given = s.data.layers, s.data.layer_activations
    if given and len(given) != len(layers) + 1:
        raise ScenarioError(
            f"scenario key 'data.layer_activations': needs one name per layer, len(data.layers) + 1 = "
            f"{len(layers) + 1}, or none (data.feature_map everywhere); got {len(given)}"
        )
    if s.theory.source == "builtin" and s.student.init_std == 0.0:
        raise ScenarioError(
            "scenario key 'student.init_std': must be > 0 for the built-in latent theory (a student at w = 0 "
            "makes the covariance of (lambda, nu) singular, and the equations need its inverse)"
        )


# ---------------------------------------------------------------------- moment cache


_MOMENT_CACHE: OrderedDict[tuple, feature_covariance.FeatureMoments] = OrderedDict()


def _digest(arrays: Sequence[np.ndarray]) -> str:
    hasher = hashlib.sha256()
    for array in arrays:
        array = np.ascontiguousarray(array)
        hasher.update(str((array.shape, array.dtype.str)).encode())
        hasher.update(array.tobytes())
    return hasher.hexdigest()


def _cached_moments(
    label: tuple, arrays: Sequence[np.ndarray], compute: Callable[[], feature_covariance.FeatureMoments]
) -> feature_covariance.FeatureMoments:
    """``compute()``, remembered by (label, digest of arrays) within MOMENT_CACHE_BYTES."""
    key = (label, _digest(arrays))
    if key in _MOMENT_CACHE:
        _MOMENT_CACHE.move_to_end(key)
        return _MOMENT_CACHE[key]
    moments = compute()
    _MOMENT_CACHE[key] = moments
    size = lambda m: m.omega.nbytes + m.phi.nbytes + m.mean.nbytes  # noqa: E731
    while len(_MOMENT_CACHE) > 1 and sum(size(m) for m in _MOMENT_CACHE.values()) > MOMENT_CACHE_BYTES:
        _MOMENT_CACHE.popitem(last=False)
    return moments


def clear_moment_cache() -> None:
    _MOMENT_CACHE.clear()


# ------------------------------------------------------------------------- the model


class _Generator(NamedTuple):
    """What distinguishes the latent kinds: how weights are drawn, applied, and their moments found."""

    draw: Callable[[Array], Any]  # key -> weights (simulation dtype), inside jit
    apply: Callable[[Any, Array], Array]  # (weights, c [n, D]) -> G(c) [n, N], jit-able
    moments: Callable[[Any, int], feature_covariance.FeatureMoments]  # (float64 numpy weights, seed) -> moments


def latent_model(kind: str, input_dim: int, teacher_dim: int, generator: _Generator, dtype: Any) -> DataModel:
    """A :class:`DataModel` for inputs x = (G(c) - mean) / scale, c ~ N(0, I_D), teacher on c."""
    n, d = input_dim, teacher_dim
    f64 = jnp.float64
    shapes = (
        jax.ShapeDtypeStruct((n,), f64),  # mean
        jax.ShapeDtypeStruct((), f64),  # scale
        jax.ShapeDtypeStruct((n, n), f64),  # omega
        jax.ShapeDtypeStruct((n, d), f64),  # phi
        jax.ShapeDtypeStruct((), f64),  # omega standard error
        jax.ShapeDtypeStruct((), f64),  # phi standard error
    )

    def host_moments(weights: Any, seed: np.ndarray) -> tuple[np.ndarray, ...]:
        weights64 = jax.tree_util.tree_map(lambda a: np.asarray(a, np.float64), weights)
        m = generator.moments(weights64, int(np.asarray(seed).reshape(-1)[0]))
        # A trained generator's pixels are rescaled so that tr(Omega) / N = 1; the random
        # generators already have O(1) inputs and keep scale 1 (their Omega is as computed).
        scale = math.sqrt(np.trace(m.omega) / n) if kind == "trained_latent" else 1.0
        nan = float("nan")
        return (
            np.asarray(m.mean, np.float64),
            np.asarray(scale, np.float64),
            np.asarray(m.omega / scale**2, np.float64),
            np.asarray(m.phi / scale, np.float64),
            np.asarray(nan if m.standard_error is None else m.standard_error / scale**2, np.float64),
            np.asarray(nan if m.phi_standard_error is None else m.phi_standard_error / scale, np.float64),
        )

    def init(key: Array) -> LatentParams:
        weight_key, moment_key = jax.random.split(key)
        weights = generator.draw(weight_key)
        # the Monte Carlo seed (if any) is the first word of the seed's own key
        seed = jax.random.randint(moment_key, (1,), 0, 2**31 - 1, dtype=jnp.int32)
        mean, scale, omega, phi, se_omega, se_phi = jax.pure_callback(
            host_moments, shapes, weights, seed, vmap_method="sequential"
        )
        return LatentParams(weights, mean.astype(dtype), scale.astype(dtype), omega, phi, se_omega, se_phi)

    def sample(params: LatentParams, key: Array, count: int) -> tuple[Array, Array]:
        c = threefry.normal(key, (count, d), dtype)  # = jax.random.normal, fused (harness.core.threefry)
        x = (generator.apply(params.weights, c) - params.mean) / params.scale
        return x, c

    def order_parameters(params: LatentParams, w: Array, wt: Array) -> tuple[Array, Array, Array]:
        # docs/equations.md, section 2: Q = w Omega w^T / N, R = w Phi wt^T / sqrt(N D), T = wt wt^T / D
        Q = w @ params.omega @ w.T / n
        R = w @ params.phi @ wt.T / math.sqrt(n * d)
        T = wt @ wt.T / d
        return Q, R, T

    return DataModel(
        kind, n, d, init, sample, order_parameters, spectra=seed_projections, describe=_describer(kind)
    )


def _describer(kind: str) -> Callable[[LatentParams], dict[str, Any]]:
    """What the run manifest records about the data instances (Monte Carlo standard errors)."""

    def describe(params: LatentParams) -> dict[str, Any]:
        se_omega = np.asarray(params.omega_standard_error, np.float64)
        se_phi = np.asarray(params.phi_standard_error, np.float64)
        exact = bool(np.all(np.isnan(se_omega)))
        notes: dict[str, Any] = {
            "kind": kind,
            "latent_dim": int(np.shape(params.phi)[-1]),
            "moments": "exact" if exact else "monte_carlo",
        }
        if not exact:
            notes["omega_standard_error_max"] = float(np.nanmax(se_omega))
            notes["phi_standard_error_max"] = float(np.nanmax(se_phi))
        return notes

    return describe


# --------------------------------------------------------------------- the generators


def _single_layer(scenario: Scenario, dtype: Any) -> _Generator:
    n, d = scenario.data.input_dim, latent_dim(scenario)
    feature_map = scenario.data.feature_map
    f = ACTIVATIONS[feature_map].fn
    sqrt_d = math.sqrt(d)

    def draw(key: Array) -> Array:
        return jax.random.normal(key, (d, n), dtype=dtype)

    def apply(F: Array, c: Array) -> Array:
        return f(c @ F / sqrt_d)

    def moments(F: np.ndarray, seed: int) -> feature_covariance.FeatureMoments:
        del seed  # exact moments
        compute = lambda: feature_covariance.single_layer_moments(F, feature_map)  # noqa: E731
        if feature_map in feature_covariance.CLOSED_FORM_MAPS:
            return compute()  # cheap: not worth keeping a copy
        return _cached_moments(("single_layer", feature_map), [F], compute)

    return _Generator(draw, apply, moments)


def _deep(scenario: Scenario, dtype: Any) -> _Generator:
    n, d = scenario.data.input_dim, latent_dim(scenario)
    widths = [d, *scenario.data.layers, n]
    names = tuple(layer_activations(scenario))
    samples = scenario.data.moment_samples

    def draw(key: Array) -> tuple[Array, ...]:
        keys = jax.random.split(key, len(widths) - 1)
        return tuple(
            jax.random.normal(k, (fan_in, fan_out), dtype=dtype)
            for k, fan_in, fan_out in zip(keys, widths[:-1], widths[1:], strict=True)
        )

    def apply(weights: tuple[Array, ...], c: Array) -> Array:
        return feature_covariance.deep_generator_apply(weights, names, c)

    def moments(weights: tuple[np.ndarray, ...], seed: int) -> feature_covariance.FeatureMoments:
        return _cached_moments(
            ("deep", names, samples, seed),
            list(weights),
            lambda: feature_covariance.deep_generator_moments(list(weights), names, samples, seed),
        )

    return _Generator(draw, apply, moments)


def _trained(scenario: Scenario, dtype: Any) -> tuple[_Generator, int]:
    """The stored generator ``data.generator`` (raises a one-line InputError naming the train command)."""
    from harness.data import trained_generator

    n = scenario.data.input_dim
    loaded = trained_generator.load_generator(scenario.data.generator, expected={"output_dim": n})
    decoder = {"decoder": loaded.params["decoder"]}  # the encoder plays no part in the data
    samples = scenario.data.moment_samples

    def draw(key: Array) -> Any:
        del key  # one fixed generator for every seed
        return jax.tree_util.tree_map(lambda a: jnp.asarray(a, dtype), decoder)

    def moments(weights: Any, seed: int) -> feature_covariance.FeatureMoments:
        del seed  # one estimate shared by every seed (and cached)
        fixed = jax.tree_util.tree_map(lambda a: jnp.asarray(a, jnp.float64), weights)
        sampler = jax.jit(lambda c: trained_generator.generator_apply(fixed, c))
        leaves = jax.tree_util.tree_leaves(weights)
        return _cached_moments(
            ("trained", loaded.checksum, samples, TRAINED_MOMENT_SEED),
            leaves,
            lambda: feature_covariance.monte_carlo_moments(sampler, loaded.latent_dim, samples, TRAINED_MOMENT_SEED),
        )

    return _Generator(draw, trained_generator.generator_apply, moments), loaded.latent_dim


def build_latent_model(scenario: Scenario, dtype: Any) -> DataModel:
    """The data model of a resolved scenario whose data.kind is one of :data:`LATENT_KINDS`."""
    kind = scenario.data.kind
    if kind == "trained_latent":
        generator, d = _trained(scenario, dtype)
    elif kind in ("latent", "deep_latent"):
        generator, d = (_single_layer if kind == "latent" else _deep)(scenario, dtype), latent_dim(scenario)
    else:
        raise ValueError(f"build_latent_model: data.kind {kind!r} is not one of {', '.join(LATENT_KINDS)}")
    return latent_model(kind, scenario.data.input_dim, d, generator, dtype)


# ------------------------------------------------------------------ eigen-projections


class SeedProjections(Sequence):
    """Per-seed eigen-projections (docs/equations.md, section 5), computed when asked for.

    ``projections[s]`` is :class:`harness.data.feature_covariance.Projection` for seed index s
    (position in the run's seed list): Omega's eigenvalues rho and eigenvectors psi, the
    student's w_k^tau and the teacher's om_m^tau. Each access computes a fresh eigen-
    decomposition (O(N^3)); nothing is kept, because psi is as large as Omega itself —
    keep the result if you need it twice.
    """

    def __init__(self, data_params: LatentParams, student_w: np.ndarray, teacher_w: np.ndarray) -> None:
        self._params = data_params
        self._student_w = student_w
        self._teacher_w = teacher_w

    def __len__(self) -> int:
        return int(np.shape(self._student_w)[0])

    def __getitem__(self, s: int) -> feature_covariance.Projection:  # type: ignore[override]
        if not -len(self) <= s < len(self):
            raise IndexError(s)
        s %= len(self)
        return feature_covariance.eigen_projection(
            np.asarray(self._params.omega[s], np.float64),
            np.asarray(self._params.phi[s], np.float64),
            np.asarray(self._teacher_w[s], np.float64),
            np.asarray(self._student_w[s], np.float64),
        )


def seed_projections(data_params: LatentParams, student_w: Any, teacher_w: Any) -> SeedProjections:
    return SeedProjections(data_params, np.asarray(student_w), np.asarray(teacher_w))


for _kind in LATENT_KINDS:
    register_data_kind(_kind, build_latent_model, keys=KEYS, check=check_latent_scenario)

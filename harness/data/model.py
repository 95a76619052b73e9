"""Data models: how inputs x and the teacher's inputs are drawn.

A data model is a pair of pure functions over an explicit per-seed parameter pytree
(for instance the feature matrix F of a latent model):

* ``init(key) -> params``: draw the seed's fixed instance (nothing for i.i.d. inputs);
* ``sample(params, key, n) -> (x, c)``: draw ``n`` fresh samples, ``x`` of shape
  ``[n, input_dim]`` fed to the student and ``c`` of shape ``[n, teacher_dim]`` fed to
  the teacher (``c = x`` for i.i.d. inputs, the latent variables otherwise);
* ``order_parameters(params, w, wt) -> (Q, R, T)`` with the notes' definitions
  (section 2), in the dtype of the weights given.

Models are built from a resolved scenario by :func:`build_data_model`; new kinds
register a builder in :data:`BUILDERS`.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any, NamedTuple

import jax

from harness.core import threefry
from harness.core.scenario import Scenario

Array = jax.Array


class DataModel(NamedTuple):
    """A data model as pure functions (see the module docstring)."""

    kind: str
    input_dim: int
    teacher_dim: int
    init: Callable[[Array], Any]
    sample: Callable[[Any, Array, int], tuple[Array, Array]]
    order_parameters: Callable[[Any, Array, Array], tuple[Array, Array, Array]]
    # True: sample returns (x, y[:, None]), the labels themselves, and there is no teacher
    # (user data models, harness.data.user); R and T are then NaN.
    labels_given: bool = False
    # Latent models (harness.data.latent): spectra(data_params, w, wt) -> per-seed
    # eigen-projections of Omega (notes, section 4), computed lazily; describe(data_params)
    # -> a JSON-able dict for the run manifest (e.g. Monte Carlo standard errors).
    spectra: Callable[[Any, Array, Array], Any] | None = None
    describe: Callable[[Any], dict[str, Any]] | None = None


def gaussian_model(input_dim: int, dtype: Any) -> DataModel:
    """i.i.d. standard Gaussian inputs; the teacher acts on x itself (Omega = Phi = I)."""

    def init(key: Array) -> tuple[()]:
        del key
        return ()

    def sample(params: Any, key: Array, n: int) -> tuple[Array, Array]:
        del params
        x = threefry.normal(key, (n, input_dim), dtype)  # = jax.random.normal, fused (harness.core.threefry)
        return x, x

    def order_parameters(params: Any, w: Array, wt: Array) -> tuple[Array, Array, Array]:
        del params
        n = w.shape[-1]
        return w @ w.T / n, w @ wt.T / n, wt @ wt.T / n

    return DataModel("gaussian", input_dim, input_dim, init, sample, order_parameters)


def _build_gaussian(scenario: Scenario, dtype: Any) -> DataModel:
    return gaussian_model(scenario["data"]["input_dim"], dtype)


def _build_user(scenario: Scenario, dtype: Any) -> DataModel:
    from harness.data.user import build_user_data_model  # lazily: it imports this module

    return build_user_data_model(scenario, dtype)


def _build_latent(scenario: Scenario, dtype: Any) -> DataModel:
    from harness.data.latent import build_latent_model  # lazily: it imports this module

    return build_latent_model(scenario, dtype)


BUILDERS: dict[str, Callable[[Scenario, Any], DataModel]] = {
    "gaussian": _build_gaussian, "python": _build_user,
    "latent": _build_latent, "deep_latent": _build_latent, "trained_latent": _build_latent,
}


def build_data_model(scenario: Scenario, dtype: Any) -> DataModel:
    """The data model a resolved scenario names, drawing in ``dtype``."""
    kind = scenario["data"]["kind"]
    builder_key = "python" if kind.startswith("python:") else kind
    try:
        builder = BUILDERS[builder_key]
    except KeyError:
        raise ValueError(f"data kind {kind!r} has no builder; known: {', '.join(BUILDERS)}") from None
    return builder(scenario, dtype)

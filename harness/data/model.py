"""Data models: how inputs x and the teacher's inputs are drawn.

A data model is a pair of pure functions over an explicit per-seed parameter pytree
(for instance the feature matrix F of a latent model):

* ``init(key) -> params``: draw the seed's fixed instance (nothing for i.i.d. inputs);
* ``sample(params, key, n) -> (x, c)``: draw ``n`` fresh samples, ``x`` of shape
  ``[n, input_dim]`` fed to the student and ``c`` of shape ``[n, teacher_dim]`` fed to
  the teacher (``c = x`` for i.i.d. inputs, the latent variables otherwise);
* ``order_parameters(params, w, wt) -> (Q, R, T)`` with the definitions of docs/equations.md
  (section 2), in the dtype of the weights given.

Models are built from a resolved scenario by :func:`build_data_model`. A data kind declares
itself in one place with :func:`register_data_kind`: its name (or a prefix such as
``"python:"``), its builder, the scenario keys it brings and the check its scenarios must
pass. i.i.d. Gaussian inputs, the kind every other builds on, register below.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any, NamedTuple

import jax

from harness.core import threefry
from harness.core.keys import Key
from harness.core.scenario import Scenario, chosen, declare_keys, register_choice

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
    # eigen-projections of Omega (docs/equations.md, section 5), computed lazily; describe(data_params)
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


BUILDERS: dict[str, Callable[[Scenario, Any], DataModel]] = {}
"""Builder of each registered data kind (a key ending in ":" is a prefix such as "python:")."""


def register_data_kind(
    name: str,
    builder: Callable[[Scenario, Any], DataModel],
    *,
    keys: dict[str, Key] | None = None,
    check: Callable[[Scenario], None] | None = None,
) -> None:
    """Make ``data.kind = name`` available: its builder, its ``[data]`` keys, its scenario check.

    Args:
        name: the value of ``data.kind`` (or a prefix ending in ``":"``, e.g. ``"python:"``).
        builder: ``builder(scenario, dtype) -> DataModel``.
        keys: scenario keys of the ``[data]`` table this kind brings (declare them with
            ``only_with=("data.kind", (name, ...))`` so they cannot be set for other kinds).
        check: run on every resolved scenario that selects this kind (raise ScenarioError).
    """
    declare_keys("data", keys or {})
    register_choice("data.kind", name, check)
    BUILDERS[name] = builder


def build_data_model(scenario: Scenario, dtype: Any) -> DataModel:
    """The data model a resolved scenario names, drawing in ``dtype``."""
    kind = scenario.data.kind
    builder = BUILDERS.get(chosen("data.kind", kind) or "")
    if builder is None:
        raise ValueError(f"data kind {kind!r} has no builder; known: {', '.join(BUILDERS)}")
    return builder(scenario, dtype)


register_data_kind("gaussian", lambda scenario, dtype: gaussian_model(scenario.data.input_dim, dtype))

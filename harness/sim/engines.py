"""Engines: the ways a scenario's ensemble can be advanced in time (``run.engine``).

An engine is four pure pieces over explicit state, as the simulator (harness.sim.simulation)
defines them: ``make_simulator(scenario)``, ``init_ensemble(sim, seeds)``,
``make_advance(sim)`` and ``make_observe(sim)``, plus ``why_not(scenario)``, which says in
words why the engine cannot run a scenario (None when it can). An engine declares itself in
one place with :func:`register_engine`: ``full`` trains the weights (harness.sim.simulation),
``chain`` steps the order parameters exactly (harness.sim.chain).
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any, NamedTuple

from harness.core.scenario import Scenario, ScenarioError, register_choice


class Engine(NamedTuple):
    make_simulator: Callable[[Scenario], Any]
    init_ensemble: Callable[..., Any]
    make_advance: Callable[[Any], Any]
    make_observe: Callable[[Any], Any]
    why_not: Callable[[Scenario], str | None]


ENGINES: dict[str, Engine] = {}


def register_engine(name: str, engine: Engine) -> None:
    """Make ``run.engine = name`` available; scenarios it cannot run are refused before any work."""

    def check(scenario: Scenario) -> None:
        reason = engine.why_not(scenario)
        if reason is not None:
            raise ScenarioError(f"scenario key 'run.engine': '{name}' {reason}; use run.engine = 'full'")

    register_choice("run.engine", name, check)
    ENGINES[name] = engine


def engine_of(scenario: Scenario) -> Engine:
    """The engine a resolved scenario names."""
    return ENGINES[scenario.run.engine]

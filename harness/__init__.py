"""harness: online-SGD simulations of two-layer networks held against their order-parameter ODEs.

The public API (harness.api), for notebooks and scripts::

    import harness

    result = harness.run({"data": {"input_dim": 300}, "run": {"seeds": 16}}, out="results")
    print(result.verdict)
    result.figure().savefig("learning_curve.pdf")
    again = harness.load_run(result.folder)

Importing the package changes no global setting: :func:`configure` (called by every API
function and by the command line) sets JAX's options. Names are imported on first use.
"""

from __future__ import annotations

import importlib
from importlib import metadata
from typing import Any

try:
    __version__ = metadata.version("harness")
except metadata.PackageNotFoundError:  # running from a source tree that is not installed
    __version__ = "0+unknown"

_EXPORTS: dict[str, str] = {
    "run": "harness.api",
    "theory": "harness.api",
    "load_run": "harness.api",
    "load_scenario": "harness.api",
    "sweep": "harness.api",
    "scale": "harness.api",
    "RunResult": "harness.api",
    "configure": "harness.core.configure",
    "Scenario": "harness.core.sections",
    "ScenarioError": "harness.core.scenario",
    "InputError": "harness.core.errors",
    "DataModel": "harness.data.model",
    "register_data_kind": "harness.data.model",
    "register_theory": "harness.equations.user",
    "check_baselines": "harness.studies.baselines",
    "assert_matches_baseline": "harness.studies.baselines",
}

__all__ = sorted(_EXPORTS) + ["__version__"]


def __getattr__(name: str) -> Any:
    module = _EXPORTS.get(name)
    if module is None:
        raise AttributeError(f"module 'harness' has no attribute {name!r}")
    return getattr(importlib.import_module(module), name)


def __dir__() -> list[str]:
    return __all__

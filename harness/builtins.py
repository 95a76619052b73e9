"""The built-in extensions: importing this module declares every built-in scenario key and choice.

harness.core.scenario assembles the schema from what the imported modules declare and
imports this module the first time a scenario is resolved. The order below is the order in
which their keys appear in a section (and so in stored ``scenario.toml`` files).

``python -m harness.builtins`` rewrites harness/core/sections.py, the typed sections made
from these declarations (tests/test_layers.py checks that it is current).
"""

from __future__ import annotations

import sys
from pathlib import Path

import harness.core.times  # noqa: F401  the time grid's check (what whole SGD steps can give)
import harness.data.latent  # noqa: F401  the latent data kinds and their [data] keys
import harness.data.model  # noqa: F401  data.kind = "gaussian"
import harness.data.user  # noqa: F401  data.kind = "python:..."
import harness.equations.latent  # noqa: F401  theory.limit / theory.bins, the latent built-in theories
import harness.equations.sources  # noqa: F401  theory.source = "builtin" / "none"
import harness.equations.user  # noqa: F401  theory.source = "python:..." / "file:..."
import harness.results.judgement  # noqa: F401  the [agreement] table
import harness.results.landmarks  # noqa: F401  the [landmarks] table
import harness.sim.chain  # noqa: F401  run.engine = "chain"
import harness.sim.optimizers  # noqa: F401  the [sgd] update rules
import harness.sim.simulation  # noqa: F401  run.engine = "full"
from harness.core.keys import PYTHON_TYPES
from harness.core.scenario import builtin_schema

SECTIONS_FILE = Path(__file__).parent / "core" / "sections.py"


def sections_source() -> str:
    """The text of harness/core/sections.py for the declarations now registered."""
    lines = [
        '"""Typed sections of a resolved scenario, made from the key declarations. Do not edit.',
        "",
        "Written by ``python -m harness.builtins`` from every declared key (harness.builtins imports",
        "them); tests/test_layers.py checks that this file is current. A type checker reads",
        "``scenario.sgd.learning_rate`` through these classes, and a misspelled field is an error.",
        '"""',
        "",
        "from __future__ import annotations",
        "",
        "from dataclasses import dataclass",
        "",
        "from harness.core.tables import ScenarioBase, Section",
        "",
    ]
    names = {}
    for section, keys in builtin_schema().items():
        cls = section.title().replace("_", "") + "Section"
        names[section] = cls
        lines += ["", "@dataclass(frozen=True)", f"class {cls}(Section):", f'    """The [{section}] table."""', ""]
        for name, key in keys.items():
            typ = PYTHON_TYPES[key.kind]
            lines.append(f"    {name}: {typ}  # {key.doc}"[:119].rstrip())
        lines.append("")
    lines += ["", "class Scenario(ScenarioBase):", '    """A resolved scenario (harness.core.scenario.resolve)."""', ""]
    lines += [f"    {section}: {cls}" for section, cls in names.items()]
    lines += ["", "", "SECTION_TYPES: dict[str, type[Section]] = {"]
    lines += [f'    "{section}": {cls},' for section, cls in names.items()]
    lines += ["}", ""]
    return "\n".join(lines)


if __name__ == "__main__":
    SECTIONS_FILE.write_text(sections_source())
    sys.stdout.write(f"wrote {SECTIONS_FILE}\n")

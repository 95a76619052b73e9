"""The frozen objects a resolved scenario is made of: sections read as attributes or as tables.

harness.core.sections (generated from the key declarations) defines one typed subclass of
:class:`Section` per scenario table and the :class:`ScenarioBase` subclass that names them,
so ``scenario.sgd.learning_rate`` is checked by a type checker and a misspelled field is an
error where it is written.
"""

from __future__ import annotations

import json
from collections.abc import Iterator, Mapping
from typing import Any

RESOLVER: list[Any] = []
"""[resolve]: set by harness.core.scenario when it is imported, which every resolved scenario needs."""


def plain(value: Any) -> Any:
    """Scenarios, sections and tuples as dicts and lists (JSON, TOML, comparisons)."""
    if isinstance(value, Mapping):
        return {name: plain(item) for name, item in value.items()}
    if isinstance(value, tuple | list):
        return [plain(item) for item in value]
    return value


class Section(Mapping[str, Any]):
    """Base of the typed, frozen sections (harness.core.sections): attributes, read like a table too."""

    def __getitem__(self, name: str) -> Any:
        try:
            return getattr(self, name)
        except AttributeError:
            raise KeyError(name) from None

    def __iter__(self) -> Iterator[str]:
        return iter(self.__dataclass_fields__)  # type: ignore[attr-defined]

    def __len__(self) -> int:
        return len(self.__dataclass_fields__)  # type: ignore[attr-defined]


class ScenarioBase(Mapping[str, Section]):
    """A resolved scenario: one typed, frozen section per table (harness.core.scenario)."""

    __slots__ = ("_sections",)

    def __init__(self, sections: dict[str, Section]):
        object.__setattr__(self, "_sections", dict(sections))

    def __getattr__(self, name: str) -> Section:
        if name.startswith("_"):  # not a section (and _sections itself before __init__ ran)
            raise AttributeError(name)
        try:
            return self._sections[name]
        except KeyError:
            raise AttributeError(f"a scenario has no section {name!r}; sections: {', '.join(self._sections)}") from None

    def __setattr__(self, name: str, value: Any) -> None:
        raise AttributeError("a resolved scenario is immutable; use with_overrides()")

    def __getitem__(self, name: str) -> Section:
        return self._sections[name]

    def __iter__(self) -> Iterator[str]:
        return iter(self._sections)

    def __len__(self) -> int:
        return len(self._sections)

    def __eq__(self, other: object) -> bool:
        return isinstance(other, Mapping) and plain(self) == plain(other)

    def __hash__(self) -> int:
        return hash(json.dumps(plain(self), sort_keys=True))

    def __repr__(self) -> str:
        return f"Scenario({plain(self)!r})"

    def __reduce__(self):
        # Pickled (for a sweep's worker processes) as its table and resolved again there: the
        # worker then has the same extensions registered (harness.builtins) and checks it anew.
        # The resolver is harness.core.scenario.resolve, handed down (RESOLVER) so that this
        # module, below scenario, does not import it back.
        return (RESOLVER[0], (plain(self),))



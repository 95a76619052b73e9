"""Scenario keys: how each is declared, and the checks they share.

A :class:`Key` says what one scenario key holds (its TOML type), its default, one line of
meaning, the rule its value must obey, and — for keys that belong to one choice of another
key (``data.latent_dim`` to the latent data kinds, ``sgd.momentum`` to the momentum
optimizer) — which choice that is. Every module that brings scenario keys declares them as
``Key`` objects in one place (harness.core.scenario.declare_keys).

A check takes the (already type-checked) value and returns ``None`` when it is fine, or a
text saying what is allowed ("an integer >= 1"), which the error message quotes.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

Check = Callable[[Any], "str | None"]

TYPE_NAMES: dict[str, str] = {
    "int": "an integer",
    "float": "a number",
    "bool": "true or false",
    "str": "a string",
    "float_list": "a list of numbers",
    "int_list": "a list of integers",
    "str_list": "a list of strings",
}
"""The TOML types a key can hold, as the error messages name them."""

PYTHON_TYPES: dict[str, str] = {
    "int": "int", "float": "float", "bool": "bool", "str": "str",
    "float_list": "tuple[float, ...]", "int_list": "tuple[int, ...]", "str_list": "tuple[str, ...]",
}
"""The Python type of a key's resolved value (lists become tuples: a resolved scenario is immutable)."""


@dataclass(frozen=True)
class Key:
    """One scenario key (see the module docstring).

    ``default`` may be ``None`` for keys whose default is derived from other keys.
    ``only_with = ("data.kind", ("latent", "deep_latent"))`` makes the key belong to those
    choices: giving it a value other than its default under another choice is an error
    (a forgotten ``data.kind`` would otherwise silently run something else).
    """

    kind: str
    default: Any
    doc: str
    check: Check | None = None
    only_with: tuple[str, tuple[str, ...]] | None = None

    def __post_init__(self) -> None:
        if self.kind not in TYPE_NAMES:
            raise ValueError(f"unknown key type {self.kind!r}; one of {', '.join(TYPE_NAMES)}")

    def allowed(self) -> str:
        """What the key accepts, in words (for ``harness keys``)."""
        if self.check is None:
            return TYPE_NAMES[self.kind]
        return describe_check(self.check, self.kind)


def describe_check(check: Check, kind: str) -> str:
    """A check's own words for what it allows, found by showing it a value that is surely wrong."""
    probes = {"int": -(10**12), "float": math.nan, "str": "\x00", "float_list": [math.nan], "int_list": [-(10**12)],
              "str_list": ["\x00"], "bool": None}
    try:
        text = check(probes[kind])
    except Exception:  # noqa: BLE001 - a check that cannot take the probe has no words to give
        text = None
    return text or TYPE_NAMES[kind]


def positive(value: int) -> str | None:
    return None if value >= 1 else "an integer >= 1"


def non_negative_int(value: int) -> str | None:
    return None if value >= 0 else "an integer >= 0"


def at_least(bound: int) -> Check:
    def check(value: int) -> str | None:
        return None if value >= bound else f"an integer >= {bound}"

    return check


def positive_finite(value: float) -> str | None:
    return None if math.isfinite(value) and value > 0 else "a finite number > 0"


def non_negative_finite(value: float) -> str | None:
    return None if math.isfinite(value) and value >= 0 else "a finite number >= 0"


def unit_interval(value: float) -> str | None:
    return None if 0.0 <= value < 1.0 else "a number in [0, 1)"


def open_half_interval(value: float) -> str | None:
    return None if 0.0 < value < 0.5 else "a number in (0, 0.5)"


def one_of(*allowed: str) -> Check:
    def check(value: str) -> str | None:
        return None if value in allowed else "one of " + ", ".join(repr(a) for a in allowed)

    return check


def finite_list(values: list[float]) -> str | None:
    return None if all(math.isfinite(v) for v in values) else "a list of finite numbers"


def positive_list(values: list[int]) -> str | None:
    return None if all(v >= 1 for v in values) else "a list of integers >= 1"


def names_from(allowed: tuple[str, ...] | list[str]) -> Check:
    def check(values: list[str]) -> str | None:
        return None if all(v in allowed for v in values) else "a list of names from " + ", ".join(allowed)

    return check


def non_empty(value: str) -> str | None:
    return None if value.strip() else "a non-empty name"

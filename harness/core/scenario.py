"""Scenario files: the schema assembled from declarations, validation, the run identifier.

A scenario is a TOML file with the sections ``data``, ``teacher``, ``student``, ``sgd``,
``run``, ``theory``, ``agreement`` and ``landmarks`` (and ``sweep`` for sweep files, handled in
harness.studies.sweep). Every key has a default, so an empty file, or no file at all, is the
embedded default scenario. :func:`resolve` turns a parsed TOML table into a *resolved
scenario*: an immutable :class:`Scenario` whose sections are typed, frozen objects
(harness.core.sections), read as ``scenario.sgd.learning_rate`` (``scenario["sgd"]
["learning_rate"]`` works too, for code written against plain tables). The whole file is
checked before anything runs; the first problem found raises :class:`ScenarioError`, whose
message is one line naming the key and what is allowed.

Where the keys come from
------------------------
This module declares the keys every scenario has (the networks, the time, the seeds). The
modules that bring a choice declare theirs in one place, with their validator and builder:
a data kind (``data.kind``), a theory source (``theory.source``), an engine (``run.engine``),
the optimizers (``sgd.optimizer``), the judging settings. They call :func:`declare_keys`,
:func:`register_choice` and :func:`register_check` when imported; the built-in ones are
imported by :func:`builtin_schema` the first time a scenario is resolved (the package
``harness.builtins`` lists them), so this module imports nothing above it.

One rule replaces every "this key only means something for that choice" check: a key
declared with ``only_with = (selector, choices)`` may differ from its default only when the
selector holds one of the choices.

Key order (within a section and of the sections) is the order of declaration; run_ids hash
the scenario with sorted keys, and stored ``scenario.toml`` files keep this order.
"""

from __future__ import annotations

import hashlib
import importlib
import json
import os
import tomllib
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from harness.core import keys as k
from harness.core import tables
from harness.core.activations import ACTIVATIONS, NETWORK_ACTIVATIONS
from harness.core.errors import InputError
from harness.core.keys import Key
from harness.core.sections import SECTION_TYPES, Scenario
from harness.core.tables import Section, plain


class ScenarioError(InputError):
    """A scenario (file or table) is invalid; the message is one line for the user."""


# ----------------------------------------------------------------------------- registry


@dataclass
class _Registry:
    """The declared keys, the choices of selector keys, and the cross-key checks."""

    sections: dict[str, dict[str, Key]] = field(default_factory=dict)
    # "data.kind" -> {"latent": check or None}; values ending in ":" are prefixes ("python:")
    choices: dict[str, dict[str, Callable | None]] = field(default_factory=dict)
    checks: list[Callable] = field(default_factory=list)
    builtins_loaded: bool = False


_REGISTRY = _Registry()

JUDGING_SECTIONS: tuple[str, ...] = ("agreement", "landmarks")
"""Sections that say how to judge a run, not what to compute: left out of its run_id.

[agreement] is the verdict's margin (harness.results.judgement), [landmarks] how the landmarks of
the curves are measured and which are judged (harness.results.landmarks)."""
BUILTINS = "harness.builtins"
"""The module whose import declares every built-in data kind, theory source, engine and optimizer."""


def declare_keys(section: str, keys: Mapping[str, Key]) -> None:
    """Add keys to a section (created if new). Re-declaring a key with the same meaning is a no-op."""
    table = _REGISTRY.sections.setdefault(section, {})
    for name, key in keys.items():
        if name in table and table[name] != key:
            raise ValueError(f"scenario key '{section}.{name}' is declared twice, differently")
        table[name] = key


def register_choice(selector: str, value: str, check: Callable[[Scenario], None] | None = None) -> None:
    """Allow ``value`` for the selector key (e.g. ``"data.kind"``); ``check`` runs when it is chosen.

    A value ending in ``":"`` admits every value with that prefix (``"python:"``).
    """
    _REGISTRY.choices.setdefault(selector, {})[value] = check


def register_check(check: Callable[[Scenario], None]) -> None:
    """A cross-key rule run on every resolved scenario (raises ScenarioError)."""
    if check not in _REGISTRY.checks:
        _REGISTRY.checks.append(check)


def choices(selector: str) -> list[str]:
    """The values registered for a selector key ("python:" stands for every "python:..." value)."""
    builtin_schema()
    return list(_REGISTRY.choices.get(selector, {}))


def builtin_schema() -> dict[str, dict[str, Key]]:
    """Every declared key, section by section, after importing the built-in extensions once."""
    if not _REGISTRY.builtins_loaded:
        _REGISTRY.builtins_loaded = True
        importlib.import_module(BUILTINS)
    return _REGISTRY.sections


def chosen(selector: str, value: str) -> str | None:
    """The registered choice that ``value`` selects (itself, or its prefix), or None."""
    registered = _REGISTRY.choices.get(selector, {})
    if value in registered:
        return value
    return next((c for c in registered if c.endswith(":") and value.startswith(c)), None)


def _choice_check(selector: str) -> k.Check:
    """The value check of a selector key: one of the registered choices."""

    def check(value: str) -> str | None:
        if chosen(selector, value) is not None:
            return None
        names = [c for c in _REGISTRY.choices.get(selector, {}) if not c.endswith(":")]
        prefixes = [c for c in _REGISTRY.choices.get(selector, {}) if c.endswith(":")]
        shown = ", ".join(repr(n) for n in names)
        forms = {"python:": f"'python:package.module:{'factory' if selector == 'data.kind' else 'function'}'",
                 "file:": "'file:PATH'"}
        extra = " or ".join(forms.get(p, repr(p + "...")) for p in prefixes)
        return "one of " + shown + (f" or {extra}" if extra else "")

    return check


# --------------------------------------------------------------------- the core keys

_NETWORK = k.one_of(*NETWORK_ACTIVATIONS)

declare_keys("data", {
    "kind": Key("str", "gaussian", "input distribution", _choice_check("data.kind")),
    "input_dim": Key("int", 500, "N, the input dimension", k.positive),
})
declare_keys("teacher", {
    "hidden": Key("int", 2, "M, teacher hidden units", k.positive),
    "activation": Key("str", "erf", "teacher activation", _NETWORK),
    "second_layer": Key("float_list", None, "teacher second layer (default all ones)", k.finite_list),
    "noise_std": Key("float", 0.0, "label noise standard deviation sigma", k.non_negative_finite),
    "init_std": Key("float", 1.0, "std of the teacher's i.i.d. Gaussian weights", k.positive_finite),
})
declare_keys("student", {
    "hidden": Key("int", 2, "K, student hidden units", k.positive),
    "activation": Key("str", "erf", "student activation", _NETWORK),
    "init_std": Key("float", 0.1, "std of the student's i.i.d. Gaussian first-layer weights", k.non_negative_finite),
    "second_layer": Key("float_list", None, "initial student second layer (default all ones)", k.finite_list),
    "train_second_layer": Key("bool", False, "train the second layer too"),
})
declare_keys("sgd", {
    "learning_rate": Key("float", 0.5, "eta, first-layer learning rate", k.positive_finite),
    "second_layer_learning_rate": Key("float", None, "eta_v (default: learning_rate)", k.positive_finite),
    "time": Key("float", 300.0, "training time t = steps / input_dim", k.positive_finite),
})
declare_keys("run", {
    "seeds": Key("int", 8, "number of independent seeds", k.positive),
    "evaluations": Key("int", 60, "number of evaluation times, t = 0 and the end included", k.at_least(2)),
    "spacing": Key("str", "log", "spacing of evaluation times", k.one_of("log", "linear")),
    "test_samples": Key("int", 10000, "held-out samples per seed", k.positive),
    "dtype": Key("str", "float32", "simulation floating-point type", k.one_of("float32", "float64")),
    "seed": Key("int", 0, "base random seed", k.non_negative_int),
    "shared_teacher": Key("bool", False, "one teacher for all seeds"),
    "block_steps": Key("int", 0, "SGD steps per drawn block of samples (0: automatic)", k.non_negative_int),
    "engine": Key("str", "full", "'full' trains the weights; 'chain' steps the order parameters exactly "
                  "(i.i.d. Gaussian inputs, plain SGD)", _choice_check("run.engine")),
    "checkpoint_minutes": Key("float", 5.0, "minutes between saved checkpoints of a run's state (0: none)",
                              k.non_negative_finite),
    "common_random_numbers": Key("bool", True, "sweep points share weights, teachers and input streams "
                                 "(false: each point its own)"),
})
declare_keys("theory", {
    "source": Key("str", "builtin", "where theory comes from", _choice_check("theory.source")),
    "rtol": Key("float", 1e-6, "ODE solver relative tolerance", k.positive_finite),
    "atol": Key("float", 1e-9, "ODE solver absolute tolerance", k.positive_finite),
})
ACTIVATION_NAMES: tuple[str, ...] = tuple(ACTIVATIONS)
"""Every activation name (feature maps may use more than networks)."""


def to_dict(scenario: Mapping[str, Any]) -> dict[str, dict[str, Any]]:
    """The resolved scenario as plain nested dicts and lists (JSON-ready)."""
    return plain(scenario)


def _from_dict(table: dict[str, dict[str, Any]]) -> Scenario:
    built = {}
    for name, values in table.items():
        frozen = {key: tuple(v) if isinstance(v, list) else v for key, v in values.items()}
        cls = SECTION_TYPES.get(name)
        if cls is None or set(frozen) != set(cls.__dataclass_fields__):
            cls = _untyped_section(name, tuple(frozen))
        built[name] = cls(**frozen)
    return Scenario(built)


def _untyped_section(name: str, fields: tuple[str, ...]) -> type[Section]:
    """A frozen section for keys harness.core.sections does not type (an extension outside the package)."""
    from dataclasses import make_dataclass

    return make_dataclass(f"{name.title()}Section", list(fields), bases=(Section,), frozen=True)


# ------------------------------------------------------------------------- resolution


def _coerce(path: str, key: Key, value: Any) -> Any:
    """Check the TOML type of ``value`` and convert ints to floats where floats are wanted."""

    def bad() -> ScenarioError:
        return ScenarioError(f"scenario key '{path}': expected {k.TYPE_NAMES[key.kind]}, got {_show(value)}")

    def is_int(v: Any) -> bool:
        return isinstance(v, int) and not isinstance(v, bool)

    def is_number(v: Any) -> bool:
        return is_int(v) or isinstance(v, float)

    kind = key.kind
    if kind == "int" and is_int(value) or kind == "bool" and isinstance(value, bool) \
            or kind == "str" and isinstance(value, str):
        return value
    if kind == "float" and is_number(value):
        return float(value)
    if kind == "float_list" and isinstance(value, list) and all(is_number(v) for v in value):
        return [float(v) for v in value]
    if kind == "int_list" and isinstance(value, list) and all(is_int(v) for v in value):
        return list(value)
    if kind == "str_list" and isinstance(value, list) and all(isinstance(v, str) for v in value):
        return list(value)
    raise bad()


def name_for_message(name: Any) -> str:
    """A section, key or file name fit for a one-line message (odd characters escaped)."""
    text = str(name)
    return text if text.isprintable() and text.strip() == text else repr(text)[1:-1]


def _show(value: Any) -> str:
    text = repr(value)
    return text if len(text) <= 60 else text[:57] + "..."


def resolve(table: Mapping[str, Any] | None = None, *, allow_sections: tuple[str, ...] = ()) -> Scenario:
    """Validate a parsed scenario table and fill in every default.

    ``allow_sections`` names extra top-level tables that are accepted and left out of the
    result (``sweep`` for sweep files). Raises :class:`ScenarioError` on the first problem.
    """
    table = {} if table is None else plain(table)
    if not isinstance(table, dict):
        raise ScenarioError("scenario: expected a table of sections")
    schema = builtin_schema()
    for section in table:
        if section not in schema and section not in allow_sections:
            allowed = ", ".join(list(schema) + list(allow_sections))
            raise ScenarioError(f"scenario section '{name_for_message(section)}' is unknown; allowed: {allowed}")
    resolved: dict[str, dict[str, Any]] = {}
    for section, keys in schema.items():
        given = table.get(section, {})
        if not isinstance(given, dict):
            raise ScenarioError(f"scenario section '{section}': expected a table, got {_show(given)}")
        for name in given:
            if name not in keys:
                raise ScenarioError(
                    f"scenario key '{section}.{name_for_message(name)}' is unknown; allowed in [{section}]: "
                    + ", ".join(keys)
                )
        values: dict[str, Any] = {}
        for name, key in keys.items():
            path = f"{section}.{name}"
            if name in given:
                value = _coerce(path, key, given[name])
                problem = key.check(value) if key.check is not None else None
                if problem is not None:
                    raise ScenarioError(f"scenario key '{path}': must be {problem}, got {_show(given[name])}")
            else:
                value = key.default
            values[name] = value
        resolved[section] = values
    _fill_derived_defaults(resolved)
    _check_second_layers(resolved)
    _check_only_with(resolved, schema)
    scenario = _from_dict(resolved)
    for selector, registered in _REGISTRY.choices.items():
        section, _, name = selector.partition(".")
        check = registered.get(chosen(selector, resolved[section][name]) or "")
        if check is not None:
            check(scenario)
    for check in _REGISTRY.checks:
        check(scenario)
    return scenario


tables.RESOLVER[:] = [resolve]  # how a pickled scenario is resolved again (harness.core.tables)


def _fill_derived_defaults(s: dict[str, dict[str, Any]]) -> None:
    for role in ("teacher", "student"):
        if s[role]["second_layer"] is None:
            s[role]["second_layer"] = [1.0] * s[role]["hidden"]
    if s["sgd"]["second_layer_learning_rate"] is None:
        s["sgd"]["second_layer_learning_rate"] = s["sgd"]["learning_rate"]


def _check_second_layers(s: dict[str, dict[str, Any]]) -> None:
    for role in ("teacher", "student"):
        layer, hidden = s[role]["second_layer"], s[role]["hidden"]
        if len(layer) != hidden:
            raise ScenarioError(
                f"scenario key '{role}.second_layer': must have {role}.hidden = {hidden} entries, got {len(layer)}"
            )


def _check_only_with(s: dict[str, dict[str, Any]], schema: dict[str, dict[str, Key]]) -> None:
    """The one rule for keys that belong to some choices of a selector (module docstring)."""
    for section, keys in schema.items():
        for name, key in keys.items():
            if key.only_with is None or s[section][name] == key.default:
                continue
            selector, allowed = key.only_with
            where, _, what = selector.partition(".")
            value = s[where][what]
            if value not in allowed:
                shown = " or ".join(repr(a) for a in allowed)
                raise ScenarioError(
                    f"scenario key '{section}.{name}': applies only with {selector} = {shown}, "
                    f"got {selector} = {value!r}"
                )


# -------------------------------------------------------------------------- file access


def load(path: str | Path | None = None, *, allow_sections: tuple[str, ...] = ()) -> Scenario:
    """Read and resolve a scenario file; ``None`` gives the embedded default scenario."""
    if path is None:
        return resolve({})
    table = read_table(path)
    anchor_theory_file(table, Path(path).absolute().parent)
    return resolve(table, allow_sections=allow_sections)


def anchor_theory_file(table: dict[str, Any], folder: Path) -> None:
    """A relative ``theory.source = "file:PATH"`` is relative to the scenario file's folder.

    It is made absolute here, so the resolved scenario (and its stored copy) names the
    very file; scenarios built in code keep relative paths, read from the working directory.
    """
    theory = table.get("theory")
    source = theory.get("source") if isinstance(theory, dict) else None
    if isinstance(source, str) and source.startswith("file:") and not Path(source[5:]).is_absolute():
        theory["source"] = "file:" + os.path.normpath(folder / source[5:])


def read_table(path: str | Path) -> dict[str, Any]:
    """Parse a TOML file, turning every failure into a one-line :class:`ScenarioError`."""
    path = Path(path)
    shown = name_for_message(path)
    try:
        text = path.read_bytes().decode("utf-8")
    except FileNotFoundError:
        raise ScenarioError(f"scenario file '{shown}' does not exist") from None
    except IsADirectoryError:
        raise ScenarioError(f"scenario file '{shown}' is a directory, expected a TOML file") from None
    except UnicodeDecodeError:
        raise ScenarioError(f"scenario file '{shown}' is not UTF-8 text") from None
    except OSError as error:
        raise ScenarioError(f"scenario file '{shown}' cannot be read: {error.strerror}") from None
    return parse_text(text, source=str(path))


def parse_text(text: str, *, source: str = "scenario") -> dict[str, Any]:
    """Parse TOML text into a table (not yet resolved)."""
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as error:
        message = str(error).splitlines()[0] if str(error) else "invalid TOML"
        raise ScenarioError(f"scenario file '{name_for_message(source)}' is not valid TOML: {message}") from None


def default_scenario() -> Scenario:
    """The embedded default scenario: K = M = 2 erf, small initialisation, a plateau and its escape."""
    return resolve({})


# -------------------------------------------------------------------- identity / output


def run_id(scenario: Mapping[str, Any]) -> str:
    """A short hash of what the resolved scenario computes: identical computations share a run_id.

    The judging sections (:data:`JUDGING_SECTIONS`) are left out: a different margin judges
    the same stored trajectories again instead of recomputing them.
    """
    canonical = json.dumps(computed_table(scenario), sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(canonical.encode("utf-8")).hexdigest()[:12]


def computed_table(scenario: Mapping[str, Any]) -> dict[str, dict[str, Any]]:
    """The scenario's sections that decide what is computed (every one but :data:`JUDGING_SECTIONS`)."""
    return {section: values for section, values in to_dict(scenario).items() if section not in JUDGING_SECTIONS}


def flatten(scenario: Mapping[str, Any]) -> dict[str, Any]:
    """``{"sgd.learning_rate": 0.5, ...}``; lists become JSON text so tables stay flat."""
    flat: dict[str, Any] = {}
    for section, values in to_dict(scenario).items():
        for name, value in values.items():
            flat[f"{section}.{name}"] = json.dumps(value) if isinstance(value, list) else value
    return flat


def with_overrides(scenario: Mapping[str, Any], overrides: Mapping[str, Any]) -> Scenario:
    """Re-resolve ``scenario`` with dotted-key overrides (``{"data.input_dim": 1000}``).

    Derived defaults are re-derived unless overridden, so changing ``teacher.hidden``
    alone also resizes a default second layer.
    """
    table = given_table(scenario)
    for dotted, value in overrides.items():
        section, _, name = dotted.partition(".")
        if not name:
            raise ScenarioError(f"override key '{dotted}': expected 'section.key'")
        table.setdefault(section, {})[name] = value
    return resolve(table)


def given_table(scenario: Mapping[str, Any]) -> dict[str, Any]:
    """The scenario as a table, dropping values equal to derived defaults so they re-derive."""
    table = to_dict(scenario)
    for role in ("teacher", "student"):
        if table[role].get("second_layer") == [1.0] * table[role]["hidden"]:
            del table[role]["second_layer"]
    if table["sgd"].get("second_layer_learning_rate") == table["sgd"]["learning_rate"]:
        del table["sgd"]["second_layer_learning_rate"]
    return table


def to_toml(scenario: Mapping[str, Any]) -> str:
    """Write a resolved scenario as TOML (our tables hold only scalars and flat lists)."""
    lines: list[str] = []
    for section, values in to_dict(scenario).items():
        lines.append(f"[{section}]")
        for name, value in values.items():
            lines.append(f"{name} = {_toml_value(value)}")
        lines.append("")
    return "\n".join(lines)


def _toml_value(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int | float):
        return repr(value)
    if isinstance(value, str):
        return json.dumps(value)  # a JSON string is a valid TOML basic string
    if isinstance(value, list | tuple):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    if isinstance(value, dict):
        return "{ " + ", ".join(f"{json.dumps(k)} = {_toml_value(v)}" for k, v in value.items()) + " }"
    raise TypeError(f"cannot write {type(value).__name__} as TOML")


# ------------------------------------------------------------------- keys, documented


def key_table() -> list[tuple[str, str, str, Any, str, str]]:
    """Every key as (section, name, type, default, allowed values, meaning), in declaration order."""
    rows = []
    for section, keys in builtin_schema().items():
        for name, key in keys.items():
            allowed = key.allowed()
            if key.only_with is not None:
                selector, which = key.only_with
                allowed += f"; only with {selector} = " + " or ".join(repr(w) for w in which)
            rows.append((section, name, k.TYPE_NAMES[key.kind], key.default, allowed, key.doc))
    return rows

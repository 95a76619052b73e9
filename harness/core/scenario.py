"""Scenario files: the schema, its defaults, validation, and the run identifier.

A scenario is a TOML file with the sections ``data``, ``teacher``, ``student``, ``sgd``,
``run`` and ``theory`` (and ``sweep`` for sweep files, handled in ``harness.studies.sweep``).
Every key has a default, so an empty file, or no file at all, is the embedded default
scenario. :func:`resolve` turns a parsed TOML table into a *resolved scenario*: a plain
nested ``dict`` with every key present and every derived default filled in. The whole
file is checked before anything runs; the first problem found raises
:class:`ScenarioError`, whose message is one line naming the key and what is allowed.

Key names are fixed (other tools read them); add new keys to :data:`SCHEMA`.
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import tomllib
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from harness.core.activations import ACTIVATIONS, NETWORK_ACTIVATIONS
from harness.core.errors import InputError

Scenario = dict[str, dict[str, Any]]


class ScenarioError(InputError):
    """A scenario (file or table) is invalid; the message is one line for the user."""


# --------------------------------------------------------------------------- schema


@dataclass(frozen=True)
class Key:
    """One scenario key: its type, default, and the rule it must obey.

    ``default`` may be ``None`` for keys whose default is derived from other keys
    (see :func:`_fill_derived_defaults`). ``check`` returns an error text (what is
    allowed) or ``None`` when the value is fine.
    """

    kind: str  # "int", "float", "bool", "str", "float_list", "int_list", "str_list"
    default: Any
    doc: str
    check: Callable[[Any], str | None] | None = None


def _positive(value: float) -> str | None:
    return None if value >= 1 else "an integer >= 1"


def _nonnegative_int(value: int) -> str | None:
    return None if value >= 0 else "an integer >= 0"


def _positive_finite(value: float) -> str | None:
    return None if math.isfinite(value) and value > 0 else "a finite number > 0"


def _nonnegative_finite(value: float) -> str | None:
    return None if math.isfinite(value) and value >= 0 else "a finite number >= 0"


def _one_of(*allowed: str) -> Callable[[str], str | None]:
    def check(value: str) -> str | None:
        return None if value in allowed else "one of " + ", ".join(repr(a) for a in allowed)

    return check


def _finite_list(values: list[float]) -> str | None:
    return None if all(math.isfinite(v) for v in values) else "a list of finite numbers"


def _unit_interval(value: float) -> str | None:
    return None if 0.0 <= value < 1.0 else "a number in [0, 1)"


def _open_half_interval(value: float) -> str | None:
    return None if 0.0 < value < 0.5 else "a number in (0, 0.5)"


def _positive_list(values: list[int]) -> str | None:
    return None if all(v >= 1 for v in values) else "a list of integers >= 1"


def _activation_names(values: list[str]) -> str | None:
    return None if all(v in ACTIVATIONS for v in values) else "a list of names from " + ", ".join(ACTIVATIONS)


def _nonempty(value: str) -> str | None:
    return None if value.strip() else "a non-empty name"


def _at_least_thousand(value: int) -> str | None:
    return None if value >= 1000 else "an integer >= 1000"


def _at_least_two(value: int) -> str | None:
    return None if value >= 2 else "an integer >= 2"


DATA_KINDS: tuple[str, ...] = ("gaussian", "latent", "deep_latent", "trained_latent")
"""Built-in data kinds; ``python:package.module:factory`` names a user data model."""


def _data_kind(value: str) -> str | None:
    if value in DATA_KINDS or value.startswith("python:"):
        return None
    return "one of " + ", ".join(repr(k) for k in DATA_KINDS) + " or 'python:package.module:factory'"


def _theory_source(value: str) -> str | None:
    if value in ("builtin", "none") or value.startswith(("python:", "file:")):
        return None
    return "'builtin', 'none', 'python:package.module:function' or 'file:PATH'"


_activation = _one_of(*NETWORK_ACTIVATIONS)

SCHEMA: dict[str, dict[str, Key]] = {
    "data": {
        "kind": Key("str", "gaussian", "input distribution", _data_kind),
        "input_dim": Key("int", 500, "N, the input dimension", _positive),
        # latent-variable kinds (harness.data.latent; theory notes, section 4)
        "latent_dim": Key("int", 0, "D, latent dimension of latent kinds (0: input_dim // 2)", _nonnegative_int),
        "feature_map": Key("str", "sign", "f in x = f(F^T c / sqrt(D)) - E f (latent kinds)", _one_of(*ACTIVATIONS)),
        "layers": Key("int_list", [], "hidden widths of the deep_latent generator, latent side first", _positive_list),
        "layer_activations": Key("str_list", [], "deep_latent: activation after each layer, len(layers) + 1 "
                                 "names (empty: feature_map everywhere)", _activation_names),
        "moment_samples": Key("int", 100000, "Monte Carlo samples for Omega and Phi (deep_latent, trained_latent)",
                              _at_least_thousand),
        "generator": Key("str", "digits", "trained_latent: name of a generator made by 'harness generator train'",
                         _nonempty),
    },
    "teacher": {
        "hidden": Key("int", 2, "M, teacher hidden units", _positive),
        "activation": Key("str", "erf", "teacher activation", _activation),
        "second_layer": Key("float_list", None, "teacher second layer (default all ones)", _finite_list),
        "noise_std": Key("float", 0.0, "label noise standard deviation sigma", _nonnegative_finite),
        "init_std": Key("float", 1.0, "std of the teacher's i.i.d. Gaussian weights", _positive_finite),
    },
    "student": {
        "hidden": Key("int", 2, "K, student hidden units", _positive),
        "activation": Key("str", "erf", "student activation", _activation),
        "init_std": Key("float", 0.1, "std of the student's i.i.d. Gaussian first-layer weights", _nonnegative_finite),
        "second_layer": Key("float_list", None, "initial student second layer (default all ones)", _finite_list),
        "train_second_layer": Key("bool", False, "train the second layer too", None),
    },
    "sgd": {
        "learning_rate": Key("float", 0.5, "eta, first-layer learning rate", _positive_finite),
        "second_layer_learning_rate": Key("float", None, "eta_v (default: learning_rate)", _positive_finite),
        "time": Key("float", 300.0, "training time t = steps / input_dim", _positive_finite),
        # Update rule and its settings (harness.sim.optimizers); plain SGD is what the built-in theory describes.
        "optimizer": Key("str", "sgd", "update rule", _one_of("sgd", "momentum", "adam")),
        "momentum": Key("float", 0.9, "momentum beta (optimizer 'momentum')", _unit_interval),
        "nesterov": Key("bool", False, "Nesterov momentum (optimizer 'momentum')", None),
        "beta1": Key("float", 0.9, "first-moment decay (optimizer 'adam')", _unit_interval),
        "beta2": Key("float", 0.999, "second-moment decay (optimizer 'adam')", _unit_interval),
        "eps": Key("float", 1e-8, "denominator offset (optimizer 'adam')", _positive_finite),
        "weight_decay": Key("float", 0.0, "kappa: L2 penalty (kappa/2)(sum_k Q_kk + |v|^2)", _nonnegative_finite),
    },
    "run": {
        "seeds": Key("int", 8, "number of independent seeds", _positive),
        "evaluations": Key("int", 60, "number of evaluation times, t = 0 and the end included", _at_least_two),
        "spacing": Key("str", "log", "spacing of evaluation times", _one_of("log", "linear")),
        "test_samples": Key("int", 10000, "held-out samples per seed", _positive),
        "dtype": Key("str", "float32", "simulation floating-point type", _one_of("float32", "float64")),
        "seed": Key("int", 0, "base random seed", _nonnegative_int),
        "shared_teacher": Key("bool", False, "one teacher for all seeds", None),
        "block_steps": Key("int", 0, "SGD steps per drawn block of samples (0: automatic)", _nonnegative_int),
        "engine": Key(
            "str", "full", "'full' trains the weights; 'chain' steps the order parameters exactly "
            "(i.i.d. Gaussian inputs, plain SGD; harness.sim.chain)", _one_of("full", "chain")
        ),
        "checkpoint_minutes": Key(
            "float", 5.0, "minutes between saved checkpoints of a run's state (0: none)", _nonnegative_finite
        ),
        "common_random_numbers": Key(
            "bool", True, "sweep points share weights, teachers and input streams (false: each point its own)", None
        ),
    },
    "theory": {
        "source": Key("str", "builtin", "where theory comes from", _theory_source),
        "rtol": Key("float", 1e-6, "ODE solver relative tolerance", _positive_finite),
        "atol": Key("float", 1e-9, "ODE solver absolute tolerance", _positive_finite),
        "limit": Key("str", "finite", "latent theory: exact finite-N equations or the thermodynamic limit",
                     _one_of("finite", "infinite")),
        "bins": Key("int", 200, "eigenvalue bins of the thermodynamic-limit latent theory", _at_least_two),
    },
    # How a verdict is reached (harness.results.judgement); judging changes no computation, so these
    # keys are not part of the run_id and a stored run is re-judged when they change.
    "agreement": {
        "margin": Key("float", 0.05, "how close is close enough: fraction of an error's value at each time, "
                      "and of an order-parameter group's largest size", _positive_finite),
        "floor": Key("float", 0.001, "an error curve's margin never falls below this fraction of its largest value",
                     _nonnegative_finite),
        "alpha": Key("float", 0.05, "error rate of the verdict, joint over every time and observable",
                     _open_half_interval),
    },
}

JUDGING_SECTIONS: tuple[str, ...] = ("agreement",)
"""Sections that say how to judge a run, not what to compute: left out of its run_id."""


def _check_user_sources(s: Scenario) -> None:
    """User theories / data models are checked before any work (imported lazily: rarely needed)."""
    if s["theory"]["source"].startswith(("python:", "file:")):
        from harness.theory.user import check_theory_source

        check_theory_source(s)
    if s["data"]["kind"].startswith("python:"):
        from harness.data.user import check_data_kind

        check_data_kind(s)


# Cross-key rules registered by other modules (latent data, optimizers, ...). Each takes
# the resolved scenario and raises ScenarioError on a problem.
EXTRA_CHECKS: list[Callable[[Scenario], None]] = [_check_user_sources]


def _check_latent_keys(s: Scenario) -> None:
    from harness.data.latent import check_latent_keys  # lazily: it imports this module

    check_latent_keys(s)


EXTRA_CHECKS.append(_check_latent_keys)


def _check_engine(s: Scenario) -> None:
    if s["run"]["engine"] != "full":
        from harness.sim.chain import check_scenario  # lazily: it imports this module

        check_scenario(s)


EXTRA_CHECKS.append(_check_engine)


# ----------------------------------------------------------------------- resolution


def _describe_type(kind: str) -> str:
    return {
        "int": "an integer",
        "float": "a number",
        "bool": "true or false",
        "str": "a string",
        "float_list": "a list of numbers",
        "int_list": "a list of integers",
        "str_list": "a list of strings",
    }[kind]


def _coerce(path: str, key: Key, value: Any) -> Any:
    """Check the TOML type of ``value`` and convert ints to floats where floats are wanted."""

    def bad() -> ScenarioError:
        return ScenarioError(
            f"scenario key '{path}': expected {_describe_type(key.kind)}, got {_show(value)}"
        )

    def is_int(v: Any) -> bool:
        return isinstance(v, int) and not isinstance(v, bool)

    def is_number(v: Any) -> bool:
        return is_int(v) or isinstance(v, float)

    if key.kind == "int":
        if not is_int(value):
            raise bad()
        return value
    if key.kind == "float":
        if not is_number(value):
            raise bad()
        return float(value)
    if key.kind == "bool":
        if not isinstance(value, bool):
            raise bad()
        return value
    if key.kind == "str":
        if not isinstance(value, str):
            raise bad()
        return value
    if key.kind == "float_list":
        if not isinstance(value, list) or not all(is_number(v) for v in value):
            raise bad()
        return [float(v) for v in value]
    if key.kind == "int_list":
        if not isinstance(value, list) or not all(is_int(v) for v in value):
            raise bad()
        return list(value)
    if key.kind == "str_list":
        if not isinstance(value, list) or not all(isinstance(v, str) for v in value):
            raise bad()
        return list(value)
    raise AssertionError(key.kind)


def _name(name: Any) -> str:
    """A section or key name fit for a one-line message (odd characters escaped)."""
    text = str(name)
    return text if text.isprintable() and text.strip() == text else repr(text)[1:-1]


def _show(value: Any) -> str:
    text = repr(value)
    return text if len(text) <= 60 else text[:57] + "..."


def resolve(table: dict[str, Any] | None = None, *, allow_sections: tuple[str, ...] = ()) -> Scenario:
    """Validate a parsed scenario table and fill in every default.

    ``allow_sections`` names extra top-level tables that are passed through untouched
    (``sweep`` for sweep files). Raises :class:`ScenarioError` on the first problem.
    """
    table = {} if table is None else table
    if not isinstance(table, dict):
        raise ScenarioError("scenario: expected a table of sections")
    resolved: Scenario = {}
    for section in table:
        if section not in SCHEMA and section not in allow_sections:
            allowed = ", ".join(list(SCHEMA) + list(allow_sections))
            raise ScenarioError(f"scenario section '{_name(section)}' is unknown; allowed: {allowed}")
    for section, keys in SCHEMA.items():
        given = table.get(section, {})
        if not isinstance(given, dict):
            raise ScenarioError(f"scenario section '{section}': expected a table, got {_show(given)}")
        for name in given:
            if name not in keys:
                raise ScenarioError(
                    f"scenario key '{section}.{_name(name)}' is unknown; allowed in [{section}]: "
                    + ", ".join(keys)
                )
        values: dict[str, Any] = {}
        for name, key in keys.items():
            path = f"{section}.{name}"
            if name in given:
                value = _coerce(path, key, given[name])
                if key.check is not None:
                    problem = key.check(value)
                    if problem is not None:
                        raise ScenarioError(
                            f"scenario key '{path}': must be {problem}, got {_show(given[name])}"
                        )
            else:
                value = key.default
            values[name] = value
        resolved[section] = values
    _fill_derived_defaults(resolved)
    _check_cross_keys(resolved)
    for check in EXTRA_CHECKS:
        check(resolved)
    return resolved


def _fill_derived_defaults(s: Scenario) -> None:
    for role in ("teacher", "student"):
        if s[role]["second_layer"] is None:
            s[role]["second_layer"] = [1.0] * s[role]["hidden"]
    if s["sgd"]["second_layer_learning_rate"] is None:
        s["sgd"]["second_layer_learning_rate"] = s["sgd"]["learning_rate"]


def _check_cross_keys(s: Scenario) -> None:
    for role in ("teacher", "student"):
        layer, hidden = s[role]["second_layer"], s[role]["hidden"]
        if len(layer) != hidden:
            raise ScenarioError(
                f"scenario key '{role}.second_layer': must have {role}.hidden = {hidden} entries, "
                f"got {len(layer)}"
            )
    optimizer_keys = {"momentum": ("momentum", "nesterov"), "adam": ("beta1", "beta2", "eps")}
    for owner, names in optimizer_keys.items():
        for name in names:
            if s["sgd"]["optimizer"] != owner and s["sgd"][name] != SCHEMA["sgd"][name].default:
                raise ScenarioError(
                    f"scenario key 'sgd.{name}': applies only with sgd.optimizer = {owner!r}, "
                    f"got sgd.optimizer = {s['sgd']['optimizer']!r}"
                )


# ---------------------------------------------------------------------- file access


def load(path: str | Path | None = None, *, allow_sections: tuple[str, ...] = ()) -> Scenario:
    """Read and resolve a scenario file; ``None`` gives the embedded default scenario."""
    if path is None:
        return resolve({})
    table = read_table(path)
    _anchor_theory_file(table, Path(path).absolute().parent)
    return resolve(table, allow_sections=allow_sections)


def _anchor_theory_file(table: dict[str, Any], folder: Path) -> None:
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
    try:
        text = path.read_bytes().decode("utf-8")
    except FileNotFoundError:
        raise ScenarioError(f"scenario file '{path}' does not exist") from None
    except IsADirectoryError:
        raise ScenarioError(f"scenario file '{path}' is a directory, expected a TOML file") from None
    except UnicodeDecodeError:
        raise ScenarioError(f"scenario file '{path}' is not UTF-8 text") from None
    except OSError as error:
        raise ScenarioError(f"scenario file '{path}' cannot be read: {error.strerror}") from None
    return parse_text(text, source=str(path))


def parse_text(text: str, *, source: str = "scenario") -> dict[str, Any]:
    """Parse TOML text into a table (not yet resolved)."""
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as error:
        message = str(error).splitlines()[0] if str(error) else "invalid TOML"
        raise ScenarioError(f"scenario file '{source}' is not valid TOML: {message}") from None


def default_scenario() -> Scenario:
    """The embedded default scenario: K = M = 2 erf, small initialisation, a plateau and its escape."""
    return resolve({})


# ------------------------------------------------------------------ identity / output


def run_id(scenario: Scenario) -> str:
    """A short hash of what the resolved scenario computes: identical computations share a run_id.

    The judging sections (:data:`JUDGING_SECTIONS`) are left out: a different margin judges
    the same stored trajectories again instead of recomputing them.
    """
    computed = {section: values for section, values in scenario.items() if section not in JUDGING_SECTIONS}
    canonical = json.dumps(computed, sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(canonical.encode("utf-8")).hexdigest()[:12]


def flatten(scenario: Scenario) -> dict[str, Any]:
    """``{"sgd.learning_rate": 0.5, ...}``; lists become JSON text so tables stay flat."""
    flat: dict[str, Any] = {}
    for section, values in scenario.items():
        for name, value in values.items():
            flat[f"{section}.{name}"] = json.dumps(value) if isinstance(value, list) else value
    return flat


def with_overrides(scenario: Scenario, overrides: dict[str, Any]) -> Scenario:
    """Re-resolve ``scenario`` with dotted-key overrides (``{"data.input_dim": 1000}``).

    Derived defaults are re-derived unless overridden, so changing ``teacher.hidden``
    alone also resizes a default second layer.
    """
    table = _as_given_table(scenario)
    for dotted, value in overrides.items():
        section, _, name = dotted.partition(".")
        if not name:
            raise ScenarioError(f"override key '{dotted}': expected 'section.key'")
        table.setdefault(section, {})[name] = value
    return resolve(table)


def _as_given_table(scenario: Scenario) -> dict[str, Any]:
    """The scenario as a table, dropping values equal to derived defaults so they re-derive."""
    table = {section: dict(values) for section, values in scenario.items()}
    for role in ("teacher", "student"):
        if table[role].get("second_layer") == [1.0] * table[role]["hidden"]:
            del table[role]["second_layer"]
    if table["sgd"].get("second_layer_learning_rate") == table["sgd"]["learning_rate"]:
        del table["sgd"]["second_layer_learning_rate"]
    return table


def to_toml(scenario: Scenario) -> str:
    """Write a resolved scenario as TOML (our tables hold only scalars and flat lists)."""
    lines: list[str] = []
    for section, values in scenario.items():
        lines.append(f"[{section}]")
        for name, value in values.items():
            lines.append(f"{name} = {_toml_value(value)}")
        lines.append("")
    return "\n".join(lines)


def _toml_value(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, (int, float)):
        return repr(value)
    if isinstance(value, str):
        return json.dumps(value)  # a JSON string is a valid TOML basic string
    if isinstance(value, list):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    if isinstance(value, dict):
        return "{ " + ", ".join(f"{json.dumps(k)} = {_toml_value(v)}" for k, v in value.items()) + " }"
    raise TypeError(f"cannot write {type(value).__name__} as TOML")

"""Bad scenario files, fuzzed: every one is refused by `harness run` with one line and nothing written.

Hypothesis takes valid scenario files and breaks each in exactly one way: an unknown key or
section, a value of the wrong TOML type, a value outside what the key allows, a section that
is not a table, a rule between keys broken, malformed TOML, bytes that are not UTF-8, odd
unicode in names, values and file names. Each file goes through ``harness run FILE --out DIR``
in this process (harness.cli.main.main, SystemExit caught) and must give exit status 2, exactly one
line on stderr naming the key (or section, or file), no traceback, nothing on stdout and no
DIR. Validation fails before any JAX work, so an example costs about 40 ms (file, CLI, checks).

Which values are out of range is written here from the documented rules (README, the builtin_schema()
docs), not read from the validator; only the lists of allowed names are imported. Whether
text is malformed TOML is decided by the standard library's parser (tomllib, TOML 1.0).
"""

from __future__ import annotations

import contextlib
import datetime
import io
import math
import re
import tomllib
from typing import Any, NamedTuple

import pytest
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st

from harness.cli.main import main
from harness.core.activations import ACTIVATIONS, NETWORK_ACTIVATIONS
from harness.core.scenario import builtin_schema, choices, name_for_message, resolve

MAX_EXAMPLES = 400  # about 40 ms each (15-20 s); a 3000-example run found nothing more

BASES: list[dict[str, dict[str, Any]]] = [
    {  # i.i.d. Gaussian inputs, plain SGD (a tiny run, should a broken file ever be accepted)
        "data": {"input_dim": 20},
        "teacher": {"hidden": 2},
        "student": {"hidden": 2, "activation": "erf"},
        "sgd": {"learning_rate": 0.5, "time": 1.0},
        "run": {"seeds": 2, "evaluations": 4, "test_samples": 100, "checkpoint_minutes": 0.0},
    },
    {  # latent inputs, momentum, a trained second layer
        "data": {"kind": "latent", "input_dim": 30, "latent_dim": 10, "feature_map": "tanh"},
        "teacher": {"hidden": 1, "activation": "tanh"},
        "student": {"hidden": 3, "activation": "tanh", "train_second_layer": True},
        "sgd": {"optimizer": "momentum", "momentum": 0.5, "learning_rate": 0.2, "time": 1.0},
        "run": {"seeds": 2, "evaluations": 3, "test_samples": 50, "checkpoint_minutes": 0.0},
        "theory": {"rtol": 1e-5},
    },
]

# --------------------------------------------------------------------------- TOML text


def toml_string(text: str) -> str:
    """A TOML basic string: quote, backslash and control characters escaped (TOML 1.0, strings)."""
    escaped = []
    for char in text:
        if char in '"\\':
            escaped.append("\\" + char)
        elif ord(char) < 0x20 or ord(char) == 0x7F:
            escaped.append(f"\\u{ord(char):04X}")
        else:
            escaped.append(char)
    return '"' + "".join(escaped) + '"'


def toml_key(name: str) -> str:
    return name if re.fullmatch(r"[A-Za-z0-9_-]+", name) else toml_string(name)


def toml_value(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if math.isnan(value):
            return "nan"
        if math.isinf(value):
            return "inf" if value > 0 else "-inf"
        return repr(value)
    if isinstance(value, str):
        return toml_string(value)
    if isinstance(value, datetime.date):
        return value.isoformat()
    if isinstance(value, list):
        return "[" + ", ".join(toml_value(item) for item in value) + "]"
    if isinstance(value, dict):
        return "{ " + ", ".join(f"{toml_key(k)} = {toml_value(v)}" for k, v in value.items()) + " }"
    raise TypeError(type(value))


def toml_text(table: dict[str, Any]) -> str:
    """Top-level non-tables first (TOML requires it), then one [section] per table."""
    lines = [f"{toml_key(k)} = {toml_value(v)}" for k, v in table.items() if not isinstance(v, dict)]
    for section, keys in table.items():
        if isinstance(keys, dict):
            lines.append(f"\n[{toml_key(section)}]")
            lines += [f"{toml_key(k)} = {toml_value(v)}" for k, v in keys.items()]
    return "\n".join(lines) + "\n"


def copy(table: dict[str, dict[str, Any]]) -> dict[str, Any]:
    return {section: dict(keys) for section, keys in table.items()}


def shown(name: str) -> list[str]:
    """How a message may show a name: as it is, or escaped like a Python string literal."""
    return [name, repr(name)[1:-1]]


# -------------------------------------------------------------------------- bad inputs


class BadInput(NamedTuple):
    content: bytes
    file_name: str
    names: list[str]  # the message must contain one of these (a key, a section or the file)
    kind: str


# Odd unicode: right-to-left and zero-width marks, combining accents, line and paragraph
# separators, NEL, NUL, emoji, fullwidth letters, and plain ASCII.
ODD_CHARACTERS = st.one_of(
    st.characters(codec="utf-8"),
    st.sampled_from(["\u202e", "\u200b", "\u200d", "\u0301", "\u2028", "\u2029", "\x85", "\x00", "\t", "\n",
                     "\U0001f600", "\uff45", "\ufeff", " ", ".", "[", "]", '"', "'", "="]),
)
NAMES = st.text(ODD_CHARACTERS, min_size=1, max_size=12)

SCALARS = st.one_of(
    st.integers(-(2**63), 2**63 - 1), st.floats(allow_nan=True), st.booleans(), st.text(ODD_CHARACTERS, max_size=8),
    st.dates(),
)
VALUES = st.one_of(SCALARS, st.lists(SCALARS, max_size=3), st.dictionaries(NAMES, SCALARS, max_size=2))

INTEGERS = st.integers(-(2**63), 2**63 - 1)
NUMBERS = st.one_of(INTEGERS, st.floats())
TEXT = st.text(ODD_CHARACTERS, max_size=10)

# Values of every TOML type except the one a key wants (ints are fine where numbers are wanted).
WRONG_TYPE: dict[str, st.SearchStrategy] = {
    "int": st.one_of(st.floats(), st.booleans(), TEXT, st.dates(), st.lists(INTEGERS, max_size=2),
                     st.dictionaries(NAMES, INTEGERS, max_size=1)),
    "float": st.one_of(st.booleans(), TEXT, st.dates(), st.lists(NUMBERS, max_size=2),
                       st.dictionaries(NAMES, NUMBERS, max_size=1)),
    "bool": st.one_of(INTEGERS, st.floats(), TEXT, st.dates(), st.lists(st.booleans(), min_size=1, max_size=2)),
    "str": st.one_of(INTEGERS, st.floats(), st.booleans(), st.dates(), st.lists(TEXT, min_size=1, max_size=2),
                     st.dictionaries(NAMES, TEXT, max_size=1)),
    "float_list": st.one_of(NUMBERS, TEXT, st.booleans(),
                            st.lists(st.one_of(TEXT, st.booleans(), st.dates()), min_size=1, max_size=3),
                            st.lists(st.lists(NUMBERS, max_size=2), min_size=1, max_size=2)),
    "int_list": st.one_of(INTEGERS, TEXT, st.lists(st.one_of(st.floats(), st.booleans(), TEXT), min_size=1,
                                                   max_size=3)),
    "str_list": st.one_of(TEXT, INTEGERS, st.lists(st.one_of(INTEGERS, st.floats(), st.booleans()), min_size=1,
                                                   max_size=3)),
}


def not_in(allowed) -> st.SearchStrategy:
    return TEXT.filter(lambda text: text not in allowed)


def not_finite_or(at_most: float | None = None, below: float | None = None) -> st.SearchStrategy:
    """Floats that are NaN, infinite, or at most ``at_most`` / below ``below``."""
    options = [st.sampled_from([math.nan, math.inf, -math.inf])]
    if at_most is not None:
        options.append(st.floats(max_value=at_most, allow_infinity=False))
    if below is not None:
        options.append(st.floats(max_value=below, exclude_max=True, allow_infinity=False))
    return st.one_of(options)


POSITIVE_FINITE = not_finite_or(at_most=0.0)  # "a finite number > 0"
NON_NEGATIVE_FINITE = not_finite_or(below=0.0)  # "a finite number >= 0"
UNIT_INTERVAL = st.one_of(not_finite_or(below=0.0), st.floats(min_value=1.0))  # "a number in [0, 1)"

# Values outside what each key allows, from the documented rules.
OUT_OF_RANGE: dict[tuple[str, str], st.SearchStrategy] = {
    ("data", "kind"): not_in([c for c in choices("data.kind") if not c.endswith(":")]).filter(
        lambda text: not text.startswith("python:")),
    ("data", "input_dim"): st.integers(max_value=0),
    ("data", "latent_dim"): st.integers(max_value=-1),
    ("data", "feature_map"): not_in(ACTIVATIONS),
    ("data", "layers"): st.lists(st.integers(max_value=0), min_size=1, max_size=3),
    ("data", "layer_activations"): st.lists(not_in(ACTIVATIONS), min_size=1, max_size=3),
    ("data", "moment_samples"): st.integers(max_value=999),
    ("data", "generator"): st.text(" \t", max_size=3),
    ("teacher", "hidden"): st.integers(max_value=0),
    ("teacher", "activation"): not_in(NETWORK_ACTIVATIONS),
    ("teacher", "second_layer"): st.lists(not_finite_or(), min_size=1, max_size=2),
    ("teacher", "noise_std"): NON_NEGATIVE_FINITE,
    ("teacher", "init_std"): POSITIVE_FINITE,
    ("student", "hidden"): st.integers(max_value=0),
    ("student", "activation"): not_in(NETWORK_ACTIVATIONS),
    ("student", "init_std"): NON_NEGATIVE_FINITE,
    ("student", "second_layer"): st.lists(not_finite_or(), min_size=1, max_size=2),
    ("sgd", "learning_rate"): POSITIVE_FINITE,
    ("sgd", "second_layer_learning_rate"): POSITIVE_FINITE,
    ("sgd", "time"): POSITIVE_FINITE,
    ("sgd", "optimizer"): not_in(("sgd", "momentum", "adam")),
    ("sgd", "momentum"): UNIT_INTERVAL,
    ("sgd", "beta1"): UNIT_INTERVAL,
    ("sgd", "beta2"): UNIT_INTERVAL,
    ("sgd", "eps"): POSITIVE_FINITE,
    ("sgd", "weight_decay"): NON_NEGATIVE_FINITE,
    ("run", "seeds"): st.integers(max_value=0),
    ("run", "evaluations"): st.integers(max_value=1),
    ("run", "spacing"): not_in(("log", "linear")),
    ("run", "test_samples"): st.integers(max_value=0),
    ("run", "dtype"): not_in(("float32", "float64")),
    ("run", "seed"): st.integers(max_value=-1),
    ("run", "block_steps"): st.integers(max_value=-1),
    ("run", "engine"): not_in(("full", "chain")),
    ("run", "checkpoint_minutes"): NON_NEGATIVE_FINITE,
    ("theory", "source"): not_in(("builtin", "none")).filter(lambda t: not t.startswith(("python:", "file:"))),
    ("theory", "rtol"): POSITIVE_FINITE,
    ("theory", "atol"): POSITIVE_FINITE,
    ("theory", "limit"): not_in(("finite", "infinite")),
    ("theory", "bins"): st.integers(max_value=1),
}

# Rules between keys (README and builtin_schema() docs), each broken with values fine on their own:
# (base index, changes, the key the message must name).
CROSS_KEY: list[tuple[int, dict[str, dict[str, Any]], str]] = [
    (0, {"sgd": {"momentum": 0.5}}, "sgd.momentum"),  # momentum only with optimizer 'momentum'
    (0, {"sgd": {"beta2": 0.9}}, "sgd.beta2"),  # adam's settings only with 'adam'
    (1, {"sgd": {"optimizer": "adam"}}, "sgd.momentum"),  # the base's momentum no longer applies
    (0, {"teacher": {"second_layer": [1.0, 1.0, 1.0]}}, "teacher.second_layer"),  # one entry per hidden unit
    (1, {"student": {"second_layer": [1.0]}}, "student.second_layer"),
    (0, {"data": {"latent_dim": 5}}, "data.latent_dim"),  # latent kinds only
    (0, {"data": {"layers": [8]}}, "data.layers"),  # deep_latent only
    (0, {"theory": {"bins": 50}}, "theory.bins"),  # only with theory.limit = 'infinite'
    (0, {"theory": {"limit": "infinite"}}, "theory.limit"),  # latent inputs with an odd feature map only
    (1, {"data": {"feature_map": "relu"}, "theory": {"limit": "infinite"}}, "theory.limit"),
    (1, {"student": {"init_std": 0.0}}, "student.init_std"),  # the latent theory needs w != 0
    (1, {"run": {"engine": "chain"}}, "run.engine"),  # the chain: i.i.d. inputs and plain SGD only
    (0, {"data": {"input_dim": 4}, "run": {"engine": "chain"}}, "run.engine"),  # and N > K + M
    (0, {"data": {"kind": "deep_latent", "layers": [4], "layer_activations": ["tanh"]}}, "data.layer_activations"),
    (0, {"theory": {"source": "python:harness_no_such_module_here:predict"}}, "theory.source"),
    (0, {"theory": {"source": "file:no-such-theory-file.parquet"}}, "theory.source"),
    (0, {"data": {"kind": "python:harness_no_such_module_here:make"}}, "data.kind"),
]


# Characters that end a line for str.splitlines (and for many terminals).
LINE_BREAKS = "\n\r\x0b\x0c\x1c\x1d\x1e\x85\u2028\u2029"


def file_names() -> st.SearchStrategy[str]:
    """Scenario file names, some with odd but legal characters (no '/', no NUL).

    Line breaks in file names are left out here; a file name is shown escaped in messages,
    which the test below checks for names with line breaks.
    """
    odd = st.text(ODD_CHARACTERS.filter(lambda c: c not in "/\x00" + LINE_BREAKS), min_size=1, max_size=8)
    return st.one_of(st.just("scenario.toml"), odd.map(lambda name: name + ".toml"))


@st.composite
def bad_inputs(draw) -> BadInput:
    base_index = draw(st.integers(0, len(BASES) - 1))
    table = copy(BASES[base_index])
    kind = draw(st.sampled_from(
        ["unknown key", "unknown section", "wrong type", "out of range", "not a table", "cross key",
         "malformed TOML", "not UTF-8", "key as a table"]
    ))
    names: list[str]
    if kind == "unknown key":
        section = draw(st.sampled_from(list(builtin_schema())))
        name = draw(NAMES.filter(lambda n, s=section: n not in builtin_schema()[s]))
        table.setdefault(section, {})[name] = draw(VALUES)
        names = [f"{section}.{shown_name}" for shown_name in shown(name)]
    elif kind == "unknown section":
        section = draw(st.one_of(st.sampled_from(["sweep", "Data", "runs", "theory_", "meta"]), NAMES))
        assume(section not in builtin_schema())
        table[section] = draw(st.dictionaries(NAMES, SCALARS, max_size=2))
        names = [f"'{shown_name}'" for shown_name in shown(section)]
    elif kind == "wrong type":
        section = draw(st.sampled_from(list(builtin_schema())))
        key = draw(st.sampled_from(list(builtin_schema()[section])))
        table.setdefault(section, {})[key] = draw(WRONG_TYPE[builtin_schema()[section][key].kind])
        names = [f"{section}.{key}"]
    elif kind == "out of range":
        section, key = draw(st.sampled_from(list(OUT_OF_RANGE)))
        table.setdefault(section, {})[key] = draw(OUT_OF_RANGE[(section, key)])
        names = [f"{section}.{key}"]
    elif kind == "not a table":
        section = draw(st.sampled_from(list(builtin_schema())))
        table[section] = draw(st.one_of(SCALARS, st.lists(SCALARS, max_size=2)))
        names = [f"'{section}'"]
    elif kind == "key as a table":  # [sgd.learning_rate] or learning_rate = { ... }
        section = draw(st.sampled_from(list(builtin_schema())))
        key = draw(st.sampled_from(list(builtin_schema()[section])))
        table.setdefault(section, {})[key] = draw(st.dictionaries(NAMES, SCALARS, max_size=2))
        names = [f"{section}.{key}"]
    elif kind == "cross key":
        base_index, changes, key = draw(st.sampled_from(CROSS_KEY))
        table = copy(BASES[base_index])
        for section, values in changes.items():
            table.setdefault(section, {}).update(values)
        names = [key]
    text = toml_text(table)
    content = text.encode("utf-8")
    if kind == "malformed TOML":
        position = draw(st.integers(0, len(text)))
        how = draw(st.sampled_from(["insert", "delete", "duplicate line", "unterminated string"]))
        if how == "insert":
            text = text[:position] + draw(st.text(ODD_CHARACTERS, min_size=1, max_size=4)) + text[position:]
        elif how == "delete":
            text = text[:position] + text[position + draw(st.integers(1, 8)):]
        elif how == "duplicate line":
            lines = text.splitlines(keepends=True)
            line = draw(st.sampled_from([line for line in lines if "=" in line]))
            text = text.replace(line, line + line, 1)
        else:
            text = text[:position] + '\nbroken = "never closed\n' + text[position:]
        try:
            tomllib.loads(text)
            assume(False)  # still valid TOML: not this kind of bad input
        except tomllib.TOMLDecodeError:
            pass
        content = text.encode("utf-8")
        names = []  # the file is named (below)
    elif kind == "not UTF-8":
        position = draw(st.integers(0, len(content)))
        content = content[:position] + draw(st.sampled_from([b"\xff", b"\xc3\x28", b"\xed\xa0\x80", b"\x80"]))
        content += toml_text(table).encode("utf-8")[position:]
        names = []
    file_name = draw(file_names())
    return BadInput(content, file_name, names, kind)


def test_every_bad_scenario_file_is_refused_with_one_line_naming_it(tmp_path, capsys):
    tried: set[tuple[bytes, str]] = set()
    kinds: dict[str, int] = {}
    problems: list[str] = []

    @settings(max_examples=MAX_EXAMPLES, deadline=None,
              suppress_health_check=[HealthCheck.too_slow, HealthCheck.filter_too_much])
    @given(bad_inputs())
    def refused(bad: BadInput) -> None:
        tried.add((bad.content, bad.file_name))
        kinds[bad.kind] = kinds.get(bad.kind, 0) + 1
        folder = tmp_path / f"example-{len(tried)}-{len(kinds)}-{sum(kinds.values())}"
        folder.mkdir()
        path = folder / bad.file_name
        path.write_bytes(bad.content)
        out = folder / "out"
        stdout, stderr = io.StringIO(), io.StringIO()
        with contextlib.redirect_stdout(stdout), contextlib.redirect_stderr(stderr):
            try:
                status = main(["run", str(path), "--out", str(out), "--quiet"])
            except SystemExit as exit_:
                status = exit_.code
        err = stderr.getvalue()
        context = f"{bad.kind}: {bad.content!r} in {bad.file_name!r} -> status {status}, stderr {err!r}"
        assert status == 2, context
        assert "Traceback" not in err, context
        assert err.startswith("harness: error: ") and err.endswith("\n"), context
        assert len(err.splitlines()) == 1 and err.count("\n") == 1, context
        # a file name with unprintable characters is shown escaped (harness.core.scenario.name_for_message)
        shown = [str(path), name_for_message(path)]
        assert any(name in err for name in bad.names or shown), f"names none of {bad.names or shown}: {context}"
        assert stdout.getvalue() == "", context
        assert not out.exists(), context

    try:
        refused()
    except AssertionError as error:
        problems.append(str(error))
    with capsys.disabled():
        print(f"\nbad-input fuzz: {len(tried)} distinct bad scenario files tried ({dict(sorted(kinds.items()))})")
    assert not problems, problems[0]


def test_the_files_broken_above_are_valid_before_they_are_broken():
    for base in BASES:
        scenario = resolve(tomllib.loads(toml_text(base)))
        assert scenario["data"]["input_dim"] <= 30 and scenario["sgd"]["time"] <= 1.0  # tiny, should one slip


@pytest.mark.parametrize("name", ["line\nbreak.toml", "carriage\rreturn.toml", "separator\u2028.toml"])
def test_a_malformed_file_whose_name_has_a_line_break_is_still_named_on_one_line(tmp_path, name):
    path = tmp_path / name
    path.write_text("[data\ninput_dim = 20\n")
    out = tmp_path / "out"
    stderr = io.StringIO()
    with contextlib.redirect_stderr(stderr):
        assert main(["run", str(path), "--out", str(out)]) == 2
    assert len(stderr.getvalue().splitlines()) == 1, stderr.getvalue()
    assert not out.exists()

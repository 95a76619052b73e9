"""Scenario files: defaults, validation messages, exit statuses, and a property test."""

from __future__ import annotations

import math
import subprocess
import sys
import tomllib

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from harness.cli.main import main
from harness.core import scenario as sc


def test_defaults_are_the_documented_ones():
    s = sc.default_scenario()
    assert s["data"]["kind"] == "gaussian" and s["data"]["input_dim"] == 500
    assert s["teacher"]["hidden"] == 2 and s["teacher"]["activation"] == "erf"
    assert s["teacher"]["second_layer"] == (1.0, 1.0) and s["teacher"]["noise_std"] == 0.0
    assert s["student"]["init_std"] == 0.1 and s["student"]["train_second_layer"] is False
    assert s["sgd"]["learning_rate"] == 0.5 and s["sgd"]["second_layer_learning_rate"] == 0.5
    assert s["sgd"]["time"] == 300.0
    assert s["run"]["seeds"] == 8 and s["run"]["evaluations"] == 60 and s["run"]["spacing"] == "log"
    assert (s["theory"]["source"], s["theory"]["rtol"], s["theory"]["atol"]) == ("builtin", 1e-6, 1e-9)


def test_derived_defaults_follow_their_keys():
    s = sc.resolve({"student": {"hidden": 3}, "sgd": {"learning_rate": 0.2}})
    assert s["student"]["second_layer"] == (1.0, 1.0, 1.0)
    assert s["sgd"]["second_layer_learning_rate"] == 0.2


def test_toml_round_trip_and_run_id_stability():
    s = sc.resolve({"teacher": {"noise_std": 0.25}, "run": {"spacing": "linear"}})
    again = sc.resolve(tomllib.loads(sc.to_toml(s)))
    assert again == s
    assert sc.run_id(again) == sc.run_id(s)
    assert sc.run_id(sc.resolve({"sgd": {"learning_rate": 0.25}})) != sc.run_id(s)


def test_overrides_rederive_defaults():
    s = sc.with_overrides(sc.default_scenario(), {"teacher.hidden": 3, "data.input_dim": 100})
    assert s["teacher"]["second_layer"] == (1.0,) * 3 and s["data"]["input_dim"] == 100


@pytest.mark.parametrize(
    "table, fragment",
    [
        ({"bogus": {}}, "section 'bogus' is unknown"),
        ({"sgd": {"speed": 1}}, "'sgd.speed' is unknown"),
        ({"data": {"input_dim": "500"}}, "'data.input_dim': expected an integer"),
        ({"data": {"input_dim": 0}}, "'data.input_dim': must be an integer >= 1"),
        ({"teacher": {"hidden": 0}}, "'teacher.hidden'"),
        ({"sgd": {"learning_rate": 0.0}}, "'sgd.learning_rate': must be a finite number > 0"),
        ({"sgd": {"learning_rate": -1}}, "'sgd.learning_rate'"),
        ({"sgd": {"learning_rate": math.inf}}, "'sgd.learning_rate'"),
        ({"sgd": {"learning_rate": math.nan}}, "'sgd.learning_rate'"),
        ({"sgd": {"time": 0.0}}, "'sgd.time'"),
        ({"teacher": {"second_layer": [1.0]}}, "'teacher.second_layer': must have teacher.hidden = 2 entries"),
        ({"student": {"activation": "softplus"}}, "'student.activation': must be one of"),
        ({"run": {"evaluations": 1}}, "'run.evaluations': must be an integer >= 2"),
        ({"run": {"seeds": True}}, "'run.seeds': expected an integer"),
        ({"run": {"spacing": "cubic"}}, "'run.spacing'"),
        ({"theory": {"source": "oracle"}}, "'theory.source'"),
    ],
)
def test_invalid_tables_name_the_key(table, fragment):
    with pytest.raises(sc.ScenarioError) as error:
        sc.resolve(table)
    message = str(error.value)
    assert fragment in message
    assert "\n" not in message


def test_cli_rejects_bad_file_with_status_2_and_writes_nothing(tmp_path, capsys):
    bad = tmp_path / "bad.toml"
    bad.write_text("[sgd]\nlearning_rate = -0.5\n")
    out = tmp_path / "out"
    assert main(["run", str(bad), "--out", str(out)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "sgd.learning_rate" in err[0]
    assert not out.exists()


def test_a_held_out_set_too_large_for_the_machine_is_refused_before_any_work(tmp_path, capsys):
    # 16 seeds x 10^6 samples x N = 10^5 in float32 is 6 TB: no machine running this has it.
    scenario = tmp_path / "huge.toml"
    scenario.write_text("[data]\ninput_dim = 100000\n[run]\nseeds = 16\ntest_samples = 1000000\n")
    out = tmp_path / "out"
    assert main(["run", str(scenario), "--out", str(out)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "run.test_samples" in err[0] and "GiB" in err[0] and "chain" in err[0]
    assert not out.exists()


def test_cli_missing_and_malformed_files(tmp_path, capsys):
    assert main(["run", str(tmp_path / "nope.toml"), "--out", str(tmp_path / "o")]) == 2
    assert "does not exist" in capsys.readouterr().err
    broken = tmp_path / "broken.toml"
    broken.write_text("[data\ninput_dim = 3")
    assert main(["theory", str(broken), "--out", str(tmp_path / "o")]) == 2
    assert "not valid TOML" in capsys.readouterr().err
    assert not (tmp_path / "o").exists()


def test_console_script_exit_status():
    # The installed entry point, as a user runs it.
    result = subprocess.run(
        [sys.executable, "-m", "harness", "run", "/nonexistent/scenario.toml"], capture_output=True, text=True
    )
    assert result.returncode == 2
    assert result.stderr.count("\n") == 1 and "scenario file" in result.stderr


# --------------------------------------------------------------------- property tests

scalars = st.one_of(
    st.integers(-10**6, 10**6), st.floats(allow_nan=True, allow_infinity=True), st.booleans(),
    st.text(max_size=8), st.lists(st.floats(allow_nan=False, allow_infinity=False, width=32), max_size=4),
)
sections = st.sampled_from(list(sc.builtin_schema()) + ["sweep", "extra"])
key_names = st.one_of(
    st.sampled_from(sorted({k for keys in sc.builtin_schema().values() for k in keys})), st.text(min_size=1, max_size=6)
)
tables = st.dictionaries(sections, st.one_of(st.dictionaries(key_names, scalars, max_size=5), scalars), max_size=4)


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(tables)
def test_no_table_produces_a_traceback(table):
    try:
        resolved = sc.resolve(table)
    except sc.ScenarioError as error:
        assert "\n" not in str(error) and str(error)
    else:
        sc.run_id(resolved)
        assert tomllib.loads(sc.to_toml(resolved)) == resolved


@settings(max_examples=300, deadline=None)
@given(st.text(max_size=200))
def test_no_text_produces_a_traceback(text):
    try:
        sc.resolve(sc.parse_text(text))
    except sc.ScenarioError as error:
        assert "\n" not in str(error)

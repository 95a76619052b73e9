"""The package's structure: layers, no side effects on import, declarations in one place, the public API."""

from __future__ import annotations

import os
import runpy
import subprocess
import sys
import tomllib
from pathlib import Path

import numpy as np
import pytest
import real_results

import harness
from harness.builtins import SECTIONS_FILE, sections_source
from harness.cli.keys import format_keys
from harness.cli.main import main
from harness.core import scenario as sc

REPO = Path(__file__).resolve().parents[1]
# The shared tiny scenario of tests/real_results.py (N = 20, 3 seeds, t = 1): a worker that
# made the shared results has its programs traced and compiled already.
TINY = tomllib.loads(real_results.TINY)


def test_the_layers_depend_only_downwards():
    # import-linter's layers contract in pyproject.toml (Seddon, import-linter documentation).
    lint = Path(sys.executable).with_name("lint-imports")
    command = [str(lint)] if lint.exists() else [sys.executable, "-m", "importlinter.cli"]
    result = subprocess.run(command, cwd=REPO, capture_output=True, text=True)
    assert result.returncode == 0, result.stdout[-3000:] + result.stderr[-2000:]
    assert "1 kept, 0 broken" in result.stdout


def test_importing_harness_changes_no_global_setting():
    code = (
        "import os, sys, jax\n"
        "before = (jax.config.jax_enable_x64, jax.config.jax_compilation_cache_dir, list(sys.path), "
        "os.environ.get('EQX_ON_ERROR'), 'matplotlib' in sys.modules)\n"
        "import harness\n"
        "harness.load_scenario({'data': {'kind': 'latent', 'input_dim': 40}})\n"
        "after = (jax.config.jax_enable_x64, jax.config.jax_compilation_cache_dir, list(sys.path), "
        "os.environ.get('EQX_ON_ERROR'), 'matplotlib' in sys.modules)\n"
        "assert before == after, (before, after)\n"
        "harness.configure()\n"
        "assert jax.config.jax_enable_x64\n"
    )
    env = {k: v for k, v in os.environ.items() if k != "EQX_ON_ERROR"}
    result = subprocess.run([sys.executable, "-c", code], cwd=REPO, capture_output=True, text=True, env=env)
    assert result.returncode == 0, result.stderr[-2000:]


def test_the_typed_sections_are_made_from_the_current_declarations():
    # harness/core/sections.py is generated (python -m harness.builtins); stale, it would type
    # keys that no longer exist or miss new ones.
    assert SECTIONS_FILE.read_text() == sections_source(), "run: python -m harness.builtins"


def test_a_resolved_scenario_is_typed_and_immutable():
    s = harness.load_scenario({"sgd": {"learning_rate": 0.7}})
    assert s.sgd.learning_rate == 0.7 == s["sgd"]["learning_rate"]  # attribute or table, same value
    with pytest.raises(AttributeError):
        s.sgd.learning_rate = 1.0  # frozen
    with pytest.raises(AttributeError):
        s.sgd.learnig_rate  # noqa: B018 - a misspelled field fails where it is written
    assert type(s.sgd).__name__ == "SgdSection" and s.teacher.second_layer == (1.0, 1.0)
    assert sc.run_id(s) == sc.run_id(sc.resolve(sc.to_dict(s)))


def test_each_key_belongs_to_the_choices_that_declared_it():
    # One rule for every "this key means something only for that choice".
    cases = [
        ({"data": {"latent_dim": 3}}, "'data.latent_dim': applies only with data.kind = 'latent' or 'deep_latent'"),
        ({"sgd": {"beta1": 0.5}}, "'sgd.beta1': applies only with sgd.optimizer = 'adam'"),
        ({"theory": {"bins": 10}}, "'theory.bins': applies only with theory.limit = 'infinite'"),
    ]
    for table, message in cases:
        with pytest.raises(sc.ScenarioError, match=message.replace("(", r"\(").replace(")", r"\)")):
            sc.resolve(table)


def test_keys_lists_every_declared_key(capsys):
    assert main(["keys"]) == 0
    text = capsys.readouterr().out
    for section, keys in sc.builtin_schema().items():
        assert f"[{section}]" in text
        for name in keys:
            assert f"  {name} = " in text, (section, name)
    assert "only with sgd.optimizer = 'momentum'" in format_keys("sgd")
    assert main(["keys", "nosuchsection"]) == 2


def test_run_in_memory_writes_nothing_and_load_run_reads_a_stored_run_back(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    in_memory = harness.run(TINY)
    assert in_memory.folder is None and not any(tmp_path.iterdir())
    stored = harness.run(TINY, out=tmp_path / "results")
    again = harness.load_run(stored.folder)
    assert again.run_id == stored.run_id == in_memory.run_id
    assert again.verdict == stored.verdict in ("agree", "disagree", "inconclusive")
    np.testing.assert_array_equal(again.summary["sim_mean"], in_memory.summary["sim_mean"])
    arrays = again.arrays()
    assert arrays.sim.shape == (3, len(arrays.t), len(arrays.observables))
    with pytest.raises(harness.InputError, match="not a complete run"):
        harness.load_run(tmp_path)


def test_a_theory_given_as_a_function(tmp_path):
    calls = []

    def constant_error(scenario, start, times):
        calls.append((len(start.seeds), len(times)))
        return {"test_error": np.full(len(times), 0.25)}

    result = harness.run(TINY, theory=constant_error)
    # asked once for two times before simulating (a broken theory is refused at once), then for all
    assert calls == [(3, 2), (3, result.scenario.run.evaluations)]
    assert result.scenario.theory.source.endswith("constant_error")
    theory = result.arrays().theory
    assert np.all(theory[:, :, 0] == 0.25) and np.all(np.isnan(theory[:, :, 2]))


def test_the_notebook_tour_runs(tmp_path, monkeypatch, capsys):
    # The file as it is, run as a script (__main__, the output folder as its argument) in this
    # process, with the harness these tests import: a fresh interpreter added only its start-up
    # (importing JAX, ~5 s), and any error in the tour still fails the test with its traceback.
    tour = REPO / "examples" / "notebook_tour.py"
    monkeypatch.chdir(REPO)
    monkeypatch.setattr(sys, "argv", [str(tour), str(tmp_path)])
    runpy.run_path(str(tour), run_name="__main__")
    assert (tmp_path / "tour_learning_curve.png").stat().st_size > 10_000
    assert "final test error" in capsys.readouterr().out

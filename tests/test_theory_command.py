"""``harness theory`` on a stored run: the same initial conditions, the same judged table, no simulation."""

from __future__ import annotations

import io
from contextlib import redirect_stdout

import numpy as np
import pandas as pd

from harness.cli.main import main
from harness.cli.run import format_judgement
from harness.core import scenario as scenario_lib
from harness.results.judgement import EXIT_STATUS
from harness.runner.pipeline import run_and_store

TINY = "[data]\ninput_dim = 60\n[sgd]\ntime = 5.0\n[run]\nseeds = 4\nevaluations = 10\ntest_samples = 300\n"


def _harness(*argv: str) -> tuple[int, str]:
    printed = io.StringIO()
    with redirect_stdout(printed):
        status = main(list(argv))
    return status, printed.getvalue()


def test_theory_on_a_stored_run_pairs_with_its_simulation_and_prints_the_run_table(tmp_path):
    scenario_file = tmp_path / "tiny.toml"
    scenario_file.write_text(TINY)
    out = tmp_path / "results"
    stored = run_and_store(scenario_lib.load(scenario_file), out)

    status, printed = _harness("theory", str(stored.folder), "--quiet")
    assert status == EXIT_STATUS[stored.judgement["verdict"]]
    assert "simulation 0.0 s" not in printed
    assert f"paired with the stored simulation of run {stored.run_id}" in printed
    for line in format_judgement(stored.judgement):  # the very table `harness run` printed
        assert line in printed
    # The initial conditions were drawn again, bit for bit: the same theory, the same simulation.
    run = pd.read_parquet(stored.folder / "trajectories.parquet")
    theory = pd.read_parquet(out / f"{stored.run_id}-theory" / "trajectories.parquet")
    assert np.array_equal(theory["theory"].to_numpy(), run["theory"].to_numpy(), equal_nan=True)
    assert np.array_equal(theory["sim"].to_numpy(), run["sim"].to_numpy(), equal_nan=True)

    # A scenario whose run is stored in --out finds it the same way (and reuses the theory run).
    again, printed_again = _harness("theory", str(scenario_file), "--out", str(out), "--quiet")
    assert again == status and "already complete" in printed_again
    for line in format_judgement(stored.judgement):
        assert line in printed_again


def test_theory_without_a_simulation_prints_its_key_values_and_exits_0(tmp_path):
    scenario_file = tmp_path / "tiny.toml"
    scenario_file.write_text(TINY)
    status, printed = _harness("theory", str(scenario_file), "--out", str(tmp_path / "results"), "--quiet")
    assert status == 0
    assert "no stored simulation to judge it against" in printed
    assert "simulation 0.0 s" not in printed and "verdict" not in printed
    final = next(line for line in printed.splitlines() if "final test error" in line)
    assert "spread over 4 seeds" in final and "(std)" in final


def test_a_folder_that_is_not_a_run_is_refused_in_one_line(tmp_path, capsys):
    (tmp_path / "empty").mkdir()
    assert main(["theory", str(tmp_path / "empty")]) == 2
    error = capsys.readouterr().err.strip()
    assert error.count("\n") == 0 and "not a complete run" in error

"""``--force``: a stored run is replaced out loud, and the figures drawn from it are not lost.

The run folders are synthetic trajectories written by the tool's own writers
(tests/conftest_figures.py), so replacing one takes no simulation.
"""

from __future__ import annotations

import pytest
from conftest_figures import write_run_folder

from harness.cli.main import main
from harness.core import scenario as scenario_lib
from harness.plot import figures, report

TINY = "[data]\ninput_dim = 20\n[sgd]\ntime = 1.0\n[run]\nseeds = 2\nevaluations = 4\ntest_samples = 100\n"


def test_force_keeps_the_figures_and_the_report_redraws_them(tmp_path):
    run = write_run_folder(tmp_path, "run-r")
    figures.write_run_figures(run, figures.FigureOptions(formats=("png",)))
    before = (run / "figures" / "learning_curve.png").read_bytes()
    # The same run computed again, differently (the theory now departs), replacing the stored one.
    again = write_run_folder(tmp_path, "run-r", theory_bias=0.3, rng_seed=5, replace=True)
    assert again == run
    kept = run / "figures" / "learning_curve.png"
    assert kept.read_bytes() == before  # kept, not silently deleted ...
    assert kept.stat().st_mtime < (run / "summary.parquet").stat().st_mtime  # ... and older than the new tables
    assert not [p for p in tmp_path.iterdir() if "retired" in p.name or p.name.endswith(".partial")]
    # So the report counts it stale and redraws it from the new tables.
    report.write_report(tmp_path)
    assert kept.read_bytes() != before
    assert kept.stat().st_mtime >= (run / "summary.parquet").stat().st_mtime


class Stop(Exception):
    """Raised in place of the run's work: the test looks only at what was said before it."""


def _stop(*args, **kwargs):
    raise Stop


@pytest.mark.parametrize("with_figures", [True, False])
def test_run_force_says_on_stderr_which_run_it_replaces(tmp_path, capsys, monkeypatch, with_figures):
    scenario_file = tmp_path / "tiny.toml"
    scenario_file.write_text(TINY)
    out = tmp_path / "results"
    folder = write_run_folder(out, scenario_lib.run_id(scenario_lib.load(scenario_file)))
    if with_figures:
        figures.write_run_figures(folder, figures.FigureOptions(formats=("png",)))
    monkeypatch.setattr("harness.runner.pipeline.run_and_store", _stop)
    capsys.readouterr()
    with pytest.raises(Stop):
        main(["run", str(scenario_file), "--out", str(out), "--force", "--quiet"])
    error = capsys.readouterr().err
    assert error.count("\n") == 1
    assert error.startswith(f"harness: --force: replacing the stored run '{folder}'")
    assert ("its figures/ are kept" in error) == with_figures
    assert ("'harness report' or 'harness figure' redraws them" in error) == with_figures


def test_force_with_nothing_stored_says_nothing(tmp_path, capsys, monkeypatch):
    scenario_file = tmp_path / "tiny.toml"
    scenario_file.write_text(TINY)
    monkeypatch.setattr("harness.runner.pipeline.run_and_store", _stop)
    capsys.readouterr()
    with pytest.raises(Stop):  # nothing stored yet: straight to the work
        main(["run", str(scenario_file), "--out", str(tmp_path / "results"), "--force", "--quiet"])
    assert capsys.readouterr().err == ""

"""Every command checks its arguments, and where it will write, before it does any work.

For each command a bad destination (a file where a folder is expected, and the like) must
give exit status 2, exactly one line on stderr naming the option and the path, nothing
written, and no computation started. "Started" is detected two ways: the function that
would do the work is replaced by one that fails the test if it is called, and JAX's own
compile events (harness.runner.compile_clock) must not fire. The commands run in this
process through harness.cli.main.main, as the console script runs them.
"""

from __future__ import annotations

import os
import shutil
from collections import namedtuple
from pathlib import Path

import pytest
from conftest_figures import write_run_folder, write_scaling_folder, write_sweep_folder
from real_results import SWEEP, TINY  # the shared tiny scenario and its two-point sweep

from harness.cli.main import main
from harness.core import destinations
from harness.runner.compile_clock import CompileClock


def _tree(root: Path) -> list[tuple[str, int]]:
    """Every path below ``root`` with its size (a listing that any write would change)."""
    return sorted((str(p.relative_to(root)), p.stat().st_size if p.is_file() else -1) for p in root.rglob("*"))


def _forbid(monkeypatch, target: str) -> None:
    """Replace the function at dotted ``target`` by one that fails the test: the work must not start."""

    def started(*args, **kwargs):
        raise AssertionError(f"{target} was called: the command started its work before checking its arguments")

    monkeypatch.setattr(target, started)


def _refused(capsys, tmp_path: Path, argv: list[str], *named: str) -> str:
    """Run ``harness argv``: exit 2, one stderr line holding every text in ``named``, nothing written, no compile."""
    before = _tree(tmp_path)
    capsys.readouterr()
    with CompileClock() as clock:
        status = main(argv)
    captured = capsys.readouterr()
    assert status == 2, captured
    assert captured.err.count("\n") == 1 and captured.err.endswith("\n"), captured.err
    for text in named:
        assert text in captured.err, (text, captured.err)
    assert _tree(tmp_path) == before  # nothing written, not even an empty folder
    assert clock.compile_s == 0.0  # no JAX program was traced or compiled
    return captured.err


@pytest.fixture
def files(tmp_path: Path) -> dict[str, Path]:
    (tmp_path / "ok.toml").write_text(TINY)
    (tmp_path / "sweep.toml").write_text(SWEEP)
    (tmp_path / "afile").write_text("not a folder\n")
    (tmp_path / "afolder").mkdir()
    return {name: tmp_path / name for name in ("ok.toml", "sweep.toml", "afile", "afolder")}


# ------------------------------------------------------------------------- run and theory


def test_run_refuses_an_out_that_is_a_file(tmp_path, files, capsys, monkeypatch):
    # The case from the issue: this used to simulate for half a minute, then die of FileExistsError.
    _forbid(monkeypatch, "harness.runner.pipeline.run_and_store")
    _refused(capsys, tmp_path, ["run", str(files["ok.toml"]), "--out", str(files["afile"])],
             "--out", str(files["afile"]), "is a file")


def test_run_refuses_an_out_inside_a_file(tmp_path, files, capsys, monkeypatch):
    _forbid(monkeypatch, "harness.runner.pipeline.run_and_store")
    out = files["afile"] / "results"
    _refused(capsys, tmp_path, ["run", str(files["ok.toml"]), "--out", str(out)], "--out", str(out), "which is a file")


def test_run_refuses_a_full_disk(tmp_path, files, capsys, monkeypatch):
    # shutil.disk_usage stands in for a disk with 1 MB left (the check itself is real).
    _forbid(monkeypatch, "harness.runner.pipeline.run_and_store")
    usage = namedtuple("usage", "total used free")
    monkeypatch.setattr(destinations.shutil, "disk_usage", lambda path: usage(10**9, 10**9 - 2**20, 2**20))
    out = tmp_path / "results"
    _refused(capsys, tmp_path, ["run", str(files["ok.toml"]), "--out", str(out)],
             "--out", str(out), "only 1.0 MB free", f"{destinations.MIN_FREE_BYTES // 2**20} MB needed")


def test_run_refuses_an_out_it_cannot_write(tmp_path, files, capsys, monkeypatch):
    _forbid(monkeypatch, "harness.runner.pipeline.run_and_store")
    locked = files["afolder"]
    if os.geteuid() == 0:  # root may write into any folder: os.access stands in for a locked one
        real_access = os.access

        def access(path, mode):
            return Path(path) != locked and real_access(path, mode)

        monkeypatch.setattr(destinations.os, "access", access)
    else:
        locked.chmod(0o555)
    try:
        _refused(capsys, tmp_path, ["run", str(files["ok.toml"]), "--out", str(locked / "results")],
                 "--out", f"cannot write in '{locked}'", "permission denied")
    finally:
        locked.chmod(0o755)


def test_run_refuses_a_scenario_and_a_bad_out_with_one_line(tmp_path, files, capsys, monkeypatch):
    # Both wrong: still one line (the scenario is checked first), still nothing done.
    _forbid(monkeypatch, "harness.runner.pipeline.run_and_store")
    bad = tmp_path / "bad.toml"
    bad.write_text(TINY.replace("input_dim = 20", "input_dim = 0"))
    _refused(capsys, tmp_path, ["run", str(bad), "--out", str(files["afile"])], "data.input_dim")


def test_theory_refuses_an_out_that_is_a_file(tmp_path, files, capsys, monkeypatch):
    _forbid(monkeypatch, "harness.runner.pipeline.theory_and_store")
    _refused(capsys, tmp_path, ["theory", str(files["ok.toml"]), "--out", str(files["afile"])],
             "--out", str(files["afile"]))


# ------------------------------------------------------------------ studies and baselines


def test_scale_refuses_an_out_that_is_a_file(tmp_path, files, capsys, monkeypatch):
    _forbid(monkeypatch, "harness.runner.pipeline.run_and_store")
    _refused(capsys, tmp_path, ["scale", str(files["ok.toml"]), "--sizes", "20,30,40", "--out", str(files["afile"])],
             "--out", str(files["afile"]))


def test_sweep_refuses_an_out_that_is_a_file(tmp_path, files, capsys, monkeypatch):
    _forbid(monkeypatch, "harness.cli.sweep.run_sweep")
    _forbid(monkeypatch, "harness.cli.sweep.LocalExecutor")  # no worker pool either
    _refused(capsys, tmp_path, ["sweep", str(files["sweep.toml"]), "--out", str(files["afile"])],
             "--out", str(files["afile"]))


def test_baseline_save_refuses_a_dir_that_is_a_file(tmp_path, files, capsys, monkeypatch):
    _forbid(monkeypatch, "harness.cli.baseline.save_baseline")
    _refused(capsys, tmp_path, ["baseline", "save", str(files["ok.toml"]), "--dir", str(files["afile"])],
             "--dir", str(files["afile"]))


def test_check_refuses_a_dir_that_is_a_file(tmp_path, files, capsys, monkeypatch):
    _forbid(monkeypatch, "harness.studies.baselines.check_baseline")
    _refused(capsys, tmp_path, ["check", "--dir", str(files["afile"])], str(files["afile"]), "not a folder")


def test_fixed_points_refuses_an_out_that_is_a_file(tmp_path, files, capsys, monkeypatch):
    _forbid(monkeypatch, "harness.equations.fixed_points.fixed_points")
    _refused(capsys, tmp_path, ["fixed-points", str(files["ok.toml"]), "--out", str(files["afile"])],
             "--out", str(files["afile"]))


def test_generator_train_refuses_a_store_that_is_a_file(tmp_path, files, capsys, monkeypatch):
    _forbid(monkeypatch, "harness.data.trained_generator.train_generator")
    _refused(capsys, tmp_path, ["generator", "train", "--store", str(files["afile"]), "--quiet"],
             "--store", str(files["afile"]))


def test_generator_preview_refuses_an_out_that_is_a_folder(tmp_path, files, capsys, monkeypatch):
    _forbid(monkeypatch, "harness.data.trained_generator.load_generator")
    _refused(capsys, tmp_path, ["generator", "preview", "digits", "--out", str(files["afolder"])],
             "--out", str(files["afolder"]), "is a folder")


def test_keys_refuses_an_unknown_section(tmp_path, capsys):
    # keys writes nothing; its one argument is checked the same way.
    _refused(capsys, tmp_path, ["keys", "nosuch"], "nosuch", "sections:")


# --------------------------------------------------------------------- figures and report


def test_figure_refuses_a_figures_path_that_is_a_file(tmp_path, capsys, monkeypatch):
    _forbid(monkeypatch, "harness.plot.figures.write_figures")
    run = write_run_folder(tmp_path, "run-a")
    (run / "figures").write_text("in the way\n")
    _refused(capsys, tmp_path, ["figure", str(run)], str(run / "figures"), "is a file")


def test_figure_checks_every_folder_before_drawing_any(tmp_path, capsys):
    # A good run folder first, a sweep with an unknown metric second: nothing is drawn at all.
    run = write_run_folder(tmp_path, "run-b")
    sweep = write_sweep_folder(tmp_path)
    _refused(capsys, tmp_path, ["figure", str(run), str(sweep), "--metric", "speed"], "--metric 'speed'")
    _refused(capsys, tmp_path, ["figure", str(run), str(sweep), "--sweep-axes", "data.input_dim"], "--sweep-axes")
    _refused(capsys, tmp_path, ["figure", str(run), "--groups", "Z"], "--groups 'Z'")


def test_report_refuses_a_full_disk_before_drawing(tmp_path, capsys, monkeypatch):
    _forbid(monkeypatch, "harness.plot.report.write_report")
    write_scaling_folder(tmp_path)
    usage = namedtuple("usage", "total used free")
    monkeypatch.setattr(destinations.shutil, "disk_usage", lambda path: usage(10**9, 10**9 - 2**20, 2**20))
    _refused(capsys, tmp_path, ["report", str(tmp_path)], "DIR", str(tmp_path), "MB free")


def test_report_refuses_a_dir_that_is_a_file(tmp_path, files, capsys):
    _refused(capsys, tmp_path, ["report", str(files["afile"])], str(files["afile"]), "not a folder")


def test_destination_checks_accept_what_can_be_written(tmp_path):
    # The other side: a missing folder (created later), an existing one, a new file name.
    assert destinations.check_output_folder(tmp_path / "new" / "deeper", "--out") == tmp_path / "new" / "deeper"
    assert destinations.check_output_folder(tmp_path, "--out") == tmp_path
    assert destinations.check_output_file(tmp_path / "image.png", "--out") == tmp_path / "image.png"
    assert not (tmp_path / "new").exists()  # checking creates nothing
    assert shutil.disk_usage(tmp_path).free >= destinations.MIN_FREE_BYTES  # the premise of these tests

"""Regression baselines: tolerances, the comparison, `harness baseline save` / `harness check`, the pytest helper."""

from __future__ import annotations

import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from harness.cli.main import main
from harness.core.scenario import load, resolve
from harness.studies import baselines
from harness.studies.baselines import Tolerance, ToleranceTable, assert_matches_baseline

REPO = Path(__file__).resolve().parents[1]
COMMITTED = REPO / "results" / "baselines"

# One small scenario (K = M = 1 erf, a handful of evaluations): a solve takes seconds.
TINY = """
[data]
input_dim = 40
[teacher]
hidden = 1
[student]
hidden = 1
init_std = 0.5
[sgd]
learning_rate = 1.5
time = 4.0
[run]
seeds = 2
evaluations = 6
"""


# ------------------------------------------------------------- the project's own baselines


def test_every_builtin_baseline_is_committed_and_current():
    for name, table in baselines.BUILTIN_BASELINES.items():
        folder = COMMITTED / name
        assert folder.is_dir(), f"run: harness baseline save --builtin {name}"
        assert load(folder / "scenario.toml") == resolve(table), f"re-save {name}: its scenario changed"


def test_harness_check_passes_on_the_committed_baselines(capsys):
    status = main(["check", "--dir", str(COMMITTED), "--quiet"])
    printed = capsys.readouterr().out
    count = len([p for p in COMMITTED.iterdir() if p.is_dir()])
    assert status == 0, printed
    assert f"{count} of {count} baseline(s) match" in printed
    # No false alarm: today's draws of the float32 weights are the stored ones to within a
    # couple of float32 ulps, which used to be reported as "initial conditions ... differ".
    assert "note:" not in printed, printed


# ------------------------------------------------------------------ tolerances, compare


def test_tolerance_precedence():
    table = ToleranceTable(rtol=1e-3, atol=2e-3, observables={"Q": {"atol": 5e-2}, "Q[0,1]": {"rtol": 0.5}})
    builtin = Tolerance(1e-4, 1e-4)
    assert table.for_observable("R[0,0]", builtin, None) == Tolerance(1e-3, 2e-3)  # file defaults
    assert ToleranceTable(None, None, {}).for_observable("R[0,0]", builtin, None) == builtin
    override = Tolerance(1e-6, None)
    assert table.for_observable("R[0,0]", builtin, override) == Tolerance(1e-6, 2e-3)  # command line
    assert table.for_observable("Q[0,0]", builtin, override) == Tolerance(1e-6, 5e-2)  # group
    assert table.for_observable("Q[0,1]", builtin, override) == Tolerance(0.5, 5e-2)  # exact name wins


def test_compare_agrees_with_numpy_isclose():
    # Reference rule: numpy.isclose(now, stored, rtol, atol), |a - b| <= atol + rtol |b|
    # (numpy documentation); NaN equals only NaN (isclose with equal_nan=True).
    rng = np.random.default_rng(5)
    stored = rng.normal(size=(3, 7, 4))
    now = stored + rng.normal(size=stored.shape) * np.array([1e-7, 1e-5, 1e-3, 0.0])
    now[1, 2, 3] = np.nan
    stored[0, 0, 0] = now[0, 0, 0] = np.nan
    tol = Tolerance(1e-4, 1e-6)
    deviations = baselines.compare(
        "b", ["a", "b", "c", "d"], np.arange(3), np.linspace(0, 1, 7), stored, now,
        ToleranceTable(None, None, {}), tol,
    )
    by_name = {d.observable: d for d in deviations}
    for index, name in enumerate("abcd"):
        close = np.isclose(now[:, :, index], stored[:, :, index], rtol=tol.rtol, atol=tol.atol, equal_nan=True)
        assert by_name[name].failed == (not close.all())
    worst = by_name["d"]
    assert (worst.seed, worst.t, np.isnan(worst.now)) == (1, pytest.approx(2 / 6), True)
    assert deviations[0].failed  # failures come first


# ---------------------------------------------------------------- save, move, check


@pytest.fixture(scope="module")
def saved(tmp_path_factory) -> Path:
    folder = tmp_path_factory.mktemp("baselines")
    scenario = folder / "tiny.toml"
    scenario.write_text(TINY)
    assert main(["baseline", "save", str(scenario), "--dir", str(folder / "store")]) == 0
    return folder / "store" / "tiny"


def test_saved_baseline_has_its_files(saved):
    for name in baselines.BASELINE_FILES:
        assert (saved / name).is_file()
    frame = pd.read_parquet(saved / "theory.parquet")
    assert list(frame.columns) == ["seed", "t", "observable", "theory"]
    assert not any(p.name.endswith(".partial") for p in saved.parent.iterdir())


def test_a_changed_equation_fails_the_check(saved, tmp_path, capsys, monkeypatch):
    # Re-solving with the equations minus the eta^2 term (docs/equations.md, section 4) must be caught.
    monkeypatch.chdir(REPO)
    moved = tmp_path / "tiny"
    shutil.copytree(saved, moved)
    text = (moved / "scenario.toml").read_text()
    (moved / "scenario.toml").write_text(
        text.replace('source = "builtin"', 'source = "python:examples.no_eta_squared_theory:predict"')
    )
    status = main(["check", "--dir", str(moved), "--quiet"])
    printed = capsys.readouterr().out
    assert status == 1, printed
    assert "FAILED  tiny" in printed
    failing = [line for line in printed.splitlines() if line.endswith("FAIL")]
    assert any(" Q[0,0] " in line for line in failing) and any(" test_error " in line for line in failing)


def _leaf_index(name: str) -> int:
    """Position of an InitialState field among the stored leaves (initial_state.npz, leaf_<i>)."""
    import jax

    from harness.equations.iid import OrderParameters
    from harness.equations.sources import InitialState

    labelled = InitialState("seeds", OrderParameters("Q", "R", "T", "v"), "teacher_v", "teacher_w", "student_w", None)
    return jax.tree_util.tree_leaves(labelled).index(name)


def _with_leaf(baseline, name: str, value) -> baselines.Baseline:
    leaves = [np.array(leaf) for leaf in baseline.start_leaves]
    leaves[_leaf_index(name)] = value
    return baseline._replace(start_leaves=leaves)


def _stored_as_if_drawn(baseline, student_w) -> baselines.Baseline:
    """The baseline as if its student weights had been drawn as ``student_w``, Q and R stored to match.

    Q = W W^T / N and R = W W*^T / N for i.i.d. inputs (docs/equations.md, section 1), in numpy.
    """
    n = student_w.shape[-1]
    teacher_w = baseline.start_leaves[_leaf_index("teacher_w")]
    changed = _with_leaf(baseline, "student_w", student_w)
    changed = _with_leaf(changed, "Q", np.einsum("skn,sln->skl", student_w, student_w) / n)
    return _with_leaf(changed, "R", np.einsum("skn,smn->skm", student_w, teacher_w) / n)


def test_initial_state_notes_speak_only_of_real_differences(saved):
    baseline = baselines.read_baseline(saved)
    assert baselines.check_baseline(baseline).notes == []
    weights = baseline.start_leaves[_leaf_index("student_w")].astype(np.float32)  # drawn in float32

    def ulps_away(count: int) -> np.ndarray:
        moved = weights
        for _ in range(count):
            moved = np.nextafter(moved, np.float32(np.inf))
        return moved.astype(np.float64)

    # Stored weights a couple of float32 ulps from today's draw are the same draw: no note.
    assert baselines.check_baseline(_stored_as_if_drawn(baseline, ulps_away(2))).notes == []
    (note,) = baselines.check_baseline(_stored_as_if_drawn(baseline, ulps_away(12))).notes
    assert "random stream changed" in note and "student_w" in note and "float32 ulps" in note
    # Stored order parameters that today's code does not compute from the stored weights.
    q = baseline.start_leaves[_leaf_index("Q")]
    (note,) = baselines.check_baseline(_with_leaf(baseline, "Q", q * (1 + 1e-6))).notes
    assert "initial-state code changed" in note and "(in Q)" in note


def test_pytest_helper_names_where_and_how_much(saved, tmp_path):
    moved = tmp_path / "tiny"
    shutil.copytree(saved, moved)
    frame = pd.read_parquet(moved / "theory.parquet")
    row = frame.index[(frame["observable"] == "R[0,0]") & (frame["seed"] == 1)][3]
    target_t = float(frame.loc[row, "t"])
    frame.loc[row, "theory"] += 0.01
    frame.to_parquet(moved / "theory.parquet", index=False)
    with pytest.raises(AssertionError) as failure:
        assert_matches_baseline(moved)
    message = str(failure.value)
    assert f"R[0,0] at t = {target_t:.6g} (seed 1)" in message
    assert "abs 0.01" in message
    assert "test_error" not in message  # only what moved is reported
    # A loose enough tolerance lets the same change pass.
    assert_matches_baseline(moved, atol=0.02)


# --------------------------------------------------------------------------- bad input


def _copy_committed(tmp_path: Path) -> Path:
    target = tmp_path / "erf-k2m2"
    shutil.copytree(COMMITTED / "erf-k2m2", target)
    return target


@pytest.mark.parametrize(
    "tolerances, message",
    [
        ("rtol = -1\n", "key 'rtol'"),
        ("speed = 1\n", "key 'speed' is unknown"),
        ('[observables]\n"Q[9,9]" = { rtol = 1e-3 }\n', "'Q[9,9]': not an observable"),
        ('[observables]\n"Q" = { rtol = 1e-3, when = 2 }\n', "expected { rtol"),
        ("rtol = [\n", "not valid TOML"),
    ],
)
def test_bad_tolerance_file_exits_2_before_solving(tmp_path, capsys, tolerances, message):
    folder = _copy_committed(tmp_path)
    (folder / "tolerances.toml").write_text(tolerances)
    assert main(["check", "--dir", str(tmp_path)]) == 2
    error = capsys.readouterr().err.strip()
    assert message in error and "tolerances.toml" in error and len(error.splitlines()) == 1


def test_damaged_baselines_exit_2(tmp_path, capsys):
    assert main(["check", "--dir", str(tmp_path / "nowhere")]) == 2
    assert "does not exist" in capsys.readouterr().err
    folder = _copy_committed(tmp_path)
    (folder / "theory.parquet").unlink()
    assert main(["check", "--dir", str(tmp_path)]) == 2
    assert "has no theory.parquet" in capsys.readouterr().err
    assert main(["check", "--dir", str(COMMITTED), "--rtol", "-0.1"]) == 2
    assert "--rtol" in capsys.readouterr().err


def test_save_refuses_bad_requests_and_writes_nothing(tmp_path, capsys, monkeypatch):
    store = tmp_path / "store"
    scenario = tmp_path / "tiny.toml"
    scenario.write_text(TINY)
    unsolvable = tmp_path / "file_theory.toml"
    unsolvable.write_text(TINY + '[theory]\nsource = "file:curve.csv"\n')
    (tmp_path / "curve.csv").write_text("t,test_error\n0,0.5\n10,0.1\n")
    cases = [
        ([], "give SCENARIO files"),
        (["--builtin", "no-such"], "unknown baseline 'no-such'"),
        ([str(scenario), str(scenario), "--name", "x"], "--name"),
        ([str(scenario), str(scenario)], "written twice"),
        ([str(unsolvable)], "solves nothing"),
        ([str(tmp_path / "missing.toml")], "does not exist"),
    ]
    for arguments, message in cases:
        assert main(["baseline", "save", *arguments, "--dir", str(store)]) == 2
        error = capsys.readouterr().err.strip()
        assert message in error and len(error.splitlines()) == 1, (arguments, error)
    assert not store.exists()

    # A user theory that raises: one line naming the function, and no folder left behind.
    (tmp_path / "raising_theory.py").write_text("def predict(scenario, start, times):\n    raise ValueError('boom')\n")
    monkeypatch.syspath_prepend(str(tmp_path))
    broken = tmp_path / "broken.toml"
    broken.write_text(TINY + '[theory]\nsource = "python:raising_theory:predict"\n')
    assert main(["baseline", "save", str(broken), "--dir", str(store)]) == 2
    error = capsys.readouterr().err
    assert "raising_theory:predict" in error and "boom" in error
    assert not store.exists() or not any(store.iterdir())


def test_save_does_not_overwrite_without_force(saved, capsys):
    scenario = saved.parent.parent / "tiny.toml"
    assert main(["baseline", "save", str(scenario), "--dir", str(saved.parent)]) == 2
    assert "--force" in capsys.readouterr().err

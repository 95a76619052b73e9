"""Landmarks held against the theory: the verdict by hand, presence, stored runs, and the default scenario's escape."""

from __future__ import annotations

import json
import math
import shutil

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from harness.cli.main import main
from harness.cli.run import format_landmarks
from harness.core import scenario as scenario_lib
from harness.core.trajectories import Trajectories
from harness.results import judgement
from harness.results.judgement import Margin
from harness.results.paired_landmarks import LandmarkOptions, pair_landmarks, sign_test


def _sidak(alpha: float, cells: int, seeds: int) -> float:
    # Sidak 1967: per-cell level 1 - (1 - alpha)^(1/J), two-sided Student t with seeds - 1 dof (scipy.stats)
    return stats.t.ppf(1 - (1 - (1 - alpha) ** (1 / cells)) / 2, seeds - 1)


def test_landmark_verdict_by_hand():
    # Three seeds, three landmarks (theory - simulation per seed); C is missing in seed 3.
    diff = np.array([[0.5, 2.0, 0.1], [1.0, 2.2, 0.3], [1.5, 2.4, np.nan]])
    size = np.array([100.0, 10.0, 50.0])  # the simulated landmarks' means
    verdict = judgement.judge_scalars(diff, size, ["A", "B", "C"], Margin(0.05, 0.001, 0.05))
    a, b, c = verdict.items
    # A: mean 1, sd 0.5, se 0.5 / sqrt 3; margin 0.05 x 100 = 5; Sidak over J = 3 with 2 dof (c = 7.58)
    assert (a.mean, a.sem, a.delta) == (pytest.approx(1.0), pytest.approx(0.5 / math.sqrt(3)), pytest.approx(5.0))
    assert a.half_width == pytest.approx(_sidak(0.05, 3, 3) * 0.5 / math.sqrt(3), rel=1e-10)  # 2.19
    assert a.verdict == "agree" and a.reach == pytest.approx((1.0 + a.half_width) / 5.0)
    # B: mean 2.2, se 0.2 / sqrt 3, margin 0.5: the band 2.2 +- 0.88 lies wholly above 0.5
    assert b.half_width == pytest.approx(_sidak(0.05, 3, 3) * 0.2 / math.sqrt(3), rel=1e-10)
    assert b.verdict == "disagree" and b.inner == pytest.approx((2.2 - b.half_width) / 0.5)
    # C: two seeds, so its own factor has 1 dof (c = 37.5, not the others' 7.58): mean 0.2, se 0.1,
    # margin 2.5; the band 0.2 +- 3.75 neither fits inside nor lies outside; a third seed would settle it
    assert c.seeds == 2 and c.half_width == pytest.approx(_sidak(0.05, 3, 2) * 0.1, rel=1e-10)
    assert c.verdict == "inconclusive" and c.seeds_needed == 3
    assert verdict.verdict == "disagree"  # one landmark shown to differ settles it
    assert verdict.band.method == "sidak" and verdict.band.cells == 3


def test_an_error_decayed_to_rounding_level_is_judged_against_its_curves_floor():
    # A noiseless run to t = 1000 (measured): every simulated seed's final error ~1e-13, the
    # theory's ~2.3e-8 (the solver's tolerance). 5 % of 1e-13 would call that a disagreement; the
    # curve's floor, 0.001 x its peak (0.3 here), is 3e-4, far above both.
    diff = np.array([[2.3e-8], [2.2e-8], [2.4e-8], [2.3e-8]])
    size = np.array([1.5e-13])
    margin = Margin(0.05, 0.001, 0.05)
    assert judgement.judge_scalars(diff, size, ["final_error"], margin).items[0].verdict == "disagree"
    floored = judgement.judge_scalars(diff, size, ["final_error"], margin, np.array([0.001 * 0.3]))
    assert floored.items[0].delta == pytest.approx(3e-4) and floored.items[0].verdict == "agree"


def test_sign_test_is_mcnemars_exact_test():
    # Every discordant seed on one side: p = 2 / 2^8 (by hand); otherwise scipy's exact binomial test.
    assert sign_test(8, 0) == pytest.approx(2 * 0.5**8)
    assert sign_test(7, 2) == pytest.approx(stats.binomtest(2, 9, 0.5).pvalue)
    assert sign_test(3, 3) == 1.0 and sign_test(0, 0) == 1.0


def _broken_power_law(t: np.ndarray, leaves: bool = True) -> np.ndarray:
    """Flat 0.3 to t = 1, t^-1.2 to 10, flat to 100, then t^-2 (or flat for good)."""
    plateau = 0.3 * 10.0**-1.2
    safe = np.maximum(t, 1.0)
    tail = plateau * (safe / 100.0) ** -2.0 if leaves else np.full_like(t, plateau)
    return np.select([t <= 1, t <= 10, t <= 100], [np.full_like(t, 0.3), 0.3 * safe**-1.2, np.full_like(t, plateau)],
                     tail)


def _trajectories(theory_leaves: bool, seeds: int = 8) -> Trajectories:
    t = np.concatenate([[0.0], np.logspace(-2, 3, 201)])
    rng = np.random.default_rng(3)
    # each seed's curve shifted in time by a few per cent, so the landmarks spread over seeds
    shifts = 1.0 + 0.03 * rng.standard_normal(seeds)
    sim = np.stack([_broken_power_law(t / s) for s in shifts])
    theory = np.stack([_broken_power_law(t / s, theory_leaves) for s in shifts])
    return Trajectories(np.arange(seeds), t, ["test_error"], sim[:, :, None], theory[:, :, None])


def test_the_landmark_keys_reach_the_measurement():
    # exit at eps = (1 - f) x height on the t^-2 tail: t = 100 (1 - f)^-1/2 for a seed unshifted;
    # with every seed's own shift s, the exit is 100 s (1 - f)^-1/2 (hand computation)
    traj = _trajectories(theory_leaves=True)
    table = scenario_lib.resolve({"landmarks": {"exit_fraction": 0.75}})
    paired = pair_landmarks(traj, LandmarkOptions.from_scenario(table), Margin())
    exit_column = paired.names.index("plateau_exit")
    shifts = paired.sim[:, exit_column] / 200.0
    np.testing.assert_allclose(paired.theory[:, exit_column], paired.sim[:, exit_column], rtol=1e-12)
    assert np.all(np.abs(shifts - 1) < 0.15)
    row = paired.row("plateau_exit")
    assert row.verdict == "agree" and row.presence == "both" and row.diff_mean == 0.0


def test_a_landmark_found_on_one_side_only_is_reported_as_such():
    traj = _trajectories(theory_leaves=False)  # the theory never leaves its plateau
    paired = pair_landmarks(traj, LandmarkOptions(), Margin())
    row = paired.row("plateau_exit")
    assert (row.sim_seeds, row.theory_seeds) == (8, 0)
    assert row.presence == "simulation only" and row.verdict == "inconclusive" and row.seeds_needed == math.inf
    # the final error differs by a factor 100: shown beyond the margin
    assert paired.row("final_error").verdict == "disagree" and paired.verdict == "disagree"
    printed = "\n".join(format_landmarks({"landmarks": paired.to_dict()}))
    assert "found in the simulation only" in printed and "landmark verdict: DISAGREE" in printed


def test_the_default_scenario_escapes_when_the_theory_says(tmp_path, capsys):
    # The default scenario (K = M = 2 erf, eta = 0.5, small initial weights, t = 300) on the exact
    # chain (docs/equations.md; exact in law at any N) at N = 200 with 64 seeds, about 15 s.
    # Measured: paired exit-time difference -0.1 +- 1.6 (sd 13 over seeds: SGD noise moves the
    # escape of a seed whose initial asymmetry is small), margin 5 % x t_exit = 7.6, band 3.3, so
    # agreement is shown with room to spare at the default margin; 32 seeds are inconclusive.
    scenario_file = tmp_path / "default_on_the_chain.toml"
    scenario_file.write_text('[data]\ninput_dim = 200\n[run]\nseeds = 64\nengine = "chain"\nevaluations = 40\n'
                             '[landmarks]\njudged = ["plateau_exit"]\n')
    out = tmp_path / "out"
    status = main(["run", str(scenario_file), "--out", str(out), "--quiet"])
    printed = capsys.readouterr().out
    assert status in (0, 1, 3), printed
    assert "landmark verdict: agree" in printed and "plateau_exit" in printed
    scenario = scenario_lib.load(scenario_file)
    folder = out / scenario_lib.run_id(scenario)
    record = json.loads((folder / "judgement.json").read_text())["landmarks"]
    row = next(r for r in record["table"] if r["landmark"] == "plateau_exit")
    assert row["verdict"] == "agree" and row["paired_seeds"] >= 56
    assert row["reach"] < 0.8  # not a borderline pass
    assert 130 < row["sim_mean"] < 180  # the escape of this scenario at N = 200 (measured 155)
    # landmarks.parquet holds each seed's landmarks; runs.parquet the means and the verdict
    table = pd.read_parquet(folder / "landmarks.parquet")
    exits = table[table["landmark"] == "plateau_exit"]
    assert len(exits) == 64 and np.nanmean(exits["sim"]) == pytest.approx(row["sim_mean"])
    index = pd.read_parquet(out / "runs.parquet").iloc[0]
    assert index["verdict.landmarks"] == "agree" and index["plateau_exit.sim_mean"] == pytest.approx(row["sim_mean"])

    # Another threshold measures the stored run again (same run_id, nothing recomputed).
    from harness.runner.pipeline import judge_stored_run

    later = scenario_lib.with_overrides(scenario, {"landmarks.exit_fraction": 0.8})
    assert scenario_lib.run_id(later) == folder.name
    stored = judge_stored_run(folder, later, out)
    again = next(r for r in stored.judgement["landmarks"]["table"] if r["landmark"] == "plateau_exit")
    assert stored.skipped and again["sim_mean"] > row["sim_mean"]  # a deeper fall takes longer
    assert stored.judgement["landmarks"]["options"]["exit_fraction"] == 0.8

    # The learning curve marks the plateau and both exits.
    from harness.plot import figures

    fig = figures.plot_learning_curve(pd.read_parquet(folder / "summary.parquet"),
                                      landmarks=stored.judgement["landmarks"])
    labels = [text.get_text() for text in fig.axes[0].get_legend().get_texts()]
    assert "plateau, sim." in labels and any("exit" in label and "theory" in label for label in labels)


def test_a_landmark_scales_through_the_command(tmp_path, capsys):
    # The shared tiny results (tests/real_results.py: N = 20, 30, 40, 3 seeds, t = 1) hold no
    # plateau, but every seed has a final error: the command's path for a landmark, on stored runs.
    from real_results import SIZES, real_results

    made = real_results()
    # its run has 4 evaluation times: too sparse for landmarks, said in one line under the table
    warning = [line for line in made.run_stdout.splitlines() if "evaluation times too sparse" in line]
    assert len(warning) == 1 and warning[0].startswith("  warning: "), made.run_stdout
    root = tmp_path / "results"
    shutil.copytree(made.root, root)
    status = main(["scale", str(made.scenario_file), "--sizes", SIZES, "--out", str(root), "--quiet",
                   "--observable", "landmark:final_error"])
    captured = capsys.readouterr()
    assert status in (0, 1, 3) and "final_error across sizes" in captured.out, captured.out + captured.err
    assert captured.err.count("reused") == 3
    folder = next(p for p in root.glob("scale-*") if json.loads((p / "verdict.json").read_text()).get("kind"))
    verdict = json.loads((folder / "verdict.json").read_text())
    assert verdict["sizes"] == [20, 30, 40] and len(verdict["items"]) == 4
    assert set(verdict["fits"]["sim"]) == {"a + b ln N", "a N^-b + c"}
    assert main(["figure", str(folder), "--format", "png"]) == 0
    assert (folder / "figures" / "scaling.png").is_file()

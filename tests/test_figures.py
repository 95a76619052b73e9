"""Figures are read back from the matplotlib objects: axes, labels, scales and line counts.

The run, scaling and sweep folders are synthetic (tests/conftest_figures.py) but written in
the briefed on-disk format, so these tests exercise the same readers real results go through.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import warnings
from pathlib import Path

import matplotlib.pyplot as plt
import numpy as np
import pandas as pd
import pytest
from conftest_figures import write_run_folder, write_scaling_folder, write_sweep_folder, write_sweep_of_runs
from matplotlib.collections import LineCollection
from matplotlib.image import AxesImage
from matplotlib.lines import Line2D

from harness.cli.figure import add_figure_commands
from harness.plot import figures


@pytest.fixture(autouse=True)
def _close_figures():
    yield
    plt.close("all")


def _plain_lines(ax) -> list[Line2D]:
    """Data lines without markers (theory lines, simulation means), not error-bar glyphs."""
    return [line for line in ax.lines if line.get_marker() in ("None", None, "") and len(line.get_xdata()) > 2]


def _parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="harness")
    add_figure_commands(parser.add_subparsers(dest="command", required=True))
    return parser


def _run_cli(*argv: str) -> int:
    args = _parser().parse_args(list(argv))
    return args.handler(args)


# ---------------------------------------------------------------------------------------
# Learning curve
# ---------------------------------------------------------------------------------------


def test_learning_curve_axes_labels_and_log_time(tmp_path):
    run = write_run_folder(tmp_path, "run-a", gaussian_equivalence_gap=0.2)
    summary = figures.read_summary(run)
    fig = figures.plot_learning_curve(summary)
    curve_ax, residual_ax = fig.axes
    assert curve_ax.get_xscale() == "log" and residual_ax.get_xscale() == "log"
    assert curve_ax.get_shared_x_axes().joined(curve_ax, residual_ax)
    assert curve_ax.get_ylabel() == r"$\varepsilon_g$"
    assert residual_ax.get_xlabel() == r"$t = \mathrm{steps}/N$"
    assert residual_ax.get_ylabel() == "(theory − sim.) / margin"
    # t = 0 is dropped on the log axis (documented choice): no plotted point at t <= 0.
    for ax in fig.axes:
        for line in _plain_lines(ax):
            assert np.all(np.asarray(line.get_xdata(), dtype=float) > 0)
    # simulation mean, overlap error (differs here), theory.
    assert len(_plain_lines(curve_ax)) == 3
    labels = [text.get_text() for text in curve_ax.get_legend().get_texts()]
    assert labels == [r"simulation $\pm$ SEM", r"$\varepsilon_g(Q,R,T)$ of simulation", "theory"]
    # The theory line is the stored theory mean at t > 0, unchanged.
    test = summary[(summary["observable"] == "test_error") & (summary["t"] > 0)].sort_values("t")
    theory_line = _plain_lines(curve_ax)[-1]
    np.testing.assert_allclose(theory_line.get_ydata(), test["theory_mean"].to_numpy())
    np.testing.assert_allclose(theory_line.get_xdata(), test["t"].to_numpy())


def test_residual_panel_shows_the_verdicts_band_inside_the_margin(tmp_path):
    run = write_run_folder(tmp_path, "run-b", theory_bias=0.3)
    summary = figures.read_summary(run)
    fig = figures.plot_learning_curve(summary, show_overlap=False, divergence_t=30.0,
                                      verdict="test error: disagree")
    residual_ax = fig.axes[1]
    # The margin is the band [-1, 1] (the difference is drawn in units of the margin).
    bands = [patch.get_path().get_extents(patch.get_patch_transform()) for patch in residual_ax.patches]
    assert any(np.isclose(box.y0, -1.0) and np.isclose(box.y1, 1.0) for box in bands)
    test = summary[(summary["observable"] == "test_error") & (summary["t"] > 0)].sort_values("t")
    centre = next(line for line in _plain_lines(residual_ax) if len(line.get_xdata()) > 2)
    np.testing.assert_allclose(centre.get_ydata(), (test["diff_mean"] / test["margin"]).to_numpy())
    # The simultaneous band around it: diff_mean +- band, in units of the margin.
    band = next(c for c in residual_ax.collections if c.get_label() == "simultaneous band")
    upper = band.get_paths()[0].vertices[:, 1].max()
    assert upper == pytest.approx(float(((test["diff_mean"] + test["band"]) / test["margin"]).max()))
    assert residual_ax.get_title(loc="right") == "test error: disagree"
    vertical = [line for line in residual_ax.lines if np.allclose(line.get_xdata(), 30.0)]
    assert len(vertical) == 1
    assert len(fig.axes[0].lines) == 2  # no overlap curve when switched off


def test_overlap_curve_drawn_only_when_it_differs(tmp_path):
    run = write_run_folder(tmp_path, "run-c")
    summary = figures.read_summary(run)
    same = summary.copy()
    overlap_rows = same["observable"] == "overlap_error"
    test_rows = same["observable"] == "test_error"
    same.loc[overlap_rows, ["sim_mean", "sim_sem", "z"]] = same.loc[test_rows, ["sim_mean", "sim_sem", "z"]].to_numpy()
    assert not figures.overlap_differs(same)
    assert figures.overlap_differs(summary)
    assert len(_plain_lines(figures.plot_learning_curve(same).axes[0])) == 2
    assert len(_plain_lines(figures.plot_learning_curve(summary).axes[0])) == 3


def test_learning_curve_survives_a_diverged_mean(tmp_path):
    summary = figures.read_summary(write_run_folder(tmp_path, "run-inf"))
    late = (summary["observable"] == "test_error") & (summary["t"] == summary["t"].max())
    summary.loc[late, ["sim_mean", "sim_sem", "z"]] = [np.inf, np.nan, np.nan]
    curve_ax, residual_ax = figures.plot_learning_curve(summary, show_overlap=False).axes
    assert curve_ax.get_yscale() == "log"
    mean_line = _plain_lines(curve_ax)[0]
    assert np.isnan(mean_line.get_ydata()[-1]) and np.all(np.isfinite(mean_line.get_ydata()[:-1]))
    assert np.all(np.isfinite(curve_ax.get_ylim())) and np.all(np.isfinite(residual_ax.get_ylim()))


def test_per_seed_curves_come_in_pairs(tmp_path):
    run = write_run_folder(tmp_path, "run-d", seeds=5)
    summary = figures.read_summary(run)
    rows = figures.read_trajectories(run, ["test_error"])
    assert set(rows["observable"]) == {"test_error"}
    fig = figures.plot_learning_curve(summary, trajectories=rows, seeds_shown=3, show_overlap=False)
    curve_ax = fig.axes[0]
    # 3 seeds x (simulation + its theory) + mean + theory.
    assert len(_plain_lines(curve_ax)) == 3 * 2 + 2
    thin = [line for line in curve_ax.lines if line.get_linewidth() < 1.0]
    assert len(thin) == 6
    # Each seed's simulation and theory share one hue: that is the pairing made visible.
    colours = [line.get_color() for line in thin]
    assert colours[0::2] == colours[1::2]
    assert len(set(colours[0::2])) == 3


# ---------------------------------------------------------------------------------------
# Order parameters
# ---------------------------------------------------------------------------------------


def test_order_parameter_entries_keep_one_triangle_of_symmetric_families():
    names = ["Q[0,0]", "Q[0,1]", "Q[1,0]", "Q[1,1]", "R[0,0]", "R[1,0]", "T[0,0]", "v[1]", "test_error"]
    grouped = figures.order_parameter_entries(names)
    assert list(grouped) == ["Q", "R", "T", "v"]
    assert [name for name, _ in grouped["Q"]] == ["Q[0,0]", "Q[0,1]", "Q[1,1]"]
    assert [label for _, label in grouped["R"]] == ["$R_{00}$", "$R_{10}$"]
    assert figures.order_parameter_entries(["Q[3,12]"])["Q"][0][1] == "$Q_{3,12}$"


def test_order_parameter_grid_markers_and_lines(tmp_path):
    run = write_run_folder(tmp_path, "run-e", students=3, teachers=2, train_second_layer=True)
    fig = figures.plot_order_parameters(figures.read_summary(run))
    # A panel for each family that changes; T (the fixed teacher's own overlaps) is constant in the
    # stored tables and is named in the note instead. No panel is left empty.
    assert all(ax.get_visible() for ax in fig.axes)
    assert [ax.get_ylabel() for ax in fig.axes] == ["$Q_{ij}$", "$R_{in}$", "$v_i$"]
    assert "$T_{nm}$ constant" in fig.get_suptitle()
    expected_entries = {"$Q_{ij}$": 6, "$R_{in}$": 6, "$v_i$": 3}
    for ax in fig.axes:
        entries = expected_entries[ax.get_ylabel()]
        assert ax.get_xscale() == "log"
        assert len(_plain_lines(ax)) == entries  # one theory line per entry
        assert len(ax.containers) == entries  # one error-bar set per entry
        assert all(isinstance(c[2][0], LineCollection) for c in ax.containers)
        assert len(ax.get_legend().get_texts()) == entries
    assert fig.axes[-1].get_xlabel() == r"$t = \mathrm{steps}/N$"


def test_order_parameter_panels_without_v_and_with_many_entries(tmp_path):
    run = write_run_folder(tmp_path, "run-f", students=4, teachers=3)
    fig = figures.plot_order_parameters(figures.read_summary(run), max_legend=8)
    assert [ax.get_ylabel() for ax in fig.axes] == ["$Q_{ij}$", "$R_{in}$"]
    # Q has 10 and R 12 entries: drawn without a per-entry legend.
    assert fig.axes[0].get_legend() is None and fig.axes[1].get_legend() is None
    assert len(_plain_lines(fig.axes[1])) == 12


def test_a_moving_teacher_overlap_keeps_its_panel(tmp_path):
    # T gets a panel as soon as it changes in time (here, made to drift), in a 2 x 2 grid of four.
    run = write_run_folder(tmp_path, "run-t", train_second_layer=True)
    summary = figures.read_summary(run)
    drifting = summary["observable"].str.startswith("T[")
    summary.loc[drifting, "theory_mean"] *= 1.0 + 0.01 * summary.loc[drifting, "t"]
    fig = figures.plot_order_parameters(summary)
    assert [ax.get_ylabel() for ax in fig.axes] == ["$Q_{ij}$", "$R_{in}$", "$T_{nm}$", "$v_i$"]
    assert "constant" not in fig.get_suptitle()


def test_theory_only_run_shows_theory_alone(tmp_path):
    run = write_run_folder(tmp_path, "run-theory", theory_only=True)
    summary = figures.read_summary(run)
    assert figures.is_theory_only(summary)
    trajectories = figures.read_trajectories(run, ["test_error"])
    fig = figures.plot_learning_curve(summary, trajectories=trajectories, seeds_shown=2)
    (ax,) = fig.axes  # no residual panel: there is no simulation to take the difference from
    labels = [text.get_text() for text in ax.get_legend().get_texts()]
    assert labels == ["one seed's theory", "theory (mean over seeds)"]
    assert not any("simulation" in label for label in labels)
    assert ax.get_xlabel() == r"$t = \mathrm{steps}/N$" and ax.get_yscale() == "log"
    test = summary[(summary["observable"] == "test_error") & (summary["t"] > 0)].sort_values("t")
    np.testing.assert_allclose(ax.lines[-1].get_ydata(), test["theory_mean"].to_numpy())
    order = figures.plot_order_parameters(summary)
    assert not any(ax.containers for ax in order.axes)  # no simulation markers
    assert "simulation" in order.get_suptitle()  # ... which the key says: "no simulation in this run"
    assert "markers" not in order.get_suptitle()


# ---------------------------------------------------------------------------------------
# Finite-size scaling and sweeps
# ---------------------------------------------------------------------------------------


def test_scaling_plot_is_log_log_with_fitted_law_and_verdict(tmp_path):
    folder = write_scaling_folder(tmp_path, offset=2e-3)
    verdict = figures.read_scaling(folder)
    fig = figures.plot_scaling(verdict)
    ax = fig.axes[0]
    assert ax.get_xscale() == "log" and ax.get_yscale() == "log"
    assert ax.get_xlabel() == "$N$"
    assert "inconsistent" in ax.get_title()
    law = next(line for line in _plain_lines(ax) if line.get_label().startswith("$a N^{-b}"))
    n, gap = np.asarray(law.get_xdata()), np.asarray(law.get_ydata())
    np.testing.assert_allclose(gap, verdict["amplitude"] * n ** -verdict["exponent"] + verdict["offset"])
    band = [patch.get_path().get_extents(patch.get_patch_transform()) for patch in ax.patches]
    c, dc = verdict["offset"], verdict["offset_err"]
    assert any(np.isclose(box.y0, c - dc) and np.isclose(box.y1, c + dc) for box in band)
    low, _ = ax.get_ylim()
    assert low < c - dc  # the offset band is in view
    assert len(ax.containers) == 1 and len(ax.containers[0][0].get_xdata()) == len(verdict["sizes"])


@pytest.mark.parametrize("gaps", [[0.0] * 6, [0.0, 0.0, 0.02, 0.0, 0.01, 0.0]])
def test_scaling_without_positive_gaps_uses_a_linear_axis_and_says_why(tmp_path, gaps, caplog):
    # The reported gap is sqrt(max(U, 0)): 0 wherever no gap shows beyond the noise
    # (harness.studies.scaling). A log axis cannot show those points; matplotlib used to warn
    # "Data has no positive values" on the terminal and draw an empty axis.
    folder = write_scaling_folder(tmp_path)
    verdict = json.loads((folder / "verdict.json").read_text())
    verdict.update(gaps=gaps, gap_errs=[0.004] * 6, amplitude=0.0, offset=0.0)
    (folder / "verdict.json").write_text(json.dumps(verdict))
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # any warning fails the test
        fig = figures.plot_scaling(figures.read_scaling(folder))
        figures.save_figure(fig, tmp_path / "scaling", ["png", "pdf"])  # drawing happens here
    assert not [record for record in caplog.records if record.name.startswith("matplotlib")]
    ax = fig.axes[0]
    assert ax.get_yscale() == "linear" and ax.get_xscale() == "log"
    note = fig.get_suptitle()
    assert "linear gap axis" in note and "cannot show a gap of 0" in note
    assert ("at any N" in note) if max(gaps) == 0 else ("at N = 50, 100, 400, 1600" in note)
    (points,) = [line for line in ax.lines if line.get_marker() == "o"]
    np.testing.assert_allclose(points.get_ydata(), gaps)  # every size is drawn, zeros included
    low, high = ax.get_ylim()
    assert low <= 0.0 < max(gaps) + 0.004 <= high


def test_scaling_gap_label_names_the_observable():
    base = {"gap_label": "gap of test_error (rms over t of theory - simulation)"}
    assert figures.gap_label({**base, "observable": "test_error"}) == r"gap of $\varepsilon_g$"
    assert figures.gap_label({**base, "observable": "R[1,0]"}) == "gap of $R_{1,0}$"
    assert figures.gap_label(base) == "gap"  # too long for an axis at column width


def test_scaling_folder_missing_key_is_reported(tmp_path):
    folder = write_scaling_folder(tmp_path)
    content = json.loads((folder / "verdict.json").read_text())
    del content["offset_err"]
    (folder / "verdict.json").write_text(json.dumps(content))
    with pytest.raises(figures.FigureInputError, match=r"verdict\.json: missing key\(s\) offset_err"):
        figures.read_scaling(folder)


def test_sweep_heat_map_over_two_keys(tmp_path):
    folder = write_sweep_folder(tmp_path)
    keys, runs = figures.read_sweep(folder)
    fig = figures.plot_sweep(keys, runs, metric="max_abs_z")
    ax = fig.axes[0]
    images = [child for child in ax.get_children() if isinstance(child, AxesImage)]
    assert len(images) == 1
    data = images[0].get_array()
    assert data.shape == (3, 4)  # hidden units (rows) x learning rates (columns)
    assert ax.get_xlabel() == r"learning rate $\eta$" and ax.get_ylabel() == "$K$"
    assert [t.get_text() for t in ax.get_xticklabels()] == ["0.1", "0.3", "1", "3"]
    expected = runs.pivot_table(index="student.hidden", columns="sgd.learning_rate", values="test_error.max_abs_z")
    np.testing.assert_allclose(np.ma.filled(data, np.nan), expected.to_numpy())
    colourbar_ax = fig.axes[1]
    assert colourbar_ax.get_ylabel() == r"max $|z|$ of $\varepsilon_g$ (detectability)"


def test_sweep_divergence_never_cells_are_masked(tmp_path):
    folder = write_sweep_folder(tmp_path)
    keys, runs = figures.read_sweep(folder)
    fig = figures.plot_sweep(keys, runs, metric="divergence_t")
    data = next(c for c in fig.axes[0].get_children() if isinstance(c, AxesImage)).get_array()
    never = runs["test_error.divergence_t"].isna().sum()
    assert int(np.ma.getmaskarray(data).sum()) == never > 0
    assert sum(text.get_text() == "never" for text in fig.axes[0].texts) == never


def test_sweep_curves_over_one_key(tmp_path):
    folder = write_sweep_folder(tmp_path, "sweep_one", swept={"sgd.learning_rate": [0.1, 0.3, 1.0, 3.0, 10.0]})
    keys, runs = figures.read_sweep(folder)
    ax = figures.plot_sweep(keys, runs, metric="max_abs_z").axes[0]
    assert ax.get_xscale() == "log"  # two decades of learning rates
    curves = [line for line in ax.lines if line.get_linestyle() != "None"]
    assert len(curves) == 1 and len(curves[0].get_xdata()) == 5
    # Each point also carries its run's verdict: filled agree, open inconclusive, a cross disagree.
    legend = [t.get_text() for t in ax.get_legend().get_texts()]
    assert legend == ["agree", "inconclusive", "disagree"]
    agree = next(line for line in ax.lines if line.get_linestyle() == "None" and len(line.get_xdata())
                 and line.get_marker() == "o" and line.get_markerfacecolor() != "white")
    np.testing.assert_allclose(sorted(agree.get_xdata()), [0.1, 0.3])
    assert ax.get_ylabel() == r"max $|z|$ of $\varepsilon_g$ (detectability)"
    # One swept key chosen out of two: one curve per value of the other key.
    keys, runs = figures.read_sweep(write_sweep_folder(tmp_path, "sweep_two"))
    ax = figures.plot_sweep(keys, runs, metric="max_abs_z", axes_keys=["sgd.learning_rate"]).axes[0]
    assert len([line for line in ax.lines if line.get_linestyle() != "None"]) == 3
    assert [t.get_text() for t in ax.get_legend().get_texts()][:3] == ["$K$ = 2", "$K$ = 3", "$K$ = 4"]


def _data_lines(ax) -> list[Line2D]:
    return [line for line in ax.lines if line.get_linestyle() != "None" and len(line.get_xdata())]


def test_sweep_final_error_shows_simulation_with_error_bars_and_theory(tmp_path):
    # A sweep whose points are run folders written by the tool's own writers (runs.parquet rows and all).
    rates = [0.2, 0.5, 1.0]
    folder = write_sweep_of_runs(tmp_path, rates, theory_bias=0.2)
    keys, runs = figures.read_sweep(folder)
    ax = figures.plot_sweep(keys, runs).axes[0]  # the default: final test error
    runs = runs.sort_values("sgd.learning_rate")
    simulation, theory = _data_lines(ax)
    np.testing.assert_allclose(simulation.get_xdata(), rates)
    np.testing.assert_allclose(simulation.get_ydata(), runs["final_test_error"])
    np.testing.assert_allclose(theory.get_ydata(), runs["final_theory_error"])
    assert simulation.get_linestyle() == "-" and theory.get_linestyle() == "--"
    # The error bars are the stored SEMs around the simulation means.
    (bars,) = [c for c in ax.collections if isinstance(c, LineCollection)]
    spans = [segment[:, 1] for segment in bars.get_segments()]
    np.testing.assert_allclose([high - low for low, high in spans], 2 * runs["final_test_error_sem"].to_numpy())
    legend = [t.get_text() for t in ax.get_legend().get_texts()]
    assert legend[:2] == [r"simulation $\pm$ SEM", "theory"]
    # The verdict markers stay: each point's marker is its test error's verdict in its run.
    markers = {line.get_marker() for line in ax.lines if line.get_linestyle() == "None" and len(line.get_xdata())}
    assert markers and set(legend[2:]) <= set(figures.VERDICT_MARKERS)
    assert set(legend[2:]) == set(runs["verdict.test_error"])
    assert ax.get_ylabel() == r"final $\varepsilon_g$"


def test_sweep_panel_per_group_asked_for(tmp_path):
    folder = write_sweep_of_runs(tmp_path, [0.2, 0.5, 1.0])
    options = figures.FigureOptions(formats=("png",), groups=figures.parse_groups("test_error,Q"))
    figures.check_folder(folder, options)
    (png,) = figures.write_sweep_figure(folder, options)
    assert png.name == "sweep_final_test_error_Q.png"
    keys, runs = figures.read_sweep(folder)
    finals = {group: figures.final_values(folder, runs, group) for group in options.groups}
    fig = figures.plot_sweep(keys, runs, groups=options.groups, finals=finals)
    assert [ax.get_ylabel() for ax in fig.axes] == [r"final $\varepsilon_g$", r"final $Q_{ij}$"]
    q = finals["Q"]
    assert sorted(q["observable"].unique()) == ["Q[0,0]", "Q[0,1]", "Q[1,1]"]  # one triangle of a symmetric Q
    # Three entries: a simulation and a theory curve each, their values the runs' final Q.
    lines = _data_lines(fig.axes[1])
    assert len(lines) == 6
    first = q[q["observable"] == "Q[0,0]"].merge(runs[["run_id", "sgd.learning_rate"]]).sort_values("sgd.learning_rate")
    np.testing.assert_allclose(lines[0].get_ydata(), first["sim"])
    np.testing.assert_allclose(lines[1].get_ydata(), first["theory"])
    summary = pd.read_parquet(folder / first["run_id"].iloc[0] / "summary.parquet")
    last = summary[(summary["observable"] == "Q[0,0]") & (summary["t"] == summary["t"].max())]
    assert first["sim"].iloc[0] == pytest.approx(float(last["sim_mean"].iloc[0]))


def test_sweep_groups_are_checked_before_drawing(tmp_path):
    folder = write_sweep_of_runs(tmp_path, [0.2, 0.5])
    with pytest.raises(figures.FigureInputError, match="--groups 'Z'"):
        figures.parse_groups("Z")
    with pytest.raises(figures.FigureInputError, match="--groups applies to --metric final_test_error"):
        figures.check_folder(folder, figures.FigureOptions(metric="max_abs_z", groups=("Q",)))
    with pytest.raises(figures.FigureInputError, match="--groups v: no run of the sweep"):
        figures.check_folder(folder, figures.FigureOptions(groups=("v",)))  # no trained second layer
    assert not (folder / "figures").exists()


def test_sweep_rejects_unknown_metric_and_axes(tmp_path):
    keys, runs = figures.read_sweep(write_sweep_folder(tmp_path))
    with pytest.raises(figures.FigureInputError, match="--metric 'speed'"):
        figures.plot_sweep(keys, runs, metric="speed")
    with pytest.raises(figures.FigureInputError, match="--sweep-axes"):
        figures.plot_sweep(keys, runs, axes_keys=["data.input_dim"])


def test_drawing_and_saving_choose_no_global_backend(tmp_path):
    # Importing harness.plot, drawing and saving leave matplotlib's backend as the user set it
    # (here MPLBACKEND=template, matplotlib's no-op backend); figures are written by each
    # format's own writer. A fresh interpreter, so no earlier import has chosen anything.
    run = write_run_folder(tmp_path, "run-backend")
    script = (
        "import matplotlib, harness.plot.figures as f; from pathlib import Path\n"
        f"written = f.write_run_figures(Path({str(run)!r}), f.FigureOptions(formats=('png', 'pdf')))\n"
        "import matplotlib.pyplot\n"
        "print(matplotlib.get_backend(), len(written))\n"
    )
    environment = {**os.environ, "MPLBACKEND": "template", "PYTHONPATH": str(Path(__file__).resolve().parents[1])}
    done = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, env=environment, check=True)
    assert done.stdout.split() == ["template", "4"]
    assert (run / "figures" / "learning_curve.png").read_bytes().startswith(b"\x89PNG")


# ---------------------------------------------------------------------------------------
# Folder kinds, writing files, command line
# ---------------------------------------------------------------------------------------


def test_folder_kind_from_files(tmp_path):
    assert figures.folder_kind(write_run_folder(tmp_path, "run-g")) == "run"
    assert figures.folder_kind(write_scaling_folder(tmp_path)) == "scaling"
    assert figures.folder_kind(write_sweep_folder(tmp_path)) == "sweep"
    (tmp_path / "empty").mkdir()
    with pytest.raises(figures.FigureInputError, match="not a result folder"):
        figures.folder_kind(tmp_path / "empty")
    broken = write_run_folder(tmp_path, "run-h")
    (broken / "summary.parquet").unlink()
    with pytest.raises(figures.FigureInputError, match=r"summary\.parquet: missing"):
        figures.folder_kind(broken)


def test_missing_summary_column_is_named(tmp_path):
    run = write_run_folder(tmp_path, "run-i")
    summary = pd.read_parquet(run / "summary.parquet").drop(columns=["sim_sem"])
    summary.to_parquet(run / "summary.parquet")
    with pytest.raises(figures.FigureInputError, match=r"summary\.parquet: missing column\(s\) sim_sem"):
        figures.read_summary(run)


def test_figure_command_writes_png_and_pdf_atomically(tmp_path, capsys):
    run = write_run_folder(tmp_path, "run-j")
    assert _run_cli("figure", str(run), "--format", "png,pdf", "--size", "double", "--per-seed") == 0
    out = run / "figures"
    names = sorted(path.name for path in out.iterdir())
    assert names == [
        "learning_curve.pdf",
        "learning_curve.png",
        "order_parameters.pdf",
        "order_parameters.png",
    ]  # and no temporary files left behind
    assert (out / "learning_curve.pdf").read_bytes().startswith(b"%PDF")
    from PIL import Image  # matplotlib depends on Pillow

    width, _ = Image.open(out / "learning_curve.png").size
    # "double" is a 7 in page width, drawn at 300 dpi: the layout fits inside, nothing is cropped.
    assert abs(width - 7 * 300) <= 2
    printed = capsys.readouterr().out.split()
    assert str(out / "learning_curve.png") in printed


def test_figures_regenerate_identically_from_tables(tmp_path):
    run = write_run_folder(tmp_path, "run-k")
    drawn = []
    for name in ("first", "second"):
        # Each drawing starts from the stored tables alone.
        fig = figures.plot_learning_curve(figures.read_summary(run), size=figures.FigureSize(None, 2.0, 1.6))
        (path,) = figures.save_figure(fig, tmp_path / name, ["png"])
        drawn.append(path.read_bytes())
    assert drawn[0] == drawn[1]


def test_figure_command_on_scaling_and_sweep(tmp_path):
    scaling = write_scaling_folder(tmp_path)
    sweep = write_sweep_folder(tmp_path)
    code = _run_cli(
        "figure", str(scaling), str(sweep), "--format", "png", "--metric", "divergence_t", "--size", "3,2.5"
    )
    assert code == 0
    assert (scaling / "figures" / "scaling.png").is_file()
    assert (sweep / "figures" / "sweep_divergence_t.png").is_file()


@pytest.mark.parametrize(
    ("extra", "expected"),
    [
        ([], "not a result folder"),
        (["--size", "huge"], "--size 'huge'"),
        (["--format", "svg"], "--format 'svg'"),
    ],
)
def test_figure_command_bad_input_one_line_exit_2(tmp_path, capsys, extra, expected):
    target = tmp_path / "not-a-run"
    target.mkdir()
    assert _run_cli("figure", str(target), *extra) == 2
    error = capsys.readouterr().err
    assert error.count("\n") == 1 and expected in error
    assert not (target / "figures").exists()

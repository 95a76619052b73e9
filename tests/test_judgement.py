"""The verdict's statistics against hand-computed numbers and reference libraries.

Every number the judgement rests on is pinned here: the paired mean and its standard error,
the margins, the band factor (Student's t and Sidak quantiles from scipy.stats, written out),
the three outcomes, the seeds forecast, the per-seed relative gap, and the columns that
comparison.summarise / comparison.metrics store. A deliberately broken standard error (one
missing its 1/sqrt(S)) fails these tests.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from harness.core.trajectories import Trajectories
from harness.results import comparison, judgement
from harness.results.judgement import Margin

# Three seeds, two times, one observable: d = theory - sim by hand.
SIM = np.array([[[1.0], [0.50]], [[1.0], [0.40]], [[1.0], [0.60]]])  # [S=3, E=2, O=1]
THEORY = np.array([[[1.0], [0.52]], [[1.0], [0.44]], [[1.0], [0.63]]])
# d at t1: 0.02, 0.04, 0.03 -> mean 0.03, sd 0.01, se 0.01 / sqrt(3) = 0.0057735


def test_paired_mean_and_standard_error_by_hand():
    mean, sem, n = judgement.mean_sem(THEORY - SIM)
    assert mean[1, 0] == pytest.approx(0.03, abs=1e-15)
    assert sem[1, 0] == pytest.approx(0.01 / math.sqrt(3), rel=1e-12)  # sd(ddof=1) / sqrt(S)
    assert n[1, 0] == 3
    # a NaN (a diverged seed) leaves that cell's average: two seeds left, se = |0.02 - 0.04| / 2
    partial = (THEORY - SIM).copy()
    partial[2, 1, 0] = np.nan
    mean, sem, n = judgement.mean_sem(partial)
    assert (mean[1, 0], sem[1, 0], n[1, 0]) == (pytest.approx(0.03), pytest.approx(0.01), 2)


def test_margins_error_curves_relative_order_parameters_to_their_largest_size():
    sim_mean = np.array([[0.20, 0.0, 0.1], [0.02, 0.5, -0.8], [0.0001, 1.0, 0.3]])
    delta = judgement.group_margins(sim_mean, ["test_error", "Q[0,0]", "Q[0,1]"], Margin(0.05, 0.001, 0.05))
    # error: max(0.05 |eps(t)|, 0.001 * 0.2)
    np.testing.assert_allclose(delta[:, 0], [0.01, 0.001, 0.0002])
    # Q: 0.05 x the largest |Q entry| over the run (1.0), the same for every entry and time
    np.testing.assert_allclose(delta[:, 1:], 0.05)


def test_band_factor_sidak_and_pointwise_quantiles():
    # Sidak over J cells with n seeds: per-cell level 1 - (1 - alpha)^(1/J), two-sided t quantile
    # (Sidak 1967); written out with scipy.stats as the reference.
    alpha, cells, seeds = 0.05, 40, 6
    expected = stats.t.ppf(1 - (1 - (1 - alpha) ** (1 / cells)) / 2, seeds - 1)
    assert judgement._sidak_factor(alpha, cells, seeds) == pytest.approx(expected, rel=1e-12)
    assert judgement._pointwise_factor(0.05, 16) == pytest.approx(2.1314, abs=1e-4)  # t_15, 97.5 % (t table)


def test_bootstrap_factor_of_independent_times_matches_the_sidak_value_at_large_S():
    # With many seeds and independent Gaussian cells the studentised maximum is the maximum of J
    # independent |N(0,1)|: its 95 % quantile is Phi^-1(1 - (1 - 0.95^(1/J)) / 2) (Sidak's
    # bound is then exact). Common practice, no source.
    rng = np.random.default_rng(0)
    diff = rng.standard_normal((400, 10, 1))
    _, sem, n = judgement.mean_sem(diff)
    band = judgement.band_factor(diff, sem, n, np.array([True]), 0.05)
    exact = stats.norm.isf((1 - 0.95 ** (1 / 10)) / 2)
    assert band.method == "bootstrap" and band.cells == 10 and band.seeds == 400
    assert band.factor == pytest.approx(exact, rel=0.06)


def test_bootstrap_factor_of_perfectly_correlated_times_is_the_pointwise_one():
    # One random number per seed copied to every time: the maximum over times is one |t|, so
    # the simultaneous factor falls to the pointwise quantile (here the normal 1.96 at large S).
    rng = np.random.default_rng(1)
    diff = np.repeat(rng.standard_normal((400, 1, 1)), 30, axis=1)
    _, sem, n = judgement.mean_sem(diff)
    band = judgement.band_factor(diff, sem, n, np.array([True]), 0.05)
    assert band.factor == pytest.approx(stats.t.isf(0.025, 399), rel=0.05)


def _judge(diff: np.ndarray, size: float = 1.0) -> judgement.Judgement:
    """Judge an order-parameter group 'Q' whose largest size is ``size`` (delta = 0.05 * size)."""
    e = diff.shape[1]
    sim_mean = np.full((e, 1), size)
    return judgement.judge_differences(np.arange(e, dtype=float), diff, sim_mean, ["Q[0,0]"], Margin())


def test_outcomes_on_constructed_cells():
    # 4 seeds, 2 times; delta = 0.05. Sidak over 2 cells with 3 dof:
    c = stats.t.ppf(1 - (1 - 0.95 ** 0.5) / 2, 3)  # = 4.17
    spread = np.array([-1.0, 1.0, -1.0, 1.0])  # sd = 1.1547, se = sd / 2 = 0.5774
    se = np.std(spread, ddof=1) / 2

    # agree: |m| + c se <= delta at both times
    small = 0.01 / (c * se)
    agree = _judge(np.stack([0.0 + small * spread, 0.01 + small * spread], axis=1)[:, :, None])
    assert agree.verdict == "agree" and agree.groups[0].reach == pytest.approx((0.01 + 0.01) / 0.05)
    assert agree.band.method == "sidak" and agree.band.factor == pytest.approx(c, rel=1e-12)

    # disagree: |m| - c se > delta at the second time
    far = _judge(np.stack([small * spread, 0.2 + small * spread], axis=1)[:, :, None])
    assert far.verdict == "disagree" and far.groups[0].departs_t == 1.0
    assert far.groups[0].inner == pytest.approx((0.2 - 0.01) / 0.05)

    # inconclusive: the band straddles the margin
    wide = 0.05 / (c * se)
    open_case = _judge(np.stack([wide * spread, 0.04 + wide * spread], axis=1)[:, :, None])
    assert open_case.verdict == "inconclusive"
    assert math.isfinite(open_case.seeds_needed) and open_case.seeds_needed > 4


def test_a_difference_inside_the_margin_can_be_detectable():
    # A small offset (2 % of the size, margin 5 %) with a tight spread: agree, and detectable.
    rng = np.random.default_rng(2)
    diff = 0.02 + 0.001 * rng.standard_normal((64, 8, 1))
    result = _judge(diff)
    assert result.verdict == "agree"
    assert result.groups[0].detected_t == 0.0
    assert result.groups[0].max_rel_diff == pytest.approx(0.02, abs=0.002)


def test_seeds_needed_by_hand():
    # One cell, S = 16: m = 0, se = 0.02, delta = 0.05, c at 16 seeds from the bootstrap's floor;
    # with |m| - se clipped at 0 the forecast solves S' = 16 (c' se / delta)^2 with c' the t quantile
    # at the same tail: written out with scipy as the reference.
    band = judgement.Band(factor=3.0, method="bootstrap", seeds=16, cells=1, alpha=0.05)
    tail = stats.t.sf(3.0, 15)

    def by_hand(gap: float) -> int:
        s_prime = 16.0
        for _ in range(50):
            s_prime = max(math.ceil(16 * (stats.t.isf(tail, s_prime - 1) * 0.02 / gap) ** 2), 17)
        return s_prime

    needed = judgement._seeds_needed(np.array([0.0]), np.array([0.02]), np.array([0.05]), band, 16)
    assert needed == by_hand(0.05) == pytest.approx(16 * (3.0 * 0.02 / 0.05) ** 2, rel=0.2)
    # A difference beyond the margin aims at disagreement: m = 0.12, se = 0.02 -> plausible 0.10,
    # 0.05 beyond the margin.
    towards = judgement._seeds_needed(np.array([0.12]), np.array([0.02]), np.array([0.05]), band, 16)
    assert towards == by_hand(0.05)
    # Nothing settles a cell whose difference sits exactly at the margin.
    assert judgement._seeds_needed(np.array([0.07]), np.array([0.02]), np.array([0.05]), band, 16) == math.inf


def test_relative_gap_by_hand():
    diff = np.array([[-1.0, -2.0], [-0.5, -1.5], [-3.0, -3.0]])
    reference = np.array([[2.0, 2.0], [2.0, 2.0], [4.0, 4.0]])
    gap = judgement.relative_gap(diff, reference, 0.05)
    rho = np.array([-3 / 4, -2 / 4, -6 / 8])
    half = stats.t.ppf(0.975, 2) * rho.std(ddof=1) / math.sqrt(3)
    assert gap.mean == pytest.approx(rho.mean()) and gap.seeds == 3 and gap.same_sign == 3
    assert (gap.low, gap.high) == (pytest.approx(rho.mean() - half), pytest.approx(rho.mean() + half))


def test_exit_statuses():
    assert judgement.EXIT_STATUS == {"agree": 0, "disagree": 1, "inconclusive": 3, "n/a": 0}


def test_summary_and_metrics_columns_by_hand():
    traj = Trajectories(np.arange(3), np.array([0.0, 1.0]), ["test_error"], SIM, THEORY)
    comp = comparison.compare(traj, Margin())
    row = comp.summary[comp.summary["t"] == 1.0].iloc[0]
    assert row["sim_mean"] == pytest.approx(0.5) and row["theory_mean"] == pytest.approx(0.53)
    assert row["diff_mean"] == pytest.approx(0.03) and row["diff_sem"] == pytest.approx(0.01 / math.sqrt(3))
    assert row["z"] == pytest.approx(0.03 / (0.01 / math.sqrt(3)))  # = 5.196
    assert row["margin"] == pytest.approx(0.05 * 0.5)  # an error curve: 5 % of its value at t
    c = stats.t.ppf(1 - (1 - 0.95) / 2, 2)  # one judged cell: Sidak = pointwise
    assert row["band"] == pytest.approx(c * 0.01 / math.sqrt(3))
    assert row["n_seeds"] == 3
    metric = comp.metrics.iloc[0]
    assert metric["max_abs_z"] == pytest.approx(5.196, abs=1e-3)
    assert metric["max_rel_err"] == pytest.approx(0.03 / 0.5)
    assert metric["band_reach"] == pytest.approx((0.03 + c * 0.01 / math.sqrt(3)) / 0.025)
    # The difference (z = 5.2) is significant, yet 3 seeds cannot show it beyond 5 %: inconclusive.
    assert metric["verdict"] == metric["group_verdict"] == "inconclusive"
    assert comp.judgement.verdict == "inconclusive" and math.isnan(metric["divergence_t"])


def test_unpaired_theory_uses_the_simulation_spread():
    # A theory given as one mean curve: the difference's SEM is the simulation's.
    mean_curve = np.broadcast_to(THEORY.mean(axis=0), THEORY.shape)
    traj = Trajectories(np.arange(3), np.array([0.0, 1.0]), ["test_error"], SIM, mean_curve, paired=False)
    summary = comparison.compare(traj, Margin()).summary
    row = summary[summary["t"] == 1.0].iloc[0]
    assert row["diff_sem"] == pytest.approx(np.std([0.5, 0.4, 0.6], ddof=1) / math.sqrt(3))


def test_a_diverged_seed_is_reported_not_counted_as_a_gap():
    rng = np.random.default_rng(3)
    sim = 0.1 + 0.001 * rng.standard_normal((6, 5, 2))
    theory = sim + 0.0001 * rng.standard_normal((6, 5, 2))
    sim[0, 3:] = np.nan  # seed 0 diverged at the fourth evaluation
    traj = Trajectories(np.arange(6), np.arange(5.0), ["test_error", "overlap_error"], sim, theory)
    report = comparison.gap_report(traj, Margin(), np.array([3.0, np.nan, np.nan, np.nan, np.nan, np.nan]))
    assert report["diverged"] == 1 and report["gaussian_equivalence"]["seeds"] == 5
    lines = comparison.describe_gaps(report)
    assert lines[0].startswith("1 of 6 seeds diverged")
    assert not any("not Gaussian-equivalent" in line for line in lines)
    everything = comparison.gap_report(traj, Margin(), np.zeros(6))
    assert "gaussian_equivalence" not in everything
    assert "no gap can be measured" in comparison.describe_gaps(everything)[0]


def test_quenched_gap_of_one_sign_is_a_disagreement():
    # Every seed's measured error 40-70 % below its own Gaussian formula, the formula varying
    # threefold from instance to instance (what a 3-dimensional latent manifold gives): the
    # gap's SEM is large, yet the verdict is disagree and every seed shares the sign.
    rng = np.random.default_rng(4)
    formula = rng.uniform(0.02, 0.06, size=(16, 1)) * np.linspace(2.0, 1.0, 8)[None, :]
    measured = formula * rng.uniform(0.3, 0.6, size=(16, 1))
    sim = np.stack([measured, formula], axis=-1)
    traj = Trajectories(np.arange(16), np.arange(8.0), ["test_error", "overlap_error"], sim, sim.copy())
    gap = comparison.gap_report(traj, Margin())["gaussian_equivalence"]
    assert gap["verdict"] == "disagree"
    assert gap["same_sign"] == 16 and -0.7 < gap["relative_low"] < gap["relative_high"] < -0.4


def test_metrics_table_keeps_its_column_order():
    traj = Trajectories(np.arange(3), np.array([0.0, 1.0]), ["test_error"], SIM, THEORY)
    table = comparison.compare(traj, Margin()).metrics
    assert list(table.columns) == comparison.METRIC_COLUMNS + comparison.METRIC_EXTRA_COLUMNS
    assert isinstance(table, pd.DataFrame)

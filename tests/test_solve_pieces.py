"""The theories' solve in pieces (harness.equations.ode_solve): the steps of one solve, bit for bit."""

from __future__ import annotations

import numpy as np

from harness.core import scenario as sc
from harness.equations import iid as iid_theory
from harness.equations.ode_solve import reporting_progress


def _problem(seeds: int = 2):
    scenario = sc.resolve({"sgd": {"learning_rate": 0.8}})
    rng = np.random.default_rng(3)
    w, wt = 0.3 * rng.normal(size=(seeds, 2, 50)), rng.normal(size=(seeds, 2, 50))
    start = iid_theory.OrderParameters(
        Q=w @ np.swapaxes(w, 1, 2) / 50, R=w @ np.swapaxes(wt, 1, 2) / 50, T=wt @ np.swapaxes(wt, 1, 2) / 50,
        v=np.ones((seeds, 2)),
    )
    times = np.concatenate([[0.0], np.geomspace(0.05, 60.0, 29)])
    return iid_theory.dynamics_of(scenario), start, np.ones((seeds, 2)), times


def test_pieces_give_the_bits_of_one_solve_and_report_progress(monkeypatch):
    dyn, start, vt, times = _problem()
    reports: list[tuple[float, float]] = []
    with reporting_progress(lambda covered, total: reports.append((covered, total))):
        pieces = iid_theory.solve(dyn, start, vt, times, rtol=1e-8, atol=1e-10)
    assert len(reports) >= 3  # several pieces, each handing control back
    covered = [c for c, _ in reports]
    assert covered == sorted(covered) and covered[-1] == times[-1] and reports[-1][1] == times[-1]
    monkeypatch.setattr(iid_theory, "STEPS_PER_PIECE", 10**6)  # the whole range in one piece
    whole = iid_theory.solve(dyn, start, vt, times, rtol=1e-8, atol=1e-10)
    for name in ("Q", "R", "T", "v"):
        assert np.array_equal(getattr(pieces, name), getattr(whole, name))
    # and the first values are the initial conditions themselves
    assert np.array_equal(pieces.Q[:, 0], start.Q) and np.array_equal(pieces.R[:, 0], start.R)


def test_a_failed_seed_is_nan_throughout_and_leaves_the_others_alone():
    dyn, start, vt, times = _problem()
    broken = start._replace(Q=start.Q.copy())
    broken.Q[1] = np.nan
    ops = iid_theory.solve(dyn, broken, vt, times, rtol=1e-8, atol=1e-10)
    assert np.all(np.isnan(ops.Q[1]))
    fine = iid_theory.solve(dyn, start, vt, times, rtol=1e-8, atol=1e-10)
    assert np.array_equal(ops.Q[0], fine.Q[0])
    # out of steps: every value of the seed is NaN, not only those after the budget ran out
    capped = iid_theory.solve(dyn, start, vt, times, rtol=1e-8, atol=1e-10, max_steps=20)
    assert np.all(np.isnan(capped.Q))

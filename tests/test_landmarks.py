"""Landmarks of learning curves on synthetic curves whose landmarks are known by hand."""

from __future__ import annotations

import math

import numpy as np
import pytest

from harness.core.trajectories import observable_names, stack_observables
from harness.results import landmarks as lm

H = lm.LandmarkSettings().slope_window


def _broken_power_law(t: np.ndarray) -> np.ndarray:
    """ln eps piecewise linear in ln t: flat 0.3 to t = 1, t^-1.2 to 10, flat to 100, t^-2 after."""
    plateau = 0.3 * 10.0**-1.2
    safe = np.maximum(t, 1.0)  # the power laws are only used for t > 1
    return np.select(
        [t <= 1, t <= 10, t <= 100],
        [np.full_like(t, 0.3), 0.3 * safe**-1.2, np.full_like(t, plateau)],
        plateau * (safe / 100.0) ** -2.0,
    )


def _grid() -> np.ndarray:
    # 40 points per decade from 0.01 to 1000, with the breaks 1, 10, 100 on the grid, and t = 0
    return np.concatenate([[0.0], np.logspace(-2, 3, 201)])


def test_plateau_of_a_broken_power_law_by_hand():
    t = _grid()
    eps = _broken_power_law(t)[None, :]
    found = lm.find_landmarks(t, eps)
    plateau = 0.3 * 10.0**-1.2
    # Hand computation. ln eps is exactly piecewise linear in ln t and the breaks are evaluations,
    # so the interpolant is the curve itself. For ln t in [ln 10 - h, ln 10 + h] the windowed slope
    # is -1.2 (ln 10 - (ln t - h)) / (2 h), linear in ln t; |s| = 0.1 at ln t = ln 10 + 5 h / 6.
    # The flat start (t < 1) is not a plateau: nothing fell before it.
    assert found.plateau_entry[0] == pytest.approx(10.0 * math.exp(5.0 * H / 6.0), rel=1e-9)
    # every flat evaluation has eps = 0.3 x 10^-1.2 exactly
    assert found.plateau_height[0] == pytest.approx(plateau, rel=1e-12)
    # exit: plateau (t / 100)^-2 = plateau / 2  ->  t = 100 sqrt(2), linear in ln eps vs ln t
    assert found.plateau_exit[0] == pytest.approx(100.0 * math.sqrt(2.0), rel=1e-9)
    assert found.final_error[0] == pytest.approx(plateau * 10.0**-2, rel=1e-12)
    # the tail t^-2 is not exponential; without noise the decay rate is the fitted -slope of
    # ln eps against t: positive, and the plateau was left long before the last stretch
    assert found.decay_rate[0] > 0
    assert math.isnan(found.asymptotic_error[0])
    assert lm.sampling_warning(t, found) is None


def test_curves_without_a_plateau_report_none():
    t = _grid()
    curves = np.stack([
        0.3 * np.exp(-t),  # exponential decay: the slope -t only steepens
        0.3 / (1.0 + t),  # power law: slope -t / (1 + t) -> -1
        0.3 * np.exp(-0.5 * t**0.5),  # stretched exponential
    ])
    found = lm.find_landmarks(t, curves)
    assert np.all(np.isnan(found.plateau_entry))
    assert np.all(np.isnan(found.plateau_height))
    assert np.all(np.isnan(found.plateau_exit))
    assert np.all(np.isnan(found.specialisation))


def test_exponential_decay_rate_and_the_floor():
    # eps = 0.2 exp(-0.7 t): ln eps is linear in t with slope -0.7 at every point above the floor.
    t = np.linspace(0.0, 40.0, 401)
    eps = 0.2 * np.exp(-0.7 * t)
    found = lm.find_landmarks(t, eps[None, :])
    assert found.decay_rate[0] == pytest.approx(0.7, rel=1e-9)
    # the last usable time is where eps last exceeds the floor 1e-8:
    # 0.2 exp(-0.7 t) > 1e-8  <=>  t < ln(2e7) / 0.7 = 24.02; the stretch is its second half
    t_end = t[eps > lm.LandmarkSettings().error_floor][-1]
    assert t_end == pytest.approx(24.0)
    assert found.tail_points[0] == np.sum((t >= 0.5 * t_end) & (t <= t_end))


def test_noisy_curve_has_an_asymptote_not_a_plateau():
    # eps = 0.01 + 0.3 exp(-t): it falls, then stays flat at 0.01 for good.
    t = _grid()
    eps = (0.01 + 0.3 * np.exp(-t))[None, :]
    noisy = lm.find_landmarks(t, eps, noisy=True)
    assert math.isnan(noisy.plateau_entry[0]) and math.isnan(noisy.plateau_height[0])
    assert math.isnan(noisy.decay_rate[0])
    # mean over t in [500, 1000]: 0.3 exp(-500) is nothing
    assert noisy.asymptotic_error[0] == pytest.approx(0.01, rel=1e-12)
    # read without noise, the same curve is stuck on a plateau it never leaves: no decay rate
    clean = lm.find_landmarks(t, eps, noisy=False)
    assert clean.plateau_height[0] == pytest.approx(0.01, rel=1e-6)
    assert math.isnan(clean.plateau_exit[0]) and math.isnan(clean.decay_rate[0])


def test_a_plateau_the_noise_leaves_is_kept_with_noise():
    t = _grid()
    eps = _broken_power_law(t) + 1e-5  # leaves the plateau, then levels at 1e-5
    found = lm.find_landmarks(t, eps[None, :], noisy=True)
    assert found.plateau_height[0] == pytest.approx(0.3 * 10.0**-1.2 + 1e-5, rel=1e-12)
    assert found.plateau_exit[0] == pytest.approx(100 * math.sqrt(2), rel=0.01)


def _overlaps(t: np.ndarray) -> np.ndarray:
    """R = [[a + b, a - b], [a - b, a + b]]: sigma_R = |b| / sqrt(a^2 + b^2) (hand computation).

    Column means are a, deviations +-b, so the spread is 4 b^2 and the size 2((a+b)^2 + (a-b)^2).
    """
    a = 0.5 * np.ones_like(t)
    b = 0.4 * np.exp(-t) + 0.001 * np.exp(t / 10.0)  # starts asymmetric, symmetrises, then breaks
    return np.stack([np.stack([a + b, a - b], -1), np.stack([a - b, a + b], -1)], -2)


def test_specialisation_index_by_hand():
    R = np.array([[0.6, 0.4], [0.4, 0.6]])  # a = 0.5, b = 0.1
    assert lm.specialisation_index(R) == pytest.approx(0.1 / math.sqrt(0.26))
    assert lm.specialisation_index(np.eye(3)) == pytest.approx(math.sqrt(1 - 1 / 3))  # a permutation
    assert lm.specialisation_index(np.full((3, 2), 0.4)) == pytest.approx(0.0, abs=1e-12)  # symmetric
    assert math.isnan(lm.specialisation_index(np.ones((1, 2))))  # K = 1


def test_specialisation_time_by_hand():
    t = np.linspace(0.0, 100.0, 2001)
    R = _overlaps(t)[None]
    found = lm.find_landmarks(t, np.full((1, len(t)), 0.1), R)
    # sigma_R = 0.3 <=> b = 0.3 a / sqrt(1 - 0.09); late on b = 0.001 exp(t / 10) alone
    expected = 10.0 * math.log(0.3 * 0.5 / math.sqrt(0.91) / 0.001)
    # crossing interpolated between evaluations 0.05 apart
    assert found.specialisation[0] == pytest.approx(expected, abs=0.05)
    # the start (sigma_R = 0.63 > 0.3) is not a specialisation: it had not been symmetric yet
    assert lm.specialisation_index(R[0, 0]) > 0.3


def test_vectorised_over_seeds_and_landmarks_of_the_table_layout():
    t = _grid()
    curves = np.stack([_broken_power_law(t), 0.3 * np.exp(-t)])
    K = M = 2
    R = np.broadcast_to(_overlaps(t), (2, len(t), K, M))
    values = stack_observables(curves, curves, np.zeros((2, len(t), K, K)), R, np.zeros((2, len(t), M, M)), None)
    found = lm.landmarks_of(t, values, observable_names(K, M, False))
    alone = [lm.find_landmarks(t, curves[s : s + 1], R[s : s + 1]) for s in range(2)]
    for field in lm.Landmarks._fields:
        np.testing.assert_array_equal(getattr(found, field), np.concatenate([getattr(a, field) for a in alone]))
    assert np.isfinite(found.plateau_height[0]) and np.isnan(found.plateau_height[1])


def test_sparse_times_are_named_in_one_line():
    t = np.concatenate([[0.0], np.logspace(-2, 3, 11)])  # two points per decade
    eps = _broken_power_law(t)[None, :]
    found = lm.find_landmarks(t, eps)
    message = lm.sampling_warning(t, found)
    assert message is not None and "\n" not in message and "too sparse" in message
    # with a plateau found or not, these times leave factors of 3.2 between evaluations
    assert "3.16" in message


def test_settings_refuse_nonsense():
    with pytest.raises(ValueError, match="exit_fraction"):
        lm.LandmarkSettings(exit_fraction=1.5)
    with pytest.raises(ValueError, match="plateau_slope"):
        lm.LandmarkSettings(plateau_slope=-0.1)

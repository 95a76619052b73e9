"""Fixed points of the i.i.d. order-parameter equations against hand linearisations, LMS and long runs."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest

from harness.cli.main import main
from harness.core import scenario as sc
from harness.equations import fixed_points as fp
from harness.equations import iid as iid_theory
from harness.results import landmarks

# Tight tolerances for trajectories whose error is followed down to 1e-9 (eps is a difference of
# O(1) Gaussian averages, so it needs the order parameters to ~1e-12). The solver is compiled once
# per shape, so every trajectory of one network size has the same number of evaluation times.
TIGHT = {"rtol": 1e-12, "atol": 1e-15}
EVALUATIONS = {1: 201, 2: 81}


def _scenario(K: int, M: int, activation: str, eta: float, noise: float = 0.0) -> dict:
    return sc.resolve({
        "student": {"hidden": K, "activation": activation},
        "teacher": {"hidden": M, "activation": activation, "noise_std": noise},
        "sgd": {"learning_rate": eta},
    })


def _trajectory(scenario: dict, Q0, R0, times, tolerances=TIGHT):
    """One theory trajectory (T = I, second layers 1) and its error."""
    K, M = np.shape(R0)
    assert len(times) == EVALUATIONS[K]  # one compilation per network size
    dyn = iid_theory.dynamics_of(scenario)
    start = iid_theory.OrderParameters(Q=np.asarray(Q0)[None], R=np.asarray(R0)[None], T=np.eye(M)[None],
                                       v=np.ones((1, K)))
    ops = iid_theory.solve(dyn, start, np.ones((1, M)), times, **tolerances)
    eps = np.asarray(iid_theory.overlap_error(dyn, ops, np.ones((1, len(times), M))))[0]
    return ops, eps


# --------------------------------------------------------------------------- K = M = 1, erf, by hand
#
# Saad & Solla 1995 (Phys. Rev. E 52, 4225) and Biehl & Schwarze 1995 (J. Phys. A 28, 643): for one
# student and one teacher unit, g(x) = erf(x / sqrt 2), T = 1 and v = vt = 1, the erf closed forms
# of I3 and I4 (docs/equations.md, section 2) give, with a = 2 / pi,
#   dR/dt = eta a phi(Q, R),    phi = (1 + Q - R^2) / ((1 + Q) S) - R / ((1 + Q) s)
#   dQ/dt = 2 eta a psi(Q, R) + eta^2 a^2 chi(Q, R),
#       psi = R / ((1 + Q) S) - Q / ((1 + Q) s),
#       chi = [asin(Q / (1 + 3Q)) - 2 asin(R / sqrt(2 (1 + 3Q)(1 + 2Q - R^2)))
#              + asin((1 + 2Q - 2R^2) / (2 (1 + 2Q - R^2)))] / s,
#   S = sqrt(2 + 2Q - R^2), s = sqrt(1 + 2Q).
# (phi from I3(l,n,n) - I3(l,n,l); psi from I3(l,l,n) - I3(l,l,l); chi from I4 with k = l, where
# L4 = 1 + 2Q, L0 = L4 C34 - 2 C13 C14, L1 = L4 (1 + C33) - 2 C13^2.) At the teacher, Q = R = 1,
# S = s = sqrt 3 and every asin argument is 1/4 (asin' = 4 / sqrt 15); differentiating by hand:
#   phi_Q = 1 / (2 sqrt 3),  phi_R = -4 / (3 sqrt 3),  psi_Q = -1 / (2 sqrt 3),  psi_R = 2 / (3 sqrt 3),
#   chi_Q = 1 / sqrt 5,      chi_R = -2 / sqrt 5      (and chi = 0 there, so eta^2 enters only via chi').
# With x = a eta the Jacobian in (Q, R) is
#   [[-x / sqrt 3 + x^2 / sqrt 5,   4 x / (3 sqrt 3) - 2 x^2 / sqrt 5],
#    [ x / (2 sqrt 3),              -4 x / (3 sqrt 3)]],
# det = 2 x^2 / 9 - x^3 / (3 sqrt 15), trace = -7 x / (3 sqrt 3) + x^2 / sqrt 5. The trace stays
# negative past the point where det changes sign, so the teacher is stable for x < 2 sqrt(15) / 3:
#   eta_max = (pi / 2) (2 sqrt 15 / 3) = pi sqrt(15) / 3 = 4.0558.
# The eigenvalues are -x / (3 sqrt 3) (right eigenvector (2, 1), along which Q - 2R does not
# change) and mu = -2 x / sqrt 3 + x^2 / sqrt 5, whose left eigenvector is (1, -2) (check: (1, -2) J =
# mu (1, -2)), the direction of the error's gradient at the teacher, eps ~ (a / (4 sqrt 3))(Q - 2R)
# + const. So the error sees mu at first order and the other mode only squared (fixed_points docstring).

SQ3, SQ5 = math.sqrt(3.0), math.sqrt(5.0)


def _phi_psi_chi(Q: float, R: float) -> np.ndarray:
    S, s = math.sqrt(2 + 2 * Q - R * R), math.sqrt(1 + 2 * Q)
    phi = (1 + Q - R * R) / ((1 + Q) * S) - R / ((1 + Q) * s)
    psi = R / ((1 + Q) * S) - Q / ((1 + Q) * s)
    chi = (math.asin(Q / (1 + 3 * Q)) - 2 * math.asin(R / math.sqrt(2 * (1 + 3 * Q) * (1 + 2 * Q - R * R)))
           + math.asin((1 + 2 * Q - 2 * R * R) / (2 * (1 + 2 * Q - R * R)))) / s
    return np.array([phi, psi, chi])


def _hand_jacobian(eta: float) -> np.ndarray:
    x = 2.0 * eta / math.pi
    return np.array([
        [-x / SQ3 + x * x / SQ5, 4 * x / (3 * SQ3) - 2 * x * x / SQ5],
        [x / (2 * SQ3), -4 * x / (3 * SQ3)],
    ])


def test_hand_partial_derivatives_of_the_erf_closed_forms():
    # the hand derivatives above against central differences of the same closed forms
    h = 1e-6
    d_Q = (_phi_psi_chi(1 + h, 1) - _phi_psi_chi(1 - h, 1)) / (2 * h)
    d_R = (_phi_psi_chi(1, 1 - h) - _phi_psi_chi(1, 1 - 3 * h)) / (2 * h)  # R > 1 would leave the domain
    d_R_one_sided = d_R + (d_R - (_phi_psi_chi(1, 1 - 2 * h) - _phi_psi_chi(1, 1 - 4 * h)) / (2 * h))
    np.testing.assert_allclose(_phi_psi_chi(1, 1), 0.0, atol=1e-15)
    np.testing.assert_allclose(d_Q, [1 / (2 * SQ3), -1 / (2 * SQ3), 1 / SQ5], rtol=1e-7)
    np.testing.assert_allclose(d_R_one_sided, [-4 / (3 * SQ3), 2 / (3 * SQ3), -2 / SQ5], rtol=1e-5)


def test_erf_single_unit_jacobian_and_learning_rate_limit_match_the_hand_linearisation():
    problem, q0 = fp.scenario_problem(_scenario(1, 1, "erf", 0.5))
    point = fp.specialised_point(problem, q0)
    assert point.converged and point.error == 0.0
    _, jacobian = problem.compiled.flow(point.x, problem.constants)  # coordinates (Q[0,0], R[0,0])
    np.testing.assert_allclose(np.asarray(jacobian), _hand_jacobian(0.5), rtol=1e-10, atol=1e-13)
    x = 1.0 / math.pi
    np.testing.assert_allclose(np.sort(point.eigenvalues.real), np.sort([-x / (3 * SQ3), -2 * x / SQ3 + x * x / SQ5]),
                               rtol=1e-10)
    limit = fp.learning_rate_limit(problem, point.x)
    assert limit.value == pytest.approx(math.pi * math.sqrt(15.0) / 3.0, rel=1e-8)


def test_erf_single_unit_ode_converges_below_the_limit_and_not_above():
    # Common practice, no source: long runs of the equations from near the teacher just below and
    # above the computed limit. Above it the teacher is a saddle and the student settles elsewhere
    # with a finite error.
    limit = math.pi * math.sqrt(15.0) / 3.0
    times = np.linspace(0.0, 300.0, EVALUATIONS[1])
    _, below = _trajectory(_scenario(1, 1, "erf", 0.95 * limit), [[0.8]], [[0.85]], times)
    _, above = _trajectory(_scenario(1, 1, "erf", 1.05 * limit), [[0.8]], [[0.85]], times)
    assert below[-1] < 1e-10
    assert above[-1] > 1e-3 and above[-1] == pytest.approx(above[-2], rel=1e-6)


def _aitken_rate(times: np.ndarray, eps: np.ndarray, last: int, gap: int) -> float:
    """-d ln eps / dt at late times, Aitken's delta-squared extrapolation of three local slopes
    (Aitken 1926): the local slope approaches its limit geometrically (by a sub-leading exponential)."""
    slopes = np.diff(np.log(eps)) / np.diff(times)
    a, b, c = slopes[last - 2 * gap], slopes[last - gap], slopes[last]
    return -(c - (c - b) ** 2 / ((c - b) - (b - a)))


@pytest.mark.parametrize(
    "eta, end, rule",
    [
        # x = 1/pi: the R mode (-0.0613, invisible at first order) squared decays at 0.1225, slower
        # than the visible mode (0.322): the quadratic rule (eps ~ exp(2 lambda_1 t))
        (0.5, 100.0, "quadratic"),
        # x = 6/pi: the visible mode (0.574) is slower than twice the R mode (0.735): the linear rule
        (3.0, 25.0, "linear"),
    ],
)
def test_predicted_error_decay_rate_is_the_slope_of_a_long_trajectory(eta, end, rule):
    result = fp.fixed_points(_scenario(1, 1, "erf", eta))
    predicted = result["predictions"]
    x = 2 * eta / math.pi
    by_hand = min(2 * x / (3 * SQ3), 2 * x / SQ3 - x * x / SQ5)  # from the hand eigenvalues above
    assert predicted["error_decay_rate"] == pytest.approx(by_hand, rel=1e-9)
    assert predicted["error_decay_rule"] == rule
    assert predicted["convergence_rate"] == pytest.approx(x / (3 * SQ3), rel=1e-9)

    times = np.linspace(0.0, end, EVALUATIONS[1])
    _, eps = _trajectory(_scenario(1, 1, "erf", eta), [[0.3]], [[0.2]], times)
    assert eps[-1] > 1e-9  # still far above the precision of eps
    assert _aitken_rate(times, eps, last=len(times) - 2, gap=20) == pytest.approx(by_hand, rel=2e-3)
    if rule == "quadratic":
        # landmarks' least-squares slope over the last half: the sub-leading term exp(-0.061 t)
        # still bends the curve there by under 1% (measured 0.6%)
        found = landmarks.find_landmarks(times, eps[None, :])
        assert found.decay_rate[0] == pytest.approx(by_hand, rel=0.02)


# --------------------------------------------------------------------------- linear networks: LMS
#
# Widrow & Hoff 1960; Haykin, Adaptive Filter Theory (from memory). K = M = 1, g(x) = x, v = vt = 1,
# T = 1: the student is LMS on N taps of white unit-power input with step eta / N per sample.
# With Delta = lambda - nu + sigma xi and section 3:
#   dR/dt = -eta E[nu Delta] = -eta (R - 1)
#   dQ/dt = -2 eta E[lambda Delta] + eta^2 E[Delta^2] = -2 eta (Q - R) + eta^2 (Q - 2R + 1 + sigma^2)
# so eps = (Q - 2R + 1) / 2 obeys d eps/dt = -(2 eta - eta^2) eps + eta^2 sigma^2 / 2 (the classic
# mean-square recursion (1 - 2 mu + N mu^2)^n with mu = eta / N, n = N t, as N -> infinity).
# Jacobian in (Q, R): [[eta^2 - 2 eta, 2 eta - 2 eta^2], [0, -eta]], eigenvalues eta^2 - 2 eta and
# -eta: stable iff eta < 2. The error decays at 2 eta - eta^2, not at the leading eigenvalue
# -eta (eps is exactly a left eigenvector of the other mode), and settles at
# eps_inf = eta sigma^2 / (2 (2 - eta)).


@pytest.mark.parametrize("noise", [0.0, 0.5])
def test_linear_network_learning_rate_limit_and_rates_are_those_of_lms(noise):
    eta = 0.5
    result = fp.fixed_points(_scenario(1, 1, "linear", eta, noise))
    predicted = result["predictions"]
    eigenvalues = result["specialised"]["eigenvalues"]
    np.testing.assert_allclose(sorted(eigenvalues["real"]), sorted([eta * eta - 2 * eta, -eta]), rtol=1e-12)
    assert predicted["error_decay_rate"] == pytest.approx(2 * eta - eta * eta, rel=1e-12)
    assert predicted["error_decay_rule"] == "linear"
    assert predicted["convergence_rate"] == pytest.approx(eta, rel=1e-12)
    assert predicted["asymptotic_error"] == pytest.approx(eta * noise**2 / (2 * (2 - eta)), abs=1e-15)
    # without noise the teacher is the point at every rate; with noise the point runs off to
    # infinity as eta -> 2 (eps_inf diverges), which the continuation follows to within 1e-6
    assert predicted["learning_rate_limit"] == pytest.approx(2.0, rel=1e-8 if noise == 0 else 1e-6)
    assert result["unspecialised"] == {"found": False, "reason": result["unspecialised"]["reason"]}
    assert predicted["plateau_error"] is None and predicted["escape_rate"] is None


# --------------------------------------------------------------------------- K = M = 2, erf: the plateau


@pytest.fixture(scope="module")
def two_units():
    scenario = _scenario(2, 2, "erf", 0.5)
    return scenario, fp.fixed_points(scenario)


def test_plateau_height_is_the_error_of_the_symmetric_point(two_units):
    # A student started exactly symmetric (Q = 0.01 I, R = 0) stays in the symmetric subspace and
    # sits on the plateau for good; landmarks measures its height. The trajectory approaches the
    # point along a slow symmetric mode (eigenvalue -0.002), so the height (a median over the flat
    # stretch) lies slightly above the point's error (measured: 0.06%).
    scenario, result = two_units
    predicted = result["predictions"]
    times = np.concatenate([[0.0], np.geomspace(0.1, 1000.0, EVALUATIONS[2] - 1)])
    ops, eps = _trajectory(scenario, 0.01 * np.eye(2), np.zeros((2, 2)), times, {"rtol": 1e-10, "atol": 1e-12})
    found = landmarks.find_landmarks(times, eps[None, :], np.asarray(ops.R))
    assert found.plateau_height[0] == pytest.approx(predicted["plateau_error"], rel=2e-3)
    assert math.isnan(found.plateau_exit[0]) and math.isnan(found.specialisation[0])
    assert result["specialised"]["stable"] and not result["unspecialised"]["stable"]
    assert predicted["error_decay_rule"] == "quadratic"


def test_escape_rate_is_the_growth_of_a_symmetry_breaking_perturbation(two_units):
    # Common practice, no source: start at the symmetric point plus a perturbation of R that is odd
    # under swapping the student units; it grows like exp(escape_rate t), and the error leaves the
    # plateau like exp(2 escape_rate t) (eps is even in the perturbation).
    scenario, result = two_units
    point, predicted = result["unspecialised"], result["predictions"]
    odd = 1e-7 * np.array([[1.0, -1.0], [-1.0, 1.0]])
    times = np.linspace(0.0, 400.0, EVALUATIONS[2])
    ops, eps = _trajectory(scenario, np.array(point["Q"]), np.array(point["R"]) + odd, times,
                           {"rtol": 1e-10, "atol": 1e-12})
    R = np.asarray(ops.R)[0]
    early = slice(8, 41)  # t in [40, 200]
    growth = np.polyfit(times[early], np.log(np.abs(R[early, 0, 0] - R[early, 1, 0])), 1)[0]
    assert growth == pytest.approx(predicted["escape_rate"], rel=1e-4)
    late = slice(48, 73)  # t in [240, 360]: eps below the plateau by 1e-8 .. 1e-5
    departure = np.polyfit(times[late], np.log(point["error"] - eps[late]), 1)[0]
    assert predicted["plateau_error_exponent"] == pytest.approx(2 * predicted["escape_rate"], rel=1e-9)
    assert departure == pytest.approx(predicted["plateau_error_exponent"], rel=0.01)


# --------------------------------------------------------------------------- the command


def test_command_writes_json_with_nulls(tmp_path, capsys):
    path = tmp_path / "linear.toml"
    path.write_text('[student]\nhidden = 1\nactivation = "linear"\n[teacher]\nhidden = 1\nactivation = "linear"\n')
    assert main(["fixed-points", str(path), "--out", str(tmp_path / "out")]) == 0
    written = list((tmp_path / "out").glob("fixed_points_*.json"))
    assert len(written) == 1
    text = written[0].read_text()
    assert "NaN" not in text and "Infinity" not in text
    result = json.loads(text)
    assert result["predictions"]["plateau_error"] is None  # K = 1: no plateau predicted
    assert result["predictions"]["learning_rate_limit"] == pytest.approx(2.0, rel=1e-8)
    assert "learning-rate limit 2" in capsys.readouterr().out


def test_command_refuses_latent_data_in_one_line_and_writes_nothing(tmp_path, capsys):
    path = tmp_path / "latent.toml"
    path.write_text('[data]\nkind = "latent"\n')
    assert main(["fixed-points", str(path), "--out", str(tmp_path / "out")]) == 2
    error = capsys.readouterr().err
    assert error.count("\n") == 1 and "data.kind" in error
    assert not (tmp_path / "out").exists()

"""Latent-variable data models: scenario rules, sampling, paired simulation against the section-4 theory."""

from __future__ import annotations

import json

import jax
import jax.numpy as jnp
import numpy as np
import pandas as pd
import pytest

from harness.cli.run import print_run_summary
from harness.core import scenario as scenario_lib
from harness.core.scenario import ScenarioError
from harness.data import feature_covariance
from harness.data import latent as latent_models
from harness.data.model import build_data_model
from harness.equations.latent import builtin_latent
from harness.equations.sources import predict
from harness.results import comparison
from harness.results.judgement import Margin
from harness.runner import experiment, pipeline
from harness.sim import simulation
from harness.sim.initial import initial_state


def _scenario(data: dict, **sections) -> dict:
    table = {"data": {"kind": "latent", **data}}
    for name, values in sections.items():
        table[name] = values
    return scenario_lib.resolve(table)


# ---------------------------------------------------------------------- scenario rules


@pytest.mark.parametrize(
    "table, message",
    [
        ({"data": {"feature_map": "tanh"}}, "data.feature_map': applies only with data.kind"),
        ({"data": {"kind": "latent", "layers": [10]}}, "data.layers': applies only with data.kind = 'deep_latent'"),
        ({"data": {"kind": "latent", "feature_map": "cube"}}, "data.feature_map': must be one of"),
        ({"data": {"kind": "deep_latent", "layers": [5], "layer_activations": ["tanh"]}}, "one name per layer"),
        ({"data": {"kind": "deep_latent", "layers": [0]}}, "data.layers': must be a list of integers >= 1"),
        ({"data": {"kind": "latent", "feature_map": "relu"}, "theory": {"limit": "infinite"}}, "odd feature map"),
        ({"data": {"kind": "latent"}, "theory": {"bins": 50}}, "theory.bins': applies only"),
        ({"data": {"kind": "deep_latent", "moment_samples": 10}}, "data.moment_samples': must be an integer >= 1000"),
    ],
)
def test_bad_latent_keys_are_one_line_errors(table, message):
    with pytest.raises(ScenarioError, match=message.replace("(", r"\(")) as error:
        scenario_lib.resolve(table)
    assert "\n" not in str(error.value)


def test_latent_dim_defaults_to_half_the_input_dim():
    assert latent_models.latent_dim(_scenario({"input_dim": 301})) == 150
    assert latent_models.latent_dim(_scenario({"input_dim": 301, "latent_dim": 7})) == 7


# ------------------------------------------------------------------------- the models


def test_latent_model_samples_the_distribution_its_moments_describe():
    # The sampler (x = f(c F / sqrt D) - E f) and the exact moments handed to the theory
    # must describe one distribution: the empirical E[x] = 0, E[x c^T] = Phi and
    # E[x x^T] = Omega within 4.5 standard errors (common practice, no source), and the
    # order parameters are the notes' Q = w Omega w^T / N, R = w Phi wt^T / sqrt(N D).
    scenario = _scenario({"input_dim": 24, "latent_dim": 9, "feature_map": "tanh"}, run={"dtype": "float64"})
    model = build_data_model(scenario, jnp.float64)
    params = model.init(jax.random.PRNGKey(3))
    x, c = jax.jit(lambda p, k: model.sample(p, k, 200_000))(params, jax.random.PRNGKey(4))
    x, c = np.asarray(x), np.asarray(c)
    n = x.shape[0]
    for a, b, exact in [(x, np.ones((n, 1)), np.zeros((24, 1))), (x, c, params.phi), (x, x, params.omega)]:
        estimate = a.T @ b / n  # E[a b^T]; its standard error from Var(a_i b_j) = E[a_i^2 b_j^2] - E[a_i b_j]^2
        standard_error = np.sqrt(((a**2).T @ b**2 / n - estimate**2) / n)
        assert np.max(np.abs(estimate - np.asarray(exact)) / standard_error) < 4.5
    rng = np.random.default_rng(0)
    w, wt = rng.standard_normal((2, 24)), rng.standard_normal((3, 9))
    Q, R, T = model.order_parameters(params, jnp.asarray(w), jnp.asarray(wt))
    reference = feature_covariance.order_parameters(np.asarray(params.omega), np.asarray(params.phi), wt, w)
    for ours, theirs in zip((Q, R, T), reference, strict=True):
        np.testing.assert_allclose(ours, theirs, rtol=1e-12)


def test_deep_latent_model_reports_its_monte_carlo_error():
    scenario = _scenario({"kind": "deep_latent", "input_dim": 20, "latent_dim": 6, "layers": [15],
                          "layer_activations": ["tanh", "relu"], "moment_samples": 4000})
    model = build_data_model(scenario, jnp.float32)
    params = jax.jit(jax.vmap(model.init))(jax.random.split(jax.random.PRNGKey(0), 2))
    assert params.omega.shape == (2, 20, 20) and params.phi.shape == (2, 20, 6)
    notes = model.describe(params)
    assert notes["moments"] == "monte_carlo" and 0 < notes["omega_standard_error_max"] < 0.1
    x, c = model.sample(jax.tree_util.tree_map(lambda a: a[0], params), jax.random.PRNGKey(1), 5)
    assert x.shape == (5, 20) and c.shape == (5, 6) and x.dtype == jnp.float32


# --------------------------------------------------------- simulation against theory


@pytest.mark.parametrize("feature_map", ["sign", "tanh"])
def test_simulation_and_paired_latent_theory_agree_and_wrong_theories_are_told_apart(feature_map):
    # Issue 3: latent sign and tanh models at N ~ 300, D = N / 2, simulation against the exact
    # finite-N projected equations (docs/equations.md, section 5.6). With 16 seeds no difference
    # between them is detectable in test_error, Q or R (the band never excludes zero); the same
    # simulation tells apart a learning rate 10 % off (a detectable difference in Q, measured
    # when written at t = 0.25 and 0.8) and the equations without their eta^2 term (disagree).
    # Showing agreement within 5 % at this N needs ~30 seeds (measured: inconclusive at 16).
    scenario = _scenario(
        {"input_dim": 300, "feature_map": feature_map},
        sgd={"time": 8.0}, run={"seeds": 16, "evaluations": 8, "test_samples": 4000},
    )
    result = experiment.run_experiment(scenario)
    traj = result.trajectories
    sim_error = traj.sim[:, :, 0].mean(0)
    assert sim_error[-1] < 0.8 * sim_error[0]  # the students learned: the comparison is not trivial

    def judged(theory):
        return comparison.compare(traj._replace(theory=theory), Margin()).judgement

    correct = judged(traj.theory)
    assert correct.verdict != "disagree", correct.groups
    for group in ("test_error", "Q", "R"):
        assert np.isnan(correct.group(group).detected_t), (group, correct.groups)
    start = initial_state(simulation.make_simulator(scenario), traj.seeds)
    for rate in (0.45, 0.55):  # sgd.learning_rate is 0.5
        off = judged(predict(scenario_lib.with_overrides(scenario, {"sgd.learning_rate": rate}), start, traj.t).values)
        assert off.verdict != "agree"
        assert any(np.isfinite(off.group(g).detected_t) for g in ("test_error", "Q", "R")), (rate, off.groups)
    no_eta_squared = judged(builtin_latent(scenario, start, traj.t, second_order=False).values)
    assert no_eta_squared.verdict == "disagree", no_eta_squared.groups


def _preactivation_third_cumulant_distance(input_dim: int, samples: int) -> float:
    """|| third cumulant tensor of the whitened pair (lambda, nu) ||_F for one instance.

    Distance choice: for a pair whose first two moments match a Gaussian's, the leading
    term of the Edgeworth expansion of the density ratio is (1/6) kappa_abc He_abc(z) in
    the whitened variables z, whose norm in L2 of the Gaussian is ||kappa||_F / sqrt 6: the
    tensor norm is the leading-order chi-square distance to the Gaussian with the same
    mean and covariance (Edgeworth expansion; common practice, no source). Estimated
    cheaply and precisely: the covariance is exact (Omega, Phi), the means vanish exactly,
    and the Gaussian linear part g = w Phi c / sqrt N of lambda serves as a control
    variate (E[g g g] = 0 exactly), which removes most of the sampling noise; the squared
    norm is debiased by subtracting each entry's sampling variance.
    """
    scenario = _scenario({"input_dim": input_dim, "feature_map": "relu"})
    model = build_data_model(scenario, jnp.float32)
    params = model.init(jax.random.PRNGKey(input_dim))
    rng = np.random.default_rng(input_dim)
    w = np.abs(rng.standard_normal(input_dim))[None, :]  # weights of one sign: see the test
    wt = rng.standard_normal(model.teacher_dim)[None, :]
    Q, R, T = (np.asarray(a) for a in model.order_parameters(params, jnp.asarray(w), jnp.asarray(wt)))
    whiten = np.linalg.inv(np.linalg.cholesky(np.block([[Q, R], [R.T, T]])))
    linear = np.asarray(params.phi).T @ w[0] / np.sqrt(input_dim)  # g = c . (Phi^T w) / sqrt N

    @jax.jit
    def draw(key):
        x, c = model.sample(params, key, 10_000)
        c64 = c.astype(jnp.float64)
        lam = (x @ jnp.asarray(w[0], x.dtype)).astype(jnp.float64) / np.sqrt(input_dim)
        nu = c64 @ jnp.asarray(wt[0]) / np.sqrt(model.teacher_dim)
        return jnp.stack([lam, nu], 1), jnp.stack([c64 @ jnp.asarray(linear), nu], 1)

    terms = []
    for index in range(samples // 10_000):
        pair, gaussian_part = (np.asarray(a) @ whiten.T for a in draw(jax.random.PRNGKey(10_000 + index)))
        terms.append(np.einsum("sa,sb,sc->sabc", pair, pair, pair)
                     - np.einsum("sa,sb,sc->sabc", gaussian_part, gaussian_part, gaussian_part))
    terms = np.concatenate(terms).reshape(-1, 8)
    kappa = terms.mean(0)
    variance = terms.var(0, ddof=1) / len(terms)
    return float(np.sqrt(max(np.sum(kappa**2 - variance), 0.0)))


def test_non_gaussianity_of_the_preactivations_shrinks_like_inverse_sqrt_N():
    # Issue 3 (a stated property of Gaussian equivalence for single-layer generators, fact
    # of the trade, no source): the distance between the law of (lambda, nu) and the
    # Gaussian with the same first two moments shrinks like N^(-1/2); slope -0.5 +- 0.2
    # over N = 100..1600 (D = N / 2).
    # N^(-1/2) is the Berry-Esseen rate of a sum whose summands' skewness adds up; it is
    # what one sees with a skewed feature map (relu) and student weights of one sign,
    # used here. With an odd map (sign, tanh) every odd cumulant vanishes by symmetry,
    # and with weights of random sign the third cumulants cancel to O(1/N): the distance
    # then shrinks like 1/N (measured for sign and Gaussian weights: excess kurtosis of
    # lambda -0.225, -0.108, -0.055, -0.021 at N = 50, 100, 200, 400).
    sizes = np.array([100, 200, 400, 800, 1600])
    distances = np.array([_preactivation_third_cumulant_distance(int(n), 40_000) for n in sizes])
    slope = np.polyfit(np.log(sizes), np.log(distances), 1)[0]
    assert -0.7 <= slope <= -0.3, (slope, distances)


def test_tiny_latent_dimension_breaks_gaussian_equivalence(tmp_path, capsys):
    # Issue 3 / docs/equations.md (the three curves): with D = 2 the inputs live on a 2-D manifold
    # and (lambda, nu) is far from Gaussian: the measured test error departs from the Gaussian
    # formula on the simulation's own overlaps, judged "disagree" by the verdict's rule, and by
    # more than the equations depart from the overlaps (which rely on the same Gaussian
    # averages); the report says so in plain words.
    scenario = _scenario(
        {"input_dim": 300, "latent_dim": 2, "feature_map": "sign"},
        sgd={"time": 20.0}, run={"seeds": 16, "evaluations": 8, "test_samples": 4000},
    )
    stored = pipeline.run_and_store(scenario, tmp_path)
    record = json.loads((stored.folder / "judgement.json").read_text())
    ge, dynamics = record["gaps"]["gaussian_equivalence"], record["gaps"]["dynamics"]
    assert ge["verdict"] == "disagree"
    assert abs(ge["relative"]) > abs(dynamics["relative"])
    # the gap has one sign in (nearly) every seed, and its relative size is resolved
    assert ge["same_sign"] >= 14 and ge["relative_low"] * ge["relative_high"] > 0
    manifest = json.loads((stored.folder / "manifest.json").read_text())
    assert manifest["data_model"] == {"kind": "latent", "latent_dim": 2, "moments": "exact"}
    row = pd.read_parquet(tmp_path / "runs.parquet").set_index("run_id").loc[stored.run_id]
    assert row["gaussian_equivalence.verdict"] == "disagree"
    assert row["gaussian_equivalence.relative"] == pytest.approx(ge["relative"])
    print_run_summary(stored, scenario)
    assert "the data are not Gaussian-equivalent at this size" in capsys.readouterr().out


def test_trained_latent_model_uses_the_stored_generator(tmp_path, monkeypatch):
    # trained_latent: inputs are the stored decoder's images, centred and scaled so that
    # tr(Omega) / N = 1, the latent code c feeds the teacher; Omega and Phi by Monte Carlo
    # (one estimate for every seed), their standard errors reported.
    from harness.data import trained_generator

    monkeypatch.setenv("HARNESS_GENERATORS", str(tmp_path))
    scenario = _scenario({"kind": "trained_latent", "input_dim": 64, "generator": "small", "moment_samples": 20_000},
                         run={"dtype": "float64"})
    with pytest.raises(Exception, match="harness generator train --name small"):
        build_data_model(scenario, jnp.float64)
    trained_generator.train_generator("small", latent_dim=3, image_size=8, hidden_widths=[16], epochs=4, seed=1)
    model = build_data_model(scenario, jnp.float64)
    assert (model.input_dim, model.teacher_dim) == (64, 3)
    params = jax.jit(jax.vmap(model.init))(jax.random.split(jax.random.PRNGKey(0), 2))
    np.testing.assert_array_equal(params.omega[0], params.omega[1])  # one generator, one estimate
    assert np.trace(params.omega[0]) / 64 == pytest.approx(1.0, rel=1e-12)
    notes = model.describe(params)
    assert notes["moments"] == "monte_carlo" and notes["latent_dim"] == 3
    one = jax.tree_util.tree_map(lambda a: a[0], params)
    x, c = jax.jit(lambda p, k: model.sample(p, k, 40_000))(one, jax.random.PRNGKey(5))
    x, c = np.asarray(x), np.asarray(c)
    # independent samples against the stored estimate: both carry Monte Carlo error, so the
    # tolerance combines the two standard errors (4.5 of them; common practice, no source)
    for estimate, exact, stored_error in [(x.T @ x / len(x), params.omega[0], notes["omega_standard_error_max"]),
                                          (x.T @ c / len(x), params.phi[0], notes["phi_standard_error_max"])]:
        sampled_error = np.sqrt(stored_error**2 * 20_000 / 40_000)
        assert np.max(np.abs(estimate - np.asarray(exact))) < 4.5 * np.hypot(stored_error, sampled_error)

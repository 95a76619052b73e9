"""User data models: the ``python:`` data-kind protocol and the two-cluster mixture example."""

from __future__ import annotations

import math
import warnings
from pathlib import Path

import jax
import jax.numpy as jnp
import numpy as np
import pandas as pd
import pytest

from harness.core import scenario as sc
from harness.core.errors import InputError
from harness.core.trajectories import observable_names
from harness.data.model import build_data_model
from harness.data.user import MOMENT_SAMPLES
from harness.runner import experiment
from harness.runner.pipeline import run_and_store

REPO = Path(__file__).resolve().parents[1]

DATA_MODULE = "user_data_for_tests"
DATA_SOURCE = '''
import jax
import jax.numpy as jnp
import numpy as np
from harness.data.user import UserData

def gaussian_sampler(scenario, dtype):
    n = scenario["data"]["input_dim"]
    def sample(key, count):
        x = jax.random.normal(key, (count, n), dtype)
        return x, x
    return sample

def gaussian_without_moments(scenario, dtype):
    return UserData(gaussian_sampler(scenario, dtype))

def raises(scenario, dtype):
    raise RuntimeError("cannot build the clusters")

def returns_number(scenario, dtype):
    return 3

def wrong_x(scenario, dtype):
    return lambda key, count: (jnp.zeros((count, 7)), jnp.zeros((count, 7)))

def single_array(scenario, dtype):
    return lambda key, count: jnp.zeros((count, scenario["data"]["input_dim"]))

def labels_with_wrong_shape(scenario, dtype):
    n = scenario["data"]["input_dim"]
    return UserData(lambda key, count: (jnp.zeros((count, n)), jnp.zeros((count, 2))), labels=True)

def sampler_raises(scenario, dtype):
    def sample(key, count):
        raise ValueError("bad draw")
    return sample

def omega_wrong_shape(scenario, dtype):
    n = scenario["data"]["input_dim"]
    return UserData(gaussian_sampler(scenario, dtype), omega=np.eye(n + 1), phi=np.eye(n), latent_cov=np.eye(n))

def omega_not_symmetric(scenario, dtype):
    n = scenario["data"]["input_dim"]
    omega = np.eye(n)
    omega[0, 1] = 0.5
    return UserData(gaussian_sampler(scenario, dtype), omega=omega, phi=np.eye(n), latent_cov=np.eye(n))
'''


@pytest.fixture()
def factories(tmp_path, monkeypatch):
    (tmp_path / f"{DATA_MODULE}.py").write_text(DATA_SOURCE)
    monkeypatch.syspath_prepend(str(tmp_path))
    monkeypatch.chdir(REPO)  # the examples are imported as examples.two_clusters
    return tmp_path


def user_scenario(kind: str, **overrides) -> dict:
    table = {
        "data": {"kind": kind, "input_dim": 64},
        "sgd": {"time": 4.0},
        "run": {"seeds": 3, "evaluations": 6, "test_samples": 2000},
        "theory": {"source": "none"},
    }
    for dotted, value in overrides.items():
        section, name = dotted.split(".")
        table.setdefault(section, {})[name] = value
    return sc.resolve(table)


def test_two_cluster_inputs_run_end_to_end(factories, tmp_path):
    s = user_scenario("python:examples.two_clusters:inputs")
    stored = run_and_store(s, tmp_path / "results")
    frame = pd.read_parquet(stored.folder / "summary.parquet")
    error = frame[frame["observable"] == "test_error"].sort_values("t")["sim_mean"].to_numpy()
    assert np.all(np.isfinite(frame["sim_mean"])) and frame["theory_mean"].isna().all()
    assert error[-1] < 0.5 * error[0]  # the student learns the teacher on mixture inputs
    runs = pd.read_parquet(tmp_path / "results" / "runs.parquet")
    assert runs.iloc[0]["data.kind"] == "python:examples.two_clusters:inputs"


def test_given_moments_are_the_covariance_of_the_local_fields(factories):
    # The order parameters are defined as Cov(lambda, nu) (docs/equations.md, section 2); with the
    # example's exact Omega = Phi = C = I + mu mu^T they must match the empirical
    # covariance of the local fields over many fresh samples.
    s = user_scenario("python:examples.two_clusters:inputs", **{"data.input_dim": 50})
    model = build_data_model(s, jnp.float64)
    n = model.input_dim
    rng = np.random.default_rng(1)
    w, wt = rng.normal(size=(2, n)), rng.normal(size=(2, n))
    Q, R, T = (np.asarray(a) for a in model.order_parameters((), jnp.asarray(w), jnp.asarray(wt)))
    x, c = model.sample((), jax.random.PRNGKey(5), 200_000)
    fields = np.concatenate([np.asarray(x) @ w.T, np.asarray(c) @ wt.T], axis=1) / math.sqrt(n)
    empirical = fields.T @ fields / len(fields)
    exact = np.block([[Q, R], [R.T, T]])
    scale = np.sqrt(np.outer(np.diag(exact), np.diag(exact)))
    # Monte Carlo error of a second moment: ~ scale * sqrt(2 / samples) ~ 0.003 scale; allow 5 sigma.
    assert np.all(np.abs(empirical - exact) <= 0.016 * scale)


def test_missing_moments_are_estimated_with_a_warning(factories):
    s = user_scenario(f"python:{DATA_MODULE}:gaussian_without_moments", **{"run.seed": 3})
    with pytest.warns(UserWarning, match=f"gives no omega, phi, latent_cov: estimated from {MOMENT_SAMPLES} samples"):
        model = build_data_model(s, jnp.float32)
    w = jnp.asarray(np.random.default_rng(2).normal(size=(2, model.input_dim)))
    Q, R, T = model.order_parameters((), w, w)
    exact = np.asarray(w @ w.T) / model.input_dim  # i.i.d. Gaussian inputs: Omega = Phi = C = I
    # Relative Monte Carlo error ~ sqrt(2 / 20000) = 1%; allow 5%.
    for estimate in (Q, R, T):
        np.testing.assert_allclose(np.diag(np.asarray(estimate)), np.diag(exact), rtol=0.05)


def test_labels_given_directly_report_nan_overlaps_without_crashing(factories):
    s = user_scenario("python:examples.two_clusters:cluster_labels")
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        result = experiment.simulate(s)
    messages = [str(w.message) for w in caught]
    assert any("gives labels directly" in m for m in messages)
    assert not any("diverged" in m for m in messages)
    names = observable_names(2, 2, False)
    values = result.values
    for name in ("R[0,0]", "T[1,1]", "overlap_error"):
        assert np.isnan(values[:, :, names.index(name)]).all()
    error = values[:, :, names.index("test_error")]
    assert np.all(np.isfinite(error)) and np.all(np.isfinite(values[:, :, names.index("Q[0,0]")]))
    assert np.all(np.isnan(result.diverged_at))
    assert error[:, -1].mean() < 0.5 * error[:, 0].mean()  # the clusters are learned


@pytest.mark.parametrize(
    ("factory", "expected"),
    [
        ("raises", "raised RuntimeError: cannot build the clusters"),
        ("returns_number", "returned a int, expected harness.data.user.UserData or a sampler"),
        ("wrong_x", "its sampler returned x of shape (3, 7) for n = 3, expected a pair (x [n, 64], c [n, D])"),
        ("single_array", "its sampler returned ShapeDtypeStruct, expected a pair"),
        ("labels_with_wrong_shape", "its sampler returned labels of shape (3, 2) for n = 3"),
        ("sampler_raises", "its sampler raised ValueError: bad draw for sample(key, 3)"),
        ("omega_wrong_shape", "UserData.omega has shape (65, 65), expected (64, 64)"),
        ("omega_not_symmetric", "UserData.omega is not symmetric"),
    ],
)
def test_bad_factories_give_one_line_errors_naming_the_factory(factories, factory, expected):
    s = user_scenario(f"python:{DATA_MODULE}:{factory}")
    with pytest.raises(InputError) as caught:
        build_data_model(s, jnp.float32)
    message = str(caught.value)
    assert message.startswith(f"data factory '{DATA_MODULE}:{factory}'") and expected in message
    assert "\n" not in message


@pytest.mark.parametrize(
    ("kind", "theory", "expected"),
    [
        ("python:no_such_module_for_harness_tests:f", "none", "cannot import module"),
        (f"python:{DATA_MODULE}:absent", "none", f"module '{DATA_MODULE}' has no factory 'absent'"),
        ("python:examples.two_clusters:inputs", "builtin", "there is no built-in theory for data.kind"),
    ],
)
def test_data_kinds_are_checked_when_the_scenario_resolves(factories, kind, theory, expected):
    with pytest.raises(sc.ScenarioError, match=expected):
        sc.resolve({"data": {"kind": kind}, "theory": {"source": theory}})

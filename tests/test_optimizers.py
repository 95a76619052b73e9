"""Optimizers: the notes' SGD scalings, momentum, Adam, weight decay, and their scenario keys."""

from __future__ import annotations

import numpy as np
import pytest

from harness.core import scenario as sc
from harness.equations import sources as paired_theory
from harness.runner import experiment
from harness.sim.optimizers import make_optimizer

N = 64


def scenario(**overrides) -> dict:
    base = sc.resolve({
        "data": {"input_dim": N},
        "sgd": {"time": 3.0, "learning_rate": 0.5, "second_layer_learning_rate": 0.3},
        "student": {"train_second_layer": True},
        "run": {"seeds": 2, "evaluations": 5, "test_samples": 500},
    })
    return sc.with_overrides(base, overrides)


def updates(s: dict, grads_sequence, params=None):
    """The optimizer's updates for a sequence of gradients (params fixed)."""
    optimizer = make_optimizer(s)
    params = params or {"w": np.ones((2, N)), "v": np.ones(2)}
    state = optimizer.init(params)
    out = []
    for grads in grads_sequence:
        update, state = optimizer.update(grads, state, params)
        out.append({k: np.asarray(v) for k, v in update.items()})
    return out


def grads(w: float, v: float) -> dict:
    return {"w": np.full((2, N), w), "v": np.full(2, v)}


def test_sgd_uses_the_notes_learning_rates():
    # Notes, section 1: w moves by -eta * grad, v by -(eta_v / N) * grad.
    (step,) = updates(scenario(), [grads(2.0, 3.0)])
    np.testing.assert_allclose(step["w"], -0.5 * 2.0)
    np.testing.assert_allclose(step["v"], -0.3 / N * 3.0)


def test_an_untrained_second_layer_never_moves():
    s = scenario(**{"student.train_second_layer": False, "sgd.optimizer": "adam"})
    for step in updates(s, [grads(1.0, 1.0), grads(2.0, 5.0)]):
        assert np.all(step["v"] == 0.0)


def test_momentum_accumulates_a_trace():
    # Heavy ball (common practice, no source): m_t = g_t + beta m_{t-1}, update = -lr m_t.
    s = scenario(**{"sgd.optimizer": "momentum", "sgd.momentum": 0.75})
    first, second = updates(s, [grads(1.0, 1.0), grads(2.0, 4.0)])
    np.testing.assert_allclose(first["w"], -0.5 * 1.0)
    np.testing.assert_allclose(second["w"], -0.5 * (2.0 + 0.75 * 1.0))
    np.testing.assert_allclose(second["v"], -0.3 / N * (4.0 + 0.75 * 1.0))
    nesterov = updates(sc.with_overrides(s, {"sgd.nesterov": True}), [grads(1.0, 1.0), grads(2.0, 4.0)])
    assert not np.allclose(nesterov[1]["w"], second["w"])


def test_adam_first_step_has_the_scaled_learning_rate():
    # Adam (Kingma & Ba 2015, Algorithm 1): after bias correction the first step is
    # -lr * g / (|g| + eps) = -lr * sign(g). Our scalings: lr = eta / sqrt(N) on w, eta_v / N on v.
    s = scenario(**{"sgd.optimizer": "adam"})
    (step,) = updates(s, [grads(-0.01, 7.0)])
    np.testing.assert_allclose(step["w"], 0.5 / np.sqrt(N), rtol=1e-5)
    np.testing.assert_allclose(step["v"], -0.3 / N, rtol=1e-5)


def test_weight_decay_adds_kappa_over_n_on_w_and_kappa_on_v():
    # L2 penalty (kappa / 2)(sum_k Q_kk + |v|^2): its gradient is (kappa / N) w and kappa v.
    s = scenario(**{"sgd.weight_decay": 0.2})
    params = {"w": np.full((2, N), 3.0), "v": np.full(2, 2.0)}
    (step,) = updates(s, [grads(0.0, 0.0)], params)
    np.testing.assert_allclose(step["w"], -0.5 * 0.2 / N * 3.0)
    np.testing.assert_allclose(step["v"], -0.3 / N * 0.2 * 2.0)


def test_momentum_zero_is_plain_sgd_bit_for_bit():
    plain = experiment.simulate(scenario())
    heavy = experiment.simulate(scenario(**{"sgd.optimizer": "momentum", "sgd.momentum": 0.0}))
    assert np.array_equal(plain.values, heavy.values)
    assert np.all(np.isfinite(plain.values))


@pytest.mark.parametrize("kind", ["sgd", "momentum", "adam"])
def test_learning_rates_are_state_not_constants_and_the_simulation_is_unchanged(kind):
    # The learning rate is carried in the optimizer state (optax.inject_hyperparams) so that a
    # sweep over it runs one compiled program; the trajectory must be the very one that
    # optax's plain transformation with the rate as a compile-time constant gives.
    import jax
    import jax.numpy as jnp
    import optax

    from harness.sim import simulation

    extra = {"sgd.momentum": 0.6} if kind == "momentum" else {}
    s = scenario(**{"sgd.optimizer": kind, **extra})

    def constant_rates(layer_rate_w: float, layer_rate_v: float) -> optax.GradientTransformation:
        rule = {
            "sgd": lambda rate: optax.sgd(rate),
            "momentum": lambda rate: optax.sgd(rate, momentum=0.6),
            "adam": lambda rate: optax.adam(rate),
        }[kind]
        return optax.multi_transform({"a": rule(layer_rate_w), "b": rule(layer_rate_v)}, {"w": "a", "v": "b"})

    w_rate = 0.5 / np.sqrt(N) if kind == "adam" else 0.5
    trained = []
    for optimizer in (make_optimizer(s), constant_rates(w_rate, 0.3 / N)):
        sim = simulation.make_simulator(s)._replace(optimizer=optimizer)
        instance, state = simulation.init_ensemble(sim)
        state = simulation.make_advance(sim)(instance, state, jnp.asarray(N * 3, state.step.dtype))
        trained.append(jax.device_get(state.params))
    assert np.array_equal(trained[0]["w"], trained[1]["w"]) and np.array_equal(trained[0]["v"], trained[1]["v"])

    def program(rate: float) -> str:
        sim = simulation.make_simulator(sc.with_overrides(s, {"sgd.learning_rate": rate}))
        instance, state = simulation.init_ensemble(sim)
        return simulation.make_advance(sim).lower(instance, state, jnp.asarray(1, state.step.dtype)).as_text()

    assert program(0.5) == program(0.9)


def test_adam_runs_and_learns():
    s = scenario(**{"sgd.optimizer": "adam", "student.train_second_layer": False})
    result = experiment.simulate(s)
    error = result.values[:, :, 0]
    assert np.all(np.isfinite(error)) and np.all(np.isnan(result.diverged_at))
    assert np.all(error[:, -1] < 0.3 * error[:, 0])


def test_builtin_theory_warns_when_the_simulation_is_not_plain_sgd(monkeypatch):
    called = []
    monkeypatch.setitem(paired_theory.BUILTIN_THEORIES, "gaussian", lambda *args: called.append(1))
    s = scenario(**{"sgd.optimizer": "momentum"})
    with pytest.warns(UserWarning, match="describes plain SGD .*, but the simulation uses "
                                         "sgd.optimizer = 'momentum'; expect them to disagree"):
        paired_theory.predict(s, None, np.zeros(2))
    assert called
    with pytest.warns(UserWarning, match="sgd.optimizer = 'adam' and sgd.weight_decay = 0.1"):
        paired_theory.predict(scenario(**{"sgd.optimizer": "adam", "sgd.weight_decay": 0.1}), None, np.zeros(2))


@pytest.mark.parametrize(
    ("overrides", "expected"),
    [
        ({"sgd.optimizer": "rmsprop"}, "scenario key 'sgd.optimizer': must be one of 'sgd', 'momentum', 'adam'"),
        ({"sgd.momentum": 1.0, "sgd.optimizer": "momentum"}, "scenario key 'sgd.momentum': must be a number in [0, 1)"),
        ({"sgd.beta2": -0.1, "sgd.optimizer": "adam"}, "scenario key 'sgd.beta2': must be a number in [0, 1)"),
        ({"sgd.eps": 0.0, "sgd.optimizer": "adam"}, "scenario key 'sgd.eps': must be a finite number > 0"),
        ({"sgd.weight_decay": -1.0}, "scenario key 'sgd.weight_decay': must be a finite number >= 0"),
        ({"sgd.momentum": 0.5}, "scenario key 'sgd.momentum': applies only with sgd.optimizer = 'momentum', "
                                "got sgd.optimizer = 'sgd'"),
        ({"sgd.beta1": 0.5, "sgd.optimizer": "momentum"}, "'sgd.beta1': applies only with sgd.optimizer = 'adam'"),
    ],
)
def test_bad_optimizer_keys_are_rejected(overrides, expected):
    with pytest.raises(sc.ScenarioError) as caught:
        scenario(**overrides)
    assert expected in str(caught.value)

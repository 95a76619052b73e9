"""The optax transformation that turns per-sample gradients into SGD updates.

With the scalings of docs/equations.md (section 1) the student's pre-activation is
lambda_k = w_k . x / sqrt(N), so the per-sample gradient of the loss
1/2 (f(x) - y)^2 with respect to w_k is v_k g'(lambda_k) Delta x / sqrt(N). The update of
docs/equations.md (1.1), w_k <- w_k - (eta / sqrt(N)) v_k g'(lambda_k) Delta x is therefore plain SGD
with learning rate eta on w, and v_k <- v_k - (eta_v / N) g(lambda_k) Delta is plain SGD
with learning rate eta_v / N on v. A second layer that is not trained gets zero updates.

``sgd.optimizer`` chooses the update rule (plain SGD is the default, and the only one
the built-in theories describe):

* ``"sgd"``: the update of docs/equations.md above.
* ``"momentum"``: heavy-ball momentum (``optax.sgd(lr, momentum, nesterov)``): a trace
  m <- g + beta m, update -lr m (Nesterov: -lr (g + beta m)), same learning rates as SGD.
  With beta = ``sgd.momentum`` = 0 it is plain SGD, bit for bit.
* ``"adam"``: ``optax.adam(lr, b1, b2, eps)``. Adam divides each coordinate's gradient by
  its running root-mean-square, so the scale of the gradient drops out; to keep one unit
  of t = steps / N an O(1) change of the order parameters, as for SGD, the first layer's
  step is lr = eta / sqrt(N) (the size of an SGD step per coordinate, eta |g_i| with
  |g_i| ~ 1 / sqrt(N)) and the second layer's is eta_v / N. Derived here, no source.

``sgd.weight_decay`` = kappa adds an L2 penalty (kappa / 2) (sum_k Q_kk + sum_k v_k^2) to
the per-sample loss, i.e. its gradient (kappa / N) w on the first layer and kappa v on the
second, through ``optax.add_decayed_weights`` placed before the optimizer (coupled L2, not
decoupled "AdamW" decay). For SGD this is w <- w - eta (grad + (kappa / N) w): the decay per
step is eta kappa / N, so over one unit of t it contributes dQ_kl/dt = -2 eta kappa Q_kl,
dR_km/dt = -eta kappa R_km and dv_k/dt = -eta_v kappa v_k to the section-3 equations (the
other terms it produces are O(1/N); derivation in examples/README.md). The built-in
theories ignore it; examples/weight_decay_theory.py is a user theory that includes it.
"""

from __future__ import annotations

import optax

from harness.core import keys as k
from harness.core.keys import Key
from harness.core.scenario import Scenario, declare_keys

KEYS: dict[str, Key] = {
    "optimizer": Key("str", "sgd", "update rule", k.one_of("sgd", "momentum", "adam")),
    "momentum": Key("float", 0.9, "momentum beta (optimizer 'momentum')", k.unit_interval,
                    only_with=("sgd.optimizer", ("momentum",))),
    "nesterov": Key("bool", False, "Nesterov momentum (optimizer 'momentum')",
                    only_with=("sgd.optimizer", ("momentum",))),
    "beta1": Key("float", 0.9, "first-moment decay (optimizer 'adam')", k.unit_interval,
                 only_with=("sgd.optimizer", ("adam",))),
    "beta2": Key("float", 0.999, "second-moment decay (optimizer 'adam')", k.unit_interval,
                 only_with=("sgd.optimizer", ("adam",))),
    "eps": Key("float", 1e-8, "denominator offset (optimizer 'adam')", k.positive_finite,
               only_with=("sgd.optimizer", ("adam",))),
    "weight_decay": Key("float", 0.0, "kappa: L2 penalty (kappa/2) sum_k |w_k|^2 / N + (kappa/2) |v|^2",
                        k.non_negative_finite),
}
"""The [sgd] keys of the update rules (plain SGD is what the built-in theories describe)."""
declare_keys("sgd", KEYS)


def make_optimizer(scenario: Scenario) -> optax.GradientTransformation:
    """The scenario's optimizer on ``{"w": ..., "v": ...}`` with the learning of docs/equations.md-rate scalings."""
    sgd = scenario.sgd
    n = scenario.data.input_dim
    kappa = sgd["weight_decay"]
    kind = sgd["optimizer"]
    first_rate = sgd["learning_rate"] / n**0.5 if kind == "adam" else sgd["learning_rate"]
    first_layer = _layer_optimizer(sgd, first_rate, kappa / n)
    if scenario.student.train_second_layer:
        second_layer = _layer_optimizer(sgd, sgd["second_layer_learning_rate"] / n, kappa)
    else:
        second_layer = optax.set_to_zero()
    return optax.multi_transform(
        {"first": first_layer, "second": second_layer}, {"w": "first", "v": "second"}
    )


def _layer_optimizer(sgd: dict, rate: float, decay: float) -> optax.GradientTransformation:
    """One layer's update rule at learning rate ``rate``, with L2 gradient ``decay * weights``."""
    kind = sgd["optimizer"]
    # The learning rate lives in the optimizer's state (optax.inject_hyperparams), not in the
    # compiled update as a constant: the points of a sweep over learning rates then run one
    # and the same compiled program (one persistent-cache entry), and the update's
    # arithmetic is unchanged (tests/test_optimizers.py checks the bits against the constant).
    if kind == "sgd":
        rule = optax.inject_hyperparams(optax.sgd, static_args=("momentum", "nesterov"))(learning_rate=rate)
    elif kind == "momentum":
        rule = optax.inject_hyperparams(optax.sgd, static_args=("momentum", "nesterov"))(
            learning_rate=rate, momentum=sgd["momentum"], nesterov=sgd["nesterov"]
        )
    elif kind == "adam":
        rule = optax.inject_hyperparams(optax.adam, static_args=("b1", "b2", "eps"))(
            learning_rate=rate, b1=sgd["beta1"], b2=sgd["beta2"], eps=sgd["eps"]
        )
    else:  # resolve() has already rejected anything else
        raise AssertionError(kind)
    if decay == 0.0:
        return rule  # the default stays exactly the plain of docs/equations.md SGD update
    return optax.chain(optax.add_decayed_weights(decay), rule)

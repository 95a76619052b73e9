"""The optax transformation that turns per-sample gradients into SGD updates.

With the notes' scalings (section 1) the student's pre-activation is
lambda_k = w_k . x / sqrt(N), so the per-sample gradient of the loss
1/2 (f(x) - y)^2 with respect to w_k is v_k g'(lambda_k) Delta x / sqrt(N). The notes'
update w_k <- w_k - (eta / sqrt(N)) v_k g'(lambda_k) Delta x is therefore plain SGD
with learning rate eta on w, and v_k <- v_k - (eta_v / N) g(lambda_k) Delta is plain SGD
with learning rate eta_v / N on v. A second layer that is not trained gets zero updates.
"""

from __future__ import annotations

import optax

from harness.scenario import Scenario


def make_optimizer(scenario: Scenario) -> optax.GradientTransformation:
    """SGD on ``{"w": ..., "v": ...}`` with the notes' learning-rate scalings."""
    sgd = scenario["sgd"]
    n = scenario["data"]["input_dim"]
    first_layer = optax.sgd(sgd["learning_rate"])
    if scenario["student"]["train_second_layer"]:
        second_layer = optax.sgd(sgd["second_layer_learning_rate"] / n)
    else:
        second_layer = optax.set_to_zero()
    return optax.multi_transform(
        {"first": first_layer, "second": second_layer}, {"w": "first", "v": "second"}
    )

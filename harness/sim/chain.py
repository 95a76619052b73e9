"""The exact order-parameter chain: online SGD on i.i.d. Gaussian inputs at any N, in O((K+M)^3) per step.

``[run] engine = "chain"`` steps the order parameters (Q, R, v) themselves instead of the
weights. For i.i.d. standard Gaussian inputs this is not an approximation: the law of the
next (Q, R, v) given the present ones is exactly that of the full simulation, so the chain
is the full simulation at a cost independent of N, and finite-size questions can be asked
at N = 10^5 - 10^6.

Derivation (notation of docs/equations.md, sections 1-2). Stack the weights as the rows of
A = [w_1..w_K; wt_1..wt_M] ((K+M) x N), so that u = (lambda, nu) = A x / sqrt(N) and
Sigma = A A^T / N = [[Q, R], [R^T, T]]. With c_k = v_k g'(lambda_k) Delta and the update
w_k' = a w_k - (eta / sqrt(N)) c_k x  (a = 1 - eta kappa / N; kappa = sgd.weight_decay, 0 for
plain SGD), using w_l . x = sqrt(N) lambda_l and wt_m . x = sqrt(N) nu_m:

  Q'_kl = a^2 Q_kl - a (eta / N) (c_k lambda_l + c_l lambda_k) + (eta^2 / N) c_k c_l |x|^2 / N
  R'_km = a R_km - (eta / N) c_k nu_m
  v_k'  = (1 - eta_v kappa / N) v_k - (eta_v / N) g(lambda_k) Delta        (second layer trained)
  T' = T,   Delta = sum_k v_k g(lambda_k) - sum_m vt_m g~(nu_m) - sigma xi.

So one step needs the pair (u, |x|^2) and nothing else of x. Let L be any square
(K+M) x (K+M) matrix with L L^T = Sigma. Then A = sqrt(N) L B for some B with K+M
orthonormal rows (B = L^{-1} A / sqrt(N) when Sigma is invertible; when it is singular such
a B still exists as long as N >= K+M: complete the rows spanning A's row space with
orthonormal vectors orthogonal to it). Split x = B^T z + x_perp with z = B x: by rotation
invariance of N(0, I_N), z ~ N(0, I_{K+M}) and |x_perp|^2 ~ chi^2 with N - K - M degrees of
freedom, independent of z. Hence, exactly,

  u = L z,   |x|^2 = |z|^2 + chi^2_{N-K-M}.

(For invertible Sigma, |z|^2 = u^T Sigma^{-1} u: the projection of x on the span of the
weights.) No inverse, no rank decision on the span: a singular Sigma (students initialised
at zero, two identical student units, ...) only makes some columns of L zero. L is the
Cholesky factor computed column by column in float64; a pivot that is not positive beyond
rounding (<= 1e-13 of the largest diagonal entry) marks a direction that the weights do not
span, and its column is set to zero, which is exact for a positive semi-definite Sigma.
Because (Q, R, v) is a Markov chain, the chain and the full simulation give the same
distribution of every observable at every time (tests/test_chain.py checks this).

The generalisation error is exactly the Gaussian formula of (Q, R, T, v) (docs/equations.md, section 2),
so the chain's ``test_error`` is that value (there is no test set) and equals its
``overlap_error``.

Randomness: step i of a seed draws from ``fold_in(train_key, i)`` (the same per-step keys as
the full simulation, see harness.sim.simulation), split into the keys of z, of the chi-square
variable (2 Gamma((N-K-M)/2), sampled exactly by JAX's rejection sampler) and of the label
noise xi. The chain always runs in float64: its increments are O(1/N) of the order
parameters and would drown in float32 rounding at large N. Initial conditions are those the
full simulation draws (simulation.draw_initial_weights), so a seed starts from the same
(Q, R, T, v) in both engines and in the paired theory.

Supported: data.kind = "gaussian", sgd.optimizer = "sgd" (with or without weight decay), any
activations, label noise, trained or fixed second layer, input_dim > K + M. Momentum and Adam
carry state that is not a function of the order parameters, so they have no such chain.
"""

from __future__ import annotations

import math
from typing import Any, NamedTuple

import jax
import jax.numpy as jnp
import numpy as np

from harness.core import devices, threefry
from harness.core.activations import get_activation
from harness.core.scenario import Scenario
from harness.equations import iid as iid_theory
from harness.equations.gaussian_averages import generalisation_error
from harness.sim import simulation
from harness.sim.engines import Engine, register_engine
from harness.sim.initial import initial_state

Array = jax.Array
State = simulation.State  # params {"Q": [S,K,K], "R": [S,K,M], "v": [S,K]}, opt_state (), step [S]

PIVOT_TOLERANCE = 1e-13
"""Relative size below which a Cholesky pivot of Sigma counts as zero (a direction not spanned)."""


class ChainInstance(NamedTuple):
    """What stays fixed for one seed (leading axis: seeds)."""

    T: Array  # [S, M, M]
    teacher_v: Array  # [S, M]
    train_key: Array  # [S, 2]


class Chain(NamedTuple):
    """The static settings of one scenario's chain."""

    scenario: Scenario
    K: int
    M: int
    N: int
    block_steps: int


def why_not(s: Scenario) -> str | None:
    """Why the chain cannot run ``s`` (None when it can): it is exact for plain SGD on i.i.d. inputs."""
    if s.data.kind != "gaussian":
        return f"needs data.kind = 'gaussian' (i.i.d. inputs), got data.kind = {s.data.kind!r}"
    if s.sgd.optimizer != "sgd":
        return (f"needs sgd.optimizer = 'sgd', got {s.sgd.optimizer!r} (its state is not a function of the "
                "order parameters)")
    k, m, n = s.student.hidden, s.teacher.hidden, s.data.input_dim
    if n <= k + m:
        return f"needs data.input_dim > student.hidden + teacher.hidden = {k + m}, got {n}"
    return None


def default_block_steps(scenario: Scenario) -> int:
    """Steps drawn per block: the chain's draws are small, so long blocks amortise the loop."""
    chosen = scenario.run.block_steps
    return chosen if chosen > 0 else 256


def make_simulator(scenario: Scenario) -> Chain:
    return Chain(
        scenario=scenario,
        K=scenario.student.hidden,
        M=scenario.teacher.hidden,
        N=scenario.data.input_dim,
        block_steps=default_block_steps(scenario),
    )


def init_ensemble(chain: Chain, seed_indices: np.ndarray | None = None) -> tuple[ChainInstance, State]:
    """Every seed's initial (Q, R, T, v), exactly those of the full simulation's draws, in float64."""

    s = chain.scenario
    if seed_indices is None:
        seed_indices = np.arange(s.run.seeds)
    start = initial_state(simulation.make_simulator(s), seed_indices)
    ops = start.order_parameters
    f64 = lambda x: jnp.asarray(x, jnp.float64)  # noqa: E731
    keys = simulation.seed_keys(s, seed_indices)
    train_key = jax.vmap(lambda key: simulation.split_seed_key(s, key)["train"])(keys)
    instance = ChainInstance(f64(ops.T), f64(start.teacher_v), train_key)
    params = {"Q": f64(ops.Q), "R": f64(ops.R), "v": f64(ops.v)}
    state = State(params, (), jnp.zeros(len(seed_indices), jnp.int64))
    return devices.place_on_devices((instance, state), len(seed_indices))


# ------------------------------------------------------------------------------ step


def psd_cholesky(sigma: Array) -> Array:
    """A lower-triangular L with L L^T = sigma for a symmetric positive semi-definite sigma.

    Column-by-column Cholesky; a pivot at most PIVOT_TOLERANCE times the largest diagonal
    entry is a direction the weights do not span (singular sigma) and gets a zero column.
    """
    n = sigma.shape[-1]
    scale = jnp.max(jnp.diagonal(sigma))
    rows = jnp.arange(n)
    L = jnp.zeros_like(sigma)
    for j in range(n):
        pivot = sigma[j, j] - jnp.sum(L[j, :j] ** 2)
        spanned = pivot > PIVOT_TOLERANCE * scale
        root = jnp.sqrt(jnp.where(spanned, pivot, 1.0))
        column = (sigma[:, j] - L[:, :j] @ L[j, :j]) / root
        column = jnp.where(rows > j, column, 0.0).at[j].set(root)
        L = L.at[:, j].set(jnp.where(spanned, column, 0.0))
    return L


def chi_square(key: Array, dof: int) -> Array:
    """An exact chi-square variable with ``dof`` degrees of freedom per raw key ``[..., 2]`` (float64).

    chi^2_dof = 2 Gamma(dof / 2), with Gamma(a) drawn by the rejection method of Marsaglia &
    Tsang, "A simple method for generating gamma variables", ACM TOMS 26 (2000) 363: with
    d = a - 1/3, c = 1 / sqrt(9 d), x ~ N(0, 1), U ~ U(0, 1), v = (1 + c x)^3, accept d v when
    v > 0 and log U < x^2 / 2 + d - d v + d log v; otherwise try again with fresh numbers
    (attempt j uses fold_in(key, j)). For a < 1, Gamma(a) = Gamma(a + 1) U^(1/a) (same paper).
    Acceptance is above 95% for a >= 1, so the loop rarely runs twice; it is exact, unlike
    a normal approximation of a chi-square with many degrees of freedom.
    """
    a = 0.5 * dof
    boosted = a < 1.0
    d = (a + 1.0 if boosted else a) - 1.0 / 3.0
    c = 1.0 / math.sqrt(9.0 * d)

    def attempt(j: Array) -> tuple[Array, Array]:
        normal_key, uniform_key = threefry.split_pair(threefry.fold_in(key, j))
        x = threefry.normal(normal_key, (), jnp.float64)
        u = threefry.uniform(uniform_key, (), jnp.float64)
        cx = c * x
        log_v = 3.0 * jnp.log1p(jnp.maximum(cx, -1.0 + 1e-300))
        v = jnp.exp(log_v)
        accept = (cx > -1.0) & (jnp.log(u) < 0.5 * x * x + d - d * v + d * log_v)
        return accept, d * v

    def retry(carry: tuple[Array, Array, Array]) -> tuple[Array, Array, Array]:
        j, accepted, value = carry
        ok, candidate = attempt(j)
        take = ok & ~accepted
        return j + 1, accepted | ok, jnp.where(take, candidate, value)

    batch = key.shape[:-1]
    start = (jnp.zeros(batch, jnp.uint32), jnp.zeros(batch, bool), jnp.zeros(batch, jnp.float64))
    _, _, gamma = jax.lax.while_loop(lambda carry: ~jnp.all(carry[1]), retry, start)
    if boosted:
        u = threefry.uniform(threefry.fold_in(key, jnp.uint32(2**32 - 1)), (), jnp.float64)
        gamma = gamma * u ** (1.0 / a)
    return 2.0 * gamma


def _draws(chain: Chain, train_key: Array, steps: Array) -> tuple[Array, Array, Array]:
    """z [B, K+M], chi-square [B] and label noise [B] of one seed at the given absolute steps."""
    keys = threefry.split(simulation.step_keys(train_key, steps), 3)  # [B, 3, 2]
    z = threefry.normal(keys[:, 0], (chain.K + chain.M,), jnp.float64)
    chi2 = chi_square(keys[:, 1], chain.N - chain.K - chain.M)
    xi = threefry.normal(keys[:, 2], (), jnp.float64)
    return z, chi2, xi


def _chain_step(chain: Chain):
    """One seed's exact step of (Q, R, v) (see the module docstring)."""
    s = chain.scenario
    K, N = chain.K, chain.N
    g = get_activation(s.student.activation)
    g_teacher = get_activation(s.teacher.activation).fn
    eta = s.sgd.learning_rate
    eta_v = s.sgd.second_layer_learning_rate
    kappa = s.sgd.weight_decay
    sigma_noise = s.teacher.noise_std
    trained = s.student.train_second_layer
    shrink = 1.0 - eta * kappa / N
    shrink_v = 1.0 - eta_v * kappa / N

    def step(params: dict[str, Array], T: Array, vt: Array, z: Array, chi2: Array, xi: Array, active: Array):
        Q, R, v = params["Q"], params["R"], params["v"]
        u = psd_cholesky(iid_theory.covariance(Q, R, T)) @ z
        lam, nu = u[:K], u[K:]
        x_norm2 = (z @ z + chi2) / N  # |x|^2 / N
        g_lam = g.fn(lam)
        delta = g_lam @ v - (g_teacher(nu) @ vt + sigma_noise * xi)
        c = v * g.derivative(lam) * delta
        drift = jnp.outer(c, lam)
        new = {
            "Q": shrink**2 * Q - shrink * (eta / N) * (drift + drift.T) + (eta**2 / N) * x_norm2 * jnp.outer(c, c),
            "R": shrink * R - (eta / N) * jnp.outer(c, nu),
            "v": shrink_v * v - (eta_v / N) * g_lam * delta if trained else v,
        }
        return jax.tree_util.tree_map(lambda a, b: jnp.where(active, a, b), new, params)

    return step


def make_advance(chain: Chain):
    """``advance(instance, state, target) -> state`` for all seeds, jit-compiled once.

    The structure of harness.sim.simulation.make_advance: seeds in lockstep, blocks of
    ``block_steps`` draws, the steps of a block applied one by one, seeds split across
    devices. The state's buffers are donated.
    """
    block = chain.block_steps
    seed_step = jax.vmap(_chain_step(chain), in_axes=(0, 0, 0, 0, 0, 0, None))

    def advance_shard(instance: ChainInstance, state: State, target: Array) -> State:
        start = state.step[0]
        target = jnp.asarray(target, start.dtype)
        offsets = jnp.arange(block, dtype=start.dtype)

        def body(carry: tuple[Any, Array]) -> tuple[Any, Array]:
            params, first = carry
            z, chi2, xi = jax.vmap(lambda key: _draws(chain, key, first + offsets))(instance.train_key)

            def one(i: Array, p: Any) -> Any:
                pick = lambda a: jax.lax.dynamic_index_in_dim(a, i, axis=1, keepdims=False)  # noqa: E731
                return seed_step(p, instance.T, instance.teacher_v, pick(z), pick(chi2), pick(xi), first + i < target)

            return jax.lax.fori_loop(0, block, one, params), first + block

        params, _ = jax.lax.while_loop(lambda carry: carry[1] < target, body, (state.params, start))
        return State(params, state.opt_state, jnp.full_like(state.step, jnp.maximum(start, target)))

    def advance(instance: ChainInstance, state: State, target: Array) -> State:
        return devices.split_over_seeds(advance_shard, state.step.shape[0], replicated=1)(instance, state, target)

    return jax.jit(advance, donate_argnums=(1,))


def make_observe(chain: Chain):
    """``observe(instance, state) -> simulation.Observation``; test_error is the exact eps_g of (Q, R, T, v)."""
    s = chain.scenario
    student, teacher = s.student.activation, s.teacher.activation

    def observe_one(instance: ChainInstance, state: State) -> simulation.Observation:
        Q, R, v = state.params["Q"], state.params["R"], state.params["v"]
        a = jnp.concatenate([v, -instance.teacher_v])
        eps = generalisation_error(iid_theory.covariance(Q, R, instance.T), a, chain.K, student, teacher)
        finite = jnp.all(jnp.isfinite(Q)) & jnp.all(jnp.isfinite(R)) & jnp.all(jnp.isfinite(v))
        return simulation.Observation(eps, Q, R, instance.T, v, finite)

    observe_shard = jax.vmap(observe_one)

    def observe(instance: ChainInstance, state: State) -> simulation.Observation:
        return devices.split_over_seeds(observe_shard, state.step.shape[0])(instance, state)

    return jax.jit(observe)


register_engine("chain", Engine(make_simulator, init_ensemble, make_advance, make_observe, why_not))

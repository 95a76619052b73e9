"""Order-parameter ODEs for latent-variable data, projected on the eigenbasis of Omega.

Theory docs/equations.md, section 5. For one instance (generator weights, teacher, initial student)
let Omega psi_tau = rho_tau psi_tau, w_k^tau = psi_tau . w_k and
om_m^tau = sqrt(N) psi_tau^T Phi wt_m / sqrt(D). The state is the per-eigenvalue overlaps
q_kl(tau) = w_k^tau w_l^tau and r_km(tau) = w_k^tau om_m^tau (t_mn(tau) = om_m^tau om_n^tau
stays fixed), plus v when the second layer is trained. With a weight omega_tau per
component (1/N for the exact equations, a bin's probability in the thermodynamic limit):

  Q = sum_tau omega_tau rho_tau q(tau),   R = sum_tau omega_tau r(tau),   T fixed,
  G = Sigma^{-1} H   (a (K+M) x K linear solve, Sigma = [[Q, R], [R^T, T]]),
  dr_km(tau)/dt = -eta v_k [ rho_tau sum_j r_jm(tau) G[j, k] + sum_n t_nm(tau) G[K+n, k] ]
  A_kl(tau)     = -eta v_k [ rho_tau sum_j q_jl(tau) G[j, k] + sum_n r_ln(tau) G[K+n, k] ]
  dq_kl(tau)/dt = A_kl(tau) + A_lk(tau) + eta^2 v_k v_l rho_tau J[k, l]
  dv_k/dt       = -eta_v E[g(lambda_k) Delta]                  (second layer trained only)

H, J and E[g Delta] are the section-3 Gaussian averages at the current (Q, R, T); one set of
averages serves every tau, so a right-hand side costs O(N K (K+M)) beyond them.

``theory.limit = "finite"`` solves these equations exactly, from each seed's own
projections (Omega and Phi exact or Monte Carlo, whatever the data model provides).
``theory.limit = "infinite"`` is the thermodynamic limit for the single-layer model with
i.i.d. Gaussian F and an odd feature map f: Omega ~ kappa1^2 C + kappa_*^2 I with
C = F^T F / D, whose spectrum is the Marchenko-Pastur law of aspect ratio gamma = N / D,
binned into ``theory.bins`` equal-probability bins, and t(rho) = gamma (rho - kappa_*^2) T.
It is paired with the seed through its exact Q, R, T and student norms (see
:func:`thermodynamic_spectra`).

Every solve is :mod:`harness.equations.ode_solve` (diffrax's Tsit5, in pieces that report progress)
at the scenario's rtol and atol, one solve per seed (vmapped), float64, compiled once per shape
and settings.
"""

from __future__ import annotations

import functools
import math
import warnings
from typing import Any, NamedTuple

import jax
import jax.numpy as jnp
import numpy as np

from harness.core import keys as k
from harness.core.errors import InputError
from harness.core.keys import Key
from harness.core.scenario import Scenario, ScenarioError, declare_keys, register_check
from harness.data import feature_covariance
from harness.data.latent import LATENT_KINDS
from harness.equations import iid as iid_theory
from harness.equations.ode_solve import (
    PIECE_COMPILER_OPTIONS,
    Carry,
    integrate_piece,
    one_seed_at_a_time,
    solve_in_pieces,
    start_carry,
)
from harness.equations.sources import InitialState, Prediction, register_builtin_theory, values_from_order_parameters

Array = jax.Array

SINGULAR_RELATIVE_EIGENVALUE = 1e-12
"""Sigma counts as singular when its smallest eigenvalue is below this times its largest."""

MP_GRID_POINTS = 100_001
"""Grid points of the Marchenko-Pastur integrals (angle substitution; smooth integrand)."""


class Spectrum(NamedTuple):
    """The fixed inputs of one seed's projected equations (leading seed axis when stacked)."""

    rho: np.ndarray  # [B] eigenvalues of Omega (or bin representatives)
    weight: np.ndarray  # [B] 1/N, or the bins' probabilities; sum_tau weight = 1
    t: np.ndarray  # [B, M, M] t_mn(tau)
    q0: np.ndarray  # [B, K, K] initial q(tau)
    r0: np.ndarray  # [B, K, M] initial r(tau)


# ------------------------------------------------------------------ right-hand side


def aggregate(rho: Array, weight: Array, q: Array, r: Array) -> tuple[Array, Array]:
    """Q = sum_tau weight rho q(tau), R = sum_tau weight r(tau) (docs/equations.md, section 5)."""
    return jnp.einsum("t,tkl->kl", weight * rho, q), jnp.einsum("t,tkm->km", weight, r)


def projected_vector_field(
    dyn: iid_theory.Dynamics,
    q: Array,
    r: Array,
    v: Array,
    Q: Array,
    R: Array,
    T: Array,
    rho: Array,
    t: Array,
    teacher_v: Array,
) -> tuple[Array, Array, Array]:
    """d(q, r, v)/dt of docs/equations.md, section 5 for one seed, given its current (Q, R) = aggregate(q, r)."""
    K = dyn.K
    eta = dyn.learning_rate
    a = jnp.concatenate([v, -teacher_v])
    sigma = iid_theory.covariance(Q, R, T)
    h, j, g_delta = iid_theory.error_signal_moments(dyn, sigma, a)
    # G = Sigma^{-1} H through a solve (docs/equations.md, section 5); a singular Sigma is caught before the solve
    G = jnp.linalg.solve(sigma, h)  # [K+M, K]
    G_student, G_teacher = G[:K], G[K:]  # [K(j), K(k)], [M(n), K(k)]
    # dr[tau,k,m] = -eta v_k (rho_tau sum_j G_s[j,k] r[tau,j,m] + sum_n G_t[n,k] t[tau,n,m])
    dr = -eta * v[None, :, None] * (
        rho[:, None, None] * jnp.einsum("jk,tjm->tkm", G_student, r) + jnp.einsum("nk,tnm->tkm", G_teacher, t)
    )
    # A[tau,k,l] = -eta v_k (rho_tau sum_j G_s[j,k] q[tau,j,l] + sum_n G_t[n,k] r[tau,l,n])
    A = -eta * v[None, :, None] * (
        rho[:, None, None] * jnp.einsum("jk,tjl->tkl", G_student, q) + jnp.einsum("nk,tln->tkl", G_teacher, r)
    )
    dq = A + jnp.swapaxes(A, 1, 2)
    if dyn.second_order:
        dq = dq + eta**2 * rho[:, None, None] * (jnp.outer(v, v) * j)[None]
    dv = -dyn.second_layer_learning_rate * g_delta if dyn.train_second_layer else jnp.zeros_like(v)
    return dq, dr, dv


@functools.cache
def _compiled_piece(static: iid_theory.Dynamics, rtol: float, atol: float, steps: int):
    """One piece of every seed's solve, the seeds in turn, jit-compiled (once per shape and settings).

    The rates are run-time inputs (:func:`harness.equations.iid.split_rates`); the solve runs
    in pieces of ``steps`` steps (harness.equations.ode_solve.solve_in_pieces).
    """

    def one(carry: Carry, spec: Spectrum, Q0: Array, R0: Array, T: Array, vt: Array, times: Array, rates: Array):
        dyn = iid_theory.with_rates(static, rates)

        def order_parameters(q: Array, r: Array) -> tuple[Array, Array]:
            # offsets from the exact initial values, so that t = 0 returns the seed's Q0, R0
            # bit for bit (the eigen-sums agree with them only to rounding)
            dQ, dR = aggregate(spec.rho, spec.weight, q - spec.q0, r - spec.r0)
            return Q0 + dQ, R0 + dR

        def field(t: Array, y: tuple[Array, Array, Array]):
            q, r, v = y
            Q, R = order_parameters(q, r)
            return projected_vector_field(dyn, q, r, v, Q, R, T, spec.rho, spec.t, vt)

        def save(t: Array, y: tuple[Array, Array, Array]):
            q, r, v = y
            Q, R = order_parameters(q, r)
            return Q, R, v

        return integrate_piece(field, carry, times, rtol=rtol, atol=atol, steps=steps, observe=save)

    return jax.jit(one_seed_at_a_time(one, shared=2), compiler_options=PIECE_COMPILER_OPTIONS)


def solve_projected(
    dyn: iid_theory.Dynamics,
    spectra: Spectrum,
    initial: iid_theory.OrderParameters,
    teacher_v: np.ndarray,
    times: np.ndarray,
    *,
    rtol: float,
    atol: float,
    max_steps: int = 1_000_000,
) -> tuple[iid_theory.OrderParameters, np.ndarray]:
    """Integrate every seed's projected equations; ``spectra`` and ``initial`` carry a seed axis.

    Returns the order parameters ``[S, E, ...]`` (NaN for a seed whose solve failed or took
    more than ``max_steps`` steps) and the number of steps per seed. The solve runs in pieces
    of :data:`harness.equations.iid.STEPS_PER_PIECE` steps, which report progress.
    """
    f64 = lambda x: jnp.asarray(x, jnp.float64)  # noqa: E731
    static, rates = iid_theory.split_rates(dyn)
    times = np.asarray(times, np.float64)
    piece = _compiled_piece(static, float(rtol), float(atol), min(iid_theory.STEPS_PER_PIECE, int(max_steps)))
    spec = Spectrum(*(f64(x) for x in spectra))
    Q0, R0, T, vt, ts, rates = (f64(x) for x in (initial.Q, initial.R, initial.T, teacher_v, times, rates))
    seeds = int(np.shape(initial.Q)[0])
    # on the device, as the pieces return it: the first piece and the rest are one compiled program
    start = start_carry(np.full(seeds, times[0]), (spectra.q0, spectra.r0, initial.v), np.full(seeds, times[-1]))
    carry = jax.device_put(start)
    (Q, R, v), steps = solve_in_pieces(
        lambda carry: piece(carry, spec, Q0, R0, T, vt, ts, rates), carry, times, max_steps=int(max_steps)
    )
    ops = iid_theory.OrderParameters(Q, R, np.repeat(np.asarray(T)[:, None], len(times), axis=1), v)
    return ops, steps


# ---------------------------------------------------------------------------- spectra


def exact_spectrum(projection: feature_covariance.Projection) -> Spectrum:
    """One seed's exact projected inputs from its eigen-projection (docs/equations.md, section 5)."""
    w, om = projection.w_proj, projection.omega_proj  # [N, K], [N, M]
    n = w.shape[0]
    return Spectrum(
        rho=np.asarray(projection.rho, np.float64),
        weight=np.full(n, 1.0 / n),
        t=np.einsum("tm,tn->tmn", om, om),
        q0=np.einsum("tk,tl->tkl", w, w),
        r0=np.einsum("tk,tm->tkm", w, om),
    )


def exact_spectra(start: InitialState) -> Spectrum:
    """Every seed's exact projected inputs, stacked on a leading seed axis."""
    projections = start.spectrum
    if projections is None:
        raise ValueError("the finite latent theory needs start.spectrum (a latent data model provides it)")
    per_seed = []
    for s in range(len(start.seeds)):
        per_seed.append(exact_spectrum(projections[s]))  # psi [N, N] is dropped right away
    return Spectrum(*(np.stack(parts) for parts in zip(*per_seed, strict=True)))


def feature_map_coefficients(feature_map: str) -> tuple[float, float]:
    """(kappa1, kappa_*^2) = (E[z f(z)], E[f(z)^2] - E[f(z)]^2 - kappa1^2), z ~ N(0, 1).

    Read off the one-dimensional moments of :func:`harness.data.feature_covariance.single_layer_moments`
    with F = [[1]] (so u = c, Var u = 1): Omega = Var f(z), Phi = E f'(z) = E[z f(z)] (Stein).
    """
    moments = feature_covariance.single_layer_moments(np.ones((1, 1)), feature_map)
    kappa1 = float(moments.phi[0, 0])
    return kappa1, float(moments.omega[0, 0]) - kappa1**2


def marchenko_pastur_bins(gamma: float, bins: int) -> tuple[np.ndarray, np.ndarray]:
    """Eigenvalues mu and probabilities p of C = F^T F / D (F: D x N i.i.d. N(0, 1), gamma = N / D).

    Marchenko-Pastur law (Marchenko & Pastur 1967): density
    sqrt((b - mu)(mu - a)) / (2 pi gamma mu) on [a, b] = [(1 - sqrt gamma)^2, (1 + sqrt gamma)^2],
    plus an atom 1 - 1/gamma at mu = 0 when gamma > 1. The continuous part is cut into
    ``bins`` pieces of equal probability, each represented by its conditional mean; the
    atom (if any) is one more bin. The integrals use mu = m - h cos(theta), which turns
    the density into the smooth h^2 sin^2(theta) / (2 pi gamma mu(theta)) on [0, pi].
    """
    if not (gamma > 0 and math.isfinite(gamma)):
        raise ValueError(f"aspect ratio gamma must be finite and > 0, got {gamma}")
    a, b = (1 - math.sqrt(gamma)) ** 2, (1 + math.sqrt(gamma)) ** 2
    m, h = (a + b) / 2, (b - a) / 2
    theta = np.linspace(0.0, math.pi, MP_GRID_POINTS)
    cos = np.cos(theta)
    mu = m - h * cos  # = a + h (1 - cos)
    # sin^2 / mu = (1 + cos) (1 - cos) / (a + h (1 - cos)), written so that gamma = 1 (a = 0)
    # keeps its finite limit (1 + cos) / h at the lower edge instead of 0 / 0
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = np.where(mu > 0, (1.0 - cos) / mu, 1.0 / h)
    density = h**2 * (1.0 + cos) * ratio / (2 * math.pi * gamma)

    def cumulative(values: np.ndarray) -> np.ndarray:
        steps = 0.5 * (values[1:] + values[:-1]) * np.diff(theta)
        return np.concatenate([[0.0], np.cumsum(steps)])

    mass = cumulative(density)
    first = cumulative(density * mu)
    continuous = min(1.0, 1.0 / gamma)
    # the grid integral matches the exact continuous mass to ~1e-10; rescale so it is exact
    scale = continuous / mass[-1]
    mass, first = mass * scale, first * scale
    edges = np.linspace(0.0, continuous, bins + 1)
    first_at_edges = np.interp(edges, mass, first)
    probabilities = np.diff(edges)
    means = np.diff(first_at_edges) / probabilities
    if gamma > 1:
        means = np.concatenate([[0.0], means])
        probabilities = np.concatenate([[1.0 - 1.0 / gamma], probabilities])
    return means, probabilities


def thermodynamic_spectra(scenario: Scenario, start: InitialState) -> Spectrum:
    """Binned thermodynamic-limit inputs, paired with each seed (docs/equations.md, section 5).

    rho_b = kappa1^2 mu_b + kappa_*^2 over the Marchenko-Pastur bins, t_b = gamma (rho_b - kappa_*^2) T
    with the seed's exact T. Initial overlaps: for a student drawn independently of F,
    q(tau) = w^tau (w^tau)^T scatters around W = w w^T / N with no dependence on tau, and
    r(tau) = w^tau om^tau has mean zero and a variance proportional to t(tau), i.e. to mu.
    Given the seed's exact Q0 and R0 the conditional means are therefore
    q_b = W + rho_b (Q0 - E[rho] W) / E[rho^2] and r_b = R0 mu_b / E[mu], which reproduce
    Q0 = sum_b p_b rho_b q_b and R0 = sum_b p_b r_b exactly.
    """
    n, d = start.student_w.shape[-1], start.teacher_w.shape[-1]
    gamma = n / d
    kappa1, kappa_star_sq = feature_map_coefficients(scenario.data.feature_map)
    mu, p = marchenko_pastur_bins(gamma, scenario.theory.bins)
    rho = kappa1**2 * mu + kappa_star_sq
    mean_rho, mean_rho_sq, mean_mu = p @ rho, p @ rho**2, p @ mu
    ops = start.order_parameters
    per_seed = []
    for s in range(len(start.seeds)):
        w = start.student_w[s]
        W = w @ w.T / n
        q0 = W[None] + rho[:, None, None] * ((ops.Q[s] - mean_rho * W) / mean_rho_sq)[None]
        r0 = (mu / mean_mu)[:, None, None] * ops.R[s][None]
        t = gamma * kappa1**2 * mu[:, None, None] * ops.T[s][None]
        per_seed.append(Spectrum(rho, p, t, q0, r0))
    return Spectrum(*(np.stack(parts) for parts in zip(*per_seed, strict=True)))


# ------------------------------------------------------------------------- checks


def check_invertible(start: InitialState) -> None:
    """Raise :class:`InputError` when a seed's initial Sigma = [[Q, R], [R^T, T]] is singular."""
    ops = start.order_parameters
    for s, seed in enumerate(start.seeds):
        sigma = np.block([[ops.Q[s], ops.R[s]], [ops.R[s].T, ops.T[s]]])
        eigenvalues = np.linalg.eigvalsh(sigma)
        if not np.all(np.isfinite(eigenvalues)) or eigenvalues[0] <= SINGULAR_RELATIVE_EIGENVALUE * max(
            abs(eigenvalues[-1]), np.finfo(float).tiny
        ):
            raise InputError(
                f"latent theory: the covariance Sigma of (lambda, nu) is singular at t = 0 for seed {int(seed)} "
                f"(eigenvalues {eigenvalues[0]:.3g} .. {eigenvalues[-1]:.3g}); the section-4 equations need "
                "Sigma^-1: use student.init_std > 0 and teacher units with independent weights "
                "(teacher.hidden <= data.latent_dim)"
            )


def _report_failures(start: InitialState, ops: iid_theory.OrderParameters, times: np.ndarray) -> None:
    failed = ~np.all(np.isfinite(ops.Q.reshape(len(start.seeds), -1)), axis=1)
    if not failed.any():
        return
    seeds = ", ".join(str(int(seed)) for seed in start.seeds[failed])
    warnings.warn(
        f"latent theory: the solve failed for seed(s) {seeds} (Sigma became singular or the step size "
        "collapsed); their theory values are NaN",
        RuntimeWarning,
        stacklevel=3,
    )


# ------------------------------------------------------------------------ the theory


def builtin_latent(scenario: Scenario, start: InitialState, times: np.ndarray, **options: Any) -> Prediction:
    """Notes section 4, one solve per seed from its own projections (or the thermodynamic limit)."""
    dyn = iid_theory.dynamics_of(scenario, **options)
    check_invertible(start)
    if scenario.theory.limit == "infinite":
        spectra = thermodynamic_spectra(scenario, start)
    else:
        spectra = exact_spectra(start)
    ops, _ = solve_projected(
        dyn, spectra, start.order_parameters, start.teacher_v, times,
        rtol=scenario.theory.rtol, atol=scenario.theory.atol,
    )
    _report_failures(start, ops, times)
    return Prediction(values_from_order_parameters(scenario, ops, start.teacher_v), paired=True)


ODD_FEATURE_MAPS: tuple[str, ...] = ("erf", "linear", "sign", "tanh")
"""Feature maps for which the thermodynamic-limit theory holds (docs/equations.md, section 5)."""

KEYS: dict[str, Key] = {
    "limit": Key("str", "finite", "latent theory: exact finite-N equations or the thermodynamic limit",
                 k.one_of("finite", "infinite")),
    "bins": Key("int", 200, "eigenvalue bins of the thermodynamic-limit latent theory", k.at_least(2),
                only_with=("theory.limit", ("infinite",))),
}


def check_limit(s: Scenario) -> None:
    """``theory.limit = "infinite"`` needs the single-layer model with an odd feature map."""
    if s.theory.limit == "infinite" and (s.data.kind != "latent" or s.data.feature_map not in ODD_FEATURE_MAPS):
        raise ScenarioError(
            "scenario key 'theory.limit': 'infinite' needs data.kind = 'latent' with an odd feature map ("
            + ", ".join(ODD_FEATURE_MAPS)
            + f"); got data.kind = {s.data.kind!r}, data.feature_map = {s.data.feature_map!r}"
        )


declare_keys("theory", KEYS)
register_check(check_limit)
for _kind in LATENT_KINDS:
    register_builtin_theory(_kind, builtin_latent, check_start=lambda scenario, start: check_invertible(start))

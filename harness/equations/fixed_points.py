"""Fixed points of the i.i.d. order-parameter equations and their stability (docs/equations.md, section 4).

The learning curve of a two-layer network trained by online SGD is organised by the fixed
points of the order-parameter flow dy/dt = F(y) of :func:`harness.equations.iid.vector_field`:
a student started with small weights drifts to an *unspecialised* fixed point, where every
student unit has the same overlaps with the teacher (the plateau), leaves it along an
unstable direction that breaks the symmetry between student units (the escape), and converges
to a *specialised* fixed point (the asymptotic phase). This module finds both points and the
eigenvalues of the Jacobian there, and turns them into the numbers a learning curve shows.

Coordinates
-----------
The state is y = (Q [K, K], R [K, M], v [K]); T and the teacher's second layer are constants.
Q is symmetric and dQ/dt is symmetric, so the independent coordinates are the upper triangle
of Q (K (K + 1) / 2 numbers, ``Q[k,l]`` with k <= l), all of R, and v only when the second
layer is trained (otherwise v is a constant of the flow). Working in these *reduced*
coordinates matters: in the full K x K parametrisation the antisymmetric part of a
perturbation of Q is not a direction the flow can move in, and the Jacobian would carry
K (K - 1) / 2 spurious zero eigenvalues. Zero eigenvalues that remain are genuine: continuous
families of fixed points (e.g. a relu student with a trained second layer, whose rescaling
w -> c w, v -> v / c leaves the network unchanged, or linear networks with K > 1). Eigenvalues
within ``NEUTRAL_TOLERANCE`` x max|lambda| of zero are reported as *neutral* and ignored when
judging stability.

Finding the points
------------------
* Unspecialised: the student-permutation-symmetric subspace Q = q_o 11^T + (q_d - q_o) I,
  R = 1 r^T, v = v 1 is invariant under the flow whenever the student's second-layer weights are
  equal (F commutes with permuting student units). The flow restricted to it (coordinates
  (q_d, q_o, r_1..M[, v]), derivatives projected back by averaging over student units, which is
  exact on the subspace) is integrated from the scenario's small initial weights
  (q_d = init_std^2, R = 0) up to t = ``SETTLE_TIME`` / eta: integrating in the subspace rather
  than in the full space keeps rounding errors from growing along the unstable antisymmetric
  directions. The end point is polished by Newton's method on the full reduced field. For K = 1
  every state is symmetric, so there is no separate unspecialised point.
* Specialised: in the realizable case (K = M, same activation, student second layer equal to the
  teacher's or trained) the student equal to the teacher, Q = R = T and v = vt, is a fixed point
  without label noise for every learning rate; with noise Newton starts there. Otherwise the full
  flow is integrated from a generic start (a random, symmetry-breaking R of size 0.1 with
  Q = init_std^2 I + R T^-1 R^T, which keeps the covariance positive definite) for the same
  time, then polished.

Newton's method (:func:`newton`) is damped: the step solves J dx = -F in the least-squares sense
(so a Jacobian made singular by a neutral direction does not break it) and is halved until the
new point is admissible and has a smaller max|F|. F and J = ``jax.jacfwd`` of the reduced field
are one compiled function; the iteration itself runs on the host (a few dozen calls of a small
compiled function, and no second compilation of the flow's derivatives). *Admissible* means the
covariance [[Q, R], [R^T, T]] is positive semi-definite: only then are Q, R overlaps of real
weights; outside, the Gaussian-average formulas still return numbers and Newton's method finds
spurious roots there (measured: with label noise, points with Q < R^2 and negative "error"). A
point is accepted when max|F| <= ``RESIDUAL_TOLERANCE`` x max(1, max|x|) at an admissible point;
its residual is reported either way. Eigenvalues by ``numpy.linalg.eig`` of the same Jacobian.
For activations integrated by quadrature (tanh, sigmoid, relu), the Jacobian at the teacher is
not finite: the quadrature differentiates square roots of the covariance's eigenvalues, one of
which is zero when a student unit equals a teacher unit. Stability there is reported as unknown
(NaN); erf and linear use closed forms and are unaffected.

What the eigenvalues predict
----------------------------
Near a fixed point y*, a perturbation evolves as delta(t) = sum_i c_i r_i exp(lambda_i t)
(r_i right eigenvectors). The error is eps(y* + delta) = eps* + g . delta + delta^T H delta / 2
+ ..., g and H its gradient and Hessian in the reduced coordinates. Two cases:

* a mode with g . r_i != 0 is *visible at first order*: it contributes exp(lambda_i t);
* a mode with g . r_i = 0 is invisible at first order but, unless the flow and eps are both
  linear, appears at second order: delta = s r + s^2 w + ... with s ~ exp(lambda t) and
  (2 lambda - J) w = D^2F[r, r] / 2 (the quadratic correction that follows the mode), so
  eps - eps* ~ C s^2 = C exp(2 lambda t) with C = g . w + r^T H r / 2.

So eps - eps* ~ exp(kappa t) with kappa = max({Re lambda_i : visible modes} U {2 lambda_1 : C != 0}),
lambda_1 the leading eigenvalue (``error_exponent``, rule ``linear`` or ``quadratic``). This is
not "eps ~ exp(2 lambda_1 t)" in general. Example (K = M = 1, erf, T = 1, eta = 0.5): the
eigenvalues are -0.061 (a mode of R alone, invisible) and -0.322 (visible); eps decays at
2 x 0.061 = 0.123, not at 0.061 nor 0.322; at eta = 3 the visible mode is the slower one
(0.574 < 2 x 0.368) and sets the rate. For linear networks eps and F are linear, C = 0, and the
visible mode alone sets the rate: 2 eta - eta^2 for K = M = 1 (the LMS rate), although the
leading eigenvalue is -eta. The quadratic coefficient is computed for a real leading eigenvalue
(over its whole eigenspace if degenerate); a complex leading pair is assumed generic (C != 0).

* Plateau: ``plateau_error`` = eps at the unspecialised point; ``escape_rate`` = its leading
  positive eigenvalue (the rate at which the symmetry-breaking perturbation grows, so the plateau
  lasts about ln(1 / delta_0) / escape_rate); the error leaves the plateau as eps* - eps ~
  exp(kappa t) with kappa = ``error_exponent`` there (2 x escape_rate when the unstable mode
  only breaks the symmetry: eps is symmetric, so its gradient cannot see that mode).
* Asymptote: ``convergence_rate`` = -Re lambda_1 at the specialised point; ``error_decay_rate``
  = -kappa, so eps - eps_inf ~ exp(-error_decay_rate t); ``asymptotic_error`` = eps there
  (0 in the realizable noiseless case).
* Learning-rate limit: the largest eta (second-layer rate held at its scenario value) at which
  the specialised point has all non-neutral eigenvalues in the left half-plane, by bisection on
  the leading real part (halvings of a bracket found by doubling from the scenario's rate, to a
  relative width 1e-9, or 1e-6 when the point is followed by continuation). Bisection assumes one
  crossing: stable below, unstable above. Without
  label noise in the realizable case the point is the teacher at every rate, and the limit is
  where the teacher loses stability (K = M = 1 erf: pi sqrt(15) / 3; linear: 2). Otherwise the
  point is followed from the last stable rate by natural-parameter continuation (:func:`follow`);
  a rate the branch cannot be followed to counts as unstable. With label noise the branch does
  not end where the noiseless teacher loses stability: the exchange of stability between the
  teacher and the fixed point that crosses it unfolds into one smooth branch, whose weights grow
  without bound as eta approaches a larger limit (measured, K = M = 1 erf, sigma = 0.3: Q ~ 10^4 at
  eta = 6.50, against 4.06 without noise). The limit is then known only as well as the
  continuation can follow a point running off to infinity (about 1e-3 relative), and the note
  beside it says how large the order parameters had become.

The scenario's teacher is summarised by its large-N overlaps T = teacher.init_std^2 I (i.i.d.
Gaussian teacher weights) and its second layer; pass explicit ``T`` to the array-level functions
for a particular teacher.
"""

from __future__ import annotations

import functools
import math
from typing import Any, NamedTuple

import jax
import jax.numpy as jnp
import numpy as np

from harness.core.errors import InputError
from harness.core.scenario import Scenario
from harness.equations import iid as iid_theory
from harness.equations.gaussian_averages import generalisation_error
from harness.equations.ode_solve import integrate
from harness.equations.sources import warn_if_not_plain_sgd

Array = jax.Array

SETTLE_TIME = 5000.0
"""Integration time, in units of 1 / eta, before Newton polishes (t = SETTLE_TIME / eta)."""
RESIDUAL_TOLERANCE = 1e-9
"""A fixed point is accepted when max|F| in the reduced coordinates is at most this x max(1, max|x|)."""
NEUTRAL_TOLERANCE = 1e-8
"""Eigenvalues with |Re lambda| <= this x max|lambda| are neutral (continuous families)."""
VISIBILITY_TOLERANCE = 1e-7
"""A mode is visible in eps when |g . r| > this x |g| |r| (quadratic: |C| > this x its terms' size)."""
BISECTION_STEPS = 60
CONTINUATION_STEP = 0.05
"""First relative step in eta when a fixed point is followed to another learning rate."""
CONTINUATION_FAILURES = 6
"""Failed continuation steps in a row (each halving the step) after which a branch is given up."""
RUN_OFF_SIZE = 100.0
"""Order parameters this large at the limit are reported as a point running off to infinity."""
MAX_LEARNING_RATE = 1e4
"""Doubling stops here: a point stable at every rate up to it reports no limit."""
_ODE_TOLERANCES = {"rtol": 1e-10, "atol": 1e-12, "max_steps": 400_000}
SECOND_DERIVATIVE_STEP = 1e-4
"""Step of the central difference of the Jacobian used for the quadratic error coefficient."""


# --------------------------------------------------------------------------- coordinates


class Layout(NamedTuple):
    """The reduced coordinates: upper triangle of Q, R row by row, and v if trained."""

    K: int
    M: int
    trained: bool

    @property
    def size(self) -> int:
        return self.K * (self.K + 1) // 2 + self.K * self.M + (self.K if self.trained else 0)

    def names(self) -> list[str]:
        rows, cols = np.triu_indices(self.K)
        names = [f"Q[{k},{l}]" for k, l in zip(rows, cols, strict=True)]
        names += [f"R[{k},{m}]" for k in range(self.K) for m in range(self.M)]
        if self.trained:
            names += [f"v[{k}]" for k in range(self.K)]
        return names


def pack(layout: Layout, Q: Array, R: Array, v: Array) -> Array:
    """(Q, R, v) -> reduced coordinates (v dropped when the second layer is not trained)."""
    rows, cols = np.triu_indices(layout.K)
    parts = [Q[rows, cols], jnp.ravel(R)]
    if layout.trained:
        parts.append(v)
    return jnp.concatenate(parts)


def unpack(layout: Layout, x: Array, v_fixed: Array) -> tuple[Array, Array, Array]:
    """Reduced coordinates -> (Q, R, v); ``v_fixed`` is v when the second layer is not trained."""
    K, M = layout.K, layout.M
    rows, cols = np.triu_indices(K)
    n_q = len(rows)
    upper = jnp.zeros((K, K), x.dtype).at[rows, cols].set(x[:n_q])
    Q = upper + upper.T - jnp.diag(jnp.diag(upper))
    R = x[n_q : n_q + K * M].reshape(K, M)
    v = x[n_q + K * M :] if layout.trained else jnp.asarray(v_fixed, x.dtype)
    return Q, R, v


def pack_numpy(layout: Layout, Q: np.ndarray, R: np.ndarray, v: np.ndarray) -> np.ndarray:
    """:func:`pack` on the host (no JAX dispatch)."""
    rows, cols = np.triu_indices(layout.K)
    return np.concatenate([np.asarray(Q)[rows, cols], np.ravel(R)] + ([np.asarray(v)] if layout.trained else []))


def unpack_numpy(layout: Layout, x: np.ndarray, v_fixed: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """:func:`unpack` on the host (no JAX dispatch)."""
    K, M = layout.K, layout.M
    rows, cols = np.triu_indices(K)
    Q = np.zeros((K, K))
    Q[rows, cols] = x[: len(rows)]
    Q[cols, rows] = x[: len(rows)]
    R = np.asarray(x[len(rows) : len(rows) + K * M]).reshape(K, M)
    v = np.asarray(x[len(rows) + K * M :]) if layout.trained else np.asarray(v_fixed, np.float64)
    return Q, R, v


class Constants(NamedTuple):
    """The run-time inputs of the compiled functions (traced, so one compilation serves all)."""

    rates: Array  # iid_theory.RATE_FIELDS values
    T: Array  # [M, M]
    teacher_v: Array  # [M]
    student_v: Array  # [K] second layer (initial value if trained)


# --------------------------------------------------------------------------- compiled pieces


class _Compiled(NamedTuple):
    field: Any  # (x, constants) -> F(x) [P]
    flow: Any  # (x, constants) -> (F(x) [P], dF/dx [P, P])
    error: Any  # (x, constants) -> (eps, d eps/dx [P], d^2 eps/dx^2 [P, P])
    settle: Any  # (x0, constants, t_end) -> x(t_end)
    settle_symmetric: Any  # (y0, constants, t_end) -> the symmetric point reached, in reduced coordinates


@functools.cache
def _compiled(static: iid_theory.Dynamics, layout: Layout) -> _Compiled:
    """Every jitted function for one set of static settings (built once per process).

    Derivatives are forward-mode throughout (``jax.jacfwd``): the functions have few inputs, and
    forward over forward compiled in half the time of ``jax.hessian`` for the error (measured).
    """
    K, M = layout.K, layout.M

    def field(x: Array, c: Constants) -> Array:
        dyn = iid_theory.with_rates(static, c.rates)
        Q, R, v = unpack(layout, x, c.student_v)
        dQ, dR, dv = iid_theory.vector_field(dyn, (Q, R, v), c.T, c.teacher_v)
        return pack(layout, dQ, dR, dv)

    def flow(x: Array, c: Constants) -> tuple[Array, Array]:
        return field(x, c), jax.jacfwd(field)(x, c)

    def error(x: Array, c: Constants) -> Array:
        Q, R, v = unpack(layout, x, c.student_v)
        a = jnp.concatenate([v, -c.teacher_v])
        return generalisation_error(iid_theory.covariance(Q, R, c.T), a, K, static.student, static.teacher)

    def error_derivatives(x: Array, c: Constants) -> tuple[Array, Array, Array]:
        gradient = jax.jacfwd(error)
        return error(x, c), gradient(x, c), jax.jacfwd(gradient)(x, c)

    def settle(x0: Array, c: Constants, t_end: Array) -> Array:
        ts = jnp.stack([jnp.zeros_like(t_end), t_end])
        xs, _ = integrate(lambda t, x: field(x, c), x0, ts, **_ODE_TOLERANCES)
        return xs[-1]

    def embed(y: Array, c: Constants) -> Array:
        q_d, q_o, r = y[0], y[1], y[2 : 2 + M]
        Q = q_o * jnp.ones((K, K)) + (q_d - q_o) * jnp.eye(K)
        R = jnp.ones((K, 1)) * r[None, :]
        v = y[2 + M] * jnp.ones(K) if layout.trained else c.student_v
        return pack(layout, Q, R, v)

    def symmetric_field(y: Array, c: Constants) -> Array:
        Q, R, v = unpack(layout, field(embed(y, c), c), c.student_v)
        diagonal = jnp.trace(Q) / K
        off_diagonal = (jnp.sum(Q) - jnp.trace(Q)) / (K * (K - 1))
        parts = [jnp.stack([diagonal, off_diagonal]), jnp.mean(R, axis=0)]
        if layout.trained:
            parts.append(jnp.mean(v)[None])
        return jnp.concatenate(parts)

    def settle_symmetric(y0: Array, c: Constants, t_end: Array) -> Array:
        ts = jnp.stack([jnp.zeros_like(t_end), t_end])
        ys, _ = integrate(lambda t, y: symmetric_field(y, c), y0, ts, **_ODE_TOLERANCES)
        return embed(ys[-1], c)

    return _Compiled(
        jax.jit(field), jax.jit(flow), jax.jit(error_derivatives), jax.jit(settle), jax.jit(settle_symmetric)
    )


# --------------------------------------------------------------------------- analysis


class Problem(NamedTuple):
    """One order-parameter flow: static settings, layout and constants."""

    static: iid_theory.Dynamics
    layout: Layout
    constants: Constants

    @property
    def compiled(self) -> _Compiled:
        return _compiled(self.static, self.layout)

    def with_learning_rate(self, eta: float) -> Problem:
        rates = np.array(self.constants.rates, np.float64)
        rates[iid_theory.RATE_FIELDS.index("learning_rate")] = eta
        return self._replace(constants=self.constants._replace(rates=jnp.asarray(rates)))

    @property
    def learning_rate(self) -> float:
        return float(self.constants.rates[iid_theory.RATE_FIELDS.index("learning_rate")])


def problem_of(
    dyn: iid_theory.Dynamics, T: np.ndarray, teacher_v: np.ndarray, student_v: np.ndarray
) -> Problem:
    """The flow of ``dyn`` for a teacher with overlaps ``T`` [M, M] and second layer ``teacher_v``."""
    T = np.asarray(T, np.float64)
    static, rates = iid_theory.split_rates(dyn)
    layout = Layout(dyn.K, T.shape[0], dyn.train_second_layer)
    f64 = lambda a: jnp.asarray(a, jnp.float64)  # noqa: E731
    return Problem(static, layout, Constants(f64(rates), f64(T), f64(teacher_v), f64(student_v)))


class ErrorExponent(NamedTuple):
    exponent: float  # eps - eps* ~ exp(exponent t) near the point (NaN: no mode reaches eps)
    rule: str  # "linear", "quadratic" or "none"


class FixedPoint(NamedTuple):
    """A fixed point, its stability, and what it predicts for the error."""

    x: np.ndarray  # reduced coordinates
    Q: np.ndarray
    R: np.ndarray
    v: np.ndarray
    residual: float  # max |F(x)|
    converged: bool  # Newton succeeded and residual <= RESIDUAL_TOLERANCE
    error: float  # eps at the point
    eigenvalues: np.ndarray  # complex, sorted by decreasing real part
    neutral: int  # eigenvalues counted as zero (continuous families)
    leading: float  # largest real part among non-neutral eigenvalues
    error_exponent: ErrorExponent

    @property
    def stable(self) -> bool:
        return bool(self.converged and self.leading < 0)


def _neutral_mask(eigenvalues: np.ndarray) -> np.ndarray:
    scale = np.max(np.abs(eigenvalues)) if eigenvalues.size else 0.0
    return np.abs(eigenvalues.real) <= NEUTRAL_TOLERANCE * scale


def leading_real_part(eigenvalues: np.ndarray) -> float:
    """Largest real part among the non-neutral eigenvalues (NaN if any eigenvalue is not finite)."""
    if not np.all(np.isfinite(eigenvalues)):
        return math.nan
    active = eigenvalues[~_neutral_mask(eigenvalues)]
    return float(np.max(active.real)) if active.size else 0.0


def newton(problem: Problem, x0: np.ndarray, max_steps: int = 10) -> tuple[np.ndarray, bool]:
    """Damped Newton's method on F(x) = 0; returns the point and whether it is an accepted fixed point.

    Step: the least-squares solution of J dx = -F (the minimum-norm step when J is singular along
    neutral directions), halved until the new point is admissible (:func:`is_admissible`) and
    max|F| decreases (at most 6 halvings). Stops at rounding level, when the step no longer changes
    x, when no halving helps, or after ``max_steps`` steps (Newton converges in a few steps from a
    settled flow or a continuation guess; one that has not by then is failing). Accepted: max|F|
    <= RESIDUAL_TOLERANCE x max(1, max|x|) at an admissible point (F grows with the order
    parameters, and so does its rounding error).
    """
    compiled, c = problem.compiled, problem.constants
    x = np.asarray(x0, np.float64)
    value, jacobian = (np.asarray(a) for a in compiled.flow(jnp.asarray(x), c))
    for _ in range(max_steps):
        residual = np.max(np.abs(value))
        if not (np.isfinite(residual) and np.all(np.isfinite(jacobian))):
            return x, False
        if residual <= 1e-4 * RESIDUAL_TOLERANCE * _scale(x):  # at rounding level
            break
        step = np.linalg.lstsq(jacobian, -value, rcond=None)[0]
        for _halving in range(6):
            trial = x + step
            if is_admissible(problem, trial):
                trial_value = np.asarray(compiled.field(jnp.asarray(trial), c))
                if np.all(np.isfinite(trial_value)) and np.max(np.abs(trial_value)) < residual:
                    break
            step = 0.5 * step
        else:
            break
        x = trial
        value, jacobian = (np.asarray(a) for a in compiled.flow(jnp.asarray(x), c))
        if np.max(np.abs(step)) <= 1e-14 * _scale(x):
            break
    return x, bool(np.max(np.abs(value)) <= RESIDUAL_TOLERANCE * _scale(x) and is_admissible(problem, x))


def _scale(x: np.ndarray) -> float:
    return max(1.0, float(np.max(np.abs(x))))


def is_admissible(problem: Problem, x: np.ndarray) -> bool:
    """Is the covariance [[Q, R], [R^T, T]] positive semi-definite (up to rounding)?

    Only such states are overlaps of real weight vectors; outside, the Gaussian-average formulas
    still return numbers, and Newton's method can find spurious roots there.
    """
    K, M = problem.layout.K, problem.layout.M
    rows, cols = np.triu_indices(K)
    sigma = np.empty((K + M, K + M))
    sigma[rows, cols] = sigma[cols, rows] = x[: len(rows)]
    sigma[:K, K:] = np.reshape(x[len(rows) : len(rows) + K * M], (K, M))
    sigma[K:, :K] = sigma[:K, K:].T
    sigma[K:, K:] = problem.constants.T
    eigenvalues = np.linalg.eigvalsh(sigma)
    return bool(np.all(np.isfinite(eigenvalues)) and eigenvalues[0] >= -1e-12 * max(1.0, eigenvalues[-1]))


def error_exponent(problem: Problem, x: np.ndarray, jacobian: np.ndarray) -> ErrorExponent:
    """kappa with eps - eps* ~ exp(kappa t) near the fixed point ``x`` (module docstring)."""
    _, gradient, hessian = (np.asarray(a) for a in problem.compiled.error(jnp.asarray(x), problem.constants))
    if not (np.all(np.isfinite(jacobian)) and np.all(np.isfinite(gradient)) and np.all(np.isfinite(hessian))):
        return ErrorExponent(math.nan, "none")
    eigenvalues, right = np.linalg.eig(jacobian)
    right = right / np.linalg.norm(right, axis=0, keepdims=True)
    active = ~_neutral_mask(eigenvalues)
    visible = active & (np.abs(gradient @ right) > VISIBILITY_TOLERANCE * np.linalg.norm(gradient))
    candidates: list[tuple[float, str]] = [(float(lam.real), "linear") for lam in eigenvalues[visible]]
    if active.any():
        lead = np.max(eigenvalues.real[active])
        near = np.abs(eigenvalues - lead) <= 1e-6 * np.max(np.abs(eigenvalues))
        lead_set = np.flatnonzero(active & near)
        if not np.any(visible[lead_set]):
            if np.all(eigenvalues[lead_set].imag == 0.0):
                modes = right[:, lead_set].real
                quadratic = _quadratic_coefficient_is_nonzero(
                    problem, x, jacobian, float(lead), modes, gradient, hessian
                )
            else:  # a complex pair: assumed generic (module docstring)
                quadratic = True
            if quadratic:
                candidates.append((2.0 * float(lead), "quadratic"))
    if not candidates:
        return ErrorExponent(math.nan, "none")
    exponent, rule = max(candidates)
    return ErrorExponent(exponent, rule)


def _quadratic_coefficient_is_nonzero(
    problem: Problem, x: np.ndarray, jacobian: np.ndarray, lam: float, modes: np.ndarray,
    gradient: np.ndarray, hessian: np.ndarray,
) -> bool:
    """Is C_ij = g . w_ij + r_i^T H r_j / 2, (2 lam - J) w_ij = D^2F[r_i, r_j] / 2, nonzero for some i, j?

    D^2F[a, b] is the central difference (J(x + h b) - J(x - h b)) a / (2 h) of the automatic-
    differentiation Jacobian, h = SECOND_DERIVATIVE_STEP (|b| = 1): error O(h^2) ~ 1e-8 relative,
    ample for telling zero from not zero, and no second compilation of the flow's derivatives.
    It is exactly zero for a linear flow, whose Jacobian does not depend on x.
    """
    flow, c = problem.compiled.flow, problem.constants
    shifted = 2.0 * lam * np.eye(len(x)) - jacobian
    h = SECOND_DERIVATIVE_STEP
    for j in range(modes.shape[1]):
        b = modes[:, j]
        plus, minus = (np.asarray(flow(jnp.asarray(x + sign * h * b), c)[1]) for sign in (1.0, -1.0))
        for i in range(j + 1):
            a = modes[:, i]
            source = 0.5 * (plus - minus) @ a / (2.0 * h)
            w = np.linalg.lstsq(shifted, source, rcond=None)[0]
            coefficient = gradient @ w + 0.5 * a @ hessian @ b
            size = np.linalg.norm(gradient) * np.linalg.norm(w) + np.linalg.norm(hessian)
            if np.isfinite(coefficient) and abs(coefficient) > VISIBILITY_TOLERANCE * size:
                return True
    return False


def analyse(problem: Problem, x: np.ndarray, *, error_exponent_too: bool = True, exact: bool = False) -> FixedPoint:
    """Polish ``x`` by Newton's method and describe the fixed point found.

    ``error_exponent_too=False`` skips the error's derivatives (NaN exponent), for callers that
    only need stability. ``exact=True`` declares ``x`` a fixed point by construction (the teacher
    without label noise): no Newton step, and its residual is only the Gaussian averages' error.
    """
    x1, converged = (np.asarray(x, np.float64), True) if exact else newton(problem, x)
    value, jacobian = (np.asarray(a) for a in problem.compiled.flow(jnp.asarray(x1), problem.constants))
    exponent, error = ErrorExponent(math.nan, "none"), math.nan
    if error_exponent_too:
        error = float(problem.compiled.error(jnp.asarray(x1), problem.constants)[0])
    if np.all(np.isfinite(jacobian)):
        eigenvalues = np.linalg.eigvals(jacobian)
        eigenvalues = eigenvalues[np.argsort(-eigenvalues.real, kind="stable")]
        neutral = int(np.sum(_neutral_mask(eigenvalues)))
        if error_exponent_too:
            exponent = error_exponent(problem, x1, jacobian)
    else:
        eigenvalues, neutral = np.full(len(x1), np.nan + 0j), 0
    Q, R, v = unpack_numpy(problem.layout, x1, np.asarray(problem.constants.student_v))
    return FixedPoint(
        x1, Q, R, v, float(np.max(np.abs(value))), converged, error, eigenvalues, neutral,
        leading_real_part(eigenvalues), exponent,
    )


def _settle_time(problem: Problem) -> jax.Array:
    return jnp.asarray(SETTLE_TIME / problem.learning_rate, jnp.float64)


def unspecialised_point(problem: Problem, initial_q: float) -> FixedPoint | str:
    """The symmetric fixed point reached from small weights, or the reason there is none."""
    layout, c = problem.layout, problem.constants
    if layout.K == 1:
        return "K = 1: every state is symmetric across student units, so no unspecialised point stands apart"
    student_v = np.asarray(c.student_v)
    if not layout.trained and not np.allclose(student_v, student_v[0]):
        return "the student's fixed second layer is not uniform, so the symmetric subspace is not invariant"
    y0 = [max(initial_q, 1e-4), 0.0] + [0.0] * layout.M + ([float(np.mean(student_v))] if layout.trained else [])
    x = np.asarray(problem.compiled.settle_symmetric(jnp.asarray(y0, jnp.float64), c, _settle_time(problem)))
    if not np.all(np.isfinite(x)):
        return "the flow restricted to the symmetric subspace did not settle (the solve failed or diverged)"
    return analyse(problem, x)


def is_realizable(problem: Problem) -> bool:
    """K = M, same activations, and a student second layer equal to the teacher's or trained."""
    static, layout, c = problem.static, problem.layout, problem.constants
    if layout.K != layout.M or static.student != static.teacher:
        return False
    return layout.trained or np.allclose(np.asarray(c.student_v), np.asarray(c.teacher_v))


def specialised_start(problem: Problem, initial_q: float, seed: int = 0) -> np.ndarray:
    """Where the search for the specialised point starts (module docstring)."""
    layout, c = problem.layout, problem.constants
    T = np.asarray(c.T)
    if is_realizable(problem):
        return pack_numpy(layout, T, T, np.asarray(c.teacher_v))
    rng = np.random.default_rng(seed)
    R = 0.1 * rng.standard_normal((layout.K, layout.M))
    Q = max(initial_q, 1e-4) * np.eye(layout.K) + R @ np.linalg.solve(T, R.T)
    x0 = jnp.asarray(pack_numpy(layout, Q, R, np.asarray(c.student_v)))
    return np.asarray(problem.compiled.settle(x0, c, _settle_time(problem)))


def specialised_point(problem: Problem, initial_q: float, seed: int = 0) -> FixedPoint | str:
    x = specialised_start(problem, initial_q, seed)
    if not np.all(np.isfinite(x)):
        return "the flow from a generic start did not settle (the solve failed or diverged)"
    noise = float(problem.constants.rates[iid_theory.RATE_FIELDS.index("noise_std")])
    return analyse(problem, x, exact=is_realizable(problem) and noise == 0.0)


class RateLimit(NamedTuple):
    value: float  # NaN: none found (see note); inf: stable up to MAX_LEARNING_RATE
    bracket: tuple[float, float]  # stable, unstable learning rates enclosing it
    note: str


def follow(problem: Problem, start: np.ndarray, eta_to: float) -> FixedPoint | None:
    """Continue the fixed point ``start`` (at the problem's learning rate) to ``eta_to``.

    Natural-parameter continuation with a secant predictor: Newton at each new rate starts from
    the straight-line extrapolation of the last two points (the last point alone at first, or when
    the extrapolation is not admissible). The step in eta starts at CONTINUATION_STEP x eta, grows
    by half after a success and is halved after a failure. None after CONTINUATION_FAILURES
    halvings in a row, or once the step is below 1e-6 x eta: the branch ends there (a fold, or the
    point runs off to infinity, as it does with label noise at the limit).
    """
    eta, x = problem.learning_rate, np.asarray(start)
    previous: tuple[float, np.ndarray] | None = None
    point = None
    step, failures = CONTINUATION_STEP * eta, 0
    while eta != eta_to:
        step = min(step, abs(eta_to - eta))
        trial = eta_to if step == abs(eta_to - eta) else eta + math.copysign(step, eta_to - eta)
        guess = x
        if previous is not None:
            extrapolated = x + (x - previous[1]) * (trial - eta) / (eta - previous[0])
            guess = extrapolated if is_admissible(problem, extrapolated) else x
        found = analyse(problem.with_learning_rate(trial), guess, error_exponent_too=False)
        if found.converged:
            previous = (eta, x)
            eta, x, point, failures = trial, found.x, found, 0
            step *= 1.5
        else:
            step, failures = 0.5 * step, failures + 1
            if failures >= CONTINUATION_FAILURES or step < 1e-6 * eta:
                return None
    return point if point is not None else analyse(problem, x, error_exponent_too=False)


def learning_rate_limit(problem: Problem, start: np.ndarray) -> RateLimit:
    """Largest eta with a stable specialised point, by bisection (module docstring).

    ``start`` is the specialised point at the problem's own learning rate. In the realizable
    noiseless case the point is the teacher at every rate; otherwise it is followed from the last
    stable rate by :func:`follow`.
    """
    noise = float(problem.constants.rates[iid_theory.RATE_FIELDS.index("noise_std")])
    teacher_is_the_point = is_realizable(problem) and noise == 0.0
    eta0 = problem.learning_rate

    def stable_point(eta: float, from_eta: float, from_x: np.ndarray) -> FixedPoint | None:
        if teacher_is_the_point:
            p = problem.with_learning_rate(eta)
            point = analyse(p, specialised_start(p, 0.0), error_exponent_too=False, exact=True)
        else:
            point = follow(problem.with_learning_rate(from_eta), from_x, eta)
        return point if point is not None and point.stable else None

    lo, guess = eta0, np.asarray(start)
    first = analyse(problem, guess, error_exponent_too=False, exact=teacher_is_the_point)
    if not np.all(np.isfinite(first.eigenvalues)):
        return RateLimit(math.nan, (math.nan, math.nan), "the Jacobian at the specialised point is not finite "
                         "(quadrature activations at the teacher: see the module docstring)")
    found = stable_point(lo, eta0, guess)
    if found is None:  # unstable at the scenario's rate: halve until stable
        hi = lo
        while found is None:
            hi, lo = lo, lo / 2.0
            if lo < 1e-6 * eta0:
                return RateLimit(math.nan, (math.nan, hi), "the specialised point is unstable at every rate tried")
            found = stable_point(lo, eta0, guess)
        guess = found.x
    else:  # stable: double until unstable
        guess = found.x
        while True:
            hi = 2.0 * lo
            if hi > MAX_LEARNING_RATE:
                return RateLimit(math.inf, (lo, math.nan), f"stable at every rate up to {MAX_LEARNING_RATE:g}")
            found = stable_point(hi, lo, guess)
            if found is None:
                break
            lo, guess = hi, found.x
    # a branch running off to infinity is followed only to about 1e-3 (module docstring)
    width = 1e-9 if teacher_is_the_point else 1e-6
    for _ in range(BISECTION_STEPS):
        if hi - lo <= width * hi:
            break
        mid = 0.5 * (lo + hi)
        found = stable_point(mid, lo, guess)
        if found is None:
            hi = mid
        else:
            lo, guess = mid, found.x
    note = "bisection on the leading real part of the eigenvalues"
    if not teacher_is_the_point:
        size = _scale(guess)
        note += f"; the point, followed by continuation, has largest order parameter {size:.3g} at the last stable rate"
        if size > RUN_OFF_SIZE:
            note += " (it runs off to infinity there; the limit is known to about 1e-3)"
    return RateLimit(0.5 * (lo + hi), (lo, hi), note)


# --------------------------------------------------------------------------- a scenario


def scenario_problem(scenario: Scenario) -> tuple[Problem, float]:
    """The flow of a resolved scenario (T = teacher.init_std^2 I) and the student's initial q = init_std^2."""
    kind = scenario.data.kind
    if kind != "gaussian":
        raise InputError(
            f"scenario key 'data.kind' = {kind!r}: fixed points are computed from the i.i.d. theory "
            "(docs/equations.md, section 4) only; allowed: 'gaussian'"
        )
    warn_if_not_plain_sgd(scenario, "the fixed points of the built-in theory")
    dyn = iid_theory.dynamics_of(scenario)
    M = scenario.teacher.hidden
    T = scenario.teacher.init_std ** 2 * np.eye(M)
    problem = problem_of(dyn, T, np.asarray(scenario.teacher.second_layer),
                         np.asarray(scenario.student.second_layer))
    return problem, scenario.student.init_std ** 2


def _number(value: float) -> float | None:
    """JSON has no NaN or infinity: they become null (their meaning is in the notes beside them)."""
    return float(value) if math.isfinite(value) else None


def _numbers(values: np.ndarray) -> list:
    return [_number(float(a)) if np.ndim(a) == 0 else _numbers(a) for a in np.asarray(values, np.float64)]


def describe_point(point: FixedPoint | str) -> dict[str, Any]:
    """A fixed point as a JSON-ready dict (non-finite numbers as None)."""
    if isinstance(point, str):
        return {"found": False, "reason": point}
    return {
        "found": point.converged,
        "residual": _number(point.residual),
        "Q": _numbers(point.Q), "R": _numbers(point.R), "v": _numbers(point.v),
        "error": _number(point.error),
        "eigenvalues": {"real": _numbers(point.eigenvalues.real), "imag": _numbers(point.eigenvalues.imag)},
        "neutral_eigenvalues": point.neutral,
        "leading_eigenvalue": _number(point.leading),
        "stable": point.stable,
        "error_exponent": _number(point.error_exponent.exponent),
        "error_exponent_rule": point.error_exponent.rule,
    }


def fixed_points(scenario: Scenario) -> dict[str, Any]:
    """Both fixed points of a scenario's flow and what they predict, as a JSON-ready dict."""
    problem, initial_q = scenario_problem(scenario)
    symmetric = unspecialised_point(problem, initial_q)
    specialised = specialised_point(problem, initial_q, seed=scenario.run.seed)
    c = problem.constants
    predictions: dict[str, Any] = {
        "plateau_error": None, "escape_rate": None, "plateau_error_exponent": None,
        "asymptotic_error": None, "convergence_rate": None, "error_decay_rate": None, "error_decay_rule": None,
        "learning_rate_limit": None, "learning_rate_limit_bracket": [None, None], "learning_rate_limit_note": None,
    }
    if isinstance(symmetric, FixedPoint) and symmetric.converged:
        predictions["plateau_error"] = _number(symmetric.error)
        if symmetric.leading > 0:
            predictions["escape_rate"] = _number(symmetric.leading)
            predictions["plateau_error_exponent"] = _number(symmetric.error_exponent.exponent)
    if isinstance(specialised, FixedPoint) and specialised.converged:
        predictions["asymptotic_error"] = _number(specialised.error)
        if specialised.stable:
            predictions["convergence_rate"] = _number(-specialised.leading)
            predictions["error_decay_rate"] = _number(-specialised.error_exponent.exponent)
            predictions["error_decay_rule"] = specialised.error_exponent.rule
        limit = learning_rate_limit(problem, specialised.x)
        predictions["learning_rate_limit"] = _number(limit.value)
        predictions["learning_rate_limit_bracket"] = [_number(b) for b in limit.bracket]
        predictions["learning_rate_limit_note"] = limit.note
    dyn = iid_theory.dynamics_of(scenario)
    return {
        "theory": "i.i.d. Gaussian inputs, order-parameter equations of docs/equations.md, section 4",
        "K": problem.layout.K, "M": problem.layout.M, "student": dyn.student, "teacher": dyn.teacher,
        "learning_rate": dyn.learning_rate, "second_layer_learning_rate": dyn.second_layer_learning_rate,
        "train_second_layer": dyn.train_second_layer, "noise_std": dyn.noise_std,
        "teacher_overlaps": _numbers(c.T), "teacher_second_layer": _numbers(c.teacher_v),
        "student_second_layer": _numbers(c.student_v),
        "coordinates": problem.layout.names(),
        "unspecialised": describe_point(symmetric),
        "specialised": describe_point(specialised),
        "predictions": predictions,
    }

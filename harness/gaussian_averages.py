"""Gaussian averages I2, I3, I4 (and the noise average J0) of theory notes, section 2.

For u = (lambda_1..K, nu_1..M) ~ N(0, cov), P = K + M, g_a the student activation for
a < K and the teacher activation for a >= K, and g' always the student derivative:

    I2[a, b]       = E[g_a(u_a) g_b(u_b)]
    I3[k, b, c]    = E[g'(lambda_k) u_b g_c(u_c)]
    I4[k, l, c, d] = E[g'(lambda_k) g'(lambda_l) g_c(u_c) g_d(u_d)]
    J0[k, l]       = E[g'(lambda_k) g'(lambda_l)]

Routes
------
* student == teacher == "erf": the closed forms of Saad & Solla 1995 (notes, section 2),
  evaluated by broadcasting over all index tuples at once; J0 = (2/pi) / sqrt((1+C11)(1+C22) - C12^2).
* student == teacher == "linear": I2 = C12, I3 = C23, I4 = C34, J0 = 1.
* anything else: product quadrature over the at most four *distinct* variables of each
  average. Repeated indices (k = l, c = d, b = c, ...) merge into one variable, so such
  averages are lower-dimensional integrals; averages that coincide (I4 is symmetric in
  (k, l) and in (c, d)) are computed once. Linear factors are folded into the variable
  they multiply, and a purely polynomial innermost variable (u_b in I3, a linear teacher)
  is integrated exactly through its conditional mean and variance.

Quadrature scheme
-----------------
The covariance is factored once, cov = A A^T with A = V sqrt(max(w, 0)) from a symmetric
eigen-decomposition (singular covariances are common: a student at Q = 0, a student unit
equal to a teacher unit). The rows A_S of each average's variables are brought to lower
triangular form by a QR decomposition, A_S = L_S Q_S, so u_S = L_S z with z ~ N(0, I) and
the integral is nested: variable j sees the outer nodes only through its conditional
mean m_j = sum_{i<j} L_ji z_i and its own conditional scale s_j = L_jj.

The one-dimensional rule per level is NOT Gauss-Hermite, by measurement (when this was
written, scipy.integrate.quad as reference): for E[g'(u)^2] with g = tanh and Var u = 5,
Gauss-Hermite with 64 nodes is off by 2e-3 (1e-2 for E[g'^2 g^2]); its nodes spread to
|z| ~ 16 where the Gaussian weight is 1e-56, while the integrand changes on the scale
1/sqrt(Var u) near z = 0 (tanh has poles at +-i pi/2). The equally spaced rule with
Gaussian weights on [-z_max, z_max] (the trapezoidal rule, exponentially convergent for
integrands analytic in a strip) reaches 1e-8 there with 48 nodes and is as good or
better than Gauss-Hermite in every smooth case we measured except sigmoid at unit
variance, where both are below 1e-8. Smooth levels (erf, tanh, sigmoid, linear) use it.
Levels whose function has a kink or jump at 0 (relu and its step derivative) use
Gauss-Legendre pieces split at the kink z = -m_j / s_j and at the Gaussian's centre
z = 0; the plain rules converge only algebraically there (1e-2 for E[step step]).

Default points per dimension (``DEFAULT_POINTS``) and measured accuracy
-----------------------------------------------------------------------
Worst absolute error over random covariances with the given diagonal, all correlations
allowed, for the full I2/I3/I4/J0 set (K = M = 2), reference = the closed forms for
erf (forced quadrature) or the same scheme at 64 nodes per dimension otherwise:

    activation  points  diag 1      diag 2      diag 5
    erf         24      ~2e-9       ~3e-8       ~2e-5
    sigmoid     16      ~2e-9       ~1e-8       ~1e-6
    tanh        24      ~3e-7       ~9e-6       ~8e-4
    relu        30      ~2e-6 (I2, J0 vs the arc-cosine kernels of Cho & Saul 2009:
                        ~1e-7; I3, I4 vs Monte Carlo and 64 nodes)

(re-measure with benchmarks/bench_gaussian_averages.py). tanh at large variance is
intrinsically expensive for any product rule: ~1e-7 at diag 5 needs ~48 points per
dimension, i.e. ~13x the cost; pass ``points`` explicitly if that matters.

All functions take a single covariance; K, student, teacher, points and method are
static (Python values), so callers jit and vmap over a leading batch of covariances.
No route produces NaN for a singular (positive semi-definite) covariance.
"""

from __future__ import annotations

import math
from collections import defaultdict
from collections.abc import Callable
from functools import cache
from typing import NamedTuple

import jax
import jax.numpy as jnp
import numpy as np

from harness.activations import NETWORK_ACTIVATIONS, Activation, get_activation
from harness.errors import InputError

Array = jax.Array

METHODS: tuple[str, ...] = ("auto", "closed_form", "quadrature")
"""Routes accepted by ``method=``: "auto" uses a closed form when one exists."""

CLOSED_FORM_PAIRS: tuple[str, ...] = ("erf", "linear")
"""Activations with closed forms when student and teacher share them."""

KINKED_ACTIVATIONS: frozenset[str] = frozenset({"relu", "sign"})
"""Activations (or derivatives) not smooth at 0; their levels use the split rule."""

DEFAULT_POINTS: dict[str, int] = {"erf": 20, "linear": 16, "sigmoid": 16, "tanh": 24, "relu": 30}
"""Nodes per dimension; a student/teacher pair uses the larger of its two entries.
Chosen by measurement (module docstring)."""

SPLIT_RULE_EXTENT = 6.5
"""Half-width (in standard deviations) of the split Gauss-Legendre rule; the Gaussian
mass beyond it is 8e-11."""

_TWO_OVER_PI = 2.0 / math.pi


class Averages(NamedTuple):
    """The Gaussian averages of notes section 2 at one covariance."""

    I2: Array  # [P, P]       E[g_a(u_a) g_b(u_b)]
    I3: Array  # [K, P, P]    E[g'(lambda_k) u_b g_c(u_c)]
    I4: Array  # [K, K, P, P] E[g'(lambda_k) g'(lambda_l) g_c(u_c) g_d(u_d)]
    J0: Array  # [K, K]       E[g'(lambda_k) g'(lambda_l)]


# --------------------------------------------------------------------------- validation


def _check(cov: Array, K: int, student: str, teacher: str, points: int | None, method: str) -> int:
    """Validate the static arguments; returns P."""
    for role, name in (("student", student), ("teacher", teacher)):
        if name not in NETWORK_ACTIVATIONS:
            raise InputError(f"{role} activation {name!r} is not allowed; allowed: {', '.join(NETWORK_ACTIVATIONS)}")
    if cov.ndim != 2 or cov.shape[0] != cov.shape[1]:
        raise InputError(f"cov must be one square [P, P] matrix (vmap over batches), got shape {tuple(cov.shape)}")
    P = cov.shape[0]
    if not (isinstance(K, int) and 1 <= K <= P):
        raise InputError(f"K must be an int in [1, P={P}], got {K!r}")
    if points is not None and not (isinstance(points, int) and 2 <= points <= 400):
        raise InputError(f"points must be an int in [2, 400], got {points!r}")
    if method not in METHODS:
        raise InputError(f"method {method!r} is not allowed; allowed: {', '.join(METHODS)}")
    if method == "closed_form" and not _has_closed_form(student, teacher):
        raise InputError(
            f"method 'closed_form' needs student == teacher in {CLOSED_FORM_PAIRS}, got {student!r}/{teacher!r}"
        )
    return P


def _has_closed_form(student: str, teacher: str) -> bool:
    return student == teacher and student in CLOSED_FORM_PAIRS


def default_points(student: str, teacher: str) -> int:
    """Nodes per dimension used when ``points`` is None."""
    return max(DEFAULT_POINTS[student], DEFAULT_POINTS[teacher])


# --------------------------------------------------------------------------- closed forms


def _erf_closed_form(cov: Array, K: int) -> Averages:
    """Saad & Solla 1995 closed forms (notes, section 2), broadcast over all index tuples.

    Axis letters: k, l index students (first K variables), b, c, d any variable. The
    square roots are of determinants of I + (a covariance sub-block), hence >= 1 for a
    valid covariance: no division by zero, also for singular cov.
    """
    diag = jnp.diagonal(cov)
    one_plus = 1.0 + diag
    arcsin = lambda x: jnp.arcsin(jnp.clip(x, -1.0, 1.0))  # noqa: E731 - rounding can leave [-1, 1]

    I2 = _TWO_OVER_PI * arcsin(cov / jnp.sqrt(one_plus[:, None] * one_plus[None, :]))

    # I3[k, b, c]: variables (1, 2, 3) = (k, b, c).
    c11 = diag[:K, None, None]
    c12 = cov[:K, :, None]
    c13 = cov[:K, None, :]
    c23 = cov[None, :, :]
    c33 = diag[None, None, :]
    L3 = (1.0 + c11) * (1.0 + c33) - c13**2
    I3 = _TWO_OVER_PI / jnp.sqrt(L3) * (c23 * (1.0 + c11) - c12 * c13) / (1.0 + c11)

    # I4[k, l, c, d]: variables (1, 2, 3, 4) = (k, l, c, d).
    q = cov[:K, :K]
    e11 = diag[:K, None, None, None]
    e22 = diag[None, :K, None, None]
    e12 = q[:, :, None, None]
    e13 = cov[:K, None, :, None]
    e14 = cov[:K, None, None, :]
    e23 = cov[None, :K, :, None]
    e24 = cov[None, :K, None, :]
    e33 = diag[None, None, :, None]
    e44 = diag[None, None, None, :]
    e34 = cov[None, None, :, :]
    L4 = (1.0 + e11) * (1.0 + e22) - e12**2
    L0 = L4 * e34 - e23 * e24 * (1.0 + e11) - e13 * e14 * (1.0 + e22) + e12 * e13 * e24 + e12 * e14 * e23
    L1 = L4 * (1.0 + e33) - e23**2 * (1.0 + e11) - e13**2 * (1.0 + e22) + 2.0 * e12 * e13 * e23
    L2 = L4 * (1.0 + e44) - e24**2 * (1.0 + e11) - e14**2 * (1.0 + e22) + 2.0 * e12 * e14 * e24
    I4 = (4.0 / math.pi**2) / jnp.sqrt(L4) * arcsin(L0 / jnp.sqrt(L1 * L2))

    L4_kl = (1.0 + diag[:K, None]) * (1.0 + diag[None, :K]) - q**2
    J0 = _TWO_OVER_PI / jnp.sqrt(L4_kl)
    return Averages(I2, I3, I4, J0)


def _linear_closed_form(cov: Array, K: int) -> Averages:
    """g(x) = x, g' = 1: every average is a plain covariance (notes, section 2)."""
    P = cov.shape[0]
    return Averages(
        I2=cov,
        I3=jnp.broadcast_to(cov, (K, P, P)),
        I4=jnp.broadcast_to(cov, (K, K, P, P)),
        J0=jnp.ones((K, K), cov.dtype),
    )


# --------------------------------------------------------------------------- quadrature plan
#
# An average is a product of factors, each tied to one variable: D (student derivative),
# G (activation of that unit), X (the variable itself). Grouped by variable, a factor
# "slot" is (owner, nD, nG, nX) with owner "s"/"t" (student/teacher activation) or "-"
# for a purely polynomial slot. Averages with the same ordered list of slot kinds form a
# group that is evaluated in one vectorised call over the group's variable tuples.

Kind = tuple[str, int, int, int]  # (owner, nD, nG, nX)


class _Group(NamedTuple):
    kinds: tuple[Kind, ...]  # level order, outermost first
    variables: np.ndarray  # [T, d] int, variable index per slot
    truncated_power: int | None  # p if the innermost non-polynomial slot is u^p 1{u > 0}, exact
    polynomial_power: int | None  # p if the last slot is u^p (p = 1, 2), exact


class _Plan(NamedTuple):
    groups: tuple[_Group, ...]
    offsets: tuple[int, ...]  # first row of each group in padded_variables
    padded_variables: np.ndarray  # [sum T, max d] all groups' tuples, padded with index P
    index: dict[str, np.ndarray]  # output name -> int array into the flat result vector


def _slot_kind(var: int, counts: list[int], K: int, student: str, teacher: str) -> Kind | None:
    nD, nG, nX = counts
    owner_name = student if var < K else teacher
    if owner_name == "linear":  # g(x) = x is a polynomial factor
        nX, nG = nX + nG, 0
    if student == "linear":  # g' = 1
        nD = 0
    if nD == 0 and nG == 0:
        return None if nX == 0 else ("-", 0, 0, nX)
    return ("s" if var < K else "t", nD, nG, nX)


def _exact_form(kind: Kind, student: str, teacher: str) -> tuple[bool, int] | None:
    """(truncated, p) if the slot is u^p (truncated False) or u^p 1{u > 0} (True), else None.

    relu(u) = u 1{u > 0} and relu'(u) = 1{u > 0}, so every relu slot is a truncated power;
    its conditional Gaussian average is closed form (``_exact_average``).
    """
    owner, nD, nG, nX = kind
    if owner == "-":
        return (False, nX)
    owner_name = student if owner == "s" else teacher
    if (nD == 0 or student == "relu") and (nG == 0 or owner_name == "relu"):
        return (True, nG + nX)
    return None


def _order_key(slot: tuple[int, Kind], student: str, teacher: str) -> tuple:
    var, kind = slot
    exact = _exact_form(kind, student, teacher)
    # Quadrature slots first, then truncated powers (a relu level integrated exactly needs
    # no split rule), then polynomials (exact through their conditional mean); within a
    # rank the order is fixed but arbitrary.
    rank = 0 if exact is None else (1 if exact[0] else 2)
    return (rank, kind, var)


def _exact_tail(kinds: tuple[Kind, ...], student: str, teacher: str) -> tuple[int | None, int | None]:
    """(truncated power, polynomial power) of the exactly integrated innermost slots."""
    forms = [_exact_form(kind, student, teacher) for kind in kinds]
    polynomial = truncated = None
    rest = list(forms)
    if rest and rest[-1] is not None and not rest[-1][0] and rest[-1][1] in (1, 2):
        polynomial = rest.pop()[1]
    if rest and rest[-1] is not None and rest[-1][0]:
        truncated = rest[-1][1]
    return truncated, polynomial


@cache
def _plan(K: int, P: int, student: str, teacher: str, outputs: tuple[str, ...]) -> _Plan:
    """Unique averages needed for ``outputs``, grouped by slot kinds (numpy, trace time)."""
    requests: dict[str, tuple[tuple[int, ...], list]] = {}
    if "I2" in outputs:
        requests["I2"] = ((P, P), [[(a, "G"), (b, "G")] for a in range(P) for b in range(P)])
    if "I3" in outputs:
        requests["I3"] = (
            (K, P, P),
            [[(k, "D"), (b, "X"), (c, "G")] for k in range(K) for b in range(P) for c in range(P)],
        )
    if "I4" in outputs:
        requests["I4"] = (
            (K, K, P, P),
            [
                [(k, "D"), (l, "D"), (c, "G"), (d, "G")]
                for k in range(K)
                for l in range(K)
                for c in range(P)
                for d in range(P)
            ],
        )
    if "J0" in outputs:
        requests["J0"] = ((K, K), [[(k, "D"), (l, "D")] for k in range(K) for l in range(K)])

    unique: dict[tuple, tuple[tuple[Kind, ...], int]] = {}
    members: dict[tuple[Kind, ...], list[tuple[int, ...]]] = defaultdict(list)
    flat_of: dict[str, list] = {}
    for name, (_, factor_lists) in requests.items():
        positions = []
        for factors in factor_lists:
            counts: dict[int, list[int]] = defaultdict(lambda: [0, 0, 0])
            for var, factor in factors:
                counts[var]["DGX".index(factor)] += 1
            slots = []
            for var in sorted(counts):
                kind = _slot_kind(var, counts[var], K, student, teacher)
                if kind is not None:
                    slots.append((var, kind))
            if not slots:  # every factor was 1 (g' of a linear student): the average is 1
                positions.append(None)
                continue
            slots.sort(key=lambda slot: _order_key(slot, student, teacher))
            key = tuple(slots)
            if key not in unique:
                kinds = tuple(kind for _, kind in slots)
                unique[key] = (kinds, len(members[kinds]))
                members[kinds].append(tuple(var for var, _ in slots))
            positions.append(unique[key])
        flat_of[name] = positions

    groups, offsets, total = [], {}, 0
    for kinds in sorted(members):
        variables = np.asarray(members[kinds], dtype=np.int64)
        groups.append(_Group(kinds, variables, *_exact_tail(kinds, student, teacher)))
        offsets[kinds] = total
        total += len(variables)

    index = {}
    for name, (shape, _) in requests.items():
        flat = [total if p is None else offsets[p[0]] + p[1] for p in flat_of[name]]
        index[name] = np.asarray(flat, dtype=np.int64).reshape(shape)
    width = max((g.variables.shape[1] for g in groups), default=1)
    padded = np.full((max(total, 1), width), P, dtype=np.int64)
    for group in groups:
        start = offsets[group.kinds]
        padded[start : start + len(group.variables), : group.variables.shape[1]] = group.variables
    return _Plan(tuple(groups), tuple(offsets[g.kinds] for g in groups), padded, index)


# --------------------------------------------------------------------------- 1-D rules


@cache
def _equispaced_rule(points: int) -> tuple[np.ndarray, np.ndarray]:
    """Trapezoidal rule for E over N(0, 1) on [-z_max, z_max], weights normalised to 1.

    z_max balances the truncation error exp(-z_max^2 / 2) against the discretisation
    error exp(-pi^2 / (s h)) of a function with poles at distance ~1/s (h = 2 z_max / n):
    z_max^3 ~ pi^2 n / s, taken at s = 1.5 and clipped to [4, 7.5] (tuned by measurement).
    """
    z_max = float(np.clip((math.pi**2 * points / 1.5) ** (1.0 / 3.0), 4.0, 7.5))
    nodes = np.linspace(-z_max, z_max, points)
    weights = np.exp(-0.5 * nodes**2)
    return nodes, weights / weights.sum()


@cache
def _legendre(points: int) -> tuple[np.ndarray, np.ndarray]:
    return np.polynomial.legendre.leggauss(points)


def _gaussian_density(z: Array) -> Array:
    return jnp.exp(-0.5 * z * z) / math.sqrt(2.0 * math.pi)


def _split_rule(cut: Array, points: int) -> tuple[Array, Array]:
    """Gauss-Legendre on [-Z, lo], [lo, hi], [hi, Z] with {lo, hi} = {cut, 0}, Gaussian weights.

    ``cut`` (any shape) is where the level's function is not smooth; 0 is the centre of
    the Gaussian. Returns nodes and weights of shape cut.shape + (3 * ceil(points / 3),).
    """
    x, w = _legendre(max(-(-points // 3), 2))
    cut = jnp.clip(cut, -SPLIT_RULE_EXTENT, SPLIT_RULE_EXTENT)[..., None]
    lo, hi = jnp.minimum(cut, 0.0), jnp.maximum(cut, 0.0)
    nodes, weights = [], []
    for a, b in ((-SPLIT_RULE_EXTENT, lo), (lo, hi), (hi, SPLIT_RULE_EXTENT)):
        half = 0.5 * (b - a)
        z = a + half * (x + 1.0)
        nodes.append(z)
        weights.append(half * w * _gaussian_density(z))
    return jnp.concatenate(nodes, axis=-1), jnp.concatenate(weights, axis=-1)


@cache
def _centred_split_rule(points: int) -> tuple[np.ndarray, np.ndarray]:
    """Outermost kinked level: the kink is at z = 0, so two Gauss-Legendre halves."""
    x, w = _legendre(max(-(-points // 2), 2))
    half = 0.5 * SPLIT_RULE_EXTENT
    right = half * (x + 1.0)
    nodes = np.concatenate([-right[::-1], right])
    weights = np.concatenate([w[::-1], w]) * half * np.exp(-0.5 * nodes**2) / math.sqrt(2.0 * math.pi)
    return nodes, weights


# --------------------------------------------------------------------------- quadrature evaluation


def _slot_function(kind: Kind, student: Activation, teacher: Activation) -> Callable[[Array], Array]:
    owner, nD, nG, nX = kind
    activation = student if owner == "s" else teacher

    def evaluate(u: Array) -> Array:
        value = jnp.ones_like(u)
        if nD:
            derivative = student.derivative(u)
            value = value * derivative if nD == 1 else value * derivative * derivative
        if nG:
            g = activation.fn(u)
            value = value * g if nG == 1 else value * g * g
        if nX:
            value = value * u if nX == 1 else value * u * u
        return value

    return evaluate


def _truncated_moments(t: Array, order: int) -> list[Array]:
    """M_q(t) = E[Z^q 1{Z > -t}], Z ~ N(0, 1), q = 0..order.

    Integration by parts (common practice, no source):
    M_0 = Phi(t), M_1 = phi(t), M_q = (-t)^(q-1) phi(t) + (q - 1) M_(q-2).
    t is clipped to +-40, where Phi is exactly 0 or 1 and phi underflows to 0, so
    t = +-inf (a degenerate, s = 0 level) gives the untruncated or vanishing moments.
    """
    t = jnp.clip(t, -40.0, 40.0)
    pdf = _gaussian_density(t)
    moments = [jax.scipy.special.ndtr(t), pdf]
    for q in range(2, order + 1):
        moments.append((-t) ** (q - 1) * pdf + (q - 1) * moments[q - 2])
    return moments[: order + 1]


def _polynomial_coefficients(offset: Array, slope: Array, power: int) -> list[Array]:
    """Coefficients in z of (offset + slope z)^power, power <= 3."""
    binomial = {0: (1,), 1: (1, 1), 2: (1, 2, 1), 3: (1, 3, 3, 1)}[power]
    return [b * offset ** (power - q) * slope**q for q, b in enumerate(binomial)]


def _multiply(a: list[Array], b: list[Array]) -> list[Array]:
    out = [None] * (len(a) + len(b) - 1)
    for i, x in enumerate(a):
        for j, y in enumerate(b):
            out[i + j] = x * y if out[i + j] is None else out[i + j] + x * y
    return out


def _exact_tail_average(
    L: Array, means: list[Array], truncated: int | None, polynomial: int | None
) -> Array:
    """Conditional average of the exactly integrated innermost slots, [T, R].

    With z_c the truncated slot's own normal variable and z_b the polynomial's:
      u_c = m_c + s_c z_c,  u_b = m_b + beta z_c + s_b z_b,
    the average of u_b^pb (u_c)^pc 1{u_c > 0} is a polynomial in z_c against the truncated
    moments M_q(m_c / s_c); z_b enters only through E[z_b] = 0 and E[z_b^2] = 1. Without a
    truncated slot it is E[u_b] = m_b or E[u_b^2] = m_b^2 + s_b^2 (plain Gaussian moments).
    """
    d = L.shape[-1]
    ndim = means[-1].ndim
    entry = lambda i, j: L[:, i, j].reshape((-1,) + (1,) * (ndim - 1))  # noqa: E731 - broadcast over nodes
    if polynomial is not None:
        b = d - 1
        m_b, s_b = means[b], entry(b, b)
    if truncated is None:
        return m_b if polynomial == 1 else m_b * m_b + s_b * s_b
    c = d - 1 if polynomial is None else d - 2
    m_c, s_c = means[c], entry(c, c)
    coefficients = _polynomial_coefficients(m_c, s_c, truncated)
    if polynomial is not None:
        beta = entry(b, c)
        factor = _polynomial_coefficients(m_b, beta, polynomial)
        if polynomial == 2:
            factor[0] = factor[0] + s_b * s_b
        coefficients = _multiply(coefficients, factor)
    t = jnp.where(s_c > 0, m_c / jnp.where(s_c > 0, s_c, 1.0), jnp.where(m_c > 0, jnp.inf, -jnp.inf))
    moments = _truncated_moments(t, len(coefficients) - 1)
    return sum(coef * moment for coef, moment in zip(coefficients, moments, strict=True))


LOW_DIMENSION_FACTOR: dict[int, float] = {1: 3.0, 2: 1.5}
"""Node multiplier for averages with one or two quadrature levels: they are cheap, and
they carry the repeated-index averages (g'(u)^2 g(u)^2, ...) whose integrands are the
least smooth."""


def _level_points(kind: Kind, points: int, dims: int) -> int:
    """Nodes for one level: a variable carrying f nonlinear factors (e.g. g'(u)^2 g(u)^2,
    f = 4, from repeated indices) has features ~sqrt(f) narrower, so it gets sqrt(f) times
    the nodes. Such levels sit in low-dimensional averages, so this costs little."""
    factors = kind[1] + kind[2]
    return int(round(points * LOW_DIMENSION_FACTOR.get(dims, 1.0) * math.sqrt(max(factors, 1))))


def _is_kinked(kind: Kind, student: str, teacher: str) -> bool:
    owner, nD, nG, _ = kind
    owner_name = student if owner == "s" else teacher
    return (nD > 0 and student in KINKED_ACTIVATIONS) or (nG > 0 and owner_name in KINKED_ACTIVATIONS)


def _triangular_factors(root: Array, variables: np.ndarray) -> Array:
    """Lower-triangular L [T, d, d] with L L^T = cov[S, S] for each row S of ``variables``.

    ``root`` is any A with cov = A A^T; the LQ decomposition of A_S (a QR of A_S^T) keeps
    singular sub-blocks exact (zero columns of L) where a Cholesky would produce NaN.
    Index P (one past the last variable) pads shorter tuples with a zero row, which leaves
    the factor of the leading rows unchanged, so all groups share one QR call.
    Columns are sign-flipped (z_j -> -z_j, same distribution) so that L_jj >= 0.
    """
    padded_root = jnp.concatenate([root, jnp.zeros((1, root.shape[1]), root.dtype)])
    rows = padded_root[variables]  # [T, d, P]
    r = jnp.linalg.qr(jnp.swapaxes(rows, -1, -2), mode="r")  # [T, d, d]: d distinct variables <= P
    lower = jnp.swapaxes(r, -1, -2)
    signs = jnp.where(jnp.diagonal(lower, axis1=-2, axis2=-1) < 0, -1.0, 1.0)
    return lower * signs[:, None, :]


def _level_rule(
    kind: Kind, level: int, dims: int, mean: Array, scale: Array, points: int, student: str, teacher: str
) -> tuple[Array, Array]:
    """Nodes and weights in z for one level (static [n], or [T, R, n] for split levels)."""
    n_level = _level_points(kind, points, dims)
    if not _is_kinked(kind, student, teacher):
        return tuple(jnp.asarray(a, mean.dtype) for a in _equispaced_rule(n_level))
    if level == 0:
        return tuple(jnp.asarray(a, mean.dtype) for a in _centred_split_rule(n_level))
    positive = scale[..., 0] > 0
    cut = jnp.where(positive, -mean / jnp.where(positive, scale[..., 0], 1.0), 0.0)  # u = 0 there
    return _split_rule(cut, n_level)


def _group_expectation(group: _Group, L: Array, points: int, student: Activation, teacher: Activation) -> Array:
    """E[prod_j f_j(u_{S_j})] for every variable tuple S of the group, nested over levels.

    ``L`` [T, d, d] holds the triangular factors (u_S = L z). Level j integrates z_j given
    the outer nodes; ``means[i]`` holds the conditional mean of variable i (i >= j) at every
    outer node and ``prefix`` the product of the outer levels' weights and values, both
    [T, R] with R the number of outer nodes. The innermost quadrature level is summed
    before anything of size R x n is stored.
    """
    T, d = group.variables.shape
    dtype = L.dtype
    levels = d - (group.truncated_power is not None) - (group.polynomial_power is not None)
    means = [jnp.zeros((T, 1), dtype) for _ in range(d)]
    prefix = jnp.ones((T, 1), dtype)
    for j in range(levels):
        kind = group.kinds[j]
        scale = L[:, j, j][:, None, None]
        nodes, weights = _level_rule(kind, j, levels, means[j], scale, points, student.name, teacher.name)
        value = weights * _slot_function(kind, student, teacher)(means[j][:, :, None] + scale * nodes)
        shifted = [means[i][:, :, None] + L[:, i, j][:, None, None] * nodes for i in range(j + 1, d)]
        if j == levels - 1:
            if levels < d:
                tail_means = means[: j + 1] + shifted
                value = value * _exact_tail_average(L, tail_means, group.truncated_power, group.polynomial_power)
            return jnp.sum(prefix * jnp.sum(value, axis=-1), axis=-1)
        R, n = prefix.shape[1], value.shape[-1]
        prefix = (prefix[:, :, None] * value).reshape(T, R * n)
        for i, m in zip(range(j + 1, d), shifted, strict=True):
            means[i] = jnp.broadcast_to(m, (T, R, n)).reshape(T, R * n)
    # No quadrature level: the whole average is exact (a single polynomial or relu slot).
    zero = [jnp.zeros((T, 1), dtype) for _ in range(d)]
    return _exact_tail_average(L, zero, group.truncated_power, group.polynomial_power)[:, 0]


def _covariance_root(cov: Array) -> Array:
    """A with A A^T = cov from the eigen-decomposition, negative eigenvalues clipped to 0."""
    symmetric = 0.5 * (cov + cov.T)
    eigenvalues, vectors = jnp.linalg.eigh(symmetric)
    return vectors * jnp.sqrt(jnp.clip(eigenvalues, 0.0, None))[None, :]


def _quadrature(
    cov: Array, K: int, student: str, teacher: str, points: int, outputs: tuple[str, ...]
) -> dict[str, Array]:
    P = cov.shape[0]
    plan = _plan(K, P, student, teacher, outputs)
    root = _covariance_root(cov)
    s_act, t_act = get_activation(student), get_activation(teacher)
    L = _triangular_factors(root, plan.padded_variables)
    values = []
    for group, offset in zip(plan.groups, plan.offsets, strict=True):
        T, d = group.variables.shape
        values.append(_group_expectation(group, L[offset : offset + T, :d, :d], points, s_act, t_act))
    flat = jnp.concatenate(values + [jnp.ones((1,), cov.dtype)])
    return {name: flat[index] for name, index in plan.index.items()}


# --------------------------------------------------------------------------- public API


def gaussian_averages(
    cov: Array,
    K: int,
    student: str,
    teacher: str,
    *,
    points: int | None = None,
    method: str = "auto",
) -> Averages:
    """I2, I3, I4 and J0 at the covariance ``cov`` = [[Q, R], [R^T, T]] (notes, section 2).

    ``points`` (nodes per dimension, quadrature only) defaults to ``default_points``;
    ``method="quadrature"`` forces quadrature where a closed form exists (for testing).
    """
    _check(cov, K, student, teacher, points, method)
    if method != "quadrature" and _has_closed_form(student, teacher):
        return _erf_closed_form(cov, K) if student == "erf" else _linear_closed_form(cov, K)
    n = default_points(student, teacher) if points is None else points
    out = _quadrature(cov, K, student, teacher, n, ("I2", "I3", "I4", "J0"))
    return Averages(out["I2"], out["I3"], out["I4"], out["J0"])


def pair_averages(
    cov: Array,
    K: int,
    student: str,
    teacher: str,
    *,
    points: int | None = None,
    method: str = "auto",
) -> Array:
    """I2 [P, P] alone: at most two-dimensional integrals, much cheaper than the full set."""
    _check(cov, K, student, teacher, points, method)
    if method != "quadrature" and _has_closed_form(student, teacher):
        if student == "linear":
            return cov
        one_plus = 1.0 + jnp.diagonal(cov)
        ratio = cov / jnp.sqrt(one_plus[:, None] * one_plus[None, :])
        return _TWO_OVER_PI * jnp.arcsin(jnp.clip(ratio, -1.0, 1.0))
    n = default_points(student, teacher) if points is None else points
    return _quadrature(cov, K, student, teacher, n, ("I2",))["I2"]


def generalisation_error(
    cov: Array,
    a: Array,
    K: int,
    student: str,
    teacher: str,
    *,
    points: int | None = None,
    method: str = "auto",
) -> Array:
    """eps_g = 1/2 sum_ab a_a a_b I2(a, b) with a = (v, -vt) (notes, section 2)."""
    I2 = pair_averages(cov, K, student, teacher, points=points, method=method)
    return 0.5 * a @ I2 @ a

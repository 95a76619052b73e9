"""Gaussian averages I2, I3, I4 (and the noise average J0) of docs/equations.md, section 2.

For u = (lambda_1..K, nu_1..M) ~ N(0, cov), P = K + M, g_a the student activation for
a < K and the teacher activation for a >= K, and g' always the student derivative:

    I2[a, b]       = E[g_a(u_a) g_b(u_b)]
    I3[k, b, c]    = E[g'(lambda_k) u_b g_c(u_c)]
    I4[k, l, c, d] = E[g'(lambda_k) g'(lambda_l) g_c(u_c) g_d(u_d)]
    J0[k, l]       = E[g'(lambda_k) g'(lambda_l)]

Routes (``method="auto"`` picks the first that applies; ``route_of`` tells which)
------------------------------------------------------------------------------
* closed_form, student == teacher:
  - "erf": the closed forms of Saad & Solla 1995 (docs/equations.md, section 2), broadcast over all
    index tuples at once; J0 = (2/pi) / sqrt((1+C11)(1+C22) - C12^2).
  - "linear": I2 = C12, I3 = C23, I4 = C34, J0 = 1.
  - "relu": Gaussian orthant moments (harness/equations/relu_averages.py, derivations there): arc-cosine
    kernels (Cho & Saul 2009), Stein's lemma, trivariate moments without divisions, and the
    four-variable moments by a 16-node Price-path integral from the identity.
* erf_sum, student and teacher in {erf, tanh, sigmoid} (any mix): each activation is a
  constant plus five scaled erfs fitted once (harness/equations/erf_expansions.py), and every average a
  weighted sum of the erf closed forms at rescaled covariances ("virtual" erf units).
* quadrature, anything else (a relu or linear unit with a smooth one, ...): product
  quadrature over the at most four *distinct* variables of each average, below.
  ``method="quadrature"`` forces it everywhere (the reference for the other routes).

Accuracy of the fast routes (measured when written; tests/test_relu_averages.py,
tests/test_erf_expansions.py check it against scipy, Monte Carlo and the quadrature)
---------------------------------------------------------------------------------
Worst absolute error over all entries of I2/I3/I4/J0 (K = M = 2 unless said), random
covariances with the given diagonal (smallest correlation eigenvalue >= 0.05; relu at 1e-3
too: <= 6e-9, the quadrature's own error there):

    route / pair           reference                         diag 0.5  diag 1   diag 2   diag 5
    relu closed form       quadrature, 40 points (K=3, M=2)  9e-10     9e-10    -        - (3e-9 at diag 3)
    relu closed form       itself, 60 path nodes             - 2e-11 at any diagonal, also rank 2 -
    tanh/tanh erf sum      quadrature, 48 points             2.5e-6    2.0e-6   2.9e-6   4.5e-6
    sigmoid/sigmoid        quadrature, 48 points             2e-7      2e-7     3e-7     6e-7
    tanh/erf               quadrature, 48 points             2.5e-6    2.0e-6   2.9e-6   4.5e-6
    sigmoid/tanh           quadrature, 48 points             1.2e-6    1.9e-6   2.9e-6   4.5e-6

relu: the closed forms are exact up to rounding and the path rule (converged to ~1e-11);
at rank-deficient covariances (late training of K > M students: every four fields nearly
dependent) they agree with Monte Carlo (10^6-4 x 10^6 samples) where the quadrature is off by up to
1e-3. tanh: the erf sum is a different function from tanh (worst errors 8e-6 for tanh,
7e-6 for tanh'), and the averages inherit errors of that size against exact tanh (scipy
dblquad: tests). Trajectories of the ODE (float64, rtol 1e-6), erf sums against the
quadrature route: the tanh K = M = 2 benchmark scenario (t = 20, 8 seeds) differs by at
most 1.1e-6 in Q and 9e-7 in R; the committed tanh baseline (K = M = 1, t = 5) by 1.8e-6
(its tolerance is 1e-4); relu closed forms against the relu baseline: 6e-9. Use
``method="quadrature"`` with ``points`` when exact tanh averages below 1e-6 matter.

Quadrature scheme
-----------------
The covariance is factored once, cov = A A^T with A = V sqrt(max(w, 0)) from a symmetric
eigen-decomposition (singular covariances are common: a student at Q = 0, a student unit
equal to a teacher unit). The rows A_S of each average's variables are brought to lower
triangular form by a QR decomposition, A_S = L_S Q_S, so u_S = L_S z with z ~ N(0, I) and
the integral is nested: variable j sees the outer nodes only through its conditional
mean m_j = sum_{i<j} L_ji z_i and its own conditional scale s_j = L_jj. Averages with the
same number of levels and rule types are evaluated together (per-tuple exponents), which
keeps the traced program small (about six groups).

The one-dimensional rule per level is NOT Gauss-Hermite, by measurement (reference
scipy.integrate.quad): for E[g'(u)^2] with g = tanh and Var u = 5, Gauss-Hermite with 64
nodes is off by 2e-3 (1e-2 for E[g'^2 g^2]); its nodes spread to |z| ~ 16 where the
Gaussian weight is 1e-56, while the integrand changes on the scale 1/sqrt(Var u) near
z = 0 (tanh has poles at +-i pi/2). The equally spaced rule with Gaussian weights on
[-z_max, z_max] (trapezoidal rule, exponentially convergent for integrands analytic in a
strip) reaches 1e-8 there with 48 nodes, and was as good or better than Gauss-Hermite in
every smooth case measured except sigmoid at unit variance (both below 1e-8). Smooth
levels (erf, tanh, sigmoid, linear) use it. Levels whose function has a kink or jump at
0 (relu, its step derivative) use Gauss-Legendre pieces split at the kink z = -m_j / s_j
and at the Gaussian's centre z = 0; plain rules converge only algebraically there (1e-2
for E[step step] with 64 nodes). A level carrying f nonlinear factors (g'^2 g^2 from
repeated indices) gets sqrt(f) times the nodes, averages with one or two levels get
LOW_DIMENSION_FACTOR times more: they are cheap and their integrands the sharpest.

Default points per dimension (``DEFAULT_POINTS``; a pair uses the larger) and accuracy
of the quadrature route
-------------------------------------------------------------------------------------
Worst absolute error over all entries of I2/I3/I4/J0 (K = M = 2), three random
covariances per column with the given diagonal and smallest correlation-matrix
eigenvalue >= 0.05; reference = the closed forms for erf (forced quadrature), the same
scheme at 64 points otherwise (measured when this was written):

    student/teacher  points  diag 1   diag 2   diag 5
    erf/erf          24      4e-9     3e-9     7e-7
    erf/tanh         24      5e-9     2e-7     3e-5
    tanh/tanh        24      2e-7     4e-6     5e-4
    sigmoid/sigmoid  16      9e-9     7e-9     1e-6
    relu/relu        30      5e-8     6e-8     2e-7

relu against closed forms: I2 against the degree-1 arc-cosine kernel and J0 against the
degree-0 one (Cho & Saul 2009) agree to <= 1e-8 (tests/test_gaussian_averages.py checks
1e-7 and 1e-6 including singular covariances). relu's remaining error sits in the
three-level (4-variable) I4 entries and grows when the covariance is nearly singular
(kinks of nearly collinear variables that no split point sees): up to ~6e-4 at diagonal
5 with a smallest correlation eigenvalue of 1e-3. Exactly singular erf covariances
(a student unit equal to a teacher unit) reach ~3e-7 at diagonal ~2. tanh at large
variance is intrinsically expensive for product rules: 1e-7 at diagonal 5 needs ~48
points; pass ``points`` when that matters (cost grows as points^4 for K, M >= 2).

Cost: the number of four-variable averages grows like K^2 M^2 (1 for K = M = 2, 18 for
K = M = 3, each points^4 nodes), so quadrature is practical for small networks only; the
closed forms and the erf sums (25 to 600 erf terms per I4 entry on average) are not.

All functions take a single covariance; K, student, teacher, points and method are
static (Python values), so callers jit and vmap over a leading batch of covariances.
No route produces NaN for a singular (positive semi-definite) covariance.
"""

from __future__ import annotations

import math
from collections import defaultdict
from functools import cache, partial
from typing import NamedTuple

import jax
import jax.numpy as jnp
import numpy as np

from harness.core.activations import NETWORK_ACTIVATIONS, Activation, get_activation
from harness.core.errors import InputError
from harness.equations.erf_expansions import EXPANDED_ACTIVATIONS, expanded_averages
from harness.equations.fast_arcsin import arcsin
from harness.equations.relu_averages import relu_averages

Array = jax.Array

METHODS: tuple[str, ...] = ("auto", "closed_form", "erf_sum", "quadrature")
"""Routes accepted by ``method=``: "auto" uses a closed form when one exists, else the erf sums
when both activations have one (erf, tanh, sigmoid), else quadrature."""

CLOSED_FORM_PAIRS: tuple[str, ...] = ("erf", "linear", "relu")
"""Activations with closed forms when student and teacher share them."""

KINKED_ACTIVATIONS: frozenset[str] = frozenset({"relu", "sign"})
"""Activations (or derivatives) not smooth at 0; their levels use the split rule."""

DEFAULT_POINTS: dict[str, int] = {"erf": 24, "linear": 16, "sigmoid": 16, "tanh": 24, "relu": 30}
"""Nodes per dimension; a student/teacher pair uses the larger of its two entries.
Chosen by measurement (module docstring)."""

SPLIT_RULE_EXTENT = 6.5
"""Half-width (in standard deviations) of the split Gauss-Legendre rule; the Gaussian
mass beyond it is 8e-11."""

_TWO_OVER_PI = 2.0 / math.pi


class Averages(NamedTuple):
    """The Gaussian averages of docs/equations.md, section 2 at one covariance."""

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
    if method == "erf_sum" and not (student in EXPANDED_ACTIVATIONS and teacher in EXPANDED_ACTIVATIONS):
        raise InputError(
            f"method 'erf_sum' needs student and teacher in {', '.join(sorted(EXPANDED_ACTIVATIONS))}, "
            f"got {student!r}/{teacher!r}"
        )
    return P


def _has_closed_form(student: str, teacher: str) -> bool:
    return student == teacher and student in CLOSED_FORM_PAIRS


def default_points(student: str, teacher: str) -> int:
    """Nodes per dimension used when ``points`` is None."""
    return max(DEFAULT_POINTS[student], DEFAULT_POINTS[teacher])


# --------------------------------------------------------------------------- closed forms


def _erf_closed_form(cov: Array, K: int) -> Averages:
    """Saad & Solla 1995 closed forms (docs/equations.md, section 2), broadcast over all index tuples.

    Axis letters: k, l index students (first K variables), b, c, d any variable. The
    square roots are of determinants of I + (a covariance sub-block), hence >= 1 for a
    valid covariance: no division by zero, also for singular cov.
    """
    diag = jnp.diagonal(cov)
    one_plus = 1.0 + diag

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
    """g(x) = x, g' = 1: every average is a plain covariance (docs/equations.md, section 2)."""
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
# for a purely polynomial slot. A slot is integrated either by quadrature over its own
# normal variable ("level"), or exactly: u^p (polynomial) and u^p 1{u > 0} (every relu
# slot, "truncated") have closed-form conditional averages. Averages with the same number
# of quadrature levels, the same rule type per level and the same exact tail form one
# group, evaluated in one vectorised pass over its tuples; the exponents are per-tuple
# data, so there are few groups (few operations to trace and compile).

Kind = tuple[str, int, int, int]  # (owner, nD, nG, nX)
_OWNER_CODE = {"s": 0, "t": 1, "-": 2}


class _Group(NamedTuple):
    variables: np.ndarray  # [T, d] variable index per slot, levels first, then the exact tail
    owner: np.ndarray  # [T, d] 0 student, 1 teacher, 2 none
    exponents: np.ndarray  # [T, d, 3] (nD, nG, nX)
    kinked: tuple[bool, ...]  # per quadrature level: split rule (relu) or equispaced rule
    level_points: tuple[int, ...]  # nodes per quadrature level
    truncated: bool  # the tail holds a truncated power u^p 1{u > 0}
    polynomial: bool  # the tail ends with a polynomial u^p


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

    relu(u) = u 1{u > 0} and relu'(u) = 1{u > 0}, so every relu slot is a truncated power.
    """
    owner, nD, nG, nX = kind
    if owner == "-":
        return (False, nX)
    owner_name = student if owner == "s" else teacher
    if (nD == 0 or student == "relu") and (nG == 0 or owner_name == "relu"):
        return (True, nG + nX)
    return None


def _is_kinked(kind: Kind, student: str, teacher: str) -> bool:
    owner, nD, nG, _ = kind
    owner_name = student if owner == "s" else teacher
    return (nD > 0 and student in KINKED_ACTIVATIONS) or (nG > 0 and owner_name in KINKED_ACTIVATIONS)


LOW_DIMENSION_FACTOR: dict[int, float] = {1: 3.0, 2: 1.5}
"""Node multiplier for averages with one or two quadrature levels: they are cheap, and
they carry the repeated-index averages (g'(u)^2 g(u)^2, ...) whose integrands are the
least smooth."""


def _level_points(kind: Kind, points: int, dims: int) -> int:
    """Nodes for one level: a variable carrying f nonlinear factors (e.g. g'(u)^2 g(u)^2,
    f = 4, from repeated indices) has features ~sqrt(f) narrower, so it gets sqrt(f) times
    the nodes; averages with few levels get LOW_DIMENSION_FACTOR more."""
    factors = kind[1] + kind[2]
    return int(round(points * LOW_DIMENSION_FACTOR.get(dims, 1.0) * math.sqrt(max(factors, 1))))


def _arrange(slots: list[tuple[int, Kind]], student: str, teacher: str) -> tuple[list, bool, bool]:
    """Order one average's slots: quadrature levels (kinked first, then by descending
    number of factors, so that boosted levels line up across a group), then the exact tail
    (one truncated power, then one polynomial). Returns (ordered slots, truncated, polynomial)."""
    forms = {var: _exact_form(kind, student, teacher) for var, kind in slots}
    polynomials = [sl for sl in slots if forms[sl[0]] is not None and not forms[sl[0]][0]]
    truncated = [sl for sl in slots if forms[sl[0]] is not None and forms[sl[0]][0]]
    tail_polynomial = polynomials[-1:] if polynomials and polynomials[-1][1][3] in (1, 2) else []
    tail_truncated = truncated[-1:]
    tail = tail_truncated + tail_polynomial
    levels = [sl for sl in slots if sl not in tail]
    levels.sort(key=lambda sl: (not _is_kinked(sl[1], student, teacher), -(sl[1][1] + sl[1][2]), sl[0]))
    return levels + tail, bool(tail_truncated), bool(tail_polynomial)


@cache
def _plan(K: int, P: int, student: str, teacher: str, outputs: tuple[str, ...], points: int) -> _Plan:
    """Unique averages needed for ``outputs``, grouped (numpy, at trace time)."""
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

    unique: dict[tuple, tuple[tuple, int]] = {}
    members: dict[tuple, list[list[tuple[int, Kind]]]] = defaultdict(list)
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
            ordered, truncated, polynomial = _arrange(slots, student, teacher)
            key = tuple(ordered)
            if key not in unique:
                n_levels = len(ordered) - truncated - polynomial
                kinked = tuple(_is_kinked(kind, student, teacher) for _, kind in ordered[:n_levels])
                group_key = (n_levels, kinked, truncated, polynomial)
                unique[key] = (group_key, len(members[group_key]))
                members[group_key].append(ordered)
            positions.append(unique[key])
        flat_of[name] = positions

    groups, offsets, total = [], {}, 0
    for group_key in sorted(members):
        n_levels, kinked, truncated, polynomial = group_key
        tuples = members[group_key]
        level_points = tuple(
            max(_level_points(ordered[j][1], points, n_levels) for ordered in tuples) for j in range(n_levels)
        )
        groups.append(
            _Group(
                variables=np.array([[var for var, _ in ordered] for ordered in tuples], dtype=np.int64),
                owner=np.array([[_OWNER_CODE[kind[0]] for _, kind in ordered] for ordered in tuples], dtype=np.int64),
                exponents=np.array([[kind[1:] for _, kind in ordered] for ordered in tuples], dtype=np.int64),
                kinked=kinked,
                level_points=level_points,
                truncated=truncated,
                polynomial=polynomial,
            )
        )
        offsets[group_key] = total
        total += len(tuples)

    index = {}
    for name, (shape, _) in requests.items():
        flat = [total if p is None else offsets[p[0]] + p[1] for p in flat_of[name]]
        index[name] = np.asarray(flat, dtype=np.int64).reshape(shape)
    width = max((g.variables.shape[1] for g in groups), default=1)
    padded = np.full((max(total, 1), width), P, dtype=np.int64)
    group_offsets = tuple(offsets[key] for key in sorted(members))
    for group, start in zip(groups, group_offsets, strict=True):
        padded[start : start + len(group.variables), : group.variables.shape[1]] = group.variables
    return _Plan(tuple(groups), group_offsets, padded, index)


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


def _level_rule(group: _Group, j: int, mean: Array, scale: Array) -> tuple[Array, Array]:
    """Nodes and weights in z for level j (static [n], or [T, R, n] for inner split levels)."""
    n = group.level_points[j]
    if not group.kinked[j]:
        return tuple(jnp.asarray(a, mean.dtype) for a in _equispaced_rule(n))
    if j == 0:
        return tuple(jnp.asarray(a, mean.dtype) for a in _centred_split_rule(n))
    positive = scale[..., 0] > 0
    cut = jnp.where(positive, -mean / jnp.where(positive, scale[..., 0], 1.0), 0.0)  # u = 0 there
    return _split_rule(cut, n)


# --------------------------------------------------------------------------- quadrature evaluation


def _power(x: Array, n: Array) -> Array:
    """x^n for per-tuple exponents n in {0, 1, 2} (broadcast), without pow's exp/log."""
    return jnp.where(n == 0, 1.0, jnp.where(n == 1, x, x * x))


def _level_values(group: _Group, j: int, u: Array, student: Activation, teacher: Activation) -> Array:
    """D^nD G^nG u^nX at level j for every tuple (exponents broadcast over the nodes)."""
    shape = (-1,) + (1,) * (u.ndim - 1)
    nD, nG, nX = (group.exponents[:, j, i].reshape(shape) for i in range(3))
    owner = group.owner[:, j].reshape(shape)
    value = jnp.ones_like(u)
    if group.exponents[:, j, 0].any():
        value = value * _power(student.derivative(u), nD)
    if group.exponents[:, j, 1].any():
        has_student = (group.owner[:, j] == 0).any()
        has_teacher = (group.owner[:, j] == 1).any()
        if has_student and has_teacher and student.name != teacher.name:
            g = jnp.where(owner == 0, student.fn(u), teacher.fn(u))
        else:
            g = (student if has_student else teacher).fn(u)
        value = value * _power(g, nG)
    if group.exponents[:, j, 2].any():
        value = value * _power(u, nX)
    return value


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


def _binomial_coefficients(offset: Array, slope: Array, power: Array, max_power: int) -> list[Array]:
    """Coefficients in z of (offset + slope z)^power for per-tuple power <= max_power."""
    out = []
    for q in range(max_power + 1):
        terms = 0.0
        for p in range(q, max_power + 1):
            terms = terms + jnp.where(power == p, math.comb(p, q) * offset ** (p - q), 0.0)
        out.append(terms * slope**q)
    return out


def _multiply(a: list[Array], b: list[Array]) -> list[Array]:
    out = [None] * (len(a) + len(b) - 1)
    for i, x in enumerate(a):
        for j, y in enumerate(b):
            out[i + j] = x * y if out[i + j] is None else out[i + j] + x * y
    return out


def _exact_tail_average(group: _Group, L: Array, means: list[Array]) -> Array:
    """Conditional average of the exactly integrated slots given the outer nodes.

    With z_c the truncated slot's own normal variable and z_b the polynomial's:
      u_c = m_c + s_c z_c,  u_b = m_b + beta z_c + s_b z_b,
    the average of u_b^pb u_c^pc 1{u_c > 0} is a polynomial in z_c against the truncated
    moments M_q(m_c / s_c); z_b enters only through E[z_b] = 0 and E[z_b^2] = 1. Without a
    truncated slot it is E[u_b] = m_b or E[u_b^2] = m_b^2 + s_b^2 (plain Gaussian moments).
    """
    d = L.shape[-1]
    shape = (-1,) + (1,) * (means[-1].ndim - 1)
    entry = lambda i, j: L[:, i, j].reshape(shape)  # noqa: E731 - broadcast over the nodes
    exponent = lambda i: (group.exponents[:, i, 1] + group.exponents[:, i, 2]).reshape(shape)  # noqa: E731
    if group.polynomial:
        b = d - 1
        m_b, s_b, p_b = means[b], entry(b, b), exponent(b)
        if not group.truncated:
            return jnp.where(p_b == 1, m_b, m_b * m_b + s_b * s_b)
    c = d - 2 if group.polynomial else d - 1
    m_c, s_c = means[c], entry(c, c)
    coefficients = _binomial_coefficients(m_c, s_c, exponent(c), 3)  # u^p 1{u>0}, p = nG + nX <= 3
    if group.polynomial:
        factor = _binomial_coefficients(m_b, entry(b, c), p_b, 2)
        factor[0] = factor[0] + jnp.where(p_b == 2, s_b * s_b, 0.0)
        coefficients = _multiply(coefficients, factor)
    t = jnp.where(s_c > 0, m_c / jnp.where(s_c > 0, s_c, 1.0), jnp.where(m_c > 0, jnp.inf, -jnp.inf))
    moments = _truncated_moments(t, len(coefficients) - 1)
    return sum(coef * moment for coef, moment in zip(coefficients, moments, strict=True))


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


def _group_expectation(group: _Group, L: Array, student: Activation, teacher: Activation) -> Array:
    """E[prod_j f_j(u_{S_j})] for every variable tuple S of the group, nested over levels.

    ``L`` [T, d, d] holds the triangular factors (u_S = L z). Level j integrates z_j given
    the outer nodes; ``means[i]`` holds the conditional mean of variable i (i >= j) at every
    outer node and ``prefix`` the product of the outer levels' weights and values, both
    [T, R] with R the number of outer nodes. The innermost quadrature level is summed
    before anything of size R x n is stored. (Reading the innermost level of four-level
    averages from an interpolated table instead was tried: as accurate, ~1e-11, but slower
    on CPU, where XLA's gathers cost more than the transcendental evaluations they save.)
    """
    T, d = group.variables.shape
    dtype = L.dtype
    levels = len(group.level_points)
    means = [jnp.zeros((T, 1), dtype) for _ in range(d)]
    prefix = jnp.ones((T, 1), dtype)
    for j in range(levels):
        scale = L[:, j, j][:, None, None]
        nodes, weights = _level_rule(group, j, means[j], scale)
        value = weights * _level_values(group, j, means[j][:, :, None] + scale * nodes, student, teacher)
        shifted = [means[i][:, :, None] + L[:, i, j][:, None, None] * nodes for i in range(j + 1, d)]
        if j == levels - 1:
            if levels < d:
                value = value * _exact_tail_average(group, L, means[: j + 1] + shifted)
            return jnp.sum(prefix * jnp.sum(value, axis=-1), axis=-1)
        R, n = prefix.shape[1], value.shape[-1]
        prefix = (prefix[:, :, None] * value).reshape(T, R * n)
        for i, m in zip(range(j + 1, d), shifted, strict=True):
            means[i] = jnp.broadcast_to(m, (T, R, n)).reshape(T, R * n)
    # No quadrature level: the whole average is exact (a single polynomial or relu slot).
    return _exact_tail_average(group, L, [jnp.zeros((T, 1), dtype) for _ in range(d)])[:, 0]


def _covariance_root(cov: Array) -> Array:
    """A with A A^T = cov from the eigen-decomposition, negative eigenvalues clipped to 0."""
    symmetric = 0.5 * (cov + cov.T)
    eigenvalues, vectors = jnp.linalg.eigh(symmetric)
    return vectors * jnp.sqrt(jnp.clip(eigenvalues, 0.0, None))[None, :]


def _quadrature(
    cov: Array, K: int, student: str, teacher: str, points: int, outputs: tuple[str, ...]
) -> dict[str, Array]:
    plan = _plan(K, cov.shape[0], student, teacher, outputs, points)
    s_act, t_act = get_activation(student), get_activation(teacher)
    L = _triangular_factors(_covariance_root(cov), plan.padded_variables)
    values = []
    for group, offset in zip(plan.groups, plan.offsets, strict=True):
        T, d = group.variables.shape
        values.append(_group_expectation(group, L[offset : offset + T, :d, :d], s_act, t_act))
    flat = jnp.concatenate(values + [jnp.ones((1,), cov.dtype)])
    return {name: flat[index] for name, index in plan.index.items()}


# --------------------------------------------------------------------------- public API


@partial(jax.jit, static_argnames=("K", "student", "teacher", "points", "route", "outputs"))
def _averages(
    cov: Array, K: int, student: str, teacher: str, points: int, route: str, outputs: tuple[str, ...]
) -> dict[str, Array]:
    """Jitted core: compiled once per static configuration, so eager callers do not pay
    op-by-op dispatch (thousands of small ops) and jitted callers simply inline it."""
    if route == "closed_form":
        if student == "relu":
            return relu_averages(cov, K, outputs)
        if student == "linear":
            averages = _linear_closed_form(cov, K)
        elif outputs == ("I2",):  # the pair kernel alone, without the I3/I4 tensors
            one_plus = 1.0 + jnp.diagonal(cov)
            ratio = cov / jnp.sqrt(one_plus[:, None] * one_plus[None, :])
            return {"I2": _TWO_OVER_PI * arcsin(ratio)}
        else:
            averages = _erf_closed_form(cov, K)
        return {name: getattr(averages, name) for name in outputs}
    if route == "erf_sum":
        return expanded_averages(cov, K, student, teacher, outputs)
    return _quadrature(cov, K, student, teacher, points, outputs)


def route_of(student: str, teacher: str, method: str = "auto") -> str:
    """The route ``method`` takes for a student/teacher pair: closed_form, erf_sum or quadrature."""
    if method != "auto":
        return method
    if _has_closed_form(student, teacher):
        return "closed_form"
    if student in EXPANDED_ACTIVATIONS and teacher in EXPANDED_ACTIVATIONS:
        return "erf_sum"
    return "quadrature"


def _dispatch(cov, K, student, teacher, points, method, outputs) -> dict[str, Array]:
    _check(cov, K, student, teacher, points, method)
    route = route_of(student, teacher, method)
    n = default_points(student, teacher) if points is None else points
    return _averages(cov, K, student, teacher, n if route == "quadrature" else 0, route, outputs)


def gaussian_averages(
    cov: Array,
    K: int,
    student: str,
    teacher: str,
    *,
    points: int | None = None,
    method: str = "auto",
) -> Averages:
    """I2, I3, I4 and J0 at the covariance ``cov`` = [[Q, R], [R^T, T]] (docs/equations.md, section 2).

    ``points`` (nodes per dimension, quadrature only) defaults to ``default_points``;
    ``method="quadrature"`` forces quadrature where a closed form exists (for testing).
    """
    out = _dispatch(cov, K, student, teacher, points, method, ("I2", "I3", "I4", "J0"))
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
    return _dispatch(cov, K, student, teacher, points, method, ("I2",))["I2"]


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
    """eps_g = 1/2 sum_ab a_a a_b I2(a, b) with a = (v, -vt) (docs/equations.md, section 2)."""
    I2 = pair_averages(cov, K, student, teacher, points=points, method=method)
    return 0.5 * a @ I2 @ a

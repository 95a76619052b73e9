"""Typed sections of a resolved scenario, made from the key declarations. Do not edit.

Written by ``python -m harness.builtins`` from every declared key (harness.builtins imports
them); tests/test_layers.py checks that this file is current. A type checker reads
``scenario.sgd.learning_rate`` through these classes, and a misspelled field is an error.
"""

from __future__ import annotations

from dataclasses import dataclass

from harness.core.tables import ScenarioBase, Section


@dataclass(frozen=True)
class DataSection(Section):
    """The [data] table."""

    kind: str  # input distribution
    input_dim: int  # N, the input dimension
    latent_dim: int  # D, latent dimension of latent kinds (0: input_dim // 2)
    feature_map: str  # f in x = f(F^T c / sqrt(D)) - E f (latent kinds)
    layers: tuple[int, ...]  # hidden widths of the deep_latent generator, latent side first
    layer_activations: tuple[str, ...]  # deep_latent: activation after each layer, len(layers) + 1 names (empty: featu
    moment_samples: int  # Monte Carlo samples for Omega and Phi (deep_latent, trained_latent)
    generator: str  # trained_latent: name of a generator made by 'harness generator train'


@dataclass(frozen=True)
class TeacherSection(Section):
    """The [teacher] table."""

    hidden: int  # M, teacher hidden units
    activation: str  # teacher activation
    second_layer: tuple[float, ...]  # teacher second layer (default all ones)
    noise_std: float  # label noise standard deviation sigma
    init_std: float  # std of the teacher's i.i.d. Gaussian weights


@dataclass(frozen=True)
class StudentSection(Section):
    """The [student] table."""

    hidden: int  # K, student hidden units
    activation: str  # student activation
    init_std: float  # std of the student's i.i.d. Gaussian first-layer weights
    second_layer: tuple[float, ...]  # initial student second layer (default all ones)
    train_second_layer: bool  # train the second layer too


@dataclass(frozen=True)
class SgdSection(Section):
    """The [sgd] table."""

    learning_rate: float  # eta, first-layer learning rate
    second_layer_learning_rate: float  # eta_v (default: learning_rate)
    time: float  # training time t = steps / input_dim
    optimizer: str  # update rule
    momentum: float  # momentum beta (optimizer 'momentum')
    nesterov: bool  # Nesterov momentum (optimizer 'momentum')
    beta1: float  # first-moment decay (optimizer 'adam')
    beta2: float  # second-moment decay (optimizer 'adam')
    eps: float  # denominator offset (optimizer 'adam')
    weight_decay: float  # kappa: L2 penalty (kappa/2) sum_k |w_k|^2 / N + (kappa/2) |v|^2


@dataclass(frozen=True)
class RunSection(Section):
    """The [run] table."""

    seeds: int  # number of independent seeds
    evaluations: int  # number of evaluation times, t = 0 and the end included
    spacing: str  # spacing of evaluation times
    test_samples: int  # held-out samples per seed
    dtype: str  # simulation floating-point type
    seed: int  # base random seed
    shared_teacher: bool  # one teacher for all seeds
    block_steps: int  # SGD steps per drawn block of samples (0: automatic)
    engine: str  # 'full' trains the weights; 'chain' steps the order parameters exactly (i.i.d. Gaussian inputs, plain
    checkpoint_minutes: float  # minutes between saved checkpoints of a run's state (0: none)
    common_random_numbers: bool  # sweep points share weights, teachers and input streams (false: each point its own)


@dataclass(frozen=True)
class TheorySection(Section):
    """The [theory] table."""

    source: str  # where theory comes from
    rtol: float  # ODE solver relative tolerance
    atol: float  # ODE solver absolute tolerance
    limit: str  # latent theory: exact finite-N equations or the thermodynamic limit
    bins: int  # eigenvalue bins of the thermodynamic-limit latent theory


@dataclass(frozen=True)
class AgreementSection(Section):
    """The [agreement] table."""

    margin: float  # how close is close enough: fraction of an error's value at each time, and of an order-parameter gr
    floor: float  # an error curve's margin never falls below this fraction of its largest value
    alpha: float  # error rate of the verdict, joint over every time and observable


@dataclass(frozen=True)
class LandmarksSection(Section):
    """The [landmarks] table."""

    error: str  # the error curve whose landmarks are measured
    judged: tuple[str, ...]  # landmarks held against the theory (paired, with a verdict)
    plateau_slope: float  # largest |d ln eps / d ln t| on a plateau; also the fall that must precede it
    slope_window: float  # half-width in ln t of the difference quotient for d ln eps / d ln t
    plateau_min_span: float  # a plateau lasts at least this factor in t
    exit_fraction: float  # the plateau is left when eps falls to (1 - exit_fraction) x its height
    specialisation_threshold: float  # sigma_R (spread of R across student units, in [0, 1]) above which units are spec
    tail_fraction: float  # the last stretch (decay rate, asymptotic error) is t >= (1 - tail_fraction) t_end
    error_floor: float  # errors at or below this are numerical noise: no slopes, no fits there
    min_points: int  # fewest evaluations that resolve a plateau or a last stretch (else a warning)
    max_bracket_ratio: float  # largest t_after / t_before around a crossing time (else a warning)


class Scenario(ScenarioBase):
    """A resolved scenario (harness.core.scenario.resolve)."""

    data: DataSection
    teacher: TeacherSection
    student: StudentSection
    sgd: SgdSection
    run: RunSection
    theory: TheorySection
    agreement: AgreementSection
    landmarks: LandmarksSection


SECTION_TYPES: dict[str, type[Section]] = {
    "data": DataSection,
    "teacher": TeacherSection,
    "student": StudentSection,
    "sgd": SgdSection,
    "run": RunSection,
    "theory": TheorySection,
    "agreement": AgreementSection,
    "landmarks": LandmarksSection,
}

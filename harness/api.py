"""The Python API: what ``harness run`` / ``theory`` / ``sweep`` / ``scale`` do, for notebooks and scripts.

    import harness

    result = harness.run({"data": {"input_dim": 300}, "run": {"seeds": 16}}, out="results")
    result.verdict                      # "agree" / "disagree" / "inconclusive"
    result.metrics                      # per observable (pandas)
    result.figure().savefig("curve.pdf")
    again = harness.load_run(result.folder)

Every function accepts a scenario as a dict of tables, a path to a TOML file, an already
resolved :class:`~harness.core.sections.Scenario`, or None (the embedded default), and calls
:func:`harness.core.configure.configure` before its first computation.
"""

from __future__ import annotations

import json
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

import pandas as pd

from harness.core import scenario as scenario_lib
from harness.core.configure import configure
from harness.core.errors import InputError
from harness.core.sections import Scenario
from harness.core.trajectories import Trajectories, from_frame

if TYPE_CHECKING:
    from matplotlib.figure import Figure

ScenarioLike = Mapping[str, Any] | str | Path | None


def load_scenario(scenario: ScenarioLike = None) -> Scenario:
    """A resolved scenario from a dict of tables, a TOML file, a resolved scenario or None (the default).

    Raises:
        harness.core.scenario.ScenarioError: with one line naming the key and what is allowed.
    """
    if isinstance(scenario, Scenario):
        return scenario
    if scenario is None or isinstance(scenario, Mapping):
        return scenario_lib.resolve(scenario)
    return scenario_lib.load(scenario)


@dataclass(frozen=True)
class RunResult:
    """One run: its scenario, its verdict and its tables, in memory or read back from its folder."""

    run_id: str
    scenario: Scenario
    manifest: dict[str, Any]
    judgement: dict[str, Any]
    summary: pd.DataFrame
    metrics: pd.DataFrame
    trajectories: pd.DataFrame  # the long table: seed, t, observable, sim, theory
    folder: Path | None = None  # None: computed without writing anything

    @property
    def verdict(self) -> str:
        """The run's verdict (harness.results.judgement): agree, disagree, inconclusive or n/a."""
        return str(self.judgement.get("verdict", "n/a"))

    def arrays(self) -> Trajectories:
        """The trajectories as ``[seeds, times, observables]`` arrays."""
        return from_frame(self.trajectories, paired=bool(self.manifest.get("paired", True)))

    def to_xarray(self) -> Any:
        """An ``xarray.Dataset`` with variables ``sim`` and ``theory`` over (seed, t, observable).

        Needs the optional extra: ``pip install 'harness[xarray]'``.
        """
        try:
            import xarray
        except ModuleNotFoundError:
            raise InputError("to_xarray needs xarray: pip install 'harness[xarray]'") from None
        traj = self.arrays()
        coords = {"seed": traj.seeds, "t": traj.t, "observable": list(traj.observables)}
        dims = ("seed", "t", "observable")
        return xarray.Dataset(
            {"sim": (dims, traj.sim), "theory": (dims, traj.theory)}, coords=coords,
            attrs={"run_id": self.run_id, "verdict": self.verdict},
        )

    def figure(self, kind: str = "learning_curve") -> Figure:
        """A matplotlib figure of the run: ``"learning_curve"`` or ``"order_parameters"``."""
        from harness.plot import figures

        if kind == "learning_curve":
            return figures.plot_learning_curve(
                self.summary, trajectories=self.trajectories[self.trajectories["observable"] == "test_error"],
                verdict=f"test error: {self._group_verdict('test_error')} · run: {self.verdict}",
                landmarks=self.judgement.get("landmarks"),
            )
        if kind == "order_parameters":
            return figures.plot_order_parameters(self.summary)
        raise InputError(f"figure kind {kind!r}: expected 'learning_curve' or 'order_parameters'")

    def _group_verdict(self, group: str) -> str:
        return next((g["verdict"] for g in self.judgement.get("groups", []) if g["group"] == group), "n/a")


def _result(computed: Any, scenario: Scenario, folder: Path | None) -> RunResult:
    return RunResult(
        computed.run_id, scenario, computed.manifest, computed.judgement, computed.summary, computed.metrics,
        computed.trajectories, folder,
    )


def run(
    scenario: ScenarioLike = None,
    out: str | Path | None = None,
    *,
    force: bool = False,
    progress: Callable[[int, int], None] | None = None,
    theory: Callable[..., Any] | str | None = None,
) -> RunResult:
    """Simulate a scenario, pair it with its theory seed by seed, and judge the pair.

    Args:
        scenario: a dict of tables, a TOML path, a resolved scenario, or None (the default scenario).
        out: results folder; the run is stored in ``out/<run_id>/`` (reused if already there,
            unless ``force``). None: nothing is written.
        force: recompute a run already stored in ``out``.
        progress: ``progress(step, total)`` called as the simulation advances.
        theory: a theory to use instead of ``theory.source``: a function
            ``theory(scenario, start, times)`` returning ``{observable: [S, E] or [E]}``
            (harness.equations.user), or the name of a registered theory.

    Returns:
        The run, with its verdict, tables and (when stored) folder.
    """
    configure()
    resolved = _with_theory(load_scenario(scenario), theory)
    from harness.runner import pipeline

    if out is None:
        return _result(pipeline.compute_run(resolved, progress=progress), resolved, None)
    stored = pipeline.run_and_store(resolved, out, force=force, progress=progress)
    return load_run(stored.folder)


def theory(scenario: ScenarioLike = None, out: str | Path | None = None, *, force: bool = False) -> RunResult:
    """Solve the scenario's theory alone, from the initial conditions a run would draw.

    Args:
        scenario: as for :func:`run`.
        out: results folder (``out/<run_id>-theory/``), or None to write nothing.
        force: recompute a stored theory run.

    Returns:
        The theory run (its ``sim`` columns are NaN and its verdict is "n/a").
    """
    configure()
    resolved = load_scenario(scenario)
    from harness.runner import pipeline

    if out is None:
        return _result(pipeline.compute_theory(resolved), resolved, None)
    stored = pipeline.theory_and_store(resolved, out, force=force)
    return load_run(stored.folder)


def load_run(folder: str | Path) -> RunResult:
    """Read a stored run folder back (its verdict as stored in judgement.json).

    Raises:
        InputError: when the folder is not a complete run.
    """
    from harness.results.store import is_complete_run
    from harness.results.stored import read_judgement

    folder = Path(folder)
    if not is_complete_run(folder):
        raise InputError(f"run folder '{folder}': not a complete run (scenario.toml, manifest.json and its tables)")
    scenario = scenario_lib.load(folder / "scenario.toml")
    return RunResult(
        run_id=folder.name,
        scenario=scenario,
        manifest=json.loads((folder / "manifest.json").read_text()),
        judgement=read_judgement(folder) or {},
        summary=pd.read_parquet(folder / "summary.parquet"),
        metrics=pd.read_parquet(folder / "metrics.parquet"),
        trajectories=pd.read_parquet(folder / "trajectories.parquet"),
        folder=folder,
    )


def sweep(sweep_file: str | Path, out: str | Path | None = None, *, processes: int | None = None) -> Any:
    """Run every point of a sweep file in local worker processes (resuming finished points).

    Args:
        sweep_file: a scenario TOML file with a ``[sweep]`` table.
        out: results folder (default ``results/<sweep file name>/``).
        processes: worker processes (default: one per core).

    Returns:
        harness.studies.sweep.SweepOutcome (counts of computed, reused and failed points).
    """
    configure()
    from harness.studies import sweep as sweep_lib

    plan = sweep_lib.load_sweep(sweep_file)
    folder = Path(out) if out is not None else Path("results") / plan.source.stem
    return sweep_lib.run_sweep(plan, folder, sweep_lib.LocalExecutor(processes), show_progress=False)


def scale(scenario: ScenarioLike, sizes: Sequence[int], out: str | Path = "results", **options: Any) -> dict:
    """Run a scenario at several input sizes and judge whether its gap vanishes as N grows.

    Args:
        scenario: as for :func:`run`.
        sizes: the input sizes N (at least three).
        out: results folder.
        **options: ``observable`` (an observable's gap, or ``"landmark:plateau_exit"`` for a landmark's
            growth, harness.studies.landmark_scaling), ``resolution``, ``min_exponent``, ``force``
            (harness.studies.scaling).

    Returns:
        The verdict record that ``verdict.json`` holds ("consistent" / "inconsistent" / "inconclusive").
    """
    configure()
    from harness.studies import scaling

    return scaling.run_scaling(load_scenario(scenario), list(sizes), out, show_progress=False, **options)


def _with_theory(scenario: Scenario, theory: Callable[..., Any] | str | None) -> Scenario:
    """The scenario with ``theory.source`` naming ``theory`` (a callable is registered under its name)."""
    if theory is None:
        return scenario
    if callable(theory):
        from harness.equations.user import register_theory

        name = f"{getattr(theory, '__module__', 'theory')}.{getattr(theory, '__qualname__', 'theory')}"
        name = name.replace(":", ".").replace("<", "").replace(">", "")
        register_theory(name, theory)
        theory = name
    return scenario_lib.with_overrides(scenario, {"theory.source": theory})

"""A small but real results folder, made once per test session by the tool's own commands.

This is a plain module (not a pytest conftest) imported by the tests of what the tool
writes: file modes, strict formats, the report in a browser. Nothing here is hand-written
output: one tiny scenario (N = 20, 3 seeds, t = 1, 4 evaluations, 100 held-out samples) goes
through `harness run`, a finite-size scaling over N = 20, 30, 40 (the function behind
`harness scale`, which reuses the N = 20 run) and `harness report`; and, in a folder of its
own that the report does not draw (figures cost about 3 s a run), a two-point learning-rate
sweep (the sweep driver, its points computed in this process so the compiled programs are
shared). Everything is made under umask 022 so the file-mode test can check it. About 40 s
on a quiet 2-core machine, most of it compiling and drawing figures; made once
(``functools.cache``) in a temporary folder removed when the session ends.

Under pytest-xdist every worker process would make its own copy (40 s of a core each, and the
tests that read it land on every worker), so the workers of one test run share one: the first
to ask makes it under an exclusive lock while the others wait for it, then each reads back the
very objects the maker returned (pickled, so the scaling verdict keeps its NaNs and the
round-trip test still compares the file with what `run_scaling` returned, not with itself).
Nothing writes into the folder after it is made. The last worker process to end removes it.
"""

from __future__ import annotations

import atexit
import concurrent.futures
import fcntl
import functools
import os
import pickle
import shutil
import tempfile
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any, NamedTuple

TINY = """\
[data]
input_dim = 20

[sgd]
time = 1.0

[run]
seeds = 3
evaluations = 4
test_samples = 100
checkpoint_minutes = 0.0
"""

SWEEP = TINY + """
[sweep]
"sgd.learning_rate" = [0.3, 0.6]
"""

SIZES = "20,30,40"


@contextmanager
def umask(mask: int) -> Iterator[None]:
    """Run the body under ``mask`` (process-wide), then restore the previous umask."""
    previous = os.umask(mask)
    try:
        yield
    finally:
        os.umask(previous)


class InProcessExecutor:
    """The sweep driver's executor interface, computing points in a thread of this process.

    The sweep's own LocalExecutor starts fresh worker processes, each compiling anew (about
    25 s); here the points reuse what the run already compiled. Storing, records and the
    index are the sweep's own code either way.
    """

    def __init__(self) -> None:
        self._pool = concurrent.futures.ThreadPoolExecutor(1)

    def describe(self) -> str:
        return "in-process test executor"

    def prepare(self, points: int) -> None:
        pass

    def submit(self, task):
        from harness.studies.sweep import compute_point

        return self._pool.submit(compute_point, task)

    def wait(self, handles: list, timeout: float) -> list:
        done, _ = concurrent.futures.wait(handles, timeout=timeout, return_when=concurrent.futures.FIRST_COMPLETED)
        return list(done)

    def running(self, handles: list) -> int:
        return sum(handle.running() for handle in handles)

    def was_running(self, handle) -> bool:
        return True

    def outcome(self, handle):
        from harness.studies.sweep import Outcome

        try:
            return Outcome("ok", handle.result())
        except Exception as error:  # the point's own failure, as the sweep reports it
            return Outcome("error", f"{type(error).__name__}: {error}")

    def close(self) -> None:
        self._pool.shutdown(wait=True)


class RealResults(NamedTuple):
    root: Path  # the results folder given to `harness report`: the run and the scaling
    scenario_file: Path
    run_id: str  # the N = 20 run made by `harness run`
    verdict: dict[str, Any]  # what run_scaling returned (and wrote as verdict.json)
    scale_folder: Path
    sweep_folder: Path  # beside root, not in it
    sweep_plan: Any
    run_stdout: str


@functools.cache
def real_results() -> RealResults:
    """Make (once per test run) and return the shared results folder."""
    run = os.environ.get("PYTEST_XDIST_TESTRUNUID")  # the same in every xdist worker of one run
    if not run:
        base = Path(tempfile.mkdtemp(prefix="harness-real-results-"))
        atexit.register(shutil.rmtree, base, True)
        return _make(base)
    base = Path(tempfile.gettempdir()) / f"harness-real-results-{run}"
    base.mkdir(exist_ok=True)
    users = open(base.parent / f"{base.name}.users", "a+")  # noqa: SIM115 (held until this process ends)
    fcntl.flock(users, fcntl.LOCK_SH)  # this process uses the folder ...
    atexit.register(_remove_if_last, base, users)  # ... until it ends
    made = base / "made.pickle"
    with open(base.parent / f"{base.name}.lock", "a+") as lock:
        fcntl.flock(lock, fcntl.LOCK_EX)  # one maker; the others wait here for it
        if not made.is_file():  # (a maker that failed left no pickle: this one starts afresh beside it)
            results = _make(Path(tempfile.mkdtemp(prefix="made-", dir=base)))
            temporary = made.with_suffix(".partial")
            temporary.write_bytes(pickle.dumps(results))
            temporary.replace(made)
    return pickle.loads(made.read_bytes())


def _remove_if_last(base: Path, users) -> None:
    """Remove the shared folder if no other process holds it (their shared locks end with them)."""
    with users:
        try:
            fcntl.flock(users, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            return  # another worker still uses it; the last one removes it
        shutil.rmtree(base, ignore_errors=True)
        for name in (f"{base.name}.users", f"{base.name}.lock"):
            (base.parent / name).unlink(missing_ok=True)


def _make(base: Path) -> RealResults:
    import contextlib
    import io

    from harness.cli.main import main
    from harness.core import scenario as scenario_lib
    from harness.studies import scaling, sweep

    root = base / "results"
    scenario_file = base / "tiny.toml"
    scenario_file.write_text(TINY)
    sweep_file = base / "lr.toml"
    sweep_file.write_text(SWEEP)
    with umask(0o022):
        printed = io.StringIO()
        with contextlib.redirect_stdout(printed):
            status = main(["run", str(scenario_file), "--out", str(root), "--quiet"])
        assert status in (0, 1, 3), printed.getvalue()  # a verdict (3 seeds: mostly inconclusive), not bad input
        scenario = scenario_lib.load(scenario_file)
        run_id = scenario_lib.run_id(scenario)
        verdict = scaling.run_scaling(
            scenario, scaling.parse_sizes(SIZES), root, log=io.StringIO(), show_progress=False
        )
        plan = sweep.load_sweep(sweep_file)
        sweep_folder = base / "lr-sweep"
        outcome = sweep.run_sweep(plan, sweep_folder, InProcessExecutor(), show_progress=False, stream=io.StringIO())
        assert outcome.ok and outcome.computed == 2, outcome
        with contextlib.redirect_stdout(io.StringIO()):
            assert main(["report", str(root)]) == 0
    return RealResults(
        root, scenario_file, run_id, verdict, root / verdict["scale_id"], sweep_folder, plan, printed.getvalue()
    )

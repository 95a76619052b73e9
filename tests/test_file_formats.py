"""What the tool writes, read back: file modes follow the umask, JSON is strict, tables round-trip.

Every file checked here was made by the tool's own commands and writers on real (tiny) runs
(tests/real_results.py), never a hand-written copy. JSON is parsed with a strict parser:
RFC 8259 has no NaN or Infinity, and many readers (browsers' JSON.parse, jq, R's jsonlite,
Julia's JSON3) refuse them, so ``json.loads`` is given a ``parse_constant`` that raises.
"""

from __future__ import annotations

import ast
import json
import math
import stat
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
from real_results import TINY, real_results, umask

from harness.cli.main import main
from harness.core import scenario as scenario_lib
from harness.core.files import nulls_as_nan
from harness.results.store import INDEX_NAME, RUN_FILES, read_index
from harness.runner import experiment, pipeline
from harness.runner.checkpoint import FILE_NAME as CHECKPOINT_FILE
from harness.runner.checkpoint import FINISHED_NAME, checkpoint_folder
from harness.studies import sweep

REPO = Path(__file__).resolve().parents[1]


def strict_json(text: str) -> Any:
    """Parse JSON refusing the non-standard constants NaN, Infinity and -Infinity."""

    def refuse(constant: str) -> None:
        raise ValueError(f"non-standard JSON constant {constant}")

    return json.loads(text, parse_constant=refuse)


def same(written: Any, read: Any, where: str = "") -> None:
    """Assert ``read`` (strict JSON with nulls as NaN, or a table row) equals ``written``.

    A non-finite number or None written reads back as NaN (JSON has no infinity); tuples read
    as lists; numpy values compare as plain numbers. Floats must be equal exactly: JSON's
    shortest repr of a double round-trips (Python's float repr, common practice, no source).
    """
    if isinstance(written, np.ndarray | np.generic):
        written = written.tolist()
    if isinstance(written, dict):
        assert isinstance(read, dict) and set(map(str, written)) == set(map(str, read)), where
        by_text = {str(key): value for key, value in read.items()}
        for key, value in written.items():
            same(value, by_text[str(key)], f"{where}.{key}")
    elif isinstance(written, list | tuple):
        assert isinstance(read, list | tuple | np.ndarray) and len(read) == len(written), where
        for index, (a, b) in enumerate(zip(written, read, strict=True)):
            same(a, b, f"{where}[{index}]")
    elif written is None or (isinstance(written, float) and not math.isfinite(written)):
        assert isinstance(read, float) and math.isnan(read), f"{where}: {read!r} for {written!r}"
    elif isinstance(written, bool):
        assert isinstance(read, bool | np.bool_) and read == written, f"{where}: {read!r} != {written!r}"
    elif isinstance(written, str):
        assert isinstance(read, str) and read == written, f"{where}: {read!r} != {written!r}"
    else:
        assert not isinstance(read, bool | np.bool_ | str) and read == written, f"{where}: {read!r} != {written!r}"


def has_non_finite(value: Any) -> bool:
    if isinstance(value, dict):
        return any(has_non_finite(item) for item in value.values())
    if isinstance(value, list | tuple):
        return any(has_non_finite(item) for item in value)
    return isinstance(value, float) and not math.isfinite(value)


def modes(root: Path) -> dict[str, int]:
    return {str(path.relative_to(root)): stat.S_IMODE(path.lstat().st_mode) for path in [root, *root.rglob("*")]}


def assert_modes(root: Path, file_mode: int, folder_mode: int) -> None:
    found = modes(root)
    wrong = {
        name: oct(mode) for name, mode in found.items()
        if mode != (folder_mode if (root / name).is_dir() else file_mode)
    }
    assert not wrong, f"expected files {oct(file_mode)} and folders {oct(folder_mode)}; got {wrong}"
    assert not [name for name in found if name.endswith(".partial")]  # nothing half-written left


# ----------------------------------------------------------------------------- modes


def test_everything_a_run_scaling_sweep_and_report_write_follows_umask_022():
    results = real_results()  # made under umask 022
    kinds = {path.suffix for path in results.root.rglob("*") if path.is_file()}
    assert {".json", ".parquet", ".toml", ".png", ".pdf", ".html"} <= kinds  # every kind of output is there
    assert_modes(results.root, 0o644, 0o755)
    assert_modes(results.sweep_folder, 0o644, 0o755)


def test_a_run_and_its_report_under_umask_027_are_0640_and_0750(tmp_path):
    scenario = tmp_path / "tiny.toml"
    scenario.write_text(TINY)
    out = tmp_path / "results"
    with umask(0o027):
        assert main(["run", str(scenario), "--out", str(out), "--quiet"]) in (0, 1, 3)  # a verdict, not bad input
        assert main(["report", str(out)]) == 0
    assert (out / "index.html").is_file() and list(out.glob("*/figures/*.png"))
    assert_modes(out, 0o640, 0o750)


# ------------------------------------------------------------------- strict JSON files


def test_every_json_file_in_the_results_is_strict_json():
    results = real_results()
    found = sorted([*results.root.rglob("*.json"), *results.sweep_folder.rglob("*.json")])
    names = {path.name for path in found}
    assert {"manifest.json", "verdict.json", "sweep.json"} <= names
    for path in found:
        strict_json(path.read_text(encoding="utf-8"))  # raises on NaN / Infinity


def test_the_scaling_verdict_round_trips_with_null_for_undetermined_numbers():
    results = real_results()
    text = (results.scale_folder / "verdict.json").read_text()
    same(results.verdict, nulls_as_nan(strict_json(text)), "verdict")
    # The figure and page readers cope with the nulls: the report drew the scaling figure.
    assert (results.scale_folder / "figures" / "scaling.png").is_file()


def test_the_sweep_record_names_every_point_its_run_and_status():
    results = real_results()
    record = strict_json((results.sweep_folder / "sweep.json").read_text())
    plan = results.sweep_plan
    same(plan.points, record["points"], "points")
    assert record["run_ids"] == plan.run_ids and record["swept_keys"] == plan.swept_keys
    assert record["status"] == ["computed", "computed"] and record["counts"]["computed"] == 2
    index = read_index(results.sweep_folder)
    assert sorted(index["run_id"]) == sorted(plan.run_ids)


def test_a_run_and_a_theory_run_round_trip_through_their_files(tmp_path):
    """Every file of a run folder and its index row read back equal to what was computed."""
    real_results()  # compiled programs shared with the other tests
    scenario = scenario_lib.load(real_results().scenario_file)
    out = tmp_path / "out"
    computed = pipeline.compute_run(scenario)
    stored = pipeline.store_run(computed, out)
    assert sorted(path.name for path in stored.folder.iterdir()) == sorted([*RUN_FILES, "judgement.json",
                                                                           "landmarks.parquet"])
    same(computed.judgement, nulls_as_nan(strict_json((stored.folder / "judgement.json").read_text())), "judgement")
    same(computed.manifest, nulls_as_nan(strict_json((stored.folder / "manifest.json").read_text())), "manifest")
    for name, frame in (("trajectories", computed.trajectories), ("summary", computed.summary),
                        ("metrics", computed.metrics), ("landmarks", computed.landmarks)):
        pd.testing.assert_frame_equal(pd.read_parquet(stored.folder / f"{name}.parquet"), frame, check_exact=True)
    assert scenario_lib.load(stored.folder / "scenario.toml") == scenario
    assert scenario_lib.run_id(scenario_lib.load(stored.folder / "scenario.toml")) == stored.folder.name
    row = read_index(out).set_index("run_id").loc[computed.run_id]
    same({k: v for k, v in computed.index_row.items() if k != "run_id"}, row.to_dict(), "runs.parquet")

    # The theory alone, where no simulation is stored: its simulation columns are NaN, which
    # Parquet keeps as NaN.
    theory = pipeline.theory_and_store(scenario, tmp_path / "alone")
    for name in ("trajectories", "summary"):
        frame = pd.read_parquet(theory.folder / f"{name}.parquet")
        assert frame[[c for c in frame.columns if c.startswith("sim")]].isna().all().all()
    same(theory.manifest, nulls_as_nan(strict_json((theory.folder / "manifest.json").read_text())), "theory")

    # Beside the stored run, the theory run is paired with that run's simulation.
    paired = pipeline.theory_and_store(scenario, out)
    frame = pd.read_parquet(paired.folder / "trajectories.parquet")
    pd.testing.assert_series_equal(frame["sim"], computed.trajectories["sim"])
    same(paired.manifest, nulls_as_nan(strict_json((paired.folder / "manifest.json").read_text())), "paired")


def test_a_set_aside_index_row_is_strict_and_restores_nan_metrics(tmp_path, monkeypatch):
    """A sweep killed between publishing a point's folder and indexing it: the row set aside
    (JSON, with null for a run that never departs) is added by the next sweep as NaN, not None."""
    plan = real_results().sweep_plan
    out = tmp_path / "sweep"
    computed = pipeline.compute_run(plan.scenarios[0])
    assert has_non_finite(computed.index_row)  # e.g. the divergence time of a run that never departs

    def killed(*args, **kwargs):
        raise OSError("killed before the index row was added")

    monkeypatch.setattr(pipeline, "append_index_row", killed)
    with pytest.raises(OSError, match="killed"):
        sweep._store(computed, out)
    monkeypatch.undo()
    set_aside = checkpoint_folder(out, computed.run_id) / "index_row.json"
    same(computed.index_row, nulls_as_nan(strict_json(set_aside.read_text())), "index_row.json")
    assert not (out / INDEX_NAME).exists()

    status = ["pending"] * len(plan.points)
    assert sweep._take_stock(plan, out, status) == [1] and status[0] == "reused"
    index = read_index(out)
    same({k: v for k, v in computed.index_row.items() if k != "run_id"},
         index.set_index("run_id").loc[computed.run_id].to_dict(), "runs.parquet")
    for key, value in computed.index_row.items():
        if isinstance(value, float):
            assert index[key].dtype == np.float64, key


def test_checkpoint_metadata_is_strict_json(tmp_path, monkeypatch):
    scenario = scenario_lib.with_overrides(
        scenario_lib.load(real_results().scenario_file), {"run.checkpoint_minutes": 1e-9}  # save at every chance
    )
    folder = tmp_path / "checkpoints"
    with umask(0o022), monkeypatch.context() as patch:
        # a finished simulation replaces the mid-run checkpoint: keep the latter to read it
        patch.setattr(experiment, "save_finished", lambda *args, **kwargs: None)
        pipeline.compute_run(scenario, checkpoint_dir=folder)
    path = folder / CHECKPOINT_FILE
    with np.load(path, allow_pickle=False) as saved:
        meta = strict_json(saved["meta"].tobytes().decode("utf-8"))
    assert meta["run_id"] == scenario_lib.run_id(scenario) and meta["evaluations_done"] >= 1
    assert stat.S_IMODE(path.stat().st_mode) == 0o644

    with umask(0o022):
        pipeline.compute_run(scenario, checkpoint_dir=folder)  # resumes, finishes, keeps the finished simulation
    path = folder / FINISHED_NAME
    with np.load(path, allow_pickle=False) as saved:
        meta = strict_json(saved["meta"].tobytes().decode("utf-8"))
    assert meta["run_id"] == scenario_lib.run_id(scenario) and not (folder / CHECKPOINT_FILE).exists()
    assert stat.S_IMODE(path.stat().st_mode) == 0o644


def test_a_saved_baseline_manifest_is_strict_json(tmp_path):
    real_results()
    store = tmp_path / "baselines"
    assert main(["baseline", "save", str(real_results().scenario_file), "--dir", str(store)]) == 0
    manifest = strict_json((store / "tiny" / "manifest.json").read_text())
    assert manifest["name"] == "tiny"


# ------------------------------------------------- the report reads what the writers write


def _manifest_keys_read_by_report() -> set[str]:
    """Every constant key the report looks up in a manifest: ``….manifest.get("k")``/``….manifest["k"]``."""
    tree = ast.parse((REPO / "harness" / "plot" / "report.py").read_text())
    keys = set()
    for node in ast.walk(tree):
        if (isinstance(node, ast.Call) and isinstance(node.func, ast.Attribute) and node.func.attr == "get"
                and isinstance(node.func.value, ast.Attribute) and node.func.value.attr == "manifest"
                and node.args and isinstance(node.args[0], ast.Constant)):
            keys.add(node.args[0].value)
        if (isinstance(node, ast.Subscript) and isinstance(node.value, ast.Attribute)
                and node.value.attr == "manifest" and isinstance(node.slice, ast.Constant)):
            keys.add(node.slice.value)
    return keys


def test_every_manifest_field_the_report_shows_is_written_by_the_run_and_theory_writers(tmp_path):
    keys = _manifest_keys_read_by_report()
    assert {"seeds", "timings"} <= keys  # the parse found the manifest table of a run card
    results = real_results()
    manifest = strict_json((results.root / results.run_id / "manifest.json").read_text())
    missing = keys - set(manifest)
    assert not missing, f"the report reads manifest key(s) {sorted(missing)} that `harness run` never writes"
    theory = pipeline.theory_and_store(scenario_lib.load(results.scenario_file), tmp_path)
    missing = keys - set(strict_json((theory.folder / "manifest.json").read_text()))
    assert not missing, f"the report reads manifest key(s) {sorted(missing)} that `harness theory` never writes"
    # ... and the page shows the start time, not a dash.
    page = (results.root / "index.html").read_text()
    assert manifest["started"] in page

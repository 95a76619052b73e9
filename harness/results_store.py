"""The results store: run folders and the run index ``runs.parquet``, written atomically.

Nothing here is ever half-written. Single files are written to a temporary name in the
same folder and moved into place with ``os.replace`` (atomic on POSIX). A run folder is
assembled under a hidden temporary name and renamed into place only when every file in
it is complete, so a folder named after a run_id is always a complete run. The index
``runs.parquet`` is rewritten under an exclusive lock, so concurrent writers (a sweep's
points finishing together) never lose a row.

Temporary names end in ``.partial`` and carry their writer's host and process id, so that
a later process can tell the leftovers of a killed writer (:func:`is_abandoned`) from the
work in progress of a live one.
"""

from __future__ import annotations

import fcntl
import io
import json
import os
import re
import shutil
import socket
import tempfile
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import pandas as pd

RUN_FILES = ("scenario.toml", "manifest.json", "trajectories.parquet", "summary.parquet", "metrics.parquet")
INDEX_NAME = "runs.parquet"


def _host_tag() -> str:
    return re.sub(r"[^A-Za-z0-9_]", "_", socket.gethostname()) or "host"


def _temporary_prefix(name: str) -> str:
    """``.NAME.HOST-PID.``: the start of a temporary name (a random part and ``.partial`` follow)."""
    return f".{name}.{_host_tag()}-{os.getpid()}."


_TEMPORARY_NAME = re.compile(r"\.(?P<host>[A-Za-z0-9_]+)-(?P<pid>[0-9]+)\.[A-Za-z0-9_]+\.partial$")


def is_abandoned(path: str | Path) -> bool:
    """True for a temporary ``.partial`` name whose writer was a process of this host that has ended.

    False when in doubt (another host, a live process, an unknown name): only age can tell then.
    """
    match = _TEMPORARY_NAME.search(Path(path).name)
    if match is None or match["host"] != _host_tag():
        return False
    pid = int(match["pid"])
    if pid == os.getpid():
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return True
    except OSError:  # exists but not ours to signal
        return False
    return False


def atomic_write_bytes(path: str | Path, data: bytes) -> None:
    """Write ``data`` to ``path`` so that readers see the old file or the new one, never a part."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    handle, temporary = tempfile.mkstemp(prefix=_temporary_prefix(path.name), suffix=".partial", dir=path.parent)
    try:
        with os.fdopen(handle, "wb") as stream:
            stream.write(data)
            stream.flush()
            os.fsync(stream.fileno())
        os.replace(temporary, path)
    except BaseException:
        Path(temporary).unlink(missing_ok=True)
        raise


def atomic_write_text(path: str | Path, text: str) -> None:
    atomic_write_bytes(path, text.encode("utf-8"))


def atomic_write_json(path: str | Path, value: Any) -> None:
    atomic_write_text(path, json.dumps(value, indent=2, sort_keys=False, default=_json_default) + "\n")


def atomic_write_parquet(path: str | Path, frame: pd.DataFrame) -> None:
    buffer = io.BytesIO()
    frame.to_parquet(buffer, index=False)
    atomic_write_bytes(path, buffer.getvalue())


def _json_default(value: Any) -> Any:
    if hasattr(value, "tolist"):
        return value.tolist()
    if hasattr(value, "item"):
        return value.item()
    raise TypeError(f"cannot write {type(value).__name__} as JSON")


def is_complete_run(folder: str | Path) -> bool:
    """A run folder is complete when it exists under its final name with every file."""
    folder = Path(folder)
    return folder.is_dir() and all((folder / name).is_file() for name in RUN_FILES)


def publish_folder(staging: Path, final: Path, *, replace: bool) -> None:
    """Move a fully written staging folder to its final name in one rename."""
    if final.exists():
        if not replace:
            shutil.rmtree(staging, ignore_errors=True)
            raise FileExistsError(f"'{final}' already exists")
        retired = final.with_name(f".{final.name}.retired-{os.getpid()}")
        os.replace(final, retired)
        os.replace(staging, final)
        shutil.rmtree(retired, ignore_errors=True)
    else:
        os.replace(staging, final)


@contextmanager
def staging_folder(out_dir: str | Path, name: str) -> Iterator[Path]:
    """A hidden folder in ``out_dir`` to assemble results in; removed if anything fails."""
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    staging = Path(tempfile.mkdtemp(prefix=_temporary_prefix(name), suffix=".partial", dir=out_dir))
    try:
        yield staging
    except BaseException:
        shutil.rmtree(staging, ignore_errors=True)
        raise


def write_run_folder(
    out_dir: str | Path,
    name: str,
    *,
    scenario_toml: str,
    manifest: dict[str, Any],
    trajectories: pd.DataFrame,
    summary: pd.DataFrame,
    metrics: pd.DataFrame,
    judgement: dict[str, Any] | None = None,
    replace: bool = False,
) -> Path:
    """Write the files of a run and publish the folder ``out_dir/name`` atomically.

    ``judgement.json`` (the verdict, harness.judgement) is derived from the trajectories and
    can be rewritten later, so it is not one of the :data:`RUN_FILES` that make a run complete.
    """
    final = Path(out_dir) / name
    with staging_folder(out_dir, name) as staging:
        atomic_write_text(staging / "scenario.toml", scenario_toml)
        atomic_write_parquet(staging / "trajectories.parquet", trajectories)
        atomic_write_parquet(staging / "summary.parquet", summary)
        atomic_write_parquet(staging / "metrics.parquet", metrics)
        atomic_write_json(staging / "manifest.json", manifest)
        if judgement is not None:
            atomic_write_json(staging / "judgement.json", judgement)
        publish_folder(staging, final, replace=replace)
    return final


@contextmanager
def _index_lock(out_dir: Path) -> Iterator[None]:
    out_dir.mkdir(parents=True, exist_ok=True)
    with open(out_dir / ".runs.lock", "a+") as lock:
        fcntl.flock(lock, fcntl.LOCK_EX)
        try:
            yield
        finally:
            fcntl.flock(lock, fcntl.LOCK_UN)


def _remove_index_copies(out_dir: Path) -> None:
    """Delete temporary copies of the index that killed writers left (call with the lock held).

    Every writer of ``runs.parquet`` holds the index lock while its copy exists, and a
    killed process's lock is released by the kernel; so while we hold the lock, any copy
    found is a leftover, however young.
    """
    for leftover in out_dir.glob(f".{INDEX_NAME}.*.partial"):
        leftover.unlink(missing_ok=True)


def remove_index_leftovers(out_dir: str | Path) -> None:
    """Delete the index's temporary copies that killed writers left in ``out_dir`` (if it exists)."""
    out_dir = Path(out_dir)
    if out_dir.is_dir():
        with _index_lock(out_dir):
            _remove_index_copies(out_dir)


def append_index_row(out_dir: str | Path, row: dict[str, Any], *, key: str = "run_id") -> None:
    """Add ``row`` to ``out_dir/runs.parquet``, replacing an earlier row with the same key."""
    out_dir = Path(out_dir)
    with _index_lock(out_dir):
        _remove_index_copies(out_dir)
        path = out_dir / INDEX_NAME
        new = pd.DataFrame([row])
        if path.exists():
            old = pd.read_parquet(path)
            if key in old.columns:
                old = old[old[key] != row[key]]
            frames = [frame for frame in (old, new) if not frame.empty]
            new = pd.concat(frames, ignore_index=True) if len(frames) > 1 else frames[0]
        atomic_write_parquet(path, new)


def read_index(out_dir: str | Path) -> pd.DataFrame:
    """The run index of a results folder (empty if there is none yet)."""
    path = Path(out_dir) / INDEX_NAME
    return pd.read_parquet(path) if path.exists() else pd.DataFrame()

"""Files written atomically, and strict JSON: the one way every part of the tool writes.

Nothing here is ever half-written. Single files are written to a temporary name in the
same folder and moved into place with ``os.replace`` (atomic on POSIX). A folder of files
is assembled under a hidden temporary name (:func:`staging_folder`) and renamed into place
only when every file in it is complete (:func:`publish_folder`).

Temporary names end in ``.partial`` and carry their writer's host and process id, so that
a later process can tell the leftovers of a killed writer (:func:`is_abandoned`) from the
work in progress of a live one. Temporary files and folders are created with ``os.open``
(mode 0666) and ``os.mkdir`` (mode 0777) rather than ``tempfile.mkstemp``/``mkdtemp``
(0600/0700), so the kernel applies the user's umask: under the usual umask 022 results are
0644 files in 0755 folders, readable by the colleagues the user shares them with. The
rename keeps the mode, and no umask is read or changed (changing it is process-wide).

JSON is written strictly (RFC 8259: no ``NaN`` or ``Infinity``, which many readers
refuse): :func:`strict_json_value` turns every non-finite float into ``null`` and numpy
or JAX values into plain numbers and lists, recursively. ``null`` is written for nothing
else, so in files of numbers (verdicts, index rows) a reader may map every ``null`` back
to NaN: :func:`read_json` with ``null_as_nan=True``. Reading stays lenient: files from
older versions with bare ``NaN`` still load.
"""

from __future__ import annotations

import io
import json
import math
import os
import re
import secrets
import shutil
import socket
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import pandas as pd

from harness.core import interrupts


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


def _create_temporary(parent: Path, name: str, create: Callable[[Path], object]) -> tuple[Path, object]:
    """Create a fresh ``.NAME.HOST-PID.RANDOM.partial`` in ``parent`` with ``create`` (which must
    fail with FileExistsError if the name is taken); return its path and what ``create`` returned."""
    prefix = _temporary_prefix(name)
    for _ in range(100):
        candidate = parent / f"{prefix}{secrets.token_hex(6)}.partial"
        try:
            return candidate, create(candidate)
        except FileExistsError:
            continue
    raise FileExistsError(f"no free temporary name for '{parent / name}'")


def atomic_write_bytes(path: str | Path, data: bytes) -> None:
    """Write ``data`` to ``path`` so that readers see the old file or the new one, never a part.

    The file's mode is 0666 less the umask, like any file the user creates.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    flags = os.O_WRONLY | os.O_CREAT | os.O_EXCL | getattr(os, "O_CLOEXEC", 0)
    with interrupts.writing():  # a Ctrl-C's watchdog lets the write finish (harness.core.interrupts)
        temporary, handle = _create_temporary(path.parent, path.name, lambda name: os.open(name, flags, 0o666))
        try:
            with os.fdopen(handle, "wb") as stream:
                stream.write(data)
                stream.flush()
                os.fsync(stream.fileno())
            os.replace(temporary, path)
        except BaseException:
            temporary.unlink(missing_ok=True)
            raise


def atomic_write_text(path: str | Path, text: str) -> None:
    atomic_write_bytes(path, text.encode("utf-8"))


def strict_json_value(value: Any) -> Any:
    """``value`` made fit for strict JSON: non-finite floats become None, numpy/JAX values plain.

    Recurses into dicts, lists and tuples; arrays become (nested) lists. Anything else is
    returned unchanged, for :func:`json.dumps` to accept (str, int, bool, None) or refuse.
    """
    if isinstance(value, dict):
        return {_plain_key(key): strict_json_value(item) for key, item in value.items()}
    if isinstance(value, (list, tuple)):
        return [strict_json_value(item) for item in value]
    if isinstance(value, (str, bool, int)) or value is None:
        return value
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if hasattr(value, "tolist"):  # numpy/JAX arrays and scalars: plain lists, floats, ints, bools
        return strict_json_value(value.tolist())
    if hasattr(value, "item"):
        return strict_json_value(value.item())
    return value


def _plain_key(key: Any) -> Any:
    return key.item() if hasattr(key, "item") else key


def json_text(value: Any, *, indent: int | None = 2) -> str:
    """Strict JSON text of ``value`` (see :func:`strict_json_value`); TypeError for what JSON cannot hold."""
    return json.dumps(strict_json_value(value), indent=indent, allow_nan=False)


def atomic_write_json(path: str | Path, value: Any) -> None:
    atomic_write_text(path, json_text(value) + "\n")


def nulls_as_nan(value: Any) -> Any:
    """Every ``None`` in ``value`` (recursively, in dicts and lists) replaced by NaN."""
    if value is None:
        return math.nan
    if isinstance(value, dict):
        return {key: nulls_as_nan(item) for key, item in value.items()}
    if isinstance(value, list):
        return [nulls_as_nan(item) for item in value]
    return value


def read_json(path: str | Path, *, null_as_nan: bool = False) -> Any:
    """Parse a JSON file; with ``null_as_nan`` every ``null`` reads as NaN (files of numbers).

    Raises OSError if the file cannot be read and ``json.JSONDecodeError`` (a ValueError) if it
    is not JSON. Bare ``NaN``/``Infinity`` that older versions wrote are still accepted.
    """
    value = json.loads(Path(path).read_text(encoding="utf-8"))
    return nulls_as_nan(value) if null_as_nan else value


def atomic_write_parquet(path: str | Path, frame: pd.DataFrame) -> None:
    buffer = io.BytesIO()
    frame.to_parquet(buffer, index=False)
    atomic_write_bytes(path, buffer.getvalue())


def publish_folder(staging: Path, final: Path, *, replace: bool, keep: Sequence[str] = ()) -> None:
    """Move a fully written staging folder to its final name in one rename.

    With ``replace``, an existing ``final`` is renamed aside first and removed after the
    swap; the entries named in ``keep`` (e.g. ``"figures"``) that it holds and the new folder
    does not are moved into the new folder before that, so they survive the replacement.
    """
    if final.exists():
        if not replace:
            shutil.rmtree(staging, ignore_errors=True)
            raise FileExistsError(f"'{final}' already exists")
        retired = final.with_name(f".{final.name}.retired-{os.getpid()}")
        os.replace(final, retired)
        os.replace(staging, final)
        for name in keep:
            if (retired / name).exists() and not (final / name).exists():
                os.replace(retired / name, final / name)
        shutil.rmtree(retired, ignore_errors=True)
    else:
        os.replace(staging, final)


@contextmanager
def staging_folder(out_dir: str | Path, name: str) -> Iterator[Path]:
    """A hidden folder in ``out_dir`` to assemble results in; removed if anything fails.

    Its mode is 0777 less the umask, like any folder the user creates, and the rename that
    publishes it keeps that mode.
    """
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    with interrupts.writing():  # until published or removed (harness.core.interrupts)
        staging, _ = _create_temporary(out_dir, name, lambda candidate: os.mkdir(candidate, 0o777))
        try:
            yield staging
        except BaseException:
            shutil.rmtree(staging, ignore_errors=True)
            raise



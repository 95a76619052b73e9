"""Where a command will write, checked before it does any work.

Every command that writes (a run's ``--out``, a sweep's results folder, the folder a figure
goes into, a baseline store, a generator store, a preview image) checks its destination
with the scenario and the other arguments, before anything is computed: a run that
simulates for an hour and then cannot store its results has wasted the hour. The checks,
each a one-line :class:`InputError` naming the option and the path (exit status 2):

* the destination, or a folder on its way, exists as a file (``--out results.txt``);
* the nearest folder that exists cannot be written into (no permission, or a read-only
  file system: ``os.access`` and ``os.statvfs``; a missing folder is created later, so its
  nearest existing ancestor is what has to be writable);
* the disk holding it has less than :data:`MIN_FREE_BYTES` free (``shutil.disk_usage``).

The free-space floor is a plain number, not an estimate of what the command will write: a
run folder of the default scenario takes about 0.2 MB, and its trajectory table grows by
about 40 bytes per (seed, evaluation, observable), so 64 seeds x 200 evaluations x 30
observables make about 15 MB. :data:`MIN_FREE_BYTES` = 32 MiB covers that with room for the
temporary copy that an atomic write keeps until its rename. A disk that fills up during
the work cannot be foreseen; the atomic writers then leave nothing half-written.

Nothing here creates or changes anything on disk.
"""

from __future__ import annotations

import errno
import os
import shutil
from pathlib import Path

from harness.core.errors import InputError

MIN_FREE_BYTES = 32 * 2**20
"""Free space a destination's disk must have before work starts (module docstring)."""


def _shown(path: Path | str) -> str:
    text = str(path)
    return text if text.isprintable() else repr(text)[1:-1]


def _nearest_existing(path: Path) -> Path:
    """``path`` itself if it exists, else its closest ancestor that does (at worst the root)."""
    current = path
    while not current.exists() and current != current.parent:
        current = current.parent
    return current


def _blocking_file(path: Path) -> Path | None:
    """The first component of ``path`` (``path`` included) that exists and is not a folder."""
    for part in reversed((path, *path.parents)):
        if part.exists() and not part.is_dir():
            return part
    return None


def _cannot_write(folder: Path) -> str | None:
    """Why nothing can be created in the existing ``folder``, or None if something can."""
    try:
        if os.statvfs(folder).f_flag & os.ST_RDONLY:
            return "read-only file system"
    except OSError as error:
        return os.strerror(error.errno or errno.EIO).lower()
    if not os.access(folder, os.W_OK | os.X_OK):
        return "permission denied"
    return None


def _check_space(option: str, path: Path, folder: Path, needed_bytes: int) -> None:
    try:
        free = shutil.disk_usage(folder).free
    except OSError:
        return  # the space cannot be known here; the atomic writers still leave nothing half-written
    if free < needed_bytes:
        raise InputError(
            f"{option} '{_shown(path)}': only {free / 2**20:.1f} MB free on its disk, at least "
            f"{needed_bytes / 2**20:.0f} MB needed before starting; free some space or choose another place"
        )


def check_output_folder(path: str | Path, option: str, *, needed_bytes: int = MIN_FREE_BYTES) -> Path:
    """Refuse, in one line naming ``option``, a folder that cannot be created or written into.

    ``path`` may not exist yet (it is created when the command writes). Returns it as a Path.
    """
    path = Path(path)
    _check_folder(path, option, path, needed_bytes)
    return path


def _check_folder(folder: Path, option: str, named: Path, needed_bytes: int) -> None:
    """The checks of :func:`check_output_folder` on ``folder``, the message naming ``named``."""
    absolute = folder.absolute()
    blocker = _blocking_file(absolute)
    if blocker is not None:
        where = "is a file" if blocker == named.absolute() else f"is inside '{_shown(blocker)}', which is a file"
        expected = "a folder (created if it does not exist)" if named == folder else "a file name"
        raise InputError(f"{option} '{_shown(named)}' {where}; expected {expected}")
    existing = _nearest_existing(absolute)
    why = _cannot_write(existing)
    if why is not None:
        raise InputError(f"{option} '{_shown(named)}': cannot write in '{_shown(existing)}' ({why}); "
                         "choose a place you can write to")
    _check_space(option, named, existing, needed_bytes)


def check_output_file(path: str | Path, option: str, *, needed_bytes: int = MIN_FREE_BYTES) -> Path:
    """Refuse, in one line naming ``option``, a file path that cannot be written (replaced if it exists)."""
    path = Path(path)
    if path.is_dir():
        raise InputError(f"{option} '{_shown(path)}' is a folder; expected a file name")
    _check_folder(path.parent, option, path, needed_bytes)
    if path.exists() and not os.access(path, os.W_OK):
        raise InputError(f"{option} '{_shown(path)}': cannot replace it (permission denied)")
    return path

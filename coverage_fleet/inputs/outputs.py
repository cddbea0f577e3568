"""Where a command will write its results, checked before any long work: a run of minutes
must not end in "cannot write" with its results lost.

`output_fault(path)` is None when `path` does not exist yet and can be created: its nearest
existing ancestor is a folder in which this process can create a file. That is tried, not
inferred from permission bits (a root process ignores them, a read-only file system does
not): a uniquely named empty file is created there and removed at once.
"""

from __future__ import annotations

import os
import tempfile
from pathlib import Path

from coverage_fleet.errors import ConfigError


def nearest_existing(path: Path) -> Path:
    """`path` itself or its closest ancestor that exists (the folder a run will write in)."""
    path = Path(os.path.abspath(path))
    while not path.exists() and not path.is_symlink() and path != path.parent:
        path = path.parent
    return path


def output_fault(path: Path) -> str | None:
    """None, or why `path` cannot be created (it exists, it lies below a file, or its
    folder is not writable)."""
    path = Path(path)
    if path.exists() or path.is_symlink():
        return f"{path} already exists; results are never overwritten"
    folder = nearest_existing(path.parent)
    if not folder.is_dir():
        return f"cannot create {path}: {folder} is a file, not a folder"
    try:
        handle, probe = tempfile.mkstemp(prefix=".write-check-", dir=folder)
    except OSError as error:
        return f"cannot create {path}: folder {folder} is not writable ({error.strerror})"
    os.close(handle)
    os.unlink(probe)
    return None


def check_output_location(path: Path, option: str) -> None:
    """Raise `command line: <option>: <fault>` when the results cannot go to `path` (also
    for a default location, which the user did not type but must be able to fix)."""
    fault = output_fault(path)
    if fault:
        raise ConfigError.single("command line", option, fault)

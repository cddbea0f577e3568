"""Where the control layer keeps results it can recompute (terminal sets, compiled MPC code).

$COVERAGE_FLEET_CACHE, else ~/.cache/coverage_fleet. Entries are keyed by content (vehicle
file hash, generated source hash), so a stale entry is never picked up; deleting the folder
only costs recomputation.
"""

from __future__ import annotations

import os
import tempfile
from pathlib import Path

CACHE_ENV = "COVERAGE_FLEET_CACHE"


def cache_root() -> Path:
    root = os.environ.get(CACHE_ENV)
    return Path(root) if root else Path.home() / ".cache" / "coverage_fleet"


def write_atomically(path: Path, data: bytes) -> bool:
    """Write via a temporary file and rename (readers never see half a file). False when
    the cache cannot be written (a cache that cannot be written only costs recomputation)."""
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        handle, temporary = tempfile.mkstemp(dir=path.parent, suffix=".tmp")
        with os.fdopen(handle, "wb") as stream:
            stream.write(data)
        os.replace(temporary, path)
        return True
    except OSError:
        return False

"""Atomic file writes for fits/ (fits may not import benchkit.atomic, so a small twin).

Temporary file in the same directory, fsync, os.replace: a reader sees the old file or the
new one, never half of one.
"""

from __future__ import annotations

import os
import tempfile
from pathlib import Path


def write_bytes_atomic(path, data: bytes) -> Path:
    target = Path(path)
    target.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=target.parent)
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, target)
    except BaseException:
        try:
            os.unlink(tmp)
        except FileNotFoundError:
            pass
        raise
    return target

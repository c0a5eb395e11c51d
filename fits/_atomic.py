"""The one atomic file writer of the project (benchkit.atomic wraps it with the operator's error line).

Temporary file in the same directory, fsync, os.replace: a reader sees the old file or the
new one, never half of one. It lives in fits because fits may not import benchkit, while
benchkit may import fits. The file gets the mode a plain open() would give (0666 less the
umask), not mkstemp's private 0600: curves, plots, reports and exports are for sharing.
"""

from __future__ import annotations

import os
import tempfile
from pathlib import Path


def _umask_mode() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return 0o666 & ~mask


FILE_MODE = _umask_mode()


def write_bytes_atomic(path, data: bytes) -> Path:
    """Replace `path` with `data` in one rename; OSError (disk full, read-only...) leaves the old file."""
    target = Path(path)
    target.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=target.parent)
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.chmod(tmp, FILE_MODE)  # os.chmod by path: os.fchmod is missing on Windows before 3.13
        os.replace(tmp, target)
    except BaseException:
        try:
            os.unlink(tmp)
        except FileNotFoundError:
            pass
        raise
    return target

"""Writes that cannot be left half done: benchkit's face of the one writer in fits._atomic.

The writing itself (temporary file beside the target, fsync, rename, shared file mode) is
fits._atomic.write_bytes_atomic; here an OSError becomes the operator's one-line UserError.
"""

from __future__ import annotations

import os
from pathlib import Path

from benchkit.errors import UserError
from fits._atomic import FILE_MODE, write_bytes_atomic as _write_bytes_atomic

__all__ = ["FILE_MODE", "write_bytes_atomic", "write_text_atomic"]


def write_bytes_atomic(path: str | os.PathLike, data: bytes) -> Path:
    """Replace `path` with `data` in one rename, so a reader sees the old file or the new one."""
    target = Path(path)
    try:
        return _write_bytes_atomic(target, data)
    except OSError as exc:  # disk full, read-only, I/O error: one line, old file kept
        raise _cannot_write(target, exc) from None


def _cannot_write(target: Path, exc: OSError) -> UserError:
    return UserError(f"{target}: cannot write ({exc.strerror or exc}); nothing was changed there: "
                     "free space on the disk or choose a folder you can write")


def write_text_atomic(path: str | os.PathLike, text: str) -> Path:
    """Text flavour of write_bytes_atomic (UTF-8, newline kept as given)."""
    return write_bytes_atomic(path, text.encode("utf-8"))

"""Writes that cannot be left half done: write a temporary file beside the target, fsync, rename."""

from __future__ import annotations

import os
import tempfile
from pathlib import Path

from benchkit.errors import UserError


def _umask_mode() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return 0o666 & ~mask


_DEFAULT_MODE = _umask_mode()


def write_bytes_atomic(path: str | os.PathLike, data: bytes) -> Path:
    """Replace `path` with `data` in one rename, so a reader sees the old file or the new one."""
    target = Path(path)
    try:
        target.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=target.parent)
    except OSError as exc:
        raise _cannot_write(target, exc) from None
    try:
        os.fchmod(fd, _DEFAULT_MODE)  # mkstemp makes 0600; reports and exports are for sharing
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, target)
    except BaseException as exc:
        try:
            os.unlink(tmp)
        except FileNotFoundError:
            pass
        if isinstance(exc, OSError):  # disk full, read-only, I/O error: one line, old file kept
            raise _cannot_write(target, exc) from None
        raise
    return target


def _cannot_write(target: Path, exc: OSError) -> UserError:
    return UserError(f"{target}: cannot write ({exc.strerror or exc}); nothing was changed there: "
                     "free space on the disk or choose a folder you can write")


def write_text_atomic(path: str | os.PathLike, text: str) -> Path:
    """Text flavour of write_bytes_atomic (UTF-8, newline kept as given)."""
    return write_bytes_atomic(path, text.encode("utf-8"))

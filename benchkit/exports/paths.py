"""Output file names derived from part ids, kept inside the output folder whatever the id holds."""

from __future__ import annotations

import re
from pathlib import Path

from benchkit.errors import UserError

_UNSAFE = re.compile(r"[^A-Za-z0-9._-]+")


def safe_stem(text: str, fallback: str = "part") -> str:
    """A file-name stem of [A-Za-z0-9._-] only, no leading dot, never '.' or '..'.

    Part ids are free text in the library ("BD-1001", but also anything with quotes,
    slashes or semicolons), so they are never used as paths as they are.
    """
    stem = _UNSAFE.sub("_", str(text)).strip("._") or fallback
    return stem[:120]


def inside(folder: str | Path, name: str) -> Path:
    """folder/name, refused if it would resolve outside folder (belt and braces after safe_stem)."""
    base = Path(folder).resolve()
    target = (base / name).resolve()
    if target.parent != base:
        raise UserError(f"output name {name!r} would leave the folder {base}; choose another name")
    return target

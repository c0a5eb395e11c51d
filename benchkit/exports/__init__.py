"""Curves in formats other tools read: a CSV table, the JSON curve document, a SPICE subcircuit.

Touchstone (.s1p) is not written: a one-port file needs the impedance over frequency at each
bias, and benchkit runs measure at one frequency per run, so the data for it do not exist.

    from benchkit.exports import export_curve, render
    export_curve(curve, "spice", "out/BD-1001.lib", esr_ohm=0.02)

Every file is written with benchkit.atomic.write_text_atomic (old file or new, never half).
"""

from __future__ import annotations

import os
from pathlib import Path

from benchkit.atomic import write_text_atomic
from benchkit.errors import UserError
from benchkit.exports.spice import spice_subcircuit
from benchkit.exports.table_csv import curve_csv

FORMATS = ("csv", "json", "spice")
SUFFIX = {"csv": ".csv", "json": ".json", "spice": ".lib"}


def render(curve, fmt: str, *, esr_ohm: float | None = None, name: str | None = None,
           n_points: int | None = None, source_note: str | None = None) -> str:
    """The text of one export."""
    if fmt == "csv":
        return curve_csv(curve) if n_points is None else curve_csv(curve, n_points=n_points)
    if fmt == "json":
        text = curve.to_json()
        return text if text.endswith("\n") else text + "\n"
    if fmt == "spice":
        return spice_subcircuit(curve, name=name, esr_ohm=esr_ohm, source_note=source_note)
    raise UserError(f"--format {fmt!r}: choose one of {', '.join(FORMATS)}")


def export_curve(curve, fmt: str, out: str | os.PathLike, **options) -> Path:
    """Render and write atomically; returns the path written."""
    text = render(curve, fmt, **options)
    target = Path(out)
    if target.is_dir():
        raise UserError(f"--out {target}: is a folder; give a file name")
    return write_text_atomic(target, text)

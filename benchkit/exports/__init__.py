"""Curves in formats other tools read: a CSV table, the JSON curve document, a SPICE subcircuit,
and, for a curve that carries a wideband model (impedance against frequency per bias), a
Touchstone file, an AC-accurate SPICE subcircuit and a |Z|/ESR/ESL/C table at one bias.

    from benchkit.exports import export_curve, render
    export_curve(curve, "spice", "out/BD-1001.lib", esr_ohm=0.02)
    export_curve(curve, "touchstone", "out/BD-1006.s2p", bias_V=12, fixture="shunt-through")

Every file is written with benchkit.atomic.write_text_atomic (old file or new, never half).
"""

from __future__ import annotations

import os
from pathlib import Path

from benchkit.atomic import write_text_atomic
from benchkit.errors import UserError
from benchkit.exports.spice import spice_subcircuit
from benchkit.exports.table_csv import curve_csv

FORMATS = ("csv", "json", "spice", "touchstone")
SUFFIX = {"csv": ".csv", "json": ".json", "spice": ".lib", "touchstone": ".s1p"}
WIDEBAND_POINTS = 201


def wideband_fit(curve, bias_V: float):
    """The curve's wideband model at bias_V, or a UserError saying what is missing."""
    if curve.wideband is None:
        raise UserError("this curve has no wideband model (impedance against frequency): measure "
                        "with a frequency list in the plan and fit the run again")
    from benchkit.library.fitsbridge import fits_errors

    try:
        return curve.wideband.at(float(bias_V))
    except fits_errors() as exc:
        raise UserError(f"--bias {bias_V:g}: {exc}") from None


def freq_grid(fit, n_points: int | None = None):
    """Frequencies evenly spaced in log over the band the model was fitted on (ends included)."""
    import numpy as np

    n = WIDEBAND_POINTS if n_points is None else int(n_points)
    if n < 2:
        raise UserError(f"--points {n}: a table needs at least 2 points")
    lo, hi = fit.freq_range_Hz
    return np.logspace(np.log10(lo), np.log10(hi), n)


def _render_wideband(curve, fmt, bias_V, *, name, n_points, fixture, touchstone_version,
                     source_note, out_suffix):
    from benchkit.exports.impedance_csv import impedance_csv
    from benchkit.exports.touchstone import fixture_for, touchstone_text
    from benchkit.exports.wideband_spice import wideband_subcircuit

    fit = wideband_fit(curve, bias_V)
    f = freq_grid(fit, n_points)
    notes = [source_note] if source_note else []
    if fmt == "csv":
        return impedance_csv(fit, f)
    if fmt == "spice":
        return wideband_subcircuit(fit, name=name or curve.part_id or "CAP", f_lo_Hz=f[0],
                                   f_hi_Hz=f[-1], part_id=curve.part_id, notes=notes)
    version = str(touchstone_version or "1")
    if out_suffix is None:
        fixture = fixture or "one-port"
    elif version == "1" or fixture is None:
        fixture = fixture_for(out_suffix if version == "1" else ".s1p", fixture)
    who = " ".join(str(x) for x in (curve.part_id, curve.sample_id) if x)
    comments = [f"benchkit wideband model of {who or 'a part'} at {fit.bias_V:g} V"
                f"{' (interpolated)' if fit.interpolated else ''}, {fixture} fixture, Z0 50 ohm",
                f"C_F={fit.params['C_F']!r} D={fit.params['D']!r} esr_ohm={fit.params['esr_ohm']!r} "
                f"esl_H={fit.params['esl_H']!r} f_ref_Hz={fit.f_ref_Hz!r}"] + notes
    return touchstone_text(f, fit.Z(f), fixture=fixture, version=version, comments=comments)


def render(curve, fmt: str, *, esr_ohm: float | None = None, name: str | None = None,
           n_points: int | None = None, source_note: str | None = None,
           bias_V: float | None = None, fixture: str | None = None,
           touchstone_version: str | None = None, out_suffix: str | None = None) -> str:
    """The text of one export. With bias_V, csv and spice describe the wideband model at
    that bias (impedance table, AC subcircuit); touchstone always needs bias_V."""
    if fmt == "touchstone" and bias_V is None:
        raise UserError("--format touchstone needs --bias VOLTS: a Touchstone file holds the "
                        "part at one bias")
    if bias_V is not None and fmt in ("csv", "spice", "touchstone"):
        return _render_wideband(curve, fmt, bias_V, name=name, n_points=n_points, fixture=fixture,
                                touchstone_version=touchstone_version, source_note=source_note,
                                out_suffix=out_suffix)
    if fmt == "csv":
        return curve_csv(curve, source_note=source_note) if n_points is None else \
            curve_csv(curve, n_points=n_points, source_note=source_note)
    if fmt == "json":
        text = curve.to_json()
        return text if text.endswith("\n") else text + "\n"
    if fmt == "spice":
        return spice_subcircuit(curve, name=name, esr_ohm=esr_ohm, source_note=source_note)
    raise UserError(f"--format {fmt!r}: choose one of {', '.join(FORMATS)}")


def export_curve(curve, fmt: str, out: str | os.PathLike, **options) -> Path:
    """Render and write atomically; returns the path written."""
    target = Path(out)
    if fmt == "touchstone":
        options.setdefault("out_suffix", target.suffix)
    text = render(curve, fmt, **options)
    if target.is_dir():
        raise UserError(f"--out {target}: is a folder; give a file name")
    return write_text_atomic(target, text)

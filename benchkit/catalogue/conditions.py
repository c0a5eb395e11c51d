"""Default measurement conditions for a capacitor, from its dielectric class and nominal value.

A sweep plan may name the meter settings itself; when it does not, a part is measured at the
conditions its generic and sectional specifications prescribe, so that curves taken on
different days and benches compare. The table is IEC 60384-1 clause 4.2.2 with the sectional
specifications IEC 60384-21 (class 1 multilayer) and IEC 60384-22 (class 2 multilayer), as
quoted in detail specifications; the frequency tolerance is +-10 % and the level +-0.2 Vrms
(0.5 V: +-0.1 Vrms) there. Every answer carries a source string that goes into run.json.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from benchkit.catalogue.codes import dielectric_class
from benchkit.errors import UserError

CLASS1_SPLIT_F = 1000e-12  # class 1: <= 1000 pF at 1 MHz, above at 1 kHz
CLASS2_SPLIT_F = 10e-6  # class 2: <= 10 uF at 1 kHz, above at 120 Hz
_REL = 1e-9  # a nominal value written as 10e-6 or 1e-5 is on the boundary, not above it

# Split between series and parallel equivalent circuits by the impedance of the part at the
# test frequency: series below about 100 ohm, parallel above about 10 kohm; 1 kohm splits
# the band between [common practice: impedance-measurement handbooks].
SERIES_PARALLEL_SPLIT_OHM = 1000.0


@dataclass(frozen=True)
class StandardConditions:
    """Meter settings with the document they come from."""

    dielectric_class: int
    freq_Hz: float
    ac_level_Vrms: float
    source: str


def standard_conditions(class_code: str, nominal_C_F: float) -> StandardConditions:
    """Test frequency and AC level for a part of this class and nominal capacitance."""
    if not (isinstance(nominal_C_F, (int, float)) and math.isfinite(nominal_C_F) and nominal_C_F > 0):
        raise UserError(f"nominal_C_F {nominal_C_F!r} must be a positive number of farads")
    cls = dielectric_class(class_code)
    if cls == 1:
        if nominal_C_F <= CLASS1_SPLIT_F * (1 + _REL):
            return StandardConditions(1, 1e6, 1.0, _source(1, "C <= 1000 pF", "1 MHz", "1.0 Vrms"))
        return StandardConditions(1, 1e3, 1.0, _source(1, "C > 1000 pF", "1 kHz", "1.0 Vrms"))
    if nominal_C_F <= CLASS2_SPLIT_F * (1 + _REL):
        return StandardConditions(2, 1e3, 1.0, _source(2, "C <= 10 uF", "1 kHz", "1.0 Vrms"))
    return StandardConditions(2, 120.0, 0.5, _source(2, "C > 10 uF", "120 Hz", "0.5 Vrms"))


def _source(cls: int, band: str, freq: str, level: str) -> str:
    sectional = "IEC 60384-21" if cls == 1 else "IEC 60384-22"
    return f"IEC 60384-1 clause 4.2.2 with {sectional}: class {cls}, {band}: {freq}, {level}"


def default_function(nominal_C_F: float, freq_Hz: float) -> str:
    """Cs-D for a low-impedance part, Cp-D for a high-impedance one (at the test frequency)."""
    z_ohm = 1.0 / (2.0 * math.pi * freq_Hz * nominal_C_F)
    return "CSD" if z_ohm <= SERIES_PARALLEL_SPLIT_OHM else "CPD"

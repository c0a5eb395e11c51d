"""Thermometer driver: the temperature at the fixture."""

from __future__ import annotations

from .instrument import Instrument
from .setting import Setting


class Thermometer(Instrument):
    """A thermometer reached by any VISA resource string, spelled by its profile."""

    kind = "thermometer"
    default_profile = "generic-thermometer"
    default_role = "thermometer"

    temperature_C = Setting("Temperature at the fixture, degrees Celsius (class-2 "
                            "capacitance moves with it).", type="float", unit="C",
                            read_only=True)

"""SCPI instrument drivers over pyvisa (pyvisa-py by default), spelled by TOML profiles.

    from instruments.drivers import LCRMeter
    with LCRMeter("TCPIP0::127.0.0.1::5025::SOCKET", profile="generic-lcr") as m:
        m.freq_Hz = 1e3
        r = m.measure()

A driver is not opened by its constructor: `with` (or open()) opens it, checks *IDN?, sends
*CLS, and reads the error queue. See PROFILES.md for writing a profile for an instrument.
"""

from .bias_supply import BiasSupply
from .chamber import TemperatureChamber
from .errors import (InstrumentError, InstrumentLinkError, InstrumentTimeout,
                     InvalidValueError, ProfileError, UnsafeCommandError)
from .instrument import Instrument, check_profile_matches
from .lcr_meter import FUNCTIONS, LCRMeter, Reading
from .meter_bias import MeterBias
from .profile import PROFILE_DIR, Profile, load_profile, shipped_profiles
from .scanner import Scanner
from .session import Session, normalise_resource
from .setting import Setting
from .thermometer import Thermometer

DRIVERS = {"lcr-meter": LCRMeter, "dc-supply": BiasSupply, "scanner": Scanner,
           "thermometer": Thermometer, "chamber": TemperatureChamber}

__all__ = [
    "BiasSupply", "DRIVERS", "FUNCTIONS", "Instrument", "InstrumentError",
    "InstrumentLinkError", "InstrumentTimeout", "InvalidValueError", "LCRMeter", "MeterBias",
    "PROFILE_DIR", "Profile", "ProfileError", "Reading", "Scanner", "Session", "Setting",
    "TemperatureChamber", "Thermometer", "UnsafeCommandError", "check_profile_matches", "load_profile",
    "normalise_resource", "shipped_profiles",
]

"""The meter's internal DC bias as a bias source, with the same guarantees as a supply.

Why a wrapper and not a second driver: the bias lives in the meter (one link, one profile),
but the sweep engine must treat it exactly like an external supply: ramped within the rate
limit, limits from the profile (the range of its bias_V setting), 0 V then off on every exit.
So this gives the meter's bias the supply's interface (voltage_V, output_on, readbacks,
ramp_to, safe_off) and shares the supply's ramping and shutdown code.
"""

from __future__ import annotations

import atexit
import math
from typing import Any

from .bias_supply import RampedOutput
from .errors import ProfileError
from .lcr_meter import LCRMeter


class MeterBias(RampedOutput):
    """The internal bias of an LCRMeter whose profile spells (and may use) internal_bias.

    Without a bias monitor in the profile the readbacks are the programmed voltage and NaN
    current: say so in the run record (`has_monitor`).
    """

    def __init__(self, meter: LCRMeter):
        if not meter.may_use("internal_bias"):
            raise ProfileError(
                f"{meter.role} ({meter.resource}): profile '{meter.profile.name}' spells no "
                "internal bias the engine may use (settings bias_V and bias_on, see "
                "PROFILES.md, Capabilities); add a supply to the bench file instead")
        self.meter = meter
        self.last_safe_off_error: str | None = None
        self.last_ramp: list[tuple[float, float]] = []
        self._exit_clock: Any = None
        self._exit_rate: float | None = None
        self._atexit_registered = False
        self.requested_current_limit_A: float | None = None

    # -- identity and link: the meter's -----------------------------------------------------

    @property
    def role(self) -> str:
        return self.meter.role

    @property
    def resource(self) -> str:
        return self.meter.resource

    @property
    def session(self):
        return self.meter.session

    @property
    def idn(self) -> str:
        return self.meter.idn

    @property
    def profile(self):
        return self.meter.profile

    @property
    def is_open(self) -> bool:
        return self.meter.is_open

    @property
    def has_monitor(self) -> bool:
        return self.meter.may_use("bias_monitor")

    def open(self) -> "MeterBias":
        if not self.meter.is_open:
            self.meter.open()
        if not self._atexit_registered:
            atexit.register(self._at_exit)
            self._atexit_registered = True
        return self

    def close(self) -> None:
        """Forget the last-resort hook; the meter's link is closed with the meter."""
        if self._atexit_registered:
            atexit.unregister(self._at_exit)
            self._atexit_registered = False

    def _at_exit(self) -> None:
        if self.is_open:
            self.safe_off(self._exit_clock, self._exit_rate)

    def __enter__(self) -> "MeterBias":
        return self.open()

    def __exit__(self, *exc: Any) -> None:
        try:
            self.safe_off(self._exit_clock, self._exit_rate)
        finally:
            self.close()

    # -- the supply's interface -------------------------------------------------------------

    @property
    def voltage_range_V(self) -> tuple[float, float]:
        spec = self.meter.profile.settings["bias_V"]
        return spec.min, spec.max

    def _validate_voltage(self, value: Any, what: str) -> float:
        return LCRMeter.bias_V.validate(self.meter.profile.settings["bias_V"], value, what)

    @property
    def voltage_V(self) -> float:
        return self.meter.bias_V

    @voltage_V.setter
    def voltage_V(self, value: float) -> None:
        self.meter.bias_V = value

    @property
    def output_on(self) -> bool:
        return self.meter.bias_on

    @output_on.setter
    def output_on(self, value: bool) -> None:
        self.meter.bias_on = value

    @property
    def current_limit_A(self) -> float | None:
        return self.requested_current_limit_A

    @current_limit_A.setter
    def current_limit_A(self, value: float) -> None:
        # an internal bias source has its own, fixed current limit: the plan's is recorded
        self.requested_current_limit_A = float(value)

    @property
    def measured_voltage_V(self) -> float:
        if self.has_monitor:
            return self.meter.bias_measured_V
        return self.meter.bias_V

    @property
    def measured_current_A(self) -> float:
        if self.has_monitor:
            return self.meter.bias_current_A
        return math.nan

    def check_errors(self, after: str | None = None) -> None:
        self.meter.check_errors(after=after)

"""Temperature chamber driver: set point, ramp rate, air temperature and the stable state.

Why a driver of its own: a chamber is the one instrument of the bench that can hurt the part
and the fixture by itself (heat, cold, condensation below the dew point), so it must be
sent back to a safe temperature on every exit path, like the bias to 0 V. `safe_return()`
does that without raising; the sweep calls it after the bias is off.
"""

from __future__ import annotations

import math
from typing import Any

from .instrument import Instrument
from .setting import Setting

STATES = ("RAMP", "SETTLE", "STABLE")


class TemperatureChamber(Instrument):
    """A climate chamber reached by any VISA resource string, spelled by its profile.

    States (the chamber's own view of its air): RAMP while the set point it controls to is
    still moving at the ramp rate, SETTLE once the ramp is done but the air is not yet held
    within the chamber's band, STABLE when it is. The sweep applies its own soak rule on top
    (see the plan): the chamber's STABLE says nothing about the part, which lags behind.
    """

    kind = "chamber"
    default_profile = "generic-chamber"
    default_role = "chamber"

    setpoint_C = Setting("Set point of the air temperature, degrees Celsius; the chamber "
                         "ramps towards it at ramp_rate_C_per_s.", type="float", unit="C")
    ramp_rate_C_per_s = Setting("Rate at which the controlled set point moves, degC per "
                                "second (1 degC/min = 0.0167).", type="float", unit="C_per_s")
    temperature_C = Setting("Air temperature at the chamber's control sensor, degC (not the "
                            "part's: the fixture and the part lag behind).", type="float",
                            unit="C", read_only=True)
    state = Setting("RAMP, SETTLE or STABLE: whether the chamber holds its air at the set "
                    "point.", type="enum", values=STATES, read_only=True)

    def __init__(self, *args: Any, **kwargs: Any):
        super().__init__(*args, **kwargs)
        self.last_safe_error: str | None = None

    @property
    def setpoint_range_C(self) -> tuple[float, float]:
        spec = self.profile.settings["setpoint_C"]
        return spec.min, spec.max

    def go_to(self, temp_C: float, ramp_rate_C_per_s: float | None = None) -> None:
        """Ramp rate first (so the move starts at the intended rate), then the set point."""
        if ramp_rate_C_per_s is not None:
            self.ramp_rate_C_per_s = ramp_rate_C_per_s
        self.setpoint_C = temp_C

    def is_stable(self) -> bool:
        return self.state == "STABLE"

    def safe_return(self, temp_C: float, ramp_rate_C_per_s: float | None = None) -> bool:
        """Best effort: set point to temp_C and verify it reads back. Never raises an error.

        Does not wait for the air to get there (a chamber ramps by itself; nobody has to hold
        a run open for it). False with the reason in .last_safe_error if the set point could
        not be confirmed. A Ctrl-C is passed on after the set point was tried.
        """
        self.last_safe_error = None
        problems: list[str] = []
        interrupted: BaseException | None = None
        try:
            if not self.is_open:
                try:
                    self.open()
                except Exception as exc:
                    problems.append(f"could not open the link: {exc}")
                    raise _GiveUp from None
            if ramp_rate_C_per_s is not None:
                try:
                    self.ramp_rate_C_per_s = ramp_rate_C_per_s
                except KeyboardInterrupt as exc:
                    interrupted = exc
                except Exception as exc:
                    problems.append(f"setting the ramp rate failed: {exc}")
            try:
                self.setpoint_C = temp_C
            except KeyboardInterrupt as exc:
                interrupted = exc      # "hurry", not "leave it hot": try the set point once more
                try:
                    self.setpoint_C = temp_C
                except Exception as exc2:
                    problems.append(f"setting {temp_C:g} degC failed: {exc2}")
            except Exception as exc:
                problems.append(f"setting {temp_C:g} degC failed: {exc}")
            try:
                sp = self.setpoint_C
            except Exception as exc:
                problems.append(f"could not read the set point back: {exc}")
                raise _GiveUp from None
            if not math.isclose(sp, temp_C, abs_tol=1e-6):
                problems.append(f"the set point reads back {sp:g} degC, not {temp_C:g} degC")
                raise _GiveUp
            if interrupted is not None:
                raise interrupted
            return True
        except _GiveUp:
            pass
        except KeyboardInterrupt:
            raise
        except Exception as exc:   # never raise out of a shutdown path
            problems.append(f"unexpected {type(exc).__name__}: {exc}")
        self.last_safe_error = (
            f"{self.role} ({self.resource}): could not confirm the safe set point "
            f"{temp_C:g} degC: " + "; ".join(problems)
            + "; set the chamber to a safe temperature by hand")
        if interrupted is not None:
            raise interrupted
        return False


class _GiveUp(Exception):
    pass

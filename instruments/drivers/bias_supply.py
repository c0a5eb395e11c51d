"""DC bias supply driver: ramps within a rate limit and always ends at 0 V, output off.

Common practice for biasing capacitors: never jump the bias (the charging current surge
stresses the part and the fixture, and a class-2 part's capacitance depends on how it got
there), and whatever happens leave the supply at 0 V with its output off.
"""

from __future__ import annotations

import atexit
import math
from typing import Any

from .errors import InvalidValueError
from .instrument import Instrument
from .setting import Setting, check_float

_RATE_MARGIN = 1.0 + 1e-9   # sleep a hair longer than |dV|/rate so the rate is never exceeded


class RampedOutput:
    """Ramping and the safe shutdown, shared by every bias source (a supply, a meter's own).

    The host provides voltage_V and output_on (properties), role, resource, is_open, open(),
    and _validate_voltage(value, what) with the source's limits.
    """

    # -- ramping ---------------------------------------------------------------------------

    def ramp_to(self, target_V: float, max_rate_V_per_s: float, clock: Any,
                max_step_V: float = 0.5) -> list[tuple[float, float]]:
        """Move the programmed voltage to target_V in steps of at most max_step_V.

        Before each step the clock sleeps |step| / max_rate_V_per_s, so the rate is never
        exceeded (also not against a set made just before the ramp). The time since the last
        ramp of this driver ended (on the same clock, at the voltage it ended at) counts
        towards the first pause: the rate bounds the change between consecutive programmed
        values, and a dwell spent at the last one is such time. The ramp starts from the
        voltage this driver last programmed and saw accepted; only when it does not know
        one (a fresh link, a refused or lost set) does it ask the source. Everything is
        validated before the first command. Returns the (clock time, voltage) steps, the
        starting point first; kept in .last_ramp.
        """
        what = f"{self.role} ({self.resource})"
        target = self._validate_voltage(target_V, f"{what}: ramp target_V")
        rate = check_float(max_rate_V_per_s, 0.0, math.inf, f"{what}: max_rate_V_per_s", "V/s")
        step = check_float(max_step_V, 0.0, math.inf, f"{what}: max_step_V", "V")
        if rate <= 0 or step <= 0:
            raise InvalidValueError(f"{what}: max_rate_V_per_s and max_step_V must be > 0")
        if not (callable(getattr(clock, "sleep", None)) and callable(getattr(clock, "now", None))):
            raise InvalidValueError(f"{what}: ramp_to needs a clock with now() and sleep()")
        self._exit_clock, self._exit_rate = clock, rate
        known = getattr(self, "_known", {}).get("voltage_V")
        start = known if known is not None else self.voltage_V
        log = [(clock.now(), start)]
        self.last_ramp = log
        last, self._last_step = getattr(self, "_last_step", None), None
        credit = 0.0
        if last is not None and last[0] is clock and last[2] == start:
            credit = max(0.0, clock.now() - last[1])
        delta = target - start
        n = math.ceil(abs(delta) / step - 1e-9) if delta else 0
        prev = start
        for k in range(1, n + 1):
            v = target if k == n else start + delta * k / n
            pause = abs(v - prev) / rate * _RATE_MARGIN
            clock.sleep(pause - credit if k == 1 else pause)
            self.voltage_V = v
            log.append((clock.now(), v))
            prev = v
        self._last_step = (clock, clock.now(), float(target))
        return log

    # -- shutdown --------------------------------------------------------------------------

    def safe_off(self, clock: Any = None, max_rate_V_per_s: float | None = None) -> bool:
        """Best effort: ramp to 0 V (if clock and rate are given), output off, verify.

        Never raises an error. True only when OUTPut? reads back off and the programmed
        voltage reads back 0 V; otherwise False with the reason in .last_safe_off_error.
        A Ctrl-C during the ramp-down skips to 0 V and output off at once, then is passed on.
        """
        problems: list[str] = []
        self.last_safe_off_error = None
        interrupted: BaseException | None = None
        try:
            if not self.is_open:
                try:
                    self.open()
                except Exception as exc:
                    problems.append(f"could not open the link: {exc}")
                    raise _GiveUp from None
            ramped = False
            if clock is not None and max_rate_V_per_s is not None:
                try:
                    self.ramp_to(0.0, max_rate_V_per_s, clock)
                    ramped = True
                except KeyboardInterrupt as exc:
                    # a second Ctrl-C means "hurry", not "leave it on": 0 V and off at once,
                    # then pass the interrupt on
                    interrupted = exc
                    problems.append("ramp to 0 V interrupted")
                except Exception as exc:
                    problems.append(f"ramp to 0 V failed: {exc}")
            if not ramped:
                try:
                    self.voltage_V = 0.0
                except Exception as exc:
                    problems.append(f"setting 0 V failed: {exc}")
            try:
                self.output_on = False
            except Exception as exc:
                problems.append(f"switching the output off failed: {exc}")
            try:
                on = self.output_on
                set_v = self.voltage_V
            except Exception as exc:
                problems.append(f"could not verify the output state: {exc}")
                raise _GiveUp from None
            if on:
                problems.append("the output still reads back on")
            if abs(set_v) > 1e-9:
                problems.append(f"the programmed voltage reads back {set_v:g} V, not 0 V")
            if on or abs(set_v) > 1e-9:
                raise _GiveUp
            if interrupted is not None:
                raise interrupted
            return True
        except _GiveUp:
            pass
        except Exception as exc:   # never raise out of a shutdown path
            problems.append(f"unexpected {type(exc).__name__}: {exc}")
        self.last_safe_off_error = (
            f"{self.role} ({self.resource}): could not confirm 0 V and output off: "
            + "; ".join(problems) + "; switch the supply off by hand")
        if interrupted is not None:
            raise interrupted
        return False


class BiasSupply(RampedOutput, Instrument):
    """A programmable DC supply reached by any VISA resource string, spelled by its profile.

    Leaving the `with` block calls safe_off() (ramping down at the rate and on the clock of
    the last ramp_to, if there was one) before closing; an interpreter exit with the session
    still open does the same as a last resort. After a reconnect the current limit and the
    programmed voltage are re-applied, the output state never: the driver does not switch
    the output on by itself.
    """

    kind = "dc-supply"
    default_profile = "generic-dc-supply"
    default_role = "supply"

    voltage_V = Setting("Programmed output voltage. Setting it jumps; use ramp_to() to move "
                        "a bias.", type="float", unit="V")
    current_limit_A = Setting("Current limit: protects the part and the fixture when a part "
                              "fails short.", type="float", unit="A")
    output_on = Setting("Output relay state.", type="bool")
    measured_voltage_V = Setting("Terminal voltage as measured by the supply (sags below the "
                                 "set value in current limit).", type="float", unit="V",
                                 read_only=True)
    measured_current_A = Setting("Output current: charging plus leakage of the connected "
                                 "part.", type="float", unit="A", read_only=True)

    def __init__(self, *args: Any, **kwargs: Any):
        super().__init__(*args, **kwargs)
        self.last_safe_off_error: str | None = None
        self.last_ramp: list[tuple[float, float]] = []
        self._exit_clock: Any = None
        self._exit_rate: float | None = None
        self._atexit_registered = False
        self._last_step: tuple[Any, float, float] | None = None  # (clock, time, V) of a ramp's end

    @property
    def voltage_range_V(self) -> tuple[float, float]:
        spec = self.profile.settings["voltage_V"]
        return spec.min, spec.max

    def _validate_voltage(self, value: Any, what: str) -> float:
        return type(self).voltage_V.validate(self.profile.settings["voltage_V"], value, what)

    # -- lifecycle -------------------------------------------------------------------------

    def open(self) -> "BiasSupply":
        super().open()
        if not self._atexit_registered:
            atexit.register(self._at_exit)
            self._atexit_registered = True
        return self

    def close(self) -> None:
        if self._atexit_registered:
            atexit.unregister(self._at_exit)
            self._atexit_registered = False
        super().close()

    def __exit__(self, *exc: Any) -> None:
        try:
            self.safe_off(self._exit_clock, self._exit_rate)
        finally:
            self.close()

    def _at_exit(self) -> None:
        if self.is_open:
            self.safe_off(self._exit_clock, self._exit_rate)
            self.close()

    def _apply(self, setting, value) -> None:
        if setting.name == "voltage_V":
            self._last_step = None  # a set outside a ramp's end: no time to count on
        super()._apply(setting, value)

    def _after_reconnect(self) -> None:
        # The current limit first, then the programmed voltage (a set lost with the link
        # would make the next ramp step a double one); never the output state.
        for name in ("current_limit_A", "voltage_V"):
            if name in self._remembered:
                self._apply(type(self).declared_settings()[name], self._remembered[name])


class _GiveUp(Exception):
    pass

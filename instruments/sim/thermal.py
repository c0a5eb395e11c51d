"""The climate chamber's thermal physics: air, fixture and part, each lagging the one before.

Why three temperatures: a chamber reports (and controls) its air, the bench's thermometer
sits on the fixture, and the capacitance follows the part, which lags behind both (common
practice: after the air reaches a set point the part lags with the fixture's thermal time
constant, minutes). A sweep that trusts the chamber's own "stable" measures the part too
early; this model lets a test show that.

Model (parameters invented for the demo, typical of a small bench chamber):
- the controller moves its set point towards the target at the ramp rate;
- the air follows the controlled set point u as a second-order system,
  T_a'' + 2*zeta*w*T_a' + w^2*T_a = w^2*u, w = 1/air_tau_s (zeta < 1: overshoot
  exp(-pi*zeta/sqrt(1 - zeta^2)) of a step, 9.5 % at zeta = 0.6 [published: any control
  handbook's second-order step response]);
- the fixture follows the air, the part the fixture, each first-order:
  T_f' = (T_a - T_f)/fixture_tau_s, T_p' = (T_f - T_p)/part_tau_s.
Each step of step_s holds u constant (its mid-step value) and is integrated exactly with the
matrix exponential; once the ramp is done and every state has converged, time jumps.

Faults: `drift` offsets all three temperatures by rate*(t - t0) (the room, and everything in
it, drifting); `hunt` adds amp*sin(2*pi*t/period) to the controlled set point (a controller
that never settles: the chamber never reports STABLE).
"""

from __future__ import annotations

import bisect
import math
import threading
from dataclasses import dataclass

import numpy as np
from scipy.linalg import expm

HISTORY = 8192          # samples of (t, part temperature) kept for look-ups in the past
CONVERGED_C = 1e-7      # states closer than this to their rest value count as settled


@dataclass(frozen=True)
class ChamberParams:
    """Thermal constants of the simulated chamber (invented, a small bench chamber)."""

    air_tau_s: float = 60.0
    air_damping: float = 0.6
    fixture_tau_s: float = 300.0
    part_tau_s: float = 120.0
    band_C: float = 0.5          # the chamber calls its air stable within this band ...
    stable_s: float = 60.0       # ... held for this long
    step_s: float = 1.0
    default_rate_C_per_s: float = 0.05
    hunt_period_s: float = 600.0


class ThermalChamber:
    """State of chamber air, fixture and part; every public method integrates to `now` first."""

    def __init__(self, clock, temp_C: float = 25.0, params: ChamberParams = ChamberParams()):
        self.clock = clock
        self.p = params
        self.lock = threading.RLock()
        w = 1.0 / params.air_tau_s
        self._A = np.array([[0.0, 1.0, 0.0, 0.0],
                            [-w * w, -2.0 * params.air_damping * w, 0.0, 0.0],
                            [1.0 / params.fixture_tau_s, 0.0, -1.0 / params.fixture_tau_s, 0.0],
                            [0.0, 0.0, 1.0 / params.part_tau_s, -1.0 / params.part_tau_s]])
        self._phi_step = expm(self._A * params.step_s)
        self._t = float(clock.now())
        self.rate_C_per_s = params.default_rate_C_per_s
        self._drift_rate = 0.0
        self._drift_t0 = self._t
        self._drift_base = 0.0
        self._hunt_amp = 0.0
        self._hunt_t0 = self._t
        self._converged = True
        self.target_C = self.sp_now_C = float(temp_C)
        self._x = np.array([self.target_C, 0.0, self.target_C, self.target_C])
        self.teleport(temp_C)

    # ------------------------------------------------------------ knobs

    def teleport(self, temp_C: float) -> None:
        """Everything at temp_C at once, set point included, and stable (a test knob)."""
        with self.lock:
            self.advance()
            self._drift_base, self._drift_t0 = 0.0, self._t
            T = float(temp_C)
            self.target_C = self.sp_now_C = T
            self._x = np.array([T, 0.0, T, T])
            self._in_band_since: float | None = self._t - self.p.stable_s
            self._hist_t = [self._t]
            self._hist_part = [T]
            self._converged = True

    def set_target(self, temp_C: float) -> None:
        with self.lock:
            self.advance()
            self.target_C = float(temp_C)
            self._converged = False

    def set_rate(self, rate_C_per_s: float) -> None:
        with self.lock:
            self.advance()
            self.rate_C_per_s = float(rate_C_per_s)

    def start_drift(self, rate_C_per_min: float) -> None:
        with self.lock:
            self.advance()
            self._drift_base = self._offset(self._t)
            self._drift_t0 = self._t
            self._drift_rate = rate_C_per_min / 60.0

    def start_hunting(self, amplitude_C: float) -> None:
        with self.lock:
            self.advance()
            self._hunt_amp, self._hunt_t0 = float(amplitude_C), self._t
            self._converged = False

    # ------------------------------------------------------------ readings

    def air_C(self) -> float:
        with self.lock:
            self.advance()
            return float(self._x[0]) + self._offset(self._t)

    def fixture_C(self) -> float:
        with self.lock:
            self.advance()
            return float(self._x[2]) + self._offset(self._t)

    def part_C(self, t_s: float | None = None) -> float:
        """The part's temperature now, or at an earlier time t_s (from the kept history)."""
        with self.lock:
            self.advance()
            if t_s is None or t_s >= self._t:
                return float(self._x[3]) + self._offset(self._t)
            i = bisect.bisect_right(self._hist_t, t_s)
            if i == 0:
                value = self._hist_part[0]
            else:
                t0, t1 = self._hist_t[i - 1], self._hist_t[min(i, len(self._hist_t) - 1)]
                v0, v1 = self._hist_part[i - 1], self._hist_part[min(i, len(self._hist_t) - 1)]
                value = v0 if t1 <= t0 else v0 + (v1 - v0) * (t_s - t0) / (t1 - t0)
            return value + self._offset(t_s)

    def state(self) -> str:
        """RAMP, SETTLE or STABLE (see instruments/COMMANDS.md)."""
        with self.lock:
            self.advance()
            if self.sp_now_C != self.target_C:
                return "RAMP"
            if self._in_band_since is not None and self._t - self._in_band_since >= self.p.stable_s:
                return "STABLE"
            return "SETTLE"

    # ------------------------------------------------------------ integration

    def _offset(self, t: float) -> float:
        return self._drift_base + self._drift_rate * max(0.0, t - self._drift_t0)

    def _u(self, t: float) -> float:
        if not self._hunt_amp:
            return self.sp_now_C
        return self.sp_now_C + self._hunt_amp * math.sin(
            2.0 * math.pi * (t - self._hunt_t0) / self.p.hunt_period_s)

    def _step(self, h: float, t_mid: float) -> None:
        u = self._u(t_mid)
        rest = np.array([u, 0.0, u, u])
        phi = self._phi_step if h == self.p.step_s else expm(self._A * h)
        self._x = rest + phi @ (self._x - rest)

    def advance(self) -> None:
        with self.lock:
            t_end = float(self.clock.now())
            p = self.p
            while self._t < t_end:
                if self._converged and not self._hunt_amp:
                    self._t = t_end      # at rest: nothing moves but the clock
                    break
                h = min(p.step_s, t_end - self._t)
                gap = self.target_C - self.sp_now_C
                if gap:
                    # the controlled set point moves at the ramp rate, ending exactly on target
                    h = min(h, abs(gap) / self.rate_C_per_s)
                    move = self.rate_C_per_s * h
                    sp_end = (self.target_C if abs(gap) <= move * (1 + 1e-12)
                              else self.sp_now_C + math.copysign(move, gap))
                    self.sp_now_C = 0.5 * (self.sp_now_C + sp_end)   # u held at mid-step
                    self._step(h, self._t + h / 2.0)
                    self.sp_now_C = sp_end
                else:
                    self._step(h, self._t + h / 2.0)
                self._t += h
                self._record()

    def _record(self) -> None:
        t = self._t
        in_band = (self.sp_now_C == self.target_C
                   and abs(self._x[0] - self.target_C) <= self.p.band_C)
        if not in_band:
            self._in_band_since = None
        elif self._in_band_since is None:
            self._in_band_since = t
        self._hist_t.append(t)
        self._hist_part.append(float(self._x[3]))
        if len(self._hist_t) > HISTORY:
            del self._hist_t[: HISTORY // 2], self._hist_part[: HISTORY // 2]
        if self.sp_now_C == self.target_C and not self._hunt_amp:
            rest = np.array([self.target_C, 0.0, self.target_C, self.target_C])
            self._converged = bool(np.all(np.abs(self._x - rest) < CONVERGED_C))
            if self._converged:
                self._x = rest


__all__ = ["ChamberParams", "ThermalChamber"]

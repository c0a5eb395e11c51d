"""What the simulated meter sees across frequency: the part's full impedance behind the fixture.

Why a module of its own: physics.py knows the dielectric (C(V), the constant-loss dispersion,
the loss D, the conductor ESR, the insulation resistance); the series inductance of the part
and the fixture's residuals only matter away from the standard frequency, so they are added
here, around the dielectric, for every reading.

Part (series model) [published: impedance-measurement handbook relations]:

    Z_part = Z_diel + j*w*ESL,   Z_diel = esr_ohm + 1/(w*C(f)*(D + j) + 1/R_ins)

so ESR(f) = Re Z_part = esr_ohm (conductor/electrode floor) + about D/(w*C) (the dielectric
part, rising toward low frequency) [derived], and the part resonates at
f_srf = 1/(2*pi*sqrt(ESL*C)) where |Z| = ESR and the phase crosses 0.
C(f) is physics.py's constant-phase dispersion C ~ f^(-(2/pi)*atan D) [Jonscher, from memory]
and its Rayleigh level dependence; the level across the part falls with |Z|, so C also drifts
with frequency through the level.

Fixture (L network of the handbook's compensation appendix): a residual series impedance
Z_s = R_res + j*w*L_res next to the meter, then the stray admittance Y_o = G + j*w*C_stray
across the part:

    Z_m = Z_s + 1/(Y_o + 1/Z_part)

so the open position reads Z_s + 1/Y_o, the short position Z_s, and
Z_part = (Z_m - Z_s)/(1 - (Z_m - Z_s)*Y_o) recovers the part [published: impedance-measurement
handbook, compensation appendix].

Level: the meter's source drives Z_m behind R_src, V_terminals = V_osc*|Z_m|/|R_src + Z_m|;
the part gets V_osc*|Z_part || Y_o|/|R_src + Z_m| [derived from the divider in physics.py].

The level the meter reports is the one at its terminals, V_osc*|Z_m|/|R_src + Z_m| (a meter
cannot see past the fixture); at the standard frequency the two differ by parts per million.

Noise: one reading is Z' = (Z_m + s*n2*|Z_m|)/(1 + s*n1), n1, n2 ~ N(0,1),
s = noise_frac*(1 + 0.01 V / V_terminals): a relative error s of the reading and an error s*|Z| of
its resistive part (the meter's phase error), the way a meter's accuracy is specified
(percent of |Z| and a phase term) [common practice]. Below resonance this is physics.py's
noise: Cs scatters by s relative and D by s absolute [derived].
"""

from __future__ import annotations

import cmath
import math
from dataclasses import dataclass

from instruments.sim.physics import Measurement, SimulatedPart, level_across_part_Vrms

NOISE_LEVEL_FLOOR_Vrms = 0.01  # as physics.py: below about this level the reading gets noisier


def esl_H(spec) -> float:
    """The part's series inductance, [part.sim] esl_H (instruments/sim/simpart.py)."""
    return float(spec.sim.esl_H)


@dataclass(frozen=True)
class FixtureResiduals:
    """The fixture's L network: residual series R and L, stray shunt C and G."""

    series_R_ohm: float = 0.0
    series_L_H: float = 0.0
    stray_C_F: float = 0.0
    stray_G_S: float = 0.0

    def Z_short_ohm(self, freq_Hz: float) -> complex:
        return complex(self.series_R_ohm, 2.0 * math.pi * freq_Hz * self.series_L_H)

    def Y_open_S(self, freq_Hz: float) -> complex:
        return complex(self.stray_G_S, 2.0 * math.pi * freq_Hz * self.stray_C_F)

    def measured_ohm(self, Z_part: complex | None, freq_Hz: float) -> complex:
        """Z_m = Z_s + 1/(Y_o + 1/Z_part); None = open position, 0 = short position."""
        Zs, Yo = self.Z_short_ohm(freq_Hz), self.Y_open_S(freq_Hz)
        if Z_part is None:
            return Zs + (1.0 / Yo if Yo != 0 else complex(math.inf, 0.0))
        if Z_part == 0:
            return Zs
        return Zs + 1.0 / (Yo + 1.0 / Z_part)

    def part_share(self, Z_part: complex, freq_Hz: float) -> complex:
        """Z_part || Y_o: the impedance whose voltage is the part's own."""
        return 1.0 / (self.Y_open_S(freq_Hz) + 1.0 / Z_part)


@dataclass(frozen=True)
class WidebandMeasurement(Measurement):
    """A Measurement that also carries the complex impedance the meter saw."""

    Z_ohm: complex = 0j

    @property
    def Z_abs_ohm(self) -> float:
        return abs(self.Z_ohm)

    @property
    def theta_deg(self) -> float:
        return math.degrees(cmath.phase(self.Z_ohm))


def measurement_from_Z(Z: complex, freq_Hz: float, ac_dut_Vrms: float, bias_V: float,
                       t_s: float) -> WidebandMeasurement:
    """Series and parallel readings of one impedance [published: impedance-measurement
    handbook relations]: Cs = -1/(w*Im Z) (negative where the impedance is inductive, as a meter
    shows it), Rs = Re Z, D = w*Cs*Rs, Cp = Cs/(1 + D^2), Rp = Rs*(1 + 1/D^2)."""
    w = 2.0 * math.pi * freq_Hz
    Cs = -1.0 / (w * Z.imag) if Z.imag != 0 else math.inf
    Rs = Z.real
    D = w * Cs * Rs if math.isfinite(Cs) else math.inf
    Cp = Cs / (1.0 + D * D) if math.isfinite(D) else 0.0
    Rp = Rs * (1.0 + 1.0 / (D * D)) if D not in (0.0, math.inf) else math.inf
    return WidebandMeasurement(Cs_F=Cs, Cp_F=Cp, D=D, Rs_ohm=Rs, Rp_ohm=Rp,
                               ac_dut_Vrms=ac_dut_Vrms, freq_Hz=freq_Hz, bias_V=bias_V, t_s=t_s,
                               Z_ohm=Z)


def noisy(Z: complex, s: float, n1: float, n2: float) -> complex:
    """Z' = (Z + s*n2*|Z|)/(1 + s*n1): see the module docstring (noise)."""
    return (Z + s * n2 * abs(Z)) / (1.0 + s * n1)


def supports(part) -> bool:
    """Whether the part has the dielectric physics this module wraps."""
    return isinstance(part, SimulatedPart)


def part_impedance_ohm(part, x_V: float, freq_Hz: float, ac_dut_Vrms: float, temp_C: float,
                       lag: float = 0.0, bias_age: float = 0.0) -> complex:
    """Z_part of a SimulatedPart at play state x_V with ac_dut_Vrms across it."""
    C = part._C_diel(x_V, temp_C, freq_Hz, ac_dut_Vrms, lag, bias_age)
    D = part.D_dielectric(x_V)
    return part._Z(C, D, freq_Hz, temp_C) + complex(0.0, 2.0 * math.pi * freq_Hz * esl_H(part.spec))


def _solve(part, x_V, freq_Hz, osc_Vrms, temp_C, source_R_ohm, residuals, lag, bias_age):
    """(Z_part, Z_m, level across the part): the level depends on C and C on the level."""
    if not freq_Hz > 0 or not osc_Vrms >= 0:
        raise ValueError("frequency must be > 0 Hz and the level >= 0 Vrms")
    ac = osc_Vrms
    Zp = Zm = complex(0.0)
    for _ in range(30):
        Zp = part_impedance_ohm(part, x_V, freq_Hz, ac, temp_C, lag, bias_age)
        Zm = residuals.measured_ohm(Zp, freq_Hz)
        ac_new = osc_Vrms * abs(residuals.part_share(Zp, freq_Hz)) / abs(source_R_ohm + Zm)
        done = abs(ac_new - ac) <= 1e-13 * max(osc_Vrms, 1e-12)
        ac = ac_new
        if done:
            break
    return Zp, Zm, ac


def true_impedance_ohm(part, bias_V: float, freq_Hz: float, *, branch: str = "rising",
                       osc_level_Vrms: float | None = None, temp_C: float = 25.0,
                       source_R_ohm: float = 100.0, turn_V: float | None = None,
                       residuals: FixtureResiduals = FixtureResiduals(),
                       measured: bool = False) -> complex:
    """Noise-free settled impedance of the part itself (measured=False) or as the meter sees it
    through `residuals` (measured=True), at bias_V on the named branch."""
    x = part.branch_state_V(bias_V, branch, turn_V)
    osc = part.std_level_Vrms if osc_level_Vrms is None else osc_level_Vrms
    with part._lock:
        Zp, Zm, _ = _solve(part, x, freq_Hz, osc, temp_C, source_R_ohm, residuals, 0.0, 0.0)
    return Zm if measured else Zp


def measure(part, freq_Hz: float, osc_level_Vrms: float, temp_C: float, source_R_ohm: float,
            residuals: FixtureResiduals) -> WidebandMeasurement:
    """One noisy reading of the part at the present bias and clock, through the fixture."""
    with part._lock:
        part._advance(part.clock.now())
        _, Zm, _ = _solve(part, part._x_V, freq_Hz, osc_level_Vrms, temp_C, source_R_ohm,
                          residuals, part._lag, part._bias_age)
        # the meter knows the level at its terminals, and its noise is relative to that level
        ac = level_across_part_Vrms(osc_level_Vrms, Zm, source_R_ohm)
        s = part.sim.noise_frac * (1.0 + NOISE_LEVEL_FLOOR_Vrms / max(ac, 1e-9))
        n1, n2 = part.rng.standard_normal(2)
        return measurement_from_Z(noisy(Zm, s, n1, n2), freq_Hz, ac, part.bias_V, part._t)


def fixture_reading(residuals: FixtureResiduals, position: str, freq_Hz: float,
                    osc_level_Vrms: float, source_R_ohm: float, t_s: float,
                    rng=None, noise_frac: float = 0.0) -> WidebandMeasurement:
    """The open or short position of the fixture (no part): Z_s + 1/Y_o, or Z_s."""
    if position not in ("open", "short"):
        raise ValueError(f"position must be 'open' or 'short', got {position!r}")
    Zm = residuals.measured_ohm(None if position == "open" else 0j, freq_Hz)
    level = level_across_part_Vrms(osc_level_Vrms, Zm, source_R_ohm) if cmath.isfinite(Zm) else osc_level_Vrms
    if rng is not None and noise_frac > 0:
        s = noise_frac * (1.0 + NOISE_LEVEL_FLOOR_Vrms / max(level, 1e-9))
        n1, n2 = rng.standard_normal(2)
        Zm = noisy(Zm, s, n1, n2)
    return measurement_from_Z(Zm, freq_Hz, level, 0.0, t_s)

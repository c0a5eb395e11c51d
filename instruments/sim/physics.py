"""Physics of one simulated multilayer ceramic capacitor on the bias fixture.

Why a shape of its own: the fit models of benchkit (tanh/sech^2, even polynomial, Johnson
(1+x^2)^(-1/3), rational C0/(1+(V/Vh)^n)) must be tested against a truth that is none of
them, or a fit would look perfect by construction.

Notation: d = layer_thickness_m, E = V/d the DC field per dielectric layer, C_ref = nominal_C_F
times the sample's C_scale (the value at 0 V, 25 degC, 1000 h since the last heat, at the
part's standard frequency and standard level across the part, where tolerances apply
[standard: EIA-198-1 clause 1.1.2 for the 1000 h; IEC 60384-1/-21/-22 for the conditions]).

Settled DC-bias curve (anhysteretic shape, Langevin-derivative type). Polar clusters of a
relaxor-like ceramic with a moment aligned by the field give P ~ L(E/E_L) with the Langevin
function L(u) = coth(u) - 1/u, so the differential permittivity follows L'(u):

    w(u) = 3*L'(u) = 3/u^2 - 3/sinh(u)^2,  w(0) = 1, w ~ 1 - u^2/5 near 0, w ~ 3/u^2 far out
    B(x) = b + (1 - b)*w(|x|/(d*E_L))      b = bias_floor_frac (the lattice part that stays)

[Langevin-Debye orientation polarisation, P. Debye, Polar Molecules (1929), from memory;
applying it to polar clusters of a ceramic is our choice for the simulator, not a published
MLCC model]. The loss follows the field per layer, so thin layers (small cases, high values)
lose more [common practice].

Hysteresis (Miller-type branch offset). Miller's branches are the anhysteretic curve shifted
by the coercive field: rising P+(E) peaks at +Ec, falling P-(E) = -P+(-E) at -Ec
[published: S. L. Miller et al., J. Appl. Phys. 68, 6463 (1990)]. Here the argument x of B is
a play (backlash) operator of half-width Ec*d on the bias V: x = clip(x, V - Ec*d, V + Ec*d).
Rising x = V - Ec*d, falling x = V + Ec*d, so at the same positive bias the falling branch
reads lower; after a turn C stays flat across a swing of 2*Ec*d, then joins the other branch
(continuous at the turning point). Outgoing from rest at 0 V the part starts at x = 0.

Dielectric relaxation. A bias step that changes B by dB shows (1 - a)*dB at once and the
rest a*dB with exp(-t/tau_relax_s) (dielectric-absorption style; X7R about 2-2.5 %)
[common practice]: C = ...*(B - lag), lag -> lag + a*dB at a step, then decays.

Bias aging. Under bias a slower, aging-like drop A grows toward
A_eq = bias_aging_max_frac*(1 - w(V/(d*E_L))) with bias_aging_tau_s and recovers with
bias_recovery_tau_s once the bias is lower [published: T. Tsurumi et al., J. Electroceram.
21, 17 (2008)]. It multiplies C by (1 - A); it is small.

AC level (Rayleigh). Below the coercive field the permittivity rises linearly with the AC
amplitude [published: D. A. Hall, J. Mater. Sci. 36, 4575 (2001)]; only the domain part does:
R = 1 + alpha*(E_ac - E_ac_ref)*w, E_ac = V_dut/d, E_ac_ref = standard level/d, clipped to
[0.5, 2]. V_dut = V_osc*|Zx|/|R_src + Zx| [published: impedance-measurement handbook
relations]; so a large part measured behind 100 ohm at 1 V reads low [common practice].

Temperature. Class 2: C(T)/C(25) = 1 + p(T)/100, p a shape-preserving cubic (PCHIP) through
the part's tempco points, held flat outside them; the loader checks the points against the
EIA-198 code. Class 1: 1 + tc*(T - 25)*1e-6 [standard: EIA-198].

Aging since the last heat. C(t) = C(t1)*(1 - (k/100)*log10(t/t1)), t1 = 1 h, t in hours
[common practice; IEC 60384-22 informative annex on ageing]; hours below t1 count as t1.
t = hours_since_heat_h + (clock.now() - clock at creation)/3600.

Frequency. A loss D nearly constant over frequency means a power law C ~ f^(-(2/pi)*atan D)
(the constant-phase, "universal" dielectric response; A. K. Jonscher, Dielectric Relaxation
in Solids, 1983 [from memory]); normalised at the part's standard frequency.

Losses and the meter reading. The dielectric admittance is Y = w*C*(D_diel + j) + 1/R_ins with
D_diel = D_high_bias + (D_zero_bias - D_high_bias)*w(x), R_ins = insulation_RC_s/C_ref
falling tenfold per 100 K above 25 degC [from memory]; Zx = esr_ohm + 1/Y. The reading follows
the handbook relations Cs = -1/(w*Im Zx), Rs = Re Zx, D = w*Cs*Rs, Cp = Cs/(1 + D^2),
Rp = Rs*(1 + 1/D^2) [published: impedance-measurement handbook relations]. Noise: Cs times
(1 + s*N(0,1)), D plus s*N(0,1), s = noise_frac*(1 + 0.01 V/V_dut), from a seeded
numpy Generator.
"""

from __future__ import annotations

import math
import threading
from dataclasses import dataclass

import numpy as np
from scipy.interpolate import PchipInterpolator

from instruments.sim.simpart import REFERENCE_TEMP_C, SimParams, SimPart

AGING_T1_H = 1.0          # start of the logarithmic aging law, hours after the heat
TOLERANCE_AGE_H = 1000.0  # tolerances refer to 1000 h since the last heat [standard: EIA-198-1]
NOISE_LEVEL_FLOOR_Vrms = 0.01  # below about this level across the part the reading gets noisier
RAYLEIGH_CLIP = (0.5, 2.0)


# --- Closed-form pieces (pure functions, vectorised) ---------------------------------------

def langevin_weight(u):
    """w(u) = 3*L'(u) = 3/u^2 - 3/sinh(u)^2: 1 at u = 0, falling as 3/u^2."""
    if np.ndim(u) == 0:  # one reading at a time: plain floats are several times faster
        x = abs(float(u))
        if x < 0.05:
            return 1.0 - x**2 / 5.0 + 2.0 * x**4 / 105.0
        return 3.0 / x**2 if x > 300.0 else 3.0 / x**2 - 3.0 / math.sinh(x) ** 2
    u = np.abs(np.asarray(u, dtype=float))
    small = u < 0.05
    us = np.where(small, 1.0, np.minimum(u, 300.0))
    far = 3.0 / us**2 - 3.0 / np.sinh(us) ** 2
    near = 1.0 - u**2 / 5.0 + 2.0 * u**4 / 105.0  # Taylor series of 3*L'(u)
    out = np.where(small, near, np.where(u > 300.0, 3.0 / np.maximum(u, 1.0) ** 2, far))
    return out if out.ndim else float(out)


def bias_factor(x_V, layer_thickness_m: float, char_field_V_per_m: float,
                floor_frac: float):
    """B = b + (1 - b)*w(|x|/(d*E_L)): settled C / C(0 V) at play state x (volts)."""
    w = langevin_weight(np.asarray(x_V, dtype=float) / (layer_thickness_m * char_field_V_per_m))
    return floor_frac + (1.0 - floor_frac) * w


def aging_ratio(t_h, t1_h: float, k_pct_per_decade: float):
    """C(t)/C(t1) = 1 - (k/100)*log10(t/t1) [common practice; IEC 60384-22 annex]."""
    return 1.0 - (k_pct_per_decade / 100.0) * np.log10(np.asarray(t_h, float) / t1_h)


def series_to_parallel(Cs_F, D, freq_Hz):
    """(Cp_F, Rs_ohm, Rp_ohm) from Cs and D: D = w*Cs*Rs, Cp = Cs/(1+D^2), Rp = Rs*(1+1/D^2).

    [published: impedance-measurement handbook relations]
    """
    omega = 2.0 * math.pi * freq_Hz
    Rs = D / (omega * Cs_F)
    Cp = Cs_F / (1.0 + D**2)
    Rp = Rs * (1.0 + 1.0 / D**2) if D != 0 else math.inf
    return Cp, Rs, Rp


def level_across_part_Vrms(osc_level_Vrms: float, Z_ohm: complex,
                           source_R_ohm: float = 100.0) -> float:
    """V_dut = V_osc*|Zx|/|R_src + Zx| [published: LCR meter manuals, generally]."""
    return osc_level_Vrms * abs(Z_ohm) / abs(source_R_ohm + Z_ohm)


@dataclass(frozen=True)
class Measurement:
    """One meter reading of the part, both equivalent circuits, and the level across it."""

    Cs_F: float
    Cp_F: float
    D: float
    Rs_ohm: float
    Rp_ohm: float
    ac_dut_Vrms: float
    freq_Hz: float
    bias_V: float
    t_s: float


def _reading_from_Cs_D(Cs, D, freq_Hz, ac_dut, bias_V, t_s) -> Measurement:
    Cp, Rs, Rp = series_to_parallel(Cs, D, freq_Hz)
    return Measurement(Cs, Cp, D, Rs, Rp, ac_dut, freq_Hz, bias_V, t_s)


# --- The part ------------------------------------------------------------------------------

class SimulatedPart:
    """One sample on the fixture: keeps its own bias history and answers meter readings.

    `sample` (anything with C_scale / field_scale / hours_since_heat_h / sample_id, such as
    a lot's sample; a plain fixture slot gives the defaults) sets the part-to-part spread.
    Thread-safe: the supply and meter servers may call it from different threads.
    """

    def __init__(self, spec: SimPart, clock, rng: np.random.Generator, sample=None):
        if spec.sim is None:
            raise ValueError(f"part {spec.id}: no [part.sim] table, so it cannot be simulated")
        self.spec = spec
        self.sim: SimParams = spec.sim
        self.clock = clock
        self.rng = rng
        self.sample_id = getattr(sample, "sample_id", None)
        self.C_scale = float(getattr(sample, "C_scale", 1.0) or 1.0)
        field_scale = float(getattr(sample, "field_scale", 1.0) or 1.0)
        hours = getattr(sample, "hours_since_heat_h", None)
        self.hours_at_start_h = float(hours if hours is not None else self.sim.hours_since_heat_h)
        self.C_ref_F = spec.nominal_C_F * self.C_scale
        self.char_field_V_per_m = self.sim.char_field_V_per_m * field_scale
        self.Ec_V = self.sim.coercive_field_V_per_m * self.sim.layer_thickness_m
        self.std_freq_Hz, self.std_level_Vrms = spec.ref_freq_Hz, spec.ref_level_Vrms
        self._tempco = None
        if spec.dielectric_class == 2:
            self._tempco = PchipInterpolator(self.sim.tempco_points_C,
                                             self.sim.tempco_points_pct, extrapolate=False)
        self._lock = threading.RLock()
        self._t0 = clock.now()
        self._t = self._t0
        self._V = 0.0
        self._x_V = 0.0       # play state of the hysteresis
        self._lag = 0.0       # relaxation still to come, fraction of C_ref
        self._bias_age = 0.0  # slow aging-like drop under bias, fraction

    # -- public -------------------------------------------------------------------------------
    @property
    def tau_relax_s(self) -> float:
        return self.sim.tau_relax_s

    @property
    def bias_V(self) -> float:
        return self._V

    def hours_since_heat_h(self) -> float:
        return self.hours_at_start_h + (self.clock.now() - self._t0) / 3600.0

    def set_bias(self, V: float) -> None:
        """The DC voltage now across the part (call on every change)."""
        V = float(V)
        with self._lock:
            self._advance(self.clock.now())
            b_old = self._B(self._x_V)
            self._x_V = min(max(self._x_V, V - self.Ec_V), V + self.Ec_V)
            self._lag += self.sim.relax_amplitude_frac * (self._B(self._x_V) - b_old)
            self._V = V

    def C_now_F(self, temp_C: float = 25.0, freq_Hz: float | None = None,
                ac_dut_Vrms: float | None = None) -> float:
        """Present capacitance, noise-free (relaxation and bias aging included).

        Defaults: the part's standard frequency and standard level across the part.
        """
        with self._lock:
            self._advance(self.clock.now())
            return self._C_diel(self._x_V, temp_C, freq_Hz or self.std_freq_Hz,
                                self.std_level_Vrms if ac_dut_Vrms is None else ac_dut_Vrms,
                                self._lag, self._bias_age)

    def reading(self, freq_Hz: float, osc_level_Vrms: float, temp_C: float = 25.0,
                source_R_ohm: float = 100.0) -> Measurement:
        """The noise-free reading at clock.now() (what measure() scatters around)."""
        with self._lock:
            self._advance(self.clock.now())
            return self._reading(self._x_V, freq_Hz, osc_level_Vrms, temp_C, source_R_ohm,
                                 self._lag, self._bias_age)

    def measure(self, freq_Hz: float, osc_level_Vrms: float, temp_C: float = 25.0,
                source_R_ohm: float = 100.0) -> Measurement:
        """One noisy meter reading at clock.now()."""
        with self._lock:
            r = self.reading(freq_Hz, osc_level_Vrms, temp_C, source_R_ohm)
            s = self.sim.noise_frac * (1.0 + NOISE_LEVEL_FLOOR_Vrms / max(r.ac_dut_Vrms, 1e-9))
            n1, n2 = self.rng.standard_normal(2)
            return _reading_from_Cs_D(r.Cs_F * (1.0 + s * n1), r.D + s * n2, freq_Hz,
                                      r.ac_dut_Vrms, r.bias_V, r.t_s)

    def true_settled_C_F(self, bias_V: float, branch: str = "rising",
                         freq_Hz: float | None = 1e3, ac_level_Vrms: float | None = None,
                         temp_C: float = 25.0, source_R_ohm: float = 100.0,
                         turn_V: float | None = None, function: str = "CPD") -> float:
        """Noise-free C after the step's relaxation has settled, at the part's present age.

        function: the meter function the truth should match: "CPD" gives Cp, "CSD" and "CSRS"
        give Cs = Cp*(1 + D^2) (handbook relation), so a comparison is always like with like.

        branch names the direction of |V|: "rising" = outgoing leg from rest at 0 V (Miller's
        rising branch for positive bias), "falling" = returning leg after a turn at turn_V
        (None: from far enough out, i.e. the full falling branch). The slow bias aging is not
        included (a sweep of minutes sees little of it). ac_level_Vrms is the meter's
        oscillator level behind source_R_ohm; None = the part's standard level; freq_Hz None
        = the part's standard frequency.
        """
        x = self.branch_state_V(bias_V, branch, turn_V)
        f = freq_Hz or self.std_freq_Hz
        osc = self.std_level_Vrms if ac_level_Vrms is None else ac_level_Vrms
        if function.upper() not in ("CPD", "CSD", "CSRS"):
            raise ValueError(f"function must be CPD, CSD or CSRS, got {function!r}")
        with self._lock:
            m = self._reading(x, f, osc, temp_C, source_R_ohm, 0.0, 0.0)
        return m.Cs_F if function.upper().startswith("CS") else m.Cp_F

    def branch_state_V(self, bias_V: float, branch: str = "rising",
                       turn_V: float | None = None) -> float:
        """Play state x of a settled branch (see module docstring)."""
        mag, sign = abs(bias_V), (1.0 if bias_V >= 0 else -1.0)
        if branch == "rising":
            return sign * max(mag - self.Ec_V, 0.0)
        if branch == "falling":
            top = math.inf if turn_V is None else abs(turn_V)
            if top < mag:
                raise ValueError(f"falling branch: |bias_V| {mag:g} V beyond the turn {top:g} V")
            return sign * min(mag + self.Ec_V, top - self.Ec_V) if top > self.Ec_V else 0.0
        raise ValueError(f"branch must be 'rising' or 'falling', got {branch!r}")

    def leakage_current_A(self, V: float, temp_C: float = 25.0) -> float:
        """V / insulation resistance."""
        return float(V) / self.insulation_R_ohm(temp_C)

    def insulation_R_ohm(self, temp_C: float = 25.0) -> float:
        # R*C product is how insulation is specified [common practice citing IEC 60384-1];
        # tenfold fall per 100 K [from memory].
        return (self.sim.insulation_RC_s / self.spec.nominal_C_F
                * 10.0 ** (-(temp_C - REFERENCE_TEMP_C) / 100.0))

    # -- model pieces -------------------------------------------------------------------------
    def _B(self, x_V: float) -> float:
        return bias_factor(x_V, self.sim.layer_thickness_m, self.char_field_V_per_m,
                           self.sim.bias_floor_frac)

    def _w(self, V: float) -> float:
        return langevin_weight(V / (self.sim.layer_thickness_m * self.char_field_V_per_m))

    def temperature_factor(self, temp_C: float) -> float:
        """C(T)/C(25 degC)."""
        if self._tempco is None:
            return 1.0 + self.sim.tempco_ppm_per_K * (temp_C - REFERENCE_TEMP_C) * 1e-6
        pts = self.sim.tempco_points_C
        t = min(max(float(temp_C), pts[0]), pts[-1])
        return 1.0 + float(self._tempco(t)) / 100.0

    def aging_factor(self) -> float:
        """C(now)/C(1000 h): the logarithmic law anchored at t1 = 1 h."""
        k = self.sim.aging_k_pct_per_decade
        t = max(self.hours_since_heat_h(), AGING_T1_H)
        return float(aging_ratio(t, AGING_T1_H, k) / aging_ratio(TOLERANCE_AGE_H, AGING_T1_H, k))

    def D_dielectric(self, x_V: float) -> float:
        s = self.sim
        return s.D_high_bias + (s.D_zero_bias - s.D_high_bias) * self._w(x_V)

    def _C_diel(self, x_V, temp_C, freq_Hz, ac_dut_Vrms, lag, bias_age) -> float:
        s = self.sim
        w = self._w(x_V)
        e_ac = ac_dut_Vrms / s.layer_thickness_m
        e_ref = self.std_level_Vrms / s.layer_thickness_m
        rayleigh = min(max(1.0 + s.rayleigh_coeff_m_per_V * (e_ac - e_ref) * w,
                           RAYLEIGH_CLIP[0]), RAYLEIGH_CLIP[1])
        D = self.D_dielectric(x_V)
        dispersion = (freq_Hz / self.std_freq_Hz) ** (-(2.0 / math.pi) * math.atan(D))
        return (self.C_ref_F * self.temperature_factor(temp_C) * self.aging_factor()
                * dispersion * rayleigh * (self._B(x_V) - lag) * (1.0 - bias_age))

    def _Z(self, C_F, D, freq_Hz, temp_C) -> complex:
        omega = 2.0 * math.pi * freq_Hz
        Y = omega * C_F * complex(D, 1.0) + 1.0 / self.insulation_R_ohm(temp_C)
        return self.sim.esr_ohm + 1.0 / Y

    def _reading(self, x_V, freq_Hz, osc_Vrms, temp_C, source_R, lag, bias_age) -> Measurement:
        if not freq_Hz > 0 or not osc_Vrms >= 0:
            raise ValueError("frequency must be > 0 Hz and the level >= 0 Vrms")
        D = self.D_dielectric(x_V)
        ac = osc_Vrms
        Z = complex(0.0)
        for _ in range(20):  # the level depends on C and C on the level: fixed point
            C = self._C_diel(x_V, temp_C, freq_Hz, ac, lag, bias_age)
            Z = self._Z(C, D, freq_Hz, temp_C)
            ac_new = level_across_part_Vrms(osc_Vrms, Z, source_R)
            if abs(ac_new - ac) <= 1e-13 * max(osc_Vrms, 1e-12):
                ac = ac_new
                break
            ac = ac_new
        omega = 2.0 * math.pi * freq_Hz
        Cs = -1.0 / (omega * Z.imag)
        Rs = Z.real
        return _reading_from_Cs_D(Cs, omega * Cs * Rs, freq_Hz, ac, self._V, self._t)

    def _advance(self, t: float) -> None:
        """Bring relaxation and bias aging to time t (exact for a constant bias meanwhile)."""
        dt = t - self._t
        if dt <= 0:
            return
        s = self.sim
        self._lag *= math.exp(-dt / s.tau_relax_s)
        target = s.bias_aging_max_frac * (1.0 - self._w(self._V))
        tau = s.bias_aging_tau_s if target > self._bias_age else s.bias_recovery_tau_s
        self._bias_age = target + (self._bias_age - target) * math.exp(-dt / tau)
        self._t = t

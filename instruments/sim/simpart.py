"""What the simulated bench simulates of a part: its catalogue identity and its own physics.

Whoever starts a simulated bench hands it each part's nominal value, rating, class code (with
what the code promises, for the checks below), the reference conditions of its capacitance,
and the raw `[part.sim]` table. This module parses that table and nothing else of a
catalogue: the simulator has no parts file of its own.

Why strict: the table drives the physics, so a typo must not turn silently into a different
capacitor. Every problem is one line naming the entry and the field, as `SimPartError`.
"""

from __future__ import annotations

import difflib
import math
from dataclasses import dataclass
from typing import Any, Mapping

REFERENCE_TEMP_C = 25.0  # the temperature the physics refers C and its tempco to


class SimPartError(ValueError):
    """A `[part.sim]` table that cannot be simulated; the message is one line."""


@dataclass(frozen=True)
class ClassBand:
    """What the part's temperature code promises, as the physics table is checked against it.

    Class 2: C within [min_change_pct, max_change_pct] of its 25 degC value over [low_C, high_C];
    class 1: a coefficient tc_ppm_per_K +- tc_tol_ppm_per_K.
    """

    code: str
    dielectric_class: int
    low_C: float
    high_C: float
    min_change_pct: float = 0.0
    max_change_pct: float = 0.0
    tc_ppm_per_K: float = 0.0
    tc_tol_ppm_per_K: float = 0.0


@dataclass(frozen=True)
class SimParams:
    """Physics of one simulated part (the sim only; a real part has none of this on file).

    Every field carries its unit in its name; `_frac` is a dimensionless fraction and `D` a
    dissipation factor. The formulas are in instruments/sim/physics.py.
    """

    layer_thickness_m: float          # dielectric layer thickness d; field E = V/d
    char_field_V_per_m: float         # E_L of the Langevin-derivative bias curve
    bias_floor_frac: float            # C left at very high field / C(0) (lattice part)
    coercive_field_V_per_m: float     # Ec: Miller branch offset (half-width of the loop)
    tau_relax_s: float                # dielectric relaxation after a bias step
    relax_amplitude_frac: float       # share of a step's change that arrives with tau_relax_s
    bias_aging_max_frac: float        # slow drop under bias at full domain clamping
    bias_aging_tau_s: float           # time constant of that drop under bias
    bias_recovery_tau_s: float        # time constant of its recovery after the bias is gone
    rayleigh_coeff_m_per_V: float     # relative rise of C per V/m of rms AC field
    aging_k_pct_per_decade: float     # logarithmic aging, percent per decade of hours
    hours_since_heat_h: float         # age since the last de-aging heat at start of the run
    D_zero_bias: float                # dielectric dissipation factor at 0 V
    D_high_bias: float                # ... at very high field
    esr_ohm: float                    # electrode/termination series resistance
    insulation_RC_s: float            # insulation resistance times nominal C
    noise_frac: float                 # relative standard deviation of one meter reading
    tempco_points_C: tuple[float, ...] = ()    # class 2: temperatures of the C(T) curve
    tempco_points_pct: tuple[float, ...] = ()  # class 2: change from 25 degC there, percent
    tempco_ppm_per_K: float = 0.0              # class 1: linear coefficient
    esl_H: float = 1.0e-9                      # series inductance of the mounted part



@dataclass(frozen=True)
class SimPart:
    """One part as the simulated bench sees it."""

    id: str
    nominal_C_F: float
    rated_V: float
    band: ClassBand
    ref_freq_Hz: float          # conditions the nominal value refers to (the physics' reference)
    ref_level_Vrms: float
    sim: SimParams

    @property
    def class_code(self) -> str:
        return self.band.code

    @property
    def dielectric_class(self) -> int:
        return self.band.dielectric_class


def sim_part(part_id: str, nominal_C_F: float, rated_V: float, band: ClassBand,
             ref_freq_Hz: float, ref_level_Vrms: float, table: Mapping[str, Any],
             where: str) -> SimPart:
    """Build a SimPart from a raw `[part.sim]` table; `where` prefixes every message."""
    if not isinstance(table, Mapping):
        raise SimPartError(f"{where}: field 'sim': must be a table [part.sim]")
    params = _parse_sim(_Check(where), dict(table), "", band)
    return SimPart(part_id, float(nominal_C_F), float(rated_V), band, float(ref_freq_Hz),
                   float(ref_level_Vrms), params)


def _fmt(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, str):
        return repr(v)
    if isinstance(v, (list, tuple)):
        return "an array"
    if isinstance(v, dict):
        return "a table"
    return str(v)


class _Check:
    """One-line messages '<where>: field 'sim.<name>': <what>, got <v>'."""

    _KINDS = {"positive": ("must be a positive number", lambda v: v > 0),
              "nonneg": ("must be a number >= 0", lambda v: v >= 0),
              "fraction": ("must be a number from 0 to 1", lambda v: 0 <= v <= 1),
              "any": ("must be a number", lambda v: True)}

    def __init__(self, where: str):
        self.where = where

    def fail(self, _where: str, msg: str) -> SimPartError:
        return SimPartError(f"{self.where}: {msg}".replace("\n", " "))

    def field_fail(self, where: str, name: str, msg: str, value: Any = None,
                   show: bool = True) -> SimPartError:
        name = name if name.startswith("sim.") else f"sim.{name}"
        got = f", got {_fmt(value)}" if show else ""
        return self.fail(where, f"field {name!r}: {msg}{got}")

    def known(self, table: Mapping[str, Any], allowed: tuple[str, ...], where: str) -> None:
        for key in table:
            if key not in allowed:
                near = difflib.get_close_matches(key, allowed, n=1)
                hint = f"; did you mean {'sim.' + near[0]!r}?" if near else \
                    f"; known fields: {', '.join(allowed)}"
                raise self.fail(where, f"unknown field {'sim.' + key!r}{hint}")

    def get(self, table: Mapping[str, Any], name: str, where: str) -> Any:
        if name not in table:
            raise self.fail(where, f"missing field {'sim.' + name!r}; add it")
        return table[name]

    def number(self, table, name, where, kind="positive") -> float:
        return self.check_number(self.get(table, name, where), name, where, kind)

    def check_number(self, v, name, where, kind="positive") -> float:
        what, test = self._KINDS[kind]
        ok = isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v)
        if not (ok and test(v)):
            raise self.field_fail(where, name, what, v)
        return float(v)


_SIM_COMMON = {  # name -> kind of number
    "layer_thickness_m": "positive",
    "char_field_V_per_m": "positive",
    "bias_floor_frac": "fraction",
    "coercive_field_V_per_m": "nonneg",
    "tau_relax_s": "positive",
    "relax_amplitude_frac": "fraction",
    "bias_aging_max_frac": "fraction",
    "bias_aging_tau_s": "positive",
    "bias_recovery_tau_s": "positive",
    "rayleigh_coeff_m_per_V": "nonneg",
    "aging_k_pct_per_decade": "nonneg",
    "hours_since_heat_h": "positive",
    "D_zero_bias": "nonneg",
    "D_high_bias": "nonneg",
    "esr_ohm": "nonneg",
    "insulation_RC_s": "positive",
    "noise_frac": "nonneg",
}
# Optional fields (default when absent), so parts files written before them still load.
# ESL of small MLCCs: a few tenths of a nH to about 1 nH by case and mounting [common practice,
# from memory]; 1 nH is the larger end.
_SIM_OPTIONAL = {"esl_H": ("nonneg", 1.0e-9)}
_SIM_CLASS2 = ("tempco_points_C", "tempco_points_pct")
_SIM_CLASS1 = ("tempco_ppm_per_K",)


def _parse_sim(ck: _Check, s: dict, where: str, limits: ClassBand) -> SimParams:
    extra = _SIM_CLASS2 if limits.dielectric_class == 2 else _SIM_CLASS1
    other = _SIM_CLASS1 if limits.dielectric_class == 2 else _SIM_CLASS2
    for name in other:
        if name in s:
            give = " and ".join(f"'sim.{x}'" for x in extra)
            raise ck.field_fail(where, f"sim.{name}", f"not for a class-{limits.dielectric_class}"
                                f" code ({limits.code}); give {give}", s[name], show=False)
    ck.known(s, tuple(_SIM_COMMON) + extra + tuple(_SIM_OPTIONAL), where)
    values: dict[str, Any] = {}
    for name, kind in _SIM_COMMON.items():
        values[name] = ck.number(s, name, where, kind)
    for name, (kind, default) in _SIM_OPTIONAL.items():
        values[name] = ck.number(s, name, where, kind) if name in s else default
    if values["D_high_bias"] > values["D_zero_bias"]:
        raise ck.field_fail(where, "sim.D_high_bias", "must not exceed 'sim.D_zero_bias' "
                            "(losses fall with bias)", values["D_high_bias"])
    if limits.dielectric_class == 2:
        values.update(_parse_tempco_points(ck, s, where, limits))
    else:
        tc = ck.number(s, "tempco_ppm_per_K", where, "any")
        if abs(tc - limits.tc_ppm_per_K) > limits.tc_tol_ppm_per_K:
            raise ck.field_fail(where, "sim.tempco_ppm_per_K", f"must be within "
                                f"{limits.tc_ppm_per_K:g} +- {limits.tc_tol_ppm_per_K:g} ppm/K "
                                f"for {limits.code} (EIA-198)", tc)
        values["tempco_ppm_per_K"] = tc
    return SimParams(**values)


def _parse_tempco_points(ck: _Check, s: dict, where: str, lim: ClassBand) -> dict:
    out = {}
    for name in _SIM_CLASS2:
        v = ck.get(s, name, where)
        if not isinstance(v, list) or len(v) < 3:
            raise ck.field_fail(where, f"sim.{name}", "must be an array of at least 3 numbers",
                                v)
        out[name] = tuple(ck.check_number(x, name, where, "any") for x in v)
    temps, pcts = out["tempco_points_C"], out["tempco_points_pct"]
    if len(temps) != len(pcts):
        raise ck.field_fail(where, "sim.tempco_points_pct", f"must have as many entries as "
                            f"'sim.tempco_points_C' ({len(temps)})", f"{len(pcts)}")
    if any(b <= a for a, b in zip(temps, temps[1:])):
        raise ck.field_fail(where, "sim.tempco_points_C", "must be strictly increasing",
                            list(temps))
    if temps[0] > lim.low_C or temps[-1] < lim.high_C:
        raise ck.field_fail(where, "sim.tempco_points_C", f"must cover the {lim.code} range "
                            f"{lim.low_C:g}..{lim.high_C:g} degC", f"{temps[0]:g}..{temps[-1]:g}")
    if REFERENCE_TEMP_C not in temps or pcts[temps.index(REFERENCE_TEMP_C)] != 0.0:
        raise ck.fail(where, "field 'sim.tempco_points_C': must contain 25 degC with 0 % "
                      "change at it (EIA-198 reference temperature)")
    # No check of the changes against the code's band: the simulator simulates the physics it
    # is given, and a part whose physics leaves the band it is labelled with is exactly what
    # the class-code check (benchkit class-check) must catch.
    return out

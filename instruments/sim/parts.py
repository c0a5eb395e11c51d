"""Catalogue of the simulated parts, the fixture that holds them, and an incoming lot.

Why strict: a parts file drives the physics of the simulated bench, so a typo must not turn
silently into a different capacitor. Every problem is one line naming the file, the entry
and the field, raised as `PartsFileError` (a ValueError) that the benchkit layer turns into
its user error.

File formats (TOML, read with the standard library's tomllib):

parts file::

    company = "Brackwater Dynamics"
    [[part]]
    id, description, nominal_C_F, tolerance, rated_V, class_code, case, supplier
    [part.sim]      # physics of the simulated part, see SimParams for each field

fixture file::

    fixture_id = "..."              # optional
    description = "..."             # optional
    [[channel]]
    channel = 1                     # scanner channel 1..16
    sample_id = "FX-01"
    part_id = "BD-1001"

lot file::

    lot_id = "LOT-2611"
    part_id = "BD-1004"             # the part every sample of the lot is
    description = "..."             # optional
    [[sample]]
    sample_id = "LOT-2611-01"
    channel = 1
    C_scale = 1.03                  # this sample's C at 0 V, 25 degC, 1000 h / nominal
    field_scale = 0.97              # multiplies the part's characteristic field (shape spread)
    hours_since_heat_h = 400.0      # optional; default the part's own
"""

from __future__ import annotations

import difflib
import math
import tomllib
from dataclasses import dataclass, fields
from pathlib import Path
from typing import Any, Mapping

_DATA = Path(__file__).resolve().parents[2] / "data"
DEMO_PARTS = _DATA / "parts.toml"
DEMO_FIXTURE = _DATA / "fixture.toml"
DEMO_LOT = _DATA / "lot.toml"

SCANNER_CHANNELS = range(1, 17)  # the simulated scanner has 16 channels (instruments/COMMANDS.md)
REFERENCE_TEMP_C = 25.0  # reference temperature of the class codes [standard: EIA-198]


class PartsFileError(ValueError):
    """A parts, fixture or lot file that cannot be used; the message is one line."""


# --- Codes of the trade --------------------------------------------------------------------

# Tolerance letters [standard: IEC 60062]: relative (fraction) or absolute (farads).
TOLERANCE_RELATIVE = {"F": (0.01, 0.01), "G": (0.02, 0.02), "J": (0.05, 0.05),
                      "K": (0.10, 0.10), "M": (0.20, 0.20), "Z": (0.20, 0.80)}  # (minus, plus)
TOLERANCE_ABSOLUTE_F = {"B": 0.1e-12, "C": 0.25e-12, "D": 0.5e-12}
_ABSOLUTE_TOLERANCE_MAX_C_F = 10e-12  # B/C/D are used for values below 10 pF [standard: IEC 60062]

# EIA-198 class-2 code letters [standard: EIA-198].
_CLASS2_LOW_C = {"X": -55.0, "Y": -30.0, "Z": 10.0}
_CLASS2_HIGH_C = {"4": 65.0, "5": 85.0, "6": 105.0, "7": 125.0, "8": 150.0, "9": 200.0}
_CLASS2_CHANGE_PCT = {"F": (-7.5, 7.5), "P": (-10.0, 10.0), "R": (-15.0, 15.0),
                      "S": (-22.0, 22.0), "T": (-33.0, 22.0), "U": (-56.0, 22.0),
                      "V": (-82.0, 22.0)}
# EIA-198 class-1 codes used here: (temperature coefficient, its tolerance), ppm/K.
_CLASS1_PPM = {"C0G": (0.0, 30.0), "U2J": (-750.0, 120.0)}

# EIA inch case codes accepted in the catalogue.
CASE_CODES = ("01005", "0201", "0402", "0603", "0805", "1206", "1210", "1808", "1812",
              "2220", "2225")


@dataclass(frozen=True)
class ClassLimits:
    """What an EIA-198 temperature code promises.

    Class 2: C stays within [min_change_pct, max_change_pct] of its 25 degC value over
    [low_C, high_C]. Class 1: temperature coefficient tc_ppm_per_K +- tc_tol_ppm_per_K.
    """

    code: str
    dielectric_class: int
    low_C: float
    high_C: float
    min_change_pct: float = 0.0
    max_change_pct: float = 0.0
    tc_ppm_per_K: float = 0.0
    tc_tol_ppm_per_K: float = 0.0


def class_limits(code: str) -> ClassLimits:
    """Limits of an EIA-198 code (X7R, X5R, Y5V, C0G, U2J...); ValueError if unknown."""
    if code in _CLASS1_PPM:
        tc, tol = _CLASS1_PPM[code]
        # Class-1 coefficients are specified from -55 to +125 degC [standard: EIA-198].
        return ClassLimits(code, 1, -55.0, 125.0, tc_ppm_per_K=tc, tc_tol_ppm_per_K=tol)
    if (len(code) == 3 and code[0] in _CLASS2_LOW_C and code[1] in _CLASS2_HIGH_C
            and code[2] in _CLASS2_CHANGE_PCT):
        lo, hi = _CLASS2_CHANGE_PCT[code[2]]
        return ClassLimits(code, 2, _CLASS2_LOW_C[code[0]], _CLASS2_HIGH_C[code[1]], lo, hi)
    raise ValueError(f"unknown class code {code!r}")


# --- Data classes --------------------------------------------------------------------------

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


@dataclass(frozen=True)
class PartSpec:
    """One catalogue entry of the parts file (DEVELOPERS.md, "File formats")."""

    id: str
    description: str
    nominal_C_F: float
    tolerance: str
    rated_V: float
    class_code: str
    case: str
    supplier: str
    sim: SimParams | None = None

    @property
    def dielectric_class(self) -> int:
        return class_limits(self.class_code).dielectric_class

    def tolerance_limits_F(self) -> tuple[float, float]:
        """(lowest, highest) capacitance the tolerance letter allows [standard: IEC 60062]."""
        return tolerance_limits_F(self.nominal_C_F, self.tolerance)


@dataclass(frozen=True)
class FixtureSlot:
    """One sample sitting on one scanner channel of the bias fixture."""

    channel: int
    sample_id: str
    part_id: str


@dataclass(frozen=True)
class LotSample:
    """One sample of an incoming lot, with its own part-to-part spread."""

    channel: int
    sample_id: str
    part_id: str
    lot_id: str
    C_scale: float                     # C(0 V, 25 degC, 1000 h) / nominal_C_F
    field_scale: float = 1.0           # multiplies the part's char_field_V_per_m
    hours_since_heat_h: float | None = None  # None: the part's own


def tolerance_limits_F(nominal_C_F: float, letter: str) -> tuple[float, float]:
    """(lowest, highest) C for a tolerance letter [standard: IEC 60062]."""
    if letter in TOLERANCE_RELATIVE:
        minus, plus = TOLERANCE_RELATIVE[letter]
        return nominal_C_F * (1.0 - minus), nominal_C_F * (1.0 + plus)
    if letter in TOLERANCE_ABSOLUTE_F:
        a = TOLERANCE_ABSOLUTE_F[letter]
        return nominal_C_F - a, nominal_C_F + a
    raise ValueError(f"unknown tolerance letter {letter!r}")


def standard_conditions(spec: PartSpec) -> tuple[float, float]:
    """(freq_Hz, ac_level_Vrms) the part is specified at.

    [standard: IEC 60384-1 clause 4.2.2 with IEC 60384-21/-22, as quoted in detail
    specifications]: class 1 <= 1000 pF 1 MHz, else 1 kHz, 1.0 Vrms; class 2 <= 10 uF 1 kHz
    1.0 Vrms, > 10 uF 120 Hz 0.5 Vrms.
    """
    c = spec.nominal_C_F
    if spec.dielectric_class == 1:
        return (1e6 if c <= 1000e-12 * (1 + 1e-9) else 1e3), 1.0
    return (1e3, 1.0) if c <= 10e-6 * (1 + 1e-9) else (120.0, 0.5)


# --- Validation helpers --------------------------------------------------------------------

def _fmt(v: Any) -> str:
    if isinstance(v, str):
        return repr(v)
    if isinstance(v, (list, tuple)):
        return "an array"
    if isinstance(v, dict):
        return "a table"
    if isinstance(v, bool):
        return "true" if v else "false"
    return str(v)


class _Checker:
    """Builds the one-line messages: '<file>: <where>: field '<name>': <what>, got <v>'."""

    def __init__(self, path: Path | str):
        self.file = str(path)

    def fail(self, where: str, msg: str) -> PartsFileError:
        prefix = f"{self.file}: {where}: " if where else f"{self.file}: "
        return PartsFileError((prefix + msg).replace("\n", " "))

    def field_fail(self, where: str, name: str, msg: str, value: Any = None,
                   show: bool = True) -> PartsFileError:
        got = f", got {_fmt(value)}" if show else ""
        return self.fail(where, f"field {name!r}: {msg}{got}")

    def known(self, table: Mapping[str, Any], allowed: tuple[str, ...], where: str,
              prefix: str = "") -> None:
        for key in table:
            if key not in allowed:
                near = difflib.get_close_matches(key, allowed, n=1)
                hint = f"; did you mean {prefix + near[0]!r}?" if near else \
                    f"; known fields: {', '.join(allowed)}"
                raise self.fail(where, f"unknown field {prefix + key!r}{hint}")

    def get(self, table: Mapping[str, Any], name: str, where: str, prefix: str = "") -> Any:
        if name not in table:
            raise self.fail(where, f"missing field {prefix + name!r}; add it")
        return table[name]

    def string(self, table, name, where, prefix="") -> str:
        v = self.get(table, name, where, prefix)
        if not isinstance(v, str) or not v.strip():
            raise self.field_fail(where, prefix + name, "must be a non-empty string", v)
        return v

    def number(self, table, name, where, prefix="", kind="positive") -> float:
        v = self.get(table, name, where, prefix)
        return self.check_number(v, prefix + name, where, kind)

    def check_number(self, v, name, where, kind="positive") -> float:
        is_num = isinstance(v, (int, float)) and not isinstance(v, bool)
        ok = is_num and math.isfinite(v)
        if kind == "positive":
            ok = ok and v > 0
            what = "must be a positive number"
        elif kind == "nonneg":
            ok = ok and v >= 0
            what = "must be a number >= 0"
        elif kind == "fraction":
            ok = ok and 0 <= v <= 1
            what = "must be a number from 0 to 1"
        else:  # any finite number
            what = "must be a number"
        if not ok:
            raise self.field_fail(where, name, what, v)
        return float(v)

    def integer(self, table, name, where, allowed: range) -> int:
        v = self.get(table, name, where)
        if not isinstance(v, int) or isinstance(v, bool) or v not in allowed:
            raise self.field_fail(where, name, f"must be an integer from {allowed.start} "
                                  f"to {allowed.stop - 1}", v)
        return v

    def array_of_tables(self, doc, name, where="") -> list[dict]:
        v = doc.get(name)
        if v is None:
            raise self.fail(where, f"no [[{name}]] entries")
        if not isinstance(v, list) or not all(isinstance(e, dict) for e in v):
            raise self.field_fail(where, name, f"must be an array of tables [[{name}]]", v,
                                  show=False)
        if not v:
            raise self.fail(where, f"no [[{name}]] entries")
        return v


def _read_toml(path: Path | str) -> dict:
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise PartsFileError(f"{p}: file not found; give the path of a parts/fixture/lot "
                             "TOML file") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise PartsFileError(f"{p}: cannot read: {exc}".replace("\n", " ")) from None
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        # tomllib's message ends with "(at line L, column C)".
        raise PartsFileError(f"{p}: TOML syntax error: {exc}".replace("\n", " ")) from None


# --- Parts file ----------------------------------------------------------------------------

_PART_FIELDS = ("id", "description", "nominal_C_F", "tolerance", "rated_V", "class_code",
                "case", "supplier", "sim")
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
_SIM_CLASS2 = ("tempco_points_C", "tempco_points_pct")
_SIM_CLASS1 = ("tempco_ppm_per_K",)


def load_parts(path: Path | str) -> dict[str, PartSpec]:
    """Read a parts file into {part id: PartSpec}, in file order; PartsFileError if bad."""
    ck = _Checker(path)
    doc = _read_toml(path)
    ck.known(doc, ("company", "part"), "")
    ck.string(doc, "company", "")
    parts: dict[str, PartSpec] = {}
    for n, entry in enumerate(ck.array_of_tables(doc, "part"), start=1):
        pid = entry.get("id")
        where = f"part {n} ({pid})" if isinstance(pid, str) and pid.strip() else f"part {n}"
        spec = _parse_part(ck, entry, where)
        if spec.id in parts:
            raise ck.field_fail(where, "id", "duplicate part id (each id once)", spec.id)
        parts[spec.id] = spec
    return parts


def _parse_part(ck: _Checker, e: dict, where: str) -> PartSpec:
    ck.known(e, _PART_FIELDS, where)
    pid = ck.string(e, "id", where)
    if any(c.isspace() for c in pid):
        raise ck.field_fail(where, "id", "must not contain spaces", pid)
    description = ck.string(e, "description", where)
    nominal = ck.number(e, "nominal_C_F", where)
    tol = ck.string(e, "tolerance", where)
    if tol not in TOLERANCE_RELATIVE and tol not in TOLERANCE_ABSOLUTE_F:
        letters = "".join(sorted({**TOLERANCE_RELATIVE, **TOLERANCE_ABSOLUTE_F}))
        raise ck.field_fail(where, "tolerance", f"must be an IEC 60062 letter ({letters})",
                            tol)
    if tol in TOLERANCE_ABSOLUTE_F and nominal >= _ABSOLUTE_TOLERANCE_MAX_C_F:
        raise ck.field_fail(where, "tolerance", "B, C and D are for values below 10 pF; use "
                            "a percentage letter (F G J K M Z)", tol)
    rated = ck.number(e, "rated_V", where)
    code = ck.string(e, "class_code", where)
    try:
        limits = class_limits(code)
    except ValueError:
        raise ck.field_fail(where, "class_code", "must be an EIA-198 code such as X7R, X5R, "
                            "Y5V or C0G", code) from None
    case = ck.string(e, "case", where)
    if case not in CASE_CODES:
        raise ck.field_fail(where, "case", f"must be an EIA inch case code "
                            f"({', '.join(CASE_CODES)})", case)
    supplier = ck.string(e, "supplier", where)
    sim = None
    if "sim" in e:
        if not isinstance(e["sim"], dict):
            raise ck.field_fail(where, "sim", "must be a table [part.sim]", e["sim"],
                                show=False)
        sim = _parse_sim(ck, e["sim"], where, limits)
    return PartSpec(pid, description, nominal, tol, rated, code, case, supplier, sim)


def _parse_sim(ck: _Checker, s: dict, where: str, limits: ClassLimits) -> SimParams:
    extra = _SIM_CLASS2 if limits.dielectric_class == 2 else _SIM_CLASS1
    other = _SIM_CLASS1 if limits.dielectric_class == 2 else _SIM_CLASS2
    for name in other:
        if name in s:
            give = " and ".join(f"'sim.{x}'" for x in extra)
            raise ck.field_fail(where, f"sim.{name}", f"not for a class-{limits.dielectric_class}"
                                f" code ({limits.code}); give {give}", s[name], show=False)
    ck.known(s, tuple(_SIM_COMMON) + extra, where, prefix="sim.")
    values: dict[str, Any] = {}
    for name, kind in _SIM_COMMON.items():
        values[name] = ck.number(s, name, where, "sim.", kind)
    if values["D_high_bias"] > values["D_zero_bias"]:
        raise ck.field_fail(where, "sim.D_high_bias", "must not exceed 'sim.D_zero_bias' "
                            "(losses fall with bias)", values["D_high_bias"])
    if limits.dielectric_class == 2:
        values.update(_parse_tempco_points(ck, s, where, limits))
    else:
        tc = ck.number(s, "tempco_ppm_per_K", where, "sim.", "any")
        if abs(tc - limits.tc_ppm_per_K) > limits.tc_tol_ppm_per_K:
            raise ck.field_fail(where, "sim.tempco_ppm_per_K", f"must be within "
                                f"{limits.tc_ppm_per_K:g} +- {limits.tc_tol_ppm_per_K:g} ppm/K "
                                f"for {limits.code} (EIA-198)", tc)
        values["tempco_ppm_per_K"] = tc
    return SimParams(**values)


def _parse_tempco_points(ck: _Checker, s: dict, where: str, lim: ClassLimits) -> dict:
    out = {}
    for name in _SIM_CLASS2:
        v = ck.get(s, name, where, "sim.")
        if not isinstance(v, list) or len(v) < 3:
            raise ck.field_fail(where, f"sim.{name}", "must be an array of at least 3 numbers",
                                v)
        out[name] = tuple(ck.check_number(x, f"sim.{name}", where, "any") for x in v)
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
    for t, p in zip(temps, pcts):
        if lim.low_C <= t <= lim.high_C and not lim.min_change_pct <= p <= lim.max_change_pct:
            raise ck.field_fail(where, "sim.tempco_points_pct", f"{p:g} % at {t:g} degC is "
                                f"outside the {lim.code} limits {lim.min_change_pct:g}.."
                                f"{lim.max_change_pct:+g} % (EIA-198)", p)
    return out


# --- Fixture and lot files -----------------------------------------------------------------

def _check_part_ref(ck, where, part_id, parts):
    if parts is not None and part_id not in parts:
        ids = list(parts)
        known = ", ".join(ids[:12]) + (", ..." if len(ids) > 12 else "") if ids else "none"
        raise ck.field_fail(where, "part_id", f"unknown part (parts on file: {known})", part_id)


def _slot_common(ck, entry, where, seen_ch, seen_ids):
    ch = ck.integer(entry, "channel", where, SCANNER_CHANNELS)
    if ch in seen_ch:
        raise ck.field_fail(where, "channel", f"channel already used by {seen_ch[ch]}", ch)
    sid = ck.string(entry, "sample_id", where)
    if sid in seen_ids:
        raise ck.field_fail(where, "sample_id", "duplicate sample id", sid)
    seen_ch[ch] = sid
    seen_ids.add(sid)
    return ch, sid


def load_fixture(path: Path | str, parts: Mapping[str, PartSpec] | None = None
                 ) -> list[FixtureSlot]:
    """Read a fixture file into slots sorted by channel.

    With `parts` every part_id must be on file; without, that cross-check is skipped.
    """
    ck = _Checker(path)
    doc = _read_toml(path)
    ck.known(doc, ("fixture_id", "description", "channel"), "")
    for name in ("fixture_id", "description"):
        if name in doc:
            ck.string(doc, name, "")
    slots, seen_ch, seen_ids = [], {}, set()
    for n, entry in enumerate(ck.array_of_tables(doc, "channel"), start=1):
        sid_raw = entry.get("sample_id")
        where = f"channel entry {n} ({sid_raw})" if isinstance(sid_raw, str) else \
            f"channel entry {n}"
        ck.known(entry, ("channel", "sample_id", "part_id"), where)
        ch, sid = _slot_common(ck, entry, where, seen_ch, seen_ids)
        pid = ck.string(entry, "part_id", where)
        _check_part_ref(ck, where, pid, parts)
        slots.append(FixtureSlot(ch, sid, pid))
    return sorted(slots, key=lambda s: s.channel)


def load_lot(path: Path | str, parts: Mapping[str, PartSpec] | None = None
             ) -> list[LotSample]:
    """Read a lot file into samples sorted by channel (a lot is one part, many samples)."""
    ck = _Checker(path)
    doc = _read_toml(path)
    ck.known(doc, ("lot_id", "part_id", "description", "sample"), "")
    lot_id = ck.string(doc, "lot_id", "")
    pid = ck.string(doc, "part_id", "")
    _check_part_ref(ck, "", pid, parts)
    if "description" in doc:
        ck.string(doc, "description", "")
    samples, seen_ch, seen_ids = [], {}, set()
    for n, entry in enumerate(ck.array_of_tables(doc, "sample"), start=1):
        sid_raw = entry.get("sample_id")
        where = f"sample {n} ({sid_raw})" if isinstance(sid_raw, str) else f"sample {n}"
        ck.known(entry, ("sample_id", "channel", "C_scale", "field_scale",
                         "hours_since_heat_h"), where)
        ch, sid = _slot_common(ck, entry, where, seen_ch, seen_ids)
        c_scale = ck.number(entry, "C_scale", where)
        f_scale = ck.number(entry, "field_scale", where)
        hours = None
        if "hours_since_heat_h" in entry:
            hours = ck.number(entry, "hours_since_heat_h", where)
        samples.append(LotSample(ch, sid, pid, lot_id, c_scale, f_scale, hours))
    return sorted(samples, key=lambda s: s.channel)


def catalogue_dict(spec: PartSpec) -> dict[str, Any]:
    """The catalogue fields of a part as plain data (for run.json 'samples[].part')."""
    return {f.name: getattr(spec, f.name) for f in fields(spec) if f.name != "sim"}

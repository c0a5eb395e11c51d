"""Sweep plans: a TOML file that says what to measure, checked in full before any voltage.

A plan is refused with one line naming the file and the field when anything is wrong, also
when a bias point would exceed a part's rated voltage (unless the plan says
`allow_above_rated = true`) or the supply's range. The checks run before the supply is
touched, so a bad plan never leaves a charged part behind.

Layout (every field in SI units; see data/plans/demo.toml):

    name = "..."                     # optional
    [[samples]]                      # optional; default: every channel of the bench's fixture
    sample_id = "FX-01"; part_id = "BD-1001"; channel = 1
    [bias]                           # one of: points_V | start_V,stop_V,step_V | fraction_of_rated,steps
    points_V = [0, 1, 2, 4]          # magnitudes of the rising leg, ascending
    start_V = 0.0; stop_V = 6.0; step_V = 1.0
    fraction_of_rated = 0.8; steps = 8   # 0 .. 0.8 * rated_V of each sample's part
    branches = ["rising", "falling"] # rising leg, then back down (hysteresis)
    polarity = "positive"            # | "negative" | "both"
    repeats = 1
    [measure]
    dwell_s = 2.0; dwell = "fixed"; n_readings = 3
    function = "CPD"; freq_Hz = 1000.0; ac_level_Vrms = 1.0   # optional: default = standard
    [settle]                         # with dwell = "settle" (benchkit/sweep/settle.py)
    max_drift_pct_per_s = 0.01; max_dwell_s = 60.0   # and/or a residual bound instead:
    max_residual_pct_of_reading = 0.1; max_residual_pct_of_C0 = 0.05; max_tau_s = 20.0
    max_prediction_u_pct_of_C0 = 0.1 # or: record the settled value predicted from the transient
    min_dwell_s = 0.5; window_s = 2.0; read_interval_s = 0.0
    feed_R_ohm = 10e3; charge_time_constants = 8   # optional: wait 8*R*C, C as read at each bias
    [adaptive]                       # optional: adaptive bias steps (benchkit/sweep/adaptive.py)
    target_band_pct_of_C0 = 0.5; max_points = 40; coarse_points = 7
    coverage_k = 2.0; resolution_V = 0.05; model = "auto"
    [frequency]                      # optional: Z(f) at every bias point (benchkit/sweep/frequency.py)
    start_Hz = 100.0; stop_Hz = 10e6; points_per_decade = 5   # or list_Hz = [...]
    [limits]
    current_limit_A = 0.01; max_ramp_V_per_s = 2.0
    discharge_wait_s = 5.0           # or discharge_R_ohm: then R*C*ln(V0/V_safe)
    discharge_R_ohm = 110e3; safe_V = 1.0
    allow_above_rated = false; bias_tolerance_V = 0.05; temp_tolerance_C = 2.0

Branch words follow the bias magnitude: "rising" while |V| moves away from 0 V, "falling"
while it comes back. For positive bias that is the direction of V itself.
"""

from __future__ import annotations

import hashlib
import json
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Iterable, Iterator, Mapping, Sequence

from benchkit.bounded import check_free_text, check_id, did_you_mean, loads_toml, safe_repr
from benchkit.catalogue import conditions as std
from benchkit.errors import UserError

PLAN_VERSION = 1
BRANCHES = ("rising", "falling")
POLARITIES = ("positive", "negative", "both")
FUNCTIONS = ("CPD", "CSD", "CSRS")
DWELL_POLICIES = ("fixed", "settle")  # "settle": benchkit/sweep/settle.py, needs a [settle] table
METER_FREQ_RANGE_HZ = (20.0, 10e6)  # generic command set, instruments/COMMANDS.md
METER_LEVEL_RANGE_VRMS = (0.005, 2.0)
_POINT_TOL_V = 1e-9

# Physical bounds of every limit, checked when the plan is read (the bench's own ranges, from
# its instrument profiles, are checked again before anything is opened: benchkit/sweep/limits.py).
# Each is far outside what a capacitor bench needs and well inside what would make a limit
# meaningless [common practice: bench supplies of 1e-4 .. a few A, ramps of mV/s .. tens of V/s,
# dwell of seconds .. minutes, discharge waits of seconds .. minutes].
MAX_BIAS_V = 1000.0
CURRENT_LIMIT_RANGE_A = (1e-6, 10.0)
RAMP_RANGE_V_PER_S = (1e-3, 1000.0)  # 1 V/ms: a fast bench supply's slew
MAX_DWELL_S = 3600.0  # any one wait: dwell, settle limits, discharge wait
DISCHARGE_R_RANGE_OHM = (1.0, 1e9)
SAFE_V_RANGE = (0.01, 50.0)  # below 0.01 V a bleed wait grows without bound; above 50 V is not "safe"
BIAS_TOLERANCE_RANGE_V = (1e-6, 10.0)
TEMP_TOLERANCE_RANGE_C = (0.01, 50.0)
MAX_CHANNEL = 1024
MAX_AGE_H = 1e6  # about 114 years since the last heat


# --------------------------------------------------------------------------- data


@dataclass(frozen=True)
class SampleRef:
    """One capacitor on one scanner channel."""

    sample_id: str
    part_id: str
    channel: int
    hours_since_heat_h: float | None = None  # age since the last de-aging heat, at run start


@dataclass(frozen=True)
class PlannedPoint:
    """One bias step of one sample; (sample_id, repeat, step_index) is its key in points.csv."""

    sample_id: str
    repeat: int
    step_index: int
    branch: str
    bias_V: float

    @property
    def key(self) -> tuple[str, int, int]:
        return (self.sample_id, self.repeat, self.step_index)


class PlannedPoints(Sequence):
    """The points of a sample, made when asked for: one repeat's sequence times the repeats.

    Why not a tuple: a soak run of a million points would hold a million objects for the
    whole run; this holds one repeat's (branch, bias) pairs, whatever the number of repeats.
    """

    __slots__ = ("sample_id", "seq", "repeats")

    def __init__(self, sample_id: str, seq: Sequence[tuple[str, float]], repeats: int):
        self.sample_id, self.seq, self.repeats = sample_id, tuple(seq), int(repeats)

    def __len__(self) -> int:
        return len(self.seq) * self.repeats

    def _at(self, i: int) -> PlannedPoint:
        r, k = divmod(i, len(self.seq))
        br, v = self.seq[k]
        return PlannedPoint(self.sample_id, r + 1, k, br, v)

    def __getitem__(self, i):
        n = len(self)
        if isinstance(i, slice):
            return tuple(self._at(j) for j in range(*i.indices(n)))
        if i < 0:
            i += n
        if not 0 <= i < n:
            raise IndexError("planned point index out of range")
        return self._at(i)

    def __iter__(self) -> Iterator[PlannedPoint]:
        for j in range(len(self)):
            yield self._at(j)

    def __eq__(self, other) -> bool:
        if isinstance(other, PlannedPoints):
            return (self.sample_id, self.seq, self.repeats) == (other.sample_id, other.seq, other.repeats)
        return isinstance(other, Sequence) and len(other) == len(self) and tuple(other) == tuple(self)

    def __repr__(self) -> str:
        return f"PlannedPoints({self.sample_id!r}, {len(self.seq)} per repeat x {self.repeats})"


@dataclass(frozen=True)
class MeterConditions:
    function: str
    freq_Hz: float
    ac_level_Vrms: float
    source: str


@dataclass(frozen=True)
class SampleSweep:
    """A sample with its part, its meter settings and its planned points, in order."""

    sample: SampleRef
    part: Any  # a catalogue PartSpec (id, nominal_C_F, rated_V, class_code, ...)
    conditions: MeterConditions
    points: Sequence[PlannedPoint]  # a tuple, or PlannedPoints (made when asked for)
    # adaptive steps: a benchkit.sweep.adaptive.LoopPlanner; `points` is then its first (coarse)
    # pass and the engine asks it for each further pass
    adaptive: Any = None
    temp_set_C: float | None = None  # the chamber set point of this visit (benchkit/sweep/temperature.py)


@dataclass(frozen=True)
class Plan:
    """A validated sweep plan. `data` is its normalised form (stored in run.json, hashed)."""

    source: str
    data: dict

    # convenient views ------------------------------------------------------
    @property
    def sha256(self) -> str:
        return plan_sha256(self.data)

    @property
    def name(self) -> str:
        return self.data["name"]

    @property
    def samples(self) -> tuple[SampleRef, ...] | None:
        s = self.data.get("samples")
        return None if s is None else tuple(SampleRef(**x) for x in s)

    @property
    def bias(self) -> dict:
        return self.data["bias"]

    @property
    def measure(self) -> dict:
        return self.data["measure"]

    @property
    def limits(self) -> dict:
        return self.data["limits"]

    @property
    def settle(self) -> dict | None:
        """The [settle] table (dwell = "settle"), or None."""
        return self.data.get("settle")

    @property
    def adaptive(self) -> dict | None:
        """The [adaptive] table (adaptive bias steps), or None."""
        return self.data.get("adaptive")

    @property
    def frequency(self) -> dict | None:
        """The [frequency] table (benchkit/sweep/frequency.py), or None."""
        return self.data.get("frequency")

    @property
    def n_readings(self) -> int:
        return self.measure["n_readings"]

    @property
    def dwell_s(self) -> float:
        return self.measure["dwell_s"]

    @property
    def current_limit_A(self) -> float:
        return self.limits["current_limit_A"]

    @property
    def max_ramp_V_per_s(self) -> float:
        return self.limits["max_ramp_V_per_s"]

    # derived ----------------------------------------------------------------
    def leg_magnitudes(self, rated_V: float) -> list[float]:
        """Bias magnitudes of the rising leg, ascending, for a part of this rated voltage."""
        b = self.bias
        if b.get("points_V") is not None:
            return list(b["points_V"])
        if b.get("step_V") is not None:
            n = round((b["stop_V"] - b["start_V"]) / b["step_V"])
            return [_clean(b["start_V"] + k * b["step_V"]) for k in range(n + 1)]
        top = b["fraction_of_rated"] * rated_V
        return [_clean(top * k / b["steps"]) for k in range(b["steps"] + 1)]

    def sequence(self, rated_V: float) -> list[tuple[str, float]]:
        """(branch, bias_V) for one repeat, in the order they are measured."""
        mags = self.leg_magnitudes(rated_V)
        legs: list[tuple[str, float]] = []
        signs = {"positive": (1.0,), "negative": (-1.0,), "both": (1.0, -1.0)}[self.bias["polarity"]]
        for i, sign in enumerate(signs):
            rising = mags if (i == 0 or mags[0] != 0.0) else mags[1:]  # 0 V once per loop
            if "rising" in self.bias["branches"]:
                legs += [("rising", _signed(sign, m)) for m in rising]
            if "falling" in self.bias["branches"]:
                legs += [("falling", _signed(sign, m)) for m in reversed(mags[:-1])]
        return legs

    def max_abs_bias_V(self, rated_V: float) -> float:
        return max(abs(v) for _, v in self.sequence(rated_V))

    def to_dict(self) -> dict:
        return json.loads(json.dumps(self.data))


def _signed(sign: float, mag: float) -> float:
    return 0.0 if mag == 0 else sign * mag


def _clean(v: float) -> float:
    """Round away float dust (0.30000000000000004) so set points print as written."""
    return float(f"{v:.12g}")


def plan_sha256(data: Mapping) -> str:
    """Hash of the normalised plan: the identity resume checks against."""
    text = json.dumps(data, sort_keys=True, separators=(",", ":"), allow_nan=False)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


# --------------------------------------------------------------------------- loading


def load_plan(path: str | Path, parts: Mapping[str, Any] | None = None) -> Plan:
    """Read and validate a plan file; with `parts`, also check its samples against them."""
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise UserError(f"{p}: plan file not found; give an existing file to --plan") from None
    except OSError as exc:
        raise UserError(f"{p}: cannot read plan file ({exc.strerror})") from None
    except UnicodeDecodeError:
        raise UserError(f"{p}: plan file is not UTF-8 text") from None
    raw = loads_toml(text, str(p), "plan file")
    plan = parse_plan(raw, str(p))
    if parts is not None and plan.samples is not None:
        for s in plan.samples:
            check_sample(plan, s, parts)
    return plan


def parse_plan(raw: Mapping, where: str) -> Plan:
    """Validate a plan mapping (from TOML or from run.json) into its normalised form."""
    if not isinstance(raw, Mapping):
        raise UserError(f"{where}: a plan must be a table of fields")
    top = _Fields(raw, where, "")
    data: dict[str, Any] = {"version": PLAN_VERSION}
    version = top.integer("version", default=PLAN_VERSION, lo=1)
    if version != PLAN_VERSION:
        raise UserError(f"{where}: field 'version': plan version {version} is not known (this is {PLAN_VERSION})")
    data["name"] = check_free_text(top.string("name", default=Path(where).stem if where else "plan"),
                                   where, "name")
    data["description"] = check_free_text(top.string("description", default=""), where, "description")
    data["samples"] = _parse_samples(top.take("samples", default=None), where)
    data["bias"] = _parse_bias(top.table("bias", required=True), where)
    data["measure"] = _parse_measure(top.table("measure", required=True), where)
    data["limits"] = _parse_limits(top.table("limits", required=True), where)
    # optional tables are stored only when given, so plans without them keep their hash
    settle = top.take("settle", default=None)
    if data["measure"]["dwell"] == "settle" and settle is None:
        raise UserError(f"{where}: field 'settle': missing; measure.dwell = \"settle\" needs a [settle] "
                        "table with max_drift_pct_per_s and max_dwell_s")
    if settle is not None:
        if data["measure"]["dwell"] != "settle":
            raise UserError(f"{where}: field 'settle': given but measure.dwell is "
                            f"{data['measure']['dwell']!r}; set dwell = \"settle\" or remove [settle]")
        if not isinstance(settle, Mapping):
            raise UserError(f"{where}: field 'settle': must be a table [settle]")
        data["settle"] = _parse_settle(settle, where)
    temperature = top.take("temperature", default=None)
    if temperature is not None:
        from benchkit.sweep.temperature import parse_temperature

        data["temperature"] = parse_temperature(temperature, where, _Fields)
    adaptive = top.take("adaptive", default=None)
    if adaptive is not None:
        if not isinstance(adaptive, Mapping):
            raise UserError(f"{where}: field 'adaptive': must be a table [adaptive]")
        data["adaptive"] = _parse_adaptive(adaptive, data["bias"], where)
    frequency = top.take("frequency", default=None)  # impedance against frequency per point
    if frequency is not None:
        from benchkit.sweep.frequency import parse_frequency

        data["frequency"] = parse_frequency(frequency, where, METER_FREQ_RANGE_HZ, METER_LEVEL_RANGE_VRMS)
    top.done()
    return Plan(source=where, data=data)


def _parse_samples(value: Any, where: str) -> list[dict] | None:
    if value is None:
        return None
    if not isinstance(value, list) or not value:
        raise UserError(f"{where}: field 'samples': must be a non-empty list of [[samples]] tables")
    out: list[dict] = []
    ids: set[str] = set()
    channels: set[int] = set()
    for i, item in enumerate(value, 1):
        if not isinstance(item, Mapping):
            raise UserError(f"{where}: field 'samples[{i}]': must be a table with sample_id, part_id, channel")
        f = _Fields(item, where, f"samples[{i}].")
        s = {
            "sample_id": f.ident("sample_id"),
            "part_id": f.ident("part_id"),
            "channel": f.integer("channel", required=True, lo=1, hi=MAX_CHANNEL),
        }
        age = f.number("hours_since_heat_h", positive=True, hi=MAX_AGE_H)
        if age is not None:  # verify refers readings to the claim's age with the aging law
            s["hours_since_heat_h"] = age
        f.done()
        if s["sample_id"] in ids:
            raise UserError(f"{where}: field 'samples[{i}].sample_id': {s['sample_id']!r} appears twice")
        if s["channel"] in channels:
            raise UserError(f"{where}: field 'samples[{i}].channel': channel {s['channel']} appears twice")
        ids.add(s["sample_id"])
        channels.add(s["channel"])
        out.append(s)
    return out


BIAS_KEYS = ("points_V", "start_V", "stop_V", "step_V", "fraction_of_rated", "steps",
             "branches", "polarity", "repeats")


def _bias_text_hint(v: Any, field: str, where: str) -> UserError:
    """A bias written as text ("4u7", "12V"): say what it would read as and how to write it."""
    from benchkit.units import format_value, parse_value

    try:
        x = parse_value(v, "V", field)
    except UserError:
        return UserError(f"{where}: field '{field}': must be a number (got {safe_repr(v)}); write volts "
                         f"as a TOML number without quotes, e.g. 12 or 4.7")
    rkm = f" ('{v}' is the IEC 60062 way of writing {format_value(abs(x) * 1e6, '', digits=4)} "\
          f"micro, a capacitance value)" if "u" in str(v) or "\u00b5" in str(v) else ""
    return UserError(f"{where}: field '{field}': must be a number (got {safe_repr(v)}); as text it reads as "
                     f"{format_value(x, 'V')}{rkm}: write volts as a TOML number without quotes, "
                     f"e.g. 4.7 for 4.7 V")


def _parse_bias(raw: Mapping, where: str) -> dict:
    f = _Fields(raw, where, "bias.")
    f.refuse_unknown(BIAS_KEYS)  # a typo (stpes) is named before a field is reported missing
    b: dict[str, Any] = {"points_V": None, "start_V": None, "stop_V": None, "step_V": None,
                         "fraction_of_rated": None, "steps": None}
    kinds = [k for k in ("points_V", "step_V", "fraction_of_rated") if raw.get(k) is not None]
    if len(kinds) != 1:
        raise UserError(
            f"{where}: field 'bias': give exactly one of points_V = [...], "
            "start_V/stop_V/step_V, or fraction_of_rated/steps"
        )
    if kinds == ["points_V"]:
        pts = f.take("points_V")
        if not isinstance(pts, list) or not pts:
            raise UserError(f"{where}: field 'bias.points_V': must be a non-empty list of volts")
        clean = []
        for i, v in enumerate(pts):
            if isinstance(v, str):
                raise _bias_text_hint(v, f"bias.points_V[{i}]", where)
            if not _is_number(v) or v < 0 or v > MAX_BIAS_V:
                raise UserError(
                    f"{where}: field 'bias.points_V[{i}]': must be a bias magnitude from 0 to "
                    f"{MAX_BIAS_V:g} V (got {safe_repr(v)}); use polarity = \"negative\" for negative bias"
                )
            if clean and v <= clean[-1]:
                raise UserError(f"{where}: field 'bias.points_V[{i}]': points must rise strictly (got {v!r} after {clean[-1]!r})")
            clean.append(float(v))
        b["points_V"] = clean
    elif kinds == ["step_V"]:
        for k in ("start_V", "stop_V", "step_V"):
            if isinstance(raw.get(k), str):
                raise _bias_text_hint(raw[k], f"bias.{k}", where)
        b["start_V"] = f.number("start_V", default=0.0, lo=0.0, hi=MAX_BIAS_V)
        b["stop_V"] = f.number("stop_V", required=True, lo=0.0, hi=MAX_BIAS_V)
        b["step_V"] = f.number("step_V", required=True, positive=True, hi=MAX_BIAS_V)
        span = b["stop_V"] - b["start_V"]
        if span <= 0:
            raise UserError(f"{where}: field 'bias.stop_V': must be above start_V ({b['start_V']} V)")
        n = span / b["step_V"]
        if abs(n - round(n)) > 1e-6 * max(1.0, n):
            raise UserError(f"{where}: field 'bias.step_V': stop_V - start_V = {span:g} V is not a whole number of steps of {b['step_V']:g} V")
        if round(n) > 10000:
            raise UserError(f"{where}: field 'bias.step_V': {round(n)} steps is too many (at most 10000)")
    else:
        b["fraction_of_rated"] = f.number("fraction_of_rated", required=True, positive=True, hi=2.0)
        b["steps"] = f.integer("steps", required=True, lo=1, hi=10000)
    used = {"points_V": ("points_V",), "step_V": ("start_V", "stop_V", "step_V"),
            "fraction_of_rated": ("fraction_of_rated", "steps")}[kinds[0]]
    for k in ("points_V", "start_V", "stop_V", "step_V", "fraction_of_rated", "steps"):
        if k not in used and raw.get(k) is not None:
            raise UserError(f"{where}: field 'bias.{k}': not used with bias.{kinds[0]}; remove one of them")
        f.seen(k)
    b["branches"] = f.string_list("branches", default=list(BRANCHES), choices=BRANCHES)
    if not b["branches"] or b["branches"][0] != "rising" or len(set(b["branches"])) != len(b["branches"]):
        raise UserError(f"{where}: field 'bias.branches': must be [\"rising\"] or [\"rising\", \"falling\"]")
    b["polarity"] = f.choice("polarity", POLARITIES, default="positive")
    b["repeats"] = f.integer("repeats", default=1, lo=1, hi=1000)
    f.done()
    return b


def _parse_measure(raw: Mapping, where: str) -> dict:
    f = _Fields(raw, where, "measure.")
    m = {
        "dwell": f.choice("dwell", DWELL_POLICIES, default="fixed"),
        # a settle policy takes its times from [settle]; a fixed dwell needs its dwell_s
        "dwell_s": f.number("dwell_s", required=raw.get("dwell", "fixed") == "fixed", lo=0.0,
                            hi=MAX_DWELL_S),
        "n_readings": f.integer("n_readings", default=3, lo=1, hi=1000),
        "function": None if raw.get("function") is None else f.choice("function", FUNCTIONS, upper=True),
        "freq_Hz": f.number("freq_Hz", default=None, lo=METER_FREQ_RANGE_HZ[0], hi=METER_FREQ_RANGE_HZ[1]),
        "ac_level_Vrms": f.number("ac_level_Vrms", default=None, lo=METER_LEVEL_RANGE_VRMS[0], hi=METER_LEVEL_RANGE_VRMS[1]),
    }
    f.seen("function")
    f.done()
    return m


def _parse_settle(raw: Mapping, where: str) -> dict:
    """[settle]: the thresholds of settle detection (benchkit/sweep/settle.py)."""
    f = _Fields(raw, where, "settle.")
    st = {
        # either threshold, or both: the drift rate, or the residual left (settle.py docstring)
        "max_residual_pct_of_reading": f.number("max_residual_pct_of_reading", default=None,
                                                positive=True, hi=100.0),
        "max_residual_pct_of_C0": f.number("max_residual_pct_of_C0", default=None,
                                           positive=True, hi=100.0),
        "max_tau_s": f.number("max_tau_s", default=20.0, positive=True, hi=MAX_DWELL_S),
        # or read the settled value off the relaxation fit (settle.py, prediction rule)
        "max_prediction_u_pct_of_C0": f.number("max_prediction_u_pct_of_C0", default=None,
                                               positive=True, hi=100.0),
    }
    no_residual = (st["max_residual_pct_of_reading"] is None and st["max_residual_pct_of_C0"] is None
                   and st["max_prediction_u_pct_of_C0"] is None)
    st["max_drift_pct_per_s"] = f.number("max_drift_pct_per_s", required=no_residual,
                                         positive=True, hi=100.0)
    st.update({
        "max_dwell_s": f.number("max_dwell_s", required=True, positive=True, hi=MAX_DWELL_S),
        "min_dwell_s": f.number("min_dwell_s", default=0.5, lo=0.0, hi=MAX_DWELL_S),
        "window_s": f.number("window_s", default=2.0, positive=True, hi=MAX_DWELL_S),
        "read_interval_s": f.number("read_interval_s", default=0.0, lo=0.0, hi=MAX_DWELL_S),
        # the fixture's feed resistor: a large part then waits longer to charge (settle.py)
        "feed_R_ohm": f.number("feed_R_ohm", default=None, positive=True, hi=1e9),
        "charge_time_constants": f.number("charge_time_constants", default=None, positive=True,
                                          hi=50.0),
    })
    f.done()
    for key in ("feed_R_ohm", "charge_time_constants"):
        if st[key] is None:
            del st[key]  # plans without them keep their digest
    if st["max_prediction_u_pct_of_C0"] is None:
        del st["max_prediction_u_pct_of_C0"]  # plans without it keep their digest
    if st["min_dwell_s"] > st["max_dwell_s"]:
        raise UserError(f"{where}: field 'settle.min_dwell_s': {st['min_dwell_s']:g} s is above "
                        f"max_dwell_s ({st['max_dwell_s']:g} s); lower it or raise max_dwell_s")
    return st


def _parse_adaptive(raw: Mapping, bias: Mapping, where: str) -> dict:
    """[adaptive]: the target and budget of adaptive bias steps (benchkit/sweep/adaptive.py,
    whose AdaptiveSettings holds the defaults)."""
    from dataclasses import fields

    from benchkit.sweep.adaptive import COARSE_SPACINGS, AdaptiveSettings

    d = {x.name: x.default for x in fields(AdaptiveSettings)}
    f = _Fields(raw, where, "adaptive.")
    ad = {
        "target_band_pct_of_C0": f.number("target_band_pct_of_C0", required=True, positive=True,
                                          hi=100.0),
        "max_points": f.integer("max_points", default=d["max_points"], lo=3, hi=10000),
        "coarse_points": f.integer("coarse_points", default=d["coarse_points"], lo=3, hi=1000),
        # the first loop: "stepped" (each step aims at a change of C) or "even" (coarse_points
        # evenly spaced); benchkit/sweep/adaptive.py LoopPlanner._continue_first
        "coarse_spacing": f.choice("coarse_spacing", COARSE_SPACINGS, default=d["coarse_spacing"]),
        "coarse_step_pct_of_C0": f.number("coarse_step_pct_of_C0", default=d["coarse_step_pct_of_C0"],
                                          positive=True, hi=99.0),
        "coverage_k": f.number("coverage_k", default=d["coverage_k"], positive=True, hi=10.0),
        "resolution_V": f.number("resolution_V", default=d["resolution_V"], positive=True, hi=MAX_BIAS_V),
        "model": f.string("model", default=d["model"], nonempty=True),
    }
    f.done()
    if ad["max_points"] < 2 * ad["coarse_points"] - 1 and "falling" in bias["branches"]:
        raise UserError(f"{where}: field 'adaptive.max_points': {ad['max_points']} is below the coarse "
                        f"loop of 2*coarse_points - 1 = {2 * ad['coarse_points'] - 1} points; raise it")
    if ad["max_points"] < ad["coarse_points"]:
        raise UserError(f"{where}: field 'adaptive.max_points': {ad['max_points']} is below "
                        f"coarse_points ({ad['coarse_points']}); raise it")
    from fits import models  # the fitted laws (not the table interpolant)

    names = [n for n in models.names() if models.get(n).fitted]
    if ad["model"] != "auto" and ad["model"] not in names:
        raise UserError(f"{where}: field 'adaptive.model': {ad['model']!r} is not a fitted model; "
                        f"use \"auto\" or one of {', '.join(names)}")
    if bias["polarity"] == "both":
        raise UserError(f"{where}: field 'bias.polarity': adaptive steps sweep one polarity per loop; "
                        "use \"positive\" or \"negative\" (or leave out [adaptive])")
    if bias["repeats"] != 1:
        raise UserError(f"{where}: field 'bias.repeats': adaptive steps use the repeat column for "
                        "their passes; set repeats = 1 (or leave out [adaptive])")
    lowest = (bias["points_V"][0] if bias.get("points_V") is not None
              else bias["start_V"] if bias.get("step_V") is not None else 0.0)
    if lowest != 0.0:
        raise UserError(f"{where}: field 'bias': adaptive steps start at 0 V (C0 is the value there); "
                        "let the bias range start at 0 V")
    return ad


def _parse_limits(raw: Mapping, where: str) -> dict:
    f = _Fields(raw, where, "limits.")
    lim = {
        "current_limit_A": f.number("current_limit_A", required=True, positive=True,
                                    lo=CURRENT_LIMIT_RANGE_A[0], hi=CURRENT_LIMIT_RANGE_A[1]),
        "max_ramp_V_per_s": f.number("max_ramp_V_per_s", required=True, positive=True,
                                     lo=RAMP_RANGE_V_PER_S[0], hi=RAMP_RANGE_V_PER_S[1]),
        "discharge_wait_s": f.number("discharge_wait_s", default=None, lo=0.0, hi=MAX_DWELL_S),
        "discharge_R_ohm": f.number("discharge_R_ohm", default=None, positive=True,
                                    lo=DISCHARGE_R_RANGE_OHM[0], hi=DISCHARGE_R_RANGE_OHM[1]),
        "safe_V": f.number("safe_V", default=1.0, positive=True, lo=SAFE_V_RANGE[0],
                           hi=SAFE_V_RANGE[1]),
        "allow_above_rated": f.boolean("allow_above_rated", default=False),
        "bias_tolerance_V": f.number("bias_tolerance_V", default=0.05, positive=True,
                                     lo=BIAS_TOLERANCE_RANGE_V[0], hi=BIAS_TOLERANCE_RANGE_V[1]),
        "temp_tolerance_C": f.number("temp_tolerance_C", default=2.0, positive=True,
                                     lo=TEMP_TOLERANCE_RANGE_C[0], hi=TEMP_TOLERANCE_RANGE_C[1]),
    }
    f.done()
    if lim["discharge_wait_s"] is None and lim["discharge_R_ohm"] is None:
        raise UserError(
            f"{where}: field 'limits.discharge_wait_s': missing; give it, or discharge_R_ohm "
            "(the resistance the parts discharge through) to have it computed as R*C*ln(V0/V_safe)"
        )
    return lim


# --------------------------------------------------------------------------- resolving


def resolve_samples(plan: Plan, channels: Iterable[SampleRef]) -> list[SampleRef]:
    """The plan's samples, or every channel of the bench's fixture; checked against the bench."""
    bench = {c.channel: c for c in channels}
    if plan.samples is None:
        if not bench:
            raise UserError(f"{plan.source}: no [[samples]] in the plan and no channels in the bench file")
        return [bench[ch] for ch in sorted(bench)]
    for i, s in enumerate(plan.samples, 1):
        if bench and s.channel not in bench:
            raise UserError(
                f"{plan.source}: field 'samples[{i}].channel': channel {s.channel} is not in the bench "
                f"file (it has {sorted(bench)})"
            )
    return list(plan.samples)


def check_sample(plan: Plan, s: SampleRef, parts: Mapping[str, Any], supply_range_V: tuple[float, float] | None = None):
    """Refuse a sample whose part is unknown, or whose planned bias exceeds its rating or the supply."""
    part = parts.get(s.part_id)
    if part is None:
        raise UserError(
            f"{plan.source}: sample {s.sample_id!r}: part {s.part_id!r} is not in the parts catalogue; "
            "add it to the parts file (--parts) or correct part_id"
        )
    seq = plan.sequence(part.rated_V)
    vmax = max(abs(v) for _, v in seq)
    if vmax > part.rated_V * (1 + 1e-9) and not plan.limits["allow_above_rated"]:
        raise UserError(
            f"{plan.source}: field 'bias': {vmax:g} V exceeds the rated voltage {part.rated_V:g} V of "
            f"part {part.id} (sample {s.sample_id}); lower the bias or set limits.allow_above_rated = true"
        )
    if supply_range_V is not None:
        lo, hi = supply_range_V
        vals = [v for _, v in seq]
        if min(vals) < lo - 1e-9 or max(vals) > hi + 1e-9:
            raise UserError(
                f"{plan.source}: field 'bias': sample {s.sample_id} needs {min(vals):g} .. {max(vals):g} V, "
                f"beyond the supply's range {lo:g} .. {hi:g} V; lower the bias"
            )
    return part


def meter_conditions(plan: Plan, part: Any) -> MeterConditions:
    """The plan's meter settings, with the standard conditions for whatever it leaves open."""
    m = plan.measure
    stdc = std.standard_conditions(part.class_code, part.nominal_C_F)
    freq = m["freq_Hz"] if m["freq_Hz"] is not None else stdc.freq_Hz
    level = m["ac_level_Vrms"] if m["ac_level_Vrms"] is not None else stdc.ac_level_Vrms
    function = m["function"] or std.default_function(part.nominal_C_F, freq)
    given = [k for k in ("freq_Hz", "ac_level_Vrms") if m[k] is not None]
    if len(given) == 2:
        source = f"plan {plan.source}"
    elif given:
        source = f"plan {plan.source} ({', '.join(given)}); rest: {stdc.source}"
    else:
        source = stdc.source
    return MeterConditions(function, float(freq), float(level), source)


def build_sweeps(
    plan: Plan,
    samples: Iterable[SampleRef],
    parts: Mapping[str, Any],
    supply_range_V: tuple[float, float] | None = None,
) -> list[SampleSweep]:
    """Everything the engine will do, checked, before any instrument is touched."""
    out = []
    for s in samples:
        part = check_sample(plan, s, parts, supply_range_V)
        cond = meter_conditions(plan, part)
        if plan.adaptive is not None:
            planner = adaptive_planner(plan, part)
            seq = planner.first_pass().points
            pts = tuple(PlannedPoint(s.sample_id, 1, i, br, v) for i, (br, v) in enumerate(seq))
            out.append(SampleSweep(s, part, cond, pts, planner))
            continue
        pts = PlannedPoints(s.sample_id, plan.sequence(part.rated_V), plan.bias["repeats"])
        out.append(SampleSweep(s, part, cond, pts))
    from benchkit.sweep.temperature import expand_sweeps

    return expand_sweeps(plan, out)  # the temperature loop around the bias sweep, if planned


def adaptive_planner(plan: Plan, part: Any):
    """The LoopPlanner of one sample: from 0 V to the top of the plan's range for its part."""
    from benchkit.sweep.adaptive import AdaptiveSettings, LoopPlanner

    top = max(plan.leg_magnitudes(part.rated_V))
    sign = -1.0 if plan.bias["polarity"] == "negative" else 1.0
    try:
        settings = AdaptiveSettings.from_plan(plan.adaptive)
        return LoopPlanner(sign * top, settings, plan.bias["branches"])
    except ValueError as exc:
        raise UserError(f"{plan.source}: field 'adaptive': {exc}") from None


def discharge_wait_s(plan: Plan, sweeps: Iterable[SampleSweep]) -> tuple[float, str]:
    """Wait after the output goes off: the plan's value, or t = R*C*ln(V0/V_safe).

    [common practice: exponential RC discharge through the fixture's bleed path]
    """
    lim = plan.limits
    if lim["discharge_wait_s"] is not None:
        return float(lim["discharge_wait_s"]), "plan limits.discharge_wait_s"
    best = 0.0
    for sw in sweeps:
        v0 = max(abs(v) for _, v in sw.points.seq) if isinstance(sw.points, PlannedPoints) \
            else max(abs(p.bias_V) for p in sw.points)
        if sw.adaptive is not None:  # its loops reach the planner's top, planned or not yet
            v0 = max(v0, abs(sw.adaptive.top_V))
        if v0 > lim["safe_V"]:
            best = max(best, lim["discharge_R_ohm"] * sw.part.nominal_C_F * math.log(v0 / lim["safe_V"]))
    if best > MAX_DWELL_S:
        raise UserError(
            f"{plan.source}: field 'limits.discharge_R_ohm': R*C*ln(V0/V_safe) = {best:.4g} s is "
            f"longer than {MAX_DWELL_S:g} s; give a smaller bleed resistance or a discharge_wait_s")
    return best, (
        f"R*C*ln(V0/V_safe) with R = {lim['discharge_R_ohm']:g} ohm, the largest nominal C, "
        f"V_safe = {lim['safe_V']:g} V"
    )


# --------------------------------------------------------------------------- field checks


def _is_number(v: Any) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v)


class _Fields:
    """Reads fields of one table, each with one clear error; unknown fields are refused."""

    def __init__(self, data: Mapping, where: str, prefix: str):
        self.data, self.where, self.prefix = data, where, prefix
        self._seen: set[str] = set()

    def _err(self, key: str, what: str) -> UserError:
        return UserError(f"{self.where}: field {safe_repr(self.prefix + str(key))}: {what}")

    def seen(self, key: str) -> None:
        self._seen.add(key)

    def take(self, key: str, required: bool = False, default: Any = None) -> Any:
        self._seen.add(key)
        if key not in self.data or self.data[key] is None:
            if required:
                raise self._err(key, "missing; add it to the plan")
            return default
        return self.data[key]

    def table(self, key: str, required: bool = False) -> Mapping:
        v = self.take(key, required=required, default={})
        if not isinstance(v, Mapping):
            raise self._err(key, f"must be a table [{self.prefix}{key}]")
        return v

    def number(self, key, required=False, default=None, lo=None, hi=None, positive=False):
        present = self.data.get(key) is not None
        v = self.take(key, required=required, default=default)
        if not present:
            return default
        if not _is_number(v):
            raise self._err(key, f"must be a number (got {safe_repr(v)})")
        if positive and v <= 0:
            raise self._err(key, f"must be a positive number (got {v!r})")
        if lo is not None and v < lo:
            raise self._err(key, f"must be at least {lo:g} (got {v!r})")
        if hi is not None and v > hi:
            raise self._err(key, f"must be at most {hi:g} (got {v!r})")
        return float(v)

    def ident(self, key):
        """A required id (sample_id, part_id): non-empty, short, printable."""
        v = self.string(key, required=True, nonempty=True)
        return check_id(v, self.where, self.prefix + key)

    def integer(self, key, required=False, default=None, lo=None, hi=None):
        v = self.take(key, required=required, default=default)
        if v is None:
            return default
        if isinstance(v, bool) or not isinstance(v, int):
            raise self._err(key, f"must be a whole number (got {safe_repr(v)})")
        if lo is not None and v < lo:
            raise self._err(key, f"must be at least {lo} (got {v!r})")
        if hi is not None and v > hi:
            raise self._err(key, f"must be at most {hi} (got {v!r})")
        return int(v)

    def string(self, key, required=False, default=None, nonempty=False):
        v = self.take(key, required=required, default=default)
        if v is None:
            return default
        if not isinstance(v, str):
            raise self._err(key, f"must be a string (got {safe_repr(v)})")
        if nonempty and not v.strip():
            raise self._err(key, "must not be empty")
        return v

    def boolean(self, key, default=False):
        v = self.take(key, default=default)
        if not isinstance(v, bool):
            raise self._err(key, f"must be true or false (got {safe_repr(v)})")
        return v

    def choice(self, key, choices, default=None, upper=False):
        v = self.take(key, required=default is None, default=default)
        vv = v.upper() if upper and isinstance(v, str) else v
        if vv not in choices:
            raise self._err(key, f"must be one of {', '.join(map(repr, choices))} (got {safe_repr(v)})")
        return vv

    def string_list(self, key, default, choices):
        v = self.take(key, default=default)
        if not isinstance(v, list) or any(x not in choices for x in v):
            raise self._err(key, f"must be a list of {', '.join(map(repr, choices))} (got {safe_repr(v)})")
        return list(v)

    def refuse_unknown(self, known: Iterable[str]) -> None:
        """Refuse a key not in `known` first, with the nearest known spelling."""
        known = tuple(known)
        unknown = sorted(set(self.data) - set(known), key=str)
        if unknown:
            raise self._err(unknown[0], "unknown field" + did_you_mean(unknown[0], known))

    def done(self) -> None:
        unknown = sorted(set(self.data) - self._seen, key=str)
        if unknown:
            raise self._err(unknown[0], "unknown field" + did_you_mean(unknown[0], self._seen))

"""Impedance against frequency at each bias point: the plan's [frequency] table and its rows.

Plan (optional table; without it a run measures at one frequency as before):

    [frequency]
    list_Hz = [100, 1000, 1e4]          # an explicit list, or:
    start_Hz = 100.0; stop_Hz = 10e6; points_per_decade = 5
    n_readings = 8                      # default: measure.n_readings
    ac_level_Vrms = 0.5                 # default: the sample's measure level
    function = "auto"                   # | "CSRS" | "ZTD"
    [frequency.correction]              # optional: open/short correction of the fixture
    open_channel = 15; short_channel = 16   # measured through the scanner's positions, or
    residuals_file = "fixture.csv"          # read from a file (benchkit/compensation.py)

At every bias point, after the settle rule and the point's own reading, the meter steps
through the list (ascending) and each frequency becomes one more row of points.csv, flagged
`freq_list`: C_F = Cs and Rs_ohm = Rs of the corrected impedance, D = w*Cs*Rs [published:
impedance-measurement handbook relations], so Z = Rs - j/(w*Cs) is in the row. Above
self-resonance the part is inductive and Cs is negative, as a meter shows it.

Function "auto": Cs-Rs while the part is capacitive; from the first frequency where a Cs-Rs
reading comes out inductive (Im Z > 0), |Z|-theta (ZTD) for the rest of the list, the
function that suits an inductive impedance [common practice]. The point and its frequency
rows are written in one transaction, so a resume never finds half a list.
"""

from __future__ import annotations

import math
from typing import Any, Mapping

import numpy as np

from benchkit.errors import UserError

FREQ_FLAG = "freq_list"
FUNCTION_CHOICES = ("AUTO", "CSRS", "ZTD")
RESIDUALS_FILE = "residuals.csv"
MAX_FREQUENCIES = 401


def is_frequency_row(row: Mapping) -> bool:
    return FREQ_FLAG in set(filter(None, str(row.get("flags") or "").split(";")))


# --- plan -----------------------------------------------------------------------------------

def parse_frequency(raw: Any, where: str, meter_range_Hz: tuple[float, float],
                    level_range_Vrms: tuple[float, float]) -> dict:
    """The normalised [frequency] table, or UserError naming the field."""
    def bad(field: str, what: str):
        return UserError(f"{where}: field 'frequency.{field}': {what}")

    def number(key, lo=None, hi=None, required=False):
        v = raw.get(key)
        if v is None:
            if required:
                raise bad(key, "missing")
            return None
        if not isinstance(v, (int, float)) or isinstance(v, bool) or not math.isfinite(v):
            raise bad(key, f"must be a number, got {v!r}")
        if (lo is not None and v < lo) or (hi is not None and v > hi):
            raise bad(key, f"must be within {lo:g} .. {hi:g}, got {v!r}")
        return float(v)

    if not isinstance(raw, Mapping):
        raise UserError(f"{where}: field 'frequency': must be a table [frequency]")
    known = {"list_Hz", "start_Hz", "stop_Hz", "points_per_decade", "n_readings",
             "ac_level_Vrms", "function", "correction"}
    for key in raw:
        if key not in known:
            raise bad(key, f"unknown field; known: {', '.join(sorted(known))}")
    lo, hi = meter_range_Hz
    if "list_Hz" in raw:
        if any(k in raw for k in ("start_Hz", "stop_Hz", "points_per_decade")):
            raise bad("list_Hz", "give either list_Hz or start_Hz/stop_Hz/points_per_decade, not both")
        v = raw["list_Hz"]
        if (not isinstance(v, list) or not v or not all(
                isinstance(x, (int, float)) and not isinstance(x, bool) and math.isfinite(x) for x in v)):
            raise bad("list_Hz", "must be a non-empty array of frequencies in Hz")
        freqs = sorted(float(x) for x in v)
        if any(b <= a for a, b in zip(freqs, freqs[1:])):
            raise bad("list_Hz", "lists a frequency twice")
        spec = {"list_Hz": freqs}
    else:
        start = number("start_Hz", lo, hi, required=True)
        stop = number("stop_Hz", lo, hi, required=True)
        ppd = raw.get("points_per_decade")
        if not isinstance(ppd, int) or isinstance(ppd, bool) or not 1 <= ppd <= 100:
            raise bad("points_per_decade", f"must be a whole number 1 .. 100, got {ppd!r}")
        if not stop > start:
            raise bad("stop_Hz", "must be above start_Hz")
        n = int(round(math.log10(stop / start) * ppd)) + 1
        freqs = [float(x) for x in np.logspace(math.log10(start), math.log10(stop), n)]
        freqs[0], freqs[-1] = start, stop
        spec = {"start_Hz": start, "stop_Hz": stop, "points_per_decade": ppd}
    if freqs[0] < lo or freqs[-1] > hi:
        raise bad("list_Hz", f"frequencies must lie within the meter's {lo:g} .. {hi:g} Hz")
    if len(freqs) > MAX_FREQUENCIES:
        raise bad("list_Hz", f"{len(freqs)} frequencies; at most {MAX_FREQUENCIES}")
    n_read = raw.get("n_readings")
    if n_read is not None and (not isinstance(n_read, int) or isinstance(n_read, bool)
                               or not 1 <= n_read <= 1000):
        raise bad("n_readings", f"must be a whole number 1 .. 1000, got {n_read!r}")
    func = str(raw.get("function", "auto")).upper()
    if func not in FUNCTION_CHOICES:
        raise bad("function", f"must be auto, CSRS or ZTD, got {raw.get('function')!r}")
    return {**spec, "freq_Hz": freqs, "n_readings": n_read,
            "ac_level_Vrms": number("ac_level_Vrms", *level_range_Vrms),
            "function": func.lower() if func == "AUTO" else func,
            "correction": _parse_correction(raw.get("correction"), where)}


def _parse_correction(raw: Any, where: str) -> dict | None:
    if raw is None:
        return None
    if not isinstance(raw, Mapping):
        raise UserError(f"{where}: field 'frequency.correction': must be a table")
    keys = set(raw)
    if keys == {"residuals_file"} and isinstance(raw["residuals_file"], str) and raw["residuals_file"]:
        return {"residuals_file": raw["residuals_file"]}
    if keys == {"open_channel", "short_channel"}:
        chans = [raw["open_channel"], raw["short_channel"]]
        if (not all(isinstance(c, int) and not isinstance(c, bool) and 1 <= c <= 16 for c in chans)
                or chans[0] == chans[1]):
            raise UserError(f"{where}: field 'frequency.correction': open_channel and short_channel "
                            f"must be two different scanner channels 1 .. 16, got {chans}")
        return {"open_channel": chans[0], "short_channel": chans[1]}
    raise UserError(f"{where}: field 'frequency.correction': give open_channel and short_channel "
                    "(the scanner's open and short positions), or residuals_file")


# --- readings -------------------------------------------------------------------------------

def reading_to_Z(primary: float, secondary: float, function: str, freq_Hz: float) -> complex:
    """Z from a Cs-Rs or |Z|-theta reading [published: impedance-measurement handbook relations]."""
    if function == "ZTD":
        return complex(primary * math.cos(math.radians(secondary)),
                       primary * math.sin(math.radians(secondary)))
    if function == "CSRS":
        return complex(secondary, -1.0 / (2.0 * math.pi * freq_Hz * primary))
    raise ValueError(f"no impedance from function {function!r}")


def row_values(Z: complex, freq_Hz: float) -> tuple[float, float, float]:
    """(Cs_F, D, Rs_ohm) of an impedance: Cs = -1/(w*Im Z), D = w*Cs*Rs."""
    w = 2.0 * math.pi * freq_Hz
    Cs = -1.0 / (w * Z.imag) if Z.imag != 0 else math.inf
    return Cs, w * Cs * Z.real, Z.real


class FrequencyList:
    """The engine's frequency-list job (mixed into benchkit.sweep.engine.SweepEngine)."""

    residuals = None  # benchkit.compensation.Residuals, or None: uncorrected

    def _frequency_setup(self, run_dir, resumed: bool = False) -> None:
        """Before the first sample: the residuals, from the scanner's positions or a file
        (after a resume: the ones this run measured, from its residuals.csv)."""
        fq = self.plan.frequency
        if fq is None:
            return
        corr = fq["correction"]
        if resumed:
            if corr is not None:
                from benchkit.compensation import read_residuals

                path = corr.get("residuals_file") or run_dir / RESIDUALS_FILE
                self.residuals = read_residuals(path)
            return
        record = {"freq_Hz": list(fq["freq_Hz"]), "function": fq["function"],
                  "n_readings": fq["n_readings"] or self.plan.n_readings, "correction": None}
        if corr is not None:
            from benchkit.compensation import Residuals, read_residuals

            if "residuals_file" in corr:
                self.residuals = read_residuals(corr["residuals_file"])
                for f in fq["freq_Hz"]:
                    self.residuals.at(f)  # every frequency of the list is there
            else:
                Zo = self._fixture_position(corr["open_channel"], fq)
                Zs = self._fixture_position(corr["short_channel"], fq)
                self.residuals = Residuals(np.array(fq["freq_Hz"]), Zo, Zs,
                                           source=f"scanner open channel {corr['open_channel']}, "
                                                  f"short channel {corr['short_channel']}")
                from benchkit.atomic import write_text_atomic

                write_text_atomic(run_dir / RESIDUALS_FILE, self.residuals.csv_text())
            record["correction"] = {**self.residuals.summary(), **corr}
        self.log.meta["frequency_list"] = record
        self.log.event(self.t_s(), "frequency_list", n_frequencies=len(fq["freq_Hz"]),
                       correction=None if corr is None else record["correction"]["source"])
        self.log.save()

    def _fixture_position(self, channel: int, fq) -> np.ndarray:
        """Mean |Z|-theta readings of an open or short position at every frequency (0 V, off)."""
        self.scanner.select(channel)
        self.meter.function = "ZTD"
        self.meter.ac_level_Vrms = fq["ac_level_Vrms"] or 1.0
        n = fq["n_readings"] or self.plan.n_readings
        out = []
        for f in fq["freq_Hz"]:
            self.meter.freq_Hz = f
            zs = [reading_to_Z(r.primary, r.secondary, "ZTD", f)
                  for r in (self.meter.measure() for _ in range(n)) if not r.overload]
            if not zs:
                raise UserError(f"fixture position channel {channel}: every reading at {f:g} Hz "
                                "overloaded; check the open/short positions")
            out.append(complex(np.mean(zs)))
        self.scanner.open_all()
        return np.array(out)

    def _frequency_rows(self, sw, p, row: dict) -> list[dict]:
        """One row per frequency of the list at this bias point (after its own reading)."""
        fq = self.plan.frequency
        if fq is None:
            return []
        n = fq["n_readings"] or self.plan.n_readings
        level = fq["ac_level_Vrms"] or sw.conditions.ac_level_Vrms
        func = "CSRS" if fq["function"] == "auto" else fq["function"]
        self.meter.ac_level_Vrms = level
        self.meter.function = func
        rows = []
        for f in fq["freq_Hz"]:
            self.meter.freq_Hz = f
            zs, func, overload = self._impedance_readings(f, n, func, fq["function"] == "auto")
            if self.residuals is not None:
                zs = [self.residuals.correct(f, z) for z in zs]
            flags = [FREQ_FLAG] + (["overload"] if overload else [])
            Cs = D = Rs = std = None
            if zs:
                Cs, D, Rs = row_values(complex(np.mean(zs)), f)
                cs = [row_values(z, f)[0] for z in zs]
                std = float(np.std(cs, ddof=1)) if len(cs) >= 2 else None
            rows.append({**row, "function": func, "freq_Hz": f, "ac_level_set_Vrms": level,
                         "ac_level_dut_Vrms": float(self.meter.ac_dut_Vrms),
                         "C_F": Cs, "C_std_F": std, "D": D, "Rs_ohm": Rs,
                         "n_readings": len(zs), "t_s": self.t_s(), "settle_s": 0.0,
                         "drift_pct_per_s": None, "flags": ";".join(flags)})
        # back to the point's own conditions for the next bias step and its settle probe
        c = sw.conditions
        self.meter.function, self.meter.freq_Hz, self.meter.ac_level_Vrms = c.function, c.freq_Hz, c.ac_level_Vrms
        return rows

    def _impedance_readings(self, f, n, func, auto):
        """(readings as Z, function used, overload seen) at one frequency."""
        zs, overload = [], False
        for _ in range(n):
            r = self.meter.measure()
            if r.overload:
                overload = True
                continue
            z = reading_to_Z(r.primary, r.secondary, func, f)
            if auto and func == "CSRS" and z.imag > 0:  # inductive: |Z|-theta from here on
                self.meter.function = "ZTD"
                return self._impedance_readings(f, n, "ZTD", False)
            zs.append(z)
        return zs, func, overload
